"""Blind estimates for what the link profile does not give: symbol rate and tone spacing.

Owns the occupied band of a burst, the blind coarse tones (M equally spaced lines of the burst
or its square, else the spectral second moment), and the symbol rate from the line of the
sliding-correlator feature, blind or near a rate known to within 5 %.

* **Symbol rate.** CPFSK has a constant envelope: a sliding-correlator feature shows a line at
  Rs (METHODS §4); here the largest minus the second largest branch magnitude (FSK, window one
  symbol or 1/Δf if longer) or the branch energy (OOK). Blind, windows from fs/1000 to fs/4
  are scanned and the one with the most prominent line is kept; the line frequency is then
  refined on a zoomed DFT (never rounded to whole samples per symbol).
* **Blind tone spacing.** Coarse: M equally spaced lines of the burst or its square in the
  occupied band (slope of their frequencies over tone index), else the spectral second moment
  (Δf²/4 for 2-FSK, 1.25·Δf² for 4-FSK). Fine, in :mod:`iqstat.estimate.carrier`: the lines
  predicted with the nearest integer p·h (weighted least squares over tone index), else the
  energy search.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import scipy.fft

from iqstat.errors import MeasurementError
from iqstat.estimate.link_estimate import (
    LINE_THRESHOLD_DB,
    MIN_SAMPLES,
    MIN_SYMBOLS,
    _ToneFit,
)
from iqstat.estimate.spectrum import (
    _LINE_POWERS,
    _Burst,
    _coarse_center,
    _noise_floor,
    _power_spectrum_for_lines,
    interpolate_peak_bin,
)

#: Blind symbol-rate search range as fractions of the sample rate (plus MIN_SYMBOLS per burst).
BLIND_RATE_RANGE = (1.0 / 1000.0, 1.0 / 4.0)
#: Ratio between successive window lengths of the blind symbol-rate scan.
_RATE_SCAN_RATIO = 1.3


def _occupied_band(b: _Burst) -> tuple[float, float]:
    """Blind: (centre_hz, occupied_width_hz) of the strongest spectral region.

    The contiguous run of the smoothed periodogram around its maximum that stands 5 standard
    deviations of a noise bin above the floor and within 20 dB of the peak.
    """
    width = max(3, int(round(b.fs / 128 / b.df_hz)))
    smooth, floor = _noise_floor(b.power, width)
    k = int(np.argmax(smooth))
    top = smooth[k]
    if not top > floor * (1 + 5 / math.sqrt(width)):
        raise MeasurementError(
            "no signal above the noise floor in this burst; check the burst limits or the Eb/N0"
        )
    above = smooth > max(floor * (1 + 5 / math.sqrt(width)), floor + 0.01 * (top - floor))
    rolled = np.roll(above, -k)
    if rolled.all():
        return float(b.wrap_hz(k * b.df_hz)), b.fs
    right = int(np.argmin(rolled))  # first bin below, going up
    left = int(np.argmin(rolled[::-1]))  # going down (rolled[::-1][0] is bin k−1)
    n_run = right + left
    occupied = max(n_run - 0.8 * width, width) * b.df_hz
    center, _ = _coarse_center(b, occupied)
    return center, occupied


def _blind_lines(b: _Burst, center_hz: float, occupied_hz: float) -> _ToneFit | None:
    """Blind FSK tones from M equally spaced lines of the burst (p = 1) or its square (p = 2)."""
    for p in _LINE_POWERS:
        spec = _power_spectrum_for_lines(b, p, center_hz, 0.6 * occupied_hz)
        pw = np.abs(spec) ** 2
        idx = b.bins_near(p * center_hz, p * 0.6 * occupied_hz)
        seg = pw[idx]
        med = float(np.median(seg))
        if not med > 0:
            continue
        thr = 10 ** (LINE_THRESHOLD_DB / 10)
        inner = seg[1:-1]
        cand = np.nonzero((inner > seg[:-2]) & (inner >= seg[2:]) & (inner > thr * med))[0] + 1
        cand = cand[np.argsort(seg[cand])[::-1]][:64]
        sep = max(20, int(p * occupied_hz / (8 * b.m) / b.df_hz))
        chosen: list[int] = []
        local_db: list[float] = []
        for c in cand:  # a few dozen candidates at most
            # a line stands out of its own neighbourhood, not only of the band's skirts
            local = float(np.median(seg[max(0, c - 2 * sep) : c + 2 * sep + 1]))
            if seg[c] < thr * local or any(abs(int(c) - q) < sep for q in chosen):
                continue
            chosen.append(int(c))
            local_db.append(10 * math.log10(seg[c] / local))
            if len(chosen) == b.m:
                break
        if len(chosen) < b.m:
            continue
        order = np.argsort(chosen)
        chosen = [chosen[i] for i in order]
        freqs = []
        for c in chosen:
            fk = interpolate_peak_bin(spec, int(idx[c])) * b.df_hz
            pred = p * center_hz + b.wrap_hz(idx[c] * b.df_hz - p * center_hz)
            freqs.append((fk + b.fs * round((pred - fk) / b.fs)) / p)
        f = np.asarray(freqs)
        gaps = np.diff(f)
        g = float(np.mean(gaps))
        if np.any(np.abs(gaps - g) > 0.25 * g) or abs(np.mean(f) - center_hz) > 0.5 * g:
            continue
        i = np.arange(b.m) - (b.m - 1) / 2.0
        spacing = float(np.sum(i * f) / np.sum(i * i))
        prom = min(local_db)
        method = "tone-lines" if p == 1 else f"power-{p}-lines"
        return _ToneFit(float(np.mean(f)), spacing, p, prom, method)
    return None


def _spread_tones(b: _Burst, center_hz: float, occupied_hz: float) -> tuple[float, float]:
    """Blind coarse (cfo_hz, spacing_hz) from the spectral second moment (rough, no lines).

    For rectangular CPFSK the power-weighted mean square of (f − cfo) is the mean square of
    the instantaneous frequency deviation: Δf²/4 (2fsk), 1.25·Δf² (4fsk) [derived].
    """
    width = max(3, int(round(b.fs / 128 / b.df_hz)))
    _, floor = _noise_floor(b.power, width)
    idx = b.bins_near(center_hz, 0.6 * occupied_hz)
    f = b.wrap_hz(idx * b.df_hz - center_hz)
    w = b.power[idx] - floor
    total = float(np.sum(w))
    var = float(np.sum(w * f * f)) / total if total > 0 else 0.0
    if not var > 0:
        raise MeasurementError(
            "could not separate the FSK tones in this burst; give tone_spacing_hz from the "
            "link profile"
        )
    mean_sq = 0.25 if b.m == 2 else 1.25
    return center_hz, math.sqrt(var / mean_sq)


def _blind_center_and_spacing(b: _Burst, spacing_hz: float | None) -> tuple[float, float | None]:
    """Coarse centre and (if not given) spacing when the symbol rate is unknown."""
    center, occupied = _occupied_band(b)
    if b.m == 1:
        return center, None
    if spacing_hz is not None:
        return _coarse_center(b, (b.m + 1) * spacing_hz)[0], spacing_hz
    fit = _blind_lines(b, center, occupied)
    if fit is not None:
        return fit.cfo_hz, fit.spacing_hz
    return _spread_tones(b, center, occupied)


def _feature_window(fs: float, rate_hz: float, spacing_hz: float | None) -> int:
    """Correlator window: one symbol, or 1/Δf when that is longer (h < 1: tones orthogonal)."""
    shortest = rate_hz if spacing_hz is None else min(rate_hz, spacing_hz)
    return max(2, int(round(fs / shortest)))


def _line_in_feature(
    e: np.ndarray, fs: float, lo_hz: float, hi_hz: float
) -> tuple[float, float] | None:
    """Strongest line of the (mean-removed) feature between lo and hi: (freq_hz, prominence_db)."""
    nfft = scipy.fft.next_fast_len(e.size)
    spec = scipy.fft.rfft(e - e.mean(), nfft)
    p = np.abs(spec) ** 2
    df = fs / nfft
    k_lo, k_hi = max(2, int(math.ceil(lo_hz / df))), min(p.size - 2, int(hi_hz / df))
    if k_hi <= k_lo + 2:
        return None
    k = k_lo + int(np.argmax(p[k_lo : k_hi + 1]))
    n_lo, n_hi = max(1, k // 2), min(p.size - 1, 2 * k)  # neighbourhood: half to twice
    med = float(np.median(p[n_lo : n_hi + 1]))
    prom = 10 * math.log10(p[k] / med) if med > 0 and p[k] > 0 else -math.inf
    return interpolate_peak_bin(spec, k, correction="none") * df, prom


def _refine_rate_line(e: np.ndarray, fs: float, rate0_hz: float) -> tuple[float, float, float]:
    """Maximise |DFT|² of the feature near rate0 on a zoomed grid.

    Returns (rate_hz, prominence_db, predicted_std_hz). The std is the Cramér–Rao bound of a
    single tone's frequency (Rife & Boorstyn 1974 [mem], METHODS §5) with the line's SNR taken
    as its height over the mean periodogram level around it:
    σ_f = (fs/N)·√(6/((2π)²·SNR)).
    """
    e = e - e.mean()
    df = fs / e.size
    m = 129
    f = np.linspace(rate0_hz - 2 * df, rate0_hz + 2 * df, m)
    from scipy.signal import zoom_fft  # only the blind rate search needs it (a heavy import)

    p = np.abs(zoom_fft(e, [f[0], f[-1]], m=m, fs=fs, endpoint=True)) ** 2
    k = int(np.clip(np.argmax(p), 1, m - 2))
    a, b0, c = p[k - 1], p[k], p[k + 1]
    den = a - 2 * b0 + c
    step = f[1] - f[0]
    rate = f[k] + (0.5 * (a - c) / den * step if den < 0 else 0.0)
    nfft = scipy.fft.next_fast_len(e.size)
    q = np.abs(scipy.fft.rfft(e, nfft)) ** 2
    dq = fs / nfft
    lo, hi = max(1, int(rate / 2 / dq)), min(q.size - 1, int(2 * rate / dq))
    around = q[lo : hi + 1]
    med = float(np.median(around))
    prom = 10 * math.log10(b0 / med) if med > 0 and b0 > 0 else -math.inf
    # noise level for the CRB: the feature's spectrum is coloured, so take it next to the line
    # (±10 % of the rate, without the line's own ±4 bins)
    kc = int(round(rate / dq))
    near = np.r_[max(1, int(0.9 * kc)) : kc - 4, kc + 5 : min(q.size, int(1.1 * kc) + 1)]
    mean_level = float(np.mean(q[near])) if near.size else 0.0
    snr = b0 / mean_level if mean_level > 0 else math.inf
    std = df * math.sqrt(6.0 / ((2 * math.pi) ** 2 * snr)) if snr > 0 else math.inf
    return float(rate), prom, std


def _estimate_rate(
    b: _Burst, freqs_hz: Sequence[float], spacing_hz: float | None, approx_hz: float | None
) -> tuple[float, float, float]:
    """Symbol rate [Bd], its line prominence [dB] and predicted standard deviation [Bd]."""
    r_min = max(BLIND_RATE_RANGE[0] * b.fs, MIN_SYMBOLS * b.fs / b.n)
    r_max = BLIND_RATE_RANGE[1] * b.fs
    if approx_hz is not None:
        window = _feature_window(b.fs, approx_hz, spacing_hz)
        found = _line_in_feature(
            b.feature(freqs_hz, window), b.fs, approx_hz * 0.95, approx_hz * 1.05
        )
        if found is None:
            raise MeasurementError(
                f"burst of {b.n} samples is too short to measure a symbol rate near "
                f"{approx_hz:g} Bd; at least {MIN_SYMBOLS} symbols are needed"
            )
        rate0 = found[0]
    else:
        if r_min >= r_max:
            raise MeasurementError(
                f"burst of {b.n} samples is too short for a blind symbol-rate search "
                f"(needs {MIN_SYMBOLS} symbols of at most fs/4); give symbol_rate_hz"
            )
        n_scan = int(math.ceil(math.log(r_max / r_min) / math.log(_RATE_SCAN_RATIO))) + 1
        best = None
        for r in np.geomspace(r_min, r_max, n_scan):  # one pass per window length, not sample
            window = _feature_window(b.fs, r, spacing_hz)
            if window >= b.n - MIN_SAMPLES // 2:
                continue
            lo = max(r_min, r / _RATE_SCAN_RATIO)
            hi = min(r_max, r * _RATE_SCAN_RATIO)
            found = _line_in_feature(b.feature(freqs_hz, window), b.fs, lo, hi)
            if found is not None and (best is None or found[1] > best[1]):
                best = found
        if best is None or best[1] < LINE_THRESHOLD_DB:
            height = "" if best is None else f" (best {best[1]:.1f} dB < {LINE_THRESHOLD_DB:g} dB)"
            raise MeasurementError(
                f"no symbol-rate line stands out in this burst{height}; give symbol_rate_hz "
                "from the link profile"
            )
        rate0 = best[0]
        # A window fixed by 1/Δf also shows the harmonics of the rate: prefer a sub-multiple
        # whose own line is nearly as prominent (a true rate has no line at half of it; noise
        # maxima of the feature spectrum reach ~14 dB, far below a real line).
        for div in (2, 3):
            sub = rate0 / div
            if sub < r_min:
                continue
            found = _line_in_feature(
                b.feature(freqs_hz, _feature_window(b.fs, sub, spacing_hz)),
                b.fs,
                sub * 0.97,
                sub * 1.03,
            )
            if found is not None and found[1] >= max(LINE_THRESHOLD_DB, best[1] - 6.0):
                rate0 = found[0]
                break
    window = _feature_window(b.fs, rate0, spacing_hz)
    return _refine_rate_line(b.feature(freqs_hz, window), b.fs, rate0)
