"""Envelope-detected (noncoherent) OOK: the optimum threshold and the bit error probability.

Owns :func:`ook_threshold` (the root b of log I0(a·b) − a²/2 = 0, a² = 4·Eb/N0, where the
Rician 'on' and Rayleigh 'off' envelope densities cross; Newton's method in the log domain
for all values at once) and :func:`ber_ook` (P_b = ½·[exp(−b²/2) + 1 − Q1(a, b)] with equal
priors, 1 − Q1 computed directly).

References
----------
.. [3] A. Annamalai and V. K. Bhargava, IEEE Trans. Commun. 47(9):1293, 1999 (noncoherent OOK,
       optimum envelope threshold and its approximation).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike
from scipy import special

from iqstat.theory.inputs import _as_ebn0, _as_nonneg, _finish
from iqstat.theory.marcum import _log_i0_array, _marcum_q1_complement

__all__ = ["ook_threshold", "ber_ook"]


def _ook_a(gb: np.ndarray) -> np.ndarray:
    """Normalised 'on' amplitude: a² = 4·Eb/N0 (average-energy Eb, σ = 1 per dimension)."""
    return np.sqrt(4.0 * gb)


#: Newton iterations allowed by the OOK threshold solver (it needs 4-6 from the start below).
_THRESHOLD_MAX_ITER = 40


def _solve_thresholds(a: np.ndarray) -> np.ndarray:
    """Roots b of g(b) = log I0(a·b) − a²/2 for a 1-D array of a >= 0, all at once.

    g is increasing and convex in b (d/dx log I0 = I1/I0 is positive and increasing), so
    Newton's method converges from any start: a start left of the root lands right of it
    after one step, and from the right the iterates decrease monotonically to the root.
    The start is the approximation sqrt(2 + a²/4) of [3]_; g'(b) = a·i1e(ab)/i0e(ab). The
    loop runs over iterations (at most 40, ~5 in practice), each over the whole array;
    a < 1e-4 keeps the approximation, whose error O(a⁴) is below 1e-16 there.
    """
    b = np.sqrt(2.0 + a * a / 4.0)
    live = np.flatnonzero(a >= 1e-4)
    for _ in range(_THRESHOLD_MAX_ITER):  # over Newton iterations, not samples
        if live.size == 0:
            break
        aa, bb = a[live], b[live]
        x = aa * bb
        g = _log_i0_array(x) - 0.5 * aa * aa  # eq. (1) of ook_threshold
        slope = aa * special.i1e(x) / special.i0e(x)
        new = np.maximum(bb - g / slope, 0.5 * bb)  # the guard never binds (convexity)
        b[live] = new
        live = live[np.abs(new - bb) > 4.0 * np.finfo(float).eps * new]
    return b


def ook_threshold(ebn0: ArrayLike):
    """Optimum envelope threshold of noncoherent OOK, normalised to σ = 1 per dimension.

    Parameters
    ----------
    ebn0 : float or array_like
        Average Eb/N0 (E_on = 2·Eb), linear, >= 0.

    Returns
    -------
    float or ndarray
        Threshold b on the envelope |z|/sqrt(N0/2); √2 at Eb/N0 = 0 (the limit).

    Notes
    -----
    With a² = 4·γ_b the 'on' envelope is Rician(a, 1) and the 'off' envelope Rayleigh(1); the
    equal-prior minimum-error threshold is where the two densities cross [3]_::

        exp(−a²/2)·I0(a·b) = 1   ⇔   log I0(a·b) − a²/2 = 0                          (1)

    solved by Newton's method in the log domain for all values at once, from the
    approximation sqrt(2 + a²/4) of [3]_, to a relative step of 4 machine epsilons.
    """
    gb = _as_ebn0(ebn0)
    out = _solve_thresholds(_ook_a(gb).ravel()).reshape(gb.shape)  # eq. (1)
    return _finish(out, gb)


def ber_ook(ebn0: ArrayLike, threshold: ArrayLike | None = None):
    """Bit error probability of envelope-detected (noncoherent) OOK.

    Parameters
    ----------
    ebn0 : float or array_like
        Average Eb/N0 (E_on = 2·Eb), linear, >= 0.
    threshold : float or array_like, optional
        Envelope threshold b normalised to σ = 1 per dimension (|z|/sqrt(N0/2)), >= 0.
        Default: the optimum, :func:`ook_threshold`.

    Returns
    -------
    float or ndarray
        P_b with equal priors.

    Notes
    -----
    Annamalai & Bhargava [3]_ (METHODS §1), a² = 4·γ_b::

        P_b = ½·[exp(−b²/2) + 1 − Q1(a, b)]                                            (1)

    1 − Q1(a, b) is evaluated directly as the noncentral chi-square CDF (no cancellation).
    """
    gb = _as_ebn0(ebn0)
    if threshold is None:
        b = np.asarray(ook_threshold(gb), dtype=np.float64)
        b_in = gb
    else:
        b = _as_nonneg(threshold, "threshold", " (normalised to σ = 1 per dimension)")
        b_in = b
    a, b = np.broadcast_arrays(_ook_a(gb), b)
    out = 0.5 * (np.exp(-0.5 * b**2) + _marcum_q1_complement(a, b))  # eq. (1)
    return _finish(out, gb, b_in)
