"""Timing refinement on known symbols: correlation of the burst with their reference waveform.

:func:`refine_timing_known` builds the noiseless waveform of a found frame's known symbols
(:func:`iqstat.waveform.modulate`, rectangular frequency pulse) on the current grid,
cross-correlates it block by block with the burst over lags of ±1.5 symbols by FFT, sums the
blocks' squared magnitudes and interpolates the peak by a parabola; the drift of the
per-block peaks corrects the period, the turn of the blocks' phases the carrier offset. It
is for weak or low-index bursts (CPFSK with h = ½) whose timing is in the phase trajectory
rather than in the per-symbol energies.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import scipy.fft

from iqstat.sync.grid import SymbolTiming, _whole_symbols
from iqstat.waveform import modulate


def _peak_lag(metric: np.ndarray) -> float:
    """Index of a metric's maximum, refined by a parabola through its neighbours."""
    m = int(np.argmax(metric))
    if 0 < m < len(metric) - 1:
        y0, y1, y2 = metric[m - 1], metric[m], metric[m + 1]
        den = y0 - 2 * y1 + y2
        if den < 0:
            return m + 0.5 * (y0 - y2) / den
    return float(m)


def _peak_lags(rows: np.ndarray) -> np.ndarray:
    """:func:`_peak_lag` of every row of a 2-D array (the same formula, vectorised)."""
    n, width = rows.shape
    m = np.argmax(rows, axis=1)
    if width < 3:
        return m.astype(np.float64)
    mc = np.clip(m, 1, width - 2)
    r = np.arange(n)
    y0, y1, y2 = rows[r, mc - 1], rows[r, mc], rows[r, mc + 1]
    den = y0 - 2 * y1 + y2
    ok = (m > 0) & (m < width - 1) & (den < 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(ok, m + 0.5 * (y0 - y2) / np.where(ok, den, -1.0), m.astype(np.float64))


def refine_timing_known(
    x: np.ndarray,
    sample_rate_hz: float,
    timing: SymbolTiming,
    *,
    first_symbol: int,
    symbols: np.ndarray,
    modulation: str,
    symbol_rate_hz: float,
    tone_spacing_hz: float | None,
    cfo_hz: float,
    block_symbols: int = 4,
) -> tuple[SymbolTiming, int, float]:
    """Timing from the known symbols by correlating the burst with their waveform.

    Parameters
    ----------
    x : ndarray, shape (n_samples,)
        The burst's samples (the same window ``timing`` refers to).
    sample_rate_hz : float
    timing : SymbolTiming
        The grid to refine; its period (clock offset) is kept.
    first_symbol : int
        Grid index of the first known symbol.
    symbols : ndarray of int
        Known tone indices (or on/off for OOK) from ``first_symbol`` on, all known.
    modulation, symbol_rate_hz, tone_spacing_hz, cfo_hz
        The link, as estimated.
    block_symbols : int
        Symbols per coherently correlated block (the blocks' energies are summed, so a
        residual carrier offset up to ~fs/(2·block length) only turns their phases, which
        gives its correction).

    Returns
    -------
    (SymbolTiming, int, float)
        The grid with ``t0_samples`` moved by the best lag (within 1.5 symbols;
        ``n_symbols`` adjusted), the shift j − k of a symbol's index in the new grid, and the
        residual carrier offset [Hz] the block phases show (add it to ``cfo_hz``).

    Notes
    -----
    For continuous-phase FSK with h = ½ the per-symbol energies hardly change with a timing
    error (a short stretch of the neighbouring tone correlates almost fully), so energy and
    decision-margin criteria are flat; the timing is in the phase trajectory. The reference
    waveform of the known symbols (iqstat.waveform.modulate, rectangular frequency pulse) is
    cross-correlated block by block with the burst over lags of ±1.5 symbols by FFT, the block
    magnitudes squared are summed, and the peak is interpolated by a parabola.
    """
    p = timing.period_samples
    n_sym = len(symbols)
    if n_sym < 4 * block_symbols:
        return timing, 0, 0.0
    t_start = timing.t0_samples + first_symbol * p
    i0 = int(math.floor(t_start))
    ppm = ((sample_rate_hz / symbol_rate_hz) / p - 1.0) * 1e6
    ref = modulate(
        np.asarray(symbols),
        modulation=modulation,
        sample_rate_hz=sample_rate_hz,
        symbol_rate_hz=symbol_rate_hz,
        tone_spacing_hz=tone_spacing_hz,
        cfo_hz=cfo_hz,
        timing_offset_samples=t_start - i0,
        clock_offset_ppm=ppm,
    )
    h = int(math.ceil(1.5 * p)) + 2  # lags of ±1.5 symbols: the frame index may be one off
    nb = int(round(block_symbols * p))
    n_blk = min(len(ref) // nb, (len(x) - i0 - h) // nb if len(x) - i0 - h > 0 else 0)
    first = 0
    while first < n_blk and i0 + first * nb - h < 0:
        first += 1
    if n_blk - first < 4:
        return timing, 0, 0.0
    j = np.arange(first, n_blk)
    idx_x = i0 + j[:, None] * nb - h + np.arange(nb + 2 * h)[None, :]
    n_fft = scipy.fft.next_fast_len(nb + 2 * h)
    # Single precision for complex64 samples (their own precision; the lags and phases move
    # by ~1e-6 of a sample and radian), twice as fast.
    dt = np.complex64 if np.asarray(x).dtype == np.complex64 else np.complex128
    xs = scipy.fft.fft(x[idx_x], n_fft, axis=1)
    # The reference's blocks j·nb .. (j + 1)·nb − 1 are consecutive: a reshape, no gather.
    rs = scipy.fft.fft(ref[first * nb : n_blk * nb].astype(dt).reshape(-1, nb), n_fft, axis=1)
    xs *= np.conj(rs)
    cc = scipy.fft.ifft(xs, axis=1)[:, : 2 * h + 1]
    c = (cc.real.astype(np.float64)) ** 2 + cc.imag.astype(np.float64) ** 2
    lag = _peak_lag(c.sum(axis=0)) - h
    # Carrier: a residual offset turns the blocks' correlation phases at the best lag
    # linearly; their unwrapped slope (blocks of a few symbols keep it below π per block up
    # to ~ fs/(2·nb)) is the correction.
    phases = np.unwrap(np.angle(cc[:, int(round(lag)) + h]))
    wts = c[:, int(round(lag)) + h]
    jc = (j + 0.5) * nb
    jm = np.average(jc, weights=wts)
    slope_rad = float(
        np.sum(wts * (jc - jm) * (phases - np.average(phases, weights=wts)))
        / np.sum(wts * (jc - jm) ** 2)
    )
    dcfo_hz = slope_rad * sample_rate_hz / (2 * np.pi)
    # Clock: the lag drifts along the frame when the period is off (a spurious clock offset
    # from a weak line, or a real one on a long frame). Per-block peaks within half a symbol
    # of the overall lag, line-fitted against the block centres, give the drift per sample.
    k = int(round(lag)) + h
    lo, hi = max(0, k - int(p // 2)), min(2 * h + 1, k + int(p // 2) + 1)
    blk_lag = _peak_lags(c[:, lo:hi]) + (lo - h)
    centre = (j + 0.5) * nb  # block centres, samples from the first known symbol
    w = c[:, lo:hi].max(axis=1)
    a_mat = np.stack([np.ones_like(centre), centre], axis=1) * np.sqrt(w)[:, None]
    coef, res, *_ = np.linalg.lstsq(a_mat, blk_lag * np.sqrt(w), rcond=None)
    p_old = p
    if len(blk_lag) >= 4 and res.size:
        cov = float(res[0]) / (len(blk_lag) - 2) * np.linalg.inv(a_mat.T @ a_mat)
        slope, se = float(coef[1]), math.sqrt(max(cov[1, 1], 0.0))
        if se > 0 and abs(slope) > 3.0 * se:
            # The first known symbol moves by the intercept, each later one by slope·P more:
            # the grid is re-anchored there with the corrected period.
            p = p_old * (1.0 + slope)
            lag = float(coef[0])
    t_new = timing.t0_samples + first_symbol * p_old + lag - first_symbol * p
    shift = int(math.floor(t_new / p))
    t_new -= shift * p
    n_new = _whole_symbols(len(x), t_new, p)
    moved = dataclasses.replace(
        timing,
        t0_samples=float(t_new),
        n_symbols=n_new,
        period_samples=float(p),
        clock_offset_ppm=float(((sample_rate_hz / symbol_rate_hz) / p - 1.0) * 1e6),
        method=timing.method + "+known-waveform",
        message=timing.message + f"; moved {lag / p:+.3f} T by correlating the known symbols",
    )
    return moved, shift, float(dcfo_hz)
