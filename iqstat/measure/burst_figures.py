"""The last stages of a batch: the fits, fading, power-based Eb/N0, predicted BER, the result.

:func:`_stage_fit` runs the NDA (headline), decision-directed and data-aided fits
(:func:`iqstat.fit.fit_bursts_many`). :func:`_stage_available` gives Eb/N0 from power alone
(:mod:`iqstat.available`). :func:`_stage_fading` tests the sent tone's energies against the
constant-amplitude law (:mod:`iqstat.fading`; on decisions only from
FADING_DECIDED_MIN_ESN0_DB up) and refits the bursts that fade on the Rician model
(:mod:`iqstat.fit.rician`). :func:`_stage_predict` gives the BER theory predicts at the fitted
Eb/N0 for the burst's tone correlation (the mean over the two symbol lengths' correlations
where they differ; on a fading burst, the average over its fitted Rician law). :func:`_finish`
sets the flags (goodness of fit below GOF_FLAG_PVALUE, detection loss above
DETECTION_LOSS_FLAG_DB) and builds the :class:`~iqstat.results.BurstResult`.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
from scipy import optimize

from iqstat import theory
from iqstat.available import available_ebn0
from iqstat.fading import MIN_SYMBOLS as FADING_MIN_KNOWN
from iqstat.fading import FadingEstimate, fading_from_energies, k_from_gamma
from iqstat.fit import fit_bursts_many, ook_decision_threshold
from iqstat.fit.goodness_of_fit import faded_energy_laws
from iqstat.fit.level_mixture import fit_level_mixture
from iqstat.fit.rician import FADING_LR_MIN, fit_rician
from iqstat.measure.frame import _cap, _checked_as_is, _frame_symbols_many
from iqstat.measure.gram_classes import _fit_gram, _fit_z, _theory_rho
from iqstat.measure.work import MIN_FIT_SYMBOLS, _batched, _Context, _Work
from iqstat.results import BurstResult
from iqstat.theory.fading import ber_rician

#: Without known symbols the fading test uses the decisions only from this Es/N0 [dB] up:
#: below it wrong decisions pick noise branches and spread the energies by themselves.
FADING_DECIDED_MIN_ESN0_DB = 8.0

#: Goodness-of-fit p-value below which the branch energies are flagged as not AWGN-like.
GOF_FLAG_PVALUE = 1e-3

#: A burst whose decisions hold one tone (OOK: one state) in at least this share of at least
#: UNMODULATED_MIN_SYMBOLS symbols is flagged "unmodulated": a carrier, not the profile's
#: modulation (any real frame changes tone: a preamble, a sync word, scrambled data).
UNMODULATED_SHARE = 0.98
UNMODULATED_MIN_SYMBOLS = 200

#: Detection loss (available − detected Eb/N0) above which the burst is flagged, when its
#: 95 % interval also lies above zero (a loss the noise of the two figures cannot explain).
DETECTION_LOSS_FLAG_DB = 1.5


def _stage_fit(works: list[_Work], ctx: _Context) -> None:
    """The NDA (headline), decision-directed and data-aided fits of the batch."""
    m = ctx.profile.modulation

    def fits(batch: list[_Work]) -> None:
        out = fit_bursts_many(
            [_fit_z(w, *w.sel) for w in batch],
            [_fit_gram(w, *w.sel) for w in batch],
            modulation=m,
            known_list=[w.known for w in batch],
            min_known=MIN_FIT_SYMBOLS,
        )
        for w, (nda, dd, da) in zip(batch, out, strict=True):
            w.fit, w.fit_dd, w.fit_da = nda, dd, da

    _batched(works, fits)


def _stage_fading(batch: list[_Work], ctx: _Context) -> None:
    """Fading within each burst from the spread of its sent tone's energies (iqstat.fading),
    and the fading fit (iqstat.fit.rician) of the bursts that fade.

    The moment test needs the sent tones: known symbols, or decisions from
    FADING_DECIDED_MIN_ESN0_DB up. A burst without them whose energies fail the white-noise
    laws, or that shows a detection loss, may be a burst whose fades the constant-amplitude
    fit took for noise: the fading fit is tried on it, and kept when the likelihood ratio
    against a steady amplitude exceeds FADING_LR_MIN.

    Not tested where a continuous line is left in the band: its energy in the correlators
    spreads the sent tone's energies too, and the capture is flagged interference instead.
    """
    m = ctx.profile.modulation
    if ctx.detection.interfering_lines(ctx.symbol_rate_hz):
        return
    for w in batch:
        fit = w.fit
        if fit is None or not fit.converged or fit.noise_var is None:
            continue
        z = _fit_z(w, *w.sel)
        sent = None if w.known is None else np.asarray(w.known[: len(z)])
        if sent is None or np.count_nonzero(sent >= 0) < FADING_MIN_KNOWN:
            if fit.esn0_db is None or fit.esn0_db < FADING_DECIDED_MIN_ESN0_DB:
                if _suspect(w):
                    _try_fading_fit(w, m, z, ctx)
                continue
            sent = w.hard[w.sel[0] : w.sel[1]][: len(z)]
        use = sent >= 0
        energy = z.real**2 + z.imag**2
        if m == "ook":
            on = use & (sent == 1)  # the carrier's energy: "on" symbols only
            e, rest = energy[on, 0], energy[use & (sent == 0), 0]
        else:
            rows = np.flatnonzero(use)
            e = energy[rows, sent[rows]]
            others = np.ones(energy.shape, dtype=bool)
            others[rows, sent[rows]] = False
            rest = energy[rows][others[rows]]
        # The noise from the branches without the sent tone (or the "off" symbols): the fit's
        # N0 takes part of a fading amplitude's spread for noise. Where tones leak into each
        # other (|ρ| above 0.1), the fit's figure.
        leaky = m != "ook" and float(np.max(np.abs(w.gram - np.eye(len(w.gram))))) > 0.1
        n0 = fit.noise_var if leaky or rest.size < FADING_MIN_KNOWN else float(rest.mean())
        w.fading = fading_from_energies(e, n0)
        if w.fading is not None and w.fading.fading:
            w.flags.append("fading")
            start_k = min(max(k_from_gamma(w.fading.gamma), 0.01), 1e3)
            nda = _fading_fit(w, m, z, start_k, test=False)
            if nda.fit.converged:
                _use_fading_fit(w, m, z, nda, w.fading.z, ctx)


def _suspect(w: _Work) -> bool:
    """Whether a burst the moment test cannot judge looks as a fading one would: energies
    off the white-noise laws, or a detection loss beyond the noise of the two figures."""
    fit = w.fit
    if fit.gof_pvalue is not None and fit.gof_pvalue < GOF_FLAG_PVALUE:
        return True
    av = w.available
    if av is None or av.ebn0_db is None or fit.ebn0_db is None:
        return False
    lo = None if av.ebn0_db_ci95 is None else av.ebn0_db_ci95[0]
    return av.ebn0_db - fit.ebn0_db > DETECTION_LOSS_FLAG_DB and (lo is None or lo > fit.ebn0_db)


def _fading_fit(w: _Work, m: str, z: np.ndarray, start_k: float, test: bool):
    fit = w.fit
    return fit_rician(
        z, modulation=m, gram=None if m == "ook" else _fit_gram(w, *w.sel), priors=fit.priors,
        start_esn0=fit.esn0, start_noise_var=fit.noise_var, start_k=start_k, test=test,
    )  # fmt: skip


def _try_fading_fit(w: _Work, m: str, z: np.ndarray, ctx: _Context) -> None:
    """The fading fit of a burst the moment test could not judge, kept when the likelihood
    ratio against a steady amplitude exceeds FADING_LR_MIN."""
    nda = _fading_fit(w, m, z, 1.0, test=True)
    lr = nda.likelihood_ratio
    if not nda.fit.converged or lr is None or lr < FADING_LR_MIN:
        return
    # gamma and K are the fading fit's: _use_fading_fit sets them
    w.fading = FadingEstimate(gamma=0.0, k_db=None, z=0.0, fading=True, symbols=len(z))
    w.flags.append("fading")
    _use_fading_fit(w, m, z, nda, math.sqrt(lr), ctx)


def _use_fading_fit(w: _Work, m: str, z: np.ndarray, nda, z_stat: float, ctx: _Context) -> None:
    """Make the fading fit the burst's headline (the constant-amplitude fit kept beside it as
    ``fit_steady``, which reads low by the spread it takes for noise), and redo the
    data-aided fit the same way."""
    fit = w.fit
    k = nda.k_factor
    known = None if w.known is None else np.asarray(w.known[: len(z)])
    on_share = fit.priors[1] if m == "ook" else 1.0
    w.levels = fit_level_mixture(
        z, modulation=m, noise_var=nda.fit.noise_var, mean_esn0=nda.fit.esn0 / on_share,
        priors=fit.priors, sent=known,
    )  # fmt: skip
    w.fit_steady, w.fit = fit, nda.fit
    law = w.levels.support() if w.levels.converged else ()
    if law:
        # The energies against the burst's own level law: what is left is the noise's.
        n0 = nda.fit.noise_var
        sent = np.full(len(z), -1) if known is None else known
        stat, p, count = faded_energy_laws(
            z.real**2 + z.imag**2, n0, [(wt, 0.0, g * n0) for g, wt in law],
            None if m == "ook" else _fit_gram(w, *w.sel), np.asarray(fit.priors), sent,
            m == "ook",
        )  # fmt: skip
        w.fit = dataclasses.replace(
            w.fit, gof_statistic=stat, gof_pvalue=p, gof_n_values=count,
            gof_test="ks-pit-branchwise-level-law",
        )  # fmt: skip
        if m == "ook":
            _redecide_ook(w, ctx)
    w.fading = dataclasses.replace(
        w.fading, k_db=nda.k_db, gamma=(1.0 + 2.0 * k) / (1.0 + k) ** 2, z=z_stat,
        k_source="fading-fit", esn0_law=law,
    )  # fmt: skip
    if w.fit_da is None or not w.fit_da.converged or w.known is None:
        return
    sent = np.asarray(w.known[: len(z)])
    rows = np.flatnonzero(sent >= 0)
    gram = None if m == "ook" else _fit_gram(w, *w.sel)
    da = fit_rician(
        z[rows], modulation=m,
        gram=gram if gram is None or np.ndim(gram) == 2 else np.asarray(gram)[rows],
        priors=fit.priors, sent=sent[rows], start_esn0=nda.fit.esn0,
        start_noise_var=nda.fit.noise_var, start_k=k,
    )  # fmt: skip
    if da.fit.converged:
        w.fit_da = da.fit


def _stage_available(batch: list[_Work], ctx: _Context) -> None:
    """Eb/N0 from power alone (iqstat.available), in the band of the outer tones ±
    AVAILABLE_BAND_SYMBOLS symbol rates: measured in that band, not the full capture band,
    because at 52 samples per bit the full-band SNR is ~17 dB below Eb/N0 and a 1 % error of
    the gap noise would move the result by half a dB."""
    bits = ctx.profile.bits_per_symbol
    det = ctx.detection
    n0 = 10.0 ** (det.noise_psd_db_per_hz / 10.0) if np.isfinite(det.noise_psd_db_per_hz) else 0.0
    for w in batch:
        energy, width_hz = w.band
        if energy is None:
            continue
        w.available = available_ebn0(
            energy,
            width_hz,
            len(w.x),
            w.burst.stop_sample - w.burst.start_sample,
            n0,
            det.noise_psd_dof,
            w.link.symbol_rate_hz * bits,
            ctx.fs,
        )


def _stage_predict(batch: list[_Work], ctx: _Context) -> None:
    """The BER theory predicts at each fitted Eb/N0, for the burst's tone correlation."""
    m = ctx.profile.modulation
    use = [w for w in batch if w.fit.converged and w.fit.ebn0_db is not None]
    if not use:
        return
    ebn0 = 10.0 ** (np.array([w.fit.ebn0_db for w in use]) / 10.0)
    if m == "2fsk":
        rho = np.array([_theory_rho(np.abs(w.gram), m) for w in use])
    elif m == "4fsk":
        # A zero matrix is the orthogonal case (what _theory_rho's 0.0 stands for).
        rho = np.stack(
            [
                r if isinstance(r, np.ndarray) else np.zeros((4, 4))
                for r in (_theory_rho(np.abs(w.gram), m) for w in use)
            ]
        )
    else:
        rho = 0.0
    pred = np.atleast_1d(theory.predicted_ber(ebn0, m, rho_abs=rho))
    for i, w in enumerate(use):
        if w.fit_steady is not None:
            # Fading fit: the white-noise BER averaged over the burst's own law of Es/N0
            # (the grid mixture; the Rician law where the mixture did not converge).
            r_i = rho[i] if m != "ook" else 0.0
            if m == "ook" and w.levels is not None and w.levels.converged:
                pred[i] = _ook_faded_ber(w)
            elif w.levels is not None and w.levels.converged:
                scale = 1.0 / ctx.profile.bits_per_symbol
                pred[i] = w.levels.average(
                    lambda g, s=scale, r=r_i: theory.predicted_ber(g * s, m, rho_abs=r)
                )
            else:
                pred[i] = ber_rician(ebn0[i], m, 10.0 ** (w.fading.k_db / 10.0), r_i)
        elif m != "ook" and w.sym_grams is not None:
            # Symbols of two lengths, two tone correlations: the mean of their BERs.
            pred[i] = sum(
                share * float(theory.predicted_ber(ebn0[i], m, rho_abs=_theory_rho(np.abs(g), m)))
                for g, share in w.gram_classes
            )
    for w, p in zip(use, pred, strict=True):
        w.predicted_ber = float(p)


def _ook_miss(levels, b: float) -> float:
    """P(|z| < threshold | on), averaged over a level law: 1 − Q1(a_j, b), a_j² = 2γ_j, b the
    threshold over √(N0/2); from ber_ook = ½·[e^{−b²/2} + 1 − Q1(a, b)] at γ_b = γ_j/2."""
    fa = math.exp(-0.5 * b * b)
    return levels.average(lambda g: 2.0 * np.asarray(theory.ber_ook(0.5 * g, threshold=b)) - fa)


def _redecide_ook(w: _Work, ctx: _Context) -> None:
    """Decide a fading OOK burst again with the threshold that minimises the error
    probability of its fitted fading model (one threshold for the burst, over its level law),
    and check its payload again: the constant-amplitude fit's threshold, set with the fades
    taken for noise, sits far too high."""
    n0, p_on = w.fit.noise_var, float(w.fit.priors[1])
    sigma = math.sqrt(0.5 * n0)

    def pb(b: float) -> float:
        return (1.0 - p_on) * math.exp(-0.5 * b * b) + p_on * _ook_miss(w.levels, b)

    top = math.sqrt(2.0 * float(np.max(w.levels.levels))) + 8.0
    b = float(optimize.minimize_scalar(pb, bounds=(0.0, top), method="bounded").x)
    w.ook_threshold = b * sigma
    w.hard = (np.abs(w.z_all[:, 0]) > w.ook_threshold).astype(np.int64)
    if w.burst.part > 0:
        known = w.known
        _checked_as_is([w], ctx)  # a later part of a long transmission: checked as it stands
        w.known = known
    elif w.frame is not None and w.frame.found:
        ((_, _, check),) = _frame_symbols_many(
            [(w.frame, w.hard, w.k1, w.timing, _cap(w))], 2, ctx.header, ctx.layout, ctx.profile
        )
        w.check = check


def _ook_faded_ber(w: _Work) -> float:
    """BER of a fading OOK burst with the threshold its decisions used (one for the burst: it
    does not follow the fades), averaged over the burst's own law of the "on" Es/N0:
    p_off·e^{−b²/2} + p_on·Σ_j w_j·(1 − Q1(a_j, b)), a_j² = 2γ_j, b the threshold over
    √(N0/2) (Annamalai & Bhargava's law, iqstat.theory.ber_ook, with the priors as fitted)."""
    first = w.first_fit
    p_on = float(first.priors[1])
    t = w.ook_threshold
    if t is None:
        t = ook_decision_threshold(first.amplitude, first.noise_var, p_on)
    b = t / math.sqrt(0.5 * w.fit.noise_var)
    return float((1.0 - p_on) * math.exp(-0.5 * b * b) + p_on * _ook_miss(w.levels, b))


def _finish(w: _Work, ctx: _Context) -> None:
    """Flags and the burst's result."""
    fit, flags = w.fit, w.flags
    if w.check is not None and not w.check.locked:
        flags.append("pattern-not-locked")
    if not fit.converged:
        flags.append("fit-failed")
    elif fit.gof_pvalue is not None and fit.gof_pvalue < GOF_FLAG_PVALUE:
        flags.append("not-awgn")
    if w.hard is not None:
        hard = np.asarray(w.hard[w.sel[0] : w.sel[1]])
        if hard.size >= UNMODULATED_MIN_SYMBOLS:
            top = np.bincount(hard[hard >= 0]).max(initial=0) / hard.size
            if top >= UNMODULATED_SHARE:
                flags.append("unmodulated")
    b = w.burst
    res = BurstResult(
        index=b.index,
        start_sample=b.start_sample,
        stop_sample=b.stop_sample,
        power_dbfs=b.power_dbfs,
        symbols=w.sel[1] - w.sel[0],
        link=w.link,
        timing=w.timing,
        frame=w.frame,
        fit=fit,
        fit_da=w.fit_da,
        fit_dd=w.fit_dd,
        bit_check=w.check,
        available=w.available,
        fading=w.fading,
        fit_steady=w.fit_steady,
        part=b.part,
        predicted_ber=w.predicted_ber,
        flags=(),
        message=fit.message,
    )
    loss, loss_ci = res.detection_loss_db, res.detection_loss_db_ci95
    if loss is not None and loss > DETECTION_LOSS_FLAG_DB and (loss_ci is None or loss_ci[0] > 0):
        flags.append("detection-loss")
    w.result = dataclasses.replace(res, flags=tuple(flags))
