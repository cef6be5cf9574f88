"""The capture's summary from its bursts: pooled Eb/N0, error rates, margin and flags."""

from __future__ import annotations

import math

import numpy as np
from scipy import special

from iqstat import theory
from iqstat.available import detection_loss_ci95, pool_available
from iqstat.errors import IqstatError
from iqstat.patterns import clopper_pearson
from iqstat.profile import FrameLayout
from iqstat.results import BurstResult, Summary
from iqstat.theory.fading import required_ebn0_db_rician
from iqstat.units import db

#: Per-burst flags that also flag the capture when any burst raises them.
BURST_FLAGS_RAISED = (
    "fading",
    "sync-not-found",
    "header-mismatch",
    "pattern-not-locked",
    "not-awgn",
    "detection-loss",
    "fit-failed",
    "too-few-symbols",
    "not-measured",
    "link-not-estimated",
    "unmodulated",
)
#: Fraction of full-scale samples above which a capture is flagged as clipped.
CLIPPING_FLAG_FRACTION = 1e-4
#: Spread of per-burst Eb/N0 (max − min) above which the capture is flagged.
LEVEL_SPREAD_FLAG_DB = 3.0


def weighted_ebn0(results: list[BurstResult]):
    """Symbol-weighted mean of per-burst linear Eb/N0, its 95 % interval and the spread."""
    ok = [r for r in results if r.ebn0_db is not None]
    if not ok:
        return None, None, None, None, None
    w = np.array([r.symbols for r in ok], dtype=float)
    g = np.array([r.ebn0 for r in ok])
    mean = float(np.sum(w * g) / w.sum())
    # Variance of each burst's estimate from its interval (Wald, symmetric in dB).
    var = []
    for r in ok:
        lo, hi = r.fit.ebn0_db_ci95 if r.fit.ebn0_db_ci95 else (r.ebn0_db, r.ebn0_db)
        sd_db = (hi - lo) / (2 * 1.959964)
        var.append((r.ebn0 * math.log(10) / 10 * sd_db) ** 2)
    var_mean = float(np.sum(w**2 * np.array(var)) / w.sum() ** 2)
    sd_db = 10 / math.log(10) * math.sqrt(var_mean) / mean
    mean_db = float(db(mean))
    ci = (mean_db - 1.959964 * sd_db, mean_db + 1.959964 * sd_db)
    d = np.array([r.ebn0_db for r in ok])
    std = float(np.std(d, ddof=1)) if len(d) > 1 else None
    return mean_db, ci, float(d.min()), float(d.max()), std


def summarise(results, profile, link_sum, facts, detection, rho) -> Summary:
    flags: list[str] = []
    m = profile.modulation
    mean_db, ci, lo, hi, std = weighted_ebn0(results)
    ok = [r for r in results if r.ebn0_db is not None]
    symbols = sum(r.symbols for r in ok)
    pred = None
    if ok:
        weights = np.array([r.symbols for r in ok], dtype=float)
        per_burst = np.atleast_1d(theory.predicted_ber(np.array([r.ebn0 for r in ok]), m, rho))
        # A burst fitted on the fading model has its BER averaged over its fading law.
        faded = [i for i, r in enumerate(ok) if r.fit_steady is not None]
        for i in faded:
            per_burst[i] = ok[i].predicted_ber
        pred = float(
            theory.mean_ber_over_bursts(np.array([r.ebn0 for r in ok]), weights, m, rho_abs=rho)
            if not faded
            else np.sum(weights * per_burst) / np.sum(weights)
        )
    checked = [r for r in results if r.bit_check is not None and r.bit_check.locked]
    errors = sum(r.bit_check.bit_errors for r in checked) if checked else None
    n_bits = sum(r.bit_check.bits_checked for r in checked) if checked else None
    meas = ci_meas = None
    if n_bits:
        meas = errors / n_bits
        ci_meas = clopper_pearson(errors, n_bits)
    req = marg = worst = None
    if profile.required_ber is not None:
        try:
            req = float(theory.required_ebn0_db(profile.required_ber, m, rho_abs=rho))
        except IqstatError:
            req = None
        if req is not None and mean_db is not None:
            marg = mean_db - req
            worst = lo - req
            if marg < 0:
                flags.append("below-requirement")
            elif worst < 0:
                flags.append("some-bursts-below-requirement")
    fading_k_db = fading_req = fading_marg = None
    k_fits = [r.fading.k_db for r in ok if r.fit_steady is not None]
    if k_fits:
        fading_k_db = float(np.median(k_fits))
        if profile.required_ber is not None:
            fading_req = required_ebn0_db_rician(
                profile.required_ber, m, 10.0 ** (fading_k_db / 10.0), 0.0 if m == "ook" else rho
            )
        if fading_req is not None and mean_db is not None:
            fading_marg = mean_db - fading_req
            if fading_marg < 0 and "below-requirement" not in flags:
                flags.append("below-requirement-in-fading")
    esn0_db = None if mean_db is None else mean_db + float(db(profile.bits_per_symbol))
    da = [r.fit_da.ebn0_db for r in ok if r.fit_da is not None and r.fit_da.converged]
    dd = [r.fit_dd.ebn0_db for r in ok if r.fit_dd is not None and r.fit_dd.converged]
    with_av = [r for r in ok if r.available is not None]
    pooled = pool_available([r.available for r in with_av], [r.symbols for r in with_av])
    avail = None if pooled is None else pooled.ebn0_db
    loss = None if (avail is None or mean_db is None) else avail - mean_db
    if not results:
        flags.append("no-bursts")
    elif not ok:
        flags.append("nothing-measured")
    if facts.clipped_fraction is not None and facts.clipped_fraction > CLIPPING_FLAG_FRACTION:
        flags.append("clipping")
    if detection.interfering_lines(link_sum.symbol_rate_hz):
        flags.append("interference")
    if not facts.is_complex:
        flags.append("real-valued-capture")
    if detection.gain_span_db > 0:
        flags.append("gain-steps")
    for fl in BURST_FLAGS_RAISED:
        if any(fl in r.flags for r in results):
            flags.append(fl)
    if lo is not None and hi - lo > LEVEL_SPREAD_FLAG_DB:
        flags.append("level-spread")
    # The prediction for the bits that were checked: the bit-weighted mean of those bursts'
    # own predictions (a burst that lost its sync word in a fade is predicted, not counted).
    pred_checked = None
    with_pred = [r for r in checked if r.predicted_ber is not None]
    if with_pred and n_bits:
        w_bits = np.array([r.bit_check.bits_checked for r in with_pred], dtype=float)
        p_b = np.array([r.predicted_ber for r in with_pred])
        pred_checked = float(np.sum(w_bits * p_b) / np.sum(w_bits)) if w_bits.sum() else None
    if meas is not None and pred_checked is not None and n_bits:
        # Measured errors far outside what the fitted Eb/N0 predicts point at something
        # other than white noise (interference, fading, bit slips).
        # Binomial tails by the routines under scipy.stats.binom.cdf/sf (errors >= 0).
        p_lo = special.bdtr(int(errors), int(n_bits), pred_checked)
        p_hi = special.bdtrc(int(errors) - 1, int(n_bits), pred_checked)
        if min(p_lo, p_hi) < 1e-4:
            flags.append("ber-disagrees-with-ebn0")
    if not results:
        message = detection.message
    elif not ok:
        message = f"{len(results)} burst(s) found but none could be measured"
    else:
        message = f"{len(ok)} of {len(results)} burst(s) measured"
    return Summary(
        bursts=len(results),
        bursts_measured=len(ok),
        symbols=symbols,
        ebn0_db=mean_db,
        ebn0_db_ci95=ci,
        ebn0_db_min=lo,
        ebn0_db_max=hi,
        ebn0_db_std=std,
        esn0_db=esn0_db,
        ebn0_db_da=_power_mean_db(da, None),
        ebn0_db_dd=_power_mean_db(dd, None),
        available_ebn0_db=avail,
        available_ebn0_db_ci95=None if pooled is None else pooled.ebn0_db_ci95,
        detection_loss_db=loss,
        detection_loss_db_ci95=detection_loss_ci95(pooled, mean_db, ci),
        predicted_ber=pred,
        predicted_ber_checked=pred_checked,
        measured_ber=meas,
        measured_ber_ci95=ci_meas,
        bit_errors=errors,
        bits_checked=n_bits,
        bursts_checked=len(checked),
        required_ber=profile.required_ber,
        required_ebn0_db=req,
        margin_db=marg,
        worst_burst_margin_db=worst,
        fading_k_db=fading_k_db,
        fading_required_ebn0_db=fading_req,
        fading_margin_db=fading_marg,
        flags=tuple(dict.fromkeys(flags)),
        message=message,
    )


def _power_mean_db(values_db, weights) -> float | None:
    if not values_db:
        return None
    v = 10 ** (np.asarray(values_db, dtype=float) / 10)
    w = np.ones_like(v) if weights is None else np.asarray(weights, dtype=float)
    return float(db(np.sum(w * v) / np.sum(w)))


def profile_mismatch(
    results: list[BurstResult], rate_flags: tuple[str, ...], layout: FrameLayout
) -> str | None:
    """Why the profile evidently does not describe the capture, or None.

    Evidence: the capture's blind symbol rate or tone spacing contradicts the profile's
    (unless at the profile's rates at least half the measured bursts are framed, and fewer
    than half fail the energy-law test or show a detection loss); or, among the measured
    bursts, most fail the energy-law test while the frame is found in fewer than half; or
    most keep one tone (unmodulated); or most frames match their header far worse than their
    payload.
    """
    measured = [r for r in results if r.fit is not None]
    n = len(measured)
    framed = sum(r.frame is not None and r.frame.found for r in measured)
    not_awgn = sum("not-awgn" in r.flags for r in measured)
    lossy = sum("detection-loss" in r.flags for r in measured)
    if rate_flags:
        # Most bursts framed at the profile's rates, their energies following the model and
        # no detection loss, outweigh a blind estimate (which can fail where the profile's
        # rates work). A wrong tone spacing still finds headers (the decisions survive it)
        # but loses energy and fails the energy laws: then the blind estimate stands.
        if layout.n_header_bits and n and framed >= 0.5 * n and max(not_awgn, lossy) < 0.5 * n:
            return None
        return ", ".join(f.replace("-", " ") for f in rate_flags)
    if not measured:
        return None
    header_bad = sum("header-mismatch" in r.flags for r in measured)
    if sum("unmodulated" in r.flags for r in measured) >= 0.5 * n:
        return "the signal keeps one tone (or stays on): a carrier, not the profile's modulation"
    if layout.n_header_bits and not_awgn >= 0.5 * n and framed < 0.5 * n:
        return "branch energies do not follow the model and the frame is rarely found"
    if header_bad >= 0.5 * n:
        return "headers match far worse than payloads"
    return None
