"""Modified Bessel functions of the noncoherent likelihood: log I0 and the ratio I1/I0.

Owns :func:`_log_i0` (log I0 without overflow, from scipy.special.i0e) and
:func:`_bessel_terms`, which gives log i0e(u) and 1 − I1(u)/I0(u) for many u at once from a
piecewise-polynomial table of the smooth part S(u) = log i0e(u) + ½·log(2π(u + b)): the table
is built on first use (not at import) from scipy.special and, beyond u = 200, from the
asymptotic series (Abramowitz & Stegun 9.7.1); the ratio follows from S' (A&S 9.6.27:
I0' = I1). Also the block length ``_BLOCK_VALUES`` by which callers cut their vectorised
evaluations so that the temporaries stay in cache.
"""

from __future__ import annotations

import functools
import math

import numpy as np
from scipy import special


def _log_i0(x: np.ndarray, i0e_x: np.ndarray | None = None) -> np.ndarray:
    """log I0(x) without overflow: log(i0e(x)) + |x|, Maclaurin series below |x| = 1e-2.

    ``i0e_x`` may pass i0e(x) if already computed. METHODS §8: log I0(1) =
    0.23591435850717865, log I0(700) = 695.80569999844345.
    """
    x = np.asarray(x, dtype=float)
    out = np.log(special.i0e(x) if i0e_x is None else i0e_x) + np.abs(x)
    small = np.abs(x) < 1e-2
    if np.any(small):
        x2 = x[small] ** 2
        out[small] = x2 / 4.0 - x2**2 / 64.0 + x2**3 / 576.0  # log I0 Maclaurin series
    return out


#: Piecewise-polynomial log i0e and I1/I0 (see :func:`_bessel_terms`): intervals, degree, and
#: the constants c of the map v = u/(u + c) and b of the smooth part S.
_BESSEL_INTERVALS = 4096


_BESSEL_DEGREE = 4


_BESSEL_C = 8.0


_BESSEL_B = 1.0


#: Above this u the table is built from the asymptotic series instead of scipy.special.
_BESSEL_SERIES_FROM = 200.0


def _bessel_asymptotic(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """e^{−x}·√(2πx)·I0(x) and 1 − I1(x)/I0(x) from the asymptotic series (A&S 9.7.1), x ≥ 200.

    30 terms: they shrink by a factor (2k + 1)²/(8(k + 1)x) < 1/10 up to k = 30 at x ≥ 200,
    so the remainder is below 1e-16 of the sum. 1 − ρ is Σ_k (t0_k − t1_k) / Σ_k t0_k with the
    difference taken term by term: 1 − i1e/i0e would lose ~1e-16/(1 − ρ) of itself.
    """
    t0 = np.ones_like(x)
    t1 = np.ones_like(x)
    s0 = np.ones_like(x)
    diff = np.zeros_like(x)
    for k in range(1, 30):  # series terms, each vectorised over x
        t0 = t0 * (-(0 - (2 * k - 1) ** 2) / (k * 8.0)) / x
        t1 = t1 * (-(4 - (2 * k - 1) ** 2) / (k * 8.0)) / x
        s0 += t0
        diff += t0 - t1
    return s0, diff / s0


@functools.lru_cache(maxsize=1)
def _bessel_table() -> tuple[np.ndarray, ...]:
    """Monomial coefficients (lowest first, each an array over the intervals) of S in the
    interval's local variable x = (w + 1)/2 ∈ [0, 1).

    Built on first use (not at import) from scipy.special: on each interval, dS/dw is
    interpolated at the Chebyshev points of degree d − 1 (from i1e/i0e, so the ratio is as
    accurate as scipy's) and integrated, the constant fixed by S at the interval's centre;
    the polynomial in w ∈ [−1, 1] is then rewritten in x (w = 2x − 1, binomial expansion).
    """
    k_count, d, c, b = _BESSEL_INTERVALS, _BESSEL_DEGREE, _BESSEL_C, _BESSEL_B
    nodes = np.cos(np.pi * (np.arange(d) + 0.5) / d)  # Chebyshev points of the first kind
    w = np.concatenate([nodes, [0.0]])
    v = (np.arange(k_count)[:, None] + 0.5 + 0.5 * w) / k_count  # (K, d + 1)
    u = c * v / (1.0 - v)
    far = u > _BESSEL_SERIES_FROM
    omr = 1.0 - special.i1e(u) / special.i0e(u)  # 1 − ρ
    s_all = np.log(special.i0e(u)) + 0.5 * np.log(2.0 * math.pi * (u + b))
    # far out, 1 − i1e/i0e from scipy is off by ~1e-10 of itself: the asymptotic series there
    series0, omr[far] = _bessel_asymptotic(u[far])
    s_all[far] = np.log(series0) + 0.5 * np.log1p(b / u[far])
    ds_du = 0.5 / (u + b) - omr
    ds_dw = ds_du * c / (1.0 - v) ** 2 / (2.0 * k_count)  # du/dv = c/(1 − v)², dv/dw = 1/(2K)
    # interpolation at the nodes and the change to monomials are linear in the values: their
    # (d, d) matrix, column j from the unit vector e_j, applies to all intervals in one product
    to_monomials = np.stack(
        [
            np.polynomial.chebyshev.cheb2poly(np.polynomial.chebyshev.chebfit(nodes, e, d - 1))
            for e in np.eye(d)  # d unit vectors, once
        ],
        axis=1,
    )
    table = np.empty((d + 1, k_count))
    table[1:] = (to_monomials @ ds_dw[:, :d].T) / np.arange(1, d + 1)[:, None]  # ∫ D(w) dw
    table[0] = s_all[:, -1]  # S at the interval's centre w = 0
    # coefficient of x^i in (2x − 1)^j: C(j, i)·2^i·(−1)^(j − i)
    to_x = np.array(
        [[math.comb(j, i) * 2.0**i * (-1.0) ** (j - i) for j in range(d + 1)] for i in range(d + 1)]
    )
    return tuple(np.ascontiguousarray(row) for row in to_x @ table)


def _bessel_terms(u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """log i0e(u) and 1 − I1(u)/I0(u) for u ≥ 0 (any shape), without scipy's ~25 ns per value.

    Notes
    -----
    S(u) = log i0e(u) + ½·log(2π(u + b)) is smooth on [0, ∞) and tends to 0 as u → ∞
    (i0e(u)·√(2πu) → 1, Abramowitz & Stegun 9.7.1). It is a polynomial of degree 4 in the
    local variable x ∈ [0, 1) of 4096 equal intervals of v = u/(u + c) ∈ [0, 1) (5 gathers
    and 14 Horner passes per value; degree 7 on 256 intervals, as accurate, costs ~25 % more),
    evaluated by Horner together with its derivative, which gives the ratio:
    I1/I0 = d log I0/du = 1 + S'(u) − 1/(2(u + b)) (A&S 9.6.27: I0' = I1). Checked against
    scipy.special over [1e-6, 1e6] (tests/test_fit.py): log i0e to 2e-15 of max(1, log I0),
    1 − ρ to about 3e-13 relative (scipy's own error there), ρ to 3e-13 relative above
    u = 0.1 (absolute 1e-12 below).
    """
    table = _bessel_table()
    k_count, c, b = _BESSEL_INTERVALS, _BESSEL_C, _BESSEL_B
    rk = u + c
    np.divide(c * k_count, rk, out=rk)  # K·(1 − v) = K·c/(u + c)  (u = inf: the last interval)
    vk = np.subtract(k_count, rk)  # K·v (K a power of 2: the same bits as K·(1 − c/(u + c)))
    idx = vk.astype(np.intp)
    np.minimum(idx, k_count - 1, out=idx)
    w = np.subtract(vk, idx, out=vk)  # x, the position inside the interval
    tmp = np.empty_like(w)
    p = table[-1][idx]
    dp = p.copy()  # the first Horner step of the derivative from 0: 0·w + p = p
    p *= w
    p += table[-2][idx]
    for coef in table[-3::-1]:  # Horner for S and dS/dx together (d + 1 coefficients)
        dp *= w
        dp += p
        p *= w
        p += coef[idx]
    ub = u + b
    np.multiply(ub, 2.0 * math.pi, out=tmp)
    np.log(tmp, out=tmp)
    tmp *= 0.5
    p -= tmp  # log i0e
    # 1 − ρ = 1/(2(u + b)) − dS/du, dS/du = dS/dx · K·(1 − v)²/c = dS/dx · (K(1 − v))²/(cK)
    rk *= rk
    dp *= rk
    dp *= 1.0 / (c * k_count)
    omr = np.divide(0.5, ub, out=ub)
    omr -= dp
    return p, omr


_BLOCK_VALUES = 32768  # envelopes per block: keeps the temporaries in cache (2-3x faster)
