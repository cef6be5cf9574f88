"""Symbol decisions under a fitted model.

:func:`ook_decision_threshold` is the envelope where the weighted "on" and "off" likelihoods
cross (Annamalai & Bhargava, IEEE Trans. Commun. 47(9):1293, 1999); :func:`symbol_posteriors`
the posterior of each hypothesis, softmax_h(log π_h + log Λ_h) (docs/estimator.md eq. 3); and
:func:`decide_symbols` the hard decisions (FSK: largest branch, MAP when the priors are not
uniform; OOK: above the threshold).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize, special

from iqstat.errors import ParameterError
from iqstat.fit.bessel import _log_i0
from iqstat.fit.inputs import (
    _check_modulation,
    _check_outputs,
    _check_priors,
    _check_symbol_grams,
)
from iqstat.fit.result import Modulation, NoncoherentFit


def ook_decision_threshold(amplitude: float, noise_var: float, p_on: float = 0.5) -> float:
    """Envelope threshold |z| that minimises the OOK error probability of the fitted model.

    Parameters
    ----------
    amplitude : float
        A, the "on" amplitude at the correlator output (same units as |z|).
    noise_var : float
        N0 = E|n|² at the correlator output.
    p_on : float
        Prior probability of "on", 0 < p_on < 1.

    Returns
    -------
    float
        r_t: decide "on" where |z| > r_t. 0 when "on" always wins.

    Notes
    -----
    The weighted likelihoods cross where p·e^{−A²/N0}·I0(2A·r/N0) = 1 − p (eq. 1). Solved in
    the log domain, log I0(u) = A²/N0 + log((1−p)/p), u = 2A·r/N0, with Brent's method. With
    σ² = N0/2 per dimension this is b = r/σ of [1] (optimum b: 10 dB → 3.55271, METHODS §1).

    References
    ----------
    .. [1] A. Annamalai, V. K. Bhargava, IEEE Trans. Commun. 47(9):1293, 1999.
    """
    a = float(amplitude)
    n0 = float(noise_var)
    p = float(p_on)
    if not (math.isfinite(a) and a > 0):
        raise ParameterError(f"amplitude {amplitude!r} must be a positive finite number")
    if not (math.isfinite(n0) and n0 > 0):
        raise ParameterError(f"noise_var {noise_var!r} must be a positive finite number")
    if not (0.0 < p < 1.0):
        raise ParameterError(f"p_on {p_on!r} must lie strictly between 0 and 1")
    c = a * a / n0 + math.log((1.0 - p) / p)  # eq. 1 in the log domain
    if c <= 0.0:
        return 0.0

    def f(u: float) -> float:
        return float(_log_i0(np.array([u]))[0]) - c

    hi = c + 0.5 * math.log(2.0 * math.pi * (c + 1.0)) + 2.0  # log I0(u) > u − ½log(2πu) − …
    while f(hi) < 0.0:
        hi *= 2.0
    u = optimize.brentq(f, 0.0, hi, xtol=1e-14, rtol=1e-14)
    return u * n0 / (2.0 * a)


def _fit_parameters(fit: NoncoherentFit) -> tuple[float, float]:
    if fit.amplitude is None or fit.noise_var is None or not fit.amplitude > 0:
        raise ParameterError(
            f"the {fit.method} fit has no amplitude/noise estimate ({fit.message}); decisions need "
            f"a fit with a signal"
        )
    return fit.amplitude, fit.noise_var


def symbol_posteriors(
    z: np.ndarray,
    fit: NoncoherentFit,
    gram: np.ndarray | None = None,
    *,
    modulation: Modulation,
) -> np.ndarray:
    """Posterior probability of each hypothesis per symbol under the fitted model.

    Parameters
    ----------
    z : ndarray, shape (n_symbols, n_branches)
    fit : NoncoherentFit
        Supplies A, N0 and the priors.
    gram : ndarray, shape (n_branches, n_branches) or (n_symbols, n_branches, n_branches)
        One Gram matrix or one per symbol; checked, but unused by the posterior itself
        (R_k⁻¹r_k,i = e_i removes it from every symbol's likelihood), accepted for symmetry.
    modulation : {"2fsk", "4fsk", "ook"}

    Returns
    -------
    ndarray, shape (n_symbols, n_hypotheses)
        Rows sum to 1. OOK columns: (off, on).

    Notes
    -----
    w_kh = softmax_h(log π_h + s_h·[−A²/N0 + log I0(2A·r_kh/N0)]) (docs/estimator.md eq. 3).
    """
    _check_modulation(modulation)
    zz = _check_outputs(z, modulation)
    if modulation != "ook":
        _check_symbol_grams(gram, zz.shape[1], len(zz))
    a, n0 = _fit_parameters(fit)
    pi = _check_priors(fit.priors, modulation)
    log_lam = _log_i0((2.0 * a / n0) * np.abs(zz)) - (a / n0) * a  # log Λ, eq. 3
    if modulation == "ook":
        log_lam = np.concatenate([np.zeros_like(log_lam), log_lam], axis=1)  # off: Λ = 1
    return special.softmax(log_lam + np.log(pi), axis=1)


def decide_symbols(
    z: np.ndarray,
    fit: NoncoherentFit,
    gram: np.ndarray | None = None,
    *,
    modulation: Modulation,
) -> np.ndarray:
    """Hard symbol decisions.

    Parameters
    ----------
    z : ndarray, shape (n_symbols, n_branches)
    fit : NoncoherentFit
        Needed for OOK (threshold) and for non-uniform FSK priors.
    gram : ndarray, shape (n_branches, n_branches) or (n_symbols, n_branches, n_branches)
        One Gram matrix or one per symbol; checked and accepted for symmetry, the
        noncoherent ML decision does not depend on it.
    modulation : {"2fsk", "4fsk", "ook"}

    Returns
    -------
    ndarray of int, shape (n_symbols,)
        FSK: tone index (largest |z_i|; MAP through the posteriors when the priors are not
        uniform). OOK: 1 where |z| exceeds :func:`ook_decision_threshold` of the fit.
    """
    _check_modulation(modulation)
    zz = _check_outputs(z, modulation)
    if modulation == "ook":
        a, n0 = _fit_parameters(fit)
        p_on = fit.priors[1] if len(fit.priors) == 2 else 0.5
        thr = ook_decision_threshold(a, n0, p_on)
        return (np.abs(zz[:, 0]) > thr).astype(np.intp)
    _check_symbol_grams(gram, zz.shape[1], len(zz))
    pri = np.asarray(fit.priors, dtype=float)
    if pri.shape == (zz.shape[1],) and np.ptp(pri) > 1e-12:
        return np.argmax(symbol_posteriors(zz, fit, gram, modulation=modulation), axis=1)
    return np.argmax(np.abs(zz), axis=1).astype(np.intp)
