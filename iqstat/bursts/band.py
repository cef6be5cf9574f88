"""The signal band: frame length, DFT bins of a band, and the spectrum survey that picks it.

The survey reads up to 128 blocks of 16 contiguous frames spread over the capture, takes a
Hann-windowed power spectrum of each frame and averages it per block. Under white noise a
block-mean bin is Gamma(bf) distributed, so a low quantile over the blocks, divided by the Gamma
quantile, estimates the noise per bin; its spread is that of a sample quantile,
√(q(1−q)/n)/(f(x_q)·x_q). A bin is occupied when its mean (or its largest block) stands
out of that reference by a few standard deviations; the cluster of occupied bins with the most
excess power, grown over neighbours that still hold signal at a looser level, is the band. The
median-filtered low quantile also gives the noise per rectangular-window bin, which backs up the
time-domain noise floor when weak bursts fill most of the capture.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.fft
from scipy import special
from scipy.ndimage import median_filter

from iqstat.bursts.readback import _read_windows
from iqstat.bursts.results import ContinuousLine
from iqstat.capture import Capture

# Band survey: blocks of contiguous frames spread over the capture.
_SURVEY_BLOCK_FRAMES = 16
_SURVEY_MAX_BLOCKS = 128
# A survey bin is "occupied" when its excess over the noise reference exceeds this many
# standard deviations of the estimate (common practice, no source).
_OCCUPIED_Z = 6.0
# Minimum relative excess of an occupied bin whatever the statistics say (tolerates a noise
# reference that is a few per cent off; common practice, no source).
_OCCUPIED_MIN_EXCESS = 0.05
#: z-score of the smoothed spectral excess up to which the occupied band is grown.
_GROW_Z = 3.0


def _default_frame_samples(sample_rate_hz: float) -> int:
    """A power of two near 1 ms of samples, 64..8192."""
    return int(2 ** np.clip(round(math.log2(max(sample_rate_hz / 1000.0, 1.0))), 6, 13))


def _bin_freqs(frame_samples: int, sample_rate_hz: float) -> np.ndarray:
    return np.fft.fftfreq(frame_samples, 1.0 / sample_rate_hz)


def _bins_for_band(band_hz, frame_samples: int, sample_rate_hz: float) -> np.ndarray:
    """DFT bin indices (numpy order) whose centres lie in [f_lo, f_hi]; at least one bin."""
    f_lo, f_hi = band_hz
    f = _bin_freqs(frame_samples, sample_rate_hz)
    bins = np.flatnonzero((f >= f_lo) & (f <= f_hi))
    if bins.size == 0:
        bins = np.array([int(np.argmin(np.abs(f - 0.5 * (f_lo + f_hi))))])
    return bins


def _band_edges(bins: np.ndarray, frame_samples: int, sample_rate_hz: float):
    f = _bin_freqs(frame_samples, sample_rate_hz)[bins]
    half = 0.5 * sample_rate_hz / frame_samples
    return (float(f.min() - half), float(f.max() + half))


@dataclass(frozen=True, eq=False)
class _Survey:
    """Spectrum survey of a capture: occupied bins and a per-bin noise reference."""

    bins: np.ndarray | None  # occupied DFT bins (numpy order), None if nothing stands out
    noise_per_bin: np.ndarray  # noise power per rectangular-window bin, E|X_k|²/L², (L,)
    rel_std: float  # relative standard deviation of noise_per_bin summed over a band
    lines: tuple[ContinuousLine, ...] = ()  # continuous narrowband signals (not bursts)
    level_span_db: float = 0.0  # how far the noise level moves between blocks (0: steady)


def _survey_band(capture: Capture, frame_samples: int) -> _Survey | None:
    """Choose the occupied DFT bins from a Hann spectrum of spread blocks of frames."""
    L = frame_samples
    fs = capture.sample_rate_hz
    n_frames = capture.n_samples // L
    bf = min(_SURVEY_BLOCK_FRAMES, n_frames)
    n_blk = min(_SURVEY_MAX_BLOCKS, n_frames // bf)
    if n_blk < 4:
        return None
    starts = np.round(np.linspace(0, n_frames - bf, n_blk)).astype(np.int64)
    w = np.hanning(L + 2)[1:-1].astype(np.float32)  # no zero end points
    x = _read_windows(capture, starts * L, bf * L).reshape(n_blk, bf, L)
    x *= w
    X = scipy.fft.fft(x, axis=2, overwrite_x=True)  # complex64 in, complex64 out
    Xr, Xi = X.real, X.imag
    pw = Xr * Xr
    pw += Xi * Xi
    spec = np.mean(pw, axis=1).astype(np.float64)  # as float32 means
    spec = np.fft.fftshift(spec, axes=1)
    level_span_db, gains = _level_steps(spec, bf)
    if gains is not None:
        # A receiver gain step (AGC) moves every bin at once; the bursts only theirs. Taken
        # off, the bins that come and go are the bursts' again.
        spec = spec / gains[:, None]
    q = 0.1
    # Hann-windowed bins of white noise are complex Gaussian, so a block mean over bf frames is
    # Gamma(bf): the same low-quantile estimator as for frame powers.
    # Gamma(bf, 1/bf) quantile, density and upper quantile through scipy.special (the
    # distribution objects of scipy.stats cost ~0.2 ms a call): ppf(q) = P⁻¹(bf, q)/bf.
    g_q = float(special.gammaincinv(bf, q)) / bf
    own = np.quantile(spec, q, axis=0) / g_q
    # Asymptotic relative std of a sample quantile: sqrt(q(1−q)/n)/(f(x_q)·x_q).
    # pdf of Gamma(bf, scale 1/bf) at g: bf·exp((bf − 1)·ln(bf·g) − bf·g − ln Γ(bf))
    pdf_q = bf * math.exp((bf - 1) * math.log(bf * g_q) - bf * g_q - special.gammaln(bf))
    s_own = math.sqrt(q * (1 - q) / n_blk) / (pdf_q * g_q)
    width = max(5, (L // 8) | 1)
    ref = median_filter(own, size=width, mode="wrap")
    mean = spec.mean(axis=0)
    s_mean = 1.0 / math.sqrt(n_blk * bf)
    blk_max = spec.max(axis=0)

    thr_own = max(_OCCUPIED_Z * math.hypot(s_mean, s_own), _OCCUPIED_MIN_EXCESS)
    thr_ref = max(_OCCUPIED_Z * math.hypot(s_mean, s_own / math.sqrt(width)), _OCCUPIED_MIN_EXCESS)
    g_max = float(special.gammainccinv(bf, 1e-3 / (n_blk * L))) / bf * (1 + _OCCUPIED_Z * s_own)
    thr_cont = max(_OCCUPIED_Z * math.hypot(s_own, s_own / math.sqrt(width)), _OCCUPIED_MIN_EXCESS)
    with np.errstate(divide="ignore", invalid="ignore"):
        intermittent = (mean / own - 1 > thr_own) | (blk_max / own > g_max)
        stationary = mean / ref - 1 > thr_ref
    k = np.arange(L) - L // 2  # shifted bin numbers
    dc = np.abs(k) <= 1  # a stationary line at DC is an LO spur, not a signal
    occupied = intermittent | (stationary & ~dc)
    idx = np.flatnonzero(occupied)
    # Noise reference per bin from the neighbouring bins' low quantiles: a narrowband signal
    # holds a minority of each median window, so this is the noise level under the signal
    # too (white or slowly varying noise), whatever the bursts' duty cycle. Hann bins of
    # white noise have E|X|² = σ²·Σw², rectangular ones L·σ²: rescale to the latter / L².
    sw2 = float(np.sum(w.astype(np.float64) ** 2))
    noise_per_bin = np.fft.ifftshift(ref) / (sw2 * L)
    rel_std = s_own / math.sqrt(width)
    excess = np.maximum(mean - ref, 0.0)
    # Present in the gaps too: the bin's own low quantile (the quietest blocks) stands out of
    # its neighbours' reference, and holds most of the bin's mean excess. The bursts' own bins
    # do not: their low quantile is noise, or a little of a burst where gaps are short.
    with np.errstate(divide="ignore", invalid="ignore"):
        continuous = (own / ref - 1 > thr_cont) & (own - ref > 0.5 * (mean - ref)) & ~dc
    # The line's power from the raw quantile (own·g_q): a steady line is not Gamma spread,
    # so the noise's quantile correction 1/g_q would overstate it (by 1.6 dB at 16 frames).
    lines = _continuous_lines(continuous, np.maximum(own - ref, 0.0) * g_q, ref, sw2, L, fs)
    if idx.size == 0:
        return _Survey(None, noise_per_bin, rel_std, lines, level_span_db)
    # Clusters of occupied bins (gaps up to L/16 bins). The bursts are what comes and goes:
    # keep the cluster with most excess power in bins that do (a spur or a carrier present
    # all the time can be far stronger), or, when no bin comes and goes (bursts filling the
    # whole capture), the one with most excess power.
    breaks = np.flatnonzero(np.diff(idx) > max(1, L // 16)) + 1
    groups = np.split(idx, breaks)
    burst_excess = np.where(intermittent, excess, 0.0)
    score = burst_excess if any(burst_excess[g].sum() > 0 for g in groups) else excess
    best = max(groups, key=lambda g: score[g[0] : g[-1] + 1].sum())
    lo, hi = max(best[0] - 1, 0), min(best[-1] + 1, L - 1)
    # Grow the band over neighbouring bins that still hold signal at a looser level, seen on
    # the excess smoothed over a few bins: bursts with different carrier offsets smear the
    # tones, and a 4-FSK signal's outer tones can be weaker than the significance test.
    k_s = 5
    smooth = np.convolve(mean / ref - 1.0, np.ones(k_s) / k_s, mode="same")
    grow_thr = _GROW_Z * math.hypot(s_mean, s_own / math.sqrt(width)) / math.sqrt(k_s)
    while lo > 0 and smooth[lo - 1] > grow_thr and not dc[lo - 1]:
        lo -= 1
    while hi < L - 1 and smooth[hi + 1] > grow_thr and not dc[hi + 1]:
        hi += 1
    bins = np.sort(np.fft.fftshift(np.arange(L))[lo : hi + 1])
    return _Survey(bins, noise_per_bin, rel_std, lines, level_span_db)


#: The noise level is said to move between survey blocks when their median bins differ by
#: more than LEVEL_SPAN_MIN_DB and by more than LEVEL_SPAN_Z standard errors.
LEVEL_SPAN_MIN_DB = 0.5
LEVEL_SPAN_Z = 6.0


def _level_steps(spec: np.ndarray, bf: int) -> tuple[float, np.ndarray | None]:
    """How far the noise level moves over the survey's blocks, and each block's level over
    the capture's median (None when it does not move significantly).

    A block's level is the median of its bins: a narrowband signal and lines hold a minority
    of them. Its relative standard error under steady white noise is about √(π/2)/√(bf·L)
    (bins of a Gamma(bf) mean; the normal approximation of a median, common practice, no
    source).
    """
    level = np.median(spec, axis=1)
    ref = float(np.median(level))
    if not (ref > 0 and np.all(level > 0)):
        return 0.0, None
    se = math.sqrt(math.pi / 2.0) / math.sqrt(bf * spec.shape[1])
    ratio = float(level.max() / level.min())
    if 10.0 * math.log10(ratio) < LEVEL_SPAN_MIN_DB or ratio - 1.0 < 2.0 * LEVEL_SPAN_Z * se:
        return 0.0, None
    return 10.0 * math.log10(ratio), level / ref


def _continuous_lines(mask, excess, ref, sw2: float, L: int, fs: float):
    """Runs of bins (shifted order) with a line present all the time, as ContinuousLine.

    A Hann-windowed tone of power a² puts Σ_k |X_k|² = L·Σw²·a² into its bins (Parseval), so
    its power is the excess summed over the run / (L·Σw²); the noise PSD under it is the
    reference per bin / (Σw²·fs).
    """
    idx = np.flatnonzero(mask)
    if idx.size == 0:
        return ()
    runs = np.split(idx, np.flatnonzero(np.diff(idx) > 2) + 1)
    out = []
    for r in runs:
        lo, hi = max(int(r[0]) - 1, 0), min(int(r[-1]) + 1, L - 1)
        power = float(excess[lo : hi + 1].sum()) / (L * sw2)
        n0 = float(np.median(ref[lo : hi + 1])) / (sw2 * fs)
        if power <= 0 or n0 <= 0:
            continue
        f_bin = fs / L
        out.append(
            ContinuousLine.of((lo - L // 2 - 0.5) * f_bin, (hi - L // 2 + 0.5) * f_bin, power, n0)
        )
    return tuple(out)
