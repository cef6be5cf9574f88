"""Link parameters of one burst or a batch: carrier offset, tone spacing and symbol rate.

The stage's entry points. Given a burst's complex baseband samples :func:`estimate_link`
returns a :class:`~iqstat.estimate.link_estimate.LinkEstimate`: the carrier offset (for FSK the
midpoint of the tones, for OOK the carrier), the tone spacing and the symbol rate, each either
taken from the link profile or estimated blind, with figures of merit for each estimate.
:func:`estimate_link_many` does the same for a batch of bursts: with the rates given and a
modulation index with spectral lines through the batched core (:mod:`iqstat.estimate.batch`),
otherwise through the per-burst chain here, burst by burst. Also the single-quantity wrappers
:func:`estimate_carrier`, :func:`estimate_symbol_rate` and :func:`estimate_tone_spacing`.

Per-burst chain: coarse centre (:mod:`iqstat.estimate.spectrum`) and, for a blind spacing,
coarse tones (:mod:`iqstat.estimate.blind`) → symbol rate from the feature line (when not
given) → carrier and spacing from the spectral lines of the burst or its square, or the
energy search (:mod:`iqstat.estimate.carrier`) → the symbol rate once more on the refined tones.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Literal

import numpy as np

from iqstat.errors import MeasurementError, ParameterError
from iqstat.estimate.batch import _carrier_rows, fft_size
from iqstat.estimate.blind import (
    _blind_center_and_spacing,
    _blind_lines,
    _estimate_rate,
    _occupied_band,
    _spread_tones,
)
from iqstat.estimate.carrier import _fit_tones, _line_power_for
from iqstat.estimate.link_estimate import (
    MIN_SAMPLES,
    MIN_SYMBOLS,
    LinkEstimate,
    Modulation,
    _check_rates,
    _link_result,
    _n_tones,
    _signal_width,
    tone_frequencies_hz,
    tone_offsets_hz,
)
from iqstat.estimate.spectrum import _Burst, _burst_array, _coarse_center
from iqstat.units import check_positive

#: Bursts transformed together (rows of one 2-D FFT). Rows are independent (a row's numbers
#: depend on that row alone), so this trades only the per-chunk numpy calls against memory:
#: measure's batches (~35 bursts, <= 1 M samples) are one chunk; 64 bursts of 40 k samples
#: are two chunks of 32, ~23 MB at the peak. 16 -> 40 rows: ~190 -> ~167 us per burst of
#: 29 k samples (64 rows are no faster and twice the memory).
BATCH_ROWS = 40


def estimate_carrier(
    x: np.ndarray,
    sample_rate_hz: float,
    *,
    modulation: Modulation,
    tone_spacing_hz: float | None,
    symbol_rate_hz: float,
) -> float:
    """Carrier offset of a burst whose symbol rate and tone spacing are known.

    Parameters
    ----------
    x : ndarray of complex, shape (n,)
        The burst's samples (full scale ±1), maybe with a little noise before and after.
    sample_rate_hz : float
        fs [Hz].
    modulation : {"2fsk", "4fsk", "ook"}
    tone_spacing_hz : float or None
        Δf [Hz] for FSK; None for OOK.
    symbol_rate_hz : float
        Rs [Bd].

    Returns
    -------
    float
        cfo_hz: the midpoint of the FSK tones (tone i at cfo + (i − (M−1)/2)·Δf) or the OOK
        carrier [Hz].

    Notes
    -----
    Coarse: centroid of the excess power. Fine: the lines of the p-th power of the burst at
    p·f_i when p·h is an integer for p ∈ {1, 2} (h = Δf/Rs), each refined by
    :func:`interpolate_peak_bin`; otherwise the offset maximising the mean sliding correlator
    energy (a residual offset δf costs sinc²(δf·T) of the matched energy [1]_).

    References
    ----------
    .. [1] S. Hinedi, M. Simon and D. Raphaeli, "The performance of noncoherent orthogonal
       M-FSK in the presence of timing and frequency errors", IEEE Trans. Commun. 43, 1995.
    """
    fs = check_positive("sample_rate_hz", sample_rate_hz, "give the sample rate in Hz")
    rs, df = _check_rates(modulation, fs, symbol_rate_hz, tone_spacing_hz)
    if rs is None:
        raise ParameterError("symbol_rate_hz is required; give the symbol rate in Bd")
    if _n_tones(modulation) > 1 and df is None:
        raise ParameterError(f"tone_spacing_hz is required for {modulation}; give it in Hz")
    return estimate_link(
        x, sample_rate_hz, modulation=modulation, symbol_rate_hz=rs, tone_spacing_hz=df
    ).cfo_hz


def estimate_symbol_rate(
    x: np.ndarray,
    sample_rate_hz: float,
    *,
    modulation: Modulation,
    tone_freqs_hz: Sequence[float] | None = None,
    cfo_hz: float | None = None,
    tone_spacing_hz: float | None = None,
    approx: float | None = None,
) -> float:
    """Symbol rate of a burst from the line of its correlator-energy feature.

    Parameters
    ----------
    x : ndarray of complex, shape (n,)
        The burst's samples.
    sample_rate_hz : float
        fs [Hz].
    modulation : {"2fsk", "4fsk", "ook"}
    tone_freqs_hz : sequence of float, optional
        Tone frequencies (M of them, or the carrier for OOK) [Hz].
    cfo_hz, tone_spacing_hz : float, optional
        Alternative to ``tone_freqs_hz``. With neither, coarse tones are estimated blind.
    approx : float, optional
        A rate known to within 5 % [Bd]; without it fs/1000 … fs/4 is searched.

    Returns
    -------
    float
        Rs [Bd] as received (a transmitter clock offset shows in it).

    Notes
    -----
    With y_i[n] = Σ_{m=n}^{n+L−1} x[m]·e^{−j2πf_i m/fs}, the feature (FSK: largest minus second
    largest |y_i|; OOK: |y|²; METHODS §4 uses max_i |y_i|²) dips where the window straddles a
    symbol change, so it carries a line at Rs. Blind, window lengths L = fs/R on a
    geometric grid of R are scanned and the most prominent line in R/1.3 … 1.3·R is kept; then
    |DFT|² of E (window fs/R̂) is maximised on a zoomed grid with a parabolic last step.
    """
    b = _Burst(x, sample_rate_hz, modulation)
    approx_hz = None
    if approx is not None:
        approx_hz, _ = _check_rates(modulation, b.fs, approx, None)
    freqs = _resolve_tones(b, tone_freqs_hz, cfo_hz, tone_spacing_hz)
    spacing = float(np.mean(np.diff(freqs))) if freqs.size > 1 else None
    return _estimate_rate(b, freqs, spacing, approx_hz)[0]


def estimate_tone_spacing(
    x: np.ndarray,
    sample_rate_hz: float,
    *,
    modulation: Literal["2fsk", "4fsk"],
    symbol_rate_hz: float | None = None,
) -> float:
    """Tone spacing Δf [Hz] of an FSK burst, blind (the symbol rate too, unless given).

    Coarse spacing and centre from the burst's spectrum (equally spaced lines, else its second
    moment), then the spectral lines of the burst or its square (see :func:`estimate_carrier`)
    or the energy search. Returns Δf in Hz. Use :func:`estimate_link` to get the carrier and
    the rate from the same pass.
    """
    if modulation == "ook":
        raise ParameterError("modulation 'ook' has no tone spacing; use 2fsk or 4fsk")
    est = estimate_link(x, sample_rate_hz, modulation=modulation, symbol_rate_hz=symbol_rate_hz)
    return float(est.tone_spacing_hz)


def _resolve_tones(b: _Burst, tone_freqs_hz, cfo_hz, tone_spacing_hz) -> np.ndarray:
    if tone_freqs_hz is not None:
        f = np.asarray(tone_freqs_hz, dtype=float).ravel()
        if f.size != b.m or not np.all(np.isfinite(f)):
            raise ParameterError(
                f"tone_freqs_hz {tone_freqs_hz!r} must hold {b.m} finite frequencies in Hz "
                f"for {b.modulation}"
            )
        return np.sort(f)
    _, df = _check_rates(b.modulation, b.fs, None, tone_spacing_hz)
    center, spacing = _blind_center_and_spacing(b, df)
    if cfo_hz is not None:
        try:
            center = float(cfo_hz)
        except (TypeError, ValueError):
            raise ParameterError(f"cfo_hz {cfo_hz!r} is not a number; give it in Hz") from None
        if not math.isfinite(center):
            raise ParameterError(f"cfo_hz {cfo_hz!r} must be finite")
    return center + tone_offsets_hz(b.modulation, spacing)


def _require_symbols(b: _Burst, rate_hz: float) -> float:
    n_sym = b.n * rate_hz / b.fs
    if n_sym < MIN_SYMBOLS:
        raise MeasurementError(
            f"burst of {b.n} samples holds {n_sym:.1f} symbols at {rate_hz:g} Bd; at least "
            f"{MIN_SYMBOLS} are needed (check the burst limits or the symbol rate)"
        )
    return n_sym


def estimate_link(
    x: np.ndarray,
    sample_rate_hz: float,
    *,
    modulation: Modulation,
    symbol_rate_hz: float | None = None,
    tone_spacing_hz: float | None = None,
) -> LinkEstimate:
    """Carrier offset, tone spacing and symbol rate of one burst; blind for what is not given.

    Parameters
    ----------
    x : ndarray of complex, shape (n,)
        The burst's samples (full scale ±1), maybe with a little noise before and after.
    sample_rate_hz : float
        fs [Hz]. Required: there is no default sample rate.
    modulation : {"2fsk", "4fsk", "ook"}
    symbol_rate_hz : float, optional
        Rs [Bd] from the link profile; estimated when None.
    tone_spacing_hz : float, optional
        Δf [Hz] from the link profile (FSK only); estimated when None.

    Returns
    -------
    LinkEstimate

    Raises
    ------
    MeasurementError
        Empty, all-zero or non-finite burst; fewer than MIN_SYMBOLS symbols; no signal.
    ParameterError
        Unknown modulation, non-positive rates, a spacing given for OOK.

    Notes
    -----
    Chain: coarse centre (spectral centroid) and, for a blind spacing, coarse tones from the
    spectrum (equally spaced lines, else its second moment) → symbol rate from the feature
    line (when not given) → carrier and spacing from the spectral lines of the burst or its
    square, or the energy search → the symbol rate once more on the refined tones.
    """
    res = estimate_link_many(
        [x],
        sample_rate_hz,
        modulation=modulation,
        symbol_rate_hz=symbol_rate_hz,
        tone_spacing_hz=tone_spacing_hz,
    )[0]
    if isinstance(res, MeasurementError):
        raise res
    return res


def _estimate_link_one(
    x: np.ndarray,
    sample_rate_hz: float,
    modulation: str,
    symbol_rate_hz: float | None,
    tone_spacing_hz: float | None,
) -> LinkEstimate:
    """Per-burst chain of :func:`estimate_link` (blind rates, or no line power)."""
    b = _Burst(x, sample_rate_hz, modulation)
    rs, df = _check_rates(modulation, b.fs, symbol_rate_hz, tone_spacing_hz)
    rate_known, spacing_known = rs is not None, (df is not None or b.m == 1)
    if rate_known:
        _require_symbols(b, rs)

    # 1. coarse centre and tones
    if rate_known:
        center, _ = _coarse_center(b, _signal_width(b.m, df or rs, rs))
        spacing0 = df
        if b.m > 1 and df is None:
            _, occupied = _occupied_band(b)
            blind = _blind_lines(b, center, occupied)
            center, spacing0 = (
                (blind.cfo_hz, blind.spacing_hz)
                if blind is not None
                else _spread_tones(b, center, occupied)
            )
    else:
        center, spacing0 = _blind_center_and_spacing(b, df)

    # 2. symbol rate
    rate_db = rate_std = None
    if not rate_known:
        rs, rate_db, rate_std = _estimate_rate(
            b, center + tone_offsets_hz(modulation, spacing0), spacing0, None
        )
        _require_symbols(b, rs)
        if b.m == 1:
            center, _ = _coarse_center(b, _signal_width(1, None, rs))

    # 3. carrier and spacing
    fit = _fit_tones(b, center, spacing0, rs, spacing_known)
    spacing = fit.spacing_hz if b.m > 1 else None
    if b.m > 1 and not (spacing > 0):
        raise MeasurementError(
            "tone spacing estimate is not positive; give tone_spacing_hz from the link profile"
        )

    # 4. the rate once more with the refined tones
    if not rate_known:
        tones = tone_frequencies_hz(modulation, fit.cfo_hz, spacing)
        rs, rate_db, rate_std = _estimate_rate(b, tones, spacing, rs)

    return _link_result(modulation, b.fs, b.n, rs, rate_known, df, fit, rate_db, rate_std)


def _burst_samples(x, fs: float, rate_hz: float | None) -> np.ndarray:
    """The burst as a 1-D finite array, or MeasurementError (same checks as _Burst)."""
    arr = _burst_array(x)
    energy = float(np.vdot(arr, arr).real) if np.iscomplexobj(arr) else float(np.dot(arr, arr))
    if not math.isfinite(energy) and not np.all(np.isfinite(arr)):
        raise MeasurementError(
            "burst contains NaN or infinite samples; zero or cut them before estimating"
        )
    if energy == 0:
        raise MeasurementError("burst is all zeros; there is no signal to estimate from")
    if rate_hz is not None:
        n_sym = arr.size * rate_hz / fs
        if n_sym < MIN_SYMBOLS:
            raise MeasurementError(
                f"burst of {arr.size} samples holds {n_sym:.1f} symbols at {rate_hz:g} Bd; at "
                f"least {MIN_SYMBOLS} are needed (check the burst limits or the symbol rate)"
            )
    return arr


def estimate_link_many(
    xs: Sequence[np.ndarray],
    sample_rate_hz: float,
    *,
    modulation: Modulation,
    symbol_rate_hz: float | None = None,
    tone_spacing_hz: float | None = None,
    band_margin_symbols: float | None = None,
) -> list[LinkEstimate | MeasurementError]:
    """:func:`estimate_link` on a batch of bursts; a burst that fails gets its error, not a raise.

    Parameters
    ----------
    xs : sequence of ndarray of complex, each shape (n_b,)
        The bursts' samples (any lengths; views of one array are fine, nothing is written).
    sample_rate_hz : float
        fs [Hz].
    modulation : {"2fsk", "4fsk", "ook"}
    symbol_rate_hz, tone_spacing_hz : float, optional
        As for :func:`estimate_link`.
    band_margin_symbols : float, optional
        When given (rates-given path only), each estimate's ``quality`` also holds
        ``band_energy``: Σ|x_band[n]|² over the burst's samples, x_band the burst keeping the
        DFT bins from the lowest tone − k·Rs to the highest + k·Rs (k this value; the DFT is
        zero-padded to :func:`fft_size`), and ``band_width_hz``, the width of those bins
        (count·fs/nfft). With a noise PSD N0 [1/Hz] the in-band signal power over a burst
        of n_b of the n samples is (band_energy − N0·band_width_hz·n)/n_b. It costs two
        look-ups per burst (running sums the carrier estimate has anyway).

    Returns
    -------
    list of LinkEstimate or MeasurementError
        One per burst, in order; equal to :func:`estimate_link` on each burst alone.

    Raises
    ------
    ParameterError
        Bad parameters or a burst that is not one-dimensional (the call's fault, not a burst's).

    Notes
    -----
    With the symbol rate given, the tone spacing given (or OOK) and p·h an integer for p = 1
    or 2, all bursts run through one chain with a fixed number of numpy calls per group of up
    to BATCH_ROWS bursts of one DFT length (:func:`fft_size`): one 2-D FFT; block sums of its
    power (which also find the all-zero and non-finite bursts, Parseval); the coarse start
    (:func:`_coarse_start_rows`); one window of bins per burst around it (:class:`_Windows`)
    from which the centroid (:func:`_coarse_center_windows`), the lines and the band energy
    are read; for p = 2 the square of the band-limited burst from its band's bins
    (:func:`_line_spectra`); the joint line search of all tones (:func:`_joint_lines_rows`).
    A burst whose lines do not stand out falls back to the per-burst energy search. Blind
    rates, and modulation indices without lines, run the per-burst chain burst by burst.
    """
    m = _n_tones(modulation)
    fs = check_positive("sample_rate_hz", sample_rate_hz, "give the sample rate in Hz")
    rs, df = _check_rates(modulation, fs, symbol_rate_hz, tone_spacing_hz)
    if band_margin_symbols is not None:
        band_margin_symbols = check_positive(
            "band_margin_symbols", band_margin_symbols, "give the margin in symbol rates"
        )
    arrays = list(xs)
    out: list = [None] * len(arrays)
    p = _line_power_for(m, df, rs) if rs is not None and (m == 1 or df is not None) else None
    if p is None:
        for i, x in enumerate(arrays):  # blind or no lines: the per-burst chain
            try:
                out[i] = _estimate_link_one(x, fs, modulation, symbol_rate_hz, tone_spacing_hz)
            except MeasurementError as exc:
                out[i] = exc
        return out
    groups: dict[int, list[int]] = {}
    min_samples = max(MIN_SAMPLES, MIN_SYMBOLS * fs / rs)
    for i, x in enumerate(arrays):
        arr = np.asarray(x)
        if arr.ndim != 1 or arr.size < min_samples:
            try:  # the per-burst checks, in their order, for their messages
                arr = _burst_samples(arr, fs, rs)
            except MeasurementError as exc:
                out[i] = exc
                continue
        arrays[i] = arr
        groups.setdefault(fft_size(arr.size), []).append(i)
    for nfft, members in groups.items():
        # near-equal chunks of a multiple of 4 rows: the FFT runs SIMD over 4 rows at a time
        # (complex64), a row left over costs about twice as much
        n_chunks = -(-len(members) // BATCH_ROWS)
        size = -(-len(members) // (4 * n_chunks)) * 4
        for start in range(0, len(members), size):
            rows = members[start : start + size]
            fits = _carrier_rows(
                [arrays[i] for i in rows], nfft, fs, m, p, rs, df, band_margin_symbols
            )
            for i, res in zip(rows, fits, strict=True):
                out[i] = res
    return out
