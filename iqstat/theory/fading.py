"""Error rates under Rician fading: the white-noise laws averaged over the signal power's law.

When the channel gain h changes slowly against a symbol (each symbol sees one value of h) but
moves within a burst, the receiver's BER is the white-noise BER averaged over the law of
x = |h|² (E x = 1). For a Rician channel of K factor K (specular over scattered power),
2(1 + K)·x is noncentral chi-square with 2 degrees of freedom and noncentrality 2K, so

    f(x) = (1 + K)·e^{−K}·exp(−(1 + K)x)·I0(2√(K(1 + K)x)),     P̄_b(γ̄) = ∫ P_b(γ̄ x) f(x) dx

[1]_. :func:`ber_rician` evaluates the integral by Simpson's rule in ln x (the deep fades,
which rule the BER at high γ̄) and, where a strong specular part concentrates the law around
the mean, linearly there, with the log-domain density (``scipy.special.i0e``). K = 0 is
Rayleigh fading, K → ∞ white noise.

For OOK the white-noise law is the one with its optimum threshold at each level: a receiver
whose threshold follows the fade. A fixed threshold errs more, so the figure is a lower bound.

References
----------
.. [1] M. K. Simon, M.-S. Alouini, Digital Communication over Fading Channels, 2nd ed., Wiley,
   2005, §2.2.1.3 (the Rician law) and ch. 8 (noncoherent FSK: P_b = ½·M_γ(−½) for binary
   orthogonal tones, M_γ the moment generating function of the SNR) [mem].
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import ArrayLike
from scipy import integrate, optimize, special

from iqstat.errors import ParameterError
from iqstat.theory.inputs import Modulation, _check_modulation
from iqstat.theory.link import _LOG_BER_FLOOR, predicted_ber

__all__ = ["ber_rician", "required_ebn0_db_rician", "rician_power_pdf", "FADING_BRACKET_DB"]

#: Bracket of :func:`required_ebn0_db_rician`, dB (Rayleigh fading needs ~10 dB per decade).
FADING_BRACKET_DB = (-10.0, 90.0)
#: Points of each part of the integration grid (odd, for Simpson's rule).
_GRID_POINTS = 1201
#: Smallest power ratio on the grid: the mass below it, ≤ (1 + K)e^{−K}·1e-12, is negligible.
_X_MIN = 1e-12


def rician_power_pdf(x: ArrayLike, k_factor: float) -> np.ndarray:
    """Density of x = |h|² of a Rician gain with E|h|² = 1 and K factor ``k_factor`` (linear)."""
    k = _check_k(k_factor)
    x = np.asarray(x, dtype=float)
    arg = 2.0 * np.sqrt(k * (1.0 + k) * np.maximum(x, 0.0))
    # log I0(a) = log i0e(a) + a: no overflow for a strong specular part.
    log_f = math.log1p(k) - k - (1.0 + k) * x + np.log(special.i0e(arg)) + arg
    return np.where(x >= 0, np.exp(log_f), 0.0)


def _check_k(k_factor: float) -> float:
    try:
        k = float(k_factor)
    except (TypeError, ValueError):
        raise ParameterError(f"k_factor={k_factor!r} is not a number") from None
    if not (k >= 0.0) or math.isnan(k):
        raise ParameterError(f"k_factor={k_factor!r} must be >= 0 (linear; 0 is Rayleigh)")
    return k


def _integrate(values, k: float) -> float:
    """∫ values(x)·f_K(x) dx by Simpson's rule: in t = ln x over the deep fades (and over the
    whole law when it is wide), linear in x around the mean when a strong specular part
    concentrates it there."""
    sd = math.sqrt(1.0 + 2.0 * k) / (1.0 + k)  # standard deviation of x
    hi = 1.0 + 14.0 * sd + 40.0 / (1.0 + k)
    split = 1.0 - 14.0 * sd
    top = split if split > 0.05 else hi
    x_log = np.geomspace(_X_MIN, top, _GRID_POINTS)
    total = integrate.simpson(values(x_log) * rician_power_pdf(x_log, k) * x_log, x=np.log(x_log))
    if top < hi:
        x_lin = np.linspace(top, hi, _GRID_POINTS)
        total += integrate.simpson(values(x_lin) * rician_power_pdf(x_lin, k), x=x_lin)
    return float(total)


def ber_rician(
    ebn0_mean: float, modulation: Modulation, k_factor: float, rho_abs: float | ArrayLike = 0.0
) -> float:
    """Mean BER of iqstat's noncoherent receiver when the signal power fades as a Rician law.

    Parameters
    ----------
    ebn0_mean : float
        Mean Eb/N0 over the fading, linear, >= 0.
    modulation : {"2fsk", "4fsk", "ook"}
    k_factor : float
        Rician K, linear (0: Rayleigh). Above 1e6 the fading is negligible and the
        white-noise BER is returned.
    rho_abs : float or (4, 4) array
        Tone correlation, as :func:`~iqstat.theory.predicted_ber`.

    Returns
    -------
    float
        ∫ P_b(γ̄·x) f_K(x) dx, with P_b the white-noise BER of :func:`predicted_ber`.
    """
    _check_modulation(modulation)
    k = _check_k(k_factor)
    g = float(ebn0_mean)
    if not (g >= 0.0) or not math.isfinite(g):
        raise ParameterError(f"ebn0_mean={ebn0_mean!r} must be a finite linear ratio >= 0")
    if k > 1e6 or g == 0.0:
        return float(predicted_ber(g, modulation, rho_abs))
    return _integrate(lambda x: np.asarray(predicted_ber(g * x, modulation, rho_abs), float), k)


def required_ebn0_db_rician(
    target_ber: float, modulation: Modulation, k_factor: float, rho_abs: float | ArrayLike = 0.0
) -> float | None:
    """Mean Eb/N0 (dB) at which :func:`ber_rician` equals ``target_ber``; None if it is not
    reached inside FADING_BRACKET_DB (e.g. 1e-9 under Rayleigh fading)."""
    target = float(target_ber)
    if not (0.0 < target < 0.5):
        raise ParameterError(f"target_ber={target_ber!r} is outside (0, 0.5)")
    log_target = math.log(target)

    def f(x_db: float) -> float:
        ber = ber_rician(10.0 ** (x_db / 10.0), modulation, k_factor, rho_abs)
        return math.log(max(ber, _LOG_BER_FLOOR)) - log_target

    lo, hi = FADING_BRACKET_DB
    if f(lo) <= 0.0 or f(hi) >= 0.0:
        return None
    return float(optimize.brentq(f, lo, hi, xtol=1e-6))
