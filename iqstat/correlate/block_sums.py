"""Block-rate mixing of a batch of bursts and the correlator bank computed from the block sums.

Owns :class:`BlockSums` and :func:`mix_blocks_many`: with ω_i = 2πf_i/fs and blocks of L
samples, Σ_l x[qL + l]·e^{−jω_i(qL + l)} = e^{−jω_i qL}·(X·w_i)[q] (one small matrix product
per burst, no full-rate phasors), then running sums along the blocks; :func:`block_samples_for`
(L for a symbol period, at least ``MIN_BLOCKS_PER_SYMBOL`` blocks per symbol); the reusable
work arrays :class:`Scratch`; and the private bank on block sums, ``_bank_blocks``
(S(b) = S_q + e^{−jω_i qL}·Σ_{l<ρ} x[qL + l]·e^{−jω_i l} at each symbol boundary b = qL + ρ,
eq. (3) of :func:`~iqstat.correlate.bank.correlate_symbols_many`), which
:mod:`iqstat.sync` and the bank call.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from iqstat.correlate.inputs import _check_period, _check_rate, _check_tone_list, check_samples
from iqstat.correlate.templates import unit_phasors
from iqstat.errors import ParameterError

__all__ = ["MIN_BLOCKS_PER_SYMBOL", "BlockSums", "Scratch", "block_samples_for", "mix_blocks_many"]

#: Block-rate mixing (:func:`mix_blocks_many`): blocks are as long as possible while a symbol
#: still spans at least this many of them (4 samples at 52 samples per symbol).
MIN_BLOCKS_PER_SYMBOL = 12

#: Elementwise passes over block-rate arrays run on slices of bursts of about this many bytes
#: (cache-sized); reductions and transforms run once over a whole chunk.
_SLICE_BYTES = 1 << 20

#: Blocks per row of the two-table block phasors of :func:`mix_blocks_many`.
_BLOCK_PHASOR_ROW = 64


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
