"""Channel and receiver impairments for synthetic captures, as pure array functions.

Each function takes and returns complex baseband arrays (full scale ±1); the chunked generator
in :mod:`iqstat.synth.generate` applies them chunk by chunk.
"""

from __future__ import annotations

import math

import numpy as np

from iqstat.errors import ParameterError

#: Oscillators of the sum-of-sinusoids Rayleigh component.
N_FADING_OSCILLATORS = 16


def rician_gain(
    n_samples: int,
    *,
    sample_rate_hz: float,
    k_factor: float,
    doppler_hz: float,
    rng: np.random.Generator,
    t0_samples: float = 0.0,
) -> np.ndarray:
    """Complex Rician fading gain h[n] with E|h|² = 1 and K = (specular power)/(scattered power).

    Parameters
    ----------
    n_samples : int
        Length of the gain sequence (sample n at time n − t0 relative to the burst start).
    sample_rate_hz : float
        fs [Hz].
    k_factor : float
        Rician K, linear, ≥ 0 (0 = Rayleigh).
    doppler_hz : float
        Maximum Doppler shift f_d [Hz]; the coherence time is about 0.423/f_d.
    rng : numpy.random.Generator
        Draws the oscillator angles and phases.
    t0_samples : float
        Time origin in samples.

    Returns
    -------
    ndarray of complex128, shape (n_samples,)

    Notes
    -----
    h(t) = √(K/(K+1)) + √(1/(K+1))·g(t), g(t) = N^{-1/2} Σ_n exp(j(2π f_d cos α_n t + φ_n))
    with α_n, φ_n uniform: a sum-of-sinusoids approximation of Clarke's isotropic-scattering
    Rayleigh process [1]_ (N = 16 oscillators: the amplitude distribution is close to, not
    exactly, Rayleigh). The specular path has zero Doppler.

    References
    ----------
    .. [1] Y. R. Zheng and C. Xiao, "Simulation models with correct statistical properties for
       Rayleigh fading channels", IEEE Trans. Commun. 51(6):920–928, 2003 [mem].
    """
    if not (math.isfinite(k_factor) and k_factor >= 0):
        raise ParameterError(f"rician k_factor {k_factor!r} must be >= 0")
    if not (math.isfinite(doppler_hz) and doppler_hz > 0):
        raise ParameterError(f"doppler_hz {doppler_hz!r} must be > 0")
    alpha = rng.uniform(0.0, 2.0 * np.pi, N_FADING_OSCILLATORS)
    phi = rng.uniform(0.0, 2.0 * np.pi, N_FADING_OSCILLATORS)
    w = 2.0 * np.pi * doppler_hz * np.cos(alpha)
    # The process is slow (f_d ≪ fs): evaluate it exactly every `step` samples (at least 256
    # points per Doppler period) and interpolate linearly in between (relative error
    # ≤ (2π/256)²/8 ≈ 8e-5); step = 1 when the Doppler is fast.
    step = max(1, int(sample_rate_hz / (256.0 * doppler_hz)))
    n_grid = (max(n_samples, 1) - 1) // step + 2
    grid = np.arange(n_grid, dtype=np.float64) * step
    t = (grid - t0_samples) / sample_rate_hz
    g = np.zeros(n_grid, dtype=np.complex128)
    for wn, pn in zip(w, phi, strict=True):  # 16 oscillators, vectorised over the grid
        g += np.exp(1j * (wn * t + pn))
    g /= math.sqrt(N_FADING_OSCILLATORS)
    if step > 1:
        n = np.arange(n_samples, dtype=np.float64)
        g = np.interp(n, grid, g.real) + 1j * np.interp(n, grid, g.imag)
    else:
        g = g[:n_samples]
    return math.sqrt(k_factor / (k_factor + 1.0)) + math.sqrt(1.0 / (k_factor + 1.0)) * g


def iq_imbalance_coefficients(gain_db: float, phase_deg: float) -> tuple[complex, complex]:
    """(K1, K2) of y = K1·x + K2·x* for the imbalance model of :func:`apply_iq_imbalance`.

    K1 = (1 + g·e^{−jφ})/2, K2 = (1 − g·e^{jφ})/2, g = 10^(gain_db/20); image rejection
    |K1|²/|K2|² [derived from the model below; the widely used receiver IQ model, e.g.
    Tarighat, Bagheri & Sayed, IEEE Trans. Signal Process. 53(8):3257–3268, 2005 [mem]].
    """
    g = 10.0 ** (gain_db / 20.0)
    phi = math.radians(phase_deg)
    return (1 + g * complex(math.cos(phi), -math.sin(phi))) / 2, (
        1 - g * complex(math.cos(phi), math.sin(phi))
    ) / 2


def apply_iq_imbalance(x: np.ndarray, gain_db: float, phase_deg: float) -> np.ndarray:
    """Receiver IQ gain/phase imbalance: I' = I, Q' = g·(Q·cos φ − I·sin φ).

    Parameters
    ----------
    x : ndarray of complex, shape (n,)
    gain_db : float
        Q-branch gain relative to I [dB].
    phase_deg : float
        Quadrature error φ [degrees].

    Returns
    -------
    ndarray of complex128, shape (n,)
    """
    if gain_db == 0.0 and phase_deg == 0.0:
        return x
    g = 10.0 ** (gain_db / 20.0)
    phi = math.radians(phase_deg)
    i, q = x.real, x.imag
    return i + 1j * (g * (q * math.cos(phi) - i * math.sin(phi)))


def clip_components(x: np.ndarray, level: float) -> tuple[np.ndarray, int]:
    """Clip I and Q separately at ±level (an ADC's saturation); returns (y, clipped count)."""
    re = np.clip(x.real, -level, level)
    im = np.clip(x.imag, -level, level)
    n = int(np.count_nonzero(np.abs(x.real) > level) + np.count_nonzero(np.abs(x.imag) > level))
    return re + 1j * im, n


class ToneInterferer:
    """A continuous tone a·exp(j(2π f n/fs + φ)), evaluated by absolute sample index."""

    def __init__(self, *, offset_hz: float, power: float, phase_rad: float, sample_rate_hz: float):
        self.cycles_per_sample = offset_hz / sample_rate_hz
        self.amplitude = math.sqrt(power)
        self.phase_rad = phase_rad

    def chunk(self, start: int, n: int) -> np.ndarray:
        idx = np.arange(start, start + n, dtype=np.float64)
        cyc = np.mod(self.cycles_per_sample * idx, 1.0)
        return self.amplitude * np.exp(1j * (self.phase_rad + 2 * np.pi * cyc))


class NarrowbandInterferer:
    """Complex Gaussian noise of a given power in a band of ``bandwidth_hz`` around ``offset_hz``.

    White Gaussian noise through a linear-phase FIR low-pass (``scipy.signal.firwin``, cut-off
    B/2, taps normalised to Σh² = 1 so the power is kept), shifted to the offset. The filter
    state is carried from chunk to chunk, so the output does not depend on chunk boundaries
    beyond the per-chunk random draws; ``warmup`` samples fill the filter before sample 0.
    """

    def __init__(
        self,
        *,
        offset_hz: float,
        bandwidth_hz: float,
        power: float,
        sample_rate_hz: float,
        warmup_rng: np.random.Generator,
    ):
        if not 0 < bandwidth_hz < sample_rate_hz:
            raise ParameterError(
                f"interferer bandwidth_hz {bandwidth_hz!r} must be in (0, {sample_rate_hz:g})"
            )
        n_taps = int(min(4001, max(31, 2 * round(4.0 * sample_rate_hz / bandwidth_hz) + 1)))
        import scipy.signal  # a heavy import, only for band-limited noise

        h = scipy.signal.firwin(n_taps, bandwidth_hz / 2.0, fs=sample_rate_hz)
        self.taps = h / math.sqrt(np.sum(h * h))
        self.cycles_per_sample = offset_hz / sample_rate_hz
        self.sigma = math.sqrt(power / 2.0)
        warm = self._white(warmup_rng, n_taps - 1)
        _, self.state = scipy.signal.lfilter(
            self.taps, [1.0], warm, zi=np.zeros(n_taps - 1, dtype=np.complex128)
        )

    def _white(self, rng: np.random.Generator, n: int) -> np.ndarray:
        return self.sigma * (rng.standard_normal(n) + 1j * rng.standard_normal(n))

    def chunk(self, start: int, n: int, rng: np.random.Generator) -> np.ndarray:
        """Next ``n`` samples (chunks must be requested in order)."""
        import scipy.signal

        y, self.state = scipy.signal.lfilter(self.taps, [1.0], self._white(rng, n), zi=self.state)
        idx = np.arange(start, start + n, dtype=np.float64)
        return y * np.exp(2j * np.pi * np.mod(self.cycles_per_sample * idx, 1.0))
