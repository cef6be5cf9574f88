"""The noncoherent log-likelihood of a batch of bursts, with its gradient and Hessian.

Per symbol, averaged over the carrier phase and (NDA) over the hypothesis h sent
(docs/estimator.md eq. 3), up to constants::

    ℓ_k = −M·log N0 − q_k/N0 + log Σ_h π_h·[e^{−A²/N0}·I0(2A·r_kh/N0)]^{s_h}

``_Batch`` holds the envelopes r of all bursts concatenated; ``_evaluate`` gives ℓ per burst
and its analytic derivatives in x = (log A, log N0[, logit p_on]): with u = 2A·r/N0,
ρ = I1(u)/I0(u), ψ = uρ and κ = u²(1 − ρ²) (docs/estimator.md §4), the Hessian of a
log-mixture is E_w[∂²] + Cov_w[∂] over the posterior weights w. Rows are evaluated in
cache-sized blocks and summed per burst with ``np.add.reduceat``; I0 in the log domain
(:mod:`iqstat.fit.bessel`).
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Literal

import numpy as np
from scipy import special

from iqstat.fit.bessel import _BLOCK_VALUES, _bessel_terms


@dataclass(frozen=True)
class _Batch:
    """The log-likelihoods of B bursts, ℓ_b = Σ_k [−M·log N0 − q_k/N0] + Σ_rows (signal term).

    The rows of all bursts are concatenated (burst b owns rows ``starts[b]:starts[b] +
    rows[b]``, never empty), so that one numpy call evaluates every burst and
    ``np.add.reduceat`` splits the sums. Two kinds of signal term:

    ``"tones"``: each row (a column of ``r``, stored hypothesis-major so that the sums over
    hypotheses run across contiguous rows) is one symbol with the signal on one of H
    hypotheses, log Σ_h π_h·Λ(r_hk), Λ(r) = exp(−A²/N0)·I0(2A·r/N0) (NDA FSK: H = M; DA:
    H = 1, one row per symbol that carries signal). ``"on-off"``: OOK NDA,
    log[(1 − p) + p·Λ(r_k)] per symbol.
    """

    kind: Literal["tones", "on-off"]
    r: np.ndarray  # (H, rows) envelopes |z| of the branch each hypothesis is matched to
    starts: np.ndarray  # (B,) first row of each burst
    rows: np.ndarray  # (B,) rows of each burst (≥ 1)
    log_prior: np.ndarray  # (H,) for "tones"
    q_sum: np.ndarray  # (B,) Σ_k q_k, the whitened energies
    n: np.ndarray  # (B,) symbols of each burst
    n_dims: int  # M, complex dimensions of z
    p_on: np.ndarray  # (B,) "on-off" with p_on fixed
    p_on_free: bool  # "on-off" with p_on a third parameter, logit(p_on)

    @property
    def size(self) -> int:
        return len(self.rows)

    @property
    def n_params(self) -> int:
        return 3 if self.p_on_free else 2

    def take(self, idx: np.ndarray) -> _Batch:
        """The bursts ``idx`` (increasing) as a batch of their own."""
        if len(idx) == self.size:
            return self
        rows = self.rows[idx]
        starts = np.cumsum(rows) - rows
        elem = np.repeat(self.starts[idx] - starts, rows) + np.arange(int(rows.sum()))
        return replace(
            self,
            r=self.r.take(elem, axis=1),  # C order (r[:, elem] would be F order: strided rows)
            starts=starts,
            rows=rows,
            q_sum=self.q_sum[idx],
            n=self.n[idx],
            p_on=self.p_on[idx],
        )


def _row_sums(batch: _Batch, u: np.ndarray, g: np.ndarray, p: np.ndarray, derivatives: bool):
    """Per-row terms of the signal part of ℓ and of the posterior moments, shape (K, rows).

    ``u`` = 2A·r/N0 (H, rows), ``g`` = A²/N0 and ``p`` = p_on per row. Rows: "tones" [log Σ_h
    π_h Λ, E_w ψ, Var_w ψ, E_w κ]; "on-off" [log(1 − p + pΛ), w, wψ, wκ, v, vψ, vψ²] with w the
    posterior of "on" and v = w(1 − w).
    """
    log_i0e_u, omr = _bessel_terms(u)
    lik = log_i0e_u
    lik += u
    lik -= g  # log Λ = −A²/N0 + log I0(u)  (eq. 3)
    if batch.kind == "on-off":
        lik = lik[0] + np.log(p)
        lse = np.logaddexp(np.log1p(-p), lik)  # log[(1 − p) + p·Λ]
        if not derivatives:
            return lse[None, :]
        w = np.exp(lik - lse)
        psi = u[0] * (1.0 - omr[0])
        kappa = u[0] * u[0] * omr[0] * (2.0 - omr[0])  # u²(1 − ρ²)
        v = w * (1.0 - w)
        vpsi = v * psi
        return np.stack([lse, w, w * psi, w * kappa, v, vpsi, vpsi * psi])
    if lik.shape[0] == 1:  # one hypothesis per row (DA): the posterior weight is 1
        if not derivatives:
            return lik
        u0, o0 = u[0], omr[0]
        out = np.empty((4, u0.size))
        out[0] = lik[0]
        np.subtract(1.0, o0, out=out[1])
        out[1] *= u0  # ψ = u·(1 − (1 − ρ))
        out[2] = 0.0
        np.multiply(u0, u0, out=out[3])
        out[3] *= o0
        np.subtract(2.0, o0, out=o0)
        out[3] *= o0  # κ = u²(1 − ρ)(1 + ρ)
        return out
    lik += batch.log_prior[:, None]
    if lik.shape[0] == 2:
        return _two_hypotheses(lik, u, omr, derivatives)
    top = lik.max(axis=0)
    e = np.exp(lik - top)
    tot = e.sum(axis=0)
    lse = top + np.log(tot)
    if not derivatives:
        return lse[None, :]
    e /= tot  # posterior weights w
    psi = 1.0 - omr
    psi *= u  # ψ = u·I1/I0
    wpsi = e * psi
    e_psi = wpsi.sum(axis=0)
    wpsi *= psi
    u *= u
    omr *= 2.0 - omr
    u *= omr  # κ = u²(1 − ρ²) = u²·(1 − ρ)·(1 + ρ)
    u *= e
    return np.stack([lse, e_psi, wpsi.sum(axis=0) - e_psi * e_psi, u.sum(axis=0)])


def _two_hypotheses(lik: np.ndarray, u: np.ndarray, omr: np.ndarray, derivatives: bool):
    """:func:`_row_sums` of 2-FSK NDA rows: the same four sums with one exp per symbol.

    With d = ℓ_0 − ℓ_1 and t = e^{−|d|}: log Σ = max(ℓ_0, ℓ_1) + log1p(t), the posterior of
    the likelier hypothesis 1/(1 + t), and over the two hypotheses E_w ψ = ψ_1 + w_0(ψ_0 − ψ_1),
    Var_w ψ = w_0·w_1·(ψ_0 − ψ_1)², E_w κ = κ_1 + w_0(κ_0 − κ_1).
    """
    out = np.empty((4 if derivatives else 1, lik.shape[1]))
    np.maximum(lik[0], lik[1], out=out[0])
    t = np.minimum(lik[0], lik[1])
    t -= out[0]  # −|d|: rounding is symmetric, so min − max is −|ℓ_0 − ℓ_1| to the bit
    np.exp(t, out=t)
    out[0] += np.log1p(t)
    if not derivatives:
        return out
    w0 = t
    w0 += 1.0
    np.divide(1.0, w0, out=w0)  # posterior of the likelier hypothesis
    w0 = np.where(lik[0] >= lik[1], w0, 1.0 - w0)
    psi = 1.0 - omr
    psi *= u  # ψ = u·I1/I0
    u *= u
    omr *= 2.0 - omr
    u *= omr  # κ = u²(1 − ρ²) = u²·(1 − ρ)·(1 + ρ)
    dpsi = psi[0] - psi[1]
    np.multiply(w0, dpsi, out=out[1])
    out[1] += psi[1]
    np.multiply(dpsi, dpsi, out=out[2])
    out[2] *= w0
    out[2] *= 1.0 - w0
    np.subtract(u[0], u[1], out=out[3])
    out[3] *= w0
    out[3] += u[1]
    return out


def _signal_sums(batch: _Batch, a_over: np.ndarray, g: np.ndarray, p: np.ndarray, derivatives):
    """Per-burst sums of :func:`_row_sums`, shape (B, K), in blocks of ~32 k envelopes.

    ``a_over`` = 2A/N0, ``g`` = A²/N0, ``p`` = p_on, one per burst. Each block's rows are cut
    at the burst starts inside it; one ``np.add.reduceat`` sums the pieces.
    """
    h, total = batch.r.shape
    k = (7 if batch.kind == "on-off" else 4) if derivatives else 1
    acc = np.zeros((batch.size, k))
    step = max(1, _BLOCK_VALUES // h)
    ends = batch.starts + batch.rows
    for i in range(0, total, step):  # blocks of thousands of symbols, not one per symbol
        j = min(i + step, total)
        b0 = int(np.searchsorted(ends, i, side="right"))  # first burst in the block
        b1 = int(np.searchsorted(batch.starts, j, side="left"))  # one past the last
        cuts = np.maximum(batch.starts[b0:b1], i) - i
        rows = np.minimum(ends[b0:b1], j) - i - cuts  # rows of each burst inside the block
        u = np.repeat(a_over[b0:b1], rows) * batch.r[:, i:j]
        gg = np.repeat(g[b0:b1], rows)
        pp = np.repeat(p[b0:b1], rows) if batch.kind == "on-off" else None
        acc[b0:b1] += np.add.reduceat(_row_sums(batch, u, gg, pp, derivatives), cuts, axis=1).T
    return acc


def _p_on(batch: _Batch, x: np.ndarray) -> np.ndarray:
    return special.expit(x[:, 2]) if batch.p_on_free else batch.p_on


def _evaluate(batch: _Batch, x: np.ndarray, derivatives: bool):
    """ℓ(x) per burst and, if asked, its gradient and Hessian in x = (log A, log N0[, logit p]).

    ``x`` has shape (B, P). With γ = A²/N0, u = 2A·r/N0, ρ = I1(u)/I0(u), ψ = uρ,
    κ = u²(1 − ρ²) (docs/estimator.md §4): ∂logΛ/∂logA = ψ − 2γ, ∂logΛ/∂logN0 = γ − ψ, since
    dψ/du = u(1 − ρ²), and the Hessian of a log-mixture is E_w[∂²] + Cov_w[∂] over the
    posterior weights w. Returns ll (B,), grad (B, P), hess (B, P, P).
    """
    alpha, beta = x[:, 0], x[:, 1]
    a, n0 = np.exp(alpha), np.exp(beta)
    g = a * a / n0
    p = _p_on(batch, x) if batch.kind == "on-off" else None
    acc = _signal_sums(batch, 2.0 * a / n0, g, p, derivatives)
    n, m, q_sum = batch.n, batch.n_dims, batch.q_sum
    ll = -n * m * beta - q_sum / n0 + acc[:, 0]  # Σ[−M·log N0 − q/N0] + signal part
    if not derivatives:
        return ll, None, None
    hess = np.empty((batch.size, batch.n_params, batch.n_params))
    if batch.kind == "tones":
        s_psi, var_psi, k_sum = acc[:, 1], acc[:, 2], acc[:, 3]
        gr = g * batch.rows
        grad = np.stack([s_psi - 2.0 * gr, -n * m + q_sum / n0 + gr - s_psi], axis=1)
        hess[:, 0, 0] = k_sum - 4.0 * gr + var_psi
        hess[:, 0, 1] = hess[:, 1, 0] = 2.0 * gr - k_sum - var_psi
        hess[:, 1, 1] = k_sum - gr + var_psi - q_sum / n0
        return ll, grad, hess
    sw, swp, swk, sv, svp, svpp = (acc[:, i] for i in range(1, 7))
    # d0 = ψ − 2γ, d1 = γ − ψ on "on"; Cov_w over the on/off indicator is v·d·dᵀ
    grad = [swp - 2.0 * g * sw, -n * m + q_sum / n0 + g * sw - swp]
    hess[:, 0, 0] = swk - 4.0 * g * sw + (svpp - 4.0 * g * svp + 4.0 * g * g * sv)
    hess[:, 0, 1] = hess[:, 1, 0] = 2.0 * g * sw - swk + (-svpp + 3.0 * g * svp - 2.0 * g * g * sv)
    hess[:, 1, 1] = swk - g * sw + (svpp - 2.0 * g * svp + g * g * sv) - q_sum / n0
    if batch.p_on_free:
        grad.append(sw - n * p)  # ∂log π_h/∂logit p = s_h − p
        hess[:, 0, 2] = hess[:, 2, 0] = svp - 2.0 * g * sv
        hess[:, 1, 2] = hess[:, 2, 1] = g * sv - svp
        hess[:, 2, 2] = sv - n * p * (1.0 - p)
    return ll, np.stack(grad, axis=1), hess
