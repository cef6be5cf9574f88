"""Quadrature correlator bank of a noncoherent receiver: complex outputs per symbol and tone.

For every symbol k of a timing grid and every tone i the bank correlates the received samples
over the symbol's interval with a unit-energy complex exponential at the tone frequency. The
outputs z[k, i] are what the fit models: the matched branch has mean √Es·e^{jθ_k}, the noise
has E|n|² = N0 (the noise variance per complex sample) in every branch.

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

import functools
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from iqstat.errors import ParameterError

#: Symbols processed per block in :func:`correlate_symbols` (bounds the padded work array).
_BLOCK_SYMBOLS = 4096

#: Block-rate mixing (:func:`mix_blocks_many`): blocks are as long as possible while a symbol
#: still spans at least this many of them (4 samples at 52 samples per symbol).
MIN_BLOCKS_PER_SYMBOL = 12

#: Elementwise passes over block-rate arrays run on slices of bursts of about this many bytes
#: (cache-sized); reductions and transforms run once over a whole chunk.
_SLICE_BYTES = 1 << 20

#: Blocks per row of the two-table block phasors of :func:`mix_blocks_many`.
_BLOCK_PHASOR_ROW = 64


def _check_rate(name: str, value: float) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} {value!r} is not a number; give it in Hz") from None
    if not (math.isfinite(v) and v > 0):
        raise ParameterError(f"{name} {value!r} must be a positive finite number of Hz")
    return v


def check_tone_freqs(tone_freqs_hz: Sequence[float], sample_rate_hz: float) -> np.ndarray:
    """Validate tone frequencies against the sample rate; return them as float64 (M,)."""
    try:
        f = np.atleast_1d(np.asarray(tone_freqs_hz, dtype=np.float64))
    except (TypeError, ValueError):
        raise ParameterError(
            f"tone_freqs_hz {tone_freqs_hz!r} is not a list of numbers; give the tones in Hz"
        ) from None
    if f.ndim != 1 or f.size == 0:
        raise ParameterError(
            f"tone_freqs_hz {tone_freqs_hz!r} must be a non-empty 1-D list of frequencies in Hz"
        )
    if not np.all(np.isfinite(f)) or np.any(np.abs(f) > sample_rate_hz / 2):
        raise ParameterError(
            f"tone_freqs_hz {tone_freqs_hz!r} must be finite and within ±fs/2 = "
            f"±{sample_rate_hz / 2:g} Hz of the centre frequency"
        )
    return f


def check_samples(x: np.ndarray) -> np.ndarray:
    """Validate a 1-D sample array; return it as a complex ndarray (no copy if complex)."""
    a = np.asarray(x)
    if a.ndim != 1:
        raise ParameterError(f"x must be a 1-D array of samples, got shape {a.shape}")
    if not (np.issubdtype(a.dtype, np.complexfloating) or np.issubdtype(a.dtype, np.number)):
        raise ParameterError(f"x has dtype {a.dtype}; give complex (or real) samples")
    if not np.issubdtype(a.dtype, np.complexfloating):
        a = a.astype(np.complex128)
    return a


def _check_period(period_samples: float) -> float:
    try:
        p = float(period_samples)
    except (TypeError, ValueError):
        raise ParameterError(f"period_samples {period_samples!r} is not a number") from None
    if not (math.isfinite(p) and p >= 1.0):
        raise ParameterError(
            f"period_samples {period_samples!r} must be a finite number >= 1 "
            "(samples per symbol, fs / symbol rate)"
        )
    return p


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


def _bank_from_blocks(blocks: BlockSums, arrays, c, bnd, offs, out) -> None:
    """Check ``blocks`` against the bursts and tones, then :func:`_bank_blocks` into out."""
    n_b = len(arrays)
    if blocks.samples is None:
        raise ParameterError(
            "blocks hold no raw samples for the symbol edges; pass mix_blocks_many of the "
            "bursts and tones"
        )
    if len(blocks) != n_b:
        raise ParameterError(
            f"blocks holds {len(blocks)} bursts for {n_b}; pass mix_blocks_many of the same "
            "bursts and tones"
        )
    if blocks.sums.shape[1] != c.shape[1] or not np.allclose(
        blocks.cycles_per_sample, c, rtol=0, atol=1e-12
    ):
        raise ParameterError(
            "blocks were mixed with other tones than tone_freqs_list; pass mix_blocks_many of "
            "the same bursts and tones"
        )
    for i, a in enumerate(arrays):
        if blocks.samples[i].size != a.size:
            raise ParameterError(
                f"blocks burst {i} has {blocks.samples[i].size} samples but xs[{i}] has {a.size}"
                "; pass mix_blocks_many of the same bursts"
            )
    _bank_blocks(blocks, bnd, out=out)


def _bank_blocks(
    blocks: BlockSums,
    bnd: Sequence[np.ndarray],
    rows: np.ndarray | None = None,
    scratch: Scratch | None = None,
    out: np.ndarray | None = None,
) -> np.ndarray:
    """z[k, i] of every symbol of the bursts ``rows`` of blocks (all by default; boundaries
    ``bnd``, one array per burst) from block sums: eq. (3) then eq. (2) of
    :func:`correlate_symbols_many`. Returns (total symbols, M), into ``out`` if given.

    Everything is laid out tone-first, (M, boundaries of all bursts in a row), every gather
    is a flat ``np.take`` (numpy's row gathers of 2-D arrays are several times slower), and
    the arrays that scale with the symbol count live in ``scratch`` (fresh ones cost their
    allocation on every call). The phasors e^{−jω_i b} at the boundaries are running products
    of the per-symbol steps e^{−jω_i N_k} (N_k ∈ {⌊P⌋, ⌈P⌉}, two phasors per burst and
    tone), re-anchored at each burst's first boundary: K products of unit phasors keep
    ~K·1e-16 relative rounding.
    """
    sc = Scratch() if scratch is None else scratch
    blk = blocks.block_samples
    if rows is None:
        rows = np.arange(len(blocks))
    c = blocks.cycles_per_sample[rows].T  # (M, B)
    sums = blocks.sums
    samples = [blocks.samples[r] for r in rows]
    n_b, m, width = rows.size, sums.shape[1], sums.shape[2]
    sizes = np.array([b.size for b in bnd], dtype=np.int64)
    n_t = int(sizes.sum())
    ends = np.cumsum(sizes)
    begins = ends - sizes
    b_all = sc.get("bank_b", (n_t,), np.int64)
    np.concatenate(bnd, out=b_all)
    row = np.repeat(np.arange(n_b), sizes)
    q = sc.get("bank_q", (n_t,), np.int64)
    rho = sc.get("bank_rho", (n_t,), np.int64)
    np.floor_divide(b_all, blk, out=q)
    np.subtract(b_all, q * blk, out=rho)
    np.minimum(q, width - 1, out=q)
    # Per-symbol steps N_t = b_t − b_{t−1} (at each burst's first boundary: none).
    steps = sc.get("bank_steps", (n_t,), np.int64)
    np.subtract(b_all[1:], b_all[:-1], out=steps[1:])
    steps[begins] = np.iinfo(np.int64).max
    n_lo = np.minimum.reduceat(steps, begins)  # ⌊P⌋ per burst (or none: a 1-boundary burst)
    n_lo[sizes < 2] = 0
    steps[begins] = n_lo
    sel = sc.get("bank_sel", (n_t,), np.int64)
    np.subtract(steps, np.take(n_lo, row), out=sel)
    sel += 2 * row  # index into the (B, 2) step tables
    step_tab = unit_phasors(-c[:, :, None] * (n_lo[:, None] + np.arange(2))).reshape(m, -1)
    ph_b = sc.get("bank_ph", (m, n_t), np.complex128)
    first = unit_phasors(-c * b_all[begins].astype(np.float64))  # (M, B): e^{−jω_i b_0}
    for i in range(m):  # M <= 4 tones
        np.take(step_tab[i], sel, out=ph_b[i], mode="clip")
    ph_b[:, begins] = 1.0
    np.cumprod(ph_b, axis=1, out=ph_b)
    # Re-anchor each burst: its first boundary's phasor, the running product divided out.
    anchor = first * np.conj(ph_b[:, begins])
    tmp = sc.get("bank_tmp", (n_t,), np.complex128)
    for i in range(m):
        ph_b[i] *= np.take(anchor[i], row, out=tmp, mode="clip")
    # S_q at each boundary's block start.
    base = sc.get("bank_base", (n_t,), np.int64)
    np.multiply(np.take(rows, row), m * width, out=base)
    base += q
    flat = sums.reshape(-1)
    f = sc.get("bank_f", (m, n_t), np.complex128)
    for i in range(m):
        np.take(flat, base, out=f[i], mode="clip")
        base += width
    if blk > 1:
        # The samples qL .. b − 1 (at most L − 1), eq. (3): Σ_l g_l·w^l by Horner's rule with
        # w = e^{−jω_i}, turned by e^{−jω_i qL} = e^{−jω_i b}·e^{jω_i ρ}.
        lm = np.arange(blk)
        # Indices past a burst's last sample (the last block's tail) are clipped to it by
        # the gathers' mode="clip"; the mask below zeroes them (l >= ρ) anyway.
        idx = sc.get("bank_idx", (n_t, blk), np.int64)
        np.add((q * blk)[:, None], lm, out=idx)
        dt = np.result_type(*samples)
        g = sc.get("bank_g", (n_t, blk), dt)
        for a, o, k in zip(samples, begins, sizes, strict=True):  # one gather per burst
            np.take(a, idx[o : o + k], out=g[o : o + k], mode="clip")
        g *= lm < rho[:, None]
        w1 = unit_phasors(-c)  # (M, B)
        back = unit_phasors(c[:, :, None] * lm).reshape(m, -1)  # (M, B·L): e^{jω_i ρ}
        back_idx = sc.get("bank_back_idx", (n_t,), np.int64)
        np.multiply(row, blk, out=back_idx)
        back_idx += rho
        wi = sc.get("bank_w", (n_t,), np.complex128)
        part = sc.get("bank_part", (n_t,), np.complex128)
        for i in range(m):
            np.take(w1[i], row, out=wi, mode="clip")
            np.multiply(wi, g[:, blk - 1], out=part)
            for ll in range(blk - 2, -1, -1):
                part += g[:, ll]
                if ll:
                    part *= wi
            part *= np.take(back[i], back_idx, out=tmp, mode="clip")
            part *= ph_b[i]
            f[i] += part
    # Symbol k of a burst: boundaries t and t + 1 of the same burst.
    n_s = n_t - n_b
    last = np.zeros(n_t, dtype=bool)
    last[ends - 1] = True
    lo_t = np.flatnonzero(~last)
    hi_t = lo_t + 1
    d = sc.get("bank_d", (m, n_s), np.complex128)
    tmp_s = tmp[:n_s]
    for i in range(m):
        np.take(f[i], hi_t, out=d[i], mode="clip")
        d[i] -= np.take(f[i], lo_t, out=tmp_s, mode="clip")
    # Centre phase of eq. (2): e^{jω_i c_k} = conj(e^{−jω_i b_k})·e^{jω_i (N_k − 1)/2}.
    nk = np.take(steps, hi_t)
    sym_row = np.take(row, lo_t)
    half = unit_phasors(c[:, :, None] * ((n_lo[:, None] + np.arange(2) - 1) / 2.0)).reshape(m, -1)
    hsel = nk - np.take(n_lo, sym_row)
    hsel += 2 * sym_row
    scale = 1.0 / np.sqrt(nk)
    for i in range(m):
        np.take(ph_b[i], lo_t, out=tmp_s, mode="clip")
        np.conj(tmp_s, out=tmp_s)
        d[i] *= tmp_s
        d[i] *= np.take(half[i], hsel, out=tmp_s, mode="clip")
        d[i] *= scale
    if out is None:
        out = np.empty((n_s, m), dtype=np.complex128)
    out[...] = d.T
    return out


def branch_energies(z: np.ndarray) -> np.ndarray:
    """Branch energies |z|², float64, same shape as z."""
    a = np.asarray(z)
    if not np.issubdtype(a.dtype, np.number):
        raise ParameterError(f"z has dtype {a.dtype}; give complex correlator outputs")
    return a.real.astype(np.float64) ** 2 + a.imag.astype(np.float64) ** 2


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


def _check_tone_list(tone_freqs_list: Sequence[Sequence[float]], fs: float) -> np.ndarray:
    """Validate one tone list per burst, all of the same length M; return float64 (B, M)."""
    try:  # the usual case in one pass; anything odd goes through the per-burst checks
        f = np.array(tone_freqs_list, dtype=np.float64)
    except (TypeError, ValueError):
        f = None
    if (
        f is not None
        and f.ndim == 2
        and f.shape[1] > 0
        and np.isfinite(f).all()
        and not (np.abs(f) > fs / 2).any()
    ):
        return f
    rows = [check_tone_freqs(f, fs) for f in tone_freqs_list]
    sizes = {r.size for r in rows}
    if len(sizes) > 1:
        raise ParameterError(
            f"tone_freqs_list holds bursts with {sorted(sizes)} tones; a batch needs one "
            "tone count (split the batch by modulation)"
        )
    return np.stack(rows) if rows else np.zeros((0, 1))


def _phasor_block(n_max: int) -> tuple[int, int]:
    """Block length L ≈ √n and block count Q (Q·L >= n) of the phasor tables."""
    block = max(1, math.isqrt(max(n_max, 1)))
    return block, -(-max(n_max, 1) // block)


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


def block_samples_for(period_samples: float) -> int:
    """Samples per block of :func:`mix_blocks_many` for a symbol period: the largest whole
    number with at least MIN_BLOCKS_PER_SYMBOL blocks per symbol (1 below that)."""
    return max(1, int(_check_period(period_samples) // MIN_BLOCKS_PER_SYMBOL))


@dataclass(frozen=True, eq=False)
class BlockSums:
    """Running sums of a batch of bursts mixed down by each tone, at block starts.

    Attributes
    ----------
    sums : ndarray of complex128, shape (B, M, J_max + 1)
        sums[b, i, q] = Σ_{n < qL} x_b[n]·exp(−j2πf_{b,i} n/fs) for q <= n_blocks[b], held
        at the last value past it (as if the samples after the last whole block were zero).
    n_blocks : ndarray of int64, shape (B,)
        Whole blocks of L samples in each burst, ⌊n_b / L⌋.
    n_samples : ndarray of int64, shape (B,)
        Samples per burst n_b.
    block_samples : int
        Block length L [samples].
    sample_rate_hz : float
    cycles_per_sample : ndarray of float64, shape (B, M)
        The tones as f_{b,i}/fs.
    samples : tuple of B ndarrays, or None
        The bursts (the bank takes the few samples between a symbol boundary and the next
        block start from them); None for block sums built by hand that only the timing
        (:func:`~iqstat.sync.recover_timing_blocks_many`) reads.
    """

    sums: np.ndarray
    n_blocks: np.ndarray
    n_samples: np.ndarray
    block_samples: int
    sample_rate_hz: float
    cycles_per_sample: np.ndarray
    samples: tuple | None

    def __len__(self) -> int:
        return int(self.n_samples.size)


def mix_blocks_many(
    xs: Sequence[np.ndarray],
    sample_rate_hz: float,
    tone_freqs_list: Sequence[Sequence[float]],
    block_samples: int,
) -> BlockSums:
    """Block sums of each burst mixed down by each of its tones, and their running sums.

    Parameters
    ----------
    xs : sequence of B ndarrays, shapes (n_b,)
        The bursts' samples (ragged); complex64 stays complex64 in the products.
    sample_rate_hz : float
        Sample rate fs [Hz].
    tone_freqs_list : sequence of B sequences of float
        Each burst's tones [Hz]; the same count M for every burst.
    block_samples : int
        Block length L [samples], e.g. :func:`block_samples_for` of the symbol period.

    Returns
    -------
    BlockSums
        What :func:`~iqstat.sync.recover_timing_blocks_many` times the bursts on and
        :func:`correlate_symbols_many` (``blocks=``) takes the symbols' sums from.

    Notes
    -----
    With ω_i = 2πf_i/fs and block q holding samples qL .. qL + L − 1,

        Σ_l x[qL + l]·e^{−jω_i(qL + l)} = e^{−jω_i qL}·(X·w_i)[q],                        (1)

    X = x[:JL] reshaped to (J, L) (a view) and w_i[l] = e^{−jω_i l}: one small matrix product
    per burst for all its tones, then one phasor per block and tone (two-table products,
    :func:`tone_phasors`) and the running sums along the blocks. There are no full-rate
    phasors and no full-rate products; the only full-rate pass is the matrix product's read
    of the samples. The products are complex64 for complex64 samples (a relative error of
    ~1e-7 per block sum); the phasors, rotated sums and running sums are complex128.
    """
    fs = _check_rate("sample_rate_hz", sample_rate_hz)
    if isinstance(block_samples, bool) or int(block_samples) != block_samples or block_samples < 1:
        raise ParameterError(f"block_samples {block_samples!r} must be a positive whole number")
    blk = int(block_samples)
    if len(tone_freqs_list) != len(xs):
        raise ParameterError(
            f"xs has {len(xs)} bursts but tone_freqs_list has {len(tone_freqs_list)} entries; "
            "give one tone list per burst"
        )
    if len(xs) == 0:
        raise ParameterError("xs is empty; give at least one burst")
    arrays = [check_samples(x) for x in xs]
    freqs = _check_tone_list(tone_freqs_list, fs)
    return _mix_blocks(arrays, freqs / fs, blk, fs, Scratch())


class Scratch:
    """Work arrays reused across the chunks of a batch (a fresh large temporary costs its
    page faults on every pass; a reused one is already mapped, and often still cached)."""

    def __init__(self) -> None:
        self._bufs: dict[str, np.ndarray] = {}

    def get(self, name: str, shape: tuple, dtype) -> np.ndarray:
        """A C-contiguous array of ``shape`` (contents undefined) backed by the named buffer."""
        size = math.prod(shape)
        buf = self._bufs.get(name)
        if buf is None or buf.dtype != np.dtype(dtype) or buf.size < size:
            buf = np.empty(max(size, 1), dtype=dtype)
            self._bufs[name] = buf
        return buf[:size].reshape(shape)


def _mix_blocks(arrays, c: np.ndarray, blk: int, fs: float, scratch: Scratch) -> BlockSums:
    """:func:`mix_blocks_many` of validated bursts (tones as cycles per sample, (B, M)); the
    running sums live in ``scratch`` (valid until its next use)."""
    n_b, m = c.shape
    nbk = np.array([a.size // blk for a in arrays], dtype=np.int64)
    j_max = int(nbk.max())
    sums = scratch.get("block_sums", (n_b, m, j_max + 1), np.complex128)
    sums[:, :, 0] = 0.0
    single = all(a.dtype == np.complex64 for a in arrays)
    dt = np.complex64 if single else np.complex128
    w_t = unit_phasors(-c[:, :, None] * np.arange(blk)).astype(dt)  # (B, M, L): w_i[l], eq. (1)
    # Block phasors e^{−jω_i qL}, q = sR + r, as two tables (see tone_phasors), applied in
    # place; R fixed, so that a burst gets the same products in any batch.
    r_len = _BLOCK_PHASOR_ROW
    s_len = -(-max(j_max, 1) // r_len)
    step = c[:, :, None] * blk
    within = unit_phasors(-step * np.arange(r_len)).astype(dt)
    starts = unit_phasors(-step * (np.arange(s_len) * r_len)).astype(dt)
    step_b = max(1, _SLICE_BYTES // (s_len * r_len * m * 24))
    y_all = scratch.get("block_products", (min(n_b, step_b), m, s_len * r_len), dt)
    for i0 in range(0, n_b, step_b):  # a few bursts at a time, their products kept cached
        i1 = min(n_b, i0 + step_b)
        y = y_all[: i1 - i0]
        for r, b in enumerate(range(i0, i1)):  # ragged rows: one product per burst
            k = int(nbk[b])
            np.matmul(w_t[b], arrays[b][: k * blk].reshape(k, blk).T, out=y[r, :, :k])
            y[r, :, k:] = 0.0
        y4 = y.reshape(i1 - i0, m, s_len, r_len)
        y4 *= starts[i0:i1, :, :, None]  # eq. (1)
        y4 *= within[i0:i1, :, None, :]
        np.cumsum(y[:, :, :j_max], axis=2, dtype=np.complex128, out=sums[i0:i1, :, 1:])
    return BlockSums(
        sums=sums,
        n_blocks=nbk,
        n_samples=np.array([a.size for a in arrays], dtype=np.int64),
        block_samples=blk,
        sample_rate_hz=fs,
        cycles_per_sample=c,
        samples=tuple(arrays),
    )
