"""Facts of a capture in one streaming pass: levels, clipping, DC, spectrum, noise floor.

Cheap enough for multi-GB files: one read of the samples in chunks, a few vectorised
reductions per chunk, and a Welch spectrum from a bounded subsample of frames.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np
import scipy.fft
from numpy.lib.stride_tricks import sliding_window_view

from iqstat.capture import DEFAULT_CHUNK_SAMPLES, Capture, CorrectedCapture
from iqstat.noise import noise_floor_lowest_cluster
from iqstat.units import db

WELCH_FFT = 1024
WELCH_MAX_FRAMES = 1024  # frames averaged at most (≈ 1 M samples), spread over the capture
FLOOR_FRAME = 256  # samples per short-time power frame of the noise-floor estimate
FLOOR_MAX_FRAMES = 1 << 18  # frames the floor estimator sees at most
NEAR_FULL_SCALE = 0.99  # a component at or beyond 99 % of full scale counts as clipped
#: Clipping below full scale (a 12-bit converter in 16-bit words, a float stream limited
#: upstream): the largest |I|, |Q| level counts as a clip level when more than this fraction
#: of the components sit on it …
PILE_FRACTION = 1e-4
#: … and they outnumber, by this factor, those in the 1 % of amplitude just below it (a
#: saturating converter piles up the whole tail on one level; noise thins out towards its
#: largest values, and a noiseless constant-envelope signal's components thin out too).
PILE_RATIO = 3.0
PILE_BAND = 0.01
#: Samples per block of the per-sample passes (512 KB of complex64: stays in a core's L2
#: cache from one pass to the next); a multiple of FLOOR_FRAME.
_BLOCK = 1 << 16
OCCUPIED_FRACTION = 0.99  # occupied bandwidth: 99 % of the power above the noise floor


@dataclass(frozen=True)
class CaptureFacts:
    """What one pass over a capture tells, before any demodulation.

    Power figures are in dBFS: 0 dBFS is a full-scale complex sinusoid (|x|² = 1).
    """

    name: str
    datatype: str
    is_complex: bool
    num_channels: int
    channel: int
    sample_rate_hz: float
    center_frequency_hz: float | None
    samples: int
    duration_s: float
    start_datetime: str | None
    segments: int
    annotations: int
    mean_power_dbfs: float | None
    peak_power_dbfs: float | None
    crest_factor_db: float | None
    clipped_fraction: float | None
    clip_level_dbfs: float | None
    dc_offset_i: float
    dc_offset_q: float
    dc_offset_dbfs: float | None
    noise_floor_dbfs: float | None
    noise_psd_dbfs_per_hz: float | None
    occupied_bandwidth_hz: float | None
    occupied_center_hz: float | None
    nonfinite_samples: int
    leftover_bytes: int
    spectrum_freq_hz: tuple[float, ...]
    spectrum_dbfs_per_hz: tuple[float, ...]

    def to_dict(self, *, spectrum: bool = True) -> dict:
        d = asdict(self)
        for k, v in d.items():
            if isinstance(v, float) and not np.isfinite(v):
                d[k] = None
        d["spectrum_freq_hz"] = list(self.spectrum_freq_hz) if spectrum else None
        d["spectrum_dbfs_per_hz"] = list(self.spectrum_dbfs_per_hz) if spectrum else None
        return d


def _finite_db(x: float) -> float | None:
    return float(db(x)) if x > 0 and np.isfinite(x) else None


def compute_facts(capture: Capture, chunk_samples: int = DEFAULT_CHUNK_SAMPLES) -> CaptureFacts:
    """Measure a capture's facts in one streaming pass.

    Parameters
    ----------
    capture : Capture
    chunk_samples : int
        Samples per chunk (memory stays O(chunk_samples)).

    Notes
    -----
    The noise floor is the lowest cluster of 256-sample frame powers under their
    Gamma(256, 1/256) law (:func:`iqstat.noise.noise_floor_lowest_cluster`), so it is right
    even when bursts fill most of the capture. The occupied bandwidth is the band holding
    99 % of the spectral power that exceeds the noise floor (the 0.5 %-each-side method of
    ITU-R SM.328 applied to the excess), reported only when the excess is significant.
    :func:`iqstat.bursts.survey_capture` gives the same facts from the pass that also
    measures the frame powers of burst detection.
    """
    acc = FactsAccumulator(capture, chunk_samples)
    for start, x, bad, raw in iter_unscaled_chunks(capture, chunk_samples):
        acc.add(start, x, bad, raw)
    return acc.finish()


class FactsAccumulator:
    """Running sums of the facts pass: feed every chunk of :func:`iter_unscaled_chunks` in
    order with :meth:`add`, then :meth:`finish` returns the :class:`CaptureFacts`.

    Lets another streaming pass (burst detection's frame powers) share the one read of the
    samples; the figures equal :func:`compute_facts` exactly for the same chunk size.
    """

    def __init__(self, capture: Capture, chunk_samples: int = DEFAULT_CHUNK_SAMPLES) -> None:
        n = capture.n_samples
        self.capture = capture
        self.total_power = 0.0
        self.peak = 0.0
        self.dc = 0.0 + 0.0j
        self.n_bad = 0
        self.n_clip = 0
        self.frame_powers: list[np.ndarray] = []
        self.welch_stride = max(1, (n // WELCH_FFT) // WELCH_MAX_FRAMES)
        self.window = np.hanning(WELCH_FFT).astype(np.float32)
        self.psd_acc = np.zeros(WELCH_FFT)
        self.psd_frames = 0
        self.pw = np.empty(int(chunk_samples), dtype=np.float32)
        # Samples to skip at the start of a chunk so Welch frames stay on the global grid.
        self.carry = 0
        self.clip_lo, self.clip_hi, self.clip_radius = _clip_levels(capture.datatype)
        # Largest |component| so far (unscaled) and the counts at it and just below it.
        self.top = 0.0
        self.n_top_samples = 0
        self.n_top = 0
        self.n_near = 0
        self.integer = capture.datatype.is_integer and capture.datatype.is_complex

    def add(self, start: int, x: np.ndarray, bad: int, raw: np.ndarray | None) -> None:
        """Add chunk ``x`` (complex64, unscaled) starting at sample ``start``.

        ``bad`` counts its non-finite samples; ``raw`` holds its stored integer components,
        shape (len(x), 2), for the clipping count (None for float recordings).
        """
        m = len(x)
        self.n_bad += bad
        if m > self.pw.size:
            self.pw = np.empty(m, dtype=np.float32)
        n_frames = m // FLOOR_FRAME
        sums = np.empty(n_frames, dtype=np.float32)
        # The per-sample passes run block by block, so that each block's values stay in the
        # core's cache from one pass to the next (a 1 M-sample chunk is 8 MB).
        peak_abs = 0.0
        dc = 0.0 + 0.0j
        for b0 in range(0, m, _BLOCK):
            xb = x[b0 : b0 + _BLOCK]
            vb = xb.view(np.float32)
            # Peak |x|²: the largest float32 |x|, squared in float32 below (squaring is
            # monotone, so this equals the largest float32 |x|²).
            block_abs = float(np.abs(xb, out=self.pw[: xb.size]).max())
            peak_abs = max(peak_abs, block_abs)
            self._count_top(vb, block_abs)
            dc += complex(xb.sum())  # pairwise summation in complex64: ample for a mean
            f0, nb = b0 // FLOOR_FRAME, xb.size // FLOOR_FRAME
            if nb:
                # Σ|x|² per frame as one dot product of the interleaved [re, im] values.
                vf = vb[: 2 * nb * FLOOR_FRAME].reshape(nb, 2 * FLOOR_FRAME)
                np.einsum("ij,ij->i", vf, vf, out=sums[f0 : f0 + nb])
        self.dc += dc
        chunk_peak = float(np.square(np.float32(peak_abs))) if m else 0.0
        self.peak = max(self.peak, chunk_peak)
        # A component at the clipping level makes |x| at least that level: count only then
        # (with a margin for the float32 rounding of |x|²); most chunks never come near.
        if raw is not None and chunk_peak >= (self.clip_radius * (1 - 1e-5)) ** 2:
            hi, lo = self.clip_hi, self.clip_lo
            self.n_clip += int(np.count_nonzero(((raw >= hi) | (raw <= lo)).any(axis=1)))
        used = n_frames * FLOOR_FRAME
        self.last_frame_energy = None
        if n_frames:
            self.last_frame_energy = sums
            self.total_power += float(sums.sum(dtype=np.float64))
            self.frame_powers.append(sums / FLOOR_FRAME)
        if used < m:
            t = x[used:].view(np.float32)
            self.total_power += float(np.dot(t, t))
        first = start + self.carry
        step = WELCH_FFT * self.welch_stride
        count = max(0, (start + m - WELCH_FFT - first) // step + 1)
        if count:
            off = first - start
            # Frames every `step` samples: rows of a strided view (no gather).
            span = x[off : off + (count - 1) * step + WELCH_FFT]
            frames = sliding_window_view(span, WELCH_FFT)[::step]
            spec = scipy.fft.fft(frames * self.window, axis=1, overwrite_x=True)
            sv = spec.view(np.float32).reshape(count, 2 * WELCH_FFT)
            sq = np.square(sv, out=sv)
            self.psd_acc += sq.sum(axis=0).reshape(WELCH_FFT, 2).sum(axis=1)
            self.psd_frames += count
            # The next frame on the grid; one that starts here but runs past the chunk's end
            # is skipped (frames never straddle chunks).
            nxt = off + count * step - m
            self.carry = int(nxt + step if nxt < 0 else nxt)
        else:
            self.carry = max(0, self.carry - m)

    def _count_top(self, v: np.ndarray, abs_max: float = np.inf) -> None:
        """Track the largest |I|, |Q| and how many components sit on it and just below it.

        ``v`` holds components (float32) of consecutive samples, ``abs_max`` their samples'
        largest float32 |x| if known (no component exceeds it). Nothing to do when that is
        below the level so far (most blocks of an unclipped capture); else two reductions,
        and the counts where ``v`` reaches the level (every block of a clipped capture), on
        the components near it.
        """
        # |x| ≥ |I|, |Q|, also in float32 (a margin for its rounding).
        if abs_max * (1 + 1e-6) + (0.5 if self.integer else 1e-6 * abs_max) < self.top:
            return
        c = max(float(v.max()), -float(v.min()))
        tol = 0.5 if self.integer else 1e-6 * c  # half a step of the stored integers
        if c < self.top - tol:
            return
        if c > self.top + tol:
            self.top, self.n_top, self.n_near, self.n_top_samples = c, 0, 0, 0
        a = np.abs(v)
        # The components the counts below involve (both thresholds are at least this one,
        # also after rounding to float32), and their indices.
        idx = np.flatnonzero(a >= min(self.top - tol, self.top * (1.0 - PILE_BAND)))
        a = a[idx]
        at = a >= self.top - tol
        self.n_top += int(np.count_nonzero(at))
        s = idx[at] // 2  # sample of each component at the level (ascending)
        self.n_top_samples += int(s.size - np.count_nonzero(s[1:] == s[:-1]))
        near = (a >= self.top * (1.0 - PILE_BAND)) & ~at
        self.n_near += int(np.count_nonzero(near))

    def clip_pile(self) -> tuple[float | None, float | None]:
        """(fraction of samples on the clip level, the level [unscaled]) if the largest
        component level is a pile-up (see PILE_FRACTION, PILE_RATIO), else (None, None)."""
        n = self.capture.n_samples
        if (
            n
            and self.top > 0  # an all-zero recording has no clip level, only silence
            and self.n_top > PILE_FRACTION * 2 * n
            and self.n_top > PILE_RATIO * max(self.n_near, 1)
        ):
            return self.n_top_samples / n, self.top
        return None, None

    def finish(self) -> CaptureFacts:
        """The facts of the chunks added (all of the capture's, in order)."""
        capture = self.capture
        n = capture.n_samples
        fs = capture.sample_rate_hz
        # Integer chunks were left unscaled (saves a multiply per sample): scale the sums now.
        sc = unscaled_factor(capture)
        total_power = self.total_power * (sc * sc)
        peak = self.peak * (sc * sc)
        psd_acc = self.psd_acc * (sc * sc)
        mean_power = total_power / n
        dc = self.dc * sc / n
        clipped = self.n_clip / n if capture.datatype.is_integer else None
        clip_level = None
        if clipped:
            clip_level = 0.0  # at full scale
        else:
            # Below full scale, or any float recording: a pile-up at the largest level.
            pile, level = self.clip_pile()
            if pile is not None:
                clipped, clip_level = pile, float(db((level * sc) ** 2))  # 20·log10 |c|
        psd_frames = self.psd_frames
        window = self.window
        floor = None
        if self.frame_powers:
            fp = np.concatenate(self.frame_powers)
            # Robust to bursts filling most of the capture (see iqstat.noise).
            # Long captures: join frames so the estimator sees at most FLOOR_MAX_FRAMES of
            # them (its fixed-point iterations scan every value; gaps of a few ms remain
            # resolved).
            k = max(1, -(-len(fp) // FLOOR_MAX_FRAMES))
            if k > 1:
                fp = fp[: len(fp) // k * k].reshape(-1, k).mean(axis=1)
            floor = sc * sc * noise_floor_lowest_cluster(fp, FLOOR_FRAME * k)
        freqs = np.fft.fftshift(np.fft.fftfreq(WELCH_FFT, 1.0 / fs))
        psd = np.zeros(WELCH_FFT)
        occ_bw = occ_center = None
        psd_floor = None
        if psd_frames:
            # Density scaling: Σ|X|² / (fs·Σw²) so that ∫ psd df = mean power.
            psd = np.fft.fftshift(psd_acc / psd_frames) / (fs * float((window**2).sum()))
            # Noise level of the spectrum: the median bin (the signal of a narrowband link holds
            # far fewer than half the bins of the capture band).
            psd_floor = float(np.median(psd))
            occ_bw, occ_center = _occupied_band(freqs, psd, psd_floor, fs, psd_frames)
        noise_psd = floor / fs if floor else None
        return CaptureFacts(
            name=capture.name,
            datatype=capture.datatype.name,
            is_complex=capture.is_complex,
            num_channels=capture.num_channels,
            channel=capture.channel,
            sample_rate_hz=fs,
            center_frequency_hz=capture.center_frequency_hz,
            samples=n,
            duration_s=capture.duration_s,
            start_datetime=capture.start_datetime,
            segments=len(capture.segments),
            annotations=len(capture.annotations),
            mean_power_dbfs=_finite_db(mean_power),
            peak_power_dbfs=_finite_db(peak),
            crest_factor_db=_finite_db(peak / mean_power) if mean_power > 0 else None,
            clipped_fraction=clipped,
            clip_level_dbfs=clip_level,
            dc_offset_i=float(dc.real),
            dc_offset_q=float(dc.imag),
            dc_offset_dbfs=_finite_db(abs(dc) ** 2),
            noise_floor_dbfs=_finite_db(floor) if floor else None,
            noise_psd_dbfs_per_hz=_finite_db(noise_psd) if noise_psd else None,
            occupied_bandwidth_hz=occ_bw,
            occupied_center_hz=occ_center,
            nonfinite_samples=self.n_bad,
            leftover_bytes=capture.leftover_bytes,
            spectrum_freq_hz=tuple(float(f) for f in freqs),
            spectrum_dbfs_per_hz=tuple(float(v) for v in db(np.maximum(psd, 1e-30))),
        )


def unscaled_factor(capture: Capture) -> float:
    """Factor from the samples of :func:`iter_unscaled_chunks` to full scale (a power of 2)."""
    dt = capture.datatype
    return dt.scale if (dt.is_integer and dt.is_complex) else 1.0


def _clip_levels(dt) -> tuple[float, float, float]:
    """Stored-value levels at or beyond which a component counts as clipped, and the least
    |x| (unscaled, offset removed) a sample with such a component has."""
    if not (dt.is_integer and dt.is_complex):
        return -np.inf, np.inf, np.inf
    span = dt.full_scale_max - dt.full_scale_min
    lo = dt.full_scale_min + (1 - NEAR_FULL_SCALE) * span / 2
    hi = dt.full_scale_max - (1 - NEAR_FULL_SCALE) * span / 2
    return lo, hi, min(hi - dt.offset, dt.offset - lo)


def iter_unscaled_chunks(capture: Capture, chunk_samples: int = DEFAULT_CHUNK_SAMPLES):
    """Yield ``(start, samples, n_nonfinite, raw)`` chunks of a whole capture, in order.

    Complex integer recordings are read from their stored components and converted to
    complex64 without the final scaling (multiply by :func:`unscaled_factor`, a power of two,
    so that results equal those on scaled samples exactly); ``raw`` is then the stored
    components, shape (n, 2), for counting clipped samples. A corrected capture
    (:class:`iqstat.capture.CorrectedCapture`: lines cancelled, gain steps undone) yields its
    corrected samples; ``raw`` stays the stored components. Other types use the capture's
    ordinary conversion (which also counts non-finite values) and ``raw`` is None. The
    yielded arrays are reused buffers.
    """
    dt = capture.datatype
    if not (dt.is_integer and dt.is_complex):
        for start, x, bad in capture.iter_chunks_counted(chunk_samples):
            yield start, x, bad, None
        return
    buf = np.empty((int(chunk_samples), 2), dtype=np.float32)
    fix = capture.correct_unscaled if isinstance(capture, CorrectedCapture) else None
    for start, raw in capture.iter_raw_chunks(chunk_samples):
        b = buf[: len(raw)]
        np.copyto(b, raw, casting="unsafe")
        if dt.offset:
            b -= np.float32(dt.offset)
        x = b.reshape(-1).view(np.complex64)
        if fix is not None:
            fix(start, x, dt.scale)
        yield start, x, 0, raw


def _occupied_band(freqs, psd, psd_floor, fs, n_frames) -> tuple[float | None, float | None]:
    # A Welch average of K frames fluctuates by about 1/sqrt(K) relative per bin: only bins
    # clearly above the floor (4 such deviations) count as occupied.
    significant = psd > psd_floor * (1.0 + 4.0 / np.sqrt(n_frames))
    excess = np.where(significant, psd - psd_floor, 0.0)
    df = fs / len(psd)
    total = excess.sum() * df
    if not significant.any() or total <= 0.01 * psd_floor * fs:
        return None, None
    c = np.cumsum(excess) * df
    lo_i = int(np.searchsorted(c, (1 - OCCUPIED_FRACTION) / 2 * total))
    hi_i = int(np.searchsorted(c, (1 + OCCUPIED_FRACTION) / 2 * total))
    hi_i = min(hi_i, len(freqs) - 1)
    bw = float(freqs[hi_i] - freqs[lo_i] + df)
    return bw, float((freqs[hi_i] + freqs[lo_i]) / 2)
