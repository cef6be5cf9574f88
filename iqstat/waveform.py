"""The waveform model: noiseless array-level CPFSK (2fsk, 4fsk) and OOK at baseband.

Shared by the synthetic captures (:mod:`iqstat.synth`, re-exported there as
``iqstat.synth.modulator``) and the receiver's known-symbol reference waveform
(:func:`iqstat.sync.refine_timing_known`). Everything is evaluated at each sample's true
time; the symbol period is never rounded to a whole number of samples.

Timing model (all times in receiver samples, sample ``n`` at time ``n``)
-----------------------------------------------------------------------
Symbol ``k`` occupies ``[t0 + k·T', t0 + (k+1)·T')`` with ``t0 = timing_offset_samples`` and

    T' = (fs / Rs) / (1 + ppm·1e-6),

i.e. a positive ``clock_offset_ppm`` means the *transmitter's symbol clock runs fast* by that
many parts per million, so its symbols are shorter when counted in receiver samples. The
output has ``ceil(t0 + n·T')`` samples; samples before ``t0`` are zero (carrier off).
The clock offset acts on the symbol clock only: tone frequencies are given in receiver Hz
(a transmitter's carrier error is the separate ``cfo_hz``).
"""

from __future__ import annotations

import math
from typing import Literal

import numpy as np
from scipy.special import ndtr

from iqstat.errors import ParameterError
from iqstat.units import check_positive

Modulation = Literal["2fsk", "4fsk", "ook"]
OokShape = Literal["rect", "raised-cosine"]

#: Number of tones / amplitude levels per modulation.
ALPHABET_SIZE: dict[str, int] = {"2fsk": 2, "4fsk": 4, "ook": 2}

#: Gaussian tails beyond this many standard deviations are treated as zero (Φ(−9) ≈ 1e-19).
_GAUSS_SPAN_SIGMAS = 9.0


def _check_finite(name: str, value: float) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} {value!r} is not a number") from None
    if not math.isfinite(v):
        raise ParameterError(f"{name} {value!r} must be a finite number")
    return v


def symbol_period_samples(
    sample_rate_hz: float, symbol_rate_hz: float, clock_offset_ppm: float = 0.0
) -> float:
    """Symbol period in receiver samples, T' = (fs/Rs)/(1 + ppm·1e-6).

    Parameters
    ----------
    sample_rate_hz : float
        Receiver sample rate fs [Hz].
    symbol_rate_hz : float
        Nominal symbol rate Rs [Bd].
    clock_offset_ppm : float
        Transmitter symbol clock error [ppm]; positive = transmitter fast (shorter symbols).

    Returns
    -------
    float
        Samples per symbol, generally not an integer.
    """
    fs = check_positive("sample_rate_hz", sample_rate_hz, "give the sample rate in Hz")
    rs = check_positive("symbol_rate_hz", symbol_rate_hz, "give the symbol rate in Bd")
    ppm = _check_finite("clock_offset_ppm", clock_offset_ppm)
    if abs(ppm) >= 1e5:
        raise ParameterError(
            f"clock_offset_ppm {clock_offset_ppm!r} is implausible; use |ppm| < 100000"
        )
    return (fs / rs) / (1.0 + ppm * 1e-6)


def symbol_boundaries(
    n_symbols: int,
    *,
    sample_rate_hz: float,
    symbol_rate_hz: float,
    timing_offset_samples: float = 0.0,
    clock_offset_ppm: float = 0.0,
) -> np.ndarray:
    """Start times of symbols 0..n−1 and the end of the last one, in receiver samples.

    Returns
    -------
    ndarray of float64, shape (n_symbols + 1,)
        ``t0 + k·T'`` for k = 0..n_symbols (see the module docstring).
    """
    period = symbol_period_samples(sample_rate_hz, symbol_rate_hz, clock_offset_ppm)
    t0 = _check_finite("timing_offset_samples", timing_offset_samples)
    return t0 + np.arange(int(n_symbols) + 1, dtype=np.float64) * period


def n_output_samples(
    n_symbols: int,
    *,
    sample_rate_hz: float,
    symbol_rate_hz: float,
    timing_offset_samples: float = 0.0,
    clock_offset_ppm: float = 0.0,
) -> int:
    """Length of :func:`modulate`'s output: ``ceil(t0 + n·T')`` (float fuzz of 1e-9 ignored)."""
    period = symbol_period_samples(sample_rate_hz, symbol_rate_hz, clock_offset_ppm)
    end = float(timing_offset_samples) + int(n_symbols) * period
    return max(0, int(math.ceil(end - 1e-9)))


def _gaussian_phase_pulse(t: np.ndarray, period: float, sigma: float) -> np.ndarray:
    """q(t) = ∫_{-∞}^{t} g(τ) dτ of the Gaussian-filtered rectangular frequency pulse.

    g(t) = Φ(t/σ) − Φ((t − T)/σ) (a unit-height rectangle on [0, T) convolved with a unit-area
    Gaussian of standard deviation σ), so q(t) = G(t) − G(t − T) with
    G(x) = ∫_{-∞}^{x} Φ(u/σ) du = x·Φ(x/σ) + σ·φ(x/σ); q(−∞) = 0, q(+∞) = T.
    """

    def big_g(x: np.ndarray) -> np.ndarray:
        z = x / sigma
        return x * ndtr(z) + sigma * np.exp(-0.5 * z * z) / math.sqrt(2.0 * math.pi)

    return big_g(t) - big_g(t - period)


def _fsk_phase_cycles(
    levels: np.ndarray,
    t_rel: np.ndarray,
    k: np.ndarray,
    period: float,
    bt: float | None,
) -> np.ndarray:
    """Σ_j a_j·q(t − τ_j) in sample units (multiply by Δf/fs for cycles).

    ``t_rel`` is t − t0 per sample, ``k`` the index of the symbol holding each sample
    (0 ≤ k < n). Symbols far in the past contribute their full area a_j·T' through a prefix sum;
    the few symbols within the Gaussian's reach are evaluated with the exact phase pulse.
    """
    n = levels.size
    prefix = np.concatenate(([0.0], np.cumsum(levels * period)))  # prefix[m] = T'·Σ_{j<m} a_j
    if bt is None:
        # Rectangular pulse: q(t) = clip(t, 0, T'); only the current symbol is partial.
        return prefix[k] + levels[k] * (t_rel - k * period)
    # Gaussian filter with 3-dB bandwidth B = BT/T: σ_t = √(ln 2)/(2π·B)
    # (the usual GMSK/GFSK pulse definition, e.g. Murota & Hirade, IEEE Trans. Commun.
    # 29(7):1044–1050, 1981 [mem]).
    sigma = math.sqrt(math.log(2.0)) / (2.0 * math.pi * bt) * period
    reach = int(math.ceil(1.0 + _GAUSS_SPAN_SIGMAS * sigma / period))
    out = prefix[np.clip(k - reach, 0, n)]
    for d in range(-reach, reach + 1):
        j = k + d
        ok = (j >= 0) & (j < n)
        jj = np.where(ok, j, 0)
        out = out + np.where(
            ok, levels[jj] * _gaussian_phase_pulse(t_rel - jj * period, period, sigma), 0.0
        )
    return out


def _ook_envelope(bits: np.ndarray, u: np.ndarray, shape: str, rolloff: float) -> np.ndarray:
    """Envelope at fractional symbol positions ``u`` = (t − t0)/T'.

    rect: the bit of the symbol holding the sample. raised-cosine: between neighbouring symbols
    the envelope moves along r(x) = ½(1 + sin(πx/α)), x ∈ [−α/2, α/2] the distance (in symbol
    periods) from the boundary; the ramps of adjacent boundaries are complementary, so a run of
    ones stays at 1. Outside the burst the bits are 0.
    """
    n = bits.size
    padded = np.concatenate(([0.0], bits.astype(np.float64), [0.0]))  # padded[k+1] = b_k

    def bit_at(idx: np.ndarray) -> np.ndarray:
        return padded[np.clip(idx, -1, n) + 1]

    k = np.floor(u).astype(np.int64)
    env = bit_at(k)
    if shape == "rect":
        return env
    if shape == "raised-cosine":
        m = np.rint(u).astype(np.int64)  # nearest boundary
        x = u - m
        near = np.abs(x) < rolloff / 2.0
        r = 0.5 * (1.0 + np.sin(np.pi * x[near] / rolloff))
        env[near] = bit_at(m[near] - 1) * (1.0 - r) + bit_at(m[near]) * r
        return env
    raise ParameterError(f"ook_shape {shape!r} is not known; use 'rect' or 'raised-cosine'")


def modulate(
    symbols: np.ndarray,
    *,
    modulation: Modulation,
    sample_rate_hz: float,
    symbol_rate_hz: float,
    tone_spacing_hz: float | None = None,
    bt: float | None = None,
    ook_shape: OokShape = "rect",
    ook_rolloff: float = 0.5,
    cfo_hz: float = 0.0,
    phase_rad: float = 0.0,
    timing_offset_samples: float = 0.0,
    clock_offset_ppm: float = 0.0,
    amplitude: float = 1.0,
) -> np.ndarray:
    """Modulate symbols to noiseless complex baseband.

    Parameters
    ----------
    symbols : array_like of int, shape (n,)
        Tone indices 0..M−1 for FSK (0 = lowest tone; map bits with the profile's
        ``bits_to_symbols``), or bits 0/1 for OOK (1 = carrier on).
    modulation : {"2fsk", "4fsk", "ook"}
    sample_rate_hz : float
        Sample rate fs [Hz].
    symbol_rate_hz : float
        Symbol rate Rs [Bd] (nominal, before the clock offset).
    tone_spacing_hz : float, optional
        FSK tone spacing Δf [Hz]; required for FSK, ignored (must be None) for OOK.
        Modulation index h = Δf/Rs, any positive value.
    bt : float, optional
        Bandwidth-time product of a Gaussian filter on the FSK frequency pulse (GFSK);
        None = rectangular frequency pulse.
    ook_shape : {"rect", "raised-cosine"}
        OOK envelope transitions.
    ook_rolloff : float
        Raised-cosine transition width α as a fraction of the symbol period, 0 < α ≤ 1.
    cfo_hz : float
        Carrier offset [Hz]: the centre of the FSK tones, the OOK carrier.
    phase_rad : float
        Carrier phase [rad] at time t0 (the start of symbol 0).
    timing_offset_samples : float
        t0 ≥ 0, the start of symbol 0 [samples], fractional.
    clock_offset_ppm : float
        Transmitter symbol clock error [ppm], positive = fast (see the module docstring).
    amplitude : float
        Envelope |s| of CPFSK and of OOK "on" (full-scale units).

    Returns
    -------
    ndarray of complex128, shape (ceil(t0 + n·T'),)

    Notes
    -----
    With t in samples, τ_k = t0 + k·T', a_k = i_k − (M−1)/2 and the phase pulse q of the
    frequency pulse (rectangular: q(t) = clip(t, 0, T'); Gaussian: see
    ``_gaussian_phase_pulse``), the FSK signal is [1]_

        s(t) = A·exp(j[φ0 + 2π(f_c/fs)(t − t0) + 2π(Δf/fs)·Σ_k a_k q(t − τ_k)])   (1)

    for t0 ≤ t < t0 + n·T'. The phase is the exact integral of the instantaneous frequency at
    each sample's time (a prefix sum over whole symbols plus the partial current one), so it
    is continuous and a non-integer samples-per-symbol carries no rounding. OOK is
    s(t) = A·e(t)·exp(j[φ0 + 2π(f_c/fs)(t − t0)]) with e(t) the envelope of the bits; the
    raised-cosine ramps are centred on symbol boundaries, so the first ramp starts α·T'/2
    before t0 (if t0 allows) and a last symbol 1 loses the second half of its ramp at the end
    of the output: pad with 0 symbols to keep whole edges.

    References
    ----------
    .. [1] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008,
       §3.3 (continuous-phase FSK) [mem].
    """
    if modulation not in ALPHABET_SIZE:
        raise ParameterError(
            f"modulation {modulation!r} is not known; use one of {', '.join(ALPHABET_SIZE)}"
        )
    m_size = ALPHABET_SIZE[modulation]
    fs = check_positive("sample_rate_hz", sample_rate_hz, "give the sample rate in Hz")
    period = symbol_period_samples(fs, symbol_rate_hz, clock_offset_ppm)
    if period < 1.0:
        raise ParameterError(
            f"symbol_rate_hz {symbol_rate_hz!r} exceeds the sample rate {fs:g} Hz; "
            "a symbol must span at least one sample"
        )
    t0 = _check_finite("timing_offset_samples", timing_offset_samples)
    if t0 < 0:
        raise ParameterError(
            f"timing_offset_samples {timing_offset_samples!r} is negative; use t0 >= 0"
        )
    cfo = _check_finite("cfo_hz", cfo_hz)
    phi0 = _check_finite("phase_rad", phase_rad)
    amp = _check_finite("amplitude", amplitude)
    if amp < 0:
        raise ParameterError(f"amplitude {amplitude!r} is negative; use a value >= 0")

    sym = np.asarray(symbols)
    if sym.ndim != 1:
        raise ParameterError(f"symbols must be one-dimensional, got shape {sym.shape}")
    if sym.size and not np.issubdtype(sym.dtype, np.integer) and sym.dtype != bool:
        if not np.all(np.isfinite(sym)) or not np.all(sym == np.rint(sym)):
            raise ParameterError("symbols must be integers (tone indices, or bits for ook)")
    sym = sym.astype(np.int64)
    if sym.size and (sym.min() < 0 or sym.max() >= m_size):
        bad = sym[(sym < 0) | (sym >= m_size)][0]
        raise ParameterError(
            f"symbol value {int(bad)} is out of range for {modulation}; use 0..{m_size - 1}"
        )

    n_out = n_output_samples(
        sym.size, sample_rate_hz=fs, symbol_rate_hz=symbol_rate_hz,
        timing_offset_samples=t0, clock_offset_ppm=clock_offset_ppm,
    )  # fmt: skip
    t_rel = np.arange(n_out, dtype=np.float64) - t0
    carrier_cycles = (cfo / fs) * t_rel

    if modulation == "ook":
        if tone_spacing_hz is not None:
            raise ParameterError("tone_spacing_hz applies to FSK only; leave it None for ook")
        if bt is not None:
            raise ParameterError("bt applies to FSK only; use ook_shape for ook edges")
        alpha = _check_finite("ook_rolloff", ook_rolloff)
        if not 0.0 < alpha <= 1.0:
            raise ParameterError(f"ook_rolloff {ook_rolloff!r} must be in (0, 1]")
        env = _ook_envelope(sym, t_rel / period, ook_shape, alpha)
        return amp * env * np.exp(1j * (phi0 + 2.0 * np.pi * np.mod(carrier_cycles, 1.0)))

    if modulation in ("2fsk", "4fsk"):
        if tone_spacing_hz is None:
            raise ParameterError(
                f"tone_spacing_hz is required for {modulation}; give the spacing of "
                "adjacent tones in Hz"
            )
        spacing = check_positive("tone_spacing_hz", tone_spacing_hz, "give it in Hz")
        if bt is not None:
            bt = check_positive("bt", bt, "use e.g. 0.5, or None for a rectangular pulse")
        levels = sym.astype(np.float64) - (m_size - 1) / 2.0
        out = np.zeros(n_out, dtype=np.complex128)
        inside = t_rel >= 0.0
        tr = t_rel[inside]
        if sym.size == 0 or tr.size == 0:
            return out
        k = np.minimum(np.floor(tr / period).astype(np.int64), sym.size - 1)
        dev = _fsk_phase_cycles(levels, tr, k, period, bt)
        cycles = np.mod(carrier_cycles[inside] + (spacing / fs) * dev, 1.0)  # eq. (1)
        out[inside] = amp * np.exp(1j * (phi0 + 2.0 * np.pi * cycles))
        return out
    raise ParameterError(
        f"modulation {modulation!r} is not known; use one of {', '.join(ALPHABET_SIZE)}"
    )
