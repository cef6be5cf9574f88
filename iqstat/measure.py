"""The measurement chain of one capture: bursts → link → timing → correlators → fit → theory.

This module wires the stages together and computes the capture's summary; it does no I/O
beyond reading samples through the :class:`~iqstat.capture.Capture`, and renders nothing.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import scipy.fft
from scipy import stats

from iqstat import theory
from iqstat.bursts import Burst, BurstDetection, detect_bursts
from iqstat.capture import Capture
from iqstat.correlate import (
    correlate_symbols,
    interval_energies,
    mix_cumulative,
    template_gram,
)
from iqstat.errors import IqstatError, MeasurementError
from iqstat.estimate import LinkEstimate, estimate_link, link_with, refine_link_across_bursts
from iqstat.facts import CaptureFacts, compute_facts
from iqstat.fit import decide_symbols, fit_da, fit_dd, fit_nda
from iqstat.formats.open import open_capture
from iqstat.patterns import BitCheck, check_known, check_prbs, prbs_bits
from iqstat.profile import (
    FrameLayout,
    LinkProfile,
    bits_to_symbols,
    frame_layout,
    load_profile,
    override_profile,
    symbols_to_bits,
)
from iqstat.results import BurstResult, LinkSummary, MeasurementReport
from iqstat.summary import profile_mismatch, summarise
from iqstat.sync import (
    FrameAlignment,
    SymbolTiming,
    align_frame,
    recover_timing,
    refine_timing_known,
)
from iqstat.units import db

#: Symbols read beyond each detected edge, so that timing and frame search see whole symbols.
EDGE_MARGIN_SYMBOLS = 2.0
#: OOK bursts: detections closer than this many symbols are one burst (runs of "off").
OOK_MERGE_SYMBOLS = 24
#: Power-based Eb/N0: the band is the outer tones ± this many symbol rates.
AVAILABLE_BAND_SYMBOLS = 2.0
#: Header errors tolerated (fraction of its bits) when the payload pattern confirms the lock.
LOOSE_HEADER_ERROR_FRACTION = 0.3
#: Header errors less probable than this at the payload's error rate reject the header
#: (lenient: the first symbols of a burst err more often than the payload).
HEADER_CONSISTENCY_P = 1e-5
#: Below this symbol-rate line SNR [dB] the timing phase is searched blind instead.
BLIND_SEARCH_LINE_DB = 10.0
#: Below this line SNR [dB] the timing is refined on the known symbols of a found frame.
DA_REFINE_LINE_DB = 20.0
#: Candidates per pass of a timing search.
TIMING_SEARCH_POINTS = 41
#: 4-FSK tones whose |ρ| stay below this are treated as orthogonal by the theory.
NEAR_ORTHOGONAL_RHO = 0.05
#: A carrier correction from the known symbols smaller than this [Hz] is not applied.
CFO_REFINE_MIN_HZ = 1.0
#: Fewest symbols for a fit worth reporting.
MIN_FIT_SYMBOLS = 20
#: An estimated symbol rate further than this from the profile's is flagged.
RATE_MISMATCH_FRACTION = 0.01
#: An estimated tone spacing further than this from the profile's is flagged.
SPACING_MISMATCH_FRACTION = 0.05
#: Goodness-of-fit p-value below which the branch energies are flagged as not AWGN-like.
GOF_FLAG_PVALUE = 1e-3
#: Detection loss (available − detected Eb/N0) above which the burst is flagged.
DETECTION_LOSS_FLAG_DB = 1.5


def _link_summary(profile: LinkProfile, links: list[LinkEstimate], rho: float | None):
    rate = spacing = None
    rate_src = "profile" if profile.symbol_rate_hz is not None else "estimated"
    sp_src = (
        "n/a"
        if profile.modulation == "ook"
        else "profile"
        if profile.tone_spacing_hz is not None
        else "estimated"
    )
    if links:
        rate = links[0].symbol_rate_hz
        spacing = links[0].tone_spacing_hz
    else:
        rate, spacing = profile.symbol_rate_hz, profile.tone_spacing_hz
        rate_src = "profile" if rate is not None else "unknown"
        if profile.modulation != "ook":
            sp_src = "profile" if spacing is not None else "unknown"
    h = spacing / rate if (spacing is not None and rate) else None
    return LinkSummary(
        modulation=profile.modulation,
        symbol_rate_hz=rate,
        symbol_rate_source=rate_src,
        tone_spacing_hz=spacing,
        tone_spacing_source=sp_src,
        modulation_index=h,
        tone_correlation=rho,
        bit_rate_hz=None if rate is None else rate * profile.bits_per_symbol,
    )


def _read_burst(capture: Capture, burst: Burst, margin: int) -> tuple[int, np.ndarray]:
    """The burst's samples with ``margin`` more on each side, as ``(first index, samples)``.

    The window is widened to a length with small prime factors, so that every FFT the later
    stages take of it is fast (an arbitrary length can be prime and cost 10× more).
    """
    a = max(0, burst.start_sample - margin)
    b = min(capture.n_samples, burst.stop_sample + margin)
    n = min(scipy.fft.next_fast_len(b - a), capture.n_samples)
    b = min(capture.n_samples, a + n)
    a = max(0, b - n)
    return a, capture.read(a, b - a)


def _blind_rates(capture, detection, profile, margin) -> tuple[float | None, float | None]:
    """Symbol rate and tone spacing from blind per-burst estimates, refined across bursts.

    Only for what the profile does not give; returns the profile's values otherwise.
    """
    fs = capture.sample_rate_hz
    good = []
    for burst in detection.bursts:
        _, x = _read_burst(capture, burst, margin)
        try:
            good.append(
                estimate_link(
                    x,
                    fs,
                    modulation=profile.modulation,
                    symbol_rate_hz=profile.symbol_rate_hz,
                    tone_spacing_hz=profile.tone_spacing_hz,
                )
            )
        except MeasurementError:
            continue
    if not good:
        return profile.symbol_rate_hz, profile.tone_spacing_hz
    weights = [e.quality.get("n_symbols", 1) or 1 for e in good]
    rate, spacing = refine_link_across_bursts(good, weights)
    return rate, (spacing if profile.modulation != "ook" else None)


def _as_estimated(e: LinkEstimate, profile: LinkProfile) -> LinkEstimate:
    return dataclasses.replace(
        e,
        symbol_rate_source="profile" if profile.symbol_rate_hz is not None else "estimated",
        tone_spacing_source=(
            "n/a"
            if profile.modulation == "ook"
            else "profile"
            if profile.tone_spacing_hz is not None
            else "estimated"
        ),
    )


def _header_symbols(layout: FrameLayout, modulation: str) -> np.ndarray:
    bits = layout.header_bits
    if len(bits) == 0:
        return np.zeros(0, dtype=np.int64)
    if modulation == "4fsk" and len(bits) % 2:
        raise MeasurementError("the preamble and sync word hold an odd number of bits for 4fsk")
    return bits_to_symbols(bits, modulation)


def _symbols_inside(timing: SymbolTiming, lo: float, hi: float) -> tuple[int, int]:
    """Indices [k0, k1) of symbols whose interval lies within [lo, hi) (samples of x)."""
    t0, p = timing.t0_samples, timing.period_samples
    k0 = max(0, math.ceil((lo - t0) / p - 1e-9))
    k1 = min(timing.n_symbols, math.floor((hi - t0) / p + 1e-9))
    return k0, max(k0, k1)


def _check_payload(bits: np.ndarray, layout: FrameLayout, profile: LinkProfile):
    kind = profile.payload_kind
    if kind == "unknown" or len(bits) == 0:
        return None
    if kind in ("pn9", "pn15"):
        return check_prbs(bits, kind)
    return check_known(bits, layout.payload_bits)


def _known_payload_symbols(check: BitCheck | None, layout, profile, n_bits: int):
    """Sent payload symbols implied by a locked check (for the data-aided fit)."""
    if check is None or not check.locked:
        return None
    kind = profile.payload_kind
    if kind in ("pn9", "pn15"):
        ref = prbs_bits(kind, n_bits, check.phase or 0)
    else:
        ref = np.asarray(layout.payload_bits[:n_bits], dtype=np.uint8)
    if check.inverted:
        ref = 1 - ref
    if profile.modulation == "4fsk":
        ref = ref[: len(ref) - len(ref) % 2]
    return bits_to_symbols(ref, profile.modulation)


def _search_timing(
    cum: np.ndarray,
    timing: SymbolTiming,
    n_samples: int,
    k0: int,
    k1: int,
    known: np.ndarray | None,
    offsets: np.ndarray,
) -> tuple[SymbolTiming, int]:
    """Best timing phase on a grid of offsets (fractions of a symbol) around ``timing``.

    Criterion per candidate, over symbols k0..k1 of the grid: with known symbols s_k (−1 for
    unknown), Σ_k (e[k, s_k] − mean_i e[k, i]); without, the decision margin
    Σ_k (max_i e[k, i] − mean_i e[k, i]). OOK (one branch): Σ_k (2·s_k − 1)·e_k with known
    on/off symbols, else the variance of the symbol energies. A coarse pass over ``offsets``
    is followed by a pass ten times finer around its best. Returns the new timing and the
    index shift j − k of a symbol's number in the new grid relative to the old one.
    """
    p = timing.period_samples
    ks = np.arange(k0, k1 + 1, dtype=np.float64)
    t0 = timing.t0_samples
    best = 0.0
    for fine in (False, True):
        grid = best + (offsets - offsets.mean()) / 10.0 if fine else offsets
        edges = t0 + grid[:, None] * p + ks[None, :] * p
        ok = (np.ceil(edges[:, 0]) >= 0) & (np.ceil(edges[:, -1]) <= n_samples)
        if not ok.any():
            break
        grid, edges = grid[ok], edges[ok]
        # Tones first, (M, C, K): reducing over a short leading axis is fast.
        e = interval_energies(cum, np.ceil(edges).astype(np.int64), tones_first=True)
        base = e.mean(axis=0)
        if e.shape[0] == 1:
            # OOK, one branch: the contrast between "on" and "off" symbols.
            if known is None:
                score = e[0].var(axis=-1)
            else:
                kk = np.asarray(known[: e.shape[2]])
                score = (e[0] * np.where(kk >= 0, 2.0 * kk - 1.0, 0.0)).sum(axis=-1)
        elif known is None:
            score = (e.max(axis=0) - base).sum(axis=-1)
        else:
            kk = np.asarray(known[: e.shape[2]])
            use = kk >= 0
            idx = np.broadcast_to(np.where(use, kk, 0)[None, None, :], (1, *e.shape[1:]))
            own = np.take_along_axis(e, idx, axis=0)[0]
            score = ((own - base) * use).sum(axis=-1)
        best = float(grid[int(np.argmax(score))])
    t_new = t0 + best * p
    shift = int(math.floor(t_new / p))
    t_new -= shift * p
    n_sym = int(math.floor((n_samples - math.ceil(t_new)) / p))
    while n_sym > 0 and math.ceil(t_new + n_sym * p) > n_samples:
        n_sym -= 1
    moved = dataclasses.replace(
        timing,
        t0_samples=float(t_new),
        n_symbols=n_sym,
        message=timing.message
        + f"; timing moved {best:+.3f} T by a "
        + ("data-aided" if known is not None else "decision-margin")
        + " search",
    )
    return moved, shift


def _bank(x, fs, link: LinkEstimate, timing: SymbolTiming, cum):
    """Correlator outputs of every symbol of the grid, and the templates' Gram matrix."""
    z = correlate_symbols(
        x,
        fs,
        link.tone_freqs_hz,
        timing.t0_samples,
        timing.period_samples,
        timing.n_symbols,
        cumulative=cum,
    )
    return z, template_gram(link.tone_freqs_hz, timing.period_samples, fs)


def _header_consistent(frame: FrameAlignment, check: BitCheck, profile: LinkProfile) -> bool:
    """Whether the header's bit errors are plausible at the payload's measured error rate.

    A header matched with many errors while the payload is nearly error-free means the
    profile's preamble or sync word is not what was sent (or the position is a sidelobe):
    P(X ≥ header errors) under Binomial(header bits, payload BER) below 1e-5 rejects it.
    """
    if frame.bit_errors is None or not check.bits_checked:
        return True
    n_bits = frame.header_bits
    p = max((check.bit_errors + 0.5) / (check.bits_checked + 1), 1e-6)
    return float(stats.binom.sf(frame.bit_errors - 1, n_bits, p)) >= HEADER_CONSISTENCY_P


def _frame_symbols(frame, hard, header, n_tones, k1, timing, layout, profile):
    """Symbols of the frame found at ``frame``: (selection, known symbols, payload check)."""
    m = profile.modulation
    start = frame.start_symbol
    n_payload_sym = None
    if layout.payload_length is not None:
        n_payload_sym = layout.payload_length // profile.bits_per_symbol
    stop = (
        k1 if n_payload_sym is None else min(timing.n_symbols, start + len(header) + n_payload_sym)
    )
    stop = max(stop, start)

    # An inverted link reverses the tone order (t → M−1−t): undo it on the decisions, apply
    # it to the known symbols.
    def flip(t):
        return n_tones - 1 - t if frame.inverted else t

    known = np.full(stop - start, -1, dtype=np.int64)
    known[: len(header)] = flip(header)[: stop - start]
    payload_syms = flip(hard[start + len(header) : stop])
    bits = symbols_to_bits(payload_syms, m)
    check = _check_payload(bits, layout, profile)
    ref = _known_payload_symbols(check, layout, profile, len(bits))
    if ref is not None:
        n_ref = min(len(ref), len(known) - len(header))
        known[len(header) : len(header) + n_ref] = flip(ref[:n_ref])
    return (start, stop), known, check


def measure_burst(
    capture: Capture,
    burst: Burst,
    profile: LinkProfile,
    layout: FrameLayout,
    detection: BurstDetection,
    *,
    symbol_rate_hz: float,
    tone_spacing_hz: float | None,
) -> BurstResult:
    """Estimate the carrier, synchronise, correlate, fit and check one burst.

    ``symbol_rate_hz`` and ``tone_spacing_hz`` are the link's (from the profile, or refined
    across bursts by :func:`measure_capture` when the profile lacks them).
    """
    flags: list[str] = []
    base = dict(
        index=burst.index,
        start_sample=burst.start_sample,
        stop_sample=burst.stop_sample,
        power_dbfs=burst.power_dbfs,
    )
    fs = capture.sample_rate_hz
    sps = fs / symbol_rate_hz
    margin = int(math.ceil(EDGE_MARGIN_SYMBOLS * sps))
    x0, x = _read_burst(capture, burst, margin)
    try:
        link = _as_estimated(
            estimate_link(
                x,
                fs,
                modulation=profile.modulation,
                symbol_rate_hz=symbol_rate_hz,
                tone_spacing_hz=tone_spacing_hz,
            ),
            profile,
        )
    except MeasurementError:
        link = None
    if link is None:
        return _unmeasured(
            burst, "link-not-estimated", "carrier and rates could not be estimated on this burst"
        )
    cum = mix_cumulative(x, fs, link.tone_freqs_hz)
    timing = recover_timing(x, fs, link.symbol_rate_hz, link.tone_freqs_hz, cumulative=cum)
    lo_edge, hi_edge = burst.start_sample - x0 - 0.5 * sps, burst.stop_sample - x0 + 0.5 * sps
    if timing.quality.get("line_snr_db", np.inf) < BLIND_SEARCH_LINE_DB:
        # No usable symbol-rate line (weak burst, or h = 1/2 whose feature line is faint):
        # search the timing phase directly for the largest decision margin.
        k0, k1 = _symbols_inside(timing, lo_edge, hi_edge)
        timing, _ = _search_timing(
            cum,
            timing,
            len(x),
            k0,
            k1,
            None,
            np.linspace(-0.5, 0.5, TIMING_SEARCH_POINTS, endpoint=False),
        )
    z_all, gram = _bank(x, fs, link, timing, cum)
    m = profile.modulation
    # Symbols within the detected burst (a symbol's worth of slack at each detected edge).
    k0, k1 = _symbols_inside(timing, lo_edge, hi_edge)
    z_in = z_all[k0:k1]
    if len(z_in) < MIN_FIT_SYMBOLS:
        return _unmeasured(
            burst,
            "too-few-symbols",
            f"only {len(z_in)} whole symbols: too few to fit",
            link=link,
            timing=timing,
            symbols=len(z_in),
        )
    if m == "ook":
        # The decision threshold depends on the fitted amplitude and noise.
        first_fit = fit_nda(z_in, gram, modulation=m, gof=False)
        hard = (
            decide_symbols(z_all, first_fit, gram, modulation=m)
            if first_fit.amplitude
            else np.zeros(len(z_all), dtype=np.int64)
        )
    else:
        hard = np.argmax(np.abs(z_all), axis=1)  # largest-energy decision
    header = _header_symbols(layout, m)
    frame = None
    sel = (k0, k1)
    known = None
    check = None
    if len(header):
        # Search the whole read window: a detected edge can be a symbol or two off, and a
        # header that starts before it must still be found.
        n_tones = 2 if m == "ook" else z_all.shape[1]
        soft = np.abs(z_all) ** 2 if m != "ook" else None
        frame = align_frame(hard, header, soft=soft, n_tones=n_tones, detect_inverted=m != "ook")
        framed = None
        if frame.found:
            framed = _frame_symbols(frame, hard, header, n_tones, k1, timing, layout, profile)
            if (
                framed[2] is not None
                and framed[2].locked
                and not _header_consistent(frame, framed[2], profile)
            ):
                flags.append("header-mismatch")
        elif profile.payload_kind != "unknown":
            # At low Eb/N0 a header has too many errors for a safe lock on its own; accept a
            # looser match only when the payload pattern then locks (its own false-lock
            # probability is 1e-6), which confirms the position.
            loose = align_frame(
                hard,
                header,
                soft=soft,
                n_tones=n_tones,
                detect_inverted=m != "ook",
                max_errors=int(LOOSE_HEADER_ERROR_FRACTION * len(header) * profile.bits_per_symbol),
            )
            if loose.found:
                trial = _frame_symbols(loose, hard, header, n_tones, k1, timing, layout, profile)
                if (
                    trial[2] is not None
                    and trial[2].locked
                    and _header_consistent(loose, trial[2], profile)
                ):
                    frame = dataclasses.replace(
                        loose, message=loose.message + "; confirmed by the payload pattern"
                    )
                    framed = trial
        if framed is not None:
            sel, known, check = framed
        else:
            flags.append("sync-not-found")
    elif profile.payload_kind != "unknown":
        bits = symbols_to_bits(hard[k0:k1], m)
        check = _check_payload(bits, layout, profile)
    if (
        known is not None
        and frame is not None
        and frame.found
        and timing.quality.get("line_snr_db", np.inf) < DA_REFINE_LINE_DB
    ):
        # Known symbols give a sharper timing criterion than the feature line: correlate the
        # burst with their waveform (energy criteria are flat for h = 1/2), then again.
        n_known = int(np.argmin(known >= 0)) if (known < 0).any() else len(known)
        before = (timing, z_all, gram, sel, known, check, link, cum)
        timing, shift, dcfo = refine_timing_known(
            x,
            fs,
            timing,
            first_symbol=sel[0],
            symbols=known[:n_known],
            modulation=m,
            symbol_rate_hz=link.symbol_rate_hz,
            tone_spacing_hz=link.tone_spacing_hz,
            cfo_hz=link.cfo_hz,
        )
        if abs(dcfo) > CFO_REFINE_MIN_HZ:
            # The known symbols show a residual carrier offset: retune the correlators.
            link = link_with(link, cfo_hz=link.cfo_hz + dcfo)
            cum = mix_cumulative(x, fs, link.tone_freqs_hz)
        z_all, gram = _bank(x, fs, link, timing, cum)
        # Decide and check the payload again on the refined grid.
        hard = (
            decide_symbols(z_all, first_fit, gram, modulation=m)
            if m == "ook" and first_fit.amplitude
            else np.argmax(np.abs(z_all), axis=1)
        )
        frame = dataclasses.replace(frame, start_symbol=sel[0] + shift)
        k1 = _symbols_inside(timing, lo_edge, hi_edge)[1]
        if frame.start_symbol < 0 or frame.start_symbol + len(header) > timing.n_symbols:
            # The refined grid puts the frame outside the window: keep the first grid.
            timing, z_all, gram, sel, known, check, link, cum = before
        else:
            sel, known, check = _frame_symbols(
                frame, hard, header, n_tones, k1, timing, layout, profile
            )
    z = z_all[sel[0] : sel[1]]
    fit = fit_nda(z, gram, modulation=m)
    dd = fit_dd(z, gram, modulation=m, gof=False)
    da = None
    if known is not None:
        mask = known >= 0
        if mask.sum() >= MIN_FIT_SYMBOLS:
            da = fit_da(z[mask], known[mask], gram, modulation=m, gof=False)
    if check is not None and not check.locked:
        flags.append("pattern-not-locked")
    if not fit.converged:
        flags.append("fit-failed")
    elif fit.gof_pvalue is not None and fit.gof_pvalue < GOF_FLAG_PVALUE:
        flags.append("not-awgn")
    rho = _theory_rho(np.abs(gram), m)
    pred = None
    if fit.converged and fit.ebn0_db is not None:
        pred = float(theory.predicted_ber(10 ** (fit.ebn0_db / 10), m, rho_abs=rho))
    avail = _available_ebn0_db(
        x[int(burst.start_sample - x0) : int(burst.stop_sample - x0)],
        detection,
        link,
        link.symbol_rate_hz * profile.bits_per_symbol,
    )
    res = BurstResult(
        **base,
        symbols=len(z),
        link=link,
        timing=timing,
        frame=frame,
        fit=fit,
        fit_da=da,
        fit_dd=dd,
        bit_check=check,
        available_ebn0_db=avail,
        predicted_ber=pred,
        flags=(),
        message=fit.message,
    )
    loss = res.detection_loss_db
    if loss is not None and loss > DETECTION_LOSS_FLAG_DB:
        flags.append("detection-loss")
    return BurstResult(**{**res.__dict__, "flags": tuple(flags)})


def _available_ebn0_db(
    x: np.ndarray, detection: BurstDetection, link: LinkEstimate, bit_rate_hz: float
) -> float | None:
    """Eb/N0 from power alone: (burst power − noise power) / (N0 · bit rate) (METHODS §9).

    Measured in the signal's band (outer tones ± AVAILABLE_BAND_SYMBOLS symbol rates), not the
    full capture band: at 52 samples per bit the full-band SNR is ~17 dB below Eb/N0, and a 1 %
    error of the gap noise would move the result by half a dB.
    """
    n = len(x)
    if n == 0 or not np.isfinite(detection.noise_psd_db_per_hz):
        return None
    fs = link.sample_rate_hz
    nfft = scipy.fft.next_fast_len(n)
    # Zero padding: Σ_k |X_k|² = nfft·Σ|x|², so the band's mean power is Σ_band |X|²/(n·nfft).
    spec = np.abs(scipy.fft.fft(x, nfft)) ** 2 / (n * nfft)
    f = np.fft.fftfreq(nfft, 1.0 / fs)
    half = AVAILABLE_BAND_SYMBOLS * link.symbol_rate_hz
    lo, hi = min(link.tone_freqs_hz) - half, max(link.tone_freqs_hz) + half
    sel = (f >= lo) & (f <= hi)
    n0 = 10.0 ** (detection.noise_psd_db_per_hz / 10.0)
    c = float(spec[sel].sum()) - n0 * fs * sel.sum() / nfft
    if c <= 0 or n0 <= 0:
        return None
    return float(db(c / (n0 * bit_rate_hz)))


def _theory_rho(rho_abs: np.ndarray, modulation: str):
    """Tone correlation in the form theory takes: |ρ| for 2-FSK, the |ρ| matrix for 4-FSK
    (union bound over tone pairs when the tones are not orthogonal), 0 for OOK and
    orthogonal 4-FSK."""
    rho_abs = np.clip(rho_abs, 0.0, 1.0)
    if modulation == "2fsk":
        return float(rho_abs[0, 1])  # Stein's formula is exact for any |ρ|
    if modulation == "4fsk":
        # The union bound is only worth its looseness where the tones really leak; a
        # fractional symbol length leaves |ρ| ~ 1e-3 between nominally orthogonal tones.
        off = rho_abs - np.diag(np.diag(rho_abs))
        if float(off.max()) <= NEAR_ORTHOGONAL_RHO:
            return 0.0
        np.fill_diagonal(rho_abs, 1.0)
        return rho_abs
    return 0.0


def _unmeasured(
    burst: Burst, flag: str, message: str, *, link=None, timing=None, symbols: int = 0
) -> BurstResult:
    """The result of a burst that could not be measured (what is known, and why not)."""
    return BurstResult(
        index=burst.index,
        start_sample=burst.start_sample,
        stop_sample=burst.stop_sample,
        power_dbfs=burst.power_dbfs,
        symbols=symbols,
        link=link,
        timing=timing,
        frame=None,
        fit=None,
        fit_da=None,
        fit_dd=None,
        bit_check=None,
        available_ebn0_db=None,
        predicted_ber=None,
        flags=(flag,),
        message=message,
    )


def _measure_burst_safely(capture, burst, profile, layout, detection, rate, spacing):
    """:func:`measure_burst`, with a burst that cannot be measured reported, not raised."""
    try:
        result = measure_burst(
            capture, burst, profile, layout, detection, symbol_rate_hz=rate, tone_spacing_hz=spacing
        )
    except MeasurementError as exc:
        result = _unmeasured(burst, "not-measured", str(exc))
    return dataclasses.replace(result, start_time=capture.sample_datetime(burst.start_sample))


def _check_profile_rates(capture, detection, profile, margin) -> tuple[str, ...]:
    """Blind estimate on the longest burst, compared with the rates the profile gives."""
    if not detection.bursts or (profile.symbol_rate_hz is None and profile.tone_spacing_hz is None):
        return ()
    longest = max(detection.bursts, key=lambda b: b.n_samples)
    _, x = _read_burst(capture, longest, margin)
    try:
        blind = estimate_link(x, capture.sample_rate_hz, modulation=profile.modulation)
    except IqstatError:
        return ()
    flags = []
    if profile.symbol_rate_hz is not None and (
        abs(blind.symbol_rate_hz / profile.symbol_rate_hz - 1) > RATE_MISMATCH_FRACTION
    ):
        flags.append("symbol-rate-mismatch")
    if (
        profile.tone_spacing_hz is not None
        and blind.tone_spacing_hz is not None
        and (abs(blind.tone_spacing_hz / profile.tone_spacing_hz - 1) > SPACING_MISMATCH_FRACTION)
    ):
        flags.append("tone-spacing-mismatch")
    return tuple(flags)


def measure_capture(
    capture: Capture,
    profile: LinkProfile,
    *,
    facts: CaptureFacts | None = None,
    detection: BurstDetection | None = None,
) -> MeasurementReport:
    """Measure Eb/N0, error rates and margin of every burst of a capture.

    Parameters
    ----------
    capture : Capture
        Complex baseband recording.
    profile : LinkProfile
        What was sent (modulation, rates if known, frame, requirement).
    facts, detection : optional
        Precomputed capture facts / burst detection (else computed here).

    Returns
    -------
    MeasurementReport
    """
    if not capture.is_complex:
        raise MeasurementError(
            "this recording is real-valued; Eb/N0 measurement needs complex baseband (I/Q) samples"
        )
    facts = compute_facts(capture) if facts is None else facts
    layout = frame_layout(profile)
    if detection is None:
        merge_gap_s = None
        if profile.modulation == "ook":
            # An OOK burst is silent during runs of zeros (15 symbols in PN15): bridge them.
            rate = profile.symbol_rate_hz or capture.sample_rate_hz / 50
            merge_gap_s = OOK_MERGE_SYMBOLS / rate
        expected_s = None
        if profile.symbol_rate_hz and layout.payload_length is not None:
            n_sym = (layout.n_header_bits + layout.payload_length) / profile.bits_per_symbol
            expected_s = n_sym / profile.symbol_rate_hz
        bandwidth = None
        if profile.symbol_rate_hz:
            spread = (profile.n_tones - 1) * (profile.tone_spacing_hz or 0.0)
            bandwidth = spread + 2.0 * profile.symbol_rate_hz
        detection = detect_bursts(
            capture,
            merge_gap_s=merge_gap_s,
            expected_burst_s=expected_s,
            signal_bandwidth_hz=bandwidth,
        )
    fs = capture.sample_rate_hz
    rate_guess = profile.symbol_rate_hz or fs / 50
    margin = int(math.ceil(EDGE_MARGIN_SYMBOLS * fs / rate_guess))
    blind = profile.symbol_rate_hz is None or (
        profile.modulation != "ook" and profile.tone_spacing_hz is None
    )
    rate, spacing = profile.symbol_rate_hz, profile.tone_spacing_hz
    if blind and detection.bursts:
        rate, spacing = _blind_rates(capture, detection, profile, margin)
    if rate is not None:
        results = [
            _measure_burst_safely(capture, b, profile, layout, detection, rate, spacing)
            for b in detection.bursts
        ]
    else:
        results = [
            _unmeasured(
                b,
                "link-not-estimated",
                "the symbol rate could not be estimated on any burst; give it with --symbol-rate",
            )
            for b in detection.bursts
        ]
    mismatch = _check_profile_rates(capture, detection, profile, margin)
    good_links = [r.link for r in results if r.link is not None]
    rho_display, rho_theory = None, 0.0
    if good_links and profile.modulation != "ook":
        g = good_links[0]
        rho_mat = np.abs(
            theory.tone_correlation_matrix(
                profile.n_tones, g.tone_spacing_hz, 1.0 / g.symbol_rate_hz
            )
        )
        rho_display = float(rho_mat[0, 1])
        rho_theory = _theory_rho(rho_mat, profile.modulation)
    link_sum = _link_summary(profile, good_links, rho_display)
    summary = summarise(results, profile, link_sum, facts, detection, rho_theory)
    if mismatch:
        summary = dataclasses.replace(summary, flags=tuple(dict.fromkeys(summary.flags + mismatch)))
    reason = profile_mismatch(results, mismatch, layout)
    if reason is not None and summary.ebn0_db is not None:
        # The model the figures rest on does not describe this capture: report what was seen
        # per burst, but no headline figure.
        summary = dataclasses.replace(
            summary,
            ebn0_db=None,
            ebn0_db_ci95=None,
            esn0_db=None,
            predicted_ber=None,
            margin_db=None,
            worst_burst_margin_db=None,
            flags=tuple(dict.fromkeys((*summary.flags, "profile-mismatch"))),
            message=f"the capture does not match the profile ({reason}): no headline figure; "
            "check the modulation, rates and frame",
        )
    return MeasurementReport(
        facts=facts,
        profile=profile,
        link=link_sum,
        detection=detection,
        bursts=tuple(results),
        summary=summary,
    )


def measure_file(
    path,
    *,
    profile=None,
    modulation: str | None = None,
    symbol_rate_hz: float | None = None,
    tone_spacing_hz: float | None = None,
    required_ber: float | None = None,
    **capture_options,
) -> MeasurementReport:
    """Open a capture and measure it: the Python form of ``iqstat measure``.

    Parameters
    ----------
    path : str or Path
        The capture (see :func:`iqstat.open_capture`; ``capture_options`` such as
        ``datatype=``, ``sample_rate_hz=``, ``channel=`` are passed on to it).
    profile : str, Path or LinkProfile, optional
        The link profile; the keyword arguments override its fields.
    """
    base = (
        load_profile(profile)
        if isinstance(profile, (str, bytes)) or hasattr(profile, "__fspath__")
        else profile
    )
    prof = override_profile(
        base,
        modulation=modulation,
        symbol_rate_hz=symbol_rate_hz,
        tone_spacing_hz=tone_spacing_hz,
        required_ber=required_ber,
    )
    return measure_capture(open_capture(path, **capture_options), prof)
