"""Error-probability theory of noncoherent FSK and OOK receivers.

Closed forms and numerically safe evaluations of the laws a noncoherent (square-law / envelope)
receiver obeys in additive white Gaussian noise: the Marcum Q function, log I0, symbol and bit
error probabilities of orthogonal and non-orthogonal noncoherent FSK, the envelope-detected OOK
error rate with its optimum threshold, the Eb/N0 a link needs for a target BER, and the margin.

Every Eb/N0 argument is a LINEAR power ratio unless its name ends in ``_db``. Functions accept
scalars or arrays (broadcast) and return a Python ``float`` for scalar input, a float64 array
otherwise. Extreme Eb/N0 (40 dB and beyond) underflows to tiny numbers or exactly 0, never NaN.

This module is a pure array core: no I/O, nothing runs at import time.

References
----------
.. [1] J. G. Proakis and M. Salehi, *Digital Communications*, 5th ed., McGraw-Hill, 2008,
       §4.5 (noncoherent detection; M-FSK error probability §4.5-3, non-orthogonal signals
       §4.5-4). [section numbers from memory]
.. [2] S. Stein, "Unified analysis of certain coherent and noncoherent binary communications
       systems", IEEE Trans. Inf. Theory IT-10(1):43-51, 1964.
.. [3] A. Annamalai and V. K. Bhargava, IEEE Trans. Commun. 47(9):1293, 1999 (noncoherent OOK,
       optimum envelope threshold and its approximation).
.. [4] J. I. Marcum, "A statistical theory of target detection by pulsed radar", IRE Trans.
       Inf. Theory IT-6(2):59-267, 1960 (the Q function; computed here through the
       noncentral chi-square survival function). [details from memory]
"""

from __future__ import annotations

from functools import lru_cache
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import optimize, special

from iqstat.errors import ParameterError

__all__ = [
    "Modulation",
    "MODULATIONS",
    "marcum_q",
    "log_i0",
    "ser_ncfsk",
    "ber_ncfsk",
    "ber_ncbfsk_nonorthogonal",
    "ber_ncfsk_union_bound",
    "ook_threshold",
    "ber_ook",
    "tone_correlation",
    "tone_correlation_matrix",
    "predicted_ber",
    "required_ebn0_db",
    "margin_db",
    "mean_ber_over_bursts",
]

Modulation = Literal["2fsk", "4fsk", "ook"]
MODULATIONS: tuple[str, ...] = ("2fsk", "4fsk", "ook")

#: Largest M for which the alternating SER sum is used by ``method="auto"`` (METHODS §1:
#: the float64 sum loses accuracy beyond this through cancellation).
ALTERNATING_SUM_MAX_M = 32
#: Largest M accepted by :func:`ser_ncfsk`.
MAX_M = 1024
#: |rho| at or below this is treated as orthogonal tones by :func:`predicted_ber`.
ORTHOGONAL_RHO_ABS = 1e-6
#: Largest linear Eb/N0 accepted (1000 dB; every error probability is exactly 0 long before).
MAX_EBN0 = 1e100
#: Floor used when taking log BER for root finding (BER below it is treated as equal to it).
_LOG_BER_FLOOR = 1e-300
#: Bracket of :func:`required_ebn0_db`, dB.
REQUIRED_EBN0_BRACKET_DB = (-10.0, 40.0)

# Composite Gauss-Legendre rule for the M-FSK SER integral (nodes on [0, 1]).
_GL_NODES, _GL_WEIGHTS = np.polynomial.legendre.leggauss(16)
_GL_NODES = 0.5 * (_GL_NODES + 1.0)
_GL_WEIGHTS = 0.5 * _GL_WEIGHTS
_GL_PANEL_WIDTH = 0.5  # in units of the per-dimension noise standard deviation


# --------------------------------------------------------------------------------------------
# input handling
# --------------------------------------------------------------------------------------------


def _as_array(x: ArrayLike, name: str) -> np.ndarray:
    """float64 array of ``x``; raise ParameterError for non-numeric or non-finite input."""
    try:
        arr = np.asarray(x, dtype=np.float64)
    except (TypeError, ValueError):
        raise ParameterError(
            f"{name}={x!r} is not a number or an array of numbers; pass a real value"
        ) from None
    if not np.isfinite(arr).all():
        bad = float(arr[~np.isfinite(arr)].ravel()[0])
        raise ParameterError(f"{name} contains {bad!r}; every value must be a finite real number")
    return arr


def _as_nonneg(x: ArrayLike, name: str, hint: str = "") -> np.ndarray:
    arr = _as_array(x, name)
    if (arr < 0).any():
        bad = float(arr[arr < 0].ravel()[0])
        raise ParameterError(f"{name}={bad!r} is negative; it must be >= 0{hint}")
    return arr


_EBN0_HINT = " (a linear power ratio; convert dB with iqstat.units.undb)"


def _as_ebn0(ebn0: ArrayLike, name: str = "ebn0") -> np.ndarray:
    arr = _as_nonneg(ebn0, name, _EBN0_HINT)
    if (arr > MAX_EBN0).any():
        bad = float(arr[arr > MAX_EBN0].ravel()[0])
        raise ParameterError(
            f"{name}={bad!r} exceeds {MAX_EBN0:g} (1000 dB); Eb/N0 here is a linear power ratio"
            " (convert dB with iqstat.units.undb)"
        )
    return arr


def _as_rho_abs(rho_abs: ArrayLike, name: str = "rho_abs") -> np.ndarray:
    arr = _as_nonneg(rho_abs, name, " (the magnitude of a correlation coefficient)")
    if (arr > 1.0).any():
        bad = float(arr[arr > 1.0].ravel()[0])
        raise ParameterError(
            f"{name}={bad!r} exceeds 1; a correlation magnitude lies in [0, 1] "
            "(use abs(tone_correlation(...)))"
        )
    return arr


def _check_m(m: int, name: str = "m") -> int:
    if isinstance(m, bool) or not isinstance(m, (int, np.integer)):
        raise ParameterError(
            f"{name}={m!r} is not an integer; give the alphabet size M, e.g. 2 or 4"
        )
    m = int(m)
    if m < 2 or m > MAX_M or (m & (m - 1)) != 0:
        raise ParameterError(
            f"{name}={m} is not a power of two between 2 and {MAX_M}; "
            "M-FSK here carries log2(M) bits per symbol"
        )
    return m


def _check_modulation(modulation: str) -> str:
    if modulation not in MODULATIONS:
        raise ParameterError(
            f"modulation={modulation!r} is not supported; choose one of {', '.join(MODULATIONS)}"
        )
    return modulation


def _finish(result: np.ndarray, *inputs: np.ndarray):
    """Return a float when every input was a scalar, else the float64 array."""
    if all(np.ndim(i) == 0 for i in inputs):
        return float(result)
    return np.asarray(result, dtype=np.float64)


# --------------------------------------------------------------------------------------------
# special functions
# --------------------------------------------------------------------------------------------


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


# --------------------------------------------------------------------------------------------
# noncoherent FSK
# --------------------------------------------------------------------------------------------


def _ser_ncfsk_sum(esn0: np.ndarray, m: int) -> np.ndarray:
    """Alternating-sum SER of noncoherent orthogonal M-FSK (accurate for M <= 32)."""
    n = np.arange(1, m, dtype=np.float64)
    coef = (-1.0) ** (n + 1) * special.comb(m - 1, n, exact=False) / (n + 1.0)
    expo = -np.multiply.outer(esn0, n / (n + 1.0))
    return np.clip(np.sum(coef * np.exp(expo), axis=-1), 0.0, 1.0 - 1.0 / m)


def _log_ser_integrand(x: np.ndarray, a: np.ndarray, m: int) -> np.ndarray:
    """Log of the integrand of eq. (1) of :func:`_ser_ncfsk_integral`, finite wherever it is > 0.

    log of the miss term 1 − (1 − u)^{M−1}, u = e^{−x²/2}, is formed from
    y = −(M−1)·log1p(−u) without ever computing a subnormal u: for u < 1e-8,
    log(−log1p(−u)) = −x²/2 + u/2 + O(u²); and log(−expm1(−y)) = log y − y/2 + O(y²) for small y.
    """
    half_x2 = 0.5 * x**2
    with np.errstate(divide="ignore", under="ignore"):
        u = np.exp(-np.minimum(half_x2, 700.0))
        log_y = np.log(m - 1.0) + np.where(
            u >= 1e-8, np.log(-np.log1p(-np.minimum(u, 1.0 - 1e-16))), -half_x2 + 0.5 * u
        )
        y = np.exp(np.minimum(log_y, 700.0))
        log_miss = np.where(y > 1e-8, np.log(-np.expm1(-y)), log_y - 0.5 * y)
        log_pdf = np.log(x) - 0.5 * (x - a) ** 2 + np.log(special.i0e(a * x))
    return log_miss + log_pdf


def _ser_ncfsk_integral(esn0: np.ndarray, m: int) -> np.ndarray:
    """SER of noncoherent orthogonal M-FSK by composite Gauss-Legendre quadrature.

    With envelopes normalised to a per-dimension noise std of 1, the matched envelope x is
    Rician with a = sqrt(2·Es/N0), the M−1 others Rayleigh; an error occurs when any of them
    exceeds x::

        P_s = ∫_0^∞ [1 − (1 − e^{−x²/2})^{M−1}] · x·e^{−(x−a)²/2}·i0e(a·x) dx          (1)

    (the Rician pdf x·e^{−(x²+a²)/2}·I0(ax) written with i0e to avoid overflow). The integrand
    is evaluated in the log domain. A 1025-point scan of [0, a + 12] locates where the log
    integrand is within 46 nats (e^{−46} ≈ 1e-20) of its peak; that interval, widened by one
    scan step each side, is integrated with 16-point Gauss-Legendre panels no wider than
    0.5, relative to the peak value, which is multiplied back at the end (so P_s underflows to
    0 only when it is itself below the float64 range). The loop runs over blocks of Eb/N0
    values, not over samples or symbols.
    """
    flat = esn0.ravel()
    out = np.zeros_like(flat)
    # P_s <= (M−1)/2·e^{−γ_s/2} (union bound): below the float64 range once γ_s/2 > 746 + log M
    live = np.flatnonzero(flat < 2.0 * (746.0 + np.log(m)))
    a_all = np.sqrt(2.0 * flat[live])
    block = 64
    n_scan = 1025
    for start in range(0, live.size, block):
        a = a_all[start : start + block, None]
        n_b = a.shape[0]
        hi = a + 12.0
        scan = np.linspace(0.0, 1.0, n_scan)[None, :] * hi
        log_scan = _log_ser_integrand(scan, a, m)
        peak = np.max(log_scan, axis=1, keepdims=True)
        keep = log_scan >= peak - 46.0
        first = np.argmax(keep, axis=1)
        last = n_scan - 1 - np.argmax(keep[:, ::-1], axis=1)
        rows = np.arange(n_b)
        lo_x = scan[rows, np.maximum(first - 1, 0)][:, None]
        hi_x = scan[rows, np.minimum(last + 1, n_scan - 1)][:, None]
        n_panels = max(1, int(np.ceil(np.max(hi_x - lo_x) / _GL_PANEL_WIDTH)))
        width = (hi_x - lo_x) / n_panels  # (B, 1), <= _GL_PANEL_WIDTH
        left = lo_x[:, :, None] + np.arange(n_panels)[None, :, None] * width[:, :, None]
        x = (left + _GL_NODES[None, None, :] * width[:, :, None]).reshape(n_b, -1)
        w = (np.broadcast_to(_GL_WEIGHTS, (n_b, n_panels, 16)) * width[:, :, None]).reshape(n_b, -1)
        with np.errstate(under="ignore", over="ignore", invalid="ignore"):
            rel = np.sum(w * np.exp(_log_ser_integrand(x, a, m) - peak), axis=1)
            val = rel * np.exp(peak[:, 0])  # eq. (1)
        out[live[start : start + block]] = np.where(np.isfinite(peak[:, 0]), val, 0.0)
    return np.clip(out, 0.0, 1.0 - 1.0 / m).reshape(esn0.shape)


def ser_ncfsk(ebn0: ArrayLike, m: int, method: Literal["auto", "sum", "integral"] = "auto"):
    """Symbol error probability of noncoherent orthogonal M-FSK in AWGN.

    Parameters
    ----------
    ebn0 : float or array_like
        Eb/N0, linear, >= 0.
    m : int
        Number of tones M, a power of two (2 ... 1024).
    method : {"auto", "sum", "integral"}
        "sum": the closed-form alternating sum (1); "integral": the quadrature (2);
        "auto": the sum for M <= 32, the quadrature above.

    Returns
    -------
    float or ndarray
        P_s, in [0, 1 − 1/M].

    Notes
    -----
    With γ_s = log2(M)·Eb/N0 and a square-law receiver choosing the largest of M correlator
    energies (Proakis & Salehi 5th ed. §4.5-3 [1]_ [from memory])::

        P_s = Σ_{n=1}^{M−1} (−1)^{n+1} C(M−1, n)/(n+1) · exp(−n·γ_s/(n+1))           (1)

        P_s = ∫_0^∞ [1 − (1 − e^{−x²/2})^{M−1}] · Rice(x; a = √(2γ_s), σ = 1) dx     (2)

    The alternating sum (1) cancels in float64 for large M at low Eb/N0 (METHODS §1: M = 64 at
    4 dB is 0.66 % off), hence the quadrature above M = 32. The quadrature (2) is a 16-point
    Gauss-Legendre rule on panels no wider than 0.5 noise std; it matches (1) to ~1e-12
    relative where (1) is accurate.
    """
    m = _check_m(m)
    gb = _as_ebn0(ebn0)
    gs = np.log2(m) * gb
    if method == "auto":
        method = "sum" if m <= ALTERNATING_SUM_MAX_M else "integral"
    if method == "sum":
        out = _ser_ncfsk_sum(gs, m)
    elif method == "integral":
        out = _ser_ncfsk_integral(gs, m)
    else:
        raise ParameterError(
            f"method={method!r} is not supported; choose one of auto, sum, integral"
        )
    return _finish(out, gb)


def ber_ncfsk(ebn0: ArrayLike, m: int, method: Literal["auto", "sum", "integral"] = "auto"):
    """Bit error probability of noncoherent orthogonal M-FSK in AWGN.

    Parameters
    ----------
    ebn0 : float or array_like
        Eb/N0, linear, >= 0.
    m : int
        Number of tones M, a power of two.
    method : {"auto", "sum", "integral"}
        Passed to :func:`ser_ncfsk`.

    Returns
    -------
    float or ndarray
        P_b.

    Notes
    -----
    For orthogonal signals every wrong symbol is equally likely given an error, so whatever the
    bit-to-tone map (iqstat's 4fsk uses a Gray map on tones, which matters only for
    non-orthogonal tones) [1]_ [from memory]::

        P_b = 2^{k−1} / (2^k − 1) · P_s,    k = log2 M                                  (1)

    For M = 2 this is exactly ½·exp(−Eb/(2N0)), which is returned in closed form.
    """
    m = _check_m(m)
    gb = _as_ebn0(ebn0)
    if m == 2:
        return _finish(0.5 * np.exp(-0.5 * gb), gb)
    k = int(np.log2(m))
    ps = np.asarray(ser_ncfsk(gb, m, method=method), dtype=np.float64)
    return _finish(2.0 ** (k - 1) / (2.0**k - 1.0) * ps, gb)  # eq. (1)


def _pairwise_error_nc(esn0: np.ndarray, rho_abs: np.ndarray) -> np.ndarray:
    """Probability that a square-law receiver prefers the wrong one of two equal-energy signals.

    Stein's result [2]_, rewritten with Q1(a,b) + Q1(b,a) = 1 + e^{−(a²+b²)/2}·I0(ab) as a sum of
    two non-negative terms (no cancellation)::

        P = Q1(a, b) − ½·e^{−(a²+b²)/2}·I0(ab) = ½·[Q1(a, b) + 1 − Q1(b, a)]            (1)

    a, b = sqrt(γ_s/2 · (1 ∓ sqrt(1 − |ρ|²))).
    """
    g, r = np.broadcast_arrays(esn0, rho_abs)
    root = np.sqrt(np.clip(1.0 - r**2, 0.0, 1.0))
    # 1 − sqrt(1 − r²) written as r²/(1 + sqrt(1 − r²)) to keep digits for small r
    a = np.sqrt(0.5 * g * r**2 / (1.0 + root))
    b = np.sqrt(0.5 * g * (1.0 + root))
    # Q1(a, b) and 1 − Q1(b, a) of every element in one vectorised quadrature call
    n = a.size
    q, qc = _marcum_q1_pair(
        np.concatenate([a.ravel(), b.ravel()]), np.concatenate([b.ravel(), a.ravel()])
    )
    return (0.5 * (q[:n] + qc[n:])).reshape(a.shape)  # eq. (1)


def ber_ncbfsk_nonorthogonal(ebn0: ArrayLike, rho_abs: ArrayLike):
    """Bit error probability of noncoherent binary FSK with correlated (non-orthogonal) tones.

    Parameters
    ----------
    ebn0 : float or array_like
        Eb/N0, linear, >= 0.
    rho_abs : float or array_like
        |ρ|, magnitude of the complex correlation of the two unit-energy tone templates over one
        symbol, in [0, 1] (see :func:`tone_correlation`). Broadcast against ``ebn0``.

    Returns
    -------
    float or ndarray
        P_b; ½·exp(−γ_b/2) at |ρ| = 0, ½ at |ρ| = 1.

    Notes
    -----
    Stein 1964 [2]_ (also Proakis & Salehi 5th ed. §4.5-4 [1]_ [from memory])::

        P_b = Q1(a, b) − ½·exp(−(a² + b²)/2)·I0(a·b)                                  (1)
        a = sqrt(γ_b/2·(1 − sqrt(1 − |ρ|²))),  b = sqrt(γ_b/2·(1 + sqrt(1 − |ρ|²)))

    evaluated in the equivalent cancellation-free form ½·[Q1(a, b) + 1 − Q1(b, a)], both terms
    through the noncentral chi-square law.
    """
    gb = _as_ebn0(ebn0)
    r = _as_rho_abs(rho_abs)
    return _finish(_pairwise_error_nc(gb, r), gb, r)


def ber_ncfsk_union_bound(
    ebn0: ArrayLike, rho_abs_matrix: ArrayLike, tone_bits: ArrayLike | None = None
):
    """Union upper bound on the bit error probability of noncoherent M-FSK with any tone set.

    Parameters
    ----------
    ebn0 : float or array_like
        Eb/N0, linear, >= 0.
    rho_abs_matrix : array_like, shape (M, M)
        |ρ_ij| of the unit-energy tone templates over one symbol (symmetric, any diagonal), e.g.
        ``abs(tone_correlation_matrix(M, tone_spacing_hz, symbol_time_s))``. M a power of two.
    tone_bits : array_like of int, shape (M,), optional
        Integer bit label of each tone, tone 0 the lowest. Default: the binary-reflected Gray
        code i ^ (i >> 1) (for 4fsk: 00, 01, 11, 10, the project's convention).

    Returns
    -------
    float or ndarray
        Upper bound on P_b, capped at ½.

    Notes
    -----
    A symbol error to tone j requires branch j's energy to exceed that of the sent branch i,
    an event whose probability is the two-signal noncoherent error probability of Stein [2]_
    with Es in place of Eb, P2(γ_s, |ρ_ij|) (see :func:`ber_ncbfsk_nonorthogonal`). The union
    bound over wrong tones, weighted by the Hamming distance d_ij of their labels [1]_::

        P_b <= 1/(M·k) · Σ_i Σ_{j≠i} d_ij · P2(k·γ_b, |ρ_ij|)                          (1)

    For orthogonal tones it equals 2^{k−2}·exp(−k·γ_b/2), the leading term of the exact
    result, so it is tight at high Eb/N0 and loose (pessimistic) at low Eb/N0.
    """
    gb = _as_ebn0(ebn0)
    r = _as_rho_abs(rho_abs_matrix, "rho_abs_matrix")
    if r.ndim != 2 or r.shape[0] != r.shape[1]:
        raise ParameterError(
            f"rho_abs_matrix has shape {r.shape}; it must be square (M, M), one row per tone"
        )
    m = _check_m(r.shape[0], "rho_abs_matrix size M")
    if not np.allclose(r, r.T, rtol=0, atol=1e-12):
        raise ParameterError("rho_abs_matrix is not symmetric; |ρ_ij| must equal |ρ_ji|")
    if tone_bits is None:
        labels = np.arange(m) ^ (np.arange(m) >> 1)
    else:
        labels = np.asarray(tone_bits)
        if (
            labels.shape != (m,)
            or not np.issubdtype(labels.dtype, np.integer)
            or sorted(labels.tolist()) != list(range(m))
        ):
            raise ParameterError(
                f"tone_bits={tone_bits!r} is not a permutation of 0..{m - 1}; give one integer "
                "bit label per tone, lowest tone first"
            )
    return _finish(_union_bound(gb, r, labels), gb)


def _pair_weights(labels: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(i, j, weight) of every unordered tone pair i < j in eq. (1) of the union bound."""
    m = labels.size
    k = int(np.log2(m))
    xor = labels[:, None] ^ labels[None, :]
    dist = np.array([[bin(int(v)).count("1") for v in row] for row in xor], dtype=np.float64)
    iu, ju = np.triu_indices(m, 1)
    weights = (dist[iu, ju] * 2.0) / (m * k)  # each unordered pair counted for i→j and j→i
    return iu, ju, weights


def _union_bound(gb: np.ndarray, r: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """Union bound (1) of :func:`ber_ncfsk_union_bound` for validated inputs.

    ``r`` has shape (..., M, M), its leading axes broadcast against ``gb`` (one matrix for
    all values, or one per value).
    """
    m = labels.size
    k = int(np.log2(m))
    iu, ju, weights = _pair_weights(labels)
    p2 = _pairwise_error_nc(k * gb[..., None], r[..., iu, ju])  # (..., n_pairs)
    bound = np.sum(weights * p2, axis=-1)  # eq. (1)
    return np.minimum(bound, 0.5)


# --------------------------------------------------------------------------------------------
# OOK
# --------------------------------------------------------------------------------------------


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


# --------------------------------------------------------------------------------------------
# tone correlation
# --------------------------------------------------------------------------------------------


def tone_correlation(delta_f_hz: ArrayLike, symbol_time_s: float):
    """Complex correlation of two unit-energy rectangular tones over one symbol.

    Parameters
    ----------
    delta_f_hz : float or array_like
        Frequency difference f_i − f_j, Hz.
    symbol_time_s : float
        Symbol duration T, s, > 0.

    Returns
    -------
    complex or ndarray of complex128
        ρ_ij = (1/T)·∫_0^T e^{j2πf_i t}·e^{−j2πf_j t} dt.

    Notes
    -----
    Direct integration::

        ρ = e^{jπΔfT} · sinc(ΔfT),    sinc(x) = sin(πx)/(πx)                          (1)

    so |ρ| = |sinc(h)| for tone spacing h·Rs: 0 for integer h, 2/π for h = ½ (METHODS §1).
    """
    df = _as_array(delta_f_hz, "delta_f_hz")
    t = _as_array(symbol_time_s, "symbol_time_s")
    if t.ndim != 0 or t <= 0:
        raise ParameterError(
            f"symbol_time_s={symbol_time_s!r} must be one positive duration in seconds (1/Rs)"
        )
    x = df * float(t)
    rho = np.exp(1j * np.pi * x) * np.sinc(x)  # eq. (1)
    return complex(rho) if np.ndim(rho) == 0 else rho


def tone_correlation_matrix(m: int, tone_spacing_hz: float, symbol_time_s: float) -> np.ndarray:
    """Correlations ρ_ij of M equally spaced unit-energy rectangular tones.

    Parameters
    ----------
    m : int
        Number of tones (>= 2).
    tone_spacing_hz : float
        Spacing between adjacent tones, Hz, > 0.
    symbol_time_s : float
        Symbol duration T, s, > 0.

    Returns
    -------
    ndarray of complex128, shape (M, M)
        ρ_ij = tone_correlation((i − j)·tone_spacing_hz, symbol_time_s), tone 0 the lowest.
    """
    if isinstance(m, bool) or not isinstance(m, (int, np.integer)) or m < 2:
        raise ParameterError(f"m={m!r} is not an integer >= 2; give the number of tones")
    spacing = _as_array(tone_spacing_hz, "tone_spacing_hz")
    if spacing.ndim != 0 or spacing <= 0:
        raise ParameterError(
            f"tone_spacing_hz={tone_spacing_hz!r} must be one positive value in Hz"
        )
    idx = np.arange(int(m))
    diff = (idx[:, None] - idx[None, :]) * float(spacing)
    return np.asarray(tone_correlation(diff, symbol_time_s))


# --------------------------------------------------------------------------------------------
# link-level figures
# --------------------------------------------------------------------------------------------


def predicted_ber(ebn0: ArrayLike, modulation: Modulation, rho_abs: float | ArrayLike = 0.0):
    """Theoretical BER of iqstat's noncoherent receiver for one modulation.

    Parameters
    ----------
    ebn0 : float or array_like
        Eb/N0, linear, >= 0 (for OOK the average-energy Eb). An array holds, e.g., one value per
        burst; the result has its shape.
    modulation : {"2fsk", "4fsk", "ook"}
        The link's modulation.
    rho_abs : float, array_like, or array_like of shape (..., 4, 4)
        Largest magnitude of the correlation between two tone templates over one symbol, in
        [0, 1] (``abs(tone_correlation(spacing, T))`` for the adjacent pair). FSK only; must be
        0 for OOK. One number for every Eb/N0 value, or an array that broadcasts to the shape
        of ``ebn0`` (one |ρ| per burst). For 4fsk an array whose last two axes are (4, 4) is
        a matrix of |ρ_ij| (e.g. ``abs(tone_correlation_matrix(4, spacing, T))``), which gives
        a tighter bound; a stack of them, shape (n, 4, 4) against ``ebn0`` of shape (n,),
        gives one matrix per burst.

    Returns
    -------
    float or ndarray
        P_b: a float when ``ebn0`` is a scalar and ``rho_abs`` one number or one matrix, else
        an array of the shape of ``ebn0``.

    Notes
    -----
    What is computed, exactly, per element:

    - ``2fsk``, rho_abs <= 1e-6: ½·exp(−γ_b/2) (:func:`ber_ncfsk`, exact).
    - ``2fsk``, rho_abs > 1e-6: Stein's formula (:func:`ber_ncbfsk_nonorthogonal`, exact).
    - ``4fsk``, rho_abs <= 1e-6: the orthogonal 4-FSK result (:func:`ber_ncfsk`, exact).
    - ``4fsk``, rho_abs > 1e-6: the union UPPER BOUND of :func:`ber_ncfsk_union_bound` (Gray
      labels, capped at ½) with every tone pair given correlation rho_abs, or with the given
      (4, 4) matrix. The bound is tight at high Eb/N0 and pessimistic at low Eb/N0; a scalar
      rho_abs is pessimistic again when far tones are less correlated than the adjacent pair
      (h = ½: |ρ| = 2/π, 0, 2/(3π) for tones 1, 2, 3 apart), so pass the matrix when the tone
      spacing is known. The value jumps up at rho_abs = 1e-6 by the union-bound slack (large
      below ~6 dB, vanishing at high Eb/N0). A 4fsk matrix whose off-diagonal entries are all
      <= 1e-6 gives the exact orthogonal result.
    - ``ook``: envelope detection with the optimum threshold (:func:`ber_ook`, exact).

    A batch is evaluated with one vectorised Marcum-Q quadrature for all its non-orthogonal
    elements (no loop over elements), so the per-burst call and the batched call agree.
    """
    modulation = _check_modulation(modulation)
    r_arr = _as_rho_abs(rho_abs)
    gb = _as_ebn0(ebn0)
    matrix = modulation == "4fsk" and r_arr.ndim >= 2 and r_arr.shape[-2:] == (4, 4)
    lead = r_arr.shape[:-2] if matrix else r_arr.shape
    try:
        fits = np.broadcast_shapes(lead, gb.shape) == gb.shape
    except ValueError:
        fits = False
    if not fits:
        raise ParameterError(
            f"rho_abs has shape {r_arr.shape} for {modulation} but ebn0 has shape {gb.shape}; "
            "give one number in [0, 1] or one per Eb/N0 value (a (4, 4) matrix, or a stack "
            "of them, is accepted for 4fsk only)"
        )
    if modulation == "2fsk":
        r = np.broadcast_to(r_arr, gb.shape)
        out = np.array(0.5 * np.exp(-0.5 * gb), dtype=np.float64)  # ber_ncfsk for M = 2
        leaky = r > ORTHOGONAL_RHO_ABS
        if leaky.any():
            out[leaky] = _pairwise_error_nc(gb[leaky], r[leaky])  # Stein's formula
        return _finish(out, gb, np.empty(lead))
    if modulation == "4fsk":
        eye = np.eye(4, dtype=bool)
        if matrix:
            if not np.allclose(r_arr, np.swapaxes(r_arr, -1, -2), rtol=0, atol=1e-12):
                raise ParameterError("rho_abs_matrix is not symmetric; |ρ_ij| must equal |ρ_ji|")
            leaky = np.any(r_arr[..., ~eye] > ORTHOGONAL_RHO_ABS, axis=-1)
            mats = r_arr
        else:
            leaky = r_arr > ORTHOGONAL_RHO_ABS
            mats = np.where(eye, 1.0, r_arr[..., None, None])
        leaky = np.broadcast_to(leaky, gb.shape)
        out = np.array(ber_ncfsk(gb, 4), dtype=np.float64)
        if leaky.any():
            mats = np.broadcast_to(mats, gb.shape + (4, 4))
            out[leaky] = _union_bound(gb[leaky], mats[leaky], _GRAY_4)
        return _finish(out, gb, np.empty(lead))
    if modulation == "ook":
        if (r_arr != 0.0).any():
            raise ParameterError(
                f"rho_abs={rho_abs!r} given for ook; tone correlation applies to FSK only, pass 0"
            )
        return _finish(np.asarray(ber_ook(gb), dtype=np.float64), gb, np.empty(lead))
    raise ParameterError(  # unreachable after _check_modulation; kept as the dispatch's end
        f"modulation={modulation!r} is not supported; choose one of {', '.join(MODULATIONS)}"
    )


#: Gray labels of the four 4fsk tones, lowest first (00, 01, 11, 10).
_GRAY_4 = np.array([0, 1, 3, 2])


def required_ebn0_db(
    target_ber: float, modulation: Modulation, rho_abs: float | ArrayLike = 0.0
) -> float:
    """Eb/N0 (dB) at which :func:`predicted_ber` equals a target BER.

    Parameters
    ----------
    target_ber : float
        Target bit error probability, in (0, 0.5).
    modulation : {"2fsk", "4fsk", "ook"}
        The link's modulation.
    rho_abs : float or array_like of shape (4, 4)
        Tone correlation magnitude, as in :func:`predicted_ber`.

    Returns
    -------
    float
        Required Eb/N0 in dB.

    Notes
    -----
    Brent's method on log(BER(10^(x/10))) − log(target) over x in [−10, 40] dB (BER floored at
    1e-300 so the logarithm stays finite), to 1e-10 dB.
    """
    try:
        target = float(target_ber)
    except (TypeError, ValueError):
        raise ParameterError(f"target_ber={target_ber!r} is not a number; give e.g. 1e-3") from None
    if not (0.0 < target < 0.5) or not np.isfinite(target):
        raise ParameterError(
            f"target_ber={target_ber!r} is outside (0, 0.5); give a probability such as 1e-3"
        )
    if target < _LOG_BER_FLOOR:
        raise ParameterError(
            f"target_ber={target_ber!r} is below {_LOG_BER_FLOOR:g}; such a BER cannot be resolved"
        )
    _check_modulation(modulation)
    log_target = np.log(target)

    def f(x_db: float) -> float:
        ber = float(predicted_ber(10.0 ** (x_db / 10.0), modulation, rho_abs))
        return float(np.log(max(ber, _LOG_BER_FLOOR))) - log_target

    lo, hi = REQUIRED_EBN0_BRACKET_DB
    f_lo, f_hi = f(lo), f(hi)
    if f_lo <= 0.0:
        raise ParameterError(
            f"target_ber={target_ber!r} is already met at {lo:g} dB for {modulation} "
            f"(BER {np.exp(f_lo + log_target):.3g}); give a smaller target"
        )
    if f_hi >= 0.0:
        raise ParameterError(
            f"target_ber={target_ber!r} is not reached below {hi:g} dB for {modulation} with "
            f"rho_abs={rho_abs!r}; give a larger target or less correlated tones"
        )
    return float(optimize.brentq(f, lo, hi, xtol=1e-10, rtol=4 * np.finfo(float).eps))


def margin_db(measured_ebn0_db: float | None, required_ebn0_db: float | None) -> float | None:
    """Link margin in dB: measured minus required Eb/N0; None if either is None.

    Parameters
    ----------
    measured_ebn0_db : float or None
        Measured Eb/N0, dB.
    required_ebn0_db : float or None
        Required Eb/N0, dB (from :func:`required_ebn0_db`).

    Returns
    -------
    float or None
        measured − required (positive: the link has margin).
    """
    if measured_ebn0_db is None or required_ebn0_db is None:
        return None
    return float(measured_ebn0_db) - float(required_ebn0_db)


def mean_ber_over_bursts(
    ebn0_per_burst: ArrayLike,
    weights: ArrayLike | None,
    modulation: Modulation,
    rho_abs: float | ArrayLike = 0.0,
) -> float:
    """A capture's predicted BER: the weighted mean of the per-burst predicted BERs.

    Parameters
    ----------
    ebn0_per_burst : array_like, shape (n_bursts,)
        Eb/N0 of each burst, linear, >= 0.
    weights : array_like, shape (n_bursts,), or None
        Non-negative weight per burst, normally its number of bits or symbols; None = equal.
    modulation : {"2fsk", "4fsk", "ook"}
        The link's modulation.
    rho_abs : float, array_like of shape (n_bursts,), (4, 4) or (n_bursts, 4, 4)
        Tone correlation magnitude, as in :func:`predicted_ber`: one for the capture, or one
        per burst.

    Returns
    -------
    float
        Σ w_i·BER(γ_i) / Σ w_i.

    Notes
    -----
    BER is convex in Eb/N0, so the BER at the mean Eb/N0 underestimates the error rate of a
    capture whose bursts differ in level (Jensen's inequality); the bit-weighted mean of the
    per-burst BERs is the expected fraction of bits in error.
    """
    g = _as_ebn0(ebn0_per_burst, "ebn0_per_burst")
    if g.ndim != 1 or g.size == 0:
        raise ParameterError(
            f"ebn0_per_burst has shape {g.shape}; give a non-empty 1-D array, one value per burst"
        )
    if weights is None:
        w = np.ones_like(g)
    else:
        w = _as_nonneg(weights, "weights", " (bits or symbols per burst)")
        if w.shape != g.shape:
            raise ParameterError(
                f"weights has shape {w.shape} but ebn0_per_burst has {g.shape}; give one weight "
                "per burst"
            )
        if not np.sum(w) > 0:
            raise ParameterError("weights sum to 0; at least one burst needs a positive weight")
    ber = np.asarray(predicted_ber(g, modulation, rho_abs), dtype=np.float64)
    return float(np.sum(w * ber) / np.sum(w))
