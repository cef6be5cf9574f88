"""The tone templates of the bank: their phasors and their Gram matrix over one symbol.

Owns :func:`unit_phasors` (exp(j2π·c) with the phase reduced modulo one cycle first),
:func:`tone_phasors` (exp(−j2π·c_i·m) as the outer product of two tables of length ≈ √n),
and :func:`template_gram`, the Gram matrix R of the unit-energy templates with the centre
phase reference of :mod:`iqstat.correlate.bank`: a real Dirichlet kernel per tone pair,
R[i, j] = sin(NΔω/2)/(N·sin(Δω/2)), mixed over the ⌊P⌋- and ⌈P⌉-sample symbols, cached per
(tone differences, period, rate) so bursts of one link share it.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Sequence

import numpy as np

from iqstat.correlate.inputs import _check_period, _check_rate, check_tone_freqs

__all__ = ["unit_phasors", "tone_phasors", "template_gram"]


def unit_phasors(cycles: np.ndarray) -> np.ndarray:
    """exp(j2π·c) for an array of phases c in cycles, complex128, same shape.

    The phase is reduced modulo one cycle before it is scaled by 2π (so a phase of 1e4
    cycles keeps its 1e-16 relative rounding), and the phasor is built from cos and sin
    (numpy's vectorised float64 kernels, cheaper than the complex exponential).
    """
    ph = np.mod(cycles, 1.0)
    ph *= 2.0 * np.pi
    out = np.empty(ph.shape, dtype=np.complex128)
    np.cos(ph, out=out.real)
    np.sin(ph, out=out.imag)
    return out


def tone_phasors(cycles_per_sample: np.ndarray, n_samples: int) -> np.ndarray:
    """exp(−j2π·c_i·m) for m = 0..n−1 and every c_i, complex128, shape (M, n_samples).

    Parameters
    ----------
    cycles_per_sample : array_like of float, shape (M,)
        Frequencies as cycles per sample, f_i/fs.
    n_samples : int
        Length n of each row.

    Notes
    -----
    Built as the outer product of two short tables, one for m = q·L (the block starts) and
    one for m = 0..L−1 within a block, L ≈ √n: e^{−j2πc(qL + l)} = e^{−j2πcqL}·e^{−j2πcl}.
    Each table entry is the exponential of a phase reduced modulo one cycle *before* it is
    scaled by 2π, as evaluating every sample directly would be, so the phase error is the
    rounding of c·m (about 1e-16·c·n cycles) plus one complex product (~3e-16), as good as
    direct evaluation; and it costs 2√n exponentials instead of n (a complex exponential
    costs ~50 times a complex multiply).
    """
    c = np.atleast_1d(np.asarray(cycles_per_sample, dtype=np.float64))
    n = int(n_samples)
    block = max(1, math.isqrt(max(n, 1)))
    n_blocks = -(-n // block)
    within = np.exp(-2j * np.pi * np.mod(c[:, None] * np.arange(block), 1.0))
    starts = np.exp(-2j * np.pi * np.mod(c[:, None] * (np.arange(n_blocks) * block), 1.0))
    out = starts[:, :, None] * within[:, None, :]
    return out.reshape(c.size, n_blocks * block)[:, :n]


def template_gram(
    tone_freqs_hz: Sequence[float], period_samples: float, sample_rate_hz: float
) -> np.ndarray:
    """Gram matrix of the unit-energy tone templates over one symbol.

    Parameters
    ----------
    tone_freqs_hz : sequence of float, length M
        Tone frequencies [Hz].
    period_samples : float
        Symbol period P [samples]; an integer gives the exact Gram of an N-sample symbol.
    sample_rate_hz : float
        Sample rate fs [Hz].

    Returns
    -------
    ndarray of complex128, shape (M, M)
        R[i, j] = Σ_n conj(t_i[n])·t_j[n], Hermitian (real here, see Notes), R[i, i] = 1.
        A unit-amplitude signal on tone j gives z = R[:, j]; the noise covariance of z is
        N0·R.

    Notes
    -----
    With the centre phase reference of :func:`correlate_symbols`, for an N-sample symbol and
    Δω = 2π(f_j − f_i)/fs,

        R[i, j] = (1/N) Σ_{m=0}^{N-1} exp(jΔω(m − (N−1)/2)) = sin(NΔω/2) / (N·sin(Δω/2)),  (1)

    a real Dirichlet kernel, which tends to sinc(Δf·T) for many samples per symbol: |ρ| = 0
    for h = 1 and 2/π for h = 1/2 [1]_. For a fractional P the symbols have ⌊P⌋ or ⌈P⌉
    samples, a fraction P − ⌊P⌋ of them the longer; the matrix returned is that mix of the
    two exact Gram matrices.

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008,
       §4.5 (correlation of FSK tones) [mem]; METHODS.md §1.
    """
    fs = _check_rate("sample_rate_hz", sample_rate_hz)
    f = check_tone_freqs(tone_freqs_hz, fs)
    p = _check_period(period_samples)
    # R depends on the tone differences only (the carrier offset cancels in conj(t_i)·t_j):
    # bursts of one link share it, so it is kept per (differences, period, rate).
    diffs = tuple(float(v) for v in np.round(f - f[0], 6))
    return _gram_of_differences(diffs, p, fs).copy()


@functools.lru_cache(maxsize=256)
def _gram_of_differences(diffs: tuple, p: float, fs: float) -> np.ndarray:
    """:func:`template_gram` of tones at ``diffs`` [Hz] from the first one."""
    f = np.array(diffs)
    n_lo = math.floor(p)
    frac = p - n_lo

    def exact(n: int) -> np.ndarray:
        m = np.arange(n) - (n - 1) / 2.0
        t = np.exp(1j * np.outer(2.0 * np.pi * f / fs, m)) / math.sqrt(n)
        return t.conj() @ t.T  # eq. (1), evaluated as the sum it is

    r = exact(n_lo) if frac < 1e-12 else (1.0 - frac) * exact(n_lo) + frac * exact(n_lo + 1)
    r = 0.5 * (r + r.conj().T)
    r.flags.writeable = False
    return r
