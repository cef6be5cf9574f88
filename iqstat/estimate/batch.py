"""Batched carrier estimate with the rates given: a few numpy calls per group of bursts.

Owns the rows core of :func:`~iqstat.estimate.link.estimate_link_many` for bursts whose symbol
rate and tone spacing (or OOK) are given and whose modulation index has spectral lines (p·h an
integer for p = 1 or 2). Bursts of one DFT length (:func:`fft_size`) are rows of one 2-D FFT;
block sums of its power find the all-zero and non-finite bursts (Parseval) and give the coarse
start (:func:`_coarse_start_rows`); one window of bins per burst around it (:class:`_Windows`)
gives the centroid (:func:`_coarse_center_windows`), the lines and the band energy; for p = 2
the square of the band-limited burst comes from its band's bins (:func:`_line_spectra`); the
lines of all tones are sought jointly (:func:`_joint_lines_rows`). A row's numbers depend on
that row alone, so a burst gets the same result alone or in a batch; one whose lines do not
stand out falls back to the per-burst energy search (:mod:`iqstat.estimate.carrier`).
"""

from __future__ import annotations

import math

import numpy as np
import scipy.fft
from numpy.lib.stride_tricks import sliding_window_view
from scipy import special

from iqstat.errors import MeasurementError
from iqstat.estimate.carrier import _carrier_by_energy, _square_band_hz
from iqstat.estimate.link_estimate import (
    N_TONES,
    LinkEstimate,
    _link_result,
    _signal_width,
    tone_offsets_hz,
)
from iqstat.estimate.spectrum import _Burst
from iqstat.rowstats import median_rows

#: Mantissas m of the FFT sizes m·2^k used for bursts: at most 12.5 % zero padding, 5-smooth.
_FFT_MANTISSAS = (32, 36, 40, 45, 48, 50, 54, 60)


def fft_size(n_samples: int) -> int:
    """DFT length of a burst of ``n_samples``: the smallest m·2^k ≥ n, m in 32…60 (5-smooth).

    It depends on the burst alone, so a burst gets the same spectrum alone or in a batch,
    and bursts of similar lengths share one 2-D FFT. Zero padding is at most 12.5 %; it biases
    three-bin interpolation by at most 0.042 bin [computed: noiseless tone, N = 29000,
    32625-point DFT, offsets −0.5…0.5 bin], 0.3 Hz at 250 kS/s.
    """
    n = max(int(n_samples), 64)
    k = max(0, int(math.floor(math.log2(n / 60.0))))
    best = None
    for kk in (k, k + 1):
        for m in _FFT_MANTISSAS:
            size = m << kk
            if size >= n and (best is None or size < best):
                best = size
    return int(best)


def _wrap(f, fs):
    return (f + fs / 2) % fs - fs / 2


def _interpolate_rows(spec: np.ndarray, k: np.ndarray, n_dft: int) -> np.ndarray:
    """:func:`~iqstat.estimate.spectrum.interpolate_peak_bin` (Candan) at local bins k (B, M)
    of the rows of ``spec``.

    ``spec`` (B, L) holds L bins of each row's n_dft-point DFT (all of them when L = n_dft,
    else a window with k − 1 … k + 1 inside it); returns k + δ.

    References
    ----------
    .. [1] E. Jacobsen and P. Kootsookos, "Fast, accurate frequency estimators", IEEE Signal
       Processing Magazine 24(3):123–125, 2007.
    .. [2] Ç. Candan, "A method for fine resolution frequency estimation from three DFT
       samples", IEEE Signal Processing Letters 18(6):351–354, 2011.
    """
    n = spec.shape[1]
    flat = spec.reshape(-1)
    at = np.arange(spec.shape[0])[:, None] * n + k
    x0 = flat[at].astype(np.complex128)
    xm = flat[at - 1 + np.where(k == 0, n, 0)].astype(np.complex128)
    xp = flat[at + 1 - np.where(k == n - 1, n, 0)].astype(np.complex128)
    den = 2.0 * x0 - xm - xp
    safe = np.where(den == 0, 1.0, den)
    delta = np.where(den == 0, 0.0, np.real((xm - xp) / safe))  # Jacobsen [1]
    delta *= math.tan(math.pi / n_dft) / (math.pi / n_dft)  # Candan [2]
    return k + np.minimum(np.maximum(delta, -0.5), 0.5)


def _block_size(nfft: int, width_bins: int) -> int:
    """Bins per block of the coarse periodogram: a power of two ≤ width/8 dividing nfft."""
    s = 1
    while s * 2 <= max(1, width_bins // 8) and nfft % (s * 2) == 0:
        s *= 2
    return s


def _coarse_start_rows(
    blocks: np.ndarray, s: int, n_used: np.ndarray, nfft: int, fs: float, width_hz: float
) -> tuple[np.ndarray, np.ndarray]:
    """Start of the coarse centre from block power sums: (centre_hz (B,), floor (B,)).

    ``blocks`` (B, nfft/s) are sums of s adjacent periodogram bins. The smoothed periodogram
    (moving average over the expected signal width, METHODS §5) is evaluated on blocks: its
    argmax and its 20 % quantile do not change at that resolution (s ≤ width/8), the work
    does. The noise level per bin is the 20 % quantile over the Gamma(w, 1/w) 20 % quantile,
    w the smoothing width in independent bins (zero padding correlates the bins).
    """
    nb_rows, nbk = blocks.shape
    df = fs / nfft
    width = max(3, int(round(width_hz / df)))
    wb = max(1, int(round(width / s)))
    pad = np.concatenate((blocks[:, -wb:], blocks, blocks[:, :wb]), axis=1)
    c = np.zeros((nb_rows, pad.shape[1] + 1))
    np.cumsum(pad, axis=1, out=c[:, 1:])
    lo = wb - wb // 2
    smooth = (c[:, lo + wb : lo + wb + nbk] - c[:, lo : lo + nbk]) / (wb * s)
    kb = np.argmax(smooth, axis=1)
    # 20 % quantile (linear interpolation) of the smoothed bins, over its Gamma quantile
    pos = 0.2 * (nbk - 1)
    i = int(math.floor(pos))
    part = np.partition(smooth, i, axis=1)  # one kth: two cost ~7× as much
    above = part[:, i + 1 :].min(axis=1) if i + 1 < nbk else part[:, i]
    q20 = part[:, i] + (pos - i) * (above - part[:, i])
    dof = np.maximum(1.0, wb * s * n_used / nfft)
    floor = q20 / (special.gammaincinv(dof, 0.2) / dof)
    return _wrap((kb * s + 0.5 * (s - 1)) * df, fs), floor


def _runs_view(a: np.ndarray, n: int) -> np.ndarray:
    """View (B, L − n + 1, n) of the runs of n consecutive entries of the rows of a (B, L).

    ``sliding_window_view`` without its set-up cost (~10 µs a call); nothing writes to it.
    """
    if not a.flags.c_contiguous:
        return sliding_window_view(a, n, axis=1)
    st = a.strides
    return np.ndarray((a.shape[0], a.shape[1] - n + 1, n), a.dtype, a, 0, (st[0], st[1], st[1]))


class _Windows:
    """A window of ``width`` consecutive bins (circularly) of each row's spectrum (private).

    ``ext`` (B, nfft + width) holds each row's nfft-point spectrum followed by its first
    ``width`` bins again, so that every circular run of up to ``width`` bins is one slice.
    Row r holds the bins kstart[r] … kstart[r] + width − 1 (mod nfft): their complex values
    ``x`` and their power ``pw`` (re² + im², in the spectrum's precision). :meth:`hold`
    gathers a row again, centred on what it needs, when that is not held; a row's numbers
    depend on that row alone.
    """

    def __init__(self, ext: np.ndarray, nfft: int, width: int, center_bins: np.ndarray):
        self.ext = ext
        self.nfft = nfft
        self.width = int(width)
        self.kstart = center_bins - self.width // 2
        self.x, self.pw = self._gather(np.arange(ext.shape[0]))

    def _gather(self, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        x = _runs_view(self.ext, self.width)[rows, self.kstart[rows] % self.nfft]
        pw = x.real**2
        pw += x.imag**2
        return x, pw

    def local(self, k: np.ndarray) -> np.ndarray:
        """Local indices of absolute bins k (B,) or (B, M) (valid where held)."""
        ks = self.kstart if k.ndim == 1 else self.kstart[:, None]
        return (k - ks) % self.nfft

    def hold(self, lo: np.ndarray, hi: np.ndarray) -> None:
        """Make sure every row holds its absolute bins lo[r] … hi[r] (hi − lo < width)."""
        bad = self.local(lo) + (hi - lo) >= self.width
        if not bad.any():
            return
        rows = np.nonzero(bad)[0]
        self.kstart[rows] = (lo[rows] + hi[rows]) // 2 - self.width // 2
        self.x[rows], self.pw[rows] = self._gather(rows)

    def runs(self, a: np.ndarray, count: int) -> np.ndarray:
        """The power of local bins a[r] … a[r] + count − 1 (held), (B, count) float64;
        ``a`` of shape (B, M) gives (B, M, count)."""
        rows = np.arange(a.shape[0]).reshape((-1,) + (1,) * (a.ndim - 1))
        return _runs_view(self.pw, count)[rows, a].astype(np.float64)


def _coarse_center_windows(
    win: _Windows, center_hz: np.ndarray, floor: np.ndarray, fs: float, width_hz: float
) -> tuple[np.ndarray, np.ndarray]:
    """Three centroid iterations of the excess power over the windows' bins (batched).

    As :func:`_coarse_center`: the centroid of power − floor over the bins within ±width/2 of
    the centre, three times. Returns (centre_hz (B,), ok (B,)); ok is False where the excess
    power is not positive (the centre then stays where it was).
    """
    nfft = win.nfft
    df = fs / nfft
    h = min(max(1, int(round(width_hz / 2 / df))), (nfft - 1) // 2)
    n_win = 2 * h + 1
    t = np.arange(-h, h + 1, dtype=np.float64)
    ok = np.ones(center_hz.size, dtype=bool)
    center = center_hz
    k_prev = None
    for _ in range(3):
        k0 = np.round(center / df).astype(np.int64)
        if k_prev is not None and np.array_equal(k0, k_prev):
            break  # the same windows again: the same centroids (and ok) again
        win.hold(k0 - h, k0 + h)
        v = win.runs(win.local(k0 - h), n_win)
        total = v.sum(axis=1) - floor * n_win
        mom = v @ t  # Σ (p − floor)·t over t = −h … h: the floor's part is 0
        ok &= total > 0
        shift = mom / np.where(ok, total, 1.0)
        center = np.where(ok, _wrap((k0 + shift) * df, fs), center)
        k_prev = k0
    return center, ok


def _line_spectra(
    win: _Windows, centers_hz: np.ndarray, df: float, hb: int, p: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Spectrum of the p-th power (p = 2) of the band-limited bursts: (spec, power, base_bin).

    The square of each burst band-limited to centre ± hb bins, computed on
    L = next_fast_len(4·hb + 3) samples per burst period (the band's bins moved to baseband,
    inverse FFT, squared, FFT): x² then has no alias, and its bin j sits at (base + j)·Δf with
    base = 2·(centre bin) — the full-rate square's bins, exactly. The bins come from the
    windows (:class:`_Windows`).
    """
    nb = centers_hz.size
    n_small = scipy.fft.next_fast_len(4 * hb + 3)
    kc = np.round(centers_hz / df).astype(np.int64)
    win.hold(kc - hb, kc + hb)
    band = _runs_view(win.x, 2 * hb + 1)[np.arange(nb), win.local(kc - hb)]
    small = np.zeros((nb, n_small), dtype=win.x.dtype)
    small[:, np.arange(-hb, hb + 1) % n_small] = band
    y = scipy.fft.ifft(small, axis=1, overwrite_x=True)
    spec = scipy.fft.fft(y * y, axis=1, overwrite_x=True)
    return spec, spec.real**2 + spec.imag**2, p * kc


def _joint_lines_rows(
    spec: np.ndarray,
    pw: np.ndarray,
    c_local: np.ndarray,
    base: np.ndarray,
    n_dft: int,
    df: float,
    pred_hz: np.ndarray,
    offsets_hz: np.ndarray,
    p: int,
    reach: int,
    half: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Lines of all M tones at one common shift, batched: (cfo_hz, found, line_db), each (B,).

    ``spec``/``pw`` (B, L) hold bins of each row's n_dft-point DFT of the p-th power, local
    bin j at absolute bin base + j (all bins when L = n_dft, indices then wrap; otherwise a
    window holding every bin needed). ``c_local`` (B, M): local bins of the predicted lines
    ``pred_hz`` = p·(centre + offset_i). The powers of the M lines at a common shift are summed
    over shifts within ±reach bins; the best shift counts when its sum is improbable for noise
    over that many shifts (Gamma(M, 1) tail below 1e-3 for the largest, noise level the
    median of the ±half windows over ln 2, METHODS §5). Each line is refined at the largest
    of the three bins there by three-bin interpolation; the carrier is the
    excess-power-weighted mean of f_i/p − offset_i.
    """
    nb, n = pw.shape
    m = offsets_hz.size
    circular = n == n_dft
    rows = np.arange(nb)
    winr = np.arange(-half, half + 1)
    if circular:
        idx = (c_local[:, :, None] + winr) % n
        w = pw.reshape(-1)[idx + (rows * n)[:, None, None]]  # (B, M, W)
    else:
        w = _runs_view(pw, 2 * half + 1)[rows[:, None], c_local - half]
    inner = w[:, :, half - reach : half + reach + 1] if half > reach else w
    total = inner.sum(axis=1)  # (B, S)
    mean_noise = median_rows(w.reshape(nb, -1)) / math.log(2.0)
    best = np.argmax(total, axis=1)
    top = total[rows, best]
    threshold = float(special.gammainccinv(m, 1e-3 / (2 * reach + 1)))  # Gamma(M, 1) tail
    found = (mean_noise > 0) & (top >= threshold * mean_noise)
    # the largest of the three bins around each line at the best shift
    k = c_local + (best - reach)[:, None]  # (B, M)
    three = k[:, :, None] + np.arange(-1, 2)
    if circular:
        three %= n
    kk = k + np.argmax(pw.reshape(-1)[three + (rows * n)[:, None, None]], axis=2) - 1
    if circular:
        kk %= n
    fk = (_interpolate_rows(spec, kk, n_dft) + base[:, None]) * df
    period_hz = n_dft * df
    fk = fk + period_hz * np.round((pred_hz - fk) / period_hz)  # representative nearest pred
    excess = np.maximum(pw.reshape(-1)[kk + (rows * n)[:, None]] - mean_noise[:, None], 0.0)
    wsum = excess.sum(axis=1, keepdims=True)
    weights = np.where(wsum > 0, excess / np.where(wsum > 0, wsum, 1.0), 1.0 / m)
    cfo = np.sum(weights * (fk / p - offsets_hz[None, :]), axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        line_db = 10 * np.log10(top / (m * mean_noise))
    return cfo, found, line_db


def _carrier_rows(
    xs: list[np.ndarray],
    nfft: int,
    fs: float,
    m: int,
    p: int,
    rs: float,
    df: float | None,
    band_margin_symbols: float | None,
) -> list[LinkEstimate | MeasurementError]:
    """Link estimates of bursts sharing one DFT length, with the rates given (batched core)."""
    modulation = {1: "ook", 2: "2fsk", 4: "4fsk"}[m]
    nb = len(xs)
    dfb = fs / nfft
    width_hz = _signal_width(m, df, rs)
    s = _block_size(nfft, max(3, int(round(width_hz / dfb))))
    offsets = tone_offsets_hz(modulation, df)
    reach_hz = 0.5 * df if m > 1 else 0.5 * rs
    noise_half_hz = 0.4 * df if m > 1 else 0.5 * rs
    # one window of bins per burst: wide enough for every read below, with room to move
    h_center = min(max(1, int(round(width_hz / 2 / dfb))), (nfft - 1) // 2)
    reach1 = max(1, int(round(reach_hz / dfb)))
    half1 = max(reach1, int(round(noise_half_hz / dfb)))
    span_lines = int(math.ceil((offsets[-1] - offsets[0]) / dfb)) + 2 * half1 + 7
    hb = max(1, int(round(_square_band_hz(offsets, rs) / dfb)))
    need = max(2 * h_center + 1, span_lines if p == 1 else 2 * hb + 1)
    if band_margin_symbols is not None:
        span_band = (offsets[-1] - offsets[0] + 2 * band_margin_symbols * rs) / dfb + 3
        need = max(need, int(math.ceil(span_band)))
    width = need + 2 * (s + reach1 + 4)
    # the spectra, each followed by its first `width` bins again (wrap-free windows)
    dtype = np.result_type(np.complex64, *[x.dtype for x in xs])
    # rows of zeros up to a multiple of 4 where 2 or 3 would be left over: the FFT runs SIMD
    # over 4 rows at a time, a leftover row costs about twice as much as a row in a group
    n_rows = nb + (4 - nb % 4 if nb % 4 >= 2 else 0)
    ext = np.empty((n_rows, nfft + width), dtype=dtype)
    spectrum = ext[:, :nfft]
    for r, x in enumerate(xs):  # ragged copy into the padded rows
        spectrum[r, : x.size] = x
        spectrum[r, x.size :] = 0
    spectrum[nb:] = 0
    out = scipy.fft.fft(spectrum, axis=1, overwrite_x=True)
    if not np.shares_memory(out, ext):  # scipy wrote elsewhere after all
        spectrum[...] = out
    del out
    ext = ext[:nb]
    spectrum = ext[:, :nfft]
    for e0 in range(0, width, nfft):
        ext[:, nfft + e0 : nfft + min(width, e0 + nfft)] = ext[:, : min(nfft, width - e0)]
    ri = spectrum.view(spectrum.real.dtype).reshape(nb, nfft // s, 2 * s)
    blocks = np.einsum("ijk,ijk->ij", ri, ri)  # power sums of s bins
    # Parseval: Σ|X_k|² = nfft·Σ|x_n|², so the block sums tell all-zero and non-finite bursts
    total = blocks.sum(axis=1)
    errors: dict[int, MeasurementError] = {}
    if not np.all(np.isfinite(total) & (total > 0)):
        for r in np.nonzero(~(np.isfinite(total) & (total > 0)))[0].tolist():
            if total[r] == 0:
                msg = "burst is all zeros; there is no signal to estimate from"
            elif not np.all(np.isfinite(xs[r])):
                msg = "burst contains NaN or infinite samples; zero or cut them before estimating"
            else:
                msg = "burst samples are too large for their power spectrum; scale them down"
            errors[r] = MeasurementError(msg)
            ext[r] = 1.0  # a flat stand-in, so the row spoils nothing downstream
            blocks[r] = s
    n_used = np.array([x.size for x in xs], dtype=float)
    center, floor = _coarse_start_rows(blocks.astype(np.float64), s, n_used, nfft, fs, width_hz)
    win = _Windows(ext, nfft, width, np.round(center / dfb).astype(np.int64))
    center, ok = _coarse_center_windows(win, center, floor, fs, width_hz)
    if p == 1:
        reach, half = reach1, half1
        pred = center[:, None] + offsets[None, :]
        c_abs = np.round(pred / dfb).astype(np.int64)
        win.hold(c_abs.min(axis=1) - half - 3, c_abs.max(axis=1) + half + 3)
        spec, pw, c_local, base, n_dft = win.x, win.pw, win.local(c_abs), win.kstart, nfft
    else:
        spec, pw, base = _line_spectra(win, center, dfb, hb, p)
        n_dft = spec.shape[1]
        reach = max(1, int(round(reach_hz * p / dfb)))
        half = max(reach, int(round(noise_half_hz * p / dfb)))
        pred = p * (center[:, None] + offsets[None, :])
        c_local = (np.round(pred / dfb).astype(np.int64) - base[:, None]) % n_dft
    cfo, found, line_db = _joint_lines_rows(
        spec, pw, c_local, base, n_dft, dfb, pred, offsets, p, reach, half
    )
    band = None
    if band_margin_symbols is not None:
        lo = cfo + offsets[0] - band_margin_symbols * rs
        hi = cfo + offsets[-1] + band_margin_symbols * rs
        k_lo = np.ceil(lo / dfb).astype(np.int64)
        count = np.floor(hi / dfb).astype(np.int64) - k_lo + 1
        win.hold(k_lo, k_lo + count - 1)
        c_min, c_max = int(count.min()), int(count.max())
        v = win.runs(win.local(k_lo), c_max)
        if c_max > c_min:  # counts differ by a bin or so: drop each row's extra bins
            v[:, c_min:] *= np.arange(c_min, c_max) < count[:, None]
        energy = v.sum(axis=1) / nfft
        band = (energy.tolist(), (count * dfb).tolist())
    method = "carrier-line" if m == 1 else ("tone-lines" if p == 1 else f"power-{p}-lines")
    return _link_results_rows(
        xs, fs, modulation, rs, df, p, method, (center, cfo, found, line_db, ok), errors, band
    )


def _link_results_rows(
    xs, fs, modulation, rs, df, p, method, fits, errors, band
) -> list[LinkEstimate | MeasurementError]:
    """Per-burst results of :func:`_carrier_rows`: as :func:`_link_result`, built in bulk.

    ``fits`` is (centre_hz, cfo_hz, found, line_db, ok), arrays (B,) of the batched core.
    """
    center, cfo, found, line_db, ok = fits
    m = N_TONES[modulation]
    offsets = tone_offsets_hz(modulation, df)
    tones = (cfo[:, None] + offsets[None, :]).tolist()
    cfo_l, db_l, found_l, ok_l = cfo.tolist(), line_db.tolist(), found.tolist(), ok.tolist()
    tail = "; symbol rate from profile" + ("; tone spacing from profile" if m > 1 else "")
    spacing = None if m == 1 else float(df)
    spacing_source = "n/a" if m == 1 else "profile"
    results: list = []
    for r, x in enumerate(xs):  # per-burst result objects (and the rare fallback)
        extra = None if band is None else {"band_energy": band[0][r], "band_width_hz": band[1][r]}
        if r in errors:
            results.append(errors[r])
        elif not ok_l[r]:
            results.append(
                MeasurementError(
                    "no signal above the noise floor in this burst; check the burst limits or "
                    "the Eb/N0"
                )
            )
        elif found_l[r]:
            quality = {
                "n_symbols": x.size * rs / fs,
                "rate_line_db": None,
                "rate_std_hz": None,
                "tone_line_db": db_l[r],
                "line_power": p,
                "carrier_method": method,
                "reliable": True,
            }
            if extra:
                quality.update(extra)
            results.append(
                LinkEstimate(
                    modulation,
                    fs,
                    rs,
                    "profile",
                    spacing,
                    spacing_source,
                    cfo_l[r],
                    tuple(tones[r]),
                    x.size,
                    quality,
                    f"carrier by {method} ({db_l[r]:.1f} dB){tail}",
                )
            )
        else:
            try:
                b = _Burst(x, fs, modulation)
                fit = _carrier_by_energy(b, float(center[r]), df, rs, True)
                results.append(
                    _link_result(modulation, fs, x.size, rs, True, df, fit, None, None, extra)
                )
            except MeasurementError as exc:
                results.append(exc)
    return results
