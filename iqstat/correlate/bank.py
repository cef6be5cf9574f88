"""Quadrature correlator bank of a noncoherent receiver: complex outputs per symbol and tone.

For every symbol k of a timing grid and every tone i the bank correlates the received samples
over the symbol's interval with a unit-energy complex exponential at the tone frequency. The
outputs z[k, i] are what the fit models: the matched branch has mean √Es·e^{jθ_k}, the noise
has E|n|² = N0 (the noise variance per complex sample) in every branch.

Owns the symbol grid (:func:`symbol_boundaries`), the bank itself (:func:`correlate_symbols`,
:func:`correlate_symbols_many`: from the samples, from running sums or from block sums) and
:func:`branch_energies`.

Symbol intervals (the choice made here and why)
-----------------------------------------------
Symbol k holds the samples n with ``t0 + k·P <= n < t0 + (k+1)·P`` (sample n at time n, the
convention of :mod:`iqstat.synth`). Each sample is *assigned whole* to the symbol whose
interval holds it; the boundaries ``b_k = ceil(t0 + k·P)`` are rounded per symbol from the
exact fractional grid, so there is no accumulated drift, and a symbol has N_k = b_{k+1} − b_k
samples (⌊P⌋ or ⌈P⌉, mean exactly P). Each symbol is normalised by its own template energy.
Whole assignment was chosen over fractional boundary weights because a sampled modulator puts
every sample in exactly one symbol: at the true timing no sample of a neighbour leaks in, the
noise of adjacent symbols stays independent (the fit assumes that), and the mean matched
energy over a burst is exactly C·P, the synthetic-truth convention (METHODS §0).

Phase reference
---------------
Symbol k's template for tone i is t_ki[n] = exp(j2πf_i(n − c_k)/fs)/√N_k with c_k the centre
of its samples, c_k = b_k + (N_k − 1)/2. With that reference the Gram matrix of the templates
over a symbol is real (a Dirichlet kernel per pair of tones) and the same for every symbol up
to the ⌊P⌋/⌈P⌉ length difference (below 2e-4 in |ρ| at 52 samples per symbol), so the model
z_k = A·e^{jθ_k}·R[:, i_k] + n_k, n_k ~ CN(0, N0·R) holds with one R. The phase of z[k, i] is
the phase of tone i at time c_k.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from iqstat.correlate.block_sums import BlockSums, _bank_from_blocks
from iqstat.correlate.inputs import _check_period, _check_rate, _check_tone_list, check_samples
from iqstat.correlate.running_sums import batch_buffer
from iqstat.correlate.templates import unit_phasors
from iqstat.errors import ParameterError

__all__ = ["symbol_boundaries", "correlate_symbols", "correlate_symbols_many", "branch_energies"]

#: Symbols processed per block in :func:`correlate_symbols` (bounds the padded work array).
_BLOCK_SYMBOLS = 4096


def symbol_boundaries(t0_samples: float, period_samples: float, n_symbols: int) -> np.ndarray:
    """First sample of each symbol and one past the last: b_k = ceil(t0 + k·P), k = 0..n.

    Parameters
    ----------
    t0_samples : float
        Start of symbol 0 [samples, fractional], relative to x[0].
    period_samples : float
        Symbol period P [samples, fractional].
    n_symbols : int
        Number of symbols n.

    Returns
    -------
    ndarray of int64, shape (n_symbols + 1,)
        Symbol k holds samples ``b[k] .. b[k+1] - 1``.
    """
    k = np.arange(int(n_symbols) + 1, dtype=np.float64)
    return np.ceil(float(t0_samples) + k * float(period_samples)).astype(np.int64)


def correlate_symbols(
    x: np.ndarray,
    sample_rate_hz: float,
    tone_freqs_hz: Sequence[float],
    t0_samples: float,
    period_samples: float,
    n_symbols: int,
    *,
    cumulative: np.ndarray | None = None,
) -> np.ndarray:
    """Complex correlator outputs of every symbol on every tone, unit-energy templates.

    Parameters
    ----------
    x : ndarray, shape (n_samples,)
        Complex baseband samples (full scale ±1).
    sample_rate_hz : float
        Sample rate fs [Hz].
    tone_freqs_hz : sequence of float, length M
        Tone frequencies relative to the capture centre [Hz], lowest first (one for OOK).
    t0_samples : float
        Start of symbol 0 [samples, fractional]; needs ``ceil(t0) >= 0``.
    period_samples : float
        Symbol period P in receiver samples (fractional, clock offset included), P >= 1.
    n_symbols : int
        Number of symbols; symbol n−1 must end inside x (``t0 + n·P <= n_samples``).
    cumulative : ndarray, shape (M, n_samples + 1), optional
        :func:`mix_cumulative` of the same x and tones (as passed to
        :func:`~iqstat.sync.recover_timing`): the sums are then differences of it, eq. (2),
        instead of products with the templates (the same values to ~1e-12 relative).

    Returns
    -------
    ndarray of complex128, shape (n_symbols, M)
        z[k, i] = Σ_n x[n]·conj(t_ki[n]) over symbol k's samples.

    Notes
    -----
    Symbol k holds samples b_k <= n < b_{k+1}, b_k = ceil(t0 + k·P) (whole-sample assignment,
    see the module docstring), N_k = b_{k+1} − b_k and c_k = b_k + (N_k − 1)/2. The template
    is t_ki[n] = exp(j2πf_i(n − c_k)/fs)/√N_k, of unit energy, so

        z[k, i] = N_k^{-1/2} Σ_{n=b_k}^{b_{k+1}-1} x[n]·exp(−j2πf_i(n − c_k)/fs).      (1)

    White noise of variance σ² per sample gives E|z|² = σ² in every branch; a tone of power C
    at f_i gives |z[k, i]|² = C·N_k. The samples of all symbols are gathered into one
    zero-padded (n_symbols, max N_k) array and multiplied by the (max N_k, M) table of
    conjugate templates: no loop over symbols. With the running sums
    S[i, n] = Σ_{m<n} x[m]·exp(−j2πf_i m/fs) the same sum is

        z[k, i] = N_k^{-1/2}·(S[i, b_{k+1}] − S[i, b_k])·exp(j2πf_i c_k/fs),             (2)

    the phase of c_k reduced modulo one cycle before scaling by 2π.
    """
    return correlate_symbols_many(
        [x],
        sample_rate_hz,
        [tone_freqs_hz],
        [t0_samples],
        [period_samples],
        [n_symbols],
        cumulatives=None if cumulative is None else [cumulative],
    )[0]


def _check_grid(t0_samples, period_samples, n_symbols, n_samples: int) -> tuple:
    """Validate one symbol grid against a burst of n_samples; return (t0, P, n, b)."""
    p = _check_period(period_samples)
    try:
        t0 = float(t0_samples)
    except (TypeError, ValueError):
        raise ParameterError(f"t0_samples {t0_samples!r} is not a number") from None
    if not math.isfinite(t0):
        raise ParameterError(f"t0_samples {t0_samples!r} must be finite")
    if isinstance(n_symbols, bool) or int(n_symbols) != n_symbols or n_symbols < 0:
        raise ParameterError(f"n_symbols {n_symbols!r} must be a non-negative integer")
    n_sym = int(n_symbols)
    b = symbol_boundaries(t0, p, n_sym)
    if b[0] < 0:
        raise ParameterError(
            f"t0_samples {t0_samples!r} starts before x[0]; use t0 > -1 (shift by whole periods)"
        )
    if b[-1] > n_samples:
        raise ParameterError(
            f"n_symbols {n_sym} with t0 {t0:g} and period {p:g} needs {int(b[-1])} samples but "
            f"x has {n_samples}; use n_symbols <= {max(0, math.floor((n_samples - t0) / p))}"
        )
    return t0, p, n_sym, b


def correlate_symbols_many(
    xs: Sequence[np.ndarray],
    sample_rate_hz: float,
    tone_freqs_list: Sequence[Sequence[float]],
    t0s_samples: Sequence[float],
    periods_samples: Sequence[float],
    n_symbols_list: Sequence[int],
    *,
    cumulatives: Sequence[np.ndarray] | None = None,
    blocks: BlockSums | None = None,
) -> list[np.ndarray]:
    """:func:`correlate_symbols` of a batch of bursts, in a fixed number of numpy calls.

    Parameters
    ----------
    xs : sequence of B ndarrays, shapes (n_b,)
        The bursts' samples (ragged).
    sample_rate_hz : float
        Sample rate fs [Hz], common to the batch.
    tone_freqs_list : sequence of B sequences of float
        Each burst's tones [Hz], lowest first; all bursts of a batch have the same count M.
    t0s_samples, periods_samples, n_symbols_list : sequences of length B
        Each burst's grid (see :func:`correlate_symbols`).
    cumulatives : sequence of B ndarrays, optional
        :func:`mix_cumulative_many` of the same bursts and tones (or one
        :func:`mix_cumulative` per burst): the sums are then differences of it, eq. (2) of
        :func:`correlate_symbols`.
    blocks : BlockSums, optional
        :func:`mix_blocks_many` of the same bursts and tones: each boundary's running sum is
        the block-start sum plus the at most L − 1 samples from there to the boundary, eq. (3)
        (complex64 products for complex64 samples, ~1e-7 relative).

    Returns
    -------
    list of B ndarrays of complex128, shapes (n_symbols_b, M)
        The same numbers :func:`correlate_symbols` gives for each burst alone.

    Notes
    -----
    With running sums, all bursts' symbol boundaries are gathered at once from the batch's
    padded sum buffer, one gather per tone. Without them, the symbols of all bursts are
    gathered into one zero-padded (symbols × max N_k) array, multiplied per burst (a stacked
    matmul) by that burst's (max N_k, M) table of conjugate templates, eq. (1). With block
    sums S_q (blocks of L samples) the running sum at a boundary b = qL + ρ, 0 <= ρ < L, is

        S(b) = S_q + e^{−jω_i qL}·Σ_{l<ρ} x[qL + l]·e^{−jω_i l},                         (3)

    one gather of L samples per boundary and a small matrix product per burst.
    """
    fs = _check_rate("sample_rate_hz", sample_rate_hz)
    n_b = len(xs)
    if (
        not (len(tone_freqs_list) == len(t0s_samples) == len(periods_samples) == n_b)
        or len(n_symbols_list) != n_b
    ):
        raise ParameterError(
            f"xs has {n_b} bursts but tone_freqs_list, t0s_samples, periods_samples and "
            "n_symbols_list have "
            f"{[len(tone_freqs_list), len(t0s_samples), len(periods_samples), len(n_symbols_list)]}"
            " entries; give one of each per burst"
        )
    if n_b == 0:
        return []
    arrays = [check_samples(x) for x in xs]
    freqs = _check_tone_list(tone_freqs_list, fs)
    m = freqs.shape[1]
    grids = [
        _check_grid(t, p, k, a.size)
        for t, p, k, a in zip(t0s_samples, periods_samples, n_symbols_list, arrays, strict=True)
    ]
    counts = np.array([g[2] for g in grids], dtype=np.int64)
    offs = np.concatenate([[0], np.cumsum(counts)])
    total = int(offs[-1])
    bnd = [g[3] for g in grids]
    if total == 0:
        return [np.empty((0, m), dtype=np.complex128) for _ in range(n_b)]
    burst_of = np.repeat(np.arange(n_b), counts)  # burst of each symbol, all bursts in a row
    starts = np.concatenate([b[:-1] for b in bnd])
    nk = np.concatenate([np.diff(b) for b in bnd])
    out = np.empty((total, m), dtype=np.complex128)
    if blocks is not None:
        _bank_from_blocks(blocks, arrays, freqs / fs, bnd, offs, out)
        return [out[offs[i] : offs[i + 1]] for i in range(n_b)]
    if cumulatives is not None:
        if len(cumulatives) != n_b:
            raise ParameterError(
                f"cumulatives has {len(cumulatives)} entries for {n_b} bursts; give one each"
            )
        buf, rows = batch_buffer(cumulatives, m, [a.size for a in arrays])
        width = buf.shape[2]
        flat = buf.reshape(-1)
        base = (rows[burst_of] * m * width)[:, None] + width * np.arange(m)[None, :]
        s0 = flat[base + starts[:, None]]
        d = flat[base + (starts + nk)[:, None]]
        d -= s0
        centre = starts + (nk - 1) / 2.0
        d *= unit_phasors(freqs[burst_of] / fs * centre[:, None])  # eq. (2)
        d /= np.sqrt(nk)[:, None]
        out[:] = d
        return [out[offs[i] : offs[i + 1]] for i in range(n_b)]
    n_max = int(nk.max())
    mm = np.arange(n_max)
    # Template tables (B, max N_k, M) and the centre offsets (N_k − 1)/2: eq. (1).
    w = 2.0 * np.pi * freqs / fs  # (B, M)
    tables = np.exp(-1j * mm[None, :, None] * w[:, None, :])
    x_all = np.concatenate(arrays)
    x_off = np.concatenate([[0], np.cumsum([a.size for a in arrays])])
    for k0 in range(0, total, _BLOCK_SYMBOLS):  # blocks of thousands of symbols, not bursts
        k1 = min(total, k0 + _BLOCK_SYMBOLS)
        nb = nk[k0:k1]
        bo = burst_of[k0:k1]
        idx = (x_off[bo] + starts[k0:k1])[:, None] + mm[None, :]
        seg = x_all[np.minimum(idx, x_all.size - 1)].astype(np.complex128)
        seg[mm[None, :] >= nb[:, None]] = 0.0
        z = np.matmul(seg[:, None, :], tables[bo])[:, 0, :]
        z *= np.exp(1j * ((nb - 1) / 2.0)[:, None] * w[bo])
        z /= np.sqrt(nb)[:, None]
        out[k0:k1] = z
    return [out[offs[i] : offs[i + 1]] for i in range(n_b)]


def branch_energies(z: np.ndarray) -> np.ndarray:
    """Branch energies |z|², float64, same shape as z."""
    a = np.asarray(z)
    if not np.issubdtype(a.dtype, np.number):
        raise ParameterError(f"z has dtype {a.dtype}; give complex correlator outputs")
    return a.real.astype(np.float64) ** 2 + a.imag.astype(np.float64) ** 2
