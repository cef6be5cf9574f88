"""The measurement chain of one capture: bursts → link → timing → correlators → fit → theory.

This module wires the stages together and computes the capture's summary; it does no I/O
beyond reading samples through the :class:`~iqstat.capture.Capture`, and renders nothing.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

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
from iqstat.fit import NoncoherentFit, decide_symbols, fit_da, fit_dd, fit_nda
from iqstat.formats.open import open_capture
from iqstat.patterns import BitCheck, check_known, check_prbs, clopper_pearson, prbs_bits
from iqstat.profile import (
    FrameLayout,
    LinkProfile,
    bits_to_symbols,
    frame_layout,
    load_profile,
    override_profile,
    symbols_to_bits,
)
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
#: Per-burst flags that also flag the capture when any burst raises them.
BURST_FLAGS_RAISED = (
    "sync-not-found",
    "header-mismatch",
    "pattern-not-locked",
    "not-awgn",
    "detection-loss",
    "fit-failed",
    "too-few-symbols",
    "not-measured",
    "link-not-estimated",
)
#: 4-FSK tones whose |ρ| stay below this are treated as orthogonal by the theory.
NEAR_ORTHOGONAL_RHO = 0.05
#: A carrier correction from the known symbols smaller than this [Hz] is not applied.
CFO_REFINE_MIN_HZ = 1.0
#: Fewest symbols for a fit worth reporting.
MIN_FIT_SYMBOLS = 20
#: Fraction of full-scale samples above which a capture is flagged as clipped.
CLIPPING_FLAG_FRACTION = 1e-4
#: An estimated symbol rate further than this from the profile's is flagged.
RATE_MISMATCH_FRACTION = 0.01
#: An estimated tone spacing further than this from the profile's is flagged.
SPACING_MISMATCH_FRACTION = 0.05
#: Goodness-of-fit p-value below which the branch energies are flagged as not AWGN-like.
GOF_FLAG_PVALUE = 1e-3
#: Detection loss (available − detected Eb/N0) above which the burst is flagged.
DETECTION_LOSS_FLAG_DB = 1.5
#: Spread of per-burst Eb/N0 (max − min) above which the capture is flagged.
LEVEL_SPREAD_FLAG_DB = 3.0


@dataclass(frozen=True)
class BurstResult:
    """Everything measured on one burst.

    ``ebn0_db`` is the headline (maximum likelihood, marginalised over the sent symbols);
    ``ebn0_db_da`` uses the known symbols (header, and payload where known); ``ebn0_db_dd`` is
    the decision-directed moment estimate, biased high below about 8 dB, for comparison only.
    """

    index: int
    start_sample: int
    stop_sample: int
    symbols: int
    link: LinkEstimate | None
    timing: SymbolTiming | None
    frame: FrameAlignment | None
    fit: NoncoherentFit | None
    fit_da: NoncoherentFit | None
    fit_dd: NoncoherentFit | None
    bit_check: BitCheck | None
    available_ebn0_db: float | None
    predicted_ber: float | None
    power_dbfs: float
    flags: tuple[str, ...]
    message: str

    @property
    def ebn0_db(self) -> float | None:
        return self.fit.ebn0_db if self.fit is not None and self.fit.converged else None

    @property
    def ebn0(self) -> float | None:
        v = self.ebn0_db
        return None if v is None else 10.0 ** (v / 10.0)

    @property
    def detection_loss_db(self) -> float | None:
        if self.available_ebn0_db is None or self.ebn0_db is None:
            return None
        return self.available_ebn0_db - self.ebn0_db

    @property
    def cfo_hz(self) -> float | None:
        return None if self.link is None else self.link.cfo_hz

    def to_dict(self) -> dict:
        fit = self.fit
        bc = self.bit_check
        counted = bc is not None and bc.locked
        return {
            "index": self.index,
            "start_sample": self.start_sample,
            "stop_sample": self.stop_sample,
            "symbols": self.symbols,
            "cfo_hz": self.cfo_hz,
            "symbol_rate_hz": None if self.link is None else self.link.symbol_rate_hz,
            "tone_spacing_hz": None if self.link is None else self.link.tone_spacing_hz,
            "clock_offset_ppm": None if self.timing is None else self.timing.clock_offset_ppm,
            "timing_offset_samples": None if self.timing is None else self.timing.t0_samples,
            "power_dbfs": self.power_dbfs,
            "ebn0_db": self.ebn0_db,
            "ebn0_db_ci95": None if fit is None or not fit.converged else fit.ebn0_db_ci95,
            "esn0_db": None if fit is None or not fit.converged else fit.esn0_db,
            "ebn0_db_da": _fit_ebn0(self.fit_da),
            "ebn0_db_dd": _fit_ebn0(self.fit_dd),
            "available_ebn0_db": self.available_ebn0_db,
            "detection_loss_db": self.detection_loss_db,
            "predicted_ber": self.predicted_ber,
            "bit_errors": bc.bit_errors if counted else None,
            "bits_checked": bc.bits_checked if counted else None,
            "measured_ber": bc.ber if counted else None,
            "measured_ber_ci95": bc.ber_ci95 if counted else None,
            "frame_found": None if self.frame is None else self.frame.found,
            "frame_start_symbol": None if self.frame is None else self.frame.start_symbol,
            "header_bit_errors": None if self.frame is None else self.frame.bit_errors,
            "gof_pvalue": None if fit is None else fit.gof_pvalue,
            "flags": list(self.flags),
            "message": self.message,
            "fit": None if fit is None else fit.to_dict(),
            "fit_da": None if self.fit_da is None else self.fit_da.to_dict(),
            "fit_dd": None if self.fit_dd is None else self.fit_dd.to_dict(),
            "link": None if self.link is None else self.link.to_dict(),
            "timing": None if self.timing is None else self.timing.to_dict(),
            "frame": None if self.frame is None else self.frame.to_dict(),
            "bit_check": None if bc is None else bc.to_dict(),
        }


def _fit_ebn0(fit: NoncoherentFit | None) -> float | None:
    return fit.ebn0_db if fit is not None and fit.converged else None


@dataclass(frozen=True)
class LinkSummary:
    """The link's parameters as used, and where each came from."""

    modulation: str
    symbol_rate_hz: float | None
    symbol_rate_source: str
    tone_spacing_hz: float | None
    tone_spacing_source: str
    modulation_index: float | None
    tone_correlation: float | None
    bit_rate_hz: float | None

    def to_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass(frozen=True)
class Summary:
    """The capture's headline figures."""

    bursts: int
    bursts_measured: int
    symbols: int
    ebn0_db: float | None
    ebn0_db_ci95: tuple[float, float] | None
    ebn0_db_min: float | None
    ebn0_db_max: float | None
    ebn0_db_std: float | None
    esn0_db: float | None
    ebn0_db_da: float | None
    ebn0_db_dd: float | None
    available_ebn0_db: float | None
    detection_loss_db: float | None
    predicted_ber: float | None
    measured_ber: float | None
    measured_ber_ci95: tuple[float, float] | None
    bit_errors: int | None
    bits_checked: int | None
    bursts_checked: int
    required_ber: float | None
    required_ebn0_db: float | None
    margin_db: float | None
    worst_burst_margin_db: float | None
    flags: tuple[str, ...]
    message: str

    def to_dict(self) -> dict:
        d = dict(self.__dict__)
        d["flags"] = list(self.flags)
        return d


@dataclass(frozen=True)
class MeasurementReport:
    """The full result of measuring one capture."""

    facts: CaptureFacts
    profile: LinkProfile
    link: LinkSummary
    detection: BurstDetection
    bursts: tuple[BurstResult, ...]
    summary: Summary
    warnings: tuple[str, ...] = field(default=())


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
    z_all = correlate_symbols(
        x,
        fs,
        link.tone_freqs_hz,
        timing.t0_samples,
        timing.period_samples,
        timing.n_symbols,
        cumulative=cum,
    )
    gram = template_gram(link.tone_freqs_hz, timing.period_samples, fs)
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
        z_all = correlate_symbols(
            x,
            fs,
            link.tone_freqs_hz,
            timing.t0_samples,
            timing.period_samples,
            timing.n_symbols,
            cumulative=cum,
        )
        gram = template_gram(link.tone_freqs_hz, timing.period_samples, fs)
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


def _weighted_ebn0(results: list[BurstResult]):
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


def _summarise(results, profile, link_sum, facts, detection, rho) -> Summary:
    flags: list[str] = []
    m = profile.modulation
    mean_db, ci, lo, hi, std = _weighted_ebn0(results)
    ok = [r for r in results if r.ebn0_db is not None]
    symbols = sum(r.symbols for r in ok)
    pred = None
    if ok:
        pred = float(
            theory.mean_ber_over_bursts(
                np.array([r.ebn0 for r in ok]),
                np.array([r.symbols for r in ok], dtype=float),
                m,
                rho_abs=rho,
            )
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
    esn0_db = None if mean_db is None else mean_db + float(db(profile.bits_per_symbol))
    da = [r.fit_da.ebn0_db for r in ok if r.fit_da is not None and r.fit_da.converged]
    dd = [r.fit_dd.ebn0_db for r in ok if r.fit_dd is not None and r.fit_dd.converged]
    av = [r.available_ebn0_db for r in ok if r.available_ebn0_db is not None]
    avail = _mean_db(av, [r.symbols for r in ok if r.available_ebn0_db is not None])
    loss = None if (avail is None or mean_db is None) else avail - mean_db
    if not results:
        flags.append("no-bursts")
    elif not ok:
        flags.append("nothing-measured")
    if facts.clipped_fraction is not None and facts.clipped_fraction > CLIPPING_FLAG_FRACTION:
        flags.append("clipping")
    if not facts.is_complex:
        flags.append("real-valued-capture")
    for fl in BURST_FLAGS_RAISED:
        if any(fl in r.flags for r in results):
            flags.append(fl)
    if lo is not None and hi - lo > LEVEL_SPREAD_FLAG_DB:
        flags.append("level-spread")
    if meas is not None and pred is not None and n_bits:
        # Measured errors far outside what the fitted Eb/N0 predicts point at something
        # other than white noise (interference, fading, bit slips).
        p_lo = stats.binom.cdf(errors, n_bits, pred)
        p_hi = stats.binom.sf(errors - 1, n_bits, pred)
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
        ebn0_db_da=_mean_db(da, None),
        ebn0_db_dd=_mean_db(dd, None),
        available_ebn0_db=avail,
        detection_loss_db=loss,
        predicted_ber=pred,
        measured_ber=meas,
        measured_ber_ci95=ci_meas,
        bit_errors=errors,
        bits_checked=n_bits,
        bursts_checked=len(checked),
        required_ber=profile.required_ber,
        required_ebn0_db=req,
        margin_db=marg,
        worst_burst_margin_db=worst,
        flags=tuple(dict.fromkeys(flags)),
        message=message,
    )


def _mean_db(values_db, weights) -> float | None:
    if not values_db:
        return None
    v = 10 ** (np.asarray(values_db, dtype=float) / 10)
    w = np.ones_like(v) if weights is None else np.asarray(weights, dtype=float)
    return float(db(np.sum(w * v) / np.sum(w)))


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
        return measure_burst(
            capture, burst, profile, layout, detection, symbol_rate_hz=rate, tone_spacing_hz=spacing
        )
    except MeasurementError as exc:
        return _unmeasured(burst, "not-measured", str(exc))


def _profile_mismatch(
    results: list[BurstResult], rate_flags: tuple[str, ...], layout: FrameLayout
) -> str | None:
    """Why the profile evidently does not describe the capture, or None.

    Evidence: the capture's blind symbol rate or tone spacing contradicts the profile's; or,
    among the measured bursts, most fail the energy-law test while the frame is found in
    fewer than half; or most frames match their header far worse than their payload.
    """
    if rate_flags:
        return ", ".join(f.replace("-", " ") for f in rate_flags)
    measured = [r for r in results if r.fit is not None]
    if not measured:
        return None
    n = len(measured)
    not_awgn = sum("not-awgn" in r.flags for r in measured)
    framed = sum(r.frame is not None and r.frame.found for r in measured)
    header_bad = sum("header-mismatch" in r.flags for r in measured)
    if layout.n_header_bits and not_awgn >= 0.5 * n and framed < 0.5 * n:
        return "branch energies do not follow the model and the frame is rarely found"
    if header_bad >= 0.5 * n:
        return "headers match far worse than payloads"
    return None


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
    summary = _summarise(results, profile, link_sum, facts, detection, rho_theory)
    if mismatch:
        summary = dataclasses.replace(summary, flags=tuple(dict.fromkeys(summary.flags + mismatch)))
    reason = _profile_mismatch(results, mismatch, layout)
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
