"""Symbol synchronisation: fractional timing, sample-clock offset and frame alignment.

:func:`recover_timing` turns a burst of samples and the link's tones into a symbol grid
(start t0 and period P, both fractional, in receiver samples); :func:`align_frame` finds the
known header (preamble + sync word) in the hard decisions made on that grid.
:func:`time_and_correlate_many` is the fast path of a batch: block-rate mixing
(:func:`~iqstat.correlate.mix_blocks_many`), the decimated feature
(:func:`recover_timing_blocks_many`) and the correlator bank from the same block sums; bursts
whose symbol-rate line is below STRONG_LINE_DB are checked again at full rate
(:func:`recover_timing_many` with ``coarse=``).

Timing model (the one of :mod:`iqstat.synth`): symbol k occupies [t0 + k·P, t0 + (k+1)·P) with
P = (fs/Rs)/(1 + ppm·1e-6); a positive clock offset means the transmitter's symbol clock is
fast (its symbols are shorter in receiver samples).
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Sequence
from dataclasses import dataclass, field, fields
from typing import Literal

import numpy as np
import scipy.fft
from scipy import special

from iqstat.correlate import (
    _SLICE_BYTES,
    BlockSums,
    Scratch,
    _bank_blocks,
    _check_rate,
    _check_tone_list,
    _mix_blocks,
    batch_buffer,
    block_samples_for,
    check_samples,
    mix_cumulative_many,
    symbol_boundaries,
    unit_phasors,
)
from iqstat.errors import MeasurementError, ParameterError
from iqstat.synth.modulator import modulate

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

#: Half-widths of the local matched-energy check grid: timing at the burst centre and drift
#: at its ends, in symbol periods, and the number of points on each axis.
_CHECK_HALF_WIDTH = (0.25, 0.1)
_CHECK_POINTS = (11, 5)

#: The line-phase grid is kept unless a local candidate holds more matched energy than this.
MAX_CHECK_GAIN_DB = 0.05
_MAX_CHECK_MOVES = 4

#: A clock slope smaller than this many standard errors is not significant: keep fs/Rs.
CLOCK_SIGNIFICANCE = 3.0

#: At and above this symbol-rate line SNR [dB] the decimated timing
#: (:func:`time_and_correlate_many`) is final: its own spread is then below ~1 % of a symbol,
#: well inside the matched-energy check's finest step (5 %).
STRONG_LINE_DB = 20.0

#: Rows of the decimated feature per transform of the spectral floor.
_FLOOR_ROWS = 8

#: Fewest feature points (blocks) per symbol worth decimating to; the block length itself is
#: :func:`~iqstat.correlate.block_samples_for` the period (at least 12 blocks per symbol).
FEATURE_MIN_BLOCKS = 4

#: Probability that a random symbol stream passes the default header error threshold anywhere.
FALSE_LOCK_PROBABILITY = 1e-4


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


#: Temporaries of the batched timing stages are kept below about this many bytes per chunk.
#: (A few MB: the elementwise passes then run in the core's cache, which on a 2 MB L2 is
#: faster than one large pass over the whole batch.)
_CHUNK_BYTES = 2 << 20


def _chunks(ids: np.ndarray, bytes_each: int):
    """Consecutive pieces of ids whose temporaries stay below _CHUNK_BYTES."""
    step = max(1, _CHUNK_BYTES // max(1, bytes_each))
    for i in range(0, ids.size, step):
        yield ids[i : i + step]


def _median_rows(a: np.ndarray) -> np.ndarray:
    """Median of each row of a 2-D array (np.median along axis 1, by one partition)."""
    n = a.shape[1]
    h = n // 2
    if n % 2:
        return np.partition(a, h, axis=1)[:, h]
    p = np.partition(a, (h - 1, h), axis=1)
    return 0.5 * (p[:, h - 1] + p[:, h])


def _rows_of(buf: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """buf[rows], a view when the rows are consecutive."""
    if rows.size and np.all(np.diff(rows) == 1):
        return buf[rows[0] : rows[-1] + 1]
    return buf[rows]


def _coarse_many(
    sub: np.ndarray, n: np.ndarray, period0: float, window: int, track_clock: bool
) -> dict:
    """Symbol-rate line of the feature (Oerder & Meyr) and the block clock fit, per burst.

    ``sub`` is (Bc, M, W) running sums, n the bursts' sample counts. Returns arrays per burst:
    peak energy of the feature (0 = no energy), line SNR [dB], line phase coefficient, block
    count, slope s, intercept, rms and slope standard error of the block fit.
    """
    bc, m, width = sub.shape
    block = int(round(CLOCK_BLOCK_SYMBOLS * period0))
    f_len = width - window
    q_tot = -(-f_len // block)
    ne = n + 1 - window  # valid feature samples per burst
    e = np.zeros((bc, q_tot * block))
    ev = e[:, :f_len]
    for i in range(m):  # M <= 4 tones: E[n] = max_i |S_i[n + L] − S_i[n]|² (step 1)
        d = sub[:, i, window:] - sub[:, i, :-window]
        if i == 0:
            np.square(d.real, out=ev)
            ev += d.imag**2
        else:
            pw = d.real**2
            pw += d.imag**2
            np.maximum(ev, pw, out=ev)
    valid = np.arange(e.shape[1]) < ne[:, None]
    e *= valid  # partial windows past each burst's end
    peak = e.max(axis=1)
    e -= (e.sum(axis=1) / ne)[:, None]
    e *= valid
    # Line strength against the spectral floor of the feature: rfft bins around the line,
    # one transform per FFT length (bursts of similar length share it).
    floor = np.full(bc, np.nan)
    n_fft = np.array([scipy.fft.next_fast_len(int(k), real=True) for k in ne])
    for nf in np.unique(n_fft):
        sel = np.nonzero(n_fft == nf)[0]
        kk = int(round(nf / period0))
        n_bins = nf // 2 + 1
        lo, hi = max(1, kk - 200), min(n_bins, kk + 201)
        bins = np.r_[np.arange(lo, max(lo, kk - 3)), np.arange(min(hi, kk + 4), hi)]
        if bins.size == 0:
            continue
        seg = e[sel, : min(int(nf), e.shape[1])]
        spec = scipy.fft.rfft(seg, int(nf), axis=1)[:, bins]
        floor[sel] = np.median(spec.real**2 + spec.imag**2, axis=1)
    # Block sums of E[n]·e^{−j2πn/P0}: e^{−j2πn/P0} = e^{−j2πqB/P0}·e^{−j2πl/P0}, n = qB + l,
    # so they are one real matrix product with the (B, 2) within-block table (step 2).
    within = unit_phasors(-np.arange(block) / period0)
    cs = np.stack([within.real, within.imag], axis=1)
    r = e.reshape(bc * q_tot, block) @ cs
    xq = (r[:, 0] + 1j * r[:, 1]).reshape(bc, q_tot)
    xq *= unit_phasors(-(np.arange(q_tot) * block) / period0)
    x_all = xq.sum(axis=1)
    with np.errstate(divide="ignore"):
        line_snr = np.where(
            floor > 0, 10 * np.log10(np.abs(x_all) ** 2 / np.where(floor > 0, floor, 1.0)), np.inf
        )
    n_blocks = ne // block if track_clock else np.zeros(bc, dtype=np.int64)
    fit = n_blocks >= MIN_CLOCK_BLOCKS
    nq = int(n_blocks[fit].max()) if fit.any() else 1
    xb = xq[:, :nq]
    # Position of the feature peaks modulo P0 per block; it drifts as (P − P0)/P per sample
    # when P != P0 (block-wise line phase, unwrapped and line-fitted: METHODS §4).
    off = -np.unwrap(np.angle(xb), axis=1) / (2 * np.pi) * period0
    centre = np.arange(nq, dtype=np.float64) * block + block // 2
    use = np.arange(nq) < np.where(fit, n_blocks, 0)[:, None]
    w = np.abs(xb) * use
    s, c, rms, se = _weighted_lines(centre, off, w, np.where(fit, n_blocks, 0))
    with np.errstate(divide="ignore", invalid="ignore"):
        c_flat = (w * off).sum(axis=1) / w.sum(axis=1)  # intercept with the slope set to 0
    return dict(
        peak=peak, line_snr=line_snr, x_all=x_all, n_blocks=n_blocks, fit=fit,
        s=s, c=c, c_flat=c_flat, rms=rms, se=se,
    )  # fmt: skip


def _clock_decision(
    co: dict, j: int, period0: float, window: int, track_clock: bool
) -> tuple[float, float, int, float, float, float, str]:
    """One burst's coarse grid from :func:`_coarse_many`: t0, P, blocks, rms, se [ppm],
    line SNR [dB] and a status line (the clock offset kept only where significant)."""
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


def _gather_energies(
    buf: np.ndarray, rows: np.ndarray, b: np.ndarray, reduce_max: bool, axis: int = -1
) -> np.ndarray:
    """|S[b_{k+1}] − S[b_k]|² / N_k for boundaries b of burst rows ``rows`` (first axis).

    The symbol axis of b (K + 1 boundaries) is ``axis``. Returns b's shape with K along it,
    the max over tones (reduce_max) or per tone with the tone axis first; an interval of
    zero samples (padding) has energy 0.
    """
    m, width = buf.shape[1], buf.shape[2]
    flat = buf.reshape(-1)
    base = (rows * (m * width)).reshape((-1,) + (1,) * (b.ndim - 1)) + b
    nk = np.diff(b, axis=axis)
    hi = [slice(None)] * b.ndim
    lo = [slice(None)] * b.ndim
    hi[axis], lo[axis] = slice(1, None), slice(None, -1)
    hi, lo = tuple(hi), tuple(lo)
    best = None
    per_tone = []
    for i in range(m):  # M <= 4 tones, each over all bursts, candidates and symbols at once
        s = flat[base + i * width]
        d = s[hi] - s[lo]
        e = d.real**2
        e += d.imag**2
        if reduce_max:
            best = e if best is None else np.maximum(best, e, out=best)
        else:
            per_tone.append(e)
    out = best if reduce_max else np.stack(per_tone)
    np.divide(
        out, np.broadcast_to(nk, out.shape), out=out, where=np.broadcast_to(nk, out.shape) > 0
    )
    return out


def _energy_check_many(
    buf: np.ndarray,
    rows: np.ndarray,
    n: np.ndarray,
    t0: np.ndarray,
    period: np.ndarray,
    vary_period: bool,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Matched energy Σ_k max_i |z_ki|² at each burst's grid and the most a local search adds.

    The candidates move the timing at the burst centre and the drift at its ends (the two are
    uncorrelated, unlike t0 and P). Returns per burst the gain [dB] of the best candidate over
    the grid given (>= 0) and that candidate's timing and drift offsets [periods].
    """
    wt, wd = _CHECK_HALF_WIDTH
    gt = np.linspace(-wt, wt, _CHECK_POINTS[0])
    gd = np.linspace(-wd, wd, _CHECK_POINTS[1]) if vary_period else np.zeros(1)
    tt, dd = (g.ravel() for g in np.meshgrid(gt, gd, indexing="ij"))
    tt, dd = np.r_[0.0, tt], np.r_[0.0, dd]  # candidate 0 is the grid itself
    nb = n.size
    k_first = np.zeros(nb, dtype=np.int64)
    n_sym = np.zeros(nb, dtype=np.int64)
    for j in range(nb):  # scalar bounds per burst (no numpy calls)
        reach = (wt + wd) * float(period[j])  # largest shift of any boundary
        kf = math.ceil(max(0.0, reach - 1.0 - float(t0[j])) / float(period[j]))
        k_first[j] = kf
        n_sym[j] = _whole_symbols(int(n[j]) - math.ceil(reach), float(t0[j]), float(period[j])) - kf
    gain = np.zeros(nb)
    bt, bd = np.zeros(nb), np.zeros(nb)
    ok = np.nonzero(n_sym >= 2)[0]
    if ok.size == 0:
        return gain, bt, bd
    k_len = int(n_sym[ok].max()) + 1
    for part in _chunks(ok, tt.size * k_len * 64):
        kf, ns = k_first[part], n_sym[part]
        k = kf[:, None] + np.minimum(np.arange(k_len), ns[:, None]).astype(np.float64)
        k_mid = (kf + (kf + ns)) / 2.0
        half = ns / 2.0
        k_rel = (k - k_mid[:, None]) / half[:, None]
        p = period[part]
        t_mid = (t0[part] + k_mid * p)[:, None] + tt[None, :] * p[:, None]
        drift = (half[:, None] + dd[None, :]) * p[:, None]
        # Symbol-major, (burst, symbol, candidate): the candidates of one boundary lie within
        # ±0.35 T of each other, so each gather stays within a few cache lines.
        t = k_rel[:, :, None] * drift[:, None, :]
        t += t_mid[:, None, :]
        np.ceil(t, out=t)
        e = _gather_energies(buf, rows[part], t.astype(np.intp), True, axis=1).sum(axis=1)
        i = np.argmax(e, axis=1)
        e_best = np.take_along_axis(e, i[:, None], axis=1)[:, 0]
        with np.errstate(divide="ignore", invalid="ignore"):
            g = np.where(e[:, 0] > 0, 10 * np.log10(e_best / e[:, 0]), 0.0)
        gain[part], bt[part], bd[part] = g, tt[i], dd[i]
    return gain, bt, bd


def recover_timing_many(
    xs: Sequence[np.ndarray],
    sample_rate_hz: float,
    symbol_rate_hz: float | Sequence[float],
    tone_freqs_list: Sequence[Sequence[float]],
    *,
    track_clock: bool = True,
    cumulatives: Sequence[np.ndarray] | None = None,
    errors: Literal["raise", "return"] = "raise",
    coarse: Sequence[SymbolTiming | None] | None = None,
) -> list[SymbolTiming | MeasurementError]:
    """:func:`recover_timing` of a batch of bursts, in a fixed number of numpy calls.

    Parameters
    ----------
    xs : sequence of B ndarrays, shapes (n_b,)
        The bursts' samples (ragged).
    sample_rate_hz : float
        Sample rate fs [Hz].
    symbol_rate_hz : float or sequence of B floats
        Nominal symbol rate Rs [Bd], common or per burst.
    tone_freqs_list : sequence of B sequences of float
        Each burst's tones [Hz], CFO included; the same count M for all.
    track_clock : bool
        Estimate the clock offset (see :func:`recover_timing`).
    cumulatives : sequence of B ndarrays, optional
        :func:`~iqstat.correlate.mix_cumulative_many` of the same bursts and tones (views of
        one buffer: used in place), or arrays made one by one (copied into one buffer).
    errors : {"raise", "return"}
        What a burst that cannot be timed (too short, no energy) does: "raise" raises its
        MeasurementError; "return" puts the MeasurementError in that burst's slot and times
        the others. Bad parameters always raise ParameterError.
    coarse : sequence of B SymbolTiming or None, optional
        A grid per burst already found on the decimated feature
        (:func:`recover_timing_blocks_many` or :func:`time_and_correlate_many`): the
        matched-energy check starts from it, and its line SNR and clock fit are kept, instead
        of the full-rate feature's (the costliest step here: ~half of the time). None in a
        slot: that burst is timed from its full-rate feature.

    Returns
    -------
    list of B SymbolTiming (or MeasurementError with ``errors="return"``)
        Each the same as :func:`recover_timing` of that burst alone (to rounding), or, with
        ``coarse``, the matched-energy search from that grid.

    Notes
    -----
    The steps of :func:`recover_timing`, each over the whole batch: the feature, its
    symbol-rate coefficient and block sums (a real matrix product with a within-block phasor
    table), the spectral floor (one rfft per FFT length), the clock line fits (vectorised over
    bursts), each round of the matched-energy check (all candidates of all bursts still
    moving, one gather per tone), and the final matched fraction. Work is done in chunks of
    bursts whose temporaries stay below ~2 MB.
    """
    if errors not in ("raise", "return"):
        raise ParameterError(f"errors {errors!r} is not one of 'raise', 'return'")
    fs = _check_rate("sample_rate_hz", sample_rate_hz)
    nb = len(xs)
    if len(tone_freqs_list) != nb:
        raise ParameterError(
            f"xs has {nb} bursts but tone_freqs_list has {len(tone_freqs_list)} entries; "
            "give one tone list per burst"
        )
    if isinstance(symbol_rate_hz, (int, float, np.number)):
        rates = [_check_rate("symbol_rate_hz", symbol_rate_hz)] * nb
    else:
        if len(symbol_rate_hz) != nb:
            raise ParameterError(
                f"symbol_rate_hz has {len(symbol_rate_hz)} entries for {nb} bursts; give one "
                "rate, or one per burst"
            )
        rates = [_check_rate("symbol_rate_hz", r) for r in symbol_rate_hz]
    if cumulatives is not None and len(cumulatives) != nb:
        raise ParameterError(f"cumulatives has {len(cumulatives)} entries for {nb} bursts")
    if coarse is not None and len(coarse) != nb:
        raise ParameterError(f"coarse has {len(coarse)} entries for {nb} bursts; give one each")
    given: dict[int, tuple] = {}
    for j, t in enumerate(coarse or ()):
        if t is not None:
            if not isinstance(t, SymbolTiming):
                raise ParameterError(f"coarse[{j}] is {type(t).__name__}; give a SymbolTiming")
            given[j] = _given_coarse(t)
    if nb == 0:
        return []
    arrays = [check_samples(x) for x in xs]
    freqs = _check_tone_list(tone_freqs_list, fs)
    period0 = np.array([fs / r for r in rates])
    for r, p0 in zip(rates, period0, strict=True):
        if p0 < 2.0:
            raise ParameterError(
                f"symbol_rate_hz {r!r} gives {p0:.3g} samples per symbol at {fs:g} S/s; "
                "timing recovery needs at least 2"
            )
    n = np.array([a.size for a in arrays], dtype=np.int64)
    out: list = [None] * nb
    for j in range(nb):
        if n[j] < (MIN_SYMBOLS + 2) * period0[j]:
            out[j] = MeasurementError(
                f"burst of {n[j]} samples holds fewer than {MIN_SYMBOLS + 2} symbols of "
                f"{period0[j]:.4g} samples; timing recovery needs a longer burst"
            )
    ok = np.array([j for j in range(nb) if out[j] is None], dtype=np.int64)
    if ok.size:
        if cumulatives is None:
            cums = mix_cumulative_many([arrays[j] for j in ok], fs, freqs[ok])
        else:
            cums = [cumulatives[j] for j in ok]
        buf, rows_ok = batch_buffer(cums, freqs.shape[1], n[ok])
        rows = np.zeros(nb, dtype=np.int64)
        rows[ok] = rows_ok
        _time_bursts(buf, rows, n, period0, ok, track_clock, out, given)
    if errors == "raise":
        for r in out:
            if isinstance(r, MeasurementError):
                raise r
    return out


def _given_coarse(t: SymbolTiming) -> tuple:
    """A decimated-feature grid as the coarse tuple of :func:`_clock_decision` (its clock
    status is the third part of the message :func:`_time_blocks_chunk` writes)."""
    q = t.quality
    parts = t.message.split("; ")
    status = parts[2] if len(parts) > 2 else "clock from the decimated feature"
    return (
        float(t.t0_samples),
        float(t.period_samples),
        int(q.get("n_clock_blocks", 0)),
        float(q.get("clock_fit_rms_samples", float("nan"))),
        float(q.get("clock_offset_se_ppm", float("nan"))),
        float(q.get("line_snr_db", float("nan"))),
        status,
    )


def _time_bursts(buf, rows, n, period0, ok, track_clock, out, given=None) -> None:
    """The core of :func:`recover_timing_many` for the bursts ``ok``; fills ``out``.

    All stages run on a few bursts at a time (a chunk of ~2 MB of temporaries), so that their
    running sums are still in the cache when the matched-energy check gathers from them.
    """
    width = buf.shape[2]
    for p0 in np.unique(period0[ok]):  # one group per nominal period (usually one)
        ids = ok[period0[ok] == p0]
        for part in _chunks(ids, width * (16 * 2 + 8 * 3)):
            _time_chunk(buf, rows, n, float(p0), part, track_clock, out, given or {})


def _time_chunk(buf, rows, n, p0, part, track_clock, out, given) -> None:
    """Timing of the bursts ``part`` (one nominal period p0); fills ``out``. Bursts in
    ``given`` start from that coarse grid instead of their full-rate feature."""
    m = buf.shape[1]
    period0 = np.full(out.__len__(), p0)
    window = max(1, int(round(p0)))
    coarse: dict[int, tuple] = {int(j): given[int(j)] for j in part if int(j) in given}
    rest = np.array([j for j in part if int(j) not in given], dtype=np.int64)
    if rest.size:
        co = _coarse_many(_rows_of(buf, rows[rest]), n[rest], p0, window, track_clock)
        for jj, j in enumerate(rest):
            if not co["peak"][jj] > 0:
                out[j] = MeasurementError(
                    "burst has no energy at the tones (all-zero samples); check the burst limits"
                )
            else:
                coarse[int(j)] = _clock_decision(co, jj, p0, window, track_clock)
    ids = np.array(sorted(coarse), dtype=np.int64)
    if ids.size == 0:
        return
    t0_c = np.array([coarse[j][0] for j in ids])
    period_c = np.array([coarse[j][1] for j in ids])
    t0, period = t0_c.copy(), period_c.copy()
    moved = np.zeros(ids.size, dtype=np.int64)
    gain = np.zeros(ids.size)
    active = np.arange(ids.size)
    for _ in range(_MAX_CHECK_MOVES):
        g, dt, dd = _energy_check_many(
            buf, rows[ids[active]], n[ids[active]], t0[active], period[active], track_clock
        )
        gain[active] = g
        go = g > MAX_CHECK_GAIN_DB
        # The line phase missed the energy peak (weak line, gross error): move to the best
        # candidate and check again.
        for a, dti, ddi in zip(active[go], dt[go], dd[go], strict=True):
            j = ids[a]
            n_half = (_whole_symbols(int(n[j]), float(t0[a]), float(period[a])) - 1) / 2.0
            t_mid = t0[a] + n_half * period[a] + dti * period[a]
            period[a] = period[a] + ddi * period[a] / max(n_half, 1.0)
            t0[a] = t_mid - n_half * period[a]
            moved[a] += 1
        active = active[go]
        if active.size == 0:
            break
    k_mid = np.round((n[ids] / 2 - t0_c) / period_c)
    fine_shift = (t0 + k_mid * period) - (t0_c + k_mid * period_c)
    t0 = np.mod(t0, period)
    n_sym = np.array(
        [_whole_symbols(int(n[j]), float(t0[a]), float(period[a])) for a, j in enumerate(ids)]
    )
    matched = np.full(ids.size, np.nan)
    k_len = int(n_sym.max()) + 1
    for part in _chunks(np.arange(ids.size), k_len * 8 * (6 + 3 * m)):
        k = np.minimum(np.arange(k_len), n_sym[part][:, None]).astype(np.float64)
        b = np.ceil(t0[part][:, None] + k * period[part][:, None]).astype(np.intp)
        e = _gather_energies(buf, rows[ids[part]], b, False)  # (M, R, K)
        total = e.sum(axis=(0, 2))
        top = e.max(axis=0).sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            matched[part] = np.where((n_sym[part] > 0) & (total > 0), top / total, np.nan)
    for a, j in enumerate(ids):
        tc, pc, n_blocks, rms, se_ppm, line_snr_db, clock_txt = coarse[int(j)]
        p0 = float(period0[j])
        tj, pj, nj = float(t0[a]), float(period[a]), int(n_sym[a])
        reliable = line_snr_db >= MIN_LINE_SNR_DB
        message = (
            f"{nj} symbols, t0 {tj:.3f} samples, period {pj:.5f} samples; "
            f"symbol-rate line {line_snr_db:.1f} dB; {clock_txt}"
        )
        if moved[a]:
            message += f"; matched-energy search moved the grid {fine_shift[a]:+.2f} samples"
        if not reliable:
            message += f"; line below {MIN_LINE_SNR_DB:g} dB: timing unreliable"
        quality = {
            "line_snr_db": float(line_snr_db),
            "n_clock_blocks": int(n_blocks),
            "clock_fit_rms_samples": float(rms),
            "clock_offset_se_ppm": float(se_ppm),
            "coarse_t0_samples": float(tc),
            "coarse_clock_offset_ppm": float((p0 / pc - 1.0) * 1e6),
            "fine_moves": int(moved[a]),
            "fine_shift_samples": float(fine_shift[a]),
            "residual_gain_db": float(gain[a]),
            "matched_fraction": float(matched[a]),
        }
        out[j] = SymbolTiming(
            t0_samples=tj,
            period_samples=pj,
            clock_offset_ppm=float((p0 / pj - 1.0) * 1e6) if track_clock else 0.0,
            n_symbols=nj,
            method=(
                "decimated feature line phase (Oerder-Meyr) + block clock fit + "
                "matched-energy search"
                if int(j) in given
                else "feature line phase (Oerder-Meyr) + block clock fit + matched-energy search"
            ),
            quality=quality,
            message=message,
            reliable=bool(reliable),
        )


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
        Estimate the clock offset (see :func:`recover_timing`).

    Returns
    -------
    (timings, zs)
        ``timings[b]``: what :func:`recover_timing_blocks_many` gives the burst (SymbolTiming,
        MeasurementError, or None when the symbols are too short to decimate);
        ``zs[b]``: the correlator outputs (n_symbols, M) on that grid, what
        :func:`~iqstat.correlate.correlate_symbols` gives to ~1e-7 relative, or None where
        the timing is not a SymbolTiming. Where the line is below STRONG_LINE_DB, re-time the
        burst with :func:`recover_timing_many` and correlate it again.

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
        Estimate the clock offset (see :func:`recover_timing`).

    Returns
    -------
    list of B SymbolTiming, MeasurementError or None
        The grid from the feature's symbol-rate line, without the matched-energy check of
        :func:`recover_timing_many`. It is final where the line is strong
        (``quality["line_snr_db"] >= STRONG_LINE_DB``); re-time weaker bursts with
        :func:`recover_timing_many`. MeasurementError: the burst is too short or has no
        energy. None: a symbol spans fewer than 2·FEATURE_MIN_BLOCKS samples, or fewer than
        FEATURE_MIN_BLOCKS blocks (use :func:`recover_timing_many`).

    Notes
    -----
    The feature of :func:`recover_timing` (max over tones of the energy in a one-symbol
    window) is evaluated at every block start instead of at every sample: with S_q the
    running sums at block starts (blocks of L samples) and a window of W = round(P0/L)
    blocks, e_q = max_i |S_{q+W} − S_q|², the energy of samples qL .. qL + WL − 1. Its centre
    u_q = qL + (WL − 1)/2 is exact, so the line coefficient Σ_q e_q·exp(−j2πu_q/P0) locates
    the symbol centres directly (Oerder & Meyr with the feature sampled P0/L times per
    symbol [1]_; the feature's harmonics near P0/L alias close to the line and beat along
    the burst, which leaves a few thousandths of a symbol). The spectral floor, the block
    clock fit and the significance test are those of :func:`recover_timing`. Bursts are
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
    x_all = xq.sum(axis=1)
    # Spectral floor around the line: the line sits at bin nf·L/P0 of an nf-point transform
    # of the feature (the same Hz per bin as the full-rate one); one transform per length.
    floor = np.full(bc, np.nan)
    n_fft = np.array([scipy.fft.next_fast_len(int(k), real=True) for k in ne])
    for nf in np.unique(n_fft):
        sel = np.nonzero(n_fft == nf)[0]
        kk = int(round(nf * blk / p0))
        n_bins = nf // 2 + 1
        lo, hi = max(1, kk - 200), min(n_bins, kk + 201)
        bins = np.r_[np.arange(lo, max(lo, kk - 3)), np.arange(min(hi, kk + 4), hi)]
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
            floor[rk] = _median_rows(spec.real.astype(np.float64) ** 2 + spec.imag**2)
    with np.errstate(divide="ignore"):
        line_snr = np.where(
            floor > 0, 10 * np.log10(np.abs(x_all) ** 2 / np.where(floor > 0, floor, 1.0)), np.inf
        )
    n_blocks = ne // block_f if track_clock else np.zeros(bc, dtype=np.int64)
    fit = n_blocks >= MIN_CLOCK_BLOCKS
    nq = int(n_blocks[fit].max()) if fit.any() else 1
    xb = xq[:, :nq]
    # Positions of the symbol centres modulo P0 per block; they drift as (P − P0)/P per
    # sample when P != P0 (block-wise line phase, unwrapped and line-fitted: METHODS §4).
    off = -np.unwrap(np.angle(xb), axis=1) / (2 * np.pi) * p0
    centre = u0 + blk * (np.arange(nq) * block_f + (block_f - 1) / 2.0)
    use = np.arange(nq) < np.where(fit, n_blocks, 0)[:, None]
    w = np.abs(xb) * use
    sl, cl, rms, se = _weighted_lines(centre, off, w, np.where(fit, n_blocks, 0))
    with np.errstate(divide="ignore", invalid="ignore"):
        c_flat = (w * off).sum(axis=1) / w.sum(axis=1)
    co = dict(
        peak=peak, line_snr=line_snr, x_all=x_all, n_blocks=n_blocks, fit=fit,
        s=sl, c=cl, c_flat=c_flat, rms=rms, se=se,
    )  # fmt: skip
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
                "residual_gain_db": float("nan"),
                "matched_fraction": float("nan"),
            },
            message=message,
            reliable=bool(reliable),
        )


def recover_timing(
    x: np.ndarray,
    sample_rate_hz: float,
    symbol_rate_hz: float,
    tone_freqs_hz: Sequence[float],
    *,
    track_clock: bool = True,
    cumulative: np.ndarray | None = None,
) -> SymbolTiming:
    """Fractional symbol timing and sample-clock offset of a burst.

    Parameters
    ----------
    x : ndarray, shape (n_samples,)
        Complex baseband samples of one burst (some noise around it is fine).
    sample_rate_hz : float
        Sample rate fs [Hz].
    symbol_rate_hz : float
        Nominal symbol rate Rs [Bd].
    tone_freqs_hz : sequence of float
        The link's tones relative to the capture centre [Hz], CFO included (one for OOK).
    track_clock : bool
        Estimate the clock offset (period ≠ fs/Rs). False keeps P = fs/Rs.
    cumulative : ndarray, shape (M, n_samples + 1), optional
        :func:`~iqstat.correlate.mix_cumulative` of the same x and tones, when the caller
        has it already (it is the costliest step here, and
        :func:`~iqstat.correlate.correlate_symbols` can use the same array).

    Returns
    -------
    SymbolTiming

    Notes
    -----
    1. Feature E[n] = max_i |y_i[n]|², y_i[n] = Σ_{m=n}^{n+L−1} x[m]·e^{−j2πf_i m/fs} with
       L = round(fs/Rs) (sliding one-symbol correlators; for CPFSK the plain |x|² has no
       symbol-rate line) [METHODS §4].
    2. The phase of the symbol-rate Fourier coefficient X = Σ_n E[n]·e^{−j2πn/P0} locates the
       feature peaks, i.e. the symbol starts (square-law timing of Oerder & Meyr [1]_). With
       ≥ 4 blocks of 64 symbols, the phase per block is unwrapped and line-fitted against
       the block centres: the slope is (P − P0)/P, which gives the clock offset.
    3. Fine search: maximise the total matched energy Σ_k max_i |z_ki|² over the timing at the
       burst centre and the drift at its ends, on three nested grids down to 0.1 % of a
       period. A timing error τ costs about |τ|/T of the matched energy for 2-FSK with h = 1,
       so the maximum is sharp.

    References
    ----------
    .. [1] M. Oerder and H. Meyr, "Digital filter and square timing recovery," IEEE Trans.
       Commun. 36(5):605–612, 1988.
    """
    return recover_timing_many(
        [x],
        sample_rate_hz,
        symbol_rate_hz,
        [tone_freqs_hz],
        track_clock=track_clock,
        cumulatives=None if cumulative is None else [cumulative],
    )[0]


# ------------------------------------------------------------------------- frame alignment


@dataclass(frozen=True)
class FrameAlignment:
    """Where the known header (preamble + sync word) sits in a stream of symbol decisions.

    Attributes
    ----------
    found : bool
    start_symbol : int or None
        Index of the first header symbol in the timing grid.
    bit_errors : int or None
        Bit errors in the header at that position (Gray labels for 4-FSK).
    header_bits : int
        Bits in the header.
    inverted : bool
        The tone order is reversed (2-FSK: tones swapped, e.g. a spectrally inverted capture).
    score : float
        1 − bit_errors/header_bits at the chosen position (0 if not found).
    message : str
    symbol_errors : int or None
        Symbol errors in the header at that position.
    n_candidates : int
        Positions (either polarity) within the error threshold; the soft metric chose among
        them when given.
    """

    found: bool
    start_symbol: int | None
    bit_errors: int | None
    header_bits: int
    inverted: bool
    score: float
    message: str
    symbol_errors: int | None = None
    n_candidates: int = 0

    def to_dict(self) -> dict:
        return {f.name: getattr(self, f.name) for f in fields(self)}


def _int_symbols(name: str, a: np.ndarray) -> np.ndarray:
    s = np.asarray(a)
    if s.ndim != 1:
        raise ParameterError(f"{name} must be a 1-D array of tone indices, got shape {s.shape}")
    if s.size and (s.dtype.kind not in "biu" or s.min() < 0):
        raise ParameterError(f"{name} must hold non-negative integer tone indices")
    return s.astype(np.int64, copy=False)


#: Below this many multiply-adds the sliding dot product is summed directly by numpy, above
#: it by FFT (the choice scipy.signal.correlate makes, without its method selection).
_DIRECT_DOT_WORK = 1_000_000


def _sliding_dot(a: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Σ_j a[s + j]·v[j] for every s with the pattern inside a (FFT or direct, as faster)."""
    if a.size * v.size <= _DIRECT_DOT_WORK:
        return np.correlate(a, v, mode="valid")
    return _fft_valid_correlation(a[None], v)[0]


def _fft_valid_correlation(a: np.ndarray, v: np.ndarray) -> np.ndarray:
    """r[b, s, ...] = Σ_j a[b, s + j, ...]·v[j, ...] for s = 0..n − m (real inputs), by one
    zero-padded real FFT along axis 1: the 'valid' part of the convolution with v reversed."""
    n, m = a.shape[1], v.shape[0]
    nfft = scipy.fft.next_fast_len(n + m - 1, real=True)
    fa = scipy.fft.rfft(a, nfft, axis=1)
    fv = scipy.fft.rfft(v[::-1], nfft, axis=0)
    r = scipy.fft.irfft(fa * fv[None], nfft, axis=1)
    return r[:, m - 1 : n]


@functools.lru_cache(maxsize=64)
def _random_match_cdf(n_bits: int) -> tuple[float, ...]:
    """P(at most e of n_bits random bits wrong), e = 0..n_bits // 4 (a header's false match)."""
    # Binomial(n_bits, 1/2) CDF by scipy.special.bdtr (the routine under scipy.stats.binom.cdf).
    return tuple(special.bdtr(np.arange(n_bits // 4 + 1), n_bits, 0.5))


def align_frame(
    symbols_hard: np.ndarray,
    header_symbols: np.ndarray,
    *,
    max_errors: int | None = None,
    soft: np.ndarray | None = None,
    n_tones: int | None = None,
    detect_inverted: bool = True,
) -> FrameAlignment:
    """Find the header in hard symbol decisions, tolerating bit errors.

    Parameters
    ----------
    symbols_hard : ndarray of int, shape (n_symbols,)
        Tone index decided per symbol (OOK: 0 off, 1 on).
    header_symbols : ndarray of int, shape (n_header,)
        The whole known pattern (preamble + sync word) as tone indices.
    max_errors : int, optional
        Most header bit errors accepted. Default: the largest count for which a random symbol
        stream passes anywhere (either polarity) with probability <= FALSE_LOCK_PROBABILITY,
        at most a quarter of the header bits.
    soft : ndarray, shape (n_symbols, n_tones), optional
        Branch energies per symbol; when given, the candidate with the largest correlation
        of the header with the centred energies (energy of the header's tone minus the mean
        over tones) wins.
    n_tones : int, optional
        Alphabet size (default: soft's width, else 4 if any index exceeds 1, else 2).
    detect_inverted : bool
        Also try the reversed tone order (t → M−1−t). Pass False for OOK.

    Returns
    -------
    FrameAlignment

    Notes
    -----
    Bit errors at shift s are counted per bit plane of the Gray labels g(t) = t xor (t >> 1)
    (tones low to high carry 00, 01, 11, 10): with ±1 planes a, v the mismatches are
    (L − Σ_j a[s+j]·v[j])/2. Reversing the tone order flips the most significant Gray bit.
    Periodic preambles match themselves at whole-period shifts, so the highest peak of a
    preamble-only correlation can sit a period off at low SNR (METHODS §10): the whole pattern
    is correlated, every position within the threshold is a candidate, and the soft metric
    (the noncoherent low-SNR log-likelihood ratio is proportional to the energy difference)
    decides among them.
    """
    return align_frame_many(
        [symbols_hard],
        header_symbols,
        softs=None if soft is None else [soft],
        n_tones=n_tones,
        detect_inverted=detect_inverted,
        max_errors=max_errors,
    )[0]


def _check_soft(soft, n_symbols: int) -> np.ndarray:
    c = np.asarray(soft, dtype=np.float64)
    if c.ndim != 2 or c.shape[0] != n_symbols or c.shape[1] < 2:
        raise ParameterError(
            f"soft has shape {c.shape}; give branch energies of shape "
            f"({n_symbols}, n_tones) matching symbols_hard"
        )
    if not np.all(np.isfinite(c)):
        raise ParameterError("soft holds non-finite values; give finite branch energies")
    return c


def _sliding_dots(a: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Σ_j a[b, s + j, ...]·v[j, ...] for every row b and shift s (pattern inside the row),
    summed over any trailing axes: one FFT correlation for the whole batch."""
    r = _fft_valid_correlation(a, v)
    return r.reshape(r.shape[0], r.shape[1], -1).sum(axis=2)


def _soft_header_dots(cc: np.ndarray, patterns: Sequence[np.ndarray]) -> list[np.ndarray]:
    """:func:`_sliding_dots` of the soft streams cc (B, K, M) with each (m, M) pattern: the
    streams' transform once for all patterns, and the sum over the M tones taken in the
    frequency domain (Σ_i IFFT(A_i·V_i) = IFFT(Σ_i A_i·V_i)), one inverse transform each."""
    n, m = cc.shape[1], patterns[0].shape[0]
    nfft = scipy.fft.next_fast_len(n + m - 1, real=True)
    fa = scipy.fft.rfft(cc, nfft, axis=1)  # (B, F, M)
    out = []
    for v in patterns:
        fv = scipy.fft.rfft(v[::-1], nfft, axis=0)  # (F, M)
        spec = fa[:, :, 0] * fv[None, :, 0]
        for i in range(1, fa.shape[2]):  # M <= 4 tones
            spec += fa[:, :, i] * fv[None, :, i]
        out.append(scipy.fft.irfft(spec, nfft, axis=1)[:, m - 1 : n])
    return out


def align_frame_many(
    hards: Sequence[np.ndarray],
    header_symbols: np.ndarray,
    *,
    softs: Sequence[np.ndarray] | None = None,
    n_tones: int | None = None,
    detect_inverted: bool = True,
    max_errors: int | None = None,
) -> list[FrameAlignment]:
    """:func:`align_frame` of a batch of symbol streams with one header, in a fixed number of
    numpy calls.

    Parameters
    ----------
    hards : sequence of B ndarrays of int, shapes (K_b,)
        Tone index decided per symbol, per burst (ragged).
    header_symbols : ndarray of int, shape (n_header,)
    softs : sequence of B ndarrays, shapes (K_b, n_tones), optional
        Branch energies per symbol (see :func:`align_frame`).
    n_tones, detect_inverted, max_errors
        As for :func:`align_frame`, common to the batch.

    Returns
    -------
    list of B FrameAlignment
        Each what :func:`align_frame` gives for that stream alone.

    Notes
    -----
    The streams are padded to a common length; the bit-plane mismatch counts and the soft
    metrics of all bursts are FFT correlations along the symbol axis (rounded to whole
    counts, so the counts are exact), and positions past each stream's end are masked. The
    candidate order (polarity, then position) and the tie-breaking are those of
    :func:`align_frame`.
    """
    hdr = _int_symbols("header_symbols", header_symbols)
    if hdr.size == 0:
        raise ParameterError("header_symbols is empty; give the preamble and sync word symbols")
    if max_errors is not None and (
        isinstance(max_errors, bool) or int(max_errors) != max_errors or max_errors < 0
    ):
        raise ParameterError(f"max_errors {max_errors!r} must be a non-negative integer")
    hs = [_int_symbols("symbols_hard", h) for h in hards]
    nb_ = len(hs)
    if softs is not None and len(softs) != nb_:
        raise ParameterError(f"softs has {len(softs)} entries for {nb_} streams; give one each")
    cs = (
        [None] * nb_
        if softs is None
        else [_check_soft(c, h.size) for c, h in zip(softs, hs, strict=True)]
    )
    ms = []
    for h, c in zip(hs, cs, strict=True):
        top = int(max(h.max(initial=0), hdr.max()))
        m = int(n_tones) if n_tones is not None else (c.shape[1] if c is not None else 0)
        m = m or (4 if top > 1 else 2)
        if m < 2 or m & (m - 1):
            raise ParameterError(f"n_tones {m} must be a power of two >= 2")
        if top >= m:
            raise ParameterError(f"tone index {top} is out of range for {m} tones; use 0..{m - 1}")
        if c is not None and c.shape[1] != m:
            raise ParameterError(f"soft has {c.shape[1]} branches but n_tones is {m}")
        ms.append(m)
    out: list = [None] * nb_
    for m in sorted(set(ms)):  # one group per alphabet size (usually one)
        ids = [j for j in range(nb_) if ms[j] == m]
        _align_group(hs, cs, ids, hdr, m, detect_inverted, max_errors, out)
    return out


def _align_group(hs, cs, ids, hdr, m, detect_inverted, max_errors, out) -> None:
    """:func:`align_frame_many` for the streams ``ids`` of one alphabet size m."""
    k = m.bit_length() - 1
    nb = hdr.size * k
    n_h = hdr.size
    lens = np.array([hs[j].size for j in ids], dtype=np.int64)
    n_pos = lens - n_h + 1
    if max_errors is None:
        n_tests = np.maximum(1, n_pos) * (2 if detect_inverted else 1)
        cdf = np.array(_random_match_cdf(nb))
        ok = n_tests[:, None] * cdf[None, :] <= FALSE_LOCK_PROBABILITY
        max_err = np.where(ok.any(axis=1), ok.shape[1] - 1 - np.argmax(ok[:, ::-1], axis=1), -1)
    else:
        max_err = np.full(len(ids), int(max_errors))
    live = [i for i in range(len(ids)) if n_pos[i] >= 1 and max_err[i] >= 0]
    for i, j in enumerate(ids):
        if n_pos[i] < 1:
            out[j] = FrameAlignment(
                False, None, None, nb, False, 0.0,
                f"stream of {lens[i]} symbols is shorter than the {n_h}-symbol header",
            )  # fmt: skip
        elif max_err[i] < 0:
            out[j] = FrameAlignment(
                False, None, None, nb, False, 0.0,
                f"a {nb}-bit header cannot be told from random symbols over {n_pos[i]} "
                "positions; give max_errors or a longer sync word",
            )  # fmt: skip
    if not live:
        return
    jl = [ids[i] for i in live]
    ln, npos, merr = lens[live], n_pos[live], max_err[live]
    k_max = int(ln.max())
    p_max = k_max - n_h + 1
    hard = np.zeros((len(live), k_max), dtype=np.int64)
    for r, j in enumerate(jl):  # ragged streams into one padded array
        hard[r, : hs[j].size] = hs[j]
    g_hard = hard ^ (hard >> 1)
    g_hdr = hdr ^ (hdr >> 1)
    err = np.zeros((len(live), p_max))
    err_msb = err
    for bit in range(k):  # bit planes of the Gray labels (1 or 2 of them)
        a = 1.0 - 2.0 * ((g_hard >> bit) & 1)
        v = 1.0 - 2.0 * ((g_hdr >> bit) & 1)
        mism = (n_h - _sliding_dots(a, v)) / 2.0
        err = err + mism
        if bit == k - 1:
            err_msb = mism
    err_inv = np.rint(err - 2 * err_msb + n_h).astype(np.int64)
    err = np.rint(err).astype(np.int64)
    errs = np.stack([err, err_inv], axis=1) if detect_inverted else err[:, None, :]
    inside = np.arange(p_max) < npos[:, None]
    big = np.iinfo(np.int64).max
    errs = np.where(inside[:, None, :], errs, big)
    cand = errs <= merr[:, None, None]
    n_cand = cand.sum(axis=(1, 2))
    if cs[jl[0]] is not None:
        soft = np.zeros((len(live), k_max, m))
        for r, j in enumerate(jl):
            soft[r, : hs[j].size] = cs[j]
        cc = soft - soft.mean(axis=2, keepdims=True)
        cc[np.arange(k_max)[None, :] >= ln[:, None]] = 0.0
        s_norm, s_inv = _soft_header_dots(
            cc,
            [
                (hdr[:, None] == np.arange(m)).astype(np.float64),
                ((m - 1 - hdr)[:, None] == np.arange(m)).astype(np.float64),
            ],
        )
        metric = np.stack([s_norm, s_inv], axis=1)[:, : errs.shape[1]]
        pick = np.argmax(np.where(cand, metric, -np.inf).reshape(len(live), -1), axis=1)
    else:
        pick = np.argmin(np.where(cand, errs, big).reshape(len(live), -1), axis=1)
    pol, pos = np.divmod(pick, p_max)
    e_pick = errs.reshape(len(live), -1)[np.arange(len(live)), pick]
    win = np.minimum(pos[:, None] + np.arange(n_h)[None, :], k_max - 1)
    seen = np.take_along_axis(hard, win, axis=1)
    ref = np.where(pol[:, None] == 1, m - 1 - hdr[None, :], hdr[None, :])
    sym_err = np.count_nonzero(seen != ref, axis=1)
    best = errs.reshape(len(live), -1).min(axis=1)
    soft_given = cs[jl[0]] is not None
    for r, j in enumerate(jl):
        me = int(merr[r])
        if n_cand[r] == 0:
            out[j] = FrameAlignment(
                False, None, None, nb, False, 0.0,
                f"header not found: best position has {int(best[r])} of {nb} bits wrong "
                f"(threshold {me})",
            )  # fmt: skip
            continue
        p, s_, e = int(pol[r]), int(pos[r]), int(e_pick[r])
        others = int(n_cand[r]) - 1
        msg = (
            f"header at symbol {s_} with {e} of {nb} bits wrong"
            + (", tones inverted" if p else "")
            + (f"; {others} other candidate(s) within {me} errors" if others else "")
            + ("; chosen by soft metric" if (soft_given and others) else "")
        )
        out[j] = FrameAlignment(
            found=True,
            start_symbol=s_,
            bit_errors=e,
            header_bits=nb,
            inverted=bool(p),
            score=1.0 - e / nb,
            message=msg,
            symbol_errors=int(sym_err[r]),
            n_candidates=int(n_cand[r]),
        )


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
    waveform of the known symbols (iqstat.synth.modulate, rectangular frequency pulse) is
    cross-correlated block by block with the burst over lags of ±½ symbol by FFT, the block
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
