"""Full-rate timing recovery: Oerder–Meyr feature, block clock fit, matched-energy search.

:func:`recover_timing` (one burst) and :func:`recover_timing_many` (a batch, in a fixed number
of numpy calls) turn a burst and the link's tones into a symbol grid
(:class:`~iqstat.sync.grid.SymbolTiming`):

1. Feature E[n] = max_i |y_i[n]|², y_i the sliding one-symbol correlator of tone i (running
   sums of :func:`~iqstat.correlate.mix_cumulative_many`).
2. The phase of its symbol-rate Fourier coefficient locates the symbol starts (square-law
   timing of Oerder & Meyr [1]_); per block of symbols, line-fitted, it gives the clock
   offset (:func:`~iqstat.sync.grid._clock_decision`).
3. A local search of the total matched energy Σ_k max_i |z_ki|² over the timing at the burst
   centre and the drift at its ends moves the grid where the line phase missed the peak.

Bursts already timed on the decimated feature (:mod:`iqstat.sync.block_rate`) can start from
that grid (``coarse=``) and skip steps 1–2.

References
----------
.. [1] M. Oerder and H. Meyr, "Digital filter and square timing recovery," IEEE Trans.
   Commun. 36(5):605–612, 1988.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Literal

import numpy as np
import scipy.fft

from iqstat.correlate.inputs import _check_rate, _check_tone_list, check_samples
from iqstat.correlate.running_sums import batch_buffer, mix_cumulative_many
from iqstat.correlate.templates import unit_phasors
from iqstat.errors import MeasurementError, ParameterError
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

#: Half-widths of the local matched-energy check grid: timing at the burst centre and drift
#: at its ends, in symbol periods, and the number of points on each axis.
_CHECK_HALF_WIDTH = (0.25, 0.1)

_CHECK_POINTS = (11, 5)

#: The line-phase grid is kept unless a local candidate holds more matched energy than this.
MAX_CHECK_GAIN_DB = 0.05

_MAX_CHECK_MOVES = 4

#: Temporaries of the batched timing stages are kept below about this many bytes per chunk.
#: (A few MB: the elementwise passes then run in the core's cache, which on a 2 MB L2 is
#: faster than one large pass over the whole batch.)
_CHUNK_BYTES = 2 << 20


def _chunks(ids: np.ndarray, bytes_each: int):
    """Consecutive pieces of ids whose temporaries stay below _CHUNK_BYTES."""
    step = max(1, _CHUNK_BYTES // max(1, bytes_each))
    for i in range(0, ids.size, step):
        yield ids[i : i + step]


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
        bins = _floor_bins(int(nf), int(round(nf / period0)))
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
    n_blocks = ne // block if track_clock else np.zeros(bc, dtype=np.int64)
    centre = np.arange(q_tot, dtype=np.float64) * block + block // 2
    return _line_clock_fits(peak, xq, floor, n_blocks, centre, period0)


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
        (:func:`~iqstat.sync.recover_timing_blocks_many` or
        :func:`~iqstat.sync.time_and_correlate_many`): the matched-energy check starts from
        it, and its line SNR and clock fit are kept, instead of the full-rate feature's (the
        costliest step here: ~half of the time). None in a slot: that burst is timed from its
        full-rate feature.

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
    """A decimated-feature grid as the coarse tuple of
    :func:`~iqstat.sync.grid._clock_decision` (its clock status is the third part of the
    message :func:`~iqstat.sync.block_rate._time_blocks_chunk` writes)."""
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
