"""The symbol grid: its result type, its timing model and the clock fit both timing paths share.

Timing model (the one of :mod:`iqstat.waveform`): symbol k occupies [t0 + k·P, t0 + (k+1)·P)
with P = (fs/Rs)/(1 + ppm·1e-6); a positive clock offset means the transmitter's symbol clock
is fast (its symbols are shorter in receiver samples). :class:`SymbolTiming` holds one such
grid with its health; :func:`_whole_symbols` counts the whole symbols a grid fits in a burst.

The clock offset is measured the same way on the full-rate feature
(:mod:`iqstat.sync.full_rate`) and on the decimated one (:mod:`iqstat.sync.block_rate`): the
phase of the symbol-rate line per block of CLOCK_BLOCK_SYMBOLS symbols, unwrapped, is fitted
by a weighted least-squares line against the block centres (:func:`_line_clock_fits`,
:func:`_weighted_lines`); the slope is (P − P0)/P, kept only where it is CLOCK_SIGNIFICANCE
standard errors from zero and below MAX_CLOCK_OFFSET_PPM (:func:`_clock_decision`; METHODS §4).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields

import numpy as np

from iqstat.correlate import symbol_boundaries

#: Fewest whole symbols a burst must hold for timing recovery.
MIN_SYMBOLS = 16

#: Symbols per block of the block-wise line phase used to measure the clock offset.
CLOCK_BLOCK_SYMBOLS = 64

#: Fewest blocks for a clock-offset line fit; shorter bursts keep the nominal period until
#: the fine search.
MIN_CLOCK_BLOCKS = 4

#: Symbol-rate line below this (dB over the median spectral level of the feature) marks the
#: timing as unreliable.
MIN_LINE_SNR_DB = 6.0

#: A clock offset beyond this is not a clock error but a wrong symbol rate.
MAX_CLOCK_OFFSET_PPM = 2000.0

#: A clock slope smaller than this many standard errors is not significant: keep fs/Rs.
CLOCK_SIGNIFICANCE = 3.0


@dataclass(frozen=True)
class SymbolTiming:
    """A symbol grid: symbol k spans [t0 + k·P, t0 + (k+1)·P) in samples of x.

    Attributes
    ----------
    t0_samples : float
        Start of symbol 0 relative to x[0] [samples], 0 <= t0 < P.
    period_samples : float
        Symbol period P in receiver samples, clock offset included.
    clock_offset_ppm : float
        (fs/Rs)/P − 1 in ppm, Rs the nominal symbol rate given; positive = symbols shorter
        than nominal (transmitter clock fast).
    n_symbols : int
        Whole symbols inside x on this grid.
    method : str
        How the grid was found.
    quality : dict
        Fixed keys: ``line_snr_db`` (symbol-rate line of the feature over its median spectral
        level), ``n_clock_blocks`` (blocks in the clock fit, 0 if none), ``clock_fit_rms_samples``
        (rms residual of the block phases, NaN without a fit), ``coarse_t0_samples``,
        ``coarse_clock_offset_ppm``, ``fine_shift_samples`` (fine − coarse timing at the burst
        centre), ``fine_gain_db`` (matched energy gained by the fine search),
        ``matched_fraction`` (Σ max_i |z|² / Σ |z|² at the final grid).
    message : str
        One line on how it went.
    reliable : bool
        False when the symbol-rate line was too weak to trust the grid.
    """

    t0_samples: float
    period_samples: float
    clock_offset_ppm: float
    n_symbols: int
    method: str
    quality: dict = field(default_factory=dict)
    message: str = ""
    reliable: bool = True

    def boundaries(self) -> np.ndarray:
        """First sample of each symbol and one past the last, int64 (n_symbols + 1,)."""
        return symbol_boundaries(self.t0_samples, self.period_samples, self.n_symbols)

    def to_dict(self) -> dict:
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["quality"] = {k: _plain(v) for k, v in self.quality.items()}
        return d


def _plain(v):
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (np.floating,)):
        return float(v)
    return v


def _whole_symbols(n_samples: int, t0: float, period: float) -> int:
    """Largest n with t0 + n·P <= n_samples (symbol n−1 ends inside x).

    ``math.ceil(t0 + n * period)`` is the same double as the last entry of
    :func:`~iqstat.correlate.symbol_boundaries` (same operations in the same order).
    """
    n = max(0, math.floor((n_samples - t0) / period))
    while n > 0 and math.ceil(t0 + float(n) * period) > n_samples:
        n -= 1
    return n


def _weighted_lines(
    x: np.ndarray, y: np.ndarray, w: np.ndarray, n_used: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Weighted least-squares lines y_b ≈ c_b + s_b·x, one per row; weight 0 = not used.

    Parameters: x (n,), y and w (B, n), n_used (B,) the points used per row (for the n − 2
    degrees of freedom). Returns slope, intercept, weighted rms residual and the standard
    error of the slope per row, with the residual variance estimated from the fit,
    Σw·r²/(n − 2) (what np.polyfit(x, y, 1, w=√w, cov=True) gives). A row without weight,
    or whose points share one x, gets slope 0, intercept the (weighted) mean, rms NaN and
    standard error ∞.
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        sw = w.sum(axis=1)
        xm = (w * x).sum(axis=1) / sw
        ym = (w * y).sum(axis=1) / sw
        dx = x - xm[:, None]
        sxx = (w * dx * dx).sum(axis=1)
        s = (w * dx * (y - ym[:, None])).sum(axis=1) / sxx
        c = ym - s * xm
        r = y - (c[:, None] + s[:, None] * x)
        ssr = (w * r * r).sum(axis=1)
        rms = np.sqrt(ssr / sw)
        se = np.sqrt(np.maximum(ssr / (n_used - 2), 0.0) / sxx)
    used = n_used > 0
    plain = np.where(used, (y * (np.arange(y.shape[1]) < n_used[:, None])).sum(axis=1), 0.0)
    no_w = ~(sw > 0)
    flat = ~no_w & ~(sxx > 0)
    s = np.where(no_w | flat, 0.0, s)
    c = np.where(no_w, plain / np.maximum(n_used, 1), np.where(flat, ym, c))
    rms = np.where(no_w | flat, np.nan, rms)
    se = np.where(no_w | flat, np.inf, se)
    return s, c, rms, se


def _weighted_line(
    x: np.ndarray, y: np.ndarray, w: np.ndarray
) -> tuple[float, float, float, float]:
    """One weighted least-squares line y ≈ c + s·x (see :func:`_weighted_lines`)."""
    s, c, rms, se = _weighted_lines(
        np.asarray(x, dtype=np.float64),
        np.asarray(y, dtype=np.float64)[None, :],
        np.asarray(w, dtype=np.float64)[None, :],
        np.array([np.size(x)]),
    )
    return float(s[0]), float(c[0]), float(rms[0]), float(se[0])


def _floor_bins(n_fft: int, line_bin: int) -> np.ndarray:
    """Bins of an n_fft-point real transform of the feature that measure the floor around its
    symbol-rate line at bin ``line_bin``: up to 200 on each side, the line's ±3 left out."""
    n_bins = n_fft // 2 + 1
    lo, hi = max(1, line_bin - 200), min(n_bins, line_bin + 201)
    return np.r_[np.arange(lo, max(lo, line_bin - 3)), np.arange(min(hi, line_bin + 4), hi)]


def _line_clock_fits(
    peak: np.ndarray,
    xq: np.ndarray,
    floor: np.ndarray,
    n_blocks: np.ndarray,
    centre: np.ndarray,
    period0: float,
) -> dict:
    """Line SNR and block clock fit per burst, the input of :func:`_clock_decision`.

    ``peak`` (B,) peak feature energy, ``xq`` (B, Q) the symbol-rate coefficient of the
    feature per block, ``floor`` (B,) the feature's spectral level around the line (NaN or 0
    if unknown: line SNR ∞), ``n_blocks`` (B,) whole blocks per burst (0 = no clock fit),
    ``centre`` (Q,) the block centres [samples] the block phases are fitted against,
    ``period0`` the nominal period P0 [samples].
    """
    x_all = xq.sum(axis=1)
    with np.errstate(divide="ignore"):
        line_snr = np.where(
            floor > 0, 10 * np.log10(np.abs(x_all) ** 2 / np.where(floor > 0, floor, 1.0)), np.inf
        )
    fit = n_blocks >= MIN_CLOCK_BLOCKS
    nq = int(n_blocks[fit].max()) if fit.any() else 1
    xb = xq[:, :nq]
    # Position of the feature's line phase modulo P0 per block; it drifts as (P − P0)/P per
    # sample when P != P0 (block-wise line phase, unwrapped and line-fitted: METHODS §4).
    off = -np.unwrap(np.angle(xb), axis=1) / (2 * np.pi) * period0
    use = np.arange(nq) < np.where(fit, n_blocks, 0)[:, None]
    w = np.abs(xb) * use
    s, c, rms, se = _weighted_lines(centre[:nq], off, w, np.where(fit, n_blocks, 0))
    with np.errstate(divide="ignore", invalid="ignore"):
        c_flat = (w * off).sum(axis=1) / w.sum(axis=1)  # intercept with the slope set to 0
    return dict(
        peak=peak, line_snr=line_snr, x_all=x_all, n_blocks=n_blocks, fit=fit,
        s=s, c=c, c_flat=c_flat, rms=rms, se=se,
    )  # fmt: skip


def _rows_of(buf: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """buf[rows], a view when the rows are consecutive."""
    if rows.size and np.all(np.diff(rows) == 1):
        return buf[rows[0] : rows[-1] + 1]
    return buf[rows]


def _clock_decision(
    co: dict, j: int, period0: float, window: int, track_clock: bool
) -> tuple[float, float, int, float, float, float, str]:
    """One burst's coarse grid from :func:`~iqstat.sync.full_rate._coarse_many` (or the
    decimated feature's equivalent): t0, P, blocks, rms, se [ppm], line SNR [dB] and a status
    line (the clock offset kept only where significant)."""
    shift = (period0 - window + 1) / 2.0  # feature peak ↔ window aligned with a symbol
    n_blocks = int(co["n_blocks"][j])
    if co["fit"][j]:
        s, c = float(co["s"][j]), float(co["c"][j])
        rms, se_ppm = float(co["rms"][j]), float(co["se"][j]) * 1e6
        ppm = -s * 1e6  # (P0/P − 1)·1e6 with P = P0/(1 − s)
        if not math.isfinite(ppm) or abs(ppm) > MAX_CLOCK_OFFSET_PPM:
            status = f"block fit gave {ppm:+.0f} ppm, implausible: kept the nominal rate"
            s = 0.0
        elif abs(ppm) < CLOCK_SIGNIFICANCE * se_ppm:
            status = (
                f"clock offset {ppm:+.1f} ± {se_ppm:.1f} ppm not significant on this burst: "
                "kept the nominal rate"
            )
            s = 0.0
        else:
            status = f"clock {ppm:+.1f} ± {se_ppm:.1f} ppm from {n_blocks} blocks"
        if s == 0.0:
            c = float(co["c_flat"][j])
        period = period0 / (1.0 - s)
        t_peak = c / (1.0 - s)
    else:
        period, rms, se_ppm = period0, float("nan"), float("nan")
        t_peak = -float(np.angle(co["x_all"][j])) / (2 * np.pi) * period0
        status = (
            f"burst too short for a clock fit ({n_blocks} blocks of {CLOCK_BLOCK_SYMBOLS} "
            "symbols): nominal rate"
            if track_clock
            else "clock not tracked"
        )
        n_blocks = 0
    t0 = float(np.mod(t_peak - shift, period))
    return t0, float(period), n_blocks, rms, se_ppm, float(co["line_snr"][j]), status
