"""The Marcum Q function (the Rician envelope's tails) and log I0, evaluated without underflow.

Owns :func:`marcum_q` (Q_m(a, b) = ncx2.sf(b², 2m, a²), Q_1 by a Gauss-Legendre quadrature of
the smaller Rician tail, m > 1 by the recurrence Q_m = Q_{m−1} + (b/a)^{m−1}·e^{−(a²+b²)/2}·
I_{m−1}(ab) in the log domain), the private pair ``_marcum_q1_pair`` (Q1 and 1 − Q1, each
computed directly, so neither tail cancels) that the FSK and OOK error probabilities use, and
:func:`log_i0` (log i0e(x) + |x|, the positive power series of I0 − 1 below |x| = 2). Also the
16-point Gauss-Legendre rule on [0, 1] shared with the M-FSK SER quadrature.

References
----------
.. [4] J. I. Marcum, "A statistical theory of target detection by pulsed radar", IRE Trans.
       Inf. Theory IT-6(2):59-267, 1960 (the Q function; computed here through the
       noncentral chi-square survival function). [details from memory]
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from numpy.typing import ArrayLike
from scipy import special

from iqstat.errors import ParameterError
from iqstat.theory.inputs import _as_array, _as_nonneg, _finish

__all__ = ["marcum_q", "log_i0"]

# Composite Gauss-Legendre rule for the Rician tails and the M-FSK SER integral (nodes on [0, 1]).
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(16)
_GL_NODES = 0.5 * (_GL_NODES + 1.0)
_GL_WEIGHTS = 0.5 * _GL_WEIGHTS


def marcum_q(a: ArrayLike, b: ArrayLike, m: int = 1):
    """Generalised Marcum Q function Q_m(a, b).

    Parameters
    ----------
    a : float or array_like
        Non-centrality (the signal amplitude over the per-dimension noise std), 0 <= a <= 1e150.
    b : float or array_like
        Threshold on the envelope, same normalisation, 0 <= b <= 1e150. Broadcast against ``a``.
    m : int
        Order, a positive integer (1 for one complex sample).

    Returns
    -------
    float or ndarray
        Q_m(a, b) = P(R > b) for R the envelope of ``m`` complex dimensions with signal energy a².

    Notes
    -----
    Q_m(a, b) is the survival function of a noncentral chi-square with 2m degrees of freedom and
    non-centrality a², evaluated at b² [4]_ (METHODS §2)::

        Q_m(a, b) = ncx2.sf(b**2, 2*m, a**2)                                        (1)
        Q_1(a, b) = ∫_b^∞ x·exp(−(x² + a²)/2)·I0(a·x) dx                             (2)
        Q_m(a, b) = Q_{m−1}(a, b) + (b/a)^{m−1}·exp(−(a² + b²)/2)·I_{m−1}(a·b)        (3)

    The values are those of (1), but scipy's ncx2 is not used to compute them: it returns 0 for
    lower tails below ~1e-80 (1 − Q1 at a = 30, b = 5 is 1.2e-138), loses digits in the upper
    tails as a grows (4e-11 relative at a = 1000; 1e-6 at Q1(5, 40) = 3.2e-268), raises
    OverflowError for tiny b² with a² > 10 and returns NaN with a RuntimeWarning from
    a ~ 6e4 [checked here against mpmath]. Q_1 is instead the Gauss-Legendre quadrature (2)
    of the smaller tail (``_rice_tails``, <= 4e-14 relative against mpmath down to 1e-300),
    and m > 1 adds the terms of (3), a sum of non-negative terms, evaluated in the log domain.
    a < 1e-10 gives the central law chi2.sf(b², 2m) (Q_1(0, b) = exp(−b²/2)); b = 0 gives 1.
    ``scipy.stats.rice.sf`` is not used either: it is 1 − cdf and underflows in the tail.
    """
    if isinstance(m, bool) or not isinstance(m, (int, np.integer)) or m < 1:
        raise ParameterError(f"m={m!r} is not a positive integer; the Marcum Q order is 1, 2, ...")
    a_arr = _as_nonneg(a, "a")
    b_arr = _as_nonneg(b, "b")
    for name, arr in (("a", a_arr), ("b", b_arr)):
        if (arr > _MAX_MARCUM_ARG).any():
            bad = float(arr[arr > _MAX_MARCUM_ARG].ravel()[0])
            raise ParameterError(f"{name}={bad!r} exceeds {_MAX_MARCUM_ARG:g}; it is out of range")
    q, _ = _marcum_q1_pair(a_arr, b_arr)
    if m > 1:
        a_b, b_b = np.broadcast_arrays(a_arr, b_arr)
        central = (a_b < _TINY_A) & (b_b > 0)
        gen = (a_b >= _TINY_A) & (b_b > 0)
        if central.any():
            q[central] = special.chdtrc(2 * int(m), b_b[central] ** 2)  # chi2.sf(x, 2m)
        if gen.any():
            ab, bb = a_b[gen], b_b[gen]
            x = ab * bb
            scipy_ok = x <= 1e8  # scipy's ive returns NaN for x > ~1e9
            # e^{−x}·I_k(x): scipy where it works, else upward recurrence
            # I_{k+1} = I_{k−1} − (2k/x)·I_k from i0e, i1e (stable for k << x, x > 1e8 here)
            ive_prev, ive_k = special.i0e(x), special.i1e(x)
            with np.errstate(divide="ignore"):
                log_ratio = np.log(bb) - np.log(ab)
            total = q[gen]
            for k in range(1, int(m)):  # over the Marcum order, not over samples
                ive_use = np.where(scipy_ok, special.ive(k, np.minimum(x, 1e8)), ive_k)
                with np.errstate(divide="ignore", under="ignore", over="ignore"):
                    log_term = k * log_ratio - 0.5 * (ab - bb) ** 2 + np.log(ive_use)
                    total = total + np.exp(np.minimum(log_term, 0.0))  # eq. (3), terms <= 1
                with np.errstate(over="ignore", invalid="ignore"):
                    ive_prev, ive_k = ive_k, ive_prev - (2.0 * k / x) * ive_k
            q[gen] = np.clip(total, 0.0, 1.0)
    return _finish(q, a_arr, b_arr)


#: Below this a the central law is used: Q1(a, b) = e^{−b²/2}·(1 + O(a²b²)), and wherever
#: a²b² is not negligible e^{−b²/2} has underflowed.
_TINY_A = 1e-10
#: Largest a, b accepted by marcum_q (a·b must stay finite).
_MAX_MARCUM_ARG = 1e150
#: Span (noise std) and panel count of the Rician-tail quadrature (panels 0.75 wide). Checked
#: against mpmath series values on 20 (a, b) pairs from 1e-3 to 100, tails down to 1e-317:
#: worst relative error 4e-14 (24 panels: 9e-14, 12 panels: 6e-11).
_RICE_SPAN = 12.0
_RICE_PANELS = 16
#: Elements per block in the Rician-tail quadrature (bounds the temporaries to ~10 MB).
_RICE_BLOCK = 1024


@lru_cache(maxsize=1)
def _rice_rule() -> tuple[np.ndarray, np.ndarray]:
    """Nodes (in panel widths from the start) and weights of the Rician-tail rule."""
    offsets = (np.arange(_RICE_PANELS)[:, None] + _GL_NODES[None, :]).ravel()
    return offsets, np.tile(_GL_WEIGHTS, _RICE_PANELS)


def _rice_tails(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(Q1(a, b), 1 − Q1(a, b)) for 1-D arrays a > 0, b > 0, by Gauss-Legendre quadrature.

    The Rician pdf is written in the offset t = x − a so that (x − a)² never cancels::

        pdf(a + t) = (a + t)·e^{−t²/2}·i0e(a·(a + t)),   x = a + t >= 0               (1)

    The tail on the far side of b from the distribution's centre c = sqrt(a² + 2·ln 2) (the
    Rayleigh median at a = 0, ≈ a for large a) is integrated from b over 12 noise std away
    from c (or down to x = 0), where the integrand has fallen by more than e^{−72} relative
    to its value at b, with 16 16-point panels; the other tail is its complement (no
    cancellation, the integrated tail being the smaller one). The loop runs over blocks of
    elements, not over samples.
    """
    q = np.empty(a.shape, dtype=np.float64)
    qc = np.empty(a.shape, dtype=np.float64)
    offsets, weights = _rice_rule()
    for start in range(0, a.size, _RICE_BLOCK):
        sl = slice(start, start + _RICE_BLOCK)
        aa, bb = a[sl], b[sl]
        upper = bb >= np.sqrt(aa**2 + 2.0 * np.log(2.0))
        # the interval in x (accurate near x = 0) and in t = x − a (accurate near x = a)
        x_lo = np.where(upper, bb, np.maximum(bb - _RICE_SPAN, 0.0))
        t_lo = np.where(upper, bb - aa, np.where(bb > _RICE_SPAN, (bb - aa) - _RICE_SPAN, -aa))
        width = (np.where(upper, bb + _RICE_SPAN, bb) - x_lo) / _RICE_PANELS
        step = offsets[None, :] * width[:, None]
        x = x_lo[:, None] + step
        t = t_lo[:, None] + step
        with np.errstate(under="ignore"):
            pdf = x * np.exp(-0.5 * t**2) * special.i0e(aa[:, None] * x)  # eq. (1)
        tail = (pdf @ weights) * width
        q[sl] = np.where(upper, tail, 1.0 - tail)
        qc[sl] = np.where(upper, 1.0 - tail, tail)
    return np.clip(q, 0.0, 1.0), np.clip(qc, 0.0, 1.0)


def _marcum_q1_pair(a: np.ndarray, b: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(Q1(a, b), 1 − Q1(a, b)), each computed directly (no 1 − x cancellation in the tails)."""
    a_b, b_b = np.broadcast_arrays(a, b)
    q = np.ones(a_b.shape, dtype=np.float64)
    qc = np.zeros(a_b.shape, dtype=np.float64)
    central = (a_b < _TINY_A) & (b_b > 0)
    general = (a_b >= _TINY_A) & (b_b > 0)
    if central.any():
        half_b2 = 0.5 * b_b[central] ** 2
        q[central] = np.exp(-half_b2)
        qc[central] = -np.expm1(-half_b2)
    if general.any():
        q[general], qc[general] = _rice_tails(a_b[general], b_b[general])
    return q, qc


def _marcum_q1_complement(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """1 − Q_1(a, b) computed directly (the noncentral chi-square CDF; no cancellation)."""
    return _marcum_q1_pair(a, b)[1]


def log_i0(x: ArrayLike):
    """Natural log of the modified Bessel function I0, without overflow.

    Parameters
    ----------
    x : float or array_like
        Argument (any real; I0 is even).

    Returns
    -------
    float or ndarray
        log I0(x), float64.

    Notes
    -----
    For |x| >= 2, log I0(x) = log(i0e(x)) + |x| (i0e the exponentially scaled Bessel function)
    (METHODS §8). Below that the sum loses relative digits (log i0e(x) ≈ −x), and the power
    series of I0 − 1, all of whose terms are positive, is used (Abramowitz & Stegun 9.6.12
    [from memory])::

        log I0(x) = log1p( Σ_{k=1}^{18} (x²/4)^k / (k!)² )                           (1)

    truncated where (x²/4)^19/(19!)² < 1e-34 for |x| < 2.
    """
    arr = _as_array(x, "x")
    out = _log_i0_array(np.abs(arr).reshape(-1)).reshape(arr.shape)
    return _finish(out, arr)


def _log_i0_array(x: np.ndarray) -> np.ndarray:
    """log I0 of a validated non-negative 1-D array (see :func:`log_i0`; no checks)."""
    out = np.log(special.i0e(x)) + x
    small = x < 2.0
    if small.any():
        s = 0.25 * x[small] ** 2
        term = np.ones_like(s)
        series = np.zeros_like(s)
        with np.errstate(under="ignore"):
            for k in range(1, _I0_SERIES_TERMS + 1):  # over series terms, not samples
                term = term * s / (k * k)
                series = series + term
        out[small] = np.log1p(series)  # eq. (1)
    return out


#: Terms of the I0 − 1 power series used by log_i0 below |x| = 2.
_I0_SERIES_TERMS = 18
