"""The streaming pass: per-frame full-band and in-band mean powers, and per-frame sums.

One pass over the samples, chunk by chunk, measures per frame of L samples the mean power in the
full band, the mean in-band power (a partial DFT of the frame, rectangular window, so that under
white noise it is exactly Gamma distributed with shape |B|, the number of band bins [1]_) and the
frame's sum Σx (DFT bin 0, for the receiver's DC offset). Narrow bands take the bins with one
float32 matrix product, wide ones a full FFT. Memory: the per-frame arrays plus one chunk.

References
----------
.. [1] S. M. Kay, Fundamentals of Statistical Signal Processing, Vol. II: Detection Theory,
   Prentice Hall, 1998, §2.2 [mem].
"""

from __future__ import annotations

import math

import numpy as np

from iqstat.bursts.band import _band_edges, _bins_for_band
from iqstat.bursts.results import FramePowers
from iqstat.capture import DEFAULT_CHUNK_SAMPLES, Capture
from iqstat.facts import iter_unscaled_chunks, unscaled_factor

# Use a matrix product for the in-band DFT bins when they are at most this fraction of the
# frame's bins, else a full FFT (the product is cheaper for narrow bands).
_MATMUL_MAX_BIN_FRACTION = 1.0 / 6.0


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
        self.sums = np.empty(self.n_frames, dtype=np.complex64)  # 8 bytes per frame
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
