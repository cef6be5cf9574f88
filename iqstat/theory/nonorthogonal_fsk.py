"""Noncoherent FSK with correlated (non-orthogonal) tones: the tone correlation and the error laws.

Owns :func:`tone_correlation` and :func:`tone_correlation_matrix` (ρ = e^{jπΔfT}·sinc(ΔfT) of
two unit-energy rectangular tones), the exact binary result of Stein,
:func:`ber_ncbfsk_nonorthogonal` (P_b = ½·[Q1(a, b) + 1 − Q1(b, a)],
a, b = sqrt(γ_b/2·(1 ∓ sqrt(1 − |ρ|²)))), and the union upper bound on the M-FSK bit error
probability for any tone set, :func:`ber_ncfsk_union_bound` (Hamming-weighted sum of the
pairwise errors over wrong tones). The private ``_pairwise_error_nc`` and ``_union_bound``
work on validated arrays for :func:`~iqstat.theory.link.predicted_ber`.

References
----------
.. [1] J. G. Proakis and M. Salehi, *Digital Communications*, 5th ed., McGraw-Hill, 2008,
       §4.5 (noncoherent detection; M-FSK error probability §4.5-3, non-orthogonal signals
       §4.5-4). [section numbers from memory]
.. [2] S. Stein, "Unified analysis of certain coherent and noncoherent binary communications
       systems", IEEE Trans. Inf. Theory IT-10(1):43-51, 1964.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from iqstat.errors import ParameterError
from iqstat.theory.inputs import _as_array, _as_ebn0, _as_rho_abs, _check_m, _finish
from iqstat.theory.marcum import _marcum_q1_pair

__all__ = [
    "tone_correlation",
    "tone_correlation_matrix",
    "ber_ncbfsk_nonorthogonal",
    "ber_ncfsk_union_bound",
]


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
