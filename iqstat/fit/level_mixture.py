"""The law of a fading burst's signal level, without a parametric form: a grid mixture.

A burst that sees one or two fade cycles has its own law of the per-symbol Es/N0, γ_n, and
that law is what its errors see: E[errors] = Σ_n P_s(γ_n). The Rician law fitted by
:mod:`iqstat.fit.rician` cannot be worse than Rayleigh, yet a burst whose one fade lasts a
third of it is (Var|h|² > 1). Here the law of γ is estimated as a mixture on a fixed grid of
levels γ_j, by maximum likelihood over the weights w_j (the nonparametric maximum likelihood
of a mixing distribution [1]_, [2]_): with N0 fixed (the fading fit's, which the noise
branches determine), hypothesis k of symbol n at level γ_j has the likelihood

    exp(−γ_j)·I0(2√γ_j·|z_nk|/√N0)

relative to the noise-only part common to all hypotheses (the constant-amplitude model's
hypothesis term, any tone correlation), so the symbol's likelihood is Σ_j w_j B_nj with
B_nj = Σ_k π_k·exp(−γ_j)·I0(…) (the known tone only, data-aided; OOK: π_off + π_on·(…)).
The log-likelihood is concave in w; the EM iteration w_j ← w_j·mean_n(B_nj / Σ_i w_i B_ni)
[2]_ climbs it monotonically. The grid is logarithmic around the fitted mean with a level at
zero (a symbol lost in a deep fade).

References
----------
.. [1] J. Kiefer, J. Wolfowitz, "Consistency of the maximum likelihood estimator in the
   presence of infinitely many incidental parameters", Ann. Math. Statist. 27(4):887–906,
   1956.
.. [2] N. Laird, "Nonparametric maximum likelihood estimation of a mixing distribution",
   J. Amer. Statist. Assoc. 73(364):805–811, 1978 (the EM iteration) [mem].
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from iqstat.fit.bessel import _log_i0
from iqstat.fit.rician import _hypotheses

__all__ = ["LevelMixture", "fit_level_mixture"]

#: Grid: levels from GRID_LO to GRID_HI times the mean Es/N0 (log-spaced), and zero.
GRID_LO, GRID_HI, GRID_POINTS = 1e-3, 20.0, 32
#: EM: at most this many (accelerated) iterations; stop when the log-likelihood gains less
#: than TOL per symbol.
EM_MAX_ITERATIONS, EM_TOL = 500, 1e-6


@dataclass(frozen=True)
class LevelMixture:
    """The per-symbol Es/N0 law of a burst as weights on a grid of levels.

    Attributes
    ----------
    levels : ndarray
        Es/N0 levels γ_j (linear; OOK: the "on" level).
    weights : ndarray
        Their weights (sum 1).
    mean : float
        Σ w_j γ_j.
    iterations : int
    converged : bool
    """

    levels: np.ndarray
    weights: np.ndarray
    mean: float
    iterations: int
    converged: bool

    def support(self, min_weight: float = 1e-3) -> tuple[tuple[float, float], ...]:
        """(Es/N0, weight) of the levels of weight ≥ ``min_weight``, renormalised."""
        keep = self.weights >= min_weight
        w = self.weights[keep] / self.weights[keep].sum()
        return tuple((float(g), float(v)) for g, v in zip(self.levels[keep], w, strict=True))

    def average(self, fn) -> float:
        """Σ_j w_j·fn(γ_j) for a vectorised fn (e.g. a BER law)."""
        return float(np.sum(self.weights * np.asarray(fn(self.levels), dtype=float)))


def _em_step(b: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, float]:
    """One EM step of the mixture weights, and the log-likelihood at the weights given."""
    s = b @ w
    new = w * ((1.0 / s) @ b) / len(s)
    return new / new.sum(), float(np.sum(np.log(s)))


def _npmle(b: np.ndarray) -> tuple[np.ndarray, int, bool]:
    """Maximise Σ_n log Σ_j w_j B_nj over the simplex: EM accelerated by SQUAREM [3]_
    (two EM steps, the squared extrapolation, one stabilising EM step; the extrapolation is
    dropped when it loses likelihood, so the climb stays monotone).

    .. [3] R. Varadhan, C. Roland, "Simple and globally convergent methods for accelerating
       the convergence of any EM algorithm", Scand. J. Statist. 35(2):335–353, 2008 [mem].
    """
    n = len(b)
    w = np.full(b.shape[1], 1.0 / b.shape[1])
    last = -math.inf
    for it in range(1, EM_MAX_ITERATIONS + 1):
        w1, ll0 = _em_step(b, w)
        if ll0 - last < EM_TOL * n:
            return w, it, True
        last = ll0
        w2, ll1 = _em_step(b, w1)
        r = w1 - w
        v = w2 - w1 - r
        nv = float(np.sqrt(np.sum(v * v)))
        alpha = -float(np.sqrt(np.sum(r * r))) / nv if nv > 0 else -1.0
        alpha = min(alpha, -1.0)
        cand = np.maximum(w - 2.0 * alpha * r + alpha * alpha * v, 0.0)
        total = cand.sum()
        w3, ll_c = _em_step(b, cand / total) if total > 0 else (w2, -math.inf)
        w = w3 if ll_c >= ll1 else _em_step(b, w2)[0]
    return w, EM_MAX_ITERATIONS, False


def fit_level_mixture(
    z: np.ndarray,
    *,
    modulation: str,
    noise_var: float,
    mean_esn0: float,
    priors=None,
    sent: np.ndarray | None = None,
) -> LevelMixture:
    """Estimate the law of a burst's per-symbol Es/N0 as a grid mixture (see the module).

    Parameters
    ----------
    z : ndarray of complex, shape (n_symbols, n_branches)
        Correlator outputs (unit-energy templates).
    modulation : {"2fsk", "4fsk", "ook"}
    noise_var : float
        N0 at the correlator output (held fixed).
    mean_esn0 : float
        The fitted mean Es/N0 (linear; OOK: the "on" level), around which the grid is laid.
    priors : sequence of float, optional
        Hypothesis priors (FSK: per tone; OOK: (p_off, p_on)); uniform by default.
    sent : ndarray of int, optional
        Known hypothesis per symbol, −1 where unknown.
    """
    z, ook, pi, sent = _hypotheses(z, modulation, priors, sent)
    levels = np.concatenate([[0.0], mean_esn0 * np.geomspace(GRID_LO, GRID_HI, GRID_POINTS)])
    r = np.abs(z) / math.sqrt(noise_var)  # (n, m)
    # log of exp(−γ_j)·I0(2√γ_j·R_nk): (n, m, J)
    u = 2.0 * r[:, :, None] * np.sqrt(levels)[None, None, :]
    log_l = _log_i0(u.reshape(-1)).reshape(u.shape) - levels[None, None, :]
    if ook:
        on = log_l[:, 0, :]
        log_b = np.logaddexp(math.log(pi[0]), math.log(pi[1]) + on)
        known = sent >= 0
        log_b[known] = np.where(sent[known, None] == 1, on[known], 0.0)
    else:
        log_b = np.logaddexp.reduce(np.log(pi)[None, :, None] + log_l, axis=1)
        known = np.flatnonzero(sent >= 0)
        log_b[known] = log_l[known, sent[known], :]
    b = np.exp(log_b - log_b.max(axis=1, keepdims=True))  # rows scaled: same maximiser
    w, it, converged = _npmle(b)
    return LevelMixture(
        levels=levels, weights=w, mean=float(np.sum(w * levels)), iterations=it,
        converged=converged,
    )  # fmt: skip
