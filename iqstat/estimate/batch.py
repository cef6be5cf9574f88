"""Link parameters of one burst: carrier offset, tone spacing and symbol rate.

Pipeline stage between burst detection and the timing/correlator stages. Given a burst's
complex baseband samples it returns a :class:`LinkEstimate`: the carrier offset (for FSK the
midpoint of the tones, for OOK the carrier), the tone spacing and the symbol rate, each either
taken from the link profile or estimated blind, with figures of merit for each estimate.

Methods (what is measured, and why)
-----------------------------------
* **Coarse centre.** The power spectrum, smoothed over the expected signal width, minus a noise
  floor taken from a low percentile and its gamma quantile (METHODS §5); the centroid of the
  excess power around the spectral maximum. Data imbalance shifts it by ~Δf/(2√n): coarse only.
* **Carrier and tones from spectral lines.** A CPFSK signal whose p-th power has a modulation
  index p·h that is an integer carries discrete spectral lines at p·f_i (h = 1: the signal itself;
  h = ½: its square). For h = ½ the spectrum of the signal itself has no lines (METHODS §10), so
  the strongest spectral peaks are not the tones; the squared signal's lines are. Each line is
  located on the FFT grid and refined by three-bin interpolation (Jacobsen with Candan's
  correction, METHODS §5); a line is coherent over the whole burst, so the precision is that of a
  tone estimate over the burst, not over one symbol. OOK with a continuous carrier has a line at
  the carrier.
* **Energy search** (fallback when no lines stand out: other modulation indices, a carrier whose
  phase jumps). The carrier offset maximises the mean of E[n] = max_i |y_i[n]|², y_i the sliding
  one-symbol correlators on the trial tones: a residual offset δf scales the matched energy by
  sinc²(δf·T) whichever tone is sent, so the maximum does not move with the data balance.
* **Symbol rate.** CPFSK has a constant envelope: a sliding-correlator feature shows a line at
  Rs (METHODS §4); here the largest minus the second largest branch magnitude (FSK, window one
  symbol or 1/Δf if longer) or the branch energy (OOK). Blind, windows from fs/1000 to fs/4
  are scanned and the one with the most prominent line is kept; the line frequency is then
  refined on a zoomed DFT (never rounded to whole samples per symbol).
* **Blind tone spacing.** Coarse: weighted 1-D k-means of the instantaneous frequency of the
  band-limited burst (clusters at the tones). Fine: the line positions (slope over tone index).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field, fields, replace
from functools import cached_property
from typing import Literal

import numpy as np
import scipy.fft
from numpy.lib.stride_tricks import sliding_window_view
from scipy import special

from iqstat.errors import MeasurementError, ParameterError
from iqstat.units import check_positive

Modulation = Literal["2fsk", "4fsk", "ook"]
Source = Literal["profile", "estimated"]
SpacingSource = Literal["profile", "estimated", "n/a"]
PeakCorrection = Literal["candan", "none"]

#: Tones (correlator branches) per modulation; OOK has one branch, the carrier.
N_TONES: dict[str, int] = {"2fsk": 2, "4fsk": 4, "ook": 1}

#: A burst needs at least this many symbols for any estimate here.
MIN_SYMBOLS = 16
#: And at least this many samples.
MIN_SAMPLES = 64
#: A spectral line counts when its peak stands this far above the median of its search window.
#: A periodogram bin of noise is exponential: it exceeds 13 dB (×19.95) over its median with
#: probability exp(−19.95·ln 2) ≈ 1e-6 [derived], ~1e-4 over a window of a few hundred bins.
LINE_THRESHOLD_DB = 13.0
#: Blind symbol-rate search range as fractions of the sample rate (plus MIN_SYMBOLS per burst).
BLIND_RATE_RANGE = (1.0 / 1000.0, 1.0 / 4.0)
#: Ratio between successive window lengths of the blind symbol-rate scan.
_RATE_SCAN_RATIO = 1.3
#: Powers tried for the line search (p·h must be close to an integer).
_LINE_POWERS = (1, 2)
#: Lines sought next to the energy search's carrier within ± this many symbol rates.
LINE_NEAR_REACH_SYMBOLS = 0.1


# --------------------------------------------------------------------------------------------
# Result
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class LinkEstimate:
    """Carrier offset, tone spacing and symbol rate of one burst, with their provenance.

    Attributes
    ----------
    modulation : {"2fsk", "4fsk", "ook"}
    sample_rate_hz : float
        Sample rate of the burst [Hz].
    symbol_rate_hz : float
        Symbol rate [Bd] (for a transmitter with a clock offset, the rate actually received).
    symbol_rate_source : {"profile", "estimated"}
    tone_spacing_hz : float or None
        Spacing of adjacent FSK tones [Hz]; None for OOK.
    tone_spacing_source : {"profile", "estimated", "n/a"}
    cfo_hz : float
        Carrier offset [Hz]: midpoint of the FSK tones, or the OOK carrier.
    tone_freqs_hz : tuple of float
        Baseband frequencies of tones 0..M−1, lowest first [Hz]; one entry (the carrier) for OOK.
    n_samples : int
        Samples in the burst the estimate was made on.
    quality : dict
        Figures of merit: ``n_symbols``; ``rate_line_db`` (symbol-rate line over the median of
        its neighbourhood, None when the rate came from the profile); ``tone_line_db`` (weakest
        tone/carrier line used, None when no line was used); ``line_power`` (p of the p-th power
        whose lines gave the carrier, 0 for the energy search or the centroid);
        ``carrier_method``; ``reliable`` (every estimated quantity passed its check).
    message : str
        One line saying how each quantity was obtained and anything doubtful.
    """

    modulation: str
    sample_rate_hz: float
    symbol_rate_hz: float
    symbol_rate_source: Source
    tone_spacing_hz: float | None
    tone_spacing_source: SpacingSource
    cfo_hz: float
    tone_freqs_hz: tuple[float, ...]
    n_samples: int
    quality: dict = field(default_factory=dict, compare=False)
    message: str = ""

    @property
    def modulation_index(self) -> float | None:
        """h = Δf/Rs (None for OOK)."""
        if self.tone_spacing_hz is None:
            return None
        return self.tone_spacing_hz / self.symbol_rate_hz

    @property
    def samples_per_symbol(self) -> float:
        """fs/Rs, generally not an integer."""
        return self.sample_rate_hz / self.symbol_rate_hz

    def to_dict(self) -> dict:
        """Plain JSON-ready dict of the fields plus the derived properties."""
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["tone_freqs_hz"] = [float(f) for f in self.tone_freqs_hz]
        d["quality"] = dict(self.quality)
        d["modulation_index"] = self.modulation_index
        d["samples_per_symbol"] = self.samples_per_symbol
        return d


# --------------------------------------------------------------------------------------------
# Small public helpers
# --------------------------------------------------------------------------------------------


def tone_offsets_hz(modulation: Modulation, tone_spacing_hz: float | None) -> np.ndarray:
    """Offsets of tones 0..M−1 from the carrier, (i − (M−1)/2)·Δf [Hz]; ``[0.0]`` for OOK."""
    m = _n_tones(modulation)
    if m == 1:
        return np.zeros(1)
    if tone_spacing_hz is None:
        raise ParameterError(f"tone_spacing_hz is required for {modulation}; give it in Hz")
    return (np.arange(m) - (m - 1) / 2.0) * float(tone_spacing_hz)


def tone_frequencies_hz(
    modulation: Modulation, cfo_hz: float, tone_spacing_hz: float | None
) -> tuple[float, ...]:
    """Absolute baseband tone frequencies cfo + (i − (M−1)/2)·Δf, lowest first [Hz]."""
    return tuple(float(f) for f in cfo_hz + tone_offsets_hz(modulation, tone_spacing_hz))


def interpolate_peak_bin(
    spectrum: np.ndarray, k: int, *, correction: PeakCorrection = "candan"
) -> float:
    """Fractional bin of a spectral peak from three complex DFT bins.

    Parameters
    ----------
    spectrum : ndarray of complex, shape (N,)
        An N-point DFT (numpy sign convention, rectangular window, no zero padding).
    k : int
        Index of the peak bin; neighbours wrap around circularly.
    correction : {"candan", "none"}
        "none" is Jacobsen's estimator; "candan" multiplies its offset by tan(π/N)/(π/N).

    Returns
    -------
    float
        k + δ, the peak position in bins (not wrapped).

    Notes
    -----
    Jacobsen [1]_: δ = Re[(X[k−1] − X[k+1]) / (2X[k] − X[k−1] − X[k+1])]; Candan's bias
    correction [2]_ scales δ by tan(π/N)/(π/N), which makes it exact for a noiseless tone.

    References
    ----------
    .. [1] E. Jacobsen and P. Kootsookos, "Fast, accurate frequency estimators", IEEE Signal
       Processing Magazine 24(3):123–125, 2007.
    .. [2] Ç. Candan, "A method for fine resolution frequency estimation from three DFT
       samples", IEEE Signal Processing Letters 18(6):351–354, 2011.
    """
    x = np.asarray(spectrum)
    n = x.size
    if n < 3:
        raise ParameterError(f"spectrum has {n} bins; three-bin interpolation needs at least 3")
    k = int(k)
    xm, x0, xp = x[(k - 1) % n], x[k % n], x[(k + 1) % n]
    den = 2.0 * x0 - xm - xp
    delta = 0.0 if den == 0 else float(np.real((xm - xp) / den))  # Jacobsen [1]
    if correction == "candan":
        delta *= math.tan(math.pi / n) / (math.pi / n)  # Candan [2]
    elif correction != "none":
        raise ParameterError(f"correction {correction!r} is not known; use 'candan' or 'none'")
    return k + float(np.clip(delta, -0.5, 0.5))


# --------------------------------------------------------------------------------------------
# Validation and the burst's cached spectra
# --------------------------------------------------------------------------------------------


def _n_tones(modulation: str) -> int:
    if modulation in N_TONES:
        return N_TONES[modulation]
    raise ParameterError(f"modulation {modulation!r} is not known; use one of {', '.join(N_TONES)}")


def _check_rates(
    modulation: str, fs: float, symbol_rate_hz, tone_spacing_hz
) -> tuple[float | None, float | None]:
    rs = None
    if symbol_rate_hz is not None:
        rs = check_positive("symbol_rate_hz", symbol_rate_hz, "give the symbol rate in Bd")
        if rs > fs / 2:
            raise ParameterError(
                f"symbol_rate_hz {symbol_rate_hz!r} exceeds half the sample rate {fs:g} Hz; "
                "a symbol must span at least two samples"
            )
    df = None
    if modulation == "ook":
        if tone_spacing_hz is not None:
            raise ParameterError(
                f"tone_spacing_hz {tone_spacing_hz!r} applies to FSK only; pass None for ook"
            )
    elif tone_spacing_hz is not None:
        df = check_positive("tone_spacing_hz", tone_spacing_hz, "give the tone spacing in Hz")
        span = (N_TONES[modulation] - 1) * df
        if span >= fs:
            raise ParameterError(
                f"tone_spacing_hz {tone_spacing_hz!r} puts the {modulation} tones "
                f"{span:g} Hz apart, beyond the sample rate {fs:g} Hz"
            )
    return rs, df


class _Burst:
    """The burst as complex128 with its DFT, computed once when needed (private helper)."""

    def __init__(self, x, sample_rate_hz, modulation: str):
        self.modulation = modulation
        self.m = _n_tones(modulation)
        self.fs = check_positive("sample_rate_hz", sample_rate_hz, "give the sample rate in Hz")
        arr = np.asarray(x)
        if arr.ndim != 1:
            raise ParameterError(f"burst samples must be one-dimensional, got shape {arr.shape}")
        if arr.size < MIN_SAMPLES:
            raise MeasurementError(
                f"burst has {arr.size} samples; at least {MIN_SAMPLES} (and {MIN_SYMBOLS} "
                "symbols) are needed to estimate the link parameters"
            )
        self.x = arr.astype(np.complex128, copy=False)
        if not np.all(np.isfinite(self.x)):
            raise MeasurementError(
                "burst contains NaN or infinite samples; zero or cut them before estimating"
            )
        self.n = self.x.size
        if not np.any(self.x != 0):
            raise MeasurementError("burst is all zeros; there is no signal to estimate from")
        self.df_hz = self.fs / self.n
        self._mixed: dict[tuple[float, ...], np.ndarray] = {}

    @cached_property
    def spectrum(self) -> np.ndarray:
        """N-point DFT of the burst (computed when first needed)."""
        return scipy.fft.fft(self.x)

    @cached_property
    def power(self) -> np.ndarray:
        """|DFT|² of the burst."""
        return self.spectrum.real**2 + self.spectrum.imag**2

    # -- frequency helpers ------------------------------------------------------------------
    def wrap_hz(self, f):
        """Frequencies wrapped to [−fs/2, fs/2)."""
        return (np.asarray(f, dtype=float) + self.fs / 2) % self.fs - self.fs / 2

    def bins_near(self, center_hz: float, half_width_hz: float) -> np.ndarray:
        """Circular DFT bin indices within ±half_width of center (at least 3)."""
        k0 = int(round(center_hz / self.df_hz))
        h = max(1, int(round(half_width_hz / self.df_hz)))
        h = min(h, (self.n - 1) // 2)
        return np.arange(k0 - h, k0 + h + 1) % self.n

    def band_limited(self, center_hz: float, half_width_hz: float) -> np.ndarray:
        """The burst with every DFT bin outside center ± half_width zeroed."""
        keep = self.bins_near(center_hz, half_width_hz)
        spec = np.zeros_like(self.spectrum)
        spec[keep] = self.spectrum[keep]
        return scipy.fft.ifft(spec)

    # -- sliding correlators ----------------------------------------------------------------
    def mixed_cumsum(self, freqs_hz: Sequence[float]) -> np.ndarray:
        """C[i, n] = Σ_{m<n} x[m]·exp(−j2π f_i m/fs), shape (M, N+1)."""
        key = tuple(round(float(f), 9) for f in freqs_hz)
        if key not in self._mixed:
            if len(self._mixed) > 8:
                self._mixed.clear()
            t = np.arange(self.n) / self.fs
            f = np.asarray(key)[:, None]
            mixed = self.x[None, :] * np.exp(-2j * np.pi * np.mod(f * t[None, :], 1.0))
            c = np.zeros((f.shape[0], self.n + 1), dtype=np.complex128)
            np.cumsum(mixed, axis=1, out=c[:, 1:])
            self._mixed[key] = c
        return self._mixed[key]

    def feature(self, freqs_hz: Sequence[float], window: int) -> np.ndarray:
        """Symbol-boundary feature of the sliding ``window``-sample correlators y_i on the tones.

        FSK: E[n] = |y|₍₁₎[n] − |y|₍₂₎[n], the largest minus the second largest magnitude
        (it falls to ~0 where the window straddles a tone change; 2–3 dB more line height than
        max_i |y_i|² in our runs). OOK: E[n] = |y[n]|².
        """
        c = self.mixed_cumsum(freqs_hz)
        y = c[:, window:] - c[:, :-window]
        if y.shape[0] == 1:
            return y[0].real ** 2 + y[0].imag ** 2
        mag = np.abs(y)
        if mag.shape[0] == 2:  # largest − second largest of two: |a − b| (exactly max − min)
            return np.abs(mag[0] - mag[1])
        if mag.shape[0] == 4:  # a tournament: np.partition along a short axis is ~20× slower
            hi1, lo1 = np.maximum(mag[0], mag[1]), np.minimum(mag[0], mag[1])
            hi2, lo2 = np.maximum(mag[2], mag[3]), np.minimum(mag[2], mag[3])
            top = np.maximum(hi1, hi2)
            # the second is the final's loser or the loser next to the winner; the other
            # pair's loser is below the final's loser, so the larger of the two losers will do
            second = np.maximum(np.minimum(hi1, hi2), np.maximum(lo1, lo2))
            return top - second
        top2 = np.partition(mag, mag.shape[0] - 2, axis=0)[-2:]
        return top2[1] - top2[0]


def _feature_window(fs: float, rate_hz: float, spacing_hz: float | None) -> int:
    """Correlator window: one symbol, or 1/Δf when that is longer (h < 1: tones orthogonal)."""
    shortest = rate_hz if spacing_hz is None else min(rate_hz, spacing_hz)
    return max(2, int(round(fs / shortest)))


# --------------------------------------------------------------------------------------------
# Coarse centre and blind coarse tones
# --------------------------------------------------------------------------------------------


def _moving_average_circular(p: np.ndarray, width: int) -> np.ndarray:
    if width <= 1:
        return p.copy()
    pad = np.concatenate((p[-width:], p, p[:width]))
    c = np.empty(pad.size + 1)
    c[0] = 0.0
    np.cumsum(pad, out=c[1:])
    lo = width - width // 2  # window n covers pad[n + lo : n + lo + width]
    out = c[lo + width : lo + width + p.size] - c[lo : lo + p.size]
    out /= width
    return out


def _noise_floor(power: np.ndarray, width: int) -> tuple[np.ndarray, float]:
    """Smoothed periodogram and the noise level per bin (20th percentile / its gamma quantile).

    A smoothed periodogram bin of pure noise is Gamma(w, mean/w) (METHODS §5); a low
    percentile survives bursts that fill most of the band.
    """
    smooth = _moving_average_circular(power, width)
    q = float(special.gammaincinv(width, 0.2)) / width  # Gamma(w, 1/w) 20 % quantile
    return smooth, _percentile(smooth, 0.2) / q


def _percentile(v: np.ndarray, q: float) -> float:
    """np.percentile(v, 100·q) (linear interpolation), with one partition instead of two.

    The order statistic above the lower one is the minimum of the partition's upper part.
    """
    pos = q * (v.size - 1)
    i = int(math.floor(pos))
    part = np.partition(v, i)
    lo = float(part[i])
    if i + 1 >= v.size:
        return lo
    hi = float(part[i + 1 :].min())
    t = pos - i
    return lo + (hi - lo) * t if t < 0.5 else hi - (hi - lo) * (1.0 - t)


def _coarse_center(b: _Burst, width_hz: float) -> tuple[float, float]:
    """Centroid of the excess power around the spectral maximum; (centre_hz, excess/floor)."""
    width = max(3, int(round(width_hz / b.df_hz)))
    smooth, floor = _noise_floor(b.power, width)
    k = int(np.argmax(smooth))
    center = float(b.wrap_hz(k * b.df_hz))
    excess_ratio = 0.0
    for _ in range(3):
        idx = b.bins_near(center, width_hz / 2)
        f = center + b.wrap_hz(idx * b.df_hz - center)
        w = b.power[idx] - floor
        total = float(np.sum(w))
        if total <= 0:
            raise MeasurementError(
                "no signal above the noise floor in this burst; check the burst limits or the Eb/N0"
            )
        center = float(b.wrap_hz(np.sum(w * f) / total))
        excess_ratio = total / (floor * idx.size) if floor > 0 else math.inf
    return center, excess_ratio


@dataclass(frozen=True)
class _ToneFit:
    """Carrier and spacing from one method, with the weakest line used (private)."""

    cfo_hz: float
    spacing_hz: float | None
    line_power: int
    line_db: float | None
    method: str


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


# --------------------------------------------------------------------------------------------
# Symbol rate from the correlator feature
# --------------------------------------------------------------------------------------------


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


# --------------------------------------------------------------------------------------------
# Carrier and tones
# --------------------------------------------------------------------------------------------


def _square_band_hz(offsets_hz: np.ndarray, rate_hz: float) -> float:
    """Half-width kept around the carrier before the p-th power: outer tone + 0.4·Rs.

    The noise × noise part of x² grows with the bandwidth kept; the main lobe of h = 1/2
    CPFSK ends 0.75·Rs from the carrier. Measured at 0 dB Eb/N0, 2-FSK h = 1/2 (200 bursts
    of 560 symbols): half-widths 0.52–0.75·Rs all find both lines with errors below 1.5 Hz,
    0.94·Rs loses 0.5 % of the bursts, the former outer tone + 2·Rs was 4–5 dB worse.
    """
    return float(np.max(np.abs(offsets_hz))) + 0.4 * rate_hz


def _power_spectrum_for_lines(
    b: _Burst, p: int, center_hz: float, half_width_hz: float
) -> np.ndarray:
    if p == 1:
        return b.spectrum
    xb = b.band_limited(center_hz, half_width_hz)
    return scipy.fft.fft(xb**p)


def _fit_lines(
    b: _Burst,
    p: int,
    center_hz: float,
    spacing_hz: float | None,
    rate_hz: float,
    spacing_known: bool,
) -> _ToneFit | None:
    """Tones from the lines of the p-th power; None if any line is below the threshold."""
    offsets = tone_offsets_hz(b.modulation, spacing_hz)
    sig_half = float(offsets[-1]) + rate_hz if b.m > 1 else rate_hz
    spec = _power_spectrum_for_lines(b, p, center_hz, sig_half + rate_hz)
    pw = b.power if p == 1 else spec.real**2 + spec.imag**2
    half = 0.4 * p * spacing_hz if b.m > 1 else 0.5 * rate_hz
    freqs, powers, proms = [], [], []
    for pred in p * (center_hz + offsets):  # M ≤ 4 tones
        idx = b.bins_near(float(pred), half)
        k = int(idx[np.argmax(pw[idx])])
        med = float(np.median(pw[idx]))
        prom = 10 * math.log10(pw[k] / med) if med > 0 and pw[k] > 0 else -math.inf
        fk = interpolate_peak_bin(spec, k) * b.df_hz
        fk = fk + b.fs * round((pred - fk) / b.fs)  # representative nearest the prediction
        freqs.append(fk / p)
        powers.append(pw[k])
        proms.append(prom)
    # Use the lines that stand out (GFSK weakens the outer 4fsk lines): one is enough with a
    # known spacing, two are needed to measure it.
    ok = np.asarray(proms) >= LINE_THRESHOLD_DB
    if ok.sum() < (1 if spacing_known else 2):
        return None
    f = np.asarray(freqs)[ok]
    w = np.asarray(powers)[ok] / np.sum(np.asarray(powers)[ok])
    weakest = float(np.min(np.asarray(proms)[ok]))
    if b.m == 1:
        return _ToneFit(float(f[0]), None, p, weakest, "carrier-line")
    idx = (np.arange(b.m) - (b.m - 1) / 2.0)[ok]
    offsets = offsets[ok]
    if spacing_known:
        cfo, spacing = float(np.sum(w * (f - offsets))), spacing_hz
    else:
        # weighted least squares of f_i = cfo + idx_i·Δf
        mi = np.sum(w * idx)
        mf = np.sum(w * f)
        spacing = float(np.sum(w * (idx - mi) * (f - mf)) / np.sum(w * (idx - mi) ** 2))
        cfo = float(mf - spacing * mi)
    method = "tone-lines" if p == 1 else f"power-{p}-lines"
    return _ToneFit(cfo, spacing, p, weakest, method)


def _grid_maximise(fun, lo: float, hi: float, n: int = 33, rounds: int = 3) -> float:
    """Maximise a smooth scalar function: grid, then parabolic steps on shrinking grids."""
    best = 0.5 * (lo + hi)
    for _ in range(rounds):
        grid = np.linspace(lo, hi, n)
        vals = np.array([fun(g) for g in grid])  # loop over trial values, not samples
        k = int(np.clip(np.argmax(vals), 1, n - 2))
        a, b0, c = vals[k - 1], vals[k], vals[k + 1]
        den = a - 2 * b0 + c
        step = grid[1] - grid[0]
        best = grid[k] + (0.5 * (a - c) / den * step if den < 0 else 0.0)
        lo, hi = best - 2 * step, best + 2 * step
        n = 9
    return float(best)


def _energy_search(
    b: _Burst, center_hz: float, spacing_hz: float | None, rate_hz: float, spacing_known: bool
) -> _ToneFit:
    """Carrier (and spacing) maximising the mean sliding correlator energy."""
    window = max(2, int(round(b.fs / rate_hz)))
    offsets = tone_offsets_hz(b.modulation, spacing_hz)

    def energy(cfo: float, offs: np.ndarray) -> float:
        c = b.mixed_cumsum(cfo + offs)
        y = c[:, window:] - c[:, :-window]
        return float(np.mean(np.max(y.real**2 + y.imag**2, axis=0)))

    reach = 0.5 * spacing_hz if b.m > 1 else 0.5 * rate_hz
    cfo = _grid_maximise(lambda c: energy(c, offsets), center_hz - reach, center_hz + reach)
    spacing = spacing_hz
    if b.m > 1 and not spacing_known:
        for _ in range(2):
            unit = offsets / spacing
            spacing = _grid_maximise(
                lambda s, c=cfo, u=unit: energy(c, u * s), 0.7 * spacing, 1.3 * spacing, n=25
            )
            offsets = unit * spacing
            cfo = _grid_maximise(
                lambda c, o=offsets: energy(c, o), cfo - 0.1 * spacing, cfo + 0.1 * spacing, n=17
            )
    return _ToneFit(cfo, spacing, 0, None, "energy-search")


def _lines_near(
    b: _Burst, p: int, guess: _ToneFit, rate_hz: float, reach_hz: float | None = None
) -> _ToneFit | None:
    """The energy search's carrier refined by the p-th-power lines found right next to it.

    Where the lines are too weak to find in the whole window (0–2 dB at h = ½), they can
    still be found within the energy search's flat top: the line powers of all M tones at a
    common shift are summed over shifts of ±``LINE_NEAR_REACH_SYMBOLS``·Rs·p, and the best
    shift is kept only when its sum is improbable for noise over that many shifts (a Gamma(M)
    tail below 1e-3 for the largest of them).
    """
    offsets = tone_offsets_hz(b.modulation, guess.spacing_hz)
    spec = _power_spectrum_for_lines(b, p, guess.cfo_hz, _square_band_hz(offsets, rate_hz))
    pw = b.power if p == 1 else spec.real**2 + spec.imag**2
    if reach_hz is None:
        reach_hz = LINE_NEAR_REACH_SYMBOLS * rate_hz
    reach = max(1, int(round(reach_hz * p / b.df_hz)))
    shifts = np.arange(-reach, reach + 1)
    centres = np.round(p * (guess.cfo_hz + offsets) / b.df_hz).astype(np.int64)
    idx = (centres[:, None] + shifts[None, :]) % b.n  # (M, shifts)
    total = pw[idx].sum(axis=0)
    # Noise level per bin: the median of a wide neighbourhood of each line (ln 2·mean).
    wide = (centres[:, None] + np.arange(-8 * reach, 8 * reach + 1)[None, :]) % b.n
    mean_noise = float(np.median(pw[wide])) / math.log(2.0)
    if not mean_noise > 0:
        return None
    m = len(offsets)
    threshold = float(special.gammainccinv(m, 1e-3 / len(shifts)))  # Gamma(M, 1) tail
    best = int(np.argmax(total))
    if total[best] / mean_noise < threshold:
        return None
    freqs = []
    for c, off in zip(centres, offsets, strict=True):
        k = int((c + shifts[best]) % b.n)
        fk = interpolate_peak_bin(spec, k) * b.df_hz
        pred = p * (guess.cfo_hz + off)
        fk = fk + b.fs * round((pred - fk) / b.fs)  # representative nearest the prediction
        freqs.append(fk / p)
    cfo = float(np.mean(np.asarray(freqs) - offsets))
    line_db = 10 * math.log10(total[best] / (m * mean_noise))
    return _ToneFit(cfo, guess.spacing_hz, p, line_db, f"{guess.method}+lines-near")


def _fit_tones(
    b: _Burst, center_hz: float, spacing_hz: float | None, rate_hz: float, spacing_known: bool
) -> _ToneFit:
    """Lines of the p-th power where p·h is near an integer, else the energy search."""
    if b.m == 1:
        fit = _fit_lines(b, 1, center_hz, None, rate_hz, True)
        if fit is not None:
            return fit
        return _carrier_by_energy(b, center_hz, None, rate_hz, True)
    h = spacing_hz / rate_hz
    for p in _LINE_POWERS:
        ph = p * h
        k = round(ph)
        if k < 1 or abs(ph - k) > (0.02 if spacing_known else 0.3):
            continue
        if spacing_known:
            # All M lines at one common shift: their powers add, so they are found where no
            # single one stands out (h = 1/2 at 0 dB).
            coarse = _ToneFit(center_hz, spacing_hz, 0, None, "centroid")
            fit = _lines_near(b, p, coarse, rate_hz, reach_hz=0.5 * spacing_hz)
            if fit is not None:
                return replace(fit, method="tone-lines" if p == 1 else f"power-{p}-lines")
        # blind: predict the lines with the nearest p·h integer, the lines then say where
        guess = spacing_hz if spacing_known else k * rate_hz / p
        fit = _fit_lines(b, p, center_hz, guess, rate_hz, spacing_known)
        if fit is not None:
            return fit
    return _carrier_by_energy(b, center_hz, spacing_hz, rate_hz, spacing_known)


def _carrier_by_energy(
    b: _Burst, center_hz: float, spacing_hz: float | None, rate_hz: float, spacing_known: bool
) -> _ToneFit:
    """The energy search, then the lines right next to its carrier where p·h is an integer."""
    coarse = _energy_search(b, center_hz, spacing_hz, rate_hz, spacing_known)
    if b.m == 1:
        return coarse
    for p in _LINE_POWERS:
        ph = p * coarse.spacing_hz / rate_hz
        if round(ph) >= 1 and abs(ph - round(ph)) <= 0.02:
            near = _lines_near(b, p, coarse, rate_hz)
            if near is not None:
                return near
    return coarse


def _signal_width(m: int, spacing_hz: float | None, rate_hz: float) -> float:
    return (m - 1) * (spacing_hz or 0.0) + 2.0 * rate_hz


# --------------------------------------------------------------------------------------------
# Batched carrier estimate (rates given): a few numpy calls per group of bursts
# --------------------------------------------------------------------------------------------

#: Mantissas m of the FFT sizes m·2^k used for bursts: at most 12.5 % zero padding, 5-smooth.
_FFT_MANTISSAS = (32, 36, 40, 45, 48, 50, 54, 60)
#: Bursts transformed together (rows of one 2-D FFT). Rows are independent (a row's numbers
#: depend on that row alone), so this trades only the per-chunk numpy calls against memory:
#: measure's batches (~35 bursts, <= 1 M samples) are one chunk; 64 bursts of 40 k samples
#: are two chunks of 32, ~23 MB at the peak. 16 -> 40 rows: ~190 -> ~167 us per burst of
#: 29 k samples (64 rows are no faster and twice the memory).
BATCH_ROWS = 40


def fft_size(n_samples: int) -> int:
    """DFT length of a burst of ``n_samples``: the smallest m·2^k ≥ n, m in 32…60 (5-smooth).

    It depends on the burst alone, so a burst gets the same spectrum alone or in a batch,
    and bursts of similar lengths share one 2-D FFT. Zero padding is at most 12.5 %; it biases
    three-bin interpolation by at most 0.042 bin [computed: noiseless tone, N = 29000,
    32625-point DFT, offsets −0.5…0.5 bin], 0.3 Hz at 250 kS/s.
    """
    n = max(int(n_samples), 64)
    k = max(0, int(math.floor(math.log2(n / 60.0))))
    best = None
    for kk in (k, k + 1):
        for m in _FFT_MANTISSAS:
            size = m << kk
            if size >= n and (best is None or size < best):
                best = size
    return int(best)


def _wrap(f, fs):
    return (f + fs / 2) % fs - fs / 2


def _interpolate_rows(spec: np.ndarray, k: np.ndarray, n_dft: int) -> np.ndarray:
    """:func:`interpolate_peak_bin` (Candan) at local bins k (B, M) of the rows of ``spec``.

    ``spec`` (B, L) holds L bins of each row's n_dft-point DFT (all of them when L = n_dft,
    else a window with k − 1 … k + 1 inside it); returns k + δ.
    """
    n = spec.shape[1]
    flat = spec.reshape(-1)
    at = np.arange(spec.shape[0])[:, None] * n + k
    x0 = flat[at].astype(np.complex128)
    xm = flat[at - 1 + np.where(k == 0, n, 0)].astype(np.complex128)
    xp = flat[at + 1 - np.where(k == n - 1, n, 0)].astype(np.complex128)
    den = 2.0 * x0 - xm - xp
    safe = np.where(den == 0, 1.0, den)
    delta = np.where(den == 0, 0.0, np.real((xm - xp) / safe))  # Jacobsen [1]
    delta *= math.tan(math.pi / n_dft) / (math.pi / n_dft)  # Candan [2]
    return k + np.minimum(np.maximum(delta, -0.5), 0.5)


def _block_size(nfft: int, width_bins: int) -> int:
    """Bins per block of the coarse periodogram: a power of two ≤ width/8 dividing nfft."""
    s = 1
    while s * 2 <= max(1, width_bins // 8) and nfft % (s * 2) == 0:
        s *= 2
    return s


def _coarse_start_rows(
    blocks: np.ndarray, s: int, n_used: np.ndarray, nfft: int, fs: float, width_hz: float
) -> tuple[np.ndarray, np.ndarray]:
    """Start of the coarse centre from block power sums: (centre_hz (B,), floor (B,)).

    ``blocks`` (B, nfft/s) are sums of s adjacent periodogram bins. The smoothed periodogram
    (moving average over the expected signal width, METHODS §5) is evaluated on blocks: its
    argmax and its 20 % quantile do not change at that resolution (s ≤ width/8), the work
    does. The noise level per bin is the 20 % quantile over the Gamma(w, 1/w) 20 % quantile,
    w the smoothing width in independent bins (zero padding correlates the bins).
    """
    nb_rows, nbk = blocks.shape
    df = fs / nfft
    width = max(3, int(round(width_hz / df)))
    wb = max(1, int(round(width / s)))
    pad = np.concatenate((blocks[:, -wb:], blocks, blocks[:, :wb]), axis=1)
    c = np.zeros((nb_rows, pad.shape[1] + 1))
    np.cumsum(pad, axis=1, out=c[:, 1:])
    lo = wb - wb // 2
    smooth = (c[:, lo + wb : lo + wb + nbk] - c[:, lo : lo + nbk]) / (wb * s)
    kb = np.argmax(smooth, axis=1)
    # 20 % quantile (linear interpolation) of the smoothed bins, over its Gamma quantile
    pos = 0.2 * (nbk - 1)
    i = int(math.floor(pos))
    part = np.partition(smooth, i, axis=1)  # one kth: two cost ~7× as much
    above = part[:, i + 1 :].min(axis=1) if i + 1 < nbk else part[:, i]
    q20 = part[:, i] + (pos - i) * (above - part[:, i])
    dof = np.maximum(1.0, wb * s * n_used / nfft)
    floor = q20 / (special.gammaincinv(dof, 0.2) / dof)
    return _wrap((kb * s + 0.5 * (s - 1)) * df, fs), floor


def _runs_view(a: np.ndarray, n: int) -> np.ndarray:
    """View (B, L − n + 1, n) of the runs of n consecutive entries of the rows of a (B, L).

    ``sliding_window_view`` without its set-up cost (~10 µs a call); nothing writes to it.
    """
    if not a.flags.c_contiguous:
        return sliding_window_view(a, n, axis=1)
    st = a.strides
    return np.ndarray((a.shape[0], a.shape[1] - n + 1, n), a.dtype, a, 0, (st[0], st[1], st[1]))


def _median_rows(v: np.ndarray) -> np.ndarray:
    """np.median(v, axis=1) of finite rows, with one partition (two kth values cost ~7×)."""
    n = v.shape[1]
    k = n // 2
    part = np.partition(v, k, axis=1)
    if n % 2:
        return part[:, k]
    return (part[:, :k].max(axis=1) + part[:, k]) / 2


class _Windows:
    """A window of ``width`` consecutive bins (circularly) of each row's spectrum (private).

    ``ext`` (B, nfft + width) holds each row's nfft-point spectrum followed by its first
    ``width`` bins again, so that every circular run of up to ``width`` bins is one slice.
    Row r holds the bins kstart[r] … kstart[r] + width − 1 (mod nfft): their complex values
    ``x`` and their power ``pw`` (re² + im², in the spectrum's precision). :meth:`hold`
    gathers a row again, centred on what it needs, when that is not held; a row's numbers
    depend on that row alone.
    """

    def __init__(self, ext: np.ndarray, nfft: int, width: int, center_bins: np.ndarray):
        self.ext = ext
        self.nfft = nfft
        self.width = int(width)
        self.kstart = center_bins - self.width // 2
        self.x, self.pw = self._gather(np.arange(ext.shape[0]))

    def _gather(self, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        x = _runs_view(self.ext, self.width)[rows, self.kstart[rows] % self.nfft]
        pw = x.real**2
        pw += x.imag**2
        return x, pw

    def local(self, k: np.ndarray) -> np.ndarray:
        """Local indices of absolute bins k (B,) or (B, M) (valid where held)."""
        ks = self.kstart if k.ndim == 1 else self.kstart[:, None]
        return (k - ks) % self.nfft

    def hold(self, lo: np.ndarray, hi: np.ndarray) -> None:
        """Make sure every row holds its absolute bins lo[r] … hi[r] (hi − lo < width)."""
        bad = self.local(lo) + (hi - lo) >= self.width
        if not bad.any():
            return
        rows = np.nonzero(bad)[0]
        self.kstart[rows] = (lo[rows] + hi[rows]) // 2 - self.width // 2
        self.x[rows], self.pw[rows] = self._gather(rows)

    def runs(self, a: np.ndarray, count: int) -> np.ndarray:
        """The power of local bins a[r] … a[r] + count − 1 (held), (B, count) float64;
        ``a`` of shape (B, M) gives (B, M, count)."""
        rows = np.arange(a.shape[0]).reshape((-1,) + (1,) * (a.ndim - 1))
        return _runs_view(self.pw, count)[rows, a].astype(np.float64)


def _coarse_center_windows(
    win: _Windows, center_hz: np.ndarray, floor: np.ndarray, fs: float, width_hz: float
) -> tuple[np.ndarray, np.ndarray]:
    """Three centroid iterations of the excess power over the windows' bins (batched).

    As :func:`_coarse_center`: the centroid of power − floor over the bins within ±width/2 of
    the centre, three times. Returns (centre_hz (B,), ok (B,)); ok is False where the excess
    power is not positive (the centre then stays where it was).
    """
    nfft = win.nfft
    df = fs / nfft
    h = min(max(1, int(round(width_hz / 2 / df))), (nfft - 1) // 2)
    n_win = 2 * h + 1
    t = np.arange(-h, h + 1, dtype=np.float64)
    ok = np.ones(center_hz.size, dtype=bool)
    center = center_hz
    k_prev = None
    for _ in range(3):
        k0 = np.round(center / df).astype(np.int64)
        if k_prev is not None and np.array_equal(k0, k_prev):
            break  # the same windows again: the same centroids (and ok) again
        win.hold(k0 - h, k0 + h)
        v = win.runs(win.local(k0 - h), n_win)
        total = v.sum(axis=1) - floor * n_win
        mom = v @ t  # Σ (p − floor)·t over t = −h … h: the floor's part is 0
        ok &= total > 0
        shift = mom / np.where(ok, total, 1.0)
        center = np.where(ok, _wrap((k0 + shift) * df, fs), center)
        k_prev = k0
    return center, ok


def _line_spectra(
    win: _Windows, centers_hz: np.ndarray, df: float, hb: int, p: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Spectrum of the p-th power (p = 2) of the band-limited bursts: (spec, power, base_bin).

    The square of each burst band-limited to centre ± hb bins, computed on
    L = next_fast_len(4·hb + 3) samples per burst period (the band's bins moved to baseband,
    inverse FFT, squared, FFT): x² then has no alias, and its bin j sits at (base + j)·Δf with
    base = 2·(centre bin) — the full-rate square's bins, exactly. The bins come from the
    windows (:class:`_Windows`).
    """
    nb = centers_hz.size
    n_small = scipy.fft.next_fast_len(4 * hb + 3)
    kc = np.round(centers_hz / df).astype(np.int64)
    win.hold(kc - hb, kc + hb)
    band = _runs_view(win.x, 2 * hb + 1)[np.arange(nb), win.local(kc - hb)]
    small = np.zeros((nb, n_small), dtype=win.x.dtype)
    small[:, np.arange(-hb, hb + 1) % n_small] = band
    y = scipy.fft.ifft(small, axis=1, overwrite_x=True)
    spec = scipy.fft.fft(y * y, axis=1, overwrite_x=True)
    return spec, spec.real**2 + spec.imag**2, p * kc


def _joint_lines_rows(
    spec: np.ndarray,
    pw: np.ndarray,
    c_local: np.ndarray,
    base: np.ndarray,
    n_dft: int,
    df: float,
    pred_hz: np.ndarray,
    offsets_hz: np.ndarray,
    p: int,
    reach: int,
    half: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Lines of all M tones at one common shift, batched: (cfo_hz, found, line_db), each (B,).

    ``spec``/``pw`` (B, L) hold bins of each row's n_dft-point DFT of the p-th power, local
    bin j at absolute bin base + j (all bins when L = n_dft, indices then wrap; otherwise a
    window holding every bin needed). ``c_local`` (B, M): local bins of the predicted lines
    ``pred_hz`` = p·(centre + offset_i). The powers of the M lines at a common shift are summed
    over shifts within ±reach bins; the best shift counts when its sum is improbable for noise
    over that many shifts (Gamma(M, 1) tail below 1e-3 for the largest, noise level the
    median of the ±half windows over ln 2, METHODS §5). Each line is refined at the largest
    of the three bins there by three-bin interpolation; the carrier is the
    excess-power-weighted mean of f_i/p − offset_i.
    """
    nb, n = pw.shape
    m = offsets_hz.size
    circular = n == n_dft
    rows = np.arange(nb)
    winr = np.arange(-half, half + 1)
    if circular:
        idx = (c_local[:, :, None] + winr) % n
        w = pw.reshape(-1)[idx + (rows * n)[:, None, None]]  # (B, M, W)
    else:
        w = _runs_view(pw, 2 * half + 1)[rows[:, None], c_local - half]
    inner = w[:, :, half - reach : half + reach + 1] if half > reach else w
    total = inner.sum(axis=1)  # (B, S)
    mean_noise = _median_rows(w.reshape(nb, -1)) / math.log(2.0)
    best = np.argmax(total, axis=1)
    top = total[rows, best]
    threshold = float(special.gammainccinv(m, 1e-3 / (2 * reach + 1)))  # Gamma(M, 1) tail
    found = (mean_noise > 0) & (top >= threshold * mean_noise)
    # the largest of the three bins around each line at the best shift
    k = c_local + (best - reach)[:, None]  # (B, M)
    three = k[:, :, None] + np.arange(-1, 2)
    if circular:
        three %= n
    kk = k + np.argmax(pw.reshape(-1)[three + (rows * n)[:, None, None]], axis=2) - 1
    if circular:
        kk %= n
    fk = (_interpolate_rows(spec, kk, n_dft) + base[:, None]) * df
    period_hz = n_dft * df
    fk = fk + period_hz * np.round((pred_hz - fk) / period_hz)  # representative nearest pred
    excess = np.maximum(pw.reshape(-1)[kk + (rows * n)[:, None]] - mean_noise[:, None], 0.0)
    wsum = excess.sum(axis=1, keepdims=True)
    weights = np.where(wsum > 0, excess / np.where(wsum > 0, wsum, 1.0), 1.0 / m)
    cfo = np.sum(weights * (fk / p - offsets_hz[None, :]), axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        line_db = 10 * np.log10(top / (m * mean_noise))
    return cfo, found, line_db


def _line_power_for(m: int, spacing_hz: float | None, rate_hz: float) -> int | None:
    """p of the p-th power with lines (p·h within 0.02 of an integer), 1 for OOK, or None."""
    if m == 1:
        return 1
    h = spacing_hz / rate_hz
    for p in _LINE_POWERS:
        k = round(p * h)
        if k >= 1 and abs(p * h - k) <= 0.02:
            return p
    return None


# --------------------------------------------------------------------------------------------
# Public estimators
# --------------------------------------------------------------------------------------------


def estimate_carrier(
    x: np.ndarray,
    sample_rate_hz: float,
    *,
    modulation: Modulation,
    tone_spacing_hz: float | None,
    symbol_rate_hz: float,
) -> float:
    """Carrier offset of a burst whose symbol rate and tone spacing are known.

    Parameters
    ----------
    x : ndarray of complex, shape (n,)
        The burst's samples (full scale ±1), maybe with a little noise before and after.
    sample_rate_hz : float
        fs [Hz].
    modulation : {"2fsk", "4fsk", "ook"}
    tone_spacing_hz : float or None
        Δf [Hz] for FSK; None for OOK.
    symbol_rate_hz : float
        Rs [Bd].

    Returns
    -------
    float
        cfo_hz: the midpoint of the FSK tones (tone i at cfo + (i − (M−1)/2)·Δf) or the OOK
        carrier [Hz].

    Notes
    -----
    Coarse: centroid of the excess power. Fine: the lines of the p-th power of the burst at
    p·f_i when p·h is an integer for p ∈ {1, 2} (h = Δf/Rs), each refined by
    :func:`interpolate_peak_bin`; otherwise the offset maximising the mean sliding correlator
    energy (a residual offset δf costs sinc²(δf·T) of the matched energy [1]_).

    References
    ----------
    .. [1] S. Hinedi, M. Simon and D. Raphaeli, "The performance of noncoherent orthogonal
       M-FSK in the presence of timing and frequency errors", IEEE Trans. Commun. 43, 1995.
    """
    fs = check_positive("sample_rate_hz", sample_rate_hz, "give the sample rate in Hz")
    rs, df = _check_rates(modulation, fs, symbol_rate_hz, tone_spacing_hz)
    if rs is None:
        raise ParameterError("symbol_rate_hz is required; give the symbol rate in Bd")
    if _n_tones(modulation) > 1 and df is None:
        raise ParameterError(f"tone_spacing_hz is required for {modulation}; give it in Hz")
    return estimate_link(
        x, sample_rate_hz, modulation=modulation, symbol_rate_hz=rs, tone_spacing_hz=df
    ).cfo_hz


def estimate_symbol_rate(
    x: np.ndarray,
    sample_rate_hz: float,
    *,
    modulation: Modulation,
    tone_freqs_hz: Sequence[float] | None = None,
    cfo_hz: float | None = None,
    tone_spacing_hz: float | None = None,
    approx: float | None = None,
) -> float:
    """Symbol rate of a burst from the line of its correlator-energy feature.

    Parameters
    ----------
    x : ndarray of complex, shape (n,)
        The burst's samples.
    sample_rate_hz : float
        fs [Hz].
    modulation : {"2fsk", "4fsk", "ook"}
    tone_freqs_hz : sequence of float, optional
        Tone frequencies (M of them, or the carrier for OOK) [Hz].
    cfo_hz, tone_spacing_hz : float, optional
        Alternative to ``tone_freqs_hz``. With neither, coarse tones are estimated blind.
    approx : float, optional
        A rate known to within 5 % [Bd]; without it fs/1000 … fs/4 is searched.

    Returns
    -------
    float
        Rs [Bd] as received (a transmitter clock offset shows in it).

    Notes
    -----
    With y_i[n] = Σ_{m=n}^{n+L−1} x[m]·e^{−j2πf_i m/fs}, the feature (FSK: largest minus second
    largest |y_i|; OOK: |y|²; METHODS §4 uses max_i |y_i|²) dips where the window straddles a
    symbol change, so it carries a line at Rs. Blind, window lengths L = fs/R on a
    geometric grid of R are scanned and the most prominent line in R/1.3 … 1.3·R is kept; then
    |DFT|² of E (window fs/R̂) is maximised on a zoomed grid with a parabolic last step.
    """
    b = _Burst(x, sample_rate_hz, modulation)
    approx_hz = None
    if approx is not None:
        approx_hz, _ = _check_rates(modulation, b.fs, approx, None)
    freqs = _resolve_tones(b, tone_freqs_hz, cfo_hz, tone_spacing_hz)
    spacing = float(np.mean(np.diff(freqs))) if freqs.size > 1 else None
    return _estimate_rate(b, freqs, spacing, approx_hz)[0]


def estimate_tone_spacing(
    x: np.ndarray,
    sample_rate_hz: float,
    *,
    modulation: Literal["2fsk", "4fsk"],
    symbol_rate_hz: float | None = None,
) -> float:
    """Tone spacing Δf [Hz] of an FSK burst, blind (the symbol rate too, unless given).

    Coarse spacing and centre from instantaneous-frequency clusters, then the spectral lines
    of the burst or its square (see :func:`estimate_carrier`) or the energy search. Returns Δf
    in Hz. Use :func:`estimate_link` to get the carrier and the rate from the same pass.
    """
    if modulation == "ook":
        raise ParameterError("modulation 'ook' has no tone spacing; use 2fsk or 4fsk")
    est = estimate_link(x, sample_rate_hz, modulation=modulation, symbol_rate_hz=symbol_rate_hz)
    return float(est.tone_spacing_hz)


def _resolve_tones(b: _Burst, tone_freqs_hz, cfo_hz, tone_spacing_hz) -> np.ndarray:
    if tone_freqs_hz is not None:
        f = np.asarray(tone_freqs_hz, dtype=float).ravel()
        if f.size != b.m or not np.all(np.isfinite(f)):
            raise ParameterError(
                f"tone_freqs_hz {tone_freqs_hz!r} must hold {b.m} finite frequencies in Hz "
                f"for {b.modulation}"
            )
        return np.sort(f)
    _, df = _check_rates(b.modulation, b.fs, None, tone_spacing_hz)
    center, spacing = _blind_center_and_spacing(b, df)
    if cfo_hz is not None:
        try:
            center = float(cfo_hz)
        except (TypeError, ValueError):
            raise ParameterError(f"cfo_hz {cfo_hz!r} is not a number; give it in Hz") from None
        if not math.isfinite(center):
            raise ParameterError(f"cfo_hz {cfo_hz!r} must be finite")
    return center + tone_offsets_hz(b.modulation, spacing)


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


def _require_symbols(b: _Burst, rate_hz: float) -> float:
    n_sym = b.n * rate_hz / b.fs
    if n_sym < MIN_SYMBOLS:
        raise MeasurementError(
            f"burst of {b.n} samples holds {n_sym:.1f} symbols at {rate_hz:g} Bd; at least "
            f"{MIN_SYMBOLS} are needed (check the burst limits or the symbol rate)"
        )
    return n_sym


def estimate_link(
    x: np.ndarray,
    sample_rate_hz: float,
    *,
    modulation: Modulation,
    symbol_rate_hz: float | None = None,
    tone_spacing_hz: float | None = None,
) -> LinkEstimate:
    """Carrier offset, tone spacing and symbol rate of one burst; blind for what is not given.

    Parameters
    ----------
    x : ndarray of complex, shape (n,)
        The burst's samples (full scale ±1), maybe with a little noise before and after.
    sample_rate_hz : float
        fs [Hz]. Required: there is no default sample rate.
    modulation : {"2fsk", "4fsk", "ook"}
    symbol_rate_hz : float, optional
        Rs [Bd] from the link profile; estimated when None.
    tone_spacing_hz : float, optional
        Δf [Hz] from the link profile (FSK only); estimated when None.

    Returns
    -------
    LinkEstimate

    Raises
    ------
    MeasurementError
        Empty, all-zero or non-finite burst; fewer than MIN_SYMBOLS symbols; no signal.
    ParameterError
        Unknown modulation, non-positive rates, a spacing given for OOK.

    Notes
    -----
    Chain: coarse centre (spectral centroid) and, for a blind spacing, coarse tones from the
    instantaneous-frequency clusters → symbol rate from the feature line (when not given) →
    carrier and spacing from the spectral lines of the burst or its square, or the energy
    search → the symbol rate once more on the refined tones.
    """
    res = estimate_link_many(
        [x],
        sample_rate_hz,
        modulation=modulation,
        symbol_rate_hz=symbol_rate_hz,
        tone_spacing_hz=tone_spacing_hz,
    )[0]
    if isinstance(res, MeasurementError):
        raise res
    return res


def _estimate_link_one(
    x: np.ndarray,
    sample_rate_hz: float,
    modulation: str,
    symbol_rate_hz: float | None,
    tone_spacing_hz: float | None,
) -> LinkEstimate:
    """Per-burst chain of :func:`estimate_link` (blind rates, or no line power)."""
    b = _Burst(x, sample_rate_hz, modulation)
    rs, df = _check_rates(modulation, b.fs, symbol_rate_hz, tone_spacing_hz)
    rate_known, spacing_known = rs is not None, (df is not None or b.m == 1)
    if rate_known:
        _require_symbols(b, rs)

    # 1. coarse centre and tones
    if rate_known:
        center, _ = _coarse_center(b, _signal_width(b.m, df or rs, rs))
        spacing0 = df
        if b.m > 1 and df is None:
            _, occupied = _occupied_band(b)
            blind = _blind_lines(b, center, occupied)
            center, spacing0 = (
                (blind.cfo_hz, blind.spacing_hz)
                if blind is not None
                else _spread_tones(b, center, occupied)
            )
    else:
        center, spacing0 = _blind_center_and_spacing(b, df)

    # 2. symbol rate
    rate_db = rate_std = None
    if not rate_known:
        rs, rate_db, rate_std = _estimate_rate(
            b, center + tone_offsets_hz(modulation, spacing0), spacing0, None
        )
        _require_symbols(b, rs)
        if b.m == 1:
            center, _ = _coarse_center(b, _signal_width(1, None, rs))

    # 3. carrier and spacing
    fit = _fit_tones(b, center, spacing0, rs, spacing_known)
    spacing = fit.spacing_hz if b.m > 1 else None
    if b.m > 1 and not (spacing > 0):
        raise MeasurementError(
            "tone spacing estimate is not positive; give tone_spacing_hz from the link profile"
        )

    # 4. the rate once more with the refined tones
    if not rate_known:
        tones = tone_frequencies_hz(modulation, fit.cfo_hz, spacing)
        rs, rate_db, rate_std = _estimate_rate(b, tones, spacing, rs)

    return _link_result(modulation, b.fs, b.n, rs, rate_known, df, fit, rate_db, rate_std)


def _link_result(
    modulation: str,
    fs: float,
    n: int,
    rs: float,
    rate_known: bool,
    df: float | None,
    fit: _ToneFit,
    rate_db: float | None,
    rate_std: float | None,
    extra: dict | None = None,
) -> LinkEstimate:
    """The LinkEstimate of one burst from its carrier fit and symbol rate (one place)."""
    m = _n_tones(modulation)
    spacing = fit.spacing_hz if m > 1 else None
    if m > 1 and not (spacing > 0):
        raise MeasurementError(
            "tone spacing estimate is not positive; give tone_spacing_hz from the link profile"
        )
    tones = tone_frequencies_hz(modulation, fit.cfo_hz, spacing)
    n_sym = n * rs / fs
    reliable = (rate_db is None or rate_db >= LINE_THRESHOLD_DB) and fit.line_power > 0
    parts = [f"carrier by {fit.method}"]
    if fit.line_db is not None:
        parts[0] += f" ({fit.line_db:.1f} dB)"
    parts.append(
        "symbol rate from profile"
        if rate_db is None
        else f"symbol rate from feature line ({rate_db:.1f} dB)"
    )
    if m > 1:
        parts.append("tone spacing from " + ("profile" if df is not None else fit.method))
    if fit.line_power == 0:
        parts.append("no spectral line: carrier from the energy search, less precise")
    if rate_db is not None and rate_db < LINE_THRESHOLD_DB:
        parts.append(f"weak symbol-rate line (< {LINE_THRESHOLD_DB:g} dB): rate doubtful")
    quality = {
        "n_symbols": float(n_sym),
        "rate_line_db": None if rate_db is None else float(rate_db),
        "rate_std_hz": None if rate_std is None else float(rate_std),
        "tone_line_db": None if fit.line_db is None else float(fit.line_db),
        "line_power": int(fit.line_power),
        "carrier_method": fit.method,
        "reliable": bool(reliable),
    }
    if extra:
        quality.update(extra)
    return LinkEstimate(
        modulation=modulation,
        sample_rate_hz=fs,
        symbol_rate_hz=float(rs),
        symbol_rate_source="profile" if rate_known else "estimated",
        tone_spacing_hz=None if spacing is None else float(spacing),
        tone_spacing_source="n/a" if m == 1 else ("profile" if df is not None else "estimated"),
        cfo_hz=float(fit.cfo_hz),
        tone_freqs_hz=tones,
        n_samples=n,
        quality=quality,
        message="; ".join(parts),
    )


def _burst_samples(x, fs: float, rate_hz: float | None) -> np.ndarray:
    """The burst as a 1-D finite array, or MeasurementError (same checks as _Burst)."""
    arr = np.asarray(x)
    if arr.ndim != 1:
        raise ParameterError(f"burst samples must be one-dimensional, got shape {arr.shape}")
    if arr.size < MIN_SAMPLES:
        raise MeasurementError(
            f"burst has {arr.size} samples; at least {MIN_SAMPLES} (and {MIN_SYMBOLS} "
            "symbols) are needed to estimate the link parameters"
        )
    energy = float(np.vdot(arr, arr).real) if np.iscomplexobj(arr) else float(np.dot(arr, arr))
    if not math.isfinite(energy) and not np.all(np.isfinite(arr)):
        raise MeasurementError(
            "burst contains NaN or infinite samples; zero or cut them before estimating"
        )
    if energy == 0:
        raise MeasurementError("burst is all zeros; there is no signal to estimate from")
    if rate_hz is not None:
        n_sym = arr.size * rate_hz / fs
        if n_sym < MIN_SYMBOLS:
            raise MeasurementError(
                f"burst of {arr.size} samples holds {n_sym:.1f} symbols at {rate_hz:g} Bd; at "
                f"least {MIN_SYMBOLS} are needed (check the burst limits or the symbol rate)"
            )
    return arr


def estimate_link_many(
    xs: Sequence[np.ndarray],
    sample_rate_hz: float,
    *,
    modulation: Modulation,
    symbol_rate_hz: float | None = None,
    tone_spacing_hz: float | None = None,
    band_margin_symbols: float | None = None,
) -> list[LinkEstimate | MeasurementError]:
    """:func:`estimate_link` on a batch of bursts; a burst that fails gets its error, not a raise.

    Parameters
    ----------
    xs : sequence of ndarray of complex, each shape (n_b,)
        The bursts' samples (any lengths; views of one array are fine, nothing is written).
    sample_rate_hz : float
        fs [Hz].
    modulation : {"2fsk", "4fsk", "ook"}
    symbol_rate_hz, tone_spacing_hz : float, optional
        As for :func:`estimate_link`.
    band_margin_symbols : float, optional
        When given (rates-given path only), each estimate's ``quality`` also holds
        ``band_energy``: Σ|x_band[n]|² over the burst's samples, x_band the burst keeping the
        DFT bins from the lowest tone − k·Rs to the highest + k·Rs (k this value; the DFT is
        zero-padded to :func:`fft_size`), and ``band_width_hz``, the width of those bins
        (count·fs/nfft). With a noise PSD N0 [1/Hz] the in-band signal power over a burst
        of n_b of the n samples is (band_energy − N0·band_width_hz·n)/n_b. It costs two
        look-ups per burst (running sums the carrier estimate has anyway).

    Returns
    -------
    list of LinkEstimate or MeasurementError
        One per burst, in order; equal to :func:`estimate_link` on each burst alone.

    Raises
    ------
    ParameterError
        Bad parameters or a burst that is not one-dimensional (the call's fault, not a burst's).

    Notes
    -----
    With the symbol rate given, the tone spacing given (or OOK) and p·h an integer for p = 1
    or 2, all bursts run through one chain with a fixed number of numpy calls per group of up
    to BATCH_ROWS bursts of one DFT length (:func:`fft_size`): one 2-D FFT; block sums of its
    power (which also find the all-zero and non-finite bursts, Parseval); the coarse start
    (:func:`_coarse_start_rows`); one window of bins per burst around it (:class:`_Windows`)
    from which the centroid (:func:`_coarse_center_windows`), the lines and the band energy
    are read; for p = 2 the square of the band-limited burst from its band's bins
    (:func:`_line_spectra`); the joint line search of all tones (:func:`_joint_lines_rows`).
    A burst whose lines do not stand out falls back to the per-burst energy search. Blind
    rates, and modulation indices without lines, run the per-burst chain burst by burst.
    """
    m = _n_tones(modulation)
    fs = check_positive("sample_rate_hz", sample_rate_hz, "give the sample rate in Hz")
    rs, df = _check_rates(modulation, fs, symbol_rate_hz, tone_spacing_hz)
    if band_margin_symbols is not None:
        band_margin_symbols = check_positive(
            "band_margin_symbols", band_margin_symbols, "give the margin in symbol rates"
        )
    arrays = list(xs)
    out: list = [None] * len(arrays)
    p = _line_power_for(m, df, rs) if rs is not None and (m == 1 or df is not None) else None
    if p is None:
        for i, x in enumerate(arrays):  # blind or no lines: the per-burst chain
            try:
                out[i] = _estimate_link_one(x, fs, modulation, symbol_rate_hz, tone_spacing_hz)
            except MeasurementError as exc:
                out[i] = exc
        return out
    groups: dict[int, list[int]] = {}
    min_samples = max(MIN_SAMPLES, MIN_SYMBOLS * fs / rs)
    for i, x in enumerate(arrays):
        arr = np.asarray(x)
        if arr.ndim != 1 or arr.size < min_samples:
            try:  # the per-burst checks, in their order, for their messages
                arr = _burst_samples(arr, fs, rs)
            except MeasurementError as exc:
                out[i] = exc
                continue
        arrays[i] = arr
        groups.setdefault(fft_size(arr.size), []).append(i)
    for nfft, members in groups.items():
        # near-equal chunks of a multiple of 4 rows: the FFT runs SIMD over 4 rows at a time
        # (complex64), a row left over costs about twice as much
        n_chunks = -(-len(members) // BATCH_ROWS)
        size = -(-len(members) // (4 * n_chunks)) * 4
        for start in range(0, len(members), size):
            rows = members[start : start + size]
            fits = _carrier_rows(
                [arrays[i] for i in rows], nfft, fs, m, p, rs, df, band_margin_symbols
            )
            for i, res in zip(rows, fits, strict=True):
                out[i] = res
    return out


def _carrier_rows(
    xs: list[np.ndarray],
    nfft: int,
    fs: float,
    m: int,
    p: int,
    rs: float,
    df: float | None,
    band_margin_symbols: float | None,
) -> list[LinkEstimate | MeasurementError]:
    """Link estimates of bursts sharing one DFT length, with the rates given (batched core)."""
    modulation = {1: "ook", 2: "2fsk", 4: "4fsk"}[m]
    nb = len(xs)
    dfb = fs / nfft
    width_hz = _signal_width(m, df, rs)
    s = _block_size(nfft, max(3, int(round(width_hz / dfb))))
    offsets = tone_offsets_hz(modulation, df)
    reach_hz = 0.5 * df if m > 1 else 0.5 * rs
    noise_half_hz = 0.4 * df if m > 1 else 0.5 * rs
    # one window of bins per burst: wide enough for every read below, with room to move
    h_center = min(max(1, int(round(width_hz / 2 / dfb))), (nfft - 1) // 2)
    reach1 = max(1, int(round(reach_hz / dfb)))
    half1 = max(reach1, int(round(noise_half_hz / dfb)))
    span_lines = int(math.ceil((offsets[-1] - offsets[0]) / dfb)) + 2 * half1 + 7
    hb = max(1, int(round(_square_band_hz(offsets, rs) / dfb)))
    need = max(2 * h_center + 1, span_lines if p == 1 else 2 * hb + 1)
    if band_margin_symbols is not None:
        span_band = (offsets[-1] - offsets[0] + 2 * band_margin_symbols * rs) / dfb + 3
        need = max(need, int(math.ceil(span_band)))
    width = need + 2 * (s + reach1 + 4)
    # the spectra, each followed by its first `width` bins again (wrap-free windows)
    dtype = np.result_type(np.complex64, *[x.dtype for x in xs])
    # rows of zeros up to a multiple of 4 where 2 or 3 would be left over: the FFT runs SIMD
    # over 4 rows at a time, a leftover row costs about twice as much as a row in a group
    n_rows = nb + (4 - nb % 4 if nb % 4 >= 2 else 0)
    ext = np.empty((n_rows, nfft + width), dtype=dtype)
    spectrum = ext[:, :nfft]
    for r, x in enumerate(xs):  # ragged copy into the padded rows
        spectrum[r, : x.size] = x
        spectrum[r, x.size :] = 0
    spectrum[nb:] = 0
    out = scipy.fft.fft(spectrum, axis=1, overwrite_x=True)
    if not np.shares_memory(out, ext):  # scipy wrote elsewhere after all
        spectrum[...] = out
    del out
    ext = ext[:nb]
    spectrum = ext[:, :nfft]
    for e0 in range(0, width, nfft):
        ext[:, nfft + e0 : nfft + min(width, e0 + nfft)] = ext[:, : min(nfft, width - e0)]
    ri = spectrum.view(spectrum.real.dtype).reshape(nb, nfft // s, 2 * s)
    blocks = np.einsum("ijk,ijk->ij", ri, ri)  # power sums of s bins
    # Parseval: Σ|X_k|² = nfft·Σ|x_n|², so the block sums tell all-zero and non-finite bursts
    total = blocks.sum(axis=1)
    errors: dict[int, MeasurementError] = {}
    if not np.all(np.isfinite(total) & (total > 0)):
        for r in np.nonzero(~(np.isfinite(total) & (total > 0)))[0].tolist():
            if total[r] == 0:
                msg = "burst is all zeros; there is no signal to estimate from"
            elif not np.all(np.isfinite(xs[r])):
                msg = "burst contains NaN or infinite samples; zero or cut them before estimating"
            else:
                msg = "burst samples are too large for their power spectrum; scale them down"
            errors[r] = MeasurementError(msg)
            ext[r] = 1.0  # a flat stand-in, so the row spoils nothing downstream
            blocks[r] = s
    n_used = np.array([x.size for x in xs], dtype=float)
    center, floor = _coarse_start_rows(blocks.astype(np.float64), s, n_used, nfft, fs, width_hz)
    win = _Windows(ext, nfft, width, np.round(center / dfb).astype(np.int64))
    center, ok = _coarse_center_windows(win, center, floor, fs, width_hz)
    if p == 1:
        reach, half = reach1, half1
        pred = center[:, None] + offsets[None, :]
        c_abs = np.round(pred / dfb).astype(np.int64)
        win.hold(c_abs.min(axis=1) - half - 3, c_abs.max(axis=1) + half + 3)
        spec, pw, c_local, base, n_dft = win.x, win.pw, win.local(c_abs), win.kstart, nfft
    else:
        spec, pw, base = _line_spectra(win, center, dfb, hb, p)
        n_dft = spec.shape[1]
        reach = max(1, int(round(reach_hz * p / dfb)))
        half = max(reach, int(round(noise_half_hz * p / dfb)))
        pred = p * (center[:, None] + offsets[None, :])
        c_local = (np.round(pred / dfb).astype(np.int64) - base[:, None]) % n_dft
    cfo, found, line_db = _joint_lines_rows(
        spec, pw, c_local, base, n_dft, dfb, pred, offsets, p, reach, half
    )
    band = None
    if band_margin_symbols is not None:
        lo = cfo + offsets[0] - band_margin_symbols * rs
        hi = cfo + offsets[-1] + band_margin_symbols * rs
        k_lo = np.ceil(lo / dfb).astype(np.int64)
        count = np.floor(hi / dfb).astype(np.int64) - k_lo + 1
        win.hold(k_lo, k_lo + count - 1)
        c_min, c_max = int(count.min()), int(count.max())
        v = win.runs(win.local(k_lo), c_max)
        if c_max > c_min:  # counts differ by a bin or so: drop each row's extra bins
            v[:, c_min:] *= np.arange(c_min, c_max) < count[:, None]
        energy = v.sum(axis=1) / nfft
        band = (energy.tolist(), (count * dfb).tolist())
    method = "carrier-line" if m == 1 else ("tone-lines" if p == 1 else f"power-{p}-lines")
    return _link_results_rows(
        xs, fs, modulation, rs, df, p, method, (center, cfo, found, line_db, ok), errors, band
    )


def _link_results_rows(
    xs, fs, modulation, rs, df, p, method, fits, errors, band
) -> list[LinkEstimate | MeasurementError]:
    """Per-burst results of :func:`_carrier_rows`: as :func:`_link_result`, built in bulk.

    ``fits`` is (centre_hz, cfo_hz, found, line_db, ok), arrays (B,) of the batched core.
    """
    center, cfo, found, line_db, ok = fits
    m = N_TONES[modulation]
    offsets = tone_offsets_hz(modulation, df)
    tones = (cfo[:, None] + offsets[None, :]).tolist()
    cfo_l, db_l, found_l, ok_l = cfo.tolist(), line_db.tolist(), found.tolist(), ok.tolist()
    tail = "; symbol rate from profile" + ("; tone spacing from profile" if m > 1 else "")
    spacing = None if m == 1 else float(df)
    spacing_source = "n/a" if m == 1 else "profile"
    results: list = []
    for r, x in enumerate(xs):  # per-burst result objects (and the rare fallback)
        extra = None if band is None else {"band_energy": band[0][r], "band_width_hz": band[1][r]}
        if r in errors:
            results.append(errors[r])
        elif not ok_l[r]:
            results.append(
                MeasurementError(
                    "no signal above the noise floor in this burst; check the burst limits or "
                    "the Eb/N0"
                )
            )
        elif found_l[r]:
            quality = {
                "n_symbols": x.size * rs / fs,
                "rate_line_db": None,
                "rate_std_hz": None,
                "tone_line_db": db_l[r],
                "line_power": p,
                "carrier_method": method,
                "reliable": True,
            }
            if extra:
                quality.update(extra)
            results.append(
                LinkEstimate(
                    modulation,
                    fs,
                    rs,
                    "profile",
                    spacing,
                    spacing_source,
                    cfo_l[r],
                    tuple(tones[r]),
                    x.size,
                    quality,
                    f"carrier by {method} ({db_l[r]:.1f} dB){tail}",
                )
            )
        else:
            try:
                b = _Burst(x, fs, modulation)
                fit = _carrier_by_energy(b, float(center[r]), df, rs, True)
                results.append(
                    _link_result(modulation, fs, x.size, rs, True, df, fit, None, None, extra)
                )
            except MeasurementError as exc:
                results.append(exc)
    return results


# --------------------------------------------------------------------------------------------
# Across bursts
# --------------------------------------------------------------------------------------------


def _weighted_median(v: np.ndarray, w: np.ndarray) -> float:
    order = np.argsort(v)
    cw = np.cumsum(w[order])
    return float(v[order][np.searchsorted(cw, 0.5 * cw[-1])])


def _robust_mean(v: np.ndarray, w: np.ndarray, floor_rel: float) -> float:
    """Weighted median, then the weighted mean of values within 3 robust sigmas of it."""
    med = _weighted_median(v, w)
    dev = np.abs(v - med)
    scale = 1.4826 * _weighted_median(dev, w)  # MAD → σ for Gaussian spread
    tol = max(3.0 * scale, floor_rel * abs(med))
    inl = dev <= tol
    return float(np.sum(w[inl] * v[inl]) / np.sum(w[inl])) if np.sum(w[inl]) > 0 else med


def refine_link_across_bursts(
    estimates: Sequence[LinkEstimate], weights: Sequence[float]
) -> tuple[float, float | None]:
    """Symbol rate and tone spacing combined over the bursts of one link.

    Parameters
    ----------
    estimates : sequence of LinkEstimate
        One per burst, same modulation.
    weights : sequence of float
        Non-negative weight per burst (e.g. its number of symbols × a quality figure).

    Returns
    -------
    (symbol_rate_hz, tone_spacing_hz)
        A quantity taken from the profile is returned as it is; estimated ones are combined:
        weighted median, then the weighted mean of the bursts within max(3 robust σ, a floor)
        of it (floor 50 ppm for the rate, 0.2 % for the spacing), so one outlier burst does not
        move the result. tone_spacing_hz is None for OOK.
    """
    ests = list(estimates)
    w = np.asarray(list(weights), dtype=float)
    if not ests:
        raise MeasurementError("no burst estimates to combine; the capture has no usable burst")
    if w.shape != (len(ests),):
        raise ParameterError(
            f"weights has {w.size} entries for {len(ests)} estimates; give one weight per burst"
        )
    if not np.all(np.isfinite(w)) or np.any(w < 0) or not np.sum(w) > 0:
        raise ParameterError(
            f"weights {w.tolist()!r} must be finite, non-negative and not all zero"
        )
    mods = {e.modulation for e in ests}
    if len(mods) != 1:
        raise ParameterError(f"estimates mix modulations {sorted(mods)}; combine one link at once")

    def combine(values, sources, floor_rel):
        for v, s in zip(values, sources, strict=True):
            if s == "profile":
                return float(v)
        return _robust_mean(np.asarray(values, dtype=float), w, floor_rel)

    rate = combine([e.symbol_rate_hz for e in ests], [e.symbol_rate_source for e in ests], 5e-5)
    if ests[0].modulation == "ook":
        return rate, None
    spacing = combine(
        [e.tone_spacing_hz for e in ests], [e.tone_spacing_source for e in ests], 2e-3
    )
    return rate, spacing


def link_with(
    estimate: LinkEstimate,
    *,
    symbol_rate_hz: float | None = None,
    tone_spacing_hz: float | None = None,
    cfo_hz: float | None = None,
) -> LinkEstimate:
    """A copy of ``estimate`` with the given fields replaced and tone_freqs_hz recomputed."""
    rs, df = _check_rates(
        estimate.modulation, estimate.sample_rate_hz, symbol_rate_hz, tone_spacing_hz
    )
    changes: dict = {}
    if rs is not None:
        changes["symbol_rate_hz"] = rs
    if df is not None:
        changes["tone_spacing_hz"] = df
    if cfo_hz is not None:
        try:
            c = float(cfo_hz)
        except (TypeError, ValueError):
            raise ParameterError(f"cfo_hz {cfo_hz!r} is not a number; give it in Hz") from None
        if not math.isfinite(c):
            raise ParameterError(f"cfo_hz {cfo_hz!r} must be finite")
        changes["cfo_hz"] = c
    new = replace(estimate, **changes)
    tones = tone_frequencies_hz(new.modulation, new.cfo_hz, new.tone_spacing_hz)
    quality = dict(new.quality)
    quality["n_symbols"] = float(new.n_samples * new.symbol_rate_hz / new.sample_rate_hz)
    return replace(new, tone_freqs_hz=tones, quality=quality)
