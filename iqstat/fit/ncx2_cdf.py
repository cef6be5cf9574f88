"""CDF of the (non)central chi-square law with 2 degrees of freedom, F(y; 2, λ).

A branch energy over N0/2 follows this law given the hypothesis sent (λ = 0: central, i.e.
exponential). Three regimes, chosen per noncentrality:

* λ < 1e-4: two terms of the Poisson mixture of central laws (Johnson, Kotz & Balakrishnan,
  Continuous Univariate Distributions vol. 2, 2nd ed., §29.4 [mem]);
* λ in [4, 576]: an interpolation table over (u = 1/√λ, t = √y − √λ), built on first use (not
  at import) from the Rice distribution function 1 − Q1(√λ, √y) by Gauss–Legendre quadrature
  (A&S 25.4.29), absolute error below 1e-11;
* otherwise scipy.special.chndtr, with F = 0 far below the law's bulk (Rayleigh-tail bound).

The goodness-of-fit test (:mod:`iqstat.fit.goodness_of_fit`) is its user.
"""

from __future__ import annotations

import functools
import math

import numpy as np
from scipy import special

from iqstat.fit.bessel import _BLOCK_VALUES, _bessel_terms

#: Below this noncentrality the chi-square CDF is taken from two terms of its Poisson series.
_SMALL_NONCENTRALITY = 1e-4


def _chi2_2_cdf(y: np.ndarray, lam: float) -> np.ndarray:
    """CDF of the (non)central chi-square with 2 degrees of freedom at y.

    F(y; 2, λ) = Σ_j e^{−λ/2}(λ/2)^j/j!·P(j + 1, y/2), P the regularised lower incomplete
    gamma function (the Poisson mixture of central laws, Johnson, Kotz & Balakrishnan,
    Continuous Univariate Distributions vol. 2, 2nd ed., §29.4 [mem]). For λ below 1e-4 (the
    cross branches of orthogonal tones) two terms are kept: the terms decrease, so the
    remainder is below (λ/2)²/2 < 1.3e-9 (λ = 0 is exact); chndtr costs 3× as much there.
    """
    x = 0.5 * y
    if lam <= 0.0:
        return -np.expm1(-x)
    if lam < _SMALL_NONCENTRALITY:
        p1 = -np.expm1(-x)  # P(1, x)
        p2 = p1 - x * np.exp(-x)  # P(2, x) = P(1, x) − x·e^{−x}
        return math.exp(-0.5 * lam) * (p1 + (0.5 * lam) * p2)
    # The ufunc under scipy.stats.ncx2.cdf, without the distribution wrapper's overhead.
    return special.chndtr(y, 2.0, lam)


#: The GOF's table of F(y; 2, λ) (see :func:`_ncx2_table`): edges of its intervals in a = √λ,
#: its window in t = √y − √λ, cells and polynomial degrees (max. error 3e-12, tests/test_fit.py).
_NCX2_A_EDGES = (24.0, 20.0, 17.0, 14.5, 12.0, 10.0, 9.0, 8.0, 7.0, 6.0, 5.0, 4.0, 3.0, 2.5, 2.0)


_NCX2_T_LO, _NCX2_T_HI, _NCX2_T_CELLS = -8.5, 7.5, 32


_NCX2_A_DEGREE, _NCX2_T_DEGREE = 12, 9


_NCX2_LAM_MIN, _NCX2_LAM_MAX = _NCX2_A_EDGES[-1] ** 2, _NCX2_A_EDGES[0] ** 2


_SQRT_72 = math.sqrt(72.0)


def _ncx2_cdf_by_quadrature(a: np.ndarray, t: np.ndarray) -> np.ndarray:
    """F(y; 2, λ) at every a = √λ (shape (A,)) and b = a + t (t shape (T,)): shape (A, T).

    F = 1 − Q1(a, |b|) = ∫_0^|b| r·e^{−(r² + a²)/2}·I0(a·r) dr, the Rice distribution function
    (Marcum's definition of Q1, e.g. Proakis & Salehi, Digital Communications, 5th ed., §2.3
    [mem]), is accumulated over the gaps between the sorted |b| of each a from F(0) = 0, with
    3-point Gauss–Legendre on each gap (Abramowitz & Stegun 25.4.29) and e^{−(r − a)²/2}·
    i0e(a·r) written as one exponential (log i0e from :func:`_bessel_terms`). Gaps are short
    (< 0.1 where the density is not negligible): 2.5e-13 from chndtr on the table's nodes.
    """
    out = np.empty((len(a), len(t)))
    rows = max(1, _BLOCK_VALUES // (3 * len(t)))
    for i in range(0, len(a), rows):  # ~6 blocks of rows: ~32 k nodes each, kept in cache
        out[i : i + rows] = _rice_cdf_rows(a[i : i + rows], t)
    return out


def _rice_cdf_rows(a: np.ndarray, t: np.ndarray) -> np.ndarray:
    """:func:`_ncx2_cdf_by_quadrature` of a few rows a at once."""
    b = np.abs(a[:, None] + t)
    order = np.argsort(b, axis=1)
    hi = np.take_along_axis(b, order, axis=1)
    lo = np.concatenate([np.zeros((len(a), 1)), hi[:, :-1]], axis=1)
    half = 0.5 * (hi - lo)
    xg, wg = np.polynomial.legendre.leggauss(3)
    r = (0.5 * (hi + lo))[..., None] + half[..., None] * xg
    log_i0e, _ = _bessel_terms(a[:, None, None] * r)
    q = r - a[:, None, None]
    dens = r * np.exp(log_i0e - 0.5 * q * q)
    f_sorted = np.cumsum(half * (dens @ wg), axis=1)
    out = np.empty_like(f_sorted)
    np.put_along_axis(out, order, f_sorted, axis=1)
    return out


@functools.lru_cache(maxsize=1)
def _ncx2_table() -> tuple[np.ndarray, np.ndarray]:
    """Interpolation table of F(y; 2, λ) = 1 − Q1(a, b), a = √λ, b = √y, over (u = 1/a, t = b − a).

    Returns the interval edges in u (ascending) and the coefficients, shape (intervals,
    A_DEGREE + 1, T_CELLS·(T_DEGREE + 1)): Chebyshev in the local u of the interval, and for
    every t cell monomial in its local t (lowest first). Built on first use (not at import)
    from F at the tensor Chebyshev points of the first kind of every interval × cell (58 240
    values by :func:`_ncx2_cdf_by_quadrature`, ~15 ms). For fixed t the law tends to a smooth
    limit as a → ∞ (F → Φ(t)), so it is smooth in u; in t it is a smoothed step of unit width.
    Cells reaching below b = 0 (small a) see F's even continuation in b, smooth too.
    """
    a_edges = np.asarray(_NCX2_A_EDGES)
    u_edges = 1.0 / a_edges  # ascending
    d, k, n_t = _NCX2_A_DEGREE, _NCX2_T_DEGREE, _NCX2_T_CELLS
    xu = np.cos(np.pi * (np.arange(d + 1) + 0.5) / (d + 1))  # Chebyshev points, first kind
    xt = np.cos(np.pi * (np.arange(k + 1) + 0.5) / (k + 1))
    lo, hi = u_edges[:-1, None], u_edges[1:, None]
    a = 1.0 / (0.5 * (lo + hi) + 0.5 * (hi - lo) * xu)  # (intervals, d + 1)
    t_edges = np.linspace(_NCX2_T_LO, _NCX2_T_HI, n_t + 1)
    tl, th = t_edges[:-1, None], t_edges[1:, None]
    t = 0.5 * (tl + th) + 0.5 * (th - tl) * xt  # (cells, k + 1)
    f = _ncx2_cdf_by_quadrature(a.ravel(), t.ravel()).reshape(a.shape + t.shape)
    cheb = np.polynomial.chebyshev
    to_u = np.linalg.inv(cheb.chebvander(xu, d))  # node values -> Chebyshev coefficients
    to_cheb_t = np.linalg.inv(cheb.chebvander(xt, k))
    to_power = np.zeros((k + 1, k + 1))  # column j: T_j in the monomial basis
    for j in range(k + 1):
        to_power[: j + 1, j] = cheb.cheb2poly(np.eye(j + 1)[j])
    to_t = to_power @ to_cheb_t  # node values -> monomial coefficients in the local t
    coef = np.einsum("dj,ijcl,pl->idcp", to_u, f, to_t, optimize=True)
    return u_edges, np.ascontiguousarray(coef.reshape(len(u_edges) - 1, d + 1, n_t * (k + 1)))


def _ncx2_cdf_pairs(lam: np.ndarray) -> np.ndarray:
    """Per noncentrality (shape (P,), each in the table's range) its polynomials in t.

    Returns shape (P·T_CELLS, T_DEGREE + 1): row p·T_CELLS + c holds the monomial
    coefficients (lowest first) of F in the local t of cell c at λ_p, i.e. the table's
    Chebyshev series in u summed once per noncentrality (a loop over the ≤ 14 intervals).
    """
    u_edges, coef = _ncx2_table()
    u = 1.0 / np.sqrt(lam)
    i = np.clip(np.searchsorted(u_edges, u, side="right") - 1, 0, len(u_edges) - 2)
    v = (2.0 * u - u_edges[i] - u_edges[i + 1]) / (u_edges[i + 1] - u_edges[i])
    tu = np.polynomial.chebyshev.chebvander(v, _NCX2_A_DEGREE)  # (P, A_DEGREE + 1)
    out = np.empty((len(lam), coef.shape[2]))
    for j in np.unique(i):  # table intervals present (≤ 14), vectorised over noncentralities
        sel = i == j
        out[sel] = tu[sel] @ coef[j]
    return out.reshape(len(lam) * _NCX2_T_CELLS, _NCX2_T_DEGREE + 1)


def _ncx2_cdf_from_pairs(
    y: np.ndarray, root_lam: np.ndarray, slot: np.ndarray, pairs: np.ndarray
) -> np.ndarray:
    """F(y; 2, λ) from :func:`_ncx2_cdf_pairs` rows: value i uses noncentrality ``slot[i]``.

    Absolute error below 1e-11 against scipy.special.chndtr for λ in [4, 576] and all y ≥ 0
    (tests/test_fit.py). Below the table's window F is 0 (Rayleigh-tail bound, see
    :func:`_chi2_2_cdf_rows`, < 2.3e-16); above it (t > 7.5) F is 1: for b > a, Q1(a, b) ≤
    e^{−(b − a)²/2} < 6.7e-13 (the Chernoff-type bound of M. K. Simon, M.-S. Alouini, Digital
    Communication over Fading Channels, 2nd ed., Wiley 2005, §4.2.3 [mem]).
    """
    gap = root_lam - np.sqrt(y)  # −t
    s = (-gap - _NCX2_T_LO) * (_NCX2_T_CELLS / (_NCX2_T_HI - _NCX2_T_LO))
    cell = s.astype(np.intp)
    np.clip(cell, 0, _NCX2_T_CELLS - 1, out=cell)
    w = 2.0 * (s - cell) - 1.0  # local t in [−1, 1]
    c = pairs.take(slot * _NCX2_T_CELLS + cell, axis=0)  # (n, T_DEGREE + 1)
    f = c[:, -1].copy()
    for j in range(_NCX2_T_DEGREE - 1, -1, -1):  # Horner (10 coefficients)
        f *= w
        f += c[:, j]
    np.putmask(f, gap >= _SQRT_72, 0.0)  # (√λ − √y)² ≥ 72, as in _chi2_2_cdf_rows
    np.putmask(f, gap < -_NCX2_T_HI, 1.0)
    return f


def _near_central_terms(y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """P(1, y/2) and P(2, y/2), the regularised lower incomplete gamma functions.

    P(1, x) = 1 − e^{−x}; P(2, x) = P(1, x) − x·e^{−x} with e^{−x} = 1 − P(1, x).
    """
    x = 0.5 * y
    p1 = -np.expm1(-x)
    return p1, p1 - x * (1.0 - p1)


def _near_central_factors(lam: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(e^{−λ/2}, λ/2) of the two-term series F ≈ e^{−λ/2}·(P(1, x) + (λ/2)·P(2, x)).

    Used for λ < 1e-4 (see :func:`_chi2_2_cdf`); λ = 0 gives (1, 0), i.e. F = P(1, x) exactly.
    """
    half = 0.5 * lam
    return np.exp(-half), half


def _ncx2_cdf_direct(y: np.ndarray, lam: np.ndarray) -> np.ndarray:
    """F(y; 2, λ) by scipy.special.chndtr (λ ≥ 1e-4), 0 far below the law's bulk.

    Far below the noncentral law's bulk F is below 2.3e-16 and taken as 0: with z = s + n,
    |z|² ≤ y needs |n| ≥ √λ − √y (per-dimension unit variance here), and P(|n| ≥ c) =
    e^{−c²/2} (Rayleigh tail), so F(y; 2, λ) ≤ e^{−(√λ − √y)²/2} < e^{−36}.
    """
    out = np.zeros_like(y)
    gap = np.sqrt(lam) - np.sqrt(y)
    near = (gap < 0.0) | (gap * gap < 72.0)
    out[near] = special.chndtr(y[near], 2.0, lam[near])
    return out


def _chi2_2_cdf_rows(
    y: np.ndarray,
    lam: np.ndarray,
    slot: np.ndarray | None = None,
    pairs: np.ndarray | None = None,
) -> np.ndarray:
    """:func:`_chi2_2_cdf` with one noncentrality per value (the same three regimes).

    With ``slot`` and ``pairs`` (from :func:`_ncx2_cdf_pairs`), values whose ``slot`` is ≥ 0
    are taken from the table instead of chndtr (absolute error < 1e-11).
    """
    out = np.empty_like(y)
    small = lam < _SMALL_NONCENTRALITY  # λ = 0 included: factors (1, 0)
    if small.any():
        p1, p2 = _near_central_terms(y[small])
        c0, c1 = _near_central_factors(lam[small])
        out[small] = c0 * (p1 + c1 * p2)
    big = ~small
    if slot is not None:
        tab = slot >= 0
        if tab.any():
            out[tab] = _ncx2_cdf_from_pairs(y[tab], np.sqrt(lam[tab]), slot[tab], pairs)
            big &= ~tab
    if big.any():
        out[big] = _ncx2_cdf_direct(y[big], lam[big])
    return out
