"""The fast timing path of a batch: the decimated feature and the bank from the same block sums.

:func:`time_and_correlate_many` mixes a batch at block rate
(:func:`~iqstat.correlate.mix_blocks_many`, blocks of
:func:`~iqstat.correlate.block_samples_for` the nominal period), times it on the feature
sampled once per block (:func:`recover_timing_blocks_many`) and runs the correlator bank on
the same block sums. The feature is that of :mod:`iqstat.sync.full_rate` evaluated at block
starts, e_q = max_i |S_{q+W} − S_q|² over a window of W blocks; its symbol-rate line gives
the symbol centres (Oerder & Meyr [1]_) and, per block of symbols, the clock offset
(:func:`~iqstat.sync.grid._clock_decision`). There is no matched-energy search here: the
grid is final where the line reaches STRONG_LINE_DB; weaker bursts are timed again by
:func:`~iqstat.sync.full_rate.recover_timing_many` (``coarse=`` this grid).

References
----------
.. [1] M. Oerder, H. Meyr, "Digital filter and square timing recovery", IEEE Trans.
   Commun. 36(5):605–612, 1988.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import scipy.fft

from iqstat.correlate.block_sums import (
    _SLICE_BYTES,
    BlockSums,
    Scratch,
    _bank_blocks,
    _mix_blocks,
    block_samples_for,
)
from iqstat.correlate.inputs import _check_rate, _check_tone_list, check_samples
from iqstat.correlate.templates import unit_phasors
from iqstat.errors import MeasurementError, ParameterError
from iqstat.rowstats import median_rows
from iqstat.sync.grid import (
    CLOCK_BLOCK_SYMBOLS,
    MIN_LINE_SNR_DB,
    MIN_SYMBOLS,
    SymbolTiming,
    _clock_decision,
    _floor_bins,
    _line_clock_fits,
    _rows_of,
    _whole_symbols,
)

#: At and above this symbol-rate line SNR [dB] the decimated timing
#: (:func:`time_and_correlate_many`) is final: its own spread is then below ~1 % of a symbol,
#: well inside the matched-energy check's finest step (5 %).
STRONG_LINE_DB = 20.0

#: Rows of the decimated feature per transform of the spectral floor.
_FLOOR_ROWS = 8

#: Fewest feature points (blocks) per symbol worth decimating to; the block length itself is
#: :func:`~iqstat.correlate.block_samples_for` the period (at least 12 blocks per symbol).
FEATURE_MIN_BLOCKS = 4


#: Bursts worked together by :func:`time_and_correlate_many`: their block sums and feature
#: temporaries stay below about this many bytes (reused from chunk to chunk). 12 MB holds a
#: whole batch of measure_capture (1 M samples of 2-FSK at 4-sample blocks: ~10 MB) in one
#: chunk, so each batch pays the chunk's fixed numpy calls once (8 MB split it in two).
_FUSED_CHUNK_BYTES = 12 << 20

#: Bursts whose symbols the bank takes together (their per-symbol arrays stay cached).
_BANK_SLICE_BURSTS = 8


def time_and_correlate_many(
    xs: Sequence[np.ndarray],
    sample_rate_hz: float,
    symbol_rate_hz: float,
    tone_freqs_list: Sequence[Sequence[float]],
    *,
    track_clock: bool = True,
) -> tuple[list[SymbolTiming | MeasurementError | None], list[np.ndarray | None]]:
    """The fast timing stage of a batch: block-rate mixing, decimated timing and the bank.

    Parameters
    ----------
    xs : sequence of B ndarrays, shapes (n_b,)
        The bursts' samples (ragged), complex64 or complex128.
    sample_rate_hz : float
        Sample rate fs [Hz].
    symbol_rate_hz : float
        Nominal symbol rate Rs [Bd], common to the batch.
    tone_freqs_list : sequence of B sequences of float
        Each burst's tones [Hz], CFO included; the same count M for all.
    track_clock : bool
        Estimate the clock offset (see :func:`~iqstat.sync.recover_timing`).

    Returns
    -------
    (timings, zs)
        ``timings[b]``: what :func:`recover_timing_blocks_many` gives the burst (SymbolTiming,
        MeasurementError, or None when the symbols are too short to decimate);
        ``zs[b]``: the correlator outputs (n_symbols, M) on that grid, what
        :func:`~iqstat.correlate.correlate_symbols` gives to ~1e-7 relative, or None where
        the timing is not a SymbolTiming. Where the line is below STRONG_LINE_DB, re-time the
        burst with :func:`~iqstat.sync.recover_timing_many` and correlate it again.

    Notes
    -----
    :func:`~iqstat.correlate.mix_blocks_many` (blocks of
    :func:`~iqstat.correlate.block_samples_for` the nominal period),
    :func:`recover_timing_blocks_many` and ``correlate_symbols_many(blocks=)`` run on a few
    bursts at a time (~12 MB of block sums, one batch of measure_capture; the same work
    arrays for every chunk). Inside, the elementwise passes run on slices of a few bursts
    (~1 MB) and the bank on _BANK_SLICE_BURSTS bursts at a time, so that their temporaries
    stay cached; larger chunks only amortise the fixed number of numpy calls better.
    """
    fs = _check_rate("sample_rate_hz", sample_rate_hz)
    rate = _check_rate("symbol_rate_hz", symbol_rate_hz)
    nb = len(xs)
    if len(tone_freqs_list) != nb:
        raise ParameterError(
            f"xs has {nb} bursts but tone_freqs_list has {len(tone_freqs_list)} entries; "
            "give one tone list per burst"
        )
    timings: list = [None] * nb
    zs: list = [None] * nb
    if nb == 0:
        return timings, zs
    arrays = [check_samples(x) for x in xs]
    c = _check_tone_list(tone_freqs_list, fs) / fs
    p0 = fs / rate
    if p0 < 2 * FEATURE_MIN_BLOCKS:
        return timings, zs
    blk = block_samples_for(p0)
    m = c.shape[1]
    each = max(a.size for a in arrays) // blk * (m * 16 + 8)
    step = max(1, _FUSED_CHUNK_BYTES // max(1, each))
    scratch = Scratch()
    for i0 in range(0, nb, step):
        i1 = min(nb, i0 + step)
        blocks = _mix_blocks(arrays[i0:i1], c[i0:i1], blk, fs, scratch)
        part = _time_blocks(blocks, rate, track_clock, scratch)
        timed = [j for j, t in enumerate(part) if isinstance(t, SymbolTiming)]
        timings[i0:i1] = part
        if not timed:
            continue
        for k0 in range(0, len(timed), _BANK_SLICE_BURSTS):  # a few bursts at a time (cached)
            sl = timed[k0 : k0 + _BANK_SLICE_BURSTS]
            bnd = [part[j].boundaries() for j in sl]
            z = _bank_blocks(blocks, bnd, np.array(sl), scratch)
            o = 0
            for j, b in zip(sl, bnd, strict=True):
                zs[i0 + j] = z[o : o + b.size - 1]
                o += b.size - 1
    return timings, zs


def recover_timing_blocks_many(
    blocks: BlockSums,
    symbol_rate_hz: float,
    *,
    track_clock: bool = True,
) -> list[SymbolTiming | MeasurementError | None]:
    """Symbol timing of a batch from its block-rate running sums (the fast path).

    Parameters
    ----------
    blocks : BlockSums
        :func:`~iqstat.correlate.mix_blocks_many` of the bursts and their tones (blocks of
        :func:`~iqstat.correlate.block_samples_for` the nominal period, or shorter).
    symbol_rate_hz : float
        Nominal symbol rate Rs [Bd], common to the batch.
    track_clock : bool
        Estimate the clock offset (see :func:`~iqstat.sync.recover_timing`).

    Returns
    -------
    list of B SymbolTiming, MeasurementError or None
        The grid from the feature's symbol-rate line, without the matched-energy check of
        :func:`~iqstat.sync.recover_timing_many`. It is final where the line is strong
        (``quality["line_snr_db"] >= STRONG_LINE_DB``); re-time weaker bursts with
        :func:`~iqstat.sync.recover_timing_many`. MeasurementError: the burst is too short or has no
        energy. None: a symbol spans fewer than 2·FEATURE_MIN_BLOCKS samples, or fewer than
        FEATURE_MIN_BLOCKS blocks (use :func:`~iqstat.sync.recover_timing_many`).

    Notes
    -----
    The feature of :func:`~iqstat.sync.recover_timing` (max over tones of the energy in a one-symbol
    window) is evaluated at every block start instead of at every sample: with S_q the
    running sums at block starts (blocks of L samples) and a window of W = round(P0/L)
    blocks, e_q = max_i |S_{q+W} − S_q|², the energy of samples qL .. qL + WL − 1. Its centre
    u_q = qL + (WL − 1)/2 is exact, so the line coefficient Σ_q e_q·exp(−j2πu_q/P0) locates
    the symbol centres directly (Oerder & Meyr with the feature sampled P0/L times per
    symbol [1]_; the feature's harmonics near P0/L alias close to the line and beat along
    the burst, which leaves a few thousandths of a symbol). The spectral floor, the block
    clock fit and the significance test are those of :func:`~iqstat.sync.recover_timing`. Bursts are
    worked a few at a time (~2 MB of temporaries), the floor's transform once per FFT length.

    References
    ----------
    .. [1] M. Oerder, H. Meyr, "Digital filter and square timing recovery", IEEE Trans.
       Commun. 36(5):605–612, 1988.
    """
    rate = _check_rate("symbol_rate_hz", symbol_rate_hz)
    return _time_blocks(blocks, rate, track_clock, Scratch())


def _time_blocks(blocks: BlockSums, rate: float, track_clock: bool, scratch: Scratch) -> list:
    """:func:`recover_timing_blocks_many` with its work arrays from ``scratch``."""
    nb = len(blocks)
    out: list = [None] * nb
    if nb == 0:
        return out
    fs = blocks.sample_rate_hz
    p0 = fs / rate
    blk = blocks.block_samples
    window = int(round(p0 / blk))
    if p0 < 2 * FEATURE_MIN_BLOCKS or window < FEATURE_MIN_BLOCKS:
        return out
    n = blocks.n_samples
    ok = []
    for j in range(nb):
        if n[j] < (MIN_SYMBOLS + 2) * p0:
            out[j] = MeasurementError(
                f"burst of {n[j]} samples holds fewer than {MIN_SYMBOLS + 2} symbols of "
                f"{p0:.4g} samples; timing recovery needs a longer burst"
            )
        else:
            ok.append(j)
    if not ok:
        return out
    ok_a = np.array(ok, dtype=np.int64)
    # Work buffers, reused (fresh large temporaries cost their page faults on every pass).
    window, n_feat, block_f, width = _feature_layout(blocks.n_blocks[ok_a], p0, blk)
    bufs = _feature_bufs(scratch, n_feat, width, ok_a.size)
    _time_blocks_chunk(blocks, ok_a, p0, window, block_f, track_clock, bufs, out)
    return out


def _feature_bufs(scratch: Scratch, n_feat: int, width: int, rows: int) -> tuple:
    step = max(1, min(rows, _SLICE_BYTES // (n_feat * (16 + 8 + 8))))
    return (
        scratch.get("feature_diff", (step, n_feat), np.complex128),
        scratch.get("feature_pw", (step, n_feat), np.float64),
        scratch.get("feature_pw2", (step, n_feat), np.float64),
        scratch.get("feature", (rows, width), np.float64),
        scratch.get("feature32", (min(rows, _FLOOR_ROWS), width), np.float32),
    )


def _feature_rows(s: np.ndarray, window: int, n_feat: int, e: np.ndarray, bufs) -> None:
    """e_q = max_i |S_{q+W} − S_q|² of the running sums s (R, M, W) into e[:, :n_feat] (and
    zeros after), a few rows at a time (the temporaries bufs[:3] then stay cached)."""
    e[:, n_feat:] = 0.0
    step = bufs[0].shape[0]
    m = s.shape[1]
    for r0 in range(0, s.shape[0], step):
        r1 = min(s.shape[0], r0 + step)
        d, pw, pw2 = (b[: r1 - r0, :n_feat] for b in bufs[:3])
        ev = e[r0:r1, :n_feat]
        sr = s[r0:r1]
        for i in range(m):  # M <= 4 tones
            np.subtract(sr[:, i, window : window + n_feat], sr[:, i, :n_feat], out=d)
            if i == 0:
                np.square(d.real, out=ev)
                np.square(d.imag, out=pw)
                ev += pw
            else:
                np.square(d.real, out=pw)
                pw += np.square(d.imag, out=pw2)
                np.maximum(ev, pw, out=ev)


def _feature_layout(blocks_n: np.ndarray, p0: float, blk: int) -> tuple[int, int, int, int]:
    """Window W [blocks], feature length, points per clock block and padded width."""
    window = int(round(p0 / blk))
    n_feat = int(blocks_n.max()) + 1 - window
    block_f = int(round(CLOCK_BLOCK_SYMBOLS * p0 / blk))  # feature points per clock block
    width = -(-max(n_feat, 1) // block_f) * block_f
    return window, n_feat, block_f, width


def _time_blocks_chunk(blocks: BlockSums, part, p0, window, block_f, track_clock, bufs, out):
    """:func:`recover_timing_blocks_many` of the bursts ``part``; fills ``out``."""
    blk = blocks.block_samples
    s = _rows_of(blocks.sums, part)
    jb = blocks.n_blocks[part]
    n = blocks.n_samples[part]
    bc = s.shape[0]
    ne = jb + 1 - window  # whole windows per burst
    n_feat = int(ne.max())
    q_tot = -(-n_feat // block_f)
    e = bufs[3][:bc, : q_tot * block_f]
    _feature_rows(s, window, n_feat, e, bufs)
    for r_, k in enumerate(ne):  # partial windows past each burst's end
        e[r_, k:] = 0.0
    peak = e.max(axis=1)
    e -= (e.sum(axis=1) / ne)[:, None]
    for r_, k in enumerate(ne):
        e[r_, k:] = 0.0
    # Line coefficient per clock block: u_q = u_0 + L·q is uniform, so e^{−j2πu/P0} splits
    # into a per-block start phasor and one within-block table (a real matrix product).
    u0 = (window * blk - 1) / 2.0
    within = unit_phasors(-(blk * np.arange(block_f)) / p0)
    cs = np.stack([within.real, within.imag], axis=1)
    r = e.reshape(bc * q_tot, block_f) @ cs
    xq = (r[:, 0] + 1j * r[:, 1]).reshape(bc, q_tot)
    xq *= unit_phasors(-(u0 + blk * block_f * np.arange(q_tot)) / p0)
    # Spectral floor around the line: the line sits at bin nf·L/P0 of an nf-point transform
    # of the feature (the same Hz per bin as the full-rate one); one transform per length.
    floor = np.full(bc, np.nan)
    n_fft = np.array([scipy.fft.next_fast_len(int(k), real=True) for k in ne])
    for nf in np.unique(n_fft):
        sel = np.nonzero(n_fft == nf)[0]
        bins = _floor_bins(int(nf), int(round(nf * blk / p0)))
        if bins.size == 0:
            continue
        # float32 (the floor is a median level: 1e-7 relative rounding is far below its
        # spread), a few rows per transform (its output then stays small and cached).
        cols = min(int(nf), e.shape[1])
        seg = bufs[4][: min(sel.size, _FLOOR_ROWS), :cols]
        for k0 in range(0, sel.size, _FLOOR_ROWS):
            rk = sel[k0 : k0 + _FLOOR_ROWS]
            sk = seg[: rk.size]
            if rk.size == 1 or rk[-1] - rk[0] == rk.size - 1:
                sk[...] = e[rk[0] : rk[-1] + 1, :cols]
            else:
                sk[...] = e[rk, :cols]
            spec = scipy.fft.rfft(sk, int(nf), axis=1)[:, bins]
            floor[rk] = median_rows(spec.real.astype(np.float64) ** 2 + spec.imag**2)
    n_blocks = ne // block_f if track_clock else np.zeros(bc, dtype=np.int64)
    # Block centres: the line phase gives the symbol centres, block q's at feature point
    # q·F + (F − 1)/2, sample u0 + L·(q·F + (F − 1)/2).
    centre = u0 + blk * (np.arange(q_tot) * block_f + (block_f - 1) / 2.0)
    co = _line_clock_fits(peak, xq, floor, n_blocks, centre, p0)
    ppb = p0 / blk
    for r_, j in enumerate(part):
        if not peak[r_] > 0:
            out[j] = MeasurementError(
                "burst has no energy at the tones (all-zero samples); check the burst limits"
            )
            continue
        # window=1: the line phase gives the symbol centres, so t0 = centre − P0/2.
        t0, period, nbk, rms_j, se_ppm, snr, status = _clock_decision(co, r_, p0, 1, track_clock)
        n_sym = _whole_symbols(int(n[r_]), t0, period)
        reliable = snr >= MIN_LINE_SNR_DB
        message = (
            f"{n_sym} symbols, t0 {t0:.3f} samples, period {period:.5f} samples; "
            f"symbol-rate line {snr:.1f} dB (feature at {ppb:.1f} points per symbol); {status}"
        )
        if not reliable:
            message += f"; line below {MIN_LINE_SNR_DB:g} dB: timing unreliable"
        out[j] = SymbolTiming(
            t0_samples=t0,
            period_samples=period,
            clock_offset_ppm=float((p0 / period - 1.0) * 1e6) if track_clock else 0.0,
            n_symbols=n_sym,
            method="decimated feature line phase (Oerder-Meyr) + block clock fit",
            quality={
                "line_snr_db": float(snr),
                "n_clock_blocks": int(nbk),
                "clock_fit_rms_samples": float(rms_j),
                "clock_offset_se_ppm": float(se_ppm),
                "coarse_t0_samples": float(t0),
                "coarse_clock_offset_ppm": float((p0 / period - 1.0) * 1e6),
                "fine_moves": 0,
                "fine_shift_samples": 0.0,
                "residual_gain_db": None,  # not computed on the block grid
                "matched_fraction": None,
            },
            message=message,
            reliable=bool(reliable),
        )
