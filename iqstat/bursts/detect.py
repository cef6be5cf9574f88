"""Noise floor and burst detection: where in a capture are the bursts, and what is the noise.

One streaming pass over the samples computes, per frame of ``L`` samples, the mean power in the
full band and in the occupied signal band (a partial DFT of each frame, rectangular window, so
that under white noise the in-band frame power is exactly Gamma distributed). The occupied band
is chosen beforehand from a Hann-windowed spectrum of a spread subsample of frames. Detection
runs a gamma-law threshold test at several smoothing lengths, joins the results so that weak
bursts are not split nor strong close bursts merged, and refines every edge to one sample with
a change-point estimate on band-limited samples read back around the edge. The noise-only gaps
give the noise variance and the noise PSD.

Memory: two float32 values per frame (8 bytes per ``L`` samples) plus one chunk; the capture is
never loaded whole.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import asdict, dataclass

import numpy as np
import scipy.fft
from numpy.lib.stride_tricks import sliding_window_view
from scipy import special
from scipy.ndimage import median_filter

from iqstat.capture import DEFAULT_CHUNK_SAMPLES, Capture
from iqstat.errors import MeasurementError, ParameterError
from iqstat.facts import (
    FLOOR_FRAME,
    CaptureFacts,
    FactsAccumulator,
    iter_unscaled_chunks,
    unscaled_factor,
)
from iqstat.frontend import NO_CORRECTION, IqCorrection, measure_iq_correction
from iqstat.noise import (
    noise_floor_lowest_cluster,
    threshold_from_floor,
)

# Smoothing lengths of the detector, in frames (~1, 4, 16, 65 ms at the default frame length).
SMOOTHING_FRAMES = (1, 4, 16, 64)
# Band survey: blocks of contiguous frames spread over the capture.
_SURVEY_BLOCK_FRAMES = 16
_SURVEY_MAX_BLOCKS = 128
# A survey bin is "occupied" when its excess over the noise reference exceeds this many
# standard deviations of the estimate (common practice, no source).
_OCCUPIED_Z = 6.0
# Minimum relative excess of an occupied bin whatever the statistics say (tolerates a noise
# reference that is a few per cent off; common practice, no source).
_OCCUPIED_MIN_EXCESS = 0.05
# A gap between two detections is kept (the bursts are split) when the noise hypothesis beats
# the "burst continues" hypothesis by this log-likelihood ratio (1e4 : 1; common practice).
_SPLIT_LOG_LR = math.log(1e4)
# Use a matrix product for the in-band DFT bins when they are at most this fraction of the
# frame's bins, else a full FFT (the product is cheaper for narrow bands).
_MATMUL_MAX_BIN_FRACTION = 1.0 / 6.0
# Sample-level edge search: this many frames either side of the frame-level edge.
_REFINE_HALF_FRAMES = 3
# Edge refinement reads regions less than this many samples apart with one call (one
# positional read costs about 10 us, as much as converting a few thousand samples), in spans of
# about _READ_SPAN_MAX.
_READ_MERGE_GAP = 1 << 12
_READ_SPAN_MAX = 1 << 19
# Groups refined per batch: bounds the temporaries (a few 2-D arrays of 2 edges × ~2 k
# samples per group, complex64) to ~20 MB.
_REFINE_BATCH_GROUPS = 256
# At most this many gap frames are read back for the noise PSD.
# Lowest in-band SNR reported, dB (a burst whose in-band excess is not positive).
_MIN_BAND_SNR_DB = -30.0
_TINY = 1e-300


# --------------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Burst:
    """One detected burst.

    Attributes
    ----------
    index : int
        Position of the burst in the capture, 0-based.
    start_sample, stop_sample : int
        First sample and one past the last sample of the burst.
    power_dbfs : float
        Mean power of the samples inside, full band, dBFS (signal plus noise).
    band_snr_db : float
        In-band SNR, (P_band − N_band)/N_band, from the frames inside; floored at −30 dB.
    peak_dbfs : float
        Highest one-frame mean power (full band) among frames wholly inside the burst, dBFS
        (the mean power for bursts shorter than two frames).
    """

    index: int
    start_sample: int
    stop_sample: int
    power_dbfs: float
    band_snr_db: float
    peak_dbfs: float

    @property
    def n_samples(self) -> int:
        return self.stop_sample - self.start_sample

    def to_dict(self) -> dict:
        d = asdict(self)
        d["n_samples"] = self.n_samples
        return d


@dataclass(frozen=True)
class BurstDetection:
    """Bursts of a capture and the noise measured in the gaps between them.

    Attributes
    ----------
    bursts : tuple of Burst
    noise_floor_dbfs : float
        Full-band noise power per sample, dBFS (10·log10 of ``noise_var``).
    noise_var : float
        σ², full-band noise variance per complex sample (linear, full-scale units).
    noise_psd_db_per_hz : float
        Noise PSD in the signal band away from DC, dBFS/Hz (white noise: σ²/fs).
    noise_psd_dof : float
        Gamma shape of that PSD estimate under white Gaussian noise (in-band DFT bins per
        frame × gap frames); its relative variance is 1/dof. 0 when there are no gaps.
    band_hz : tuple of float or None
        Edges of the occupied band used for detection (bin edges), Hz relative to the centre
        frequency; None when the full band was used.
    threshold_dbfs : float
        Start threshold of the one-frame in-band power, dBFS.
    frame_samples : int
        Frame length L used for the frame powers.
    gap_samples : int
        Samples in the noise-only gaps the noise estimates come from.
    message : str
        One line on the outcome.
    dc_offset : complex
        Mean of the samples in the gaps (full-scale units): the receiver's DC offset, which
        the noise figures above exclude and measurement subtracts. 0 without gaps.
    iq : IqCorrection
        The receiver's quadrature imbalance measured on the gap noise (after the DC), and the
        correction measurement applies when it is significant.
    """

    bursts: tuple[Burst, ...]
    noise_floor_dbfs: float
    noise_var: float
    noise_psd_db_per_hz: float
    noise_psd_dof: float
    band_hz: tuple[float, float] | None
    threshold_dbfs: float
    frame_samples: int
    gap_samples: int
    message: str
    dc_offset: complex
    iq: IqCorrection

    @property
    def dc_offset_dbfs(self) -> float:
        """|dc|² in dBFS (−inf for none)."""
        return _db(abs(self.dc_offset) ** 2)

    def to_dict(self) -> dict:
        return {
            "bursts": [b.to_dict() for b in self.bursts],
            "noise_floor_dbfs": self.noise_floor_dbfs,
            "noise_var": self.noise_var,
            "noise_psd_db_per_hz": self.noise_psd_db_per_hz,
            "noise_psd_dof": self.noise_psd_dof,
            "band_hz": list(self.band_hz) if self.band_hz is not None else None,
            "threshold_dbfs": self.threshold_dbfs,
            "frame_samples": self.frame_samples,
            "gap_samples": self.gap_samples,
            "message": self.message,
            "dc_offset": [self.dc_offset.real, self.dc_offset.imag],
            "iq_improperness": self.iq.improperness,
            "iq_image_rejection_db": self.iq.image_rejection_db,
            "iq_corrected": self.iq.applied,
        }


@dataclass(frozen=True)
class FramePowers:
    """Per-frame mean powers of a capture (the detector's input).

    Attributes
    ----------
    full : ndarray of float32, shape (n_frames,)
        Mean |x|² per frame, full band.
    band : ndarray of float32, shape (n_frames,)
        Mean in-band power per sample per frame: Σ_{k∈band}|X_k|²/L² (equals ``full`` when the
        full band is used).
    band_dof : float
        Gamma shape of one ``band`` value under white Gaussian noise (number of DFT bins in the
        band; L for the full band of a complex capture, L/2 for a real one).
    band_hz : tuple of float or None
        Band edges used (bin edges), Hz; None for the full band.
    frame_samples : int
    sums : ndarray of complex128, shape (n_frames,)
        Σx per frame (DFT bin 0): the gap frames' mean of it is the receiver's DC offset.
    dc_in_band : bool
        Whether bin 0 is one of the band's bins (so that ``band`` holds the DC's power).
    """

    full: np.ndarray
    band: np.ndarray
    band_dof: float
    band_hz: tuple[float, float] | None
    frame_samples: int
    sums: np.ndarray
    dc_in_band: bool


# --------------------------------------------------------------------------------------------
# Gamma-law helpers (pure)
# --------------------------------------------------------------------------------------------
#: Detections longer than this many expected bursts are split (see _split_long_groups).
LONG_BURST_FACTOR = 1.5
#: The gap re-estimate of the floor may exceed the robust starting estimate by this factor.
GAP_FLOOR_MAX_RISE = 1.1
#: z-score of the smoothed spectral excess up to which the occupied band is grown.
_GROW_Z = 3.0
#: Fewest noise-only frames for a noise estimate from the gaps.
MIN_GAP_FRAMES = 8


# --------------------------------------------------------------------------------------------
# Band survey and frame powers
# --------------------------------------------------------------------------------------------
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


def _survey_band(capture: Capture, frame_samples: int) -> _Survey | None:
    """Choose the occupied DFT bins from a Hann spectrum of spread blocks of frames."""
    L = frame_samples
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
    noise_per_bin = np.fft.ifftshift(ref) / (float(np.sum(w.astype(np.float64) ** 2)) * L)
    rel_std = s_own / math.sqrt(width)
    if idx.size == 0:
        return _Survey(None, noise_per_bin, rel_std)
    # Clusters of occupied bins (gaps up to L/16 bins); keep the one with most excess power.
    breaks = np.flatnonzero(np.diff(idx) > max(1, L // 16)) + 1
    groups = np.split(idx, breaks)
    excess = np.maximum(mean - ref, 0.0)
    best = max(groups, key=lambda g: excess[g[0] : g[-1] + 1].sum())
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
    return _Survey(np.sort(np.fft.fftshift(np.arange(L))[lo : hi + 1]), noise_per_bin, rel_std)


def measure_frame_powers(
    capture: Capture,
    *,
    frame_samples: int,
    band_hz: tuple[float, float] | None = None,
    chunk_samples: int = DEFAULT_CHUNK_SAMPLES,
) -> FramePowers:
    """Per-frame full-band and in-band mean powers in one streaming pass.

    Parameters
    ----------
    capture : Capture
    frame_samples : int
        Frame length L [samples]; the last partial frame is not measured.
    band_hz : (float, float), optional
        Band [f_lo, f_hi] in Hz relative to the centre frequency; the DFT bins of the frame
        whose centres fall inside are used. None: full band.
    chunk_samples : int
        Samples read per chunk (memory use is about 8 bytes × chunk_samples).

    Returns
    -------
    FramePowers

    Notes
    -----
    With a rectangular window the L-point DFT of white complex Gaussian noise has independent
    bins with E|X_k|² = Lσ², so Σ_{k∈B}|X_k|²/L² ~ Gamma(|B|, σ²/L) [1]_: the in-band frame
    power is Gamma with shape |B| and mean σ²|B|/L (the noise in the band).

    References
    ----------
    .. [1] S. M. Kay, Fundamentals of Statistical Signal Processing, Vol. II: Detection
       Theory, Prentice Hall, 1998, §2.2 [mem].
    """
    L = int(frame_samples)
    fpass = _FramePowerPass(capture, L, band_hz)
    sc = unscaled_factor(capture)
    for _, x, _, _ in iter_unscaled_chunks(capture, int(chunk_samples)):
        fpass.add(x, sc * sc)
    return fpass.result()


class _FramePowerPass:
    """Frame powers of :func:`measure_frame_powers`, fed chunk by chunk (any chunk sizes).

    Chunks may be unscaled (integer recordings, see :func:`iqstat.facts.iter_unscaled_chunks`):
    the powers are multiplied by ``scale2`` (a power of two, so the result equals that of
    scaled samples exactly).
    """

    def __init__(self, capture: Capture, L: int, band_hz) -> None:
        fs = capture.sample_rate_hz
        self.L = L
        self.n_frames = capture.n_samples // L
        self.p_full = np.empty(self.n_frames, dtype=np.float32)
        if band_hz is None:
            self.bins, self.p_band, self.edges = None, self.p_full, None
            self.dof = float(L if capture.is_complex else L / 2)
        else:
            self.bins = _bins_for_band(band_hz, L, fs)
            self.p_band = np.empty(self.n_frames, dtype=np.float32)
            self.edges = _band_edges(self.bins, L, fs)
            self.dof = float(self.bins.size)
        bins = self.bins
        self.sums = np.empty(self.n_frames, dtype=np.complex128)
        self.dc_in_band = bins is None or bool(np.any(bins == 0))
        self.use_mm = bins is not None and bins.size <= _MATMUL_MAX_BIN_FRACTION * L
        if self.use_mm:
            # Real form of the partial DFT, so that a float32 matrix product (fast, and cheap
            # on a busy core) gives [Re X_k, Im X_k] from the interleaved [re, im] samples.
            # Columns padded with zeros to a multiple of 8: the product's kernels are much
            # faster then (38 → 40 columns: −15 % time), and the columns it has are the same
            # bits. Two more columns give bin 0, the frame's sum, where the band lacks it.
            w = np.exp(-2j * np.pi * np.arange(L)[:, None] * bins[None, :] / L)
            n_col = 2 * bins.size
            n_all = n_col + (0 if self.dc_in_band else 2)
            dft = np.zeros((2 * L, -(-n_all // 8) * 8), dtype=np.float32)
            dft[0::2, 0:n_col:2], dft[1::2, 0:n_col:2] = w.real, -w.imag
            dft[0::2, 1:n_col:2], dft[1::2, 1:n_col:2] = w.imag, w.real
            if self.dc_in_band:
                k0 = 2 * int(np.flatnonzero(bins == 0)[0])
            else:
                k0 = n_col
                dft[0::2, k0] = dft[1::2, k0 + 1] = 1.0
            self.dft = dft
            self.n_col = n_col
            self.k0 = k0
        self.fi = 0  # frames done
        self.carry = np.empty(L, dtype=np.complex64)
        self.n_carry = 0

    def _process(self, frames: np.ndarray, scale2: float, energy=None) -> None:
        L, fi = self.L, self.fi
        m = min(frames.shape[0], self.n_frames - fi)
        if m <= 0:
            return
        v = frames[:m].view(np.float32)
        pf = (np.einsum("ij,ij->i", v, v) if energy is None else energy[:m]) / L
        self.p_full[fi : fi + m] = pf if scale2 == 1.0 else pf * scale2
        sc = 1.0 if scale2 == 1.0 else math.sqrt(scale2)  # a power of two: exact
        sums = self.sums[fi : fi + m]
        if self.bins is not None:
            if self.use_mm:
                va = v @ self.dft
                vb = va[:, : self.n_col]
                pb = np.einsum("ij,ij->i", vb, vb) / (L * L)
                sums.real, sums.imag = va[:, self.k0], va[:, self.k0 + 1]
            else:
                xf = np.fft.fft(frames[:m], axis=1)
                xb = xf[:, self.bins]
                pb = np.sum(xb.real**2 + xb.imag**2, axis=1) / (L * L)
                sums[:] = xf[:, 0]
            self.p_band[fi : fi + m] = pb if scale2 == 1.0 else pb * scale2
        else:
            sums[:] = v.reshape(m, L, 2).sum(axis=1, dtype=np.float64) @ np.array([1.0, 1j])
        if sc != 1.0:
            sums *= sc
        self.fi += m

    def add(self, x: np.ndarray, scale2: float = 1.0, energy: np.ndarray | None = None) -> None:
        """Add the next chunk of samples (complex64); the powers are scaled by ``scale2``.

        ``energy`` may give Σ|x|² of the chunk's consecutive L-sample frames from its first
        sample, computed as here (one dot product per frame of the interleaved values, as
        :class:`iqstat.facts.FactsAccumulator` does); it is used when the chunk's frames start
        at its first sample.
        """
        L = self.L
        pos = 0
        if energy is not None and (self.n_carry or energy.size != x.size // L):
            energy = None
        if self.n_carry:
            take = min(L - self.n_carry, x.size)
            self.carry[self.n_carry : self.n_carry + take] = x[:take]
            self.n_carry += take
            pos = take
            if self.n_carry < L:
                return
            self._process(self.carry[None, :], scale2)
            self.n_carry = 0
        nf = (x.size - pos) // L
        if nf:
            self._process(x[pos : pos + nf * L].reshape(nf, L), scale2, energy)
        rest = x.size - pos - nf * L
        if rest:
            self.carry[:rest] = x[pos + nf * L :]
            self.n_carry = rest

    def result(self) -> FramePowers:
        return FramePowers(
            self.p_full, self.p_band, self.dof, self.edges, self.L, self.sums, self.dc_in_band
        )


# --------------------------------------------------------------------------------------------
# Detection on frame powers
# --------------------------------------------------------------------------------------------
def _runs(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start and stop (exclusive) indices of the runs of True in a boolean array."""
    d = np.diff(np.concatenate(([0], mask.view(np.int8), [0])))
    return np.flatnonzero(d == 1), np.flatnonzero(d == -1)


def _prefix_sums(p: np.ndarray) -> np.ndarray:
    """[0, p0, p0 + p1, …] in float64."""
    return np.concatenate(([0.0], np.cumsum(p, dtype=np.float64)))


def _scale_regions(
    p: np.ndarray, dof: float, floor: float, pfa: float, m: int, cs: np.ndarray | None = None
) -> np.ndarray:
    """Frame intervals (k, 2) where the m-frame moving mean passes the hysteresis test.

    ``cs`` may give :func:`_prefix_sums` of ``p``.
    """
    if cs is None:
        cs = _prefix_sums(p)
    stat = (cs[m:] - cs[:-m]) / m  # window i covers frames [i, i + m)
    t_start = threshold_from_floor(floor, m * dof, pfa)
    t_stop = threshold_from_floor(floor, m * dof, math.sqrt(pfa))
    r0, r1 = _runs(stat > t_stop)
    if r0.size == 0:
        return np.empty((0, 2), dtype=np.int64)
    above = np.concatenate(([0], np.cumsum(stat > t_start)))
    keep = above[r1] - above[r0] > 0
    return np.stack([r0[keep], r1[keep] - 1 + m], axis=1).astype(np.int64)


@dataclass(frozen=True)
class _Group:
    start: int  # frames, first piece
    stop: int  # frames, last piece (exclusive)
    start_lo: int  # window for the start edge, frames
    start_hi: int
    stop_lo: int  # window for the stop edge, frames
    stop_hi: int


class _Prefix:
    """Means of frame powers over frame ranges from prefix sums (O(1) per mean).

    The grouping asks for thousands of short means; one numpy call each cost more than the
    rest of the grouping. Ranges are clipped to [0, n) like slices.
    """

    def __init__(self, p: np.ndarray) -> None:
        self.sums = _prefix_sums(p)
        self.cs = self.sums.tolist()
        self.size = p.size

    def count(self, a: int, b: int) -> int:
        return max(min(b, self.size) - max(a, 0), 0)

    def mean(self, a: int, b: int) -> float:
        a, b = max(a, 0), min(b, self.size)
        return (self.cs[b] - self.cs[a]) / (b - a) if b > a else math.nan


def _split_gap(p: _Prefix, dof: float, floor: float, a, b) -> bool:
    """Whether the frames between pieces a and b are decisively noise rather than burst."""
    n_gap = p.count(a[1], b[0])
    if n_gap == 0 or floor <= 0:
        return False
    s = min(p.mean(a[0], a[1]), p.mean(b[0], b[1])) - floor
    if s <= 0:
        return False
    n, x = floor, p.mean(a[1], b[0])
    # log p(gap | noise N) − log p(gap | burst N + S) for a Gamma(G, ·/G) mean, G = n_gap·dof
    llr = n_gap * dof * (math.log((n + s) / n) - x / n + x / (n + s))
    return llr > _SPLIT_LOG_LR


def _part_of_burst(p: _Prefix, dof: float, floor: float, level: float, a: int, b: int) -> bool:
    """Whether frames [a, b) belong to a burst of mean power ``level`` next to them.

    Their mean must be clearly above the noise (3 σ) and at least half-way from the floor
    to the burst's level: a noise bump beside a strong burst is not part of it, the weak
    fringe of a burst that only a longer average saw is.
    """
    count = p.count(a, b)
    if count == 0:
        return False
    mean = p.mean(a, b)
    return mean > floor * (1.0 + 3.0 / math.sqrt(count * dof)) and mean > 0.5 * (floor + level)


class _Intervals:
    """One smoothing length's detections, sorted, with their starts and ends for bisection.

    Hysteresis runs of one length are disjoint and sorted and all extend by m − 1 frames, so
    starts and ends both increase: the intervals overlapping [a, b) are a contiguous slice,
    found by bisection instead of a scan of every interval of the capture (which made the
    grouping quadratic in the number of bursts). Should the ends not increase, the scan is
    used.
    """

    def __init__(self, intervals):
        self.items = sorted(intervals)
        self.starts = [x for x, _ in self.items]
        self.ends = [y for _, y in self.items]
        self.sorted_ends = all(u <= v for u, v in zip(self.ends, self.ends[1:], strict=False))

    def overlapping(self, a: int, b: int) -> list[tuple[int, int]]:
        """The intervals (x, y) with y > a and x < b, in order."""
        if not self.sorted_ends:
            return [(x, y) for x, y in self.items if y > a and x < b]
        i0 = bisect.bisect_right(self.ends, a)
        i1 = bisect.bisect_left(self.starts, b)
        return self.items[i0:i1] if i0 < i1 else []


def _split_by_scale(p: _Prefix, dof, floor, by_scale, scales_desc, a, b) -> list[list[int]]:
    """Pieces ``[start, stop, m_first, m_last]`` of the frames [a, b), coarse to fine."""
    if not scales_desc:
        return []
    m = scales_desc[0]
    inside = by_scale[m].overlapping(a, b)
    if not inside:
        return _split_by_scale(p, dof, floor, by_scale, scales_desc[1:], a, b)
    groups = [[inside[0][0], inside[0][1], m, m]]
    for x, y in inside[1:]:
        last = groups[-1]
        if x <= last[1] or not _split_gap(p, dof, floor, last, (x, y)):
            last[1] = max(last[1], y)
        else:
            groups.append([x, y, m, m])
    out = []
    for g in groups:
        finer = _split_by_scale(p, dof, floor, by_scale, scales_desc[1:], g[0], g[1])
        if len(finer) > 1:
            out.extend(finer)
            # A burst seen only at this length (too weak for the finer ones) must not be
            # lost between the finer pieces: keep this length's intervals that no finer
            # piece overlaps.
            left = []
            # the intervals of ``inside`` that overlap g (y > a, x < b, y > g0, x < g1)
            for x, y in by_scale[m].overlapping(max(a, g[0]), min(b, g[1])):
                if all(y <= f[0] or x >= f[1] for f in finer):
                    if left and x <= left[-1][1]:
                        left[-1][1] = max(left[-1][1], y)
                    else:
                        left.append([x, y, m, m])
            out.extend(left)
        elif len(finer) == 1:
            # One burst at the finer length too: its edges are the sharper ones, unless it
            # saw only part of the burst (then the coarser extent stands).
            # The coarser extent stands only where the frames it adds hold signal.
            f = finer[0]
            # The coarse group's own mean: a short fine piece of a weak burst is a lucky,
            # inflated sample of its level.
            level = p.mean(g[0], g[1])
            ext_lo = f[0] > g[0] + m and _part_of_burst(p, dof, floor, level, g[0], f[0])
            ext_hi = f[1] < g[1] - m and _part_of_burst(p, dof, floor, level, f[1], g[1])
            out.append(
                [
                    g[0] if ext_lo else f[0],
                    g[1] if ext_hi else f[1],
                    m if ext_lo else f[2],
                    m if ext_hi else f[3],
                ]
            )
        else:
            out.append(g)
    return sorted(out)


def _chain_groups(x, y, m, present, a0, b0, cs, dof, floor, n_frames):
    """Groups of clusters holding at most one interval per smoothing length, vectorised.

    Row c of ``x``, ``y`` (int64, (n_clusters, n_scales), scales fine to coarse ``m``) holds
    cluster c's interval of each length where ``present``; [a0, b0) are the clusters' frame
    ranges. With one interval per length :func:`_split_by_scale` returns one piece: the
    coarsest interval, replaced from the finest length up by the sharper edges of the chain
    of finer intervals that overlap it, unless the coarser one's extra frames hold signal.
    This evaluates that recursion for all clusters at once with the same arithmetic (same
    bits). Returns start, stop, start_lo, start_hi, stop_lo, stop_hi as int64 arrays.
    """
    n_c, n_s = x.shape
    # Top down: which lengths the recursion visits (the first length, coarse to fine, with
    # an interval overlapping the window of the length visited before it).
    chain = np.zeros((n_c, n_s), dtype=bool)
    wa, wb = a0.copy(), b0.copy()
    for s in range(n_s - 1, -1, -1):
        v = present[:, s] & (y[:, s] > wa) & (x[:, s] < wb)
        chain[:, s] = v
        wa = np.where(v, x[:, s], wa)
        wb = np.where(v, y[:, s], wb)
    # Bottom up: the piece of the finer lengths, extended where _part_of_burst says so.
    has = np.zeros(n_c, dtype=bool)
    f0 = np.zeros(n_c, dtype=np.int64)
    f1 = np.zeros(n_c, dtype=np.int64)
    mf = np.zeros(n_c, dtype=np.int64)
    ml = np.zeros(n_c, dtype=np.int64)
    n = cs.size - 1

    def part_of_burst(lo, hi, level):  # _part_of_burst on arrays, same operations
        lo, hi = np.maximum(lo, 0), np.minimum(hi, n)
        count = np.maximum(hi - lo, 0)
        ok = count > 0
        cnt = np.where(ok, count, 1)
        mean = (cs[np.where(ok, hi, 0)] - cs[np.where(ok, lo, 0)]) / cnt
        return (
            ok & (mean > floor * (1.0 + 3.0 / np.sqrt(cnt * dof))) & (mean > 0.5 * (floor + level))
        )

    for s in range(n_s):
        c = chain[:, s]
        if not c.any():
            continue
        xs, ys, ms = x[:, s], y[:, s], m[s]
        level = (cs[np.minimum(ys, n)] - cs[xs]) / np.maximum(np.minimum(ys, n) - xs, 1)
        ext_lo = (f0 > xs + ms) & part_of_burst(xs, f0, level)
        ext_hi = (f1 < ys - ms) & part_of_burst(f1, ys, level)
        new = c & ~has
        upd = c & has
        lo_x = upd & ext_lo | new
        hi_x = upd & ext_hi | new
        f0 = np.where(lo_x, xs, f0)
        mf = np.where(lo_x, ms, mf)
        f1 = np.where(hi_x, ys, f1)
        ml = np.where(hi_x, ms, ml)
        has |= c
    # Edge windows: every interval of the cluster overlapping the piece (neighbours: none).
    over = present & (y > f0[:, None]) & (x < f1[:, None])
    big = np.iinfo(np.int64).max
    lo = np.maximum(np.min(np.where(over, x, big), axis=1) - 1, 0)
    hi = np.minimum(np.max(np.where(over, y, -big), axis=1) + 1, n_frames)
    mid = (f0 + f1 + 1) // 2
    start_hi = np.maximum(np.minimum(f0 + mf + 1, mid), lo + 1)
    stop_lo = np.minimum(np.maximum(f1 - ml - 1, mid), hi - 1)
    return f0, f1, lo, start_hi, stop_lo, hi


def _detect_groups(
    p: np.ndarray,
    dof: float,
    floor: float,
    pfa: float,
    pm: _Prefix | None = None,
    fast: bool = True,
) -> list[_Group]:
    """Join the detections of all smoothing lengths into bursts with edge search windows.

    ``pm`` may give ``_Prefix(p)`` (the floor iterations call this on the same powers).
    ``fast`` groups clusters with at most one interval per smoothing length in one
    vectorised pass (:func:`_chain_groups`, same groups); False runs the general code on
    every cluster (kept for the tests that check the two agree).
    """
    n_frames = p.size
    if pm is None:
        pm = _Prefix(p)
    scales = [m for m in SMOOTHING_FRAMES if m <= n_frames]
    per_scale = [_scale_regions(p, dof, floor, pfa, m, pm.sums) for m in scales]
    sizes = [r.shape[0] for r in per_scale]
    if not sum(sizes):
        return []
    # Clusters: connected components of the union of all intervals, in sorted order.
    iv = np.concatenate(per_scale)
    si = np.repeat(np.arange(len(scales)), sizes)
    order = np.lexsort((si, iv[:, 1], iv[:, 0]))
    xa, ya, sa = iv[order, 0], iv[order, 1], si[order]
    reach = np.maximum.accumulate(ya)
    first = np.concatenate(([True], xa[1:] > reach[:-1]))
    cid = np.cumsum(first) - 1
    n_c = int(cid[-1]) + 1
    bounds = np.append(np.flatnonzero(first), xa.size)
    counts = np.zeros((n_c, len(scales)), dtype=np.int64)
    np.add.at(counts, (cid, sa), 1)
    single = counts.max(axis=1) <= 1 if fast else np.zeros(n_c, dtype=bool)

    done: dict[int, _Group] = {}
    if single.any():
        sel = single[cid]
        rows = np.cumsum(single) - 1
        n_f = int(single.sum())
        x = np.zeros((n_f, len(scales)), dtype=np.int64)
        y = np.zeros_like(x)
        present = np.zeros(x.shape, dtype=bool)
        r, s = rows[cid[sel]], sa[sel]
        x[r, s], y[r, s], present[r, s] = xa[sel], ya[sel], True
        fc = np.flatnonzero(single)
        a0 = xa[bounds[fc]]
        b0 = reach[bounds[fc + 1] - 1]
        cols = _chain_groups(
            x,
            y,
            np.array(scales, dtype=np.int64),
            present,
            a0,
            b0,
            pm.sums,
            dof,
            floor,
            n_frames,
        )
        for c, g in zip(fc.tolist(), zip(*(v.tolist() for v in cols), strict=True), strict=True):
            done[c] = _Group(*g)
    if len(done) == n_c:
        return [done[c] for c in range(n_c)]
    m_of = np.array(scales)[sa].tolist()
    xl, yl, bl = xa.tolist(), ya.tolist(), bounds.tolist()

    groups: list[_Group] = []
    for ci in range(n_c):
        if ci in done:
            groups.append(done[ci])
            continue
        i0, i1 = bl[ci], bl[ci + 1]
        # From the coarsest smoothing length down: a burst is split only where a finer length
        # shows a gap that is decisively noise; within a burst, the finest length that still
        # sees it whole gives its edges. (Taking the finest fragments everywhere would let a
        # weak burst's dips mask the true gaps, and bursts would merge.)
        per_m: dict[int, list[tuple[int, int]]] = {m: [] for m in scales}
        for k in range(i0, i1):
            per_m[m_of[k]].append((xl[k], yl[k]))
        by_scale = {m: _Intervals(per_m[m]) for m in scales}
        merged = _split_by_scale(pm, dof, floor, by_scale, scales[::-1], xl[i0], max(yl[i0:i1]))
        # A piece found at smoothing length m may start up to m frames before the true edge.
        for i, (a, b, m_first, m_last) in enumerate(merged):
            left = merged[i - 1][1] if i else 0
            right = merged[i + 1][0] if i + 1 < len(merged) else n_frames
            over = [iv for m in scales for iv in by_scale[m].overlapping(a, b)]
            lo = max(left, min(iv[0] for iv in over) - 1)
            hi = min(right, max(iv[1] for iv in over) + 1)
            mid = (a + b + 1) // 2
            groups.append(
                _Group(
                    start=a,
                    stop=b,
                    start_lo=lo,
                    start_hi=max(min(a + m_first + 1, mid), lo + 1),
                    stop_lo=min(max(b - m_last - 1, mid), hi - 1),
                    stop_hi=hi,
                )
            )
    return groups


# --------------------------------------------------------------------------------------------
# Edge refinement and burst figures (read back a few samples)
# --------------------------------------------------------------------------------------------
def _read_windows(capture: Capture, starts: np.ndarray, width: int) -> np.ndarray:
    """Samples ``[starts_i, starts_i + width)`` of a capture as rows (zeros past its end).

    Parameters
    ----------
    capture : Capture
    starts : ndarray of int, shape (n,)
        First sample of each window, sorted ascending.
    width : int

    Returns
    -------
    ndarray of complex64, shape (n, width)

    Notes
    -----
    Windows less than ``_READ_MERGE_GAP`` samples apart are read with one call (one read
    costs about as much as converting that many samples), in spans of about
    ``_READ_SPAN_MAX`` samples; the rows are copied out of each span's samples through a
    sliding-window view.
    """
    starts = np.asarray(starts, dtype=np.int64)
    out = np.empty((starts.size, width), dtype=np.complex64)
    if starts.size == 0:
        return out
    new = np.ones(starts.size, dtype=bool)
    new[1:] = (starts[1:] > starts[:-1] + width + _READ_MERGE_GAP) | (
        starts[1:] // _READ_SPAN_MAX != starts[:-1] // _READ_SPAN_MAX
    )
    bounds = np.append(np.flatnonzero(new), starts.size).tolist()
    n = capture.n_samples
    for i0, i1 in zip(bounds[:-1], bounds[1:], strict=True):
        lo = int(starts[i0])
        hi = int(starts[i1 - 1]) + width
        x = capture.read(lo, min(hi, n) - lo)
        if x.size < hi - lo:
            x = np.concatenate((x, np.zeros(hi - lo - x.size, dtype=np.complex64)))
        if i1 - i0 == 1:
            out[i0] = x[:width]
        else:
            out[i0:i1] = sliding_window_view(x, width)[starts[i0:i1] - lo]
    return out


def _change_points(
    rows: np.ndarray, lengths: np.ndarray, noise: float, burst: np.ndarray, rising: np.ndarray
) -> np.ndarray:
    """ML positions of steps between two known mean powers, one per row; −1 where none.

    Parameters
    ----------
    rows : ndarray, shape (n_edges, width)
        Powers; row e holds ``lengths[e]`` values, the rest is padding.
    lengths : ndarray of int, shape (n_edges,)
    noise : float
        Mean power N before a rising (after a falling) edge.
    burst : ndarray, shape (n_edges,)
        Mean power B of the burst beside each edge.
    rising : ndarray of bool, shape (n_edges,)

    Notes
    -----
    Each sample adds the log-likelihood ratio r = p·(1/N − 1/B) − ln(B/N) of exponential
    powers of mean B (burst) against N (noise); the step maximises Σ r after it (rising edge)
    or before it (falling edge), a CUSUM with known levels (Page, Biometrika 41, 1954 [mem]).
    Signal-plus-noise power is not exponential, but r stays linear in p, so only the
    variance, not the location, of the estimate depends on that approximation. No step is
    placed (−1) when B ≤ 1.01·N or a row has fewer than two values. The sums run in the
    rows' precision.
    """
    burst = np.asarray(burst, dtype=np.float64)
    ok = (burst > 1.01 * noise) & (1.01 * noise > 0) & (lengths >= 2)
    n = noise if noise > 0 else 1.0
    b = np.where(ok, burst, 2.0 * n)
    dt = rows.dtype
    # rising: maximise c[n] − c[τ] → minimise c[τ]; falling: maximise c[τ] (minimise −c[τ]).
    # The sign goes into the coefficients: negation is exact, so −c is the sum of −r.
    sign = np.where(rising, 1.0, -1.0)
    c = np.empty((rows.shape[0], rows.shape[1] + 1), dtype=dt)
    c[:, 0] = 0
    r = c[:, 1:]
    np.multiply(rows, (sign * (1.0 / n - 1.0 / b)).astype(dt)[:, None], out=r)
    r -= (sign * np.log(b / n)).astype(dt)[:, None]
    np.cumsum(r, axis=1, out=r)
    np.copyto(c, np.inf, where=np.arange(c.shape[1]) > lengths[:, None])
    return np.where(ok, np.argmin(c, axis=1), -1)


def _refine_many(
    capture: Capture,
    groups: list[_Group],
    L: int,
    band_hz,
    p: np.ndarray,
    floor: float,
    dof: float,
    end_energy: dict | None = None,
    dc: complex = 0j,
) -> list[tuple[int, int]]:
    """Edges of every group to one sample: frame-level CUSUM, then sample level around it.

    Groups are refined in batches of ``_REFINE_BATCH_GROUPS`` with a fixed number of numpy
    calls per batch (plus one read per span of nearby edges, and one FFT per distinct length
    of the band-limited windows). ``end_energy``, if given, receives Σ|x|² of the partial frame
    inside each refined edge, keyed by its sample range, from the samples read here
    (:func:`_mean_power` needs them). The samples read are taken less ``dc``, the receiver's
    DC offset (as the frame powers ``p`` are).
    """
    out: list[tuple[int, int]] = []
    for i in range(0, len(groups), _REFINE_BATCH_GROUPS):
        batch = groups[i : i + _REFINE_BATCH_GROUPS]
        out.extend(_refine_batch(capture, batch, L, band_hz, p, floor, dof, end_energy, dc))
    return out


def _refine_batch(capture, groups, L, band_hz, p, floor, dof, end_energy, dc):
    n = capture.n_samples
    n_frames = p.size
    fs = capture.sample_rate_hz
    g = np.array(
        [(x.start, x.stop, x.start_lo, x.start_hi, x.stop_lo, x.stop_hi) for x in groups],
        dtype=np.int64,
    ).reshape(-1, 6)
    n_g = g.shape[0]
    if n_g == 0:
        return []
    # Mean in-band frame power of each group (pairs [start, stop) of an index list).
    level = np.add.reduceat(np.append(p, 0.0), g[:, :2].ravel())[0::2] / np.maximum(
        g[:, 1] - g[:, 0], 1
    )
    # Both edges of every group: starts (rising) first, then stops (falling).
    lo = np.concatenate((g[:, 2], g[:, 4]))
    hi = np.concatenate((g[:, 3], g[:, 5]))
    rising = np.repeat([True, False], n_g)
    lev = np.concatenate((level, level))
    edges = np.concatenate((g[:, 0] * L, np.minimum(g[:, 1] * L, n)))

    # Frame level: the same CUSUM on frame powers (Gamma(dof) ≈ dof exponential samples).
    w = np.maximum(hi - lo, 0)
    j = np.arange(max(int(w.max()), 1))
    pd = p * dof
    rows = np.where(j < w[:, None], pd[np.clip(lo[:, None] + j, 0, n_frames - 1)], 0.0)
    t = _change_points(rows, w, floor * dof, lev * dof, rising)
    e = lo + t
    a = np.maximum(lo, e - _REFINE_HALF_FRAMES) * L
    b = np.minimum(hi, e + _REFINE_HALF_FRAMES)
    # A window reaching the last frame also takes the partial frame after it.
    b = np.where(b >= n_frames, n, b * L)
    # Sample level, on the edges that have a frame-level change point, in capture order.
    sel = np.flatnonzero(t >= 0)
    sel = sel[np.argsort(a[sel], kind="stable")]
    if sel.size == 0:
        return _edges_to_spans(edges, g, L, n)
    e, a, b, rising, lev = e[sel], a[sel], b[sel], rising[sel], lev[sel]
    m = b - a
    pad = 0 if band_hz is None else int(math.ceil(8.0 * fs / (band_hz[1] - band_hz[0])))
    ra, rb = np.maximum(a - pad, 0), np.minimum(b + pad, n)
    size = rb - ra
    x = _read_windows(capture, ra, int(size.max()))
    if dc:
        x -= np.complex64(dc)
    k = np.arange(int(m.max()))
    if band_hz is None:
        power = x.real.astype(np.float64) ** 2 + x.imag.astype(np.float64) ** 2
    else:
        # Brick-wall FFT mask on each window padded by `pad` samples each side (zero-padded
        # to its own FFT length: one FFT per distinct length).
        np.copyto(x, 0, where=np.arange(x.shape[1]) >= size[:, None])
        power = np.zeros((sel.size, k.size), dtype=np.float32)
        nffts = np.array([scipy.fft.next_fast_len(s + pad) for s in np.unique(size).tolist()])
        nfft_of = nffts[np.searchsorted(np.unique(size), size)]
        shift = a - ra  # pad, except where the window was clipped at the capture's start
        for nfft in np.unique(nfft_of).tolist():
            r = np.flatnonzero(nfft_of == nfft)
            # One copy into the zero-padded rows, transformed in place (x is zero beyond each
            # row's size already: rows that fit are taken as they are).
            if nfft <= x.shape[1]:
                X = x[:, :nfft].copy() if r.size == x.shape[0] else x[r, :nfft]
            else:
                X = np.zeros((r.size, nfft), dtype=x.dtype)
                X[:, : x.shape[1]] = x if r.size == x.shape[0] else x[r]
            X = scipy.fft.fft(X, axis=1, overwrite_x=True)
            f = scipy.fft.fftfreq(nfft, 1.0 / fs)
            r0, r1 = _runs((f < band_hz[0]) | (f > band_hz[1]))
            for u, v in zip(r0.tolist(), r1.tolist(), strict=True):
                X[:, u:v] = 0
            y = scipy.fft.ifft(X, axis=1, overwrite_x=True)
            shifts = shift[r]
            for s in np.unique(shifts).tolist():
                if shifts[0] == shifts[-1]:  # one shift (the usual case): no row selection
                    rs, ys = r, y[:, s : s + k.size]
                else:
                    rs, ys = r[shifts == s], y[shifts == s, s : s + k.size]
                # |y|² as re² + im² in float32, squares taken in place on the contiguous values
                sq = ys.view(np.float32)
                np.square(sq, out=sq)
                if rs.size == r.size and r[0] + r.size - 1 == r[-1]:
                    np.add(sq[:, 0::2], sq[:, 1::2], out=power[r[0] : r[-1] + 1, : ys.shape[1]])
                else:
                    power[rs, : ys.shape[1]] = sq[:, 0::2] + sq[:, 1::2]
    t = _change_points(power, m, floor, lev, rising)
    edge = np.where(t >= 0, a + t, e * L)
    edges[sel] = edge
    if end_energy is not None:
        # Σ|x|² of the partial frame inside the edge: [edge, next frame) or [frame, edge).
        r0 = np.where(rising, edge, edge // L * L)
        r1 = np.where(rising, -(-edge // L) * L, edge)
        has = (r1 > r0) & (ra <= r0) & (r1 <= rb)
        if has.any():
            r0, r1 = r0[has], r1[has]
            q = np.arange(L)
            col = np.minimum((r0 - ra[has])[:, None] + q, x.shape[1] - 1)
            e2 = _power64(x[np.flatnonzero(has)[:, None], col])
            np.copyto(e2, 0.0, where=q >= (r1 - r0)[:, None])
            keys = zip(r0.tolist(), r1.tolist(), strict=True)
            end_energy.update(zip(keys, e2.sum(axis=1).tolist(), strict=True))
    return _edges_to_spans(edges, g, L, n)


def _edges_to_spans(edges: np.ndarray, g: np.ndarray, L: int, n: int) -> list[tuple[int, int]]:
    """(start, stop) per group from its refined edges; the coarse extent if they cross."""
    n_g = g.shape[0]
    start, stop = edges[:n_g].copy(), edges[n_g:].copy()
    bad = stop <= start
    start[bad] = g[bad, 0] * L
    stop[bad] = np.minimum(g[bad, 1] * L, n)
    return list(zip(start.tolist(), stop.tolist(), strict=True))


def _power64(x: np.ndarray) -> np.ndarray:
    """|x|² = re² + im² of complex64 samples, in float64."""
    v = np.square(x.view(np.float32), dtype=np.float64)
    return v[..., 0::2] + v[..., 1::2]


def _energy(x: np.ndarray) -> float:
    """Σ|x|² in float64 (the partial frames of :func:`_mean_power`)."""
    return float(np.sum(_power64(x)))


def _mean_power(
    capture: Capture,
    fp: FramePowers,
    s0: int,
    s1: int,
    end_energy: dict | None = None,
    dc: complex = 0j,
) -> float:
    """Mean |x − dc|² over samples [s0, s1): whole frames from the frame powers and sums,
    ends read back.

    ``end_energy`` may hold the partial ends' Σ|x − dc|² already (from :func:`_refine`).
    Per frame, Σ|x − dc|² = Σ|x|² − 2·Re(dc*·Σx) + L·|dc|².
    """
    L = fp.frame_samples
    f0, f1 = -(-s0 // L), min(s1 // L, fp.full.size)
    if f1 - f0 < 1:
        x = capture.read(s0, s1 - s0) - np.complex64(dc)
        return float(np.mean(_power64(x))) if x.size else 0.0
    total = float(np.sum(fp.full[f0:f1], dtype=np.float64)) * L
    if dc:
        total += (f1 - f0) * L * abs(dc) ** 2 - 2.0 * float(
            (np.conj(dc) * fp.sums[f0:f1].sum()).real
        )
    for a, b in ((s0, f0 * L), (f1 * L, s1)):
        if b > a:
            known = None if end_energy is None else end_energy.get((a, b))
            if known is None:
                known = _energy(capture.read(a, b - a) - np.complex64(dc))
            total += known
    return total / (s1 - s0)


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


def _gap_iq_correction(capture: Capture, gap_frames: np.ndarray, L: int, dc: complex):
    """Quadrature imbalance from up to _IQ_GAP_FRAMES gap frames spread over the capture."""
    if not capture.is_complex or gap_frames.size == 0:
        return NO_CORRECTION
    k = min(_IQ_GAP_FRAMES, gap_frames.size)
    pick = gap_frames[np.linspace(0, gap_frames.size - 1, k).round().astype(np.int64)]
    x = _read_windows(capture, np.unique(pick) * L, L)
    if dc:
        x -= np.complex64(dc)
    return measure_iq_correction(x)


#: Share of the quietest frames (by full-band power) whose bin 0 gives the first DC estimate.
_DC_QUIET_SHARE = 0.1


def _quiet_dc(fp: FramePowers) -> complex:
    """Mean of x over the quietest frames: a first estimate of the receiver's DC offset.

    Frames with the lowest full-band power are noise-only wherever bursts fill less than
    ~90 % of the capture; their bin 0 holds L·dc plus noise, with no signal to bias it (a
    carrier near 0 Hz would, in burst frames).
    """
    n = fp.full.size
    k = max(1, int(_DC_QUIET_SHARE * n))
    quiet = np.argpartition(fp.full, k - 1)[:k] if k < n else np.arange(n)
    return complex(fp.sums[quiet].mean() / fp.frame_samples)


def _without_dc(p_band: np.ndarray, sums: np.ndarray, L: int, dc: complex) -> np.ndarray:
    """In-band frame powers with bin 0 taken as X_0 − L·dc: the DC offset removed."""
    x0 = sums / L
    d = x0 - dc
    return p_band - (x0.real**2 + x0.imag**2) + (d.real**2 + d.imag**2)


def _db(x: float) -> float:
    return 10.0 * math.log10(x) if x > 0 else float("-inf")


# --------------------------------------------------------------------------------------------
# Public entry point
# --------------------------------------------------------------------------------------------
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


def _split_long_groups(groups: list[_Group], p: np.ndarray, expected: float) -> list[_Group]:
    """Split groups much longer than the expected burst at their quietest stretches.

    Weak bursts a short gap apart can merge into one detection (the gap's power is only a
    little below theirs). When the link's frame length is known, a detection longer than
    ``LONG_BURST_FACTOR`` frames' worth is cut where a moving mean of a tenth of a burst is
    lowest, searched between 0.8 and 2 expected lengths from its start, repeatedly.
    """
    w = max(1, int(round(expected / 10)))
    cs = np.concatenate(([0.0], np.cumsum(p, dtype=np.float64)))
    out: list[_Group] = []
    for g in groups:
        a = g.start
        lo_edge = (g.start_lo, g.start_hi)
        while g.stop - a > LONG_BURST_FACTOR * expected:
            s0 = int(a + 0.8 * expected)
            s1 = int(min(g.stop - 0.8 * expected, a + 2.0 * expected))
            if s1 - s0 < w:
                break
            mm = (cs[s0 + w : s1 + 1] - cs[s0 : s1 + 1 - w]) / w
            cut = s0 + int(np.argmin(mm)) + w // 2
            out.append(_Group(a, cut, lo_edge[0], lo_edge[1], max(a + 1, cut - w), cut + w))
            a = cut
            lo_edge = (max(a - w, 0), a + w)
        out.append(
            _Group(a, g.stop, lo_edge[0], lo_edge[1], g.stop_lo, g.stop_hi) if a != g.start else g
        )
    return out


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
    3. Noise floor N: :func:`noise_floor_from_frames` on 4-frame means (robust to bursts
       filling most of the capture), then re-estimated twice as the mean in-band power of the
       frames outside every detection (the noise-only gaps).
    4. Moving means over 1, 4, 16 and 64 frames, each tested with hysteresis: start at
       :func:`threshold_from_floor` (pfa), continue down to the threshold for √pfa.
       Detections of all lengths are joined; the finest one is kept where it exists, and two
       detections are split only when the gap between them is decisively noise (likelihood
       ratio 1e4 against the burst level of the weaker neighbour); so weak bursts are not
       split and strong close bursts not merged.
    5. Each edge is refined to one sample by a change-point estimate on band-limited samples
       read back inside the window the detection allows.
    6. noise_var is the mean full-band power of the gap frames; the noise PSD the median over
       the band's bins (DC excluded) of a Hann-window periodogram of up to 1024 gap frames.
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
    refined = _refine_many(capture, groups, L, band_edges, p, floor, dof, end_energy, dc_quiet)
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
        ends = iter(_refine_many(capture, flat, L, band_edges, p, floor, dof, end_energy, dc_quiet))
        again = []
        for (s0, s1), pc in zip(joined, pieces, strict=True):
            if not pc:
                again.append([s0, s1])
                continue
            for k in range(len(pc)):
                a, b = next(ends)
                again.append([s0 if k == 0 else a, s1 if k == len(pc) - 1 else b])
        joined = again
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
    # samples, so the noise figures are those of the noise alone.
    dc = complex(fp.sums[gap_frames].sum() / (gap_frames.size * L)) if gap_frames.size else 0j
    if not capture.is_complex:
        dc = complex(dc.real, 0.0)
    dc_power = abs(dc) ** 2
    iq = _gap_iq_correction(capture, gap_frames, L, dc)
    p_gap = fp.band[gap_frames].astype(np.float64)
    if fp.dc_in_band and dc:
        p_gap = _without_dc(p_gap, fp.sums[gap_frames], L, dc)
    noise_var = (
        max(float(np.mean(fp.full[gap_frames], dtype=np.float64)) - dc_power, 0.0)
        if gap_frames.size
        else (noise_floor_lowest_cluster(fp.full, L if capture.is_complex else L / 2))
    )
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
    psd = _noise_psd(p_gap, dof if capture.is_complex else 2 * dof, L, fs)
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
    )
