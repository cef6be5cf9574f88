"""Entry points :func:`detect_bursts` and :func:`survey_capture`, and the figures of the gaps.

:func:`_detect_bursts` runs the stage: the band (:mod:`iqstat.bursts.band`), the one streaming
pass (:mod:`iqstat.bursts.frame_powers`, feeding :class:`iqstat.facts.FactsAccumulator` too
for :func:`survey_capture`), a first DC estimate from the quietest frames, the noise floor
(:func:`iqstat.noise.noise_floor_lowest_cluster`, re-estimated on the gaps), the frame-level
detection (:mod:`iqstat.bursts.frame_detection`), the edges to the sample
(:mod:`iqstat.bursts.edges`), merging and the minimum length; then, on the noise-only gaps, the
noise variance, the in-band noise PSD (mean gap-frame power, Gamma with shape gap frames × band
bins), the receiver's DC offset (mean of the samples) and its I/Q imbalance
(:func:`iqstat.frontend.measure_iq_correction`), and per burst its mean power, in-band SNR and
peak.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.fft

from iqstat.bursts.band import _band_edges, _bins_for_band, _default_frame_samples, _survey_band
from iqstat.bursts.edges import _refine_many
from iqstat.bursts.frame_detection import (
    LONG_BURST_FACTOR,
    _detect_groups,
    _Group,
    _Prefix,
    _split_long_groups,
)
from iqstat.bursts.frame_powers import _FramePowerPass
from iqstat.bursts.readback import _mean_power, _read_windows
from iqstat.bursts.results import Burst, BurstDetection, ContinuousLine, FramePowers, _db
from iqstat.capture import DEFAULT_CHUNK_SAMPLES, Capture
from iqstat.errors import MeasurementError, ParameterError
from iqstat.facts import (
    FLOOR_FRAME,
    CaptureFacts,
    FactsAccumulator,
    iter_unscaled_chunks,
    unscaled_factor,
)
from iqstat.frontend import NO_CORRECTION, measure_iq_correction
from iqstat.levels import gain_track
from iqstat.noise import (
    noise_floor_lowest_cluster,
    threshold_from_floor,
)

# Lowest in-band SNR reported, dB (a burst whose in-band excess is not positive).
_MIN_BAND_SNR_DB = -30.0
#: The gap re-estimate of the floor may exceed the robust starting estimate by this factor.
GAP_FLOOR_MAX_RISE = 1.1
#: Fewest noise-only frames for a noise estimate from the gaps.
MIN_GAP_FRAMES = 8


def _burst_frame_figures(spans, p_band: np.ndarray, p_full: np.ndarray, L: int):
    """Per burst: mean in-band frame power and peak full-band frame power (lists).

    The band mean is over the frames wholly inside [s0, s1), or those it touches when none
    is; the peak over the frames wholly inside when there are at least two. NaN where
    undefined. Means from prefix sums, peaks by one ``maximum.reduceat``.
    """
    if not spans:
        return [], []
    n_frames = p_band.size
    sp = np.asarray(spans, dtype=np.int64).reshape(-1, 2)
    s0, s1 = sp[:, 0], sp[:, 1]
    f0, f1 = -(-s0 // L), np.minimum(s1 // L, n_frames)
    whole = f1 > f0
    a = np.where(whole, f0, s0 // L)
    b = np.where(whole, f1, np.minimum(-(-s1 // L), n_frames))
    cs = np.concatenate(([0.0], np.cumsum(p_band, dtype=np.float64)))
    ok = b > a
    a_c, b_c = np.clip(a, 0, n_frames), np.clip(b, 0, n_frames)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(ok, (cs[b_c] - cs[a_c]) / (b - a), np.nan)
    two = f1 - f0 >= 2
    peak = np.full(sp.shape[0], np.nan)
    if two.any():
        idx = np.stack([f0[two], f1[two]], axis=1).ravel()
        peak[two] = np.maximum.reduceat(np.append(p_full, 0.0), idx)[0::2]
    return mean.tolist(), peak.tolist()


def _noise_psd(p_gap: np.ndarray, dof: float, L: int, fs: float):
    """Noise PSD [FS²/Hz] in the detection band from the in-band power of every gap frame.

    The in-band frame power of white noise has mean σ²·|B|/L (see measure_frame_powers), so
    N0 = mean(p_gap)·L/(|B|·fs) for a complex capture (|B| = dof bins). Using every gap
    frame and every band bin keeps the estimate's relative spread at 1/√(n_gap·|B|).
    ``p_gap`` are the gap frames' in-band powers with the DC offset taken off.
    """
    if p_gap.size == 0:
        return float("nan")
    return float(np.mean(p_gap, dtype=np.float64)) * L / (dof * fs)


#: Most gap frames read back to measure the receiver's quadrature imbalance.
_IQ_GAP_FRAMES = 1024


def _gap_frames_read(capture: Capture, gap_frames: np.ndarray, L: int, dc: complex):
    """Up to _IQ_GAP_FRAMES gap frames spread over the capture, DC removed, shape (k, L)."""
    k = min(_IQ_GAP_FRAMES, gap_frames.size)
    pick = gap_frames[np.linspace(0, gap_frames.size - 1, k).round().astype(np.int64)]
    x = _read_windows(capture, np.unique(pick) * L, L)
    if dc:
        x -= np.complex64(dc)
    return x


def _lines_in_gaps(candidates, x: np.ndarray, noise_per_bin: np.ndarray, fs: float):
    """The survey's candidate lines that the gap frames ``x`` hold too, their power from
    there.

    Where bursts leave no block of the survey without signal (gaps shorter than its blocks),
    a burst's own band looks steady to it; in the gaps a burst's band holds noise only. A
    line stays when its Hann-bin excess over the noise reference exceeds 6 standard errors
    of the gap frames' mean, n_frames^(−1/2) per bin.
    """
    if not candidates or x.shape[0] == 0:
        return (), None
    n_fr, L = x.shape
    w = np.hanning(L + 2)[1:-1].astype(np.float32)
    sw2 = float(np.sum(w.astype(np.float64) ** 2))
    X = scipy.fft.fft(x * w, axis=1)
    spec = np.fft.fftshift(np.mean(X.real**2 + X.imag**2, axis=0, dtype=np.float64))
    ref = np.fft.fftshift(noise_per_bin) * sw2 * L  # Hann-bin noise, shifted order
    f_bin = fs / L
    out = []
    outside = np.ones(L, dtype=bool)  # bins free of every confirmed line
    for ln in candidates:
        lo = int(round(ln.f_lo_hz / f_bin + 0.5)) + L // 2
        hi = int(round(ln.f_hi_hz / f_bin - 0.5)) + L // 2
        lo, hi = max(lo, 0), min(hi, L - 1)
        if hi < lo:
            continue
        excess = float(np.sum(spec[lo : hi + 1] - ref[lo : hi + 1]))
        noise = float(np.sum(ref[lo : hi + 1]))
        if excess <= 6.0 * noise / math.sqrt(n_fr):
            continue
        power = excess / (L * sw2)
        n0 = float(np.median(ref[lo : hi + 1])) / (sw2 * fs)
        outside[lo : hi + 1] = False
        out.append(ContinuousLine.of(ln.f_lo_hz, ln.f_hi_hz, power, n0))
    if not out:
        return (), None
    # The noise without the lines: a Hann bin of white noise holds σ²·Σw², so the mean over
    # the bins free of lines, over Σw², is σ² (a subtraction of the lines' power from the
    # full band would carry their estimation error, large beside a strong carrier).
    return tuple(out), float(np.mean(spec[outside])) / sw2


#: Modelled leakage of lines beside the band, as a fraction of the band's noise, above which
#: the floor's excess over the spectral reference is taken as leakage (common practice, no
#: source).
LEAK_MATTERS = 0.1


#: Consecutive detections spanning at most this many expected burst lengths are one burst.
FADE_JOIN_FACTOR = 1.15
#: ... when both stand this far (in-band SNR, dB) above the noise: pieces of a burst that
#: faded, not fragments of a burst at the edge of detection or noise that passed the test.
FADE_JOIN_MIN_SNR_DB = 0.0


def _join_faded(
    spans: list[list[int]], expected_samples: float, p: np.ndarray, floor: float, L: int
) -> list[list[int]]:
    """Join consecutive detections that together span no more than one expected burst.

    A burst that fades within itself (multipath, a moving transmitter) drops below the
    threshold for a while and reads as two pieces, each too short for its frame; two real
    bursts of the profile's length span at least two lengths. (Pieces of a split detection
    span two lengths too, so they stay apart.) Only pieces clearly above the noise are
    joined: near the detection limit the pieces are as likely noise that passed the test,
    and joining them would take noise into the burst.
    """
    if not spans or floor <= 0:
        return spans
    min_level = floor * (1.0 + 10.0 ** (FADE_JOIN_MIN_SNR_DB / 10.0))
    n = p.size

    def strong(s0: int, s1: int) -> bool:
        f0, f1 = s0 // L, min(-(-s1 // L), n)
        return f1 > f0 and float(np.mean(p[f0:f1])) >= min_level

    out: list[list[int]] = []
    last_strong = False
    for s0, s1 in spans:
        now_strong = strong(s0, s1)
        if out and last_strong and now_strong:
            if s1 - out[-1][0] <= FADE_JOIN_FACTOR * expected_samples:
                out[-1][1] = max(out[-1][1], s1)
                continue
        out.append([s0, s1])
        last_strong = now_strong
    return out


def _lines_beside(survey, band_hz) -> bool:
    """Whether the survey saw a continuous line outside the band."""
    if survey is None or band_hz is None:
        return False
    return any(ln.f_hi_hz <= band_hz[0] or ln.f_lo_hz >= band_hz[1] for ln in survey.lines)


def _line_leakage(lines, band_bins: np.ndarray, L: int, fs: float, band_hz) -> float:
    """Mean power continuous lines outside the band put into its rectangular-window frame
    bins.

    A tone of power P at f leaks P·|sin(πLδ)/(L·sin(πδ))|² into bin k, δ = f/fs − k/L (the
    Dirichlet kernel); a line is taken as spread evenly over its survey bins (16 points).
    Candidates overlapping the band are left out: where gaps are shorter than the survey's
    blocks, the bursts' own band looks steady to the survey.
    """
    if not lines or band_hz is None:
        return 0.0
    k = np.asarray(band_bins, dtype=np.float64)
    k = np.where(k >= L / 2, k - L, k)  # signed bin numbers
    total = 0.0
    for ln in lines:
        if ln.f_hi_hz > band_hz[0] and ln.f_lo_hz < band_hz[1]:
            continue
        f = np.linspace(ln.f_lo_hz, ln.f_hi_hz, 16) / fs
        d = f[:, None] - k[None, :] / L
        with np.errstate(divide="ignore", invalid="ignore"):
            ker = np.sin(np.pi * L * d) / (L * np.sin(np.pi * d))
        ker = np.where(np.abs(np.sin(np.pi * d)) < 1e-12, 1.0, ker)
        total += 10.0 ** (ln.power_dbfs / 10.0) * float(np.mean(np.sum(ker**2, axis=1)))
    return total


#: Share of the quietest frames (by full-band power) whose bin 0 gives the first DC estimate.
_DC_QUIET_SHARE = 0.1


#: A DC offset is taken as present when |mean|² exceeds this many times its noise-only
#: expectation σ²/n (|mean|²·n/σ² is Exp(1) for n circular samples: a false alarm 1.4e-11).
#: Below it, subtracting the estimate would add as much error as it removes (an OOK carrier
#: within a few hundred Hz of DC is coherent with a DC error over the whole burst).
DC_SIGNIFICANCE = 25.0


def _significant_dc(sums: np.ndarray, power: np.ndarray, L: int) -> complex:
    """Mean of the samples of some frames (their ``sums`` and mean ``power``), or 0 when it is
    not significantly above what noise alone gives (see DC_SIGNIFICANCE)."""
    if sums.size == 0:
        return 0j
    n = sums.size * L
    dc = complex(sums.sum(dtype=np.complex128) / n)
    noise = max(float(np.mean(power, dtype=np.float64)) - abs(dc) ** 2, 0.0)
    return dc if abs(dc) ** 2 * n > DC_SIGNIFICANCE * noise else 0j


def _quiet_dc(fp: FramePowers) -> complex:
    """Mean of x over the quietest frames: a first estimate of the receiver's DC offset.

    Frames with the lowest full-band power are noise-only wherever bursts fill less than
    ~90 % of the capture; their bin 0 holds L·dc plus noise, with no signal to bias it (a
    carrier near 0 Hz would, in burst frames). 0 when not significant.
    """
    n = fp.full.size
    k = max(1, int(_DC_QUIET_SHARE * n))
    # A threshold and a mask rather than argpartition's int64 indices (8 bytes per frame).
    quiet = fp.full <= np.partition(fp.full, k - 1)[k - 1] if k < n else slice(None)
    return _significant_dc(fp.sums[quiet], fp.full[quiet], fp.frame_samples)


def _without_dc(p_band: np.ndarray, sums: np.ndarray, L: int, dc: complex) -> np.ndarray:
    """In-band frame powers with bin 0 taken as X_0 − L·dc: the DC offset removed."""
    x0 = sums / L
    d = x0 - dc
    return p_band - (x0.real**2 + x0.imag**2) + (d.real**2 + d.imag**2)


def _check_band(band_hz, fs: float) -> tuple[float, float]:
    try:
        f_lo, f_hi = (float(v) for v in band_hz)
    except (TypeError, ValueError):
        raise ParameterError(
            f"band_hz {band_hz!r} must be two frequencies (f_lo, f_hi) in Hz"
        ) from None
    if not (np.isfinite(f_lo) and np.isfinite(f_hi) and f_lo < f_hi):
        raise ParameterError(f"band_hz {band_hz!r} must be finite with f_lo < f_hi")
    if f_hi <= -fs / 2 or f_lo >= fs / 2:
        raise ParameterError(
            f"band_hz {band_hz!r} lies outside the captured band ±{fs / 2:g} Hz; "
            "give frequencies relative to the centre frequency"
        )
    return f_lo, f_hi


def _check_nonneg(name: str, value) -> float:
    v = float(value)
    if not (np.isfinite(v) and v >= 0):
        raise ParameterError(f"{name} {value!r} must be a non-negative duration in seconds")
    return v


def _is_chunk_size(value) -> bool:
    try:
        return int(value) == value and int(value) >= 1
    except (TypeError, ValueError):
        return False


def detect_bursts(
    capture: Capture,
    *,
    min_burst_s: float | None = None,
    merge_gap_s: float | None = None,
    pfa: float = 1e-6,
    frame_samples: int | None = None,
    band_hz: tuple[float, float] | None = None,
    chunk_samples: int = DEFAULT_CHUNK_SAMPLES,
    expected_burst_s: float | None = None,
    signal_bandwidth_hz: float | None = None,
) -> BurstDetection:
    """Find the bursts of a capture and measure the noise in the gaps.

    Parameters
    ----------
    capture : Capture
    min_burst_s : float, optional
        Shortest burst kept [s]; default two frames (2·L/fs).
    merge_gap_s : float, optional
        Bursts separated by less than this [s] are merged; default one frame (L/fs).
    pfa : float
        False-alarm probability of one start-threshold test on noise (one frame position at
        one smoothing length), 0 < pfa ≤ 0.01. On noise alone the expected number of false
        bursts is below n_frames × 4 × pfa.
    frame_samples : int, optional
        Frame length L [samples]; default the power of two nearest 1 ms of samples, clipped to
        64..8192 (256 at 250 kS/s).
    band_hz : (float, float), optional
        Signal band [Hz, relative to the centre frequency] to detect in; default chosen from a
        spectrum survey of the capture (full band when nothing stands out of the noise).
    chunk_samples : int
        Samples per read in the streaming pass.
    expected_burst_s : float, optional
        Duration of one burst when the link's frame length is known [s]; detections longer
        than 1.5 such bursts are split at their quietest stretches (weak bursts close
        together can otherwise merge).
    signal_bandwidth_hz : float, optional
        Bandwidth of the link's signal when known (tones and symbol rate from the profile);
        a surveyed band narrower than half of it (a weak signal) is widened.

    Returns
    -------
    BurstDetection
        Bursts sorted by start, noise figures from the noise-only gaps. A capture without
        bursts is a valid result (empty ``bursts``, message "no bursts above the floor of …").

    Notes
    -----
    1. Band: the occupied DFT bins of a Hann spectrum of up to 128 blocks of 16 frames spread
       over the capture (bins whose mean or block maximum stands clearly above a low-quantile
       noise reference); the cluster with most excess power, widened by one bin.
    2. One pass: per-frame full-band and in-band powers (:func:`measure_frame_powers`); the
       in-band frame power is Gamma(|B|) under white noise.
    3. Noise floor N: :func:`iqstat.noise.noise_floor_lowest_cluster` on the in-band frame
       powers (robust to bursts filling most of the capture), or the survey's spectrum beside
       the signal when that lies clearly lower; then re-estimated, up to four times until it
       settles, as the mean in-band power of the frames outside every detection (the
       noise-only gaps), at most 1.1 times the starting estimate; once more after step 5
       from the frames at least one frame away from every refined burst.
    4. Moving means over 1, 4, 16 and 64 frames, each tested with hysteresis: start at
       :func:`threshold_from_floor` (pfa), continue down to the threshold for √pfa.
       Detections of all lengths are joined; the finest one is kept where it exists, and two
       detections are split only when the gap between them is decisively noise (likelihood
       ratio 1e4 against the burst level of the weaker neighbour); so weak bursts are not
       split and strong close bursts not merged.
    5. Each edge is refined to one sample by a change-point estimate on band-limited samples
       read back inside the window the detection allows.
    6. On the gap frames: the DC offset is the mean of their samples (from the frames'
       sums); noise_var is their mean full-band power less |dc|²; the noise PSD their mean
       in-band power with the DC removed, ·L/(|B|·fs) (2|B| for a real capture); the I/Q
       imbalance of a complex capture is measured on up to 1024 of them read back
       (:func:`iqstat.frontend.measure_iq_correction`).
    """
    return _detect_bursts(
        capture,
        None,
        min_burst_s=min_burst_s,
        merge_gap_s=merge_gap_s,
        pfa=pfa,
        frame_samples=frame_samples,
        band_hz=band_hz,
        chunk_samples=chunk_samples,
        expected_burst_s=expected_burst_s,
        signal_bandwidth_hz=signal_bandwidth_hz,
    )


def survey_capture(
    capture: Capture,
    *,
    min_burst_s: float | None = None,
    merge_gap_s: float | None = None,
    pfa: float = 1e-6,
    frame_samples: int | None = None,
    band_hz: tuple[float, float] | None = None,
    chunk_samples: int = DEFAULT_CHUNK_SAMPLES,
    expected_burst_s: float | None = None,
    signal_bandwidth_hz: float | None = None,
) -> tuple[CaptureFacts, BurstDetection]:
    """Capture facts and burst detection from one streaming pass over the samples.

    Parameters
    ----------
    capture : Capture
    min_burst_s, merge_gap_s, pfa, frame_samples, band_hz, expected_burst_s, signal_bandwidth_hz
        As for :func:`detect_bursts`.
    chunk_samples : int
        Samples per read of the streaming pass (both results are those of that chunk size).

    Returns
    -------
    (CaptureFacts, BurstDetection)
        Equal to ``compute_facts(capture, chunk_samples)`` and ``detect_bursts(capture, ...,
        chunk_samples=chunk_samples)``; the samples are read once for both (plus the band
        survey's blocks and the bursts' edges, which detection reads back).
    """
    if isinstance(capture, Capture) and _is_chunk_size(chunk_samples):
        facts = FactsAccumulator(capture, int(chunk_samples))
    else:
        facts = None  # _detect_bursts raises on the bad parameter
    detection = _detect_bursts(
        capture,
        facts,
        min_burst_s=min_burst_s,
        merge_gap_s=merge_gap_s,
        pfa=pfa,
        frame_samples=frame_samples,
        band_hz=band_hz,
        chunk_samples=chunk_samples,
        expected_burst_s=expected_burst_s,
        signal_bandwidth_hz=signal_bandwidth_hz,
    )
    return facts.finish(), detection


def _detect_bursts(
    capture: Capture,
    facts: FactsAccumulator | None,
    *,
    min_burst_s: float | None,
    merge_gap_s: float | None,
    pfa: float,
    frame_samples: int | None,
    band_hz: tuple[float, float] | None,
    chunk_samples: int,
    expected_burst_s: float | None,
    signal_bandwidth_hz: float | None,
) -> BurstDetection:
    """:func:`detect_bursts`; the streaming pass also feeds ``facts`` when given."""
    if not isinstance(capture, Capture):
        raise ParameterError(f"capture must be an iqstat Capture, got {type(capture).__name__}")
    fs = capture.sample_rate_hz
    if not (np.isfinite(pfa) and 0.0 < pfa <= 0.01):
        raise ParameterError(f"pfa {pfa!r} must be in (0, 0.01]; e.g. 1e-6")
    if frame_samples is None:
        L = _default_frame_samples(fs)
        if expected_burst_s is not None and expected_burst_s > 0:
            # Short bursts (fast links) have short gaps too: frames of at most 1/16 of a burst,
            # so that a gap of a fifth of a burst still holds whole noise frames beside its
            # one-frame guards (a power of two, at least 32 samples). Not shorter: at 1/32 a
            # 4-FSK burst's frames (64 samples, 25 bins) split and overlapped its detections.
            cap = 2 ** max(5, math.floor(math.log2(max(expected_burst_s * fs / 16.0, 1.0))))
            L = min(L, cap)
    else:
        if int(frame_samples) != frame_samples or int(frame_samples) < 16:
            raise ParameterError(
                f"frame_samples {frame_samples!r} must be an integer >= 16 (e.g. 256)"
            )
        L = int(frame_samples)
    if not _is_chunk_size(chunk_samples):
        raise ParameterError(f"chunk_samples {chunk_samples!r} must be a positive integer")
    min_burst = 2 * L if min_burst_s is None else _check_nonneg("min_burst_s", min_burst_s) * fs
    merge_gap = L if merge_gap_s is None else _check_nonneg("merge_gap_s", merge_gap_s) * fs
    n_frames = capture.n_samples // L
    if n_frames < 8:
        raise MeasurementError(
            f"capture has {capture.n_samples} samples ({1e3 * capture.n_samples / fs:.1f} ms): "
            f"too short to find bursts in, which needs at least {8 * L} samples (8 frames of "
            f"{L}); record longer"
        )

    survey = _survey_band(capture, L) if capture.is_complex else None
    if band_hz is not None:
        bins = _bins_for_band(_check_band(band_hz, fs), L, fs)
    else:
        bins = None if survey is None else survey.bins
        if bins is not None and signal_bandwidth_hz:
            lo_hz, hi_hz = _band_edges(bins, L, fs)
            width = hi_hz - lo_hz
            if width < 0.5 * signal_bandwidth_hz:
                # A weak signal shows only its strongest part above the noise: widen to the
                # link's bandwidth, by as much again as the part seen (where in it the rest
                # lies is unknown).
                half = 0.5 * (signal_bandwidth_hz + width)
                mid = 0.5 * (lo_hz + hi_hz)
                band = (max(mid - half, -0.5 * fs), min(mid + half, 0.5 * fs - fs / L))
                bins = _bins_for_band(band, L, fs)
    band_edges = None if bins is None else _band_edges(bins, L, fs)
    # The one streaming pass: frame powers, and the capture's facts when asked for.
    fpass = _FramePowerPass(capture, L, band_edges)
    sc2 = unscaled_factor(capture) ** 2
    for start, x, bad, raw in iter_unscaled_chunks(capture, int(chunk_samples)):
        energy = None
        if facts is not None:
            facts.add(start, x, bad, raw)
            if L == FLOOR_FRAME:
                energy = facts.last_frame_energy  # the same frames' Σ|x|², computed alike
        fpass.add(x, sc2, energy)
    fp = fpass.result()
    track, track_span_db = None, 0.0
    if survey is not None and survey.level_span_db > 0 and band_edges is not None:
        # The receiver's gain moved: its noise level, frame by frame, from outside the band
        # (iqstat.levels undoes it and detects again).
        track, track_span_db = gain_track(
            fp.full.astype(np.float64) - fp.band.astype(np.float64),
            (L if capture.is_complex else L / 2) - fp.band_dof,
        )
    p = fp.band.astype(np.float64)
    dof = fp.band_dof
    # A receiver DC offset is a stationary line at 0 Hz: in the band it would lift every
    # frame's power alike and read as one capture-long burst when it is stronger than the
    # in-band noise. Taken off the frame powers with a first estimate, the mean of bin 0 over
    # the quietest frames (gaps, whatever the duty cycle up to ~90 %); the gaps refine it.
    dc_quiet = _quiet_dc(fp)
    if fp.dc_in_band and dc_quiet:
        p = _without_dc(p, fp.sums, L, dc_quiet)

    floor = noise_floor_lowest_cluster(p, dof)
    leak = 0.0
    if survey is not None and bins is not None:
        # A continuous line outside the band still leaks into its bins through the frames'
        # rectangular window, the same power in every frame, gaps included. Where the model
        # of that leakage says it matters, the measured excess of the time-domain floor over
        # the spectral noise reference (Hann bins, which do not leak so) is taken as the
        # leakage and taken off: the frame powers are again noise (Gamma) plus bursts, and
        # the thresholds scale with the noise alone.
        spectral = float(np.sum(survey.noise_per_bin[bins]))
        if _line_leakage(survey.lines, bins, L, fs, band_edges) > LEAK_MATTERS * spectral:
            leak = max(floor - spectral, 0.0)
            if leak > 0:
                # The line × noise cross term stays: per frame it adds 2·leak·N/dof to the
                # variance of a Gamma(dof) power of mean N, as a Gamma of dof·N/(N + 2·leak).
                p = np.maximum(p - leak, 0.0)
                dof = dof * spectral / (spectral + 2.0 * leak)
                floor = noise_floor_lowest_cluster(p, dof)
    if survey is not None:
        # Weak bursts filling most of the capture blur into the noise in time; the spectrum
        # beside the signal still shows the noise level. Prefer it when the time-domain
        # estimate lies clearly above it.
        band_bins = np.arange(L) if bins is None else bins
        spectral = float(np.sum(survey.noise_per_bin[band_bins]))
        if floor > spectral * (1.0 + 4.0 * survey.rel_std + 0.05):
            floor = spectral
    start_floor = floor
    gap = np.ones(n_frames, dtype=bool)
    groups: list[_Group] = []
    prefix = _Prefix(p)
    for _ in range(4):
        groups = _detect_groups(p, dof, floor, pfa, prefix)
        if not groups:
            break  # nothing detected: the gaps are the whole capture, keep the estimate
        gap = np.ones(n_frames, dtype=bool)
        for g in groups:
            gap[max(g.start_lo - 1, 0) : g.stop_hi + 1] = False
        if gap.sum() < MIN_GAP_FRAMES:
            break  # (almost) no gaps: keep the quantile floor
        # Frames between detections may still hold the undetected fringes of weak bursts:
        # the gap mean may refine the floor but not run away above the robust start.
        new_floor = min(float(p[gap].mean()), start_floor * GAP_FLOOR_MAX_RISE)
        if abs(new_floor - floor) <= 1e-4 * floor:
            break
        floor = new_floor

    cut_before: set[int] = set()  # groups made by a split: never merged back
    if expected_burst_s is not None and expected_burst_s > 0:
        split = _split_long_groups(groups, p, expected_burst_s * fs / L)
        originals = {g.start for g in groups}
        cut_before = {i for i, g in enumerate(split) if g.start not in originals}
        groups = split
    end_energy: dict = {}
    taper = _lines_beside(survey, band_edges)
    refined = _refine_many(
        capture, groups, L, band_edges, p, floor, dof, end_energy, dc_quiet, taper
    )
    spans = [(s0, s1, i in cut_before) for i, (s0, s1) in enumerate(refined)]
    spans.sort()
    joined: list[list[int]] = []
    for s0, s1, was_cut in spans:
        if joined and not was_cut and s0 - joined[-1][1] < merge_gap:
            joined[-1][1] = max(joined[-1][1], s1)
        else:
            joined.append([s0, s1])
    if expected_burst_s is not None and expected_burst_s > 0:
        # Edge refinement can still join neighbours (a stop edge found at the far end of a
        # burst the coarse detection ran into): split what is still too long.
        e_frames = expected_burst_s * fs / L
        pieces: list[list[_Group]] = []
        for s0, s1 in joined:
            if (s1 - s0) / L <= LONG_BURST_FACTOR * e_frames:
                pieces.append([])
                continue
            f0, f1 = s0 // L, min(-(-s1 // L), n_frames)
            whole = _Group(f0, f1, max(f0 - 1, 0), f0 + 2, max(f1 - 2, f0 + 1), f1)
            pieces.append(_split_long_groups([whole], p, e_frames))
        flat = [g for pc in pieces for g in pc]
        ends = iter(
            _refine_many(capture, flat, L, band_edges, p, floor, dof, end_energy, dc_quiet, taper)
        )
        again = []
        for (s0, s1), pc in zip(joined, pieces, strict=True):
            if not pc:
                again.append([s0, s1])
                continue
            for k in range(len(pc)):
                a, b = next(ends)
                again.append([s0 if k == 0 else a, s1 if k == len(pc) - 1 else b])
        joined = again
    if expected_burst_s is not None and expected_burst_s > 0:
        joined = _join_faded(joined, expected_burst_s * fs, p, floor, L)
    # The parts of a split transmission meet where one ends: edge refinement on a part's far
    # side can run into its neighbour (a transmission far longer than the profile's frame).
    for prev, cur in zip(joined, joined[1:], strict=False):
        if cur[0] < prev[1]:
            cur[0] = prev[1]
    joined = [sp for sp in joined if sp[1] - sp[0] >= max(min_burst, 1)]

    thr = threshold_from_floor(floor, dof, pfa)
    if joined:
        # Final noise estimate: every frame at least one frame away from a refined burst.
        final_gap = np.ones(n_frames, dtype=bool)
        for s0, s1 in joined:
            final_gap[max(s0 // L - 1, 0) : s1 // L + 2] = False
        if final_gap.sum() >= MIN_GAP_FRAMES:
            gap = final_gap
            floor = float(p[gap].mean())
    gap_frames = np.flatnonzero(gap)
    # The receiver's DC offset, measured where there is no signal (a mean over the gaps, so a
    # carrier near 0 Hz does not bias it): mean |x|² there is σ² + |dc|², and the in-band
    # power holds |dc|² too when bin 0 is in the band. Measurement subtracts it from the
    # samples, so the noise figures are those of the noise alone. 0 when not significant.
    dc = _significant_dc(fp.sums[gap_frames], fp.full[gap_frames], L)
    if not capture.is_complex:
        dc = complex(dc.real, 0.0)
    dc_power = abs(dc) ** 2
    if capture.is_complex and gap_frames.size:
        x_gap = _gap_frames_read(capture, gap_frames, L, dc)
        iq = measure_iq_correction(x_gap)
        lines, noise_without_lines = (
            ((), None)
            if survey is None
            else _lines_in_gaps(survey.lines, x_gap, survey.noise_per_bin, fs)
        )
    else:
        # Without gap frames nothing can be confirmed. A single burst filling the capture looks
        # as steady to the survey as a carrier does: no lines then. Several bursts with no
        # gap frame left between them (a carrier in the band lifts the floor so that the
        # detections swallow the gaps) keep the survey's candidates.
        iq, noise_without_lines = NO_CORRECTION, None
        lines = survey.lines if survey is not None and len(joined) > 1 else ()
    p_gap = fp.band[gap_frames].astype(np.float64)
    if fp.dc_in_band and dc:
        p_gap = _without_dc(p_gap, fp.sums[gap_frames], L, dc)
    if leak > 0:  # the lines beside the band are cut out of the samples measured
        p_gap = np.maximum(p_gap - leak, 0.0)
    if noise_without_lines is not None:  # the full band's gap power holds the lines too
        noise_var = noise_without_lines
    elif gap_frames.size:
        noise_var = max(float(np.mean(fp.full[gap_frames], dtype=np.float64)) - dc_power, 0.0)
    else:
        noise_var = noise_floor_lowest_cluster(fp.full, L if capture.is_complex else L / 2)
    bursts = []
    band_means, peaks = _burst_frame_figures(joined, p, fp.full, L)
    for i, (s0, s1) in enumerate(joined):
        pb = band_means[i] if band_means[i] == band_means[i] else floor  # NaN: no frame
        snr = (pb - floor) / floor if floor > 0 else float("inf")
        power = _mean_power(capture, fp, s0, s1, end_energy, dc_quiet)
        peak = peaks[i] if peaks[i] == peaks[i] else power
        bursts.append(
            Burst(
                index=i,
                start_sample=int(s0),
                stop_sample=int(s1),
                power_dbfs=_db(power),
                band_snr_db=max(_db(snr), _MIN_BAND_SNR_DB) if snr > 0 else _MIN_BAND_SNR_DB,
                peak_dbfs=_db(peak),
            )
        )
    n_bins = fp.band_dof  # the band's bins (dof may be the smaller effective Gamma shape)
    psd = _noise_psd(p_gap, n_bins if capture.is_complex else 2 * n_bins, L, fs)
    floor_dbfs = _db(noise_var)
    if bursts:
        message = (
            f"{len(bursts)} burst(s) found; noise floor {floor_dbfs:.1f} dBFS, "
            f"in-band threshold {_db(thr):.1f} dBFS"
        )
    else:
        message = (
            f"no bursts above the floor of {floor_dbfs:.1f} dBFS"
            if math.isfinite(floor_dbfs)
            else "no bursts: the capture holds only zeros (no signal and no noise)"
        )
    return BurstDetection(
        bursts=tuple(bursts),
        noise_floor_dbfs=floor_dbfs,
        noise_var=noise_var,
        noise_psd_db_per_hz=_db(psd) if np.isfinite(psd) else float("nan"),
        noise_psd_dof=float(gap_frames.size * dof) if np.isfinite(psd) else 0.0,
        band_hz=band_edges,
        threshold_dbfs=_db(thr),
        frame_samples=L,
        gap_samples=int(gap_frames.size * L),
        message=message,
        dc_offset=dc,
        iq=iq,
        lines=lines,
        gain_span_db=track_span_db,
        gain_track=track,
    )
