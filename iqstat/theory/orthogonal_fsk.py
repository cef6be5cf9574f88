"""Symbol and bit error probabilities of noncoherent orthogonal M-FSK in AWGN.

Owns :func:`ser_ncfsk` and :func:`ber_ncfsk`. A square-law receiver choosing the largest of M
correlator energies errs with probability

    P_s = Σ_{n=1}^{M−1} (−1)^{n+1} C(M−1, n)/(n+1) · exp(−n·γ_s/(n+1))

(the alternating sum, used up to M = 32) or, equivalently, the integral of
[1 − (1 − e^{−x²/2})^{M−1}] against the matched branch's Rician envelope density (a
Gauss-Legendre quadrature in the log domain, used above M = 32 where the sum cancels); and
P_b = 2^{k−1}/(2^k − 1)·P_s, k = log2 M, ½·exp(−γ_b/2) for M = 2.

References
----------
.. [1] J. G. Proakis and M. Salehi, *Digital Communications*, 5th ed., McGraw-Hill, 2008,
       §4.5 (noncoherent detection; M-FSK error probability §4.5-3, non-orthogonal signals
       §4.5-4). [section numbers from memory]
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import special

from iqstat.errors import ParameterError
from iqstat.theory.inputs import _as_ebn0, _check_m, _finish
from iqstat.theory.marcum import _GL_NODES, _GL_WEIGHTS

__all__ = ["ser_ncfsk", "ber_ncfsk", "ALTERNATING_SUM_MAX_M"]

#: Largest M for which the alternating SER sum is used by ``method="auto"`` (METHODS §1:
#: the float64 sum loses accuracy beyond this through cancellation).
ALTERNATING_SUM_MAX_M = 32
_GL_PANEL_WIDTH = 0.5  # in units of the per-dimension noise standard deviation


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
