"""The measurement chain of one capture: bursts → link → timing → correlators → fit → theory.

This module wires the stages together and computes the capture's summary; it does no I/O
beyond reading samples through the :class:`~iqstat.capture.Capture`, and renders nothing.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence

import numpy as np
import scipy.fft
from scipy import special

from iqstat import theory
from iqstat.available import AvailableEbN0, available_ebn0
from iqstat.bursts import Burst, BurstDetection, detect_bursts, survey_capture
from iqstat.capture import Capture
from iqstat.correlate import (
    correlate_symbols,
    correlate_symbols_many,
    interval_energies,
    mix_cumulative,
    mix_cumulative_many,
    symbol_boundaries,
    template_gram,
)
from iqstat.errors import IqstatError, MeasurementError
from iqstat.estimate import (
    LinkEstimate,
    estimate_link,
    estimate_link_many,
    link_with,
    refine_link_across_bursts,
)
from iqstat.excise import cut_bands, notch_bands
from iqstat.facts import CaptureFacts, compute_facts
from iqstat.fading import MIN_SYMBOLS as FADING_MIN_KNOWN
from iqstat.fading import FadingEstimate, fading_from_energies
from iqstat.fit import NoncoherentFit, decide_symbols, fit_bursts_many, fit_nda_many
from iqstat.formats.open import open_capture
from iqstat.patterns import BitCheck, check_known_many, check_prbs_many, prbs_bits
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
    STRONG_LINE_DB,
    FrameAlignment,
    SymbolTiming,
    align_frame_many,
    recover_timing_many,
    refine_timing_known,
    time_and_correlate_many,
)

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
#: Below this line SNR [dB] the timing is refined on the known symbols of a found frame (the
#: bursts timed again at full rate, see :func:`_stage_timing`).
DA_REFINE_LINE_DB = STRONG_LINE_DB
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
#: Detection loss (available − detected Eb/N0) above which the burst is flagged, when its
#: 95 % interval also lies above zero (a loss the noise of the two figures cannot explain).
DETECTION_LOSS_FLAG_DB = 1.5
#: Most bursts estimated blind to refine an unknown symbol rate or tone spacing.
BLIND_RATE_BURSTS = 128
#: Bursts measured together (each stage runs over the batch): at most this many …
BATCH_BURSTS = 64
#: … and about this many samples in their windows (bounds the batch's memory).
BATCH_SAMPLES = 1 << 20


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


def _window(capture: Capture, burst: Burst, margin: int) -> tuple[int, int]:
    """The burst's sample range with ``margin`` more on each side, as ``(first, stop)``.

    The window is widened to a length with small prime factors, so that every FFT the later
    stages take of it is fast (an arbitrary length can be prime and cost 10× more).
    """
    a = max(0, burst.start_sample - margin)
    b = min(capture.n_samples, burst.stop_sample + margin)
    n = min(scipy.fft.next_fast_len(b - a), capture.n_samples)
    b = min(capture.n_samples, a + n)
    a = max(0, b - n)
    return a, b


def _read(capture: Capture, start: int, count: int, det: BurstDetection) -> np.ndarray:
    """Samples [start, start + count) with the receiver's DC offset and quadrature imbalance
    (measured in the gaps by the burst detection) taken off, and the continuous lines beside
    the band cut out (iqstat.excise); a new array."""
    x = capture.read(start, count)
    if det.dc_offset:
        x -= np.complex64(det.dc_offset)
    x = det.iq.apply(x)
    if det.lines:
        fs = capture.sample_rate_hz
        x = cut_bands(x, notch_bands(det.lines, det.band_hz, fs / det.frame_samples), fs)
    return x


def _read_burst(
    capture: Capture, burst: Burst, margin: int, det: BurstDetection
) -> tuple[int, np.ndarray]:
    """The burst's window (see :func:`_window`) as ``(first index, samples)``; see _read."""
    a, b = _window(capture, burst, margin)
    return a, _read(capture, a, b - a, det)


def _read_bursts(
    capture: Capture, bursts: Sequence[Burst], margin: int, det: BurstDetection
) -> list[tuple[int, np.ndarray]]:
    """The windows of consecutive bursts; one read of their whole span where they are dense.

    The front end's artefacts measured in the gaps are taken off (:func:`_read`). The DC
    offset: a constant leaks into every tone correlator over a symbol (for a tone half a
    cycle per symbol from DC, 2/π of its amplitude times the symbol's samples) and adds
    coherently, where noise adds in power; a DC 16 dB under the noise power costs ~2 dB of
    Eb/N0. The quadrature imbalance: the image of the sent tone lands on the other tone's
    correlator (:mod:`iqstat.frontend`).
    Windows may overlap (close bursts); they are views of one array then, and no stage
    writes into its samples.
    """
    spans = [_window(capture, b, margin) for b in bursts]
    if not spans:
        return []
    lo, hi = spans[0][0], max(b for _, b in spans)
    if hi - lo > 2 * sum(b - a for a, b in spans):
        return [(a, _read(capture, a, b - a, det)) for a, b in spans]
    block = _read(capture, lo, hi - lo, det)
    return [(a, block[a - lo : b - lo]) for a, b in spans]


#: Blind estimates see the burst band-limited and decimated to about this many times the
#: detection band's width when the capture is sampled far faster than that (the blind symbol
#: rate search spans fs/1000 to fs/4: a 4.8 kBd link at 10 MS/s lay below it).
BLIND_RATE_BANDWIDTHS = 4.0
#: ... when fs is more than this many times the detection band (else the samples as they are).
BLIND_DECIMATE_ABOVE = 64.0


def _narrowed(x: np.ndarray, fs: float, band_hz) -> tuple[np.ndarray, float]:
    """The burst kept to a band around the detection band and resampled to its width.

    A brick-wall choice of DFT bins (a power of two of them, about BLIND_RATE_BANDWIDTHS band
    widths, centred on the band) and their inverse transform: the samples at rate fs·k/n with
    the band's centre at 0 Hz. Unchanged when the capture is not far oversampled.
    """
    if band_hz is None or x.size < 64:
        return x, fs
    lo, hi = band_hz
    width = hi - lo
    if not width > 0 or fs <= BLIND_DECIMATE_ABOVE * width:
        return x, fs
    n = x.size
    keep = 1 << max(6, math.ceil(math.log2(BLIND_RATE_BANDWIDTHS * width / fs * n)))
    if 2 * keep > n:
        return x, fs
    spec = scipy.fft.fft(x)
    k0 = int(round(0.5 * (lo + hi) / fs * n))
    idx = (k0 + np.arange(-(keep // 2), keep - keep // 2)) % n
    y = scipy.fft.ifft(np.fft.ifftshift(spec[idx])) * (keep / n)
    return y.astype(np.complex64), fs * keep / n


def _blind_rates(capture, detection, profile, margin) -> tuple[float | None, float | None]:
    """Symbol rate and tone spacing from blind per-burst estimates, refined across bursts.

    Only for what the profile does not give; returns the profile's values otherwise. At most
    BLIND_RATE_BURSTS bursts, spread evenly over the capture, are estimated: the refined
    rate's error falls as 1/√n, and beyond ~100 bursts it is far below what a burst's own
    timing can see.
    """
    fs = capture.sample_rate_hz
    bursts = detection.bursts
    if len(bursts) > BLIND_RATE_BURSTS:
        pick = np.linspace(0, len(bursts) - 1, BLIND_RATE_BURSTS).round().astype(int)
        bursts = tuple(bursts[i] for i in pick)
    good = []
    for batch in _batches(bursts, margin):
        windows = _read_bursts(capture, batch, margin, detection)
        narrowed = [_narrowed(x, fs, detection.band_hz) for _, x in windows]
        by_rate: dict[float, list[np.ndarray]] = {}
        for y, fs_y in narrowed:
            by_rate.setdefault(fs_y, []).append(y)
        for fs_y, ys in by_rate.items():
            ests = estimate_link_many(
                ys,
                fs_y,
                modulation=profile.modulation,
                symbol_rate_hz=profile.symbol_rate_hz,
                tone_spacing_hz=profile.tone_spacing_hz,
            )
            good.extend(e for e in ests if not isinstance(e, MeasurementError))
    if not good:
        return profile.symbol_rate_hz, profile.tone_spacing_hz
    weights = [e.quality.get("n_symbols", 1) or 1 for e in good]
    rate, spacing = refine_link_across_bursts(good, weights)
    return rate, (spacing if profile.modulation != "ook" else None)


def _sources(profile: LinkProfile) -> dict[str, str]:
    """Where a burst's rates come from: the profile, or estimated (refined across bursts)."""
    return dict(
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


def _check_payload_many(bits_list: Sequence[np.ndarray], layout: FrameLayout, profile: LinkProfile):
    """Payload checks of several bursts (None where nothing is known or there are no bits)."""
    out: list[BitCheck | None] = [None] * len(bits_list)
    kind = profile.payload_kind
    use = [i for i, b in enumerate(bits_list) if len(b)]
    if kind == "unknown" or not use:
        return out
    bits = [bits_list[i] for i in use]
    if kind in ("pn9", "pn15"):
        checks = check_prbs_many(bits, kind)
    else:
        checks = check_known_many(bits, layout.payload_bits)
    for i, c in zip(use, checks, strict=True):
        out[i] = c
    return out


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


#: The ⌊P⌋- and ⌈P⌉-sample symbols' Gram matrices are given to the fit per symbol when their
#: share-weighted mean square deviation from the one mixed matrix exceeds this: the leak the
#: mixed matrix misses is that times Es/N0 of the noise, 1 % at 20 dB (at 52.08 samples per
#: symbol it is 2.7e-5: the mixed matrix stays; at 6.51, 6.4e-3).
GRAM_CLASS_TOL = 1e-4
#: Outputs are scaled to equal amplitudes, √(P/N_k), when the symbols' energy spread,
#: share·(1 − share)/P², exceeds this (times Es/N0 it is the noise the spread fakes: 1 % at
#: 20 dB; 2.7e-5 at 52.08 samples per symbol, where outputs stay as they are).
LENGTH_SPREAD_TOL = 1e-4


def _gram_classes(tones, timing: SymbolTiming, fs: float):
    """The Gram matrix of the symbols as the fit and the theory take it.

    Returns (mixed, per_symbol, classes): the one matrix of template_gram for the fractional
    period; the (n_symbols, M, M) stack of each symbol's own matrix (by its ⌊P⌋ or ⌈P⌉
    samples), or None where the two hardly differ; and [(matrix, share of symbols)] for the
    theory. The bank assigns samples whole (iqstat.correlate.bank), so at few samples per
    symbol a symbol's tones are not orthogonal in the same way as its neighbour's: 2-FSK at
    h = 1 with 6.51 samples per symbol has ρ = +0.088 over 6 samples and −0.072 over 7.
    """
    p = timing.period_samples
    mixed = template_gram(tones, p, fs)
    n_lo, n_hi = math.floor(p), math.ceil(p)
    if n_lo == n_hi or n_lo < 1:
        return mixed, None, [(mixed, 1.0)]
    g_lo, g_hi = template_gram(tones, n_lo, fs), template_gram(tones, n_hi, fs)
    share = p - n_lo  # of the symbols, the longer
    dev = (1.0 - share) * np.abs(g_lo - mixed) ** 2 + share * np.abs(g_hi - mixed) ** 2
    if float(dev.max()) <= GRAM_CLASS_TOL:
        return mixed, None, [(mixed, 1.0)]
    longer = np.diff(symbol_boundaries(timing.t0_samples, p, timing.n_symbols)) == n_hi
    stack = np.where(longer[:, None, None], g_hi[None], g_lo[None])
    share = float(np.mean(longer)) if longer.size else share
    return mixed, stack, [(g_lo, 1.0 - share), (g_hi, share)]


def _fit_gram(w: _Work, lo: int, hi: int):
    """The gram argument of the fit for symbols [lo, hi) of the burst's grid."""
    return w.gram if w.sym_grams is None else w.sym_grams[lo:hi]


def _fit_z(w: _Work, lo: int, hi: int) -> np.ndarray:
    """Correlator outputs of symbols [lo, hi) as the fit takes them.

    Where the symbols' lengths matter (per-symbol Gram matrices, or an energy spread above
    LENGTH_SPREAD_TOL: few samples per symbol), each output is scaled by √(P/N_k): a
    unit-energy template over N_k samples gives the sent
    tone an amplitude A·√N_k, which the fit's one amplitude would read as noise (−0.4 dB at
    20 dB, 6.51 samples per symbol); scaled, the amplitude is A·√P for every symbol and only
    the noise level varies, by N_k/P (a relative error of its mean of var(N_k)/P², 0.6 %).
    """
    z = w.z_all[lo:hi]
    t = w.timing
    p = t.period_samples
    share = p - math.floor(p)
    if w.sym_grams is None and share * (1.0 - share) / p**2 <= LENGTH_SPREAD_TOL:
        return z
    n_k = np.diff(symbol_boundaries(t.t0_samples, t.period_samples, t.n_symbols))[lo:hi]
    return z * np.sqrt(t.period_samples / n_k)[:, None]


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
    return z, _gram_classes(link.tone_freqs_hz, timing, fs)


def _header_consistent_many(
    frames: Sequence[FrameAlignment], checks: Sequence[BitCheck], profile: LinkProfile
) -> np.ndarray:
    """Whether each header's bit errors are plausible at its payload's measured error rate.

    A header matched with many errors while the payload is nearly error-free means the
    profile's preamble or sync word is not what was sent (or the position is a sidelobe):
    P(X ≥ header errors) under Binomial(header bits, payload BER) below 1e-5 rejects it.
    """
    ok = np.ones(len(frames), dtype=bool)
    test = [
        i
        for i, (f, c) in enumerate(zip(frames, checks, strict=True))
        if f.bit_errors is not None and c.bits_checked
    ]
    if test:
        errors = np.array([frames[i].bit_errors for i in test], dtype=np.int64)
        n_bits = np.array([frames[i].header_bits for i in test], dtype=np.int64)
        p = np.array([(checks[i].bit_errors + 0.5) / (checks[i].bits_checked + 1) for i in test])
        p = np.maximum(p, 1e-6)
        # P(X >= errors) = binomial survival function at errors − 1 (scipy.special.bdtrc is
        # the routine under scipy.stats.binom.sf).
        ok[test] = special.bdtrc(errors - 1, n_bits, p) >= HEADER_CONSISTENCY_P
    return ok


def _frame_symbols_many(items, n_tones: int, header, layout: FrameLayout, profile: LinkProfile):
    """Symbols of the frames found: per ``(frame, hard decisions, k1, timing)`` item, the
    ``(selection, known symbols, payload check)`` of that burst."""
    m = profile.modulation
    n_payload_sym = None
    if layout.payload_length is not None:
        n_payload_sym = layout.payload_length // profile.bits_per_symbol
    plans = []
    for frame, hard, k1, timing in items:
        start = frame.start_symbol
        stop = (
            k1
            if n_payload_sym is None
            else min(timing.n_symbols, start + len(header) + n_payload_sym)
        )
        stop = max(stop, start)
        # An inverted link reverses the tone order (t → M−1−t): undo it on the decisions,
        # apply it to the known symbols.
        sign = frame.inverted
        known = np.full(stop - start, -1, dtype=np.int64)
        known[: len(header)] = (n_tones - 1 - header if sign else header)[: stop - start]
        payload = hard[start + len(header) : stop]
        bits = symbols_to_bits(n_tones - 1 - payload if sign else payload, m)
        plans.append((start, stop, known, bits, sign))
    checks = _check_payload_many([p[3] for p in plans], layout, profile)
    out = []
    for (start, stop, known, bits, sign), check in zip(plans, checks, strict=True):
        ref = _known_payload_symbols(check, layout, profile, len(bits))
        if ref is not None:
            n_ref = min(len(ref), len(known) - len(header))
            ref = ref[:n_ref]
            known[len(header) : len(header) + n_ref] = n_tones - 1 - ref if sign else ref
        out.append(((start, stop), known, check))
    return out


@dataclasses.dataclass
class _Work:
    """One burst's state while its batch moves through the stages (internal, mutable).

    ``result`` is set when the burst leaves the chain early (it could not be measured); later
    stages skip it.
    """

    burst: Burst
    x0: int
    x: np.ndarray
    lo_edge: float = 0.0
    hi_edge: float = 0.0
    flags: list[str] = dataclasses.field(default_factory=list)
    result: BurstResult | None = None
    link: LinkEstimate | None = None
    cum: np.ndarray | None = None
    timing: SymbolTiming | None = None
    z_all: np.ndarray | None = None
    gram: np.ndarray | None = None
    sym_grams: np.ndarray | None = None  # per-symbol Gram stack (few samples per symbol)
    gram_classes: list | None = None  # [(Gram, share of symbols)] for the theory
    k0: int = 0
    k1: int = 0
    first_fit: NoncoherentFit | None = None
    hard: np.ndarray | None = None
    frame: FrameAlignment | None = None
    sel: tuple[int, int] = (0, 0)
    known: np.ndarray | None = None
    check: BitCheck | None = None
    fit: NoncoherentFit | None = None
    fit_da: NoncoherentFit | None = None
    fit_dd: NoncoherentFit | None = None
    band: tuple[float | None, float | None] = (None, None)  # in-band energy, its width [Hz]
    available: AvailableEbN0 | None = None
    fading: FadingEstimate | None = None
    predicted_ber: float | None = None


@dataclasses.dataclass(frozen=True)
class _Context:
    """What every stage of a batch needs besides the bursts (internal)."""

    fs: float
    profile: LinkProfile
    layout: FrameLayout
    detection: BurstDetection
    header: np.ndarray
    header_error: str | None
    symbol_rate_hz: float
    tone_spacing_hz: float | None


def _active(works: list[_Work]) -> list[_Work]:
    return [w for w in works if w.result is None]


def _each(works: list[_Work], step) -> None:
    """Apply a per-burst step to the bursts still in the chain; an error ends that burst only."""
    for w in _active(works):
        try:
            step(w)
        except MeasurementError as exc:
            w.result = _unmeasured(w.burst, "not-measured", str(exc))


def _batched(works: list[_Work], stage) -> None:
    """Apply a batched stage; if it fails, run it burst by burst so one bad burst ends alone.

    A stage computes all its outputs before it assigns any, so a retry starts clean.
    """
    act = _active(works)
    if not act:
        return
    try:
        stage(act)
    except MeasurementError:
        _each(act, lambda w: stage([w]))


def _stage_link(batch: list[_Work], ctx: _Context) -> None:
    """Carrier offset (and the rates, as given or refined across bursts) of every burst."""
    links = estimate_link_many(
        [w.x for w in batch],
        ctx.fs,
        modulation=ctx.profile.modulation,
        symbol_rate_hz=ctx.symbol_rate_hz,
        tone_spacing_hz=ctx.tone_spacing_hz,
        band_margin_symbols=AVAILABLE_BAND_SYMBOLS,
    )
    sources = _sources(ctx.profile)
    for w, est in zip(batch, links, strict=True):
        if isinstance(est, MeasurementError):
            w.result = _unmeasured(
                w.burst,
                "link-not-estimated",
                "carrier and rates could not be estimated on this burst",
            )
        else:
            # The in-band energy is for the available Eb/N0, not part of the link's report.
            quality = dict(est.quality)
            w.band = (quality.pop("band_energy", None), quality.pop("band_width_hz", None))
            w.link = dataclasses.replace(est, quality=quality, **sources)


def _stage_timing(batch: list[_Work], ctx: _Context) -> None:
    """Tone mixing, symbol timing (searched blind where the symbol-rate line is weak), bank.

    Every burst is timed and correlated on its block sums first (time_and_correlate_many);
    where its symbol-rate line is below STRONG_LINE_DB it is timed again from scratch on the
    full-rate feature with the matched-energy check (and its running sums serve the blind
    search, the bank and the known-symbol refinement). Starting that check from the block
    grid instead (``coarse=``) is cheaper but measured worse below ~2 dB Eb/N0: fewer frames
    found, spread 1.44x the bound at h = 1/2 and 2 dB against 1.15x.
    """
    fs = ctx.fs
    xs = [w.x for w in batch]
    tones = [w.link.tone_freqs_hz for w in batch]
    timings, z_fast = time_and_correlate_many(xs, fs, ctx.symbol_rate_hz, tones)
    again = [
        i
        for i, t in enumerate(timings)
        if t is None or (isinstance(t, SymbolTiming) and t.quality["line_snr_db"] < STRONG_LINE_DB)
    ]
    cums: list[np.ndarray | None] = [None] * len(batch)
    if again:
        sub = mix_cumulative_many([xs[i] for i in again], fs, [tones[i] for i in again])
        full = recover_timing_many(
            [xs[i] for i in again],
            fs,
            ctx.symbol_rate_hz,
            [tones[i] for i in again],
            cumulatives=sub,
            errors="return",
        )
        for i, c, t in zip(again, sub, full, strict=True):
            cums[i], timings[i] = c, t
    sps = fs / ctx.symbol_rate_hz
    edges = [
        (w.burst.start_sample - w.x0 - 0.5 * sps, w.burst.stop_sample - w.x0 + 0.5 * sps)
        for w in batch
    ]
    for i, (w, timing) in enumerate(zip(batch, timings, strict=True)):
        if isinstance(timing, MeasurementError) or cums[i] is None:
            continue
        if timing.quality.get("line_snr_db", np.inf) < BLIND_SEARCH_LINE_DB:
            # No usable symbol-rate line (weak burst, or h = 1/2 whose feature line is faint):
            # search the timing phase directly for the largest decision margin.
            k0, k1 = _symbols_inside(timing, *edges[i])
            timings[i], _ = _search_timing(
                cums[i],
                timing,
                len(w.x),
                k0,
                k1,
                None,
                np.linspace(-0.5, 0.5, TIMING_SEARCH_POINTS, endpoint=False),
            )
    # Bursts timed on the block sums keep their bank; those timed again at full rate are
    # correlated from their running sums.
    z_of = {i: z_fast[i] for i in range(len(batch)) if cums[i] is None and z_fast[i] is not None}
    ok = [i for i in range(len(batch)) if cums[i] is not None]
    ok = [i for i in ok if not isinstance(timings[i], MeasurementError)]
    if ok:
        zs = correlate_symbols_many(
            [xs[i] for i in ok],
            fs,
            [tones[i] for i in ok],
            [timings[i].t0_samples for i in ok],
            [timings[i].period_samples for i in ok],
            [timings[i].n_symbols for i in ok],
            cumulatives=[cums[i] for i in ok],
        )
        z_of.update(zip(ok, zs, strict=True))
    for i, w in enumerate(batch):
        timing = timings[i]
        if isinstance(timing, MeasurementError):
            w.result = _unmeasured(w.burst, "not-measured", str(timing))
            continue
        # Symbols within the detected burst (a symbol's worth of slack at each detected edge).
        k0, k1 = _symbols_inside(timing, *edges[i])
        w.cum, w.timing, w.z_all = cums[i], timing, z_of[i]
        w.gram, w.sym_grams, w.gram_classes = _gram_classes(w.link.tone_freqs_hz, timing, fs)
        w.lo_edge, w.hi_edge, w.k0, w.k1 = *edges[i], k0, k1
        if k1 - k0 < MIN_FIT_SYMBOLS:
            w.result = _unmeasured(
                w.burst,
                "too-few-symbols",
                f"only {k1 - k0} whole symbols: too few to fit",
                link=w.link,
                timing=timing,
                symbols=k1 - k0,
            )


def _hard_decisions(w: _Work, modulation: str) -> np.ndarray:
    if modulation == "ook":
        if w.first_fit.amplitude:
            return decide_symbols(w.z_all, w.first_fit, w.gram, modulation=modulation)
        return np.zeros(len(w.z_all), dtype=np.int64)
    return np.argmax(np.abs(w.z_all), axis=1)  # largest-energy decision


def _stage_decide(works: list[_Work], ctx: _Context) -> None:
    m = ctx.profile.modulation
    if m == "ook":
        # The decision threshold depends on the fitted amplitude and noise.
        def first(batch: list[_Work]) -> None:
            fits = fit_nda_many(
                [_fit_z(w, w.k0, w.k1) for w in batch],
                [_fit_gram(w, w.k0, w.k1) for w in batch],
                modulation=m,
                gof=False,
            )
            for w, f in zip(batch, fits, strict=True):
                w.first_fit = f

        _batched(works, first)
    _each(works, lambda w: setattr(w, "hard", _hard_decisions(w, m)))


def _stage_frame(batch: list[_Work], ctx: _Context) -> None:
    """Frame alignment on the header (a looser match confirmed by the payload), payload check."""
    profile, layout, header = ctx.profile, ctx.layout, ctx.header
    m = profile.modulation
    # Per burst: (frame, selection, known symbols, payload check, flags to add).
    outcome: dict[int, tuple] = {}
    if not len(header):
        checks = [None] * len(batch)
        if profile.payload_kind != "unknown":
            checks = _check_payload_many(
                [symbols_to_bits(w.hard[w.k0 : w.k1], m) for w in batch], layout, profile
            )
        for i, (w, c) in enumerate(zip(batch, checks, strict=True)):
            outcome[i] = (None, (w.k0, w.k1), None, c, ())
    else:
        # Search the whole read window: a detected edge can be a symbol or two off, and a
        # header that starts before it must still be found.
        n_tones = 2 if m == "ook" else batch[0].z_all.shape[1]
        softs = [None if m == "ook" else np.abs(w.z_all) ** 2 for w in batch]

        def align(ws, idx, **kw):
            idx = list(idx)
            return align_frame_many(
                [ws[i].hard for i in idx],
                header,
                softs=None if m == "ook" else [softs[i] for i in idx],
                n_tones=n_tones,
                detect_inverted=m != "ook",
                **kw,
            )

        def checked(frame_of, idx):
            """Frame symbols and payload check of bursts idx at frame_of[i]; and, for those
            whose payload locked, whether the header's errors are consistent with it."""
            framed = _frame_symbols_many(
                [(frame_of[i], batch[i].hard, batch[i].k1, batch[i].timing) for i in idx],
                n_tones,
                header,
                layout,
                profile,
            )
            locked = [j for j, fr in enumerate(framed) if fr[2] is not None and fr[2].locked]
            ok = _header_consistent_many(
                [frame_of[idx[j]] for j in locked], [framed[j][2] for j in locked], profile
            )
            verdict = {idx[j]: bool(o) for j, o in zip(locked, ok, strict=True)}
            return dict(zip(idx, framed, strict=True)), verdict

        frames = align(batch, range(len(batch)))
        found = [i for i, f in enumerate(frames) if f.found]
        framed, verdict = checked(frames, found)
        for i in found:
            bad = verdict.get(i) is False
            outcome[i] = (frames[i], *framed[i], ("header-mismatch",) if bad else ())
        rest = [i for i, f in enumerate(frames) if not f.found]
        if rest and profile.payload_kind != "unknown":
            # At low Eb/N0 a header has too many errors for a safe lock on its own; accept a
            # looser match only when the payload pattern then locks (its own false-lock
            # probability is 1e-6), which confirms the position.
            max_errors = int(LOOSE_HEADER_ERROR_FRACTION * len(header) * profile.bits_per_symbol)
            loose = dict(zip(rest, align(batch, rest, max_errors=max_errors), strict=True))
            trials, verdict = checked(loose, [i for i in rest if loose[i].found])
            for i, ok in verdict.items():
                if ok:
                    frame = dataclasses.replace(
                        loose[i], message=loose[i].message + "; confirmed by the payload pattern"
                    )
                    outcome[i] = (frame, *trials[i], ())
        for i in rest:
            if i not in outcome:
                w = batch[i]
                outcome[i] = (frames[i], (w.k0, w.k1), None, None, ("sync-not-found",))
    for i, w in enumerate(batch):
        w.frame, w.sel, w.known, w.check, more = outcome[i]
        w.flags.extend(more)


def _refine_on_known(w: _Work, ctx: _Context) -> None:
    """Known symbols give a sharper timing criterion than the feature line: correlate the
    burst with their waveform (energy criteria are flat for h = 1/2), then again."""
    if (
        w.known is None
        or w.frame is None
        or not w.frame.found
        or w.timing.quality.get("line_snr_db", np.inf) >= DA_REFINE_LINE_DB
    ):
        return
    fs, m, header = ctx.fs, ctx.profile.modulation, ctx.header
    known, sel, link = w.known, w.sel, w.link
    n_known = int(np.argmin(known >= 0)) if (known < 0).any() else len(known)
    timing, shift, dcfo = refine_timing_known(
        w.x,
        fs,
        w.timing,
        first_symbol=sel[0],
        symbols=known[:n_known],
        modulation=m,
        symbol_rate_hz=link.symbol_rate_hz,
        tone_spacing_hz=link.tone_spacing_hz,
        cfo_hz=link.cfo_hz,
    )
    cum = w.cum
    if abs(dcfo) > CFO_REFINE_MIN_HZ:
        # The known symbols show a residual carrier offset: retune the correlators.
        link = link_with(link, cfo_hz=link.cfo_hz + dcfo)
        cum = mix_cumulative(w.x, fs, link.tone_freqs_hz)
    frame = dataclasses.replace(w.frame, start_symbol=sel[0] + shift)
    if frame.start_symbol < 0 or frame.start_symbol + len(header) > timing.n_symbols:
        return  # the refined grid puts the frame outside the window: keep the first grid
    z_all, (gram, sym_grams, gram_classes) = _bank(w.x, fs, link, timing, cum)
    # Decide and check the payload again on the refined grid.
    probe = dataclasses.replace(
        w, z_all=z_all, gram=gram, sym_grams=sym_grams, gram_classes=gram_classes
    )
    hard = _hard_decisions(probe, m)
    k1 = _symbols_inside(timing, w.lo_edge, w.hi_edge)[1]
    n_tones = 2 if m == "ook" else z_all.shape[1]
    ((sel, known, check),) = _frame_symbols_many(
        [(frame, hard, k1, timing)], n_tones, header, ctx.layout, ctx.profile
    )
    w.timing, w.link, w.cum, w.z_all, w.hard = timing, link, cum, z_all, hard
    w.gram, w.sym_grams, w.gram_classes = gram, sym_grams, gram_classes
    w.frame, w.k1, w.sel, w.known, w.check = frame, k1, sel, known, check


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


#: Without known symbols the fading test uses the decisions only from this Es/N0 [dB] up:
#: below it wrong decisions pick noise branches and spread the energies by themselves.
FADING_DECIDED_MIN_ESN0_DB = 8.0


def _stage_fading(batch: list[_Work], ctx: _Context) -> None:
    """Fading within each burst from the spread of its sent tone's energies (iqstat.fading)."""
    m = ctx.profile.modulation
    for w in batch:
        fit = w.fit
        if fit is None or not fit.converged or fit.noise_var is None:
            continue
        z = _fit_z(w, *w.sel)
        sent = None if w.known is None else np.asarray(w.known[: len(z)])
        if sent is None or np.count_nonzero(sent >= 0) < FADING_MIN_KNOWN:
            if fit.esn0_db is None or fit.esn0_db < FADING_DECIDED_MIN_ESN0_DB:
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
        if m != "ook" and w.sym_grams is not None:
            # Symbols of two lengths, two tone correlations: the mean of their BERs.
            pred[i] = sum(
                share * float(theory.predicted_ber(ebn0[i], m, rho_abs=_theory_rho(np.abs(g), m)))
                for g, share in w.gram_classes
            )
    for w, p in zip(use, pred, strict=True):
        w.predicted_ber = float(p)


def _finish(w: _Work, ctx: _Context) -> None:
    """Flags and the burst's result."""
    fit, flags = w.fit, w.flags
    if w.check is not None and not w.check.locked:
        flags.append("pattern-not-locked")
    if not fit.converged:
        flags.append("fit-failed")
    elif fit.gof_pvalue is not None and fit.gof_pvalue < GOF_FLAG_PVALUE:
        flags.append("not-awgn")
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
        predicted_ber=w.predicted_ber,
        flags=(),
        message=fit.message,
    )
    loss, loss_ci = res.detection_loss_db, res.detection_loss_db_ci95
    if loss is not None and loss > DETECTION_LOSS_FLAG_DB and (loss_ci is None or loss_ci[0] > 0):
        flags.append("detection-loss")
    w.result = dataclasses.replace(res, flags=tuple(flags))


def _measure_batch(capture: Capture, bursts: Sequence[Burst], ctx: _Context) -> list[BurstResult]:
    """Every stage of the chain over a batch of bursts; one result per burst, in order."""
    if ctx.header_error is not None:
        return [
            dataclasses.replace(
                _unmeasured(b, "not-measured", ctx.header_error),
                start_time=capture.sample_datetime(b.start_sample),
            )
            for b in bursts
        ]
    margin = int(math.ceil(EDGE_MARGIN_SYMBOLS * ctx.fs / ctx.symbol_rate_hz))
    windows = _read_bursts(capture, bursts, margin, ctx.detection)
    works = [_Work(burst=b, x0=a, x=x) for b, (a, x) in zip(bursts, windows, strict=True)]
    _batched(works, lambda batch: _stage_link(batch, ctx))
    _batched(works, lambda batch: _stage_timing(batch, ctx))
    _stage_decide(works, ctx)
    _batched(works, lambda batch: _stage_frame(batch, ctx))
    _each(works, lambda w: _refine_on_known(w, ctx))
    _stage_fit(works, ctx)
    _batched(works, lambda batch: _stage_fading(batch, ctx))
    _batched(works, lambda batch: _stage_available(batch, ctx))
    _batched(works, lambda batch: _stage_predict(batch, ctx))
    _each(works, lambda w: _finish(w, ctx))
    return [
        dataclasses.replace(w.result, start_time=capture.sample_datetime(w.burst.start_sample))
        for w in works
    ]


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
    across bursts by :func:`measure_capture` when the profile lacks them). A burst that cannot
    be measured gives a result that says why (its flags and message), not an exception.
    """
    ctx = _context(capture, profile, layout, detection, symbol_rate_hz, tone_spacing_hz)
    return _measure_batch(capture, [burst], ctx)[0]


def _context(capture, profile, layout, detection, symbol_rate_hz, tone_spacing_hz) -> _Context:
    try:
        header, error = _header_symbols(layout, profile.modulation), None
    except MeasurementError as exc:
        header, error = np.zeros(0, dtype=np.int64), str(exc)
    return _Context(
        fs=capture.sample_rate_hz,
        profile=profile,
        layout=layout,
        detection=detection,
        header=header,
        header_error=error,
        symbol_rate_hz=symbol_rate_hz,
        tone_spacing_hz=tone_spacing_hz,
    )


def _batches(bursts: Sequence[Burst], margin: int) -> list[list[Burst]]:
    """Consecutive bursts in groups of at most BATCH_BURSTS and about BATCH_SAMPLES samples."""
    out: list[list[Burst]] = [[]]
    total = 0
    for b in bursts:
        n = b.n_samples + 2 * margin
        if out[-1] and (len(out[-1]) >= BATCH_BURSTS or total + n > BATCH_SAMPLES):
            out.append([])
            total = 0
        out[-1].append(b)
        total += n
    return out if out[0] else []


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
        available=None,
        fading=None,
        predicted_ber=None,
        flags=(flag,),
        message=message,
    )


def _check_profile_rates(capture, detection, profile, margin) -> tuple[str, ...]:
    """Blind estimate on the longest burst, compared with the rates the profile gives."""
    if not detection.bursts or (profile.symbol_rate_hz is None and profile.tone_spacing_hz is None):
        return ()
    longest = max(detection.bursts, key=lambda b: b.n_samples)
    _, x = _read_burst(capture, longest, margin, detection)
    y, fs_y = _narrowed(x, capture.sample_rate_hz, detection.band_hz)
    try:
        blind = estimate_link(y, fs_y, modulation=profile.modulation)
    except IqstatError:
        return ()
    if not blind.quality.get("reliable", True):
        return ()  # an estimate that says it is unsure is no evidence against the profile
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
        options = dict(
            merge_gap_s=merge_gap_s, expected_burst_s=expected_s, signal_bandwidth_hz=bandwidth
        )
        if facts is None:
            # One pass over the samples gives both.
            facts, detection = survey_capture(capture, **options)
        else:
            detection = detect_bursts(capture, **options)
    facts = compute_facts(capture) if facts is None else facts
    fs = capture.sample_rate_hz
    rate_guess = profile.symbol_rate_hz or fs / 50
    margin = int(math.ceil(EDGE_MARGIN_SYMBOLS * fs / rate_guess))
    blind = profile.symbol_rate_hz is None or (
        profile.modulation != "ook" and profile.tone_spacing_hz is None
    )
    rate, spacing = profile.symbol_rate_hz, profile.tone_spacing_hz
    if blind and detection.bursts:
        rate, spacing = _blind_rates(capture, detection, profile, margin)
    missing = None
    if rate is None:
        missing = "the symbol rate could not be estimated on any burst; give it with --symbol-rate"
    elif spacing is None and profile.modulation != "ook":
        missing = (
            "the tone spacing could not be estimated on any burst; give it with --tone-spacing"
        )
    if missing is None:
        ctx = _context(capture, profile, layout, detection, rate, spacing)
        results = [
            r
            for batch in _batches(detection.bursts, margin)
            for r in _measure_batch(capture, batch, ctx)
        ]
    else:
        results = [_unmeasured(b, "link-not-estimated", missing) for b in detection.bursts]
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
        # per burst, but no headline figure. A continuous signal in the band explains that
        # as well as a wrong profile does, and is what to look at first.
        lines = detection.interfering_lines(link_sum.symbol_rate_hz)
        if lines:
            flag = "interference"
            where = ", ".join(f"{0.5e-3 * (ln.f_lo_hz + ln.f_hi_hz):+.1f} kHz" for ln in lines[:3])
            message = (
                f"a continuous signal lies in the band ({where}, see capture.lines) and the "
                f"bursts do not follow the noise model ({reason}): no headline figure"
            )
        else:
            flag = "profile-mismatch"
            message = (
                f"the capture does not match the profile ({reason}): no headline figure; "
                "check the modulation, rates and frame"
            )
        summary = dataclasses.replace(
            summary,
            ebn0_db=None,
            ebn0_db_ci95=None,
            esn0_db=None,
            predicted_ber=None,
            margin_db=None,
            worst_burst_margin_db=None,
            flags=tuple(dict.fromkeys((*summary.flags, flag))),
            message=message,
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
