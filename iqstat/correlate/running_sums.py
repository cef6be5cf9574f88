"""Full-rate running sums of each burst mixed down by each tone, and interval energies from them.

Owns :func:`mix_cumulative` and :func:`mix_cumulative_many`,
S[i, n] = Σ_{m<n} x[m]·exp(−j2πf_i m/fs) with S[i, 0] = 0, a batch held in one padded
(B, M, W) buffer (:func:`batch_buffer` recognises its views or builds one), and
:func:`interval_energies`, |S[b_{k+1}] − S[b_k]|²/N_k for any intervals, which the timing
search and the bank (eq. (2) of :func:`~iqstat.correlate.bank.correlate_symbols`) read.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from iqstat.correlate.inputs import _check_rate, _check_tone_list, check_samples
from iqstat.correlate.templates import unit_phasors
from iqstat.errors import ParameterError

__all__ = ["mix_cumulative", "mix_cumulative_many", "batch_buffer", "interval_energies"]


def _phasor_block(n_max: int) -> tuple[int, int]:
    """Block length L ≈ √n and block count Q (Q·L >= n) of the phasor tables."""
    block = max(1, math.isqrt(max(n_max, 1)))
    return block, -(-max(n_max, 1) // block)


def mix_cumulative(
    x: np.ndarray, sample_rate_hz: float, tone_freqs_hz: Sequence[float]
) -> np.ndarray:
    """Running sums of x mixed down by each tone, for fast interval correlations.

    Parameters
    ----------
    x : ndarray, shape (n_samples,)
    sample_rate_hz : float
    tone_freqs_hz : sequence of float, length M

    Returns
    -------
    ndarray of complex128, shape (M, n_samples + 1)
        S[i, n] = Σ_{m<n} x[m]·exp(−j2πf_i m/fs); S[i, 0] = 0. The correlation of samples
        a..b−1 with tone i has magnitude |S[i, b] − S[i, a]| (phase referenced to x[0]).
        Pass it to :func:`correlate_symbols` and :func:`~iqstat.sync.recover_timing` as
        ``cumulative=`` to mix a burst once for both.
    """
    return mix_cumulative_many([x], sample_rate_hz, [tone_freqs_hz])[0]


def mix_cumulative_many(
    xs: Sequence[np.ndarray],
    sample_rate_hz: float,
    tone_freqs_list: Sequence[Sequence[float]],
) -> list[np.ndarray]:
    """:func:`mix_cumulative` of a batch of bursts, one padded buffer for all.

    Parameters
    ----------
    xs : sequence of B ndarrays, shapes (n_b,)
        The bursts' samples (ragged).
    sample_rate_hz : float
        Sample rate fs [Hz].
    tone_freqs_list : sequence of B sequences of float
        Each burst's tones [Hz]; the same count M for every burst.

    Returns
    -------
    list of B ndarrays of complex128, shapes (M, n_b + 1)
        S_b[i, n] = Σ_{m<n} x_b[m]·exp(−j2πf_{b,i} m/fs), S_b[i, 0] = 0. Each is a view
        ``buf[b, :, :n_b + 1]`` of one (B, M, W) buffer (W >= max n_b + 1, the sums held
        constant past each burst's end); :func:`~iqstat.sync.recover_timing_many` and
        :func:`correlate_symbols_many` recognise such views and gather from the buffer in
        one call. Peak temporaries: none beyond the buffer (the mixing and the running sums
        are done in place).

    Notes
    -----
    The phasors e^{−j2πc(qL + l)} = e^{−j2πcqL}·e^{−j2πcl} are built as the outer product of
    two short tables per burst and tone (L ≈ √n, see :func:`tone_phasors`), written straight
    into the buffer; each burst is then multiplied in (one call per burst, the rows being
    ragged) and the running sums taken along the buffer's last axis in one call.
    """
    fs = _check_rate("sample_rate_hz", sample_rate_hz)
    if len(tone_freqs_list) != len(xs):
        raise ParameterError(
            f"xs has {len(xs)} bursts but tone_freqs_list has {len(tone_freqs_list)} entries; "
            "give one tone list per burst"
        )
    if len(xs) == 0:
        return []
    arrays = [check_samples(x) for x in xs]
    freqs = _check_tone_list(tone_freqs_list, fs)
    n_b, m = freqs.shape
    n = np.array([a.size for a in arrays])
    block, n_blocks = _phasor_block(int(n.max()))
    buf = np.empty((n_b, m, 1 + n_blocks * block), dtype=np.complex128)
    buf[:, :, 0] = 0.0
    body = buf[:, :, 1:].reshape(n_b, m, n_blocks, block)  # a view: the last axis is split
    c = freqs / fs
    within = unit_phasors(-c[:, :, None] * np.arange(block))
    starts = unit_phasors(-c[:, :, None] * (np.arange(n_blocks) * block))
    np.multiply(starts[:, :, :, None], within[:, :, None, :], out=body)
    flat = buf[:, :, 1:]
    for b, a in enumerate(arrays):  # ragged rows: one product (and one fill) per burst
        flat[b, :, : a.size] *= a
        flat[b, :, a.size :] = 0.0
    np.cumsum(flat, axis=2, out=flat)
    return [buf[b, :, : a.size + 1] for b, a in enumerate(arrays)]


def batch_buffer(
    cumulatives: Sequence[np.ndarray], n_tones: int, n_samples: Sequence[int]
) -> tuple[np.ndarray, np.ndarray]:
    """One (R, M, W) buffer holding every burst's running sums, and each burst's row in it.

    ``cumulatives[b] == buf[rows[b], :, :n_b + 1]``, and ``buf[rows[b], :, n_b + 1:]`` holds
    the last sum (no samples past the end). Views made by :func:`mix_cumulative_many` are
    used in place (no copy); other arrays are validated and copied into a new buffer laid
    out as :func:`mix_cumulative_many` would lay it out.
    """
    pairs = zip(cumulatives, n_samples, strict=True)
    cums = [_check_cumulative(c, n_tones, int(k)) for c, k in pairs]
    base = cums[0].base
    if (
        isinstance(base, np.ndarray)
        and base.ndim == 3
        and base.flags.c_contiguous
        and base.dtype == np.complex128
        and base.shape[1] == n_tones
        and all(c.base is base and c.strides == base.strides[1:] for c in cums)
    ):
        step = base.strides[0]
        origin = base.__array_interface__["data"][0]
        offs = [c.__array_interface__["data"][0] - origin for c in cums]
        if all(o % step == 0 for o in offs):
            return base, np.array([o // step for o in offs], dtype=np.int64)
    n_max = max(int(k) for k in n_samples)
    block, n_blocks = _phasor_block(n_max)
    buf = np.empty((len(cums), n_tones, 1 + n_blocks * block), dtype=np.complex128)
    for b, (c, k) in enumerate(zip(cums, n_samples, strict=True)):  # copies: arrays made one by one
        buf[b, :, : k + 1] = c
        buf[b, :, k + 1 :] = c[:, -1:]
    return buf, np.arange(len(cums), dtype=np.int64)


def _check_cumulative(cumulative: np.ndarray, n_tones: int, n_samples: int) -> np.ndarray:
    """Validate a :func:`mix_cumulative` result passed in by a caller."""
    c = np.asarray(cumulative)
    if c.shape != (n_tones, n_samples + 1) or c.dtype != np.complex128:
        raise ParameterError(
            f"cumulative has shape {c.shape} and dtype {c.dtype}; pass mix_cumulative(x, fs, "
            f"tones) of the same x and tones, shape ({n_tones}, {n_samples + 1}) complex128"
        )
    return c


def interval_energies(
    cumulative: np.ndarray, boundaries: np.ndarray, *, tones_first: bool = False
) -> np.ndarray:
    """Branch energies |z|² of consecutive intervals from :func:`mix_cumulative` sums.

    Parameters
    ----------
    cumulative : ndarray, shape (M, n_samples + 1)
    boundaries : ndarray of int, shape (..., n_symbols + 1)
        Interval k is samples boundaries[..., k] .. boundaries[..., k+1] − 1 (all within
        0..n_samples, strictly increasing).
    tones_first : bool
        Return the tone axis first, shape (M, ..., n_symbols). Reductions over the tones
        (max, mean, argmax) then run across contiguous rows: numpy reduces a length-2 last
        axis ~60× slower than it takes the elementwise maximum of two rows.

    Returns
    -------
    ndarray of float64, shape (..., n_symbols, M), or (M, ..., n_symbols) with tones_first
        |S[b_{k+1}] − S[b_k]|² / N_k: the energies :func:`correlate_symbols` gives.
    """
    b = np.asarray(boundaries)
    nk = np.diff(b, axis=-1)
    m = cumulative.shape[0]
    out = np.empty((m,) + nk.shape) if tones_first else np.empty(nk.shape + (m,))
    for i, row in enumerate(cumulative):  # M <= 4 tones, one gather each
        s = row[b]
        d = s[..., 1:] - s[..., :-1]
        e = d.real**2
        e += d.imag**2
        np.divide(e, nk, out=out[i] if tones_first else out[..., i])
    return out
