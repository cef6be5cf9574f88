"""Symbol synchronisation: fractional timing, sample-clock offset and frame alignment.

:func:`recover_timing` turns a burst of samples and the link's tones into a symbol grid
(start t0 and period P, both fractional, in receiver samples); :func:`align_frame` finds the
known header (preamble + sync word) in the hard decisions made on that grid.

Timing model (the one of :mod:`iqstat.synth`): symbol k occupies [t0 + k·P, t0 + (k+1)·P) with
P = (fs/Rs)/(1 + ppm·1e-6); a positive clock offset means the transmitter's symbol clock is
fast (its symbols are shorter in receiver samples).
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field

import numpy as np
import scipy.fft
import scipy.signal
import scipy.stats

from iqstat.correlate import (
    _check_cumulative,
    _check_rate,
    check_samples,
    check_tone_freqs,
    interval_energies,
    mix_cumulative,
    symbol_boundaries,
    tone_phasors,
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
        d = asdict(self)
        d["quality"] = {k: _plain(v) for k, v in self.quality.items()}
        return d


def _plain(v):
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (np.floating,)):
        return float(v)
    return v


def _whole_symbols(n_samples: int, t0: float, period: float) -> int:
    """Largest n with t0 + n·P <= n_samples (symbol n−1 ends inside x)."""
    n = max(0, math.floor((n_samples - t0) / period))
    while n > 0 and symbol_boundaries(t0, period, n)[-1] > n_samples:
        n -= 1
    return n


def _coarse_timing(
    feat: np.ndarray, period0: float, window: int, track_clock: bool
) -> tuple[float, float, int, float, float, float, str]:
    """Timing from the symbol-rate line of the feature (Oerder & Meyr), clock from its drift.

    Returns t0, period, blocks used, rms residual of the block fit [samples], standard error
    of the clock offset [ppm], line SNR [dB] and a status line.
    """
    e = feat - feat.mean()
    # Line strength against the spectral floor of the feature (rfft bins around the line;
    # only those bins are squared).
    n_fft = scipy.fft.next_fast_len(e.size, real=True)
    spec = scipy.fft.rfft(e, n_fft)
    k_line = n_fft / period0
    kk = int(round(k_line))
    lo, hi = max(1, kk - 200), min(spec.size, kk + 201)
    neigh = np.r_[spec[lo : max(lo, kk - 3)], spec[min(hi, kk + 4) : hi]]
    neigh = neigh.real**2 + neigh.imag**2
    block = int(round(CLOCK_BLOCK_SYMBOLS * period0))
    n_blocks = e.size // block if track_clock else 0
    # e·e^{−j2πn/P0} once: the block sums below and the whole-burst coefficient share it.
    prod = e * tone_phasors(np.array([1.0 / period0]), e.size)[0]
    x_all = complex(prod.sum())
    floor = np.median(neigh) if neigh.size else np.nan
    line_snr_db = 10 * math.log10(abs(x_all) ** 2 / floor) if floor > 0 else float("inf")

    # Peak of the feature ↔ window aligned with a symbol: n = t0 + k·P + (P − L + 1)/2.
    shift = (period0 - window + 1) / 2.0
    if n_blocks >= MIN_CLOCK_BLOCKS:
        xb = prod[: n_blocks * block].reshape(n_blocks, block).sum(axis=1)
        # Position of the feature peaks modulo P0, in samples; it drifts as (P − P0)/P per
        # sample when P != P0 (block-wise line phase, unwrapped and line-fitted: METHODS §4).
        off = -np.unwrap(np.angle(xb)) / (2 * np.pi) * period0
        centre = np.arange(n_blocks, dtype=np.float64) * block + block // 2
        w = np.abs(xb)
        s, c, rms, se = _weighted_line(centre, off, w)
        se_ppm = se * 1e6
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
            c = float(np.average(off - s * centre, weights=w))
        period = period0 / (1.0 - s)
        t_peak = c / (1.0 - s)
    else:
        period, rms, se_ppm = period0, float("nan"), float("nan")
        t_peak = -np.angle(x_all) / (2 * np.pi) * period0
        status = (
            f"burst too short for a clock fit ({n_blocks} blocks of {CLOCK_BLOCK_SYMBOLS} "
            "symbols): nominal rate"
            if track_clock
            else "clock not tracked"
        )
        n_blocks = 0
    t0 = float(np.mod(t_peak - shift, period))
    return t0, float(period), int(n_blocks), rms, float(se_ppm), float(line_snr_db), status


def _weighted_line(
    x: np.ndarray, y: np.ndarray, w: np.ndarray
) -> tuple[float, float, float, float]:
    """Weighted least-squares line y ≈ c + s·x with weights w.

    Returns slope s, intercept c, the weighted rms residual and the standard error of s with
    the residual variance estimated from the fit, Σw·r²/(n − 2) (what np.polyfit(x, y, 1,
    w=√w, cov=True) gives, without its overhead: this runs once per burst).
    """
    sw = float(w.sum())
    if not sw > 0:
        return 0.0, float(np.mean(y)), math.nan, math.inf  # no weight: no line
    xm = float((w * x).sum()) / sw
    ym = float((w * y).sum()) / sw
    dx = x - xm
    sxx = float((w * dx * dx).sum())
    if not sxx > 0:
        return 0.0, ym, math.nan, math.inf
    s = float((w * dx * (y - ym)).sum()) / sxx
    c = ym - s * xm
    r = y - (c + s * x)
    ssr = float((w * r * r).sum())
    rms = math.sqrt(ssr / sw)
    se = math.sqrt(max(ssr / (x.size - 2), 0.0) / sxx)
    return s, c, rms, se


def _grid_energy(
    cum: np.ndarray, t_mid: np.ndarray, drift: np.ndarray, k_rel: np.ndarray
) -> np.ndarray:
    """Σ_k max_i |z_ki|² on grids t_k = t_mid + drift·k_rel (k_rel in [−1, 1]) per candidate.

    The energies of :func:`~iqstat.correlate.interval_energies`, taken tone by tone (one
    gather of the running sums per tone for all candidates at once) and divided by N_k
    after the maximum, which is the same number: N_k is common to the tones.
    """
    n_cand, n_b = t_mid.size, k_rel.size
    t = np.multiply.outer(drift, k_rel)
    t += t_mid[:, None]
    np.ceil(t, out=t)
    # All candidates' boundaries as one flat sequence: its differences are the symbols,
    # plus one junk difference between consecutive candidates (zeroed below).
    flat = t.ravel()
    b = flat.astype(np.intp)
    best = None
    for row in cum:  # M <= 4 tones, each over all candidates and symbols at once
        s = row[b]
        d = s[1:] - s[:-1]
        e = d.real**2
        e += d.imag**2
        best = e if best is None else np.maximum(best, e, out=best)
    out = np.empty(n_cand * n_b)
    np.divide(best, flat[1:] - flat[:-1], out=out[:-1])
    out = out.reshape(n_cand, n_b)
    out[:, -1] = 0.0  # the junk differences (and the unused last slot)
    return out.sum(axis=1)


def _energy_check(
    cum: np.ndarray, n_samples: int, t0: float, period: float, vary_period: bool
) -> tuple[float, float, float]:
    """Matched energy Σ_k max_i |z_ki|² at a grid and the most a local search can add.

    The candidates move the timing at the burst centre and the drift at its ends (the two are
    uncorrelated, unlike t0 and P). Returns the gain [dB] of the best candidate over the
    grid given (>= 0) and that candidate's timing and drift offsets [periods].
    """
    wt, wd = _CHECK_HALF_WIDTH
    reach = (wt + wd) * period  # largest shift of any boundary over the candidates
    k_first = math.ceil(max(0.0, reach - 1.0 - t0) / period)
    n_sym = _whole_symbols(n_samples - math.ceil(reach), t0, period) - k_first
    if n_sym < 2:
        return 0.0, 0.0, 0.0
    k = k_first + np.arange(n_sym + 1, dtype=np.float64)
    k_mid = (k[0] + k[-1]) / 2.0
    half = (k[-1] - k[0]) / 2.0
    k_rel = (k - k_mid) / half
    gt = np.linspace(-wt, wt, _CHECK_POINTS[0])
    gd = np.linspace(-wd, wd, _CHECK_POINTS[1]) if vary_period else np.zeros(1)
    tt, dd = (g.ravel() for g in np.meshgrid(gt, gd, indexing="ij"))
    tt, dd = np.r_[0.0, tt], np.r_[0.0, dd]  # candidate 0 is the grid itself
    e = _grid_energy(cum, t0 + k_mid * period + tt * period, (half + dd) * period, k_rel)
    i = int(np.argmax(e))
    gain_db = 10 * math.log10(e[i] / e[0]) if e[0] > 0 else 0.0
    return gain_db, float(tt[i]), float(dd[i])


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
    a = check_samples(x)
    fs = _check_rate("sample_rate_hz", sample_rate_hz)
    rs = _check_rate("symbol_rate_hz", symbol_rate_hz)
    f = check_tone_freqs(tone_freqs_hz, fs)
    period0 = fs / rs
    if period0 < 2.0:
        raise ParameterError(
            f"symbol_rate_hz {symbol_rate_hz!r} gives {period0:.3g} samples per symbol at "
            f"{fs:g} S/s; timing recovery needs at least 2"
        )
    if a.size < (MIN_SYMBOLS + 2) * period0:
        raise MeasurementError(
            f"burst of {a.size} samples holds fewer than {MIN_SYMBOLS + 2} symbols of "
            f"{period0:.4g} samples; timing recovery needs a longer burst"
        )
    if cumulative is None:
        cum = mix_cumulative(a, fs, f)
    else:
        cum = _check_cumulative(cumulative, f.size, a.size)
    window = max(1, int(round(period0)))
    d = cum[:, window:] - cum[:, :-window]
    feat = d.real**2
    feat += d.imag**2
    feat = feat.max(axis=0)
    if not feat.max() > 0:
        raise MeasurementError(
            "burst has no energy at the tones (all-zero samples); check the burst limits"
        )

    t0_c, period_c, n_blocks, rms, se_ppm, line_snr_db, clock_txt = _coarse_timing(
        feat, period0, window, track_clock
    )
    vary = track_clock
    t0, period = t0_c, period_c
    moved = 0
    for _ in range(_MAX_CHECK_MOVES):
        gain_db, dt, dd = _energy_check(cum, a.size, t0, period, vary)
        if gain_db <= MAX_CHECK_GAIN_DB:
            break
        # The line phase missed the energy peak (weak line, gross error): move to the best
        # candidate and check again.
        n_half = (_whole_symbols(a.size, t0, period) - 1) / 2.0
        t_mid = t0 + n_half * period + dt * period
        period = period + dd * period / max(n_half, 1.0)
        t0 = t_mid - n_half * period
        moved += 1
    k_mid = round((a.size / 2 - t0_c) / period_c)
    fine_shift = (t0 + k_mid * period) - (t0_c + k_mid * period_c)
    t0 = float(np.mod(t0, period))
    n_sym = _whole_symbols(a.size, t0, period)
    b = symbol_boundaries(t0, period, n_sym)
    e = interval_energies(cum, b)
    matched = float(e.max(axis=-1).sum() / e.sum()) if e.size and e.sum() > 0 else float("nan")
    ppm = (period0 / period - 1.0) * 1e6
    reliable = line_snr_db >= MIN_LINE_SNR_DB
    message = (
        f"{n_sym} symbols, t0 {t0:.3f} samples, period {period:.5f} samples; "
        f"symbol-rate line {line_snr_db:.1f} dB; {clock_txt}"
    )
    if moved:
        message += f"; matched-energy search moved the grid {fine_shift:+.2f} samples"
    if not reliable:
        message += f"; line below {MIN_LINE_SNR_DB:g} dB: timing unreliable"
    quality = {
        "line_snr_db": float(line_snr_db),
        "n_clock_blocks": int(n_blocks),
        "clock_fit_rms_samples": float(rms),
        "clock_offset_se_ppm": float(se_ppm),
        "coarse_t0_samples": float(t0_c),
        "coarse_clock_offset_ppm": float((period0 / period_c - 1.0) * 1e6),
        "fine_moves": int(moved),
        "fine_shift_samples": float(fine_shift),
        "residual_gain_db": float(gain_db),
        "matched_fraction": matched,
    }
    return SymbolTiming(
        t0_samples=t0,
        period_samples=float(period),
        clock_offset_ppm=float(ppm) if track_clock else 0.0,
        n_symbols=int(n_sym),
        method="feature line phase (Oerder-Meyr) + block clock fit + matched-energy search",
        quality=quality,
        message=message,
        reliable=bool(reliable),
    )


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
        return asdict(self)


def _int_symbols(name: str, a: np.ndarray) -> np.ndarray:
    s = np.asarray(a)
    if s.ndim != 1:
        raise ParameterError(f"{name} must be a 1-D array of tone indices, got shape {s.shape}")
    if s.size and (s.dtype.kind not in "biu" or s.min() < 0):
        raise ParameterError(f"{name} must hold non-negative integer tone indices")
    return s.astype(np.int64, copy=False)


#: Below this many multiply-adds the sliding dot product is summed directly by numpy (what
#: scipy.signal.correlate chooses there too, without its 13 µs of method selection).
_DIRECT_DOT_WORK = 1_000_000


def _sliding_dot(a: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Σ_j a[s + j]·v[j] for every s with the pattern inside a (FFT or direct, as faster)."""
    if a.size * v.size <= _DIRECT_DOT_WORK:
        return np.correlate(a, v, mode="valid")
    return scipy.signal.correlate(a, v, mode="valid")


@functools.lru_cache(maxsize=64)
def _random_match_cdf(n_bits: int) -> tuple[float, ...]:
    """P(at most e of n_bits random bits wrong), e = 0..n_bits // 4 (a header's false match)."""
    return tuple(scipy.stats.binom.cdf(np.arange(n_bits // 4 + 1), n_bits, 0.5))


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
    hard = _int_symbols("symbols_hard", symbols_hard)
    hdr = _int_symbols("header_symbols", header_symbols)
    if hdr.size == 0:
        raise ParameterError("header_symbols is empty; give the preamble and sync word symbols")
    c = None
    if soft is not None:
        c = np.asarray(soft, dtype=np.float64)
        if c.ndim != 2 or c.shape[0] != hard.size or c.shape[1] < 2:
            raise ParameterError(
                f"soft has shape {c.shape}; give branch energies of shape "
                f"({hard.size}, n_tones) matching symbols_hard"
            )
        if not np.all(np.isfinite(c)):
            raise ParameterError("soft holds non-finite values; give finite branch energies")
    top = int(max(hard.max(initial=0), hdr.max()))
    m = int(n_tones) if n_tones is not None else (c.shape[1] if c is not None else 0)
    m = m or (4 if top > 1 else 2)
    if m < 2 or m & (m - 1):
        raise ParameterError(f"n_tones {m} must be a power of two >= 2")
    if top >= m:
        raise ParameterError(f"tone index {top} is out of range for {m} tones; use 0..{m - 1}")
    if c is not None and c.shape[1] != m:
        raise ParameterError(f"soft has {c.shape[1]} branches but n_tones is {m}")
    k = m.bit_length() - 1
    nb = hdr.size * k
    n_pos = hard.size - hdr.size + 1
    if max_errors is None:
        n_tests = max(1, n_pos) * (2 if detect_inverted else 1)
        cdf = np.array(_random_match_cdf(nb))
        ok = np.nonzero(n_tests * cdf <= FALSE_LOCK_PROBABILITY)[0]
        max_err = int(ok[-1]) if ok.size else -1
    else:
        if isinstance(max_errors, bool) or int(max_errors) != max_errors or max_errors < 0:
            raise ParameterError(f"max_errors {max_errors!r} must be a non-negative integer")
        max_err = int(max_errors)
    if n_pos < 1:
        return FrameAlignment(
            False, None, None, nb, False, 0.0,
            f"stream of {hard.size} symbols is shorter than the {hdr.size}-symbol header",
        )  # fmt: skip
    if max_err < 0:
        return FrameAlignment(
            False, None, None, nb, False, 0.0,
            f"a {nb}-bit header cannot be told from random symbols over {n_pos} positions; "
            "give max_errors or a longer sync word",
        )  # fmt: skip

    g_hard = hard ^ (hard >> 1)
    g_hdr = hdr ^ (hdr >> 1)
    err = np.zeros(n_pos)
    err_msb = np.zeros(n_pos)
    for bit in range(k):  # bit planes of the Gray labels (1 or 2 of them)
        a = 1.0 - 2.0 * ((g_hard >> bit) & 1)
        v = 1.0 - 2.0 * ((g_hdr >> bit) & 1)
        mism = (hdr.size - _sliding_dot(a, v)) / 2.0
        err += mism
        if bit == k - 1:
            err_msb = mism
    err = np.rint(err).astype(np.int64)
    err_inv = np.rint(err - 2 * err_msb + hdr.size).astype(np.int64)
    errs = np.stack([err, err_inv]) if detect_inverted else err[None, :]
    pol, pos = np.nonzero(errs <= max_err)
    if pos.size == 0:
        best = int(errs.min())
        return FrameAlignment(
            False, None, None, nb, False, 0.0,
            f"header not found: best position has {best} of {nb} bits wrong "
            f"(threshold {max_err})",
        )  # fmt: skip
    if c is not None:
        cc = c - c.mean(axis=1, keepdims=True)
        s_norm = np.zeros(n_pos)
        s_inv = np.zeros(n_pos)
        for t in range(m):  # one sliding correlation per tone value
            s_norm += _sliding_dot(cc[:, t], (hdr == t).astype(np.float64))
            s_inv += _sliding_dot(cc[:, t], (hdr == m - 1 - t).astype(np.float64))
        metric = np.stack([s_norm, s_inv])[pol, pos]
        i = int(np.argmax(metric))
    else:
        i = int(np.argmin(errs[pol, pos]))
    p, s = int(pol[i]), int(pos[i])
    ref = (m - 1 - hdr) if p else hdr
    sym_err = int(np.count_nonzero(hard[s : s + hdr.size] != ref))
    e = int(errs[p, s])
    others = pos.size - 1
    msg = (
        f"header at symbol {s} with {e} of {nb} bits wrong"
        + (", tones inverted" if p else "")
        + (f"; {others} other candidate(s) within {max_err} errors" if others else "")
        + ("; chosen by soft metric" if (c is not None and others) else "")
    )
    return FrameAlignment(
        found=True,
        start_symbol=s,
        bit_errors=e,
        header_bits=nb,
        inverted=bool(p),
        score=1.0 - e / nb,
        message=msg,
        symbol_errors=sym_err,
        n_candidates=int(pos.size),
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
    idx_r = j[:, None] * nb + np.arange(nb)[None, :]
    n_fft = scipy.fft.next_fast_len(nb + 2 * h)
    xs = scipy.fft.fft(x[idx_x], n_fft, axis=1)
    rs = scipy.fft.fft(ref[idx_r], n_fft, axis=1)
    cc = scipy.fft.ifft(xs * np.conj(rs), axis=1)[:, : 2 * h + 1]
    c = np.abs(cc) ** 2
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
    blk_lag = np.array([_peak_lag(row[lo:hi]) + lo - h for row in c])
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
