"""Maximisation of the batch likelihood, and its profile-likelihood intervals.

``_maximise``: damped Newton ascent with backtracking for all bursts at once (Newton where −H
is positive definite, eigenvalue-modified otherwise, no step moving A or N0 by more than e²),
stopping when the Newton decrement falls below 1e-9 or γ = A²/N0 below 1e-4 (the boundary
A = 0). ``_profile`` maximises over log N0 with γ held fixed (envelope theorem for its slope,
implicit-function theorem for the path of log N0); ``_profile_roots`` finds where the profile
falls to a target by safeguarded Newton. From them, the 95 % two-sided profile interval
(2Δℓ = χ²₁(0.95) = 3.841) and the one-sided 95 % upper bound when no signal is detected
(2Δℓ = χ²₁(0.90) = 2.706, the boundary-corrected critical value of Self & Liang, J. Amer.
Statist. Assoc. 82(398):605-610, 1987).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from iqstat.fit.likelihood import _Batch, _evaluate
from iqstat.fit.result import _Z975, _db_array

# chi2(1).ppf(0.90): 2·Δℓ for a one-sided 95 % bound, and the 5 % critical value of the
# likelihood-ratio test of A = 0, a parameter on the boundary (50:50 mixture of chi2_0 and
# chi2_1; Self & Liang, J. Amer. Statist. Assoc. 82(398):605-610, 1987).
_CHI2_1_Q90 = 2.705543454095404


_CHI2_1_Q95 = 3.841458820694124  # chi2(1).ppf(0.95): the two-sided 95 % profile interval


_LOG_GAMMA_FLOOR = math.log(1e-4)  # γ below this (−40 dB) is taken as the boundary A = 0


_NEWTON_TOL = 1e-9  # Newton decrement (log-likelihood units) at which we stop


_MAX_NEWTON = 100


def _newton_steps(grad: np.ndarray, hess: np.ndarray) -> np.ndarray:
    """Ascent steps (B, P): Newton where −H is positive definite, else eigenvalue-modified."""
    if hess.shape[1] == 2:  # two parameters: the 2 x 2 case in closed form
        return _newton_steps_2(grad, hess)
    return _newton_steps_eigh(grad, hess)


def _newton_steps_eigh(grad: np.ndarray, hess: np.ndarray) -> np.ndarray:
    lam, vec = np.linalg.eigh(-hess)
    floor = 1e-8 * np.maximum(1.0, np.max(np.abs(lam), axis=1))
    lam = np.maximum(np.abs(lam), floor[:, None])
    step = np.einsum("bij,bj->bi", vec, np.einsum("bji,bj->bi", vec, grad) / lam)
    big = np.max(np.abs(step), axis=1)
    # never move A or N0 by more than e² in one step
    return step * np.where(big > 2.0, 2.0 / np.maximum(big, 2.0), 1.0)[:, None]


def _newton_steps_2(grad: np.ndarray, hess: np.ndarray) -> np.ndarray:
    """:func:`_newton_steps` for P = 2 without LAPACK: −H = [[a, b], [b, c]] has eigenvalues
    (a + c)/2 ± √(((a − c)/2)² + b²); where both exceed the floor the step is Cramer's
    (−H)⁻¹g, the other bursts (rare: indefinite or nearly singular) go through eigh."""
    h00, h01, h11 = hess[:, 0, 0], hess[:, 0, 1], hess[:, 1, 1]
    half = 0.5 * (h11 - h00)  # (a − c)/2
    root = np.sqrt(half * half + h01 * h01)
    mean = -0.5 * (h00 + h11)  # (a + c)/2
    lo = mean - root
    # where lo > 0 the larger |eigenvalue| is mean + root: the floor 1e-8·max(1, |λ|)
    ok = lo > 1e-8 * np.maximum(1.0, mean + root)
    det = h00 * h11 - h01 * h01  # = det(−H)
    ok &= det > 0.0
    g0, g1 = grad[:, 0], grad[:, 1]
    step = np.empty_like(grad)
    np.multiply(h01, g1, out=step[:, 0])
    step[:, 0] -= h11 * g0  # c·g0 − b·g1 with a = −h00, b = −h01, c = −h11
    np.multiply(h01, g0, out=step[:, 1])
    step[:, 1] -= h00 * g1  # a·g1 − b·g0
    step /= det[:, None]
    big = np.max(np.abs(step), axis=1)
    # never move A or N0 by more than e² in one step
    step *= np.where(big > 2.0, 2.0 / np.maximum(big, 2.0), 1.0)[:, None]
    if not ok.all():
        odd = np.flatnonzero(~ok)
        step[odd] = _newton_steps_eigh(grad[odd], hess[odd])
    return step


#: Stop codes of :func:`_maximise`.
_CONVERGED, _LINE_SEARCH, _BOUNDARY, _NO_CONVERGENCE = 0, 1, 2, 3


_STOP_MESSAGES = {
    _CONVERGED: "converged",
    _LINE_SEARCH: "line search failed to increase the likelihood",
    _BOUNDARY: "the likelihood is largest at A = 0 (no signal)",
    _NO_CONVERGENCE: f"no convergence in {_MAX_NEWTON} Newton iterations",
}


@dataclass(frozen=True)
class _Optimum:
    """Newton results per burst: arrays with a leading burst axis."""

    x: np.ndarray
    ll: np.ndarray
    grad: np.ndarray
    hess: np.ndarray
    iterations: np.ndarray
    converged: np.ndarray
    stop: np.ndarray  # one of the stop codes

    @property
    def boundary(self) -> np.ndarray:
        return self.stop == _BOUNDARY


def _log_gamma(x: np.ndarray) -> np.ndarray:
    """log(A²/N0) from x = (log A, log N0, ...) per burst."""
    return 2.0 * x[:, 0] - x[:, 1]


def _maximise(batch: _Batch, x0: np.ndarray, tol: float = _NEWTON_TOL) -> _Optimum:
    """Damped Newton ascent with backtracking for all bursts at once; stops at A → 0.

    Bursts iterate together; one that has stopped keeps its values, the others go on until
    all have stopped or the iteration cap is reached. The line search halves the step of each
    burst whose likelihood did not rise enough and re-evaluates only those.
    """
    b = batch.size
    x = np.array(x0, dtype=float)
    ll, grad, hess = _evaluate(batch, x, True)
    iterations = np.full(b, _MAX_NEWTON)
    stop = np.full(b, _NO_CONVERGENCE)
    converged = np.zeros(b, dtype=bool)
    active = np.arange(b)
    for it in range(_MAX_NEWTON):
        step = _newton_steps(grad[active], hess[active])
        decrement = np.sum(grad[active] * step, axis=1)
        done = decrement < tol
        iterations[active[done]] = it
        stop[active[done]] = _CONVERGED
        converged[active[done]] = True
        active, step, decrement = active[~done], step[~done], decrement[~done]
        t = np.ones(len(active))
        pending = np.arange(len(active))  # positions in `active` still searching
        while pending.size:
            idx = active[pending]
            x_new = x[idx] + t[pending, None] * step[pending]
            ll_new, g_new, h_new = _evaluate(batch.take(idx), x_new, True)
            ok = np.isfinite(ll_new) & (ll_new >= ll[idx] + 1e-4 * t[pending] * decrement[pending])
            acc = idx[ok]
            x[acc], ll[acc], grad[acc], hess[acc] = x_new[ok], ll_new[ok], g_new[ok], h_new[ok]
            pending = pending[~ok]
            t[pending] *= 0.5
            failed = t[pending] < 1e-8
            gone = active[pending[failed]]
            iterations[gone] = it
            stop[gone] = _LINE_SEARCH
            converged[gone] = decrement[pending[failed]] < 1e-6
            pending = pending[~failed]
        still = stop[active] == _NO_CONVERGENCE
        active = active[still]
        at_zero = _log_gamma(x[active]) < _LOG_GAMMA_FLOOR
        iterations[active[at_zero]] = it + 1
        stop[active[at_zero]] = _BOUNDARY
        active = active[~at_zero]
        if not active.size:
            break
    return _Optimum(x, ll, grad, hess, iterations, converged, stop)


def _profile(batch: _Batch, log_gamma_on: np.ndarray, beta0: np.ndarray):
    """max over log N0 of ℓ with γ_on = A²/N0 held fixed (p_on fixed), per burst.

    Returns (ℓ_p, log N0, dℓ_p/dlog γ, dlog N0/dlog γ) at the profile point: by the envelope
    theorem the slope of ℓ_p is ∂ℓ/∂log γ there, and the implicit-function theorem gives the
    path of the profiled log N0 (a warm start for the next point).
    """
    lg = np.asarray(log_gamma_on, dtype=float)
    beta = np.array(beta0, dtype=float)

    def at(bsel: _Batch, lgs: np.ndarray, b: np.ndarray):
        x = np.stack([(lgs + b) / 2.0, b], axis=1)  # log A = (log γ + log N0)/2
        ll, g, h = _evaluate(bsel, x, True)
        # chain rule to (log γ, log N0)
        d_b = 0.5 * g[:, 0] + g[:, 1]
        h_bb = 0.25 * h[:, 0, 0] + h[:, 0, 1] + h[:, 1, 1]
        h_gb = 0.25 * h[:, 0, 0] + 0.5 * h[:, 0, 1]
        return ll, d_b, h_bb, 0.5 * g[:, 0], h_gb

    ll, g, h, slope, h_gb = at(batch, lg, beta)
    active = np.arange(batch.size)
    for _ in range(50):
        gs, hs = g[active], h[active]
        step = np.where(hs < 0, -gs / np.where(hs < 0, hs, -1.0), np.copysign(0.5, gs))
        step = np.clip(step, -2.0, 2.0)
        keep = np.abs(step * gs) >= _NEWTON_TOL
        active, step = active[keep], step[keep]
        if not active.size:
            break
        t = np.ones(len(active))
        pending = np.arange(len(active))
        moved = np.zeros(len(active), dtype=bool)
        while pending.size:
            idx = active[pending]
            b_new = beta[idx] + t[pending] * step[pending]
            out = at(batch.take(idx), lg[idx], b_new)
            ok = out[0] >= ll[idx]
            acc = idx[ok]
            beta[acc] = b_new[ok]
            ll[acc], g[acc], h[acc], slope[acc], h_gb[acc] = (o[ok] for o in out)
            moved[pending[ok]] = True
            pending = pending[~ok]
            t[pending] *= 0.5
            pending = pending[t[pending] > 1e-8]
        active = active[moved]
    dbeta = np.where(h < 0, -h_gb / np.where(h < 0, h, -1.0), 0.0)
    return ll, beta, slope, dbeta


def _profile_roots(
    batch: _Batch,
    target: np.ndarray,
    inner: np.ndarray,
    inner_beta: np.ndarray,
    inner_dbeta: np.ndarray,
    sign: float,
    step: np.ndarray,
    growth: float,
    max_steps: int,
    xtol: float,
) -> np.ndarray:
    """log γ where the profile log-likelihood falls to ``target``, outward from ``inner``.

    ℓ_p(inner) > target is given. Safeguarded Newton on ℓ_p(log γ) − target with its exact
    slope (see :func:`_profile`): a Newton step is taken when it stays inside the bracket
    found so far, else the bracket is bisected, or, before an outer point is found, the trial
    moves out by ``step`` (times ``growth`` each time). NaN where no outer point lies within
    ``max_steps`` such moves (the end cannot be bracketed) or the search does not settle.
    """
    k = batch.size
    lo_in = inner.astype(float).copy()
    out = np.full(k, math.nan)
    step = step.astype(float).copy()
    reach = lo_in + sign * step
    n_moves = np.ones(k, dtype=int)
    trial = reach.copy()
    beta = inner_beta + inner_dbeta * (trial - lo_in)
    root = np.full(k, math.nan)
    active = np.arange(k)
    for _ in range(60):
        if not active.size:
            break
        ll, b_hat, slope, dbeta = _profile(batch.take(active), trial[active], beta[active])
        f = ll - target[active]
        c = trial[active]
        inside = f > 0
        lo_in[active[inside]] = c[inside]
        out[active[~inside]] = c[~inside]
        with np.errstate(divide="ignore", invalid="ignore"):
            newton = c - f / slope
        good_slope = sign * slope < 0
        newton_step = np.abs(newton - c)
        have_out = np.isfinite(out[active])
        lo, hi = np.minimum(lo_in[active], out[active]), np.maximum(lo_in[active], out[active])
        in_bracket = np.where(have_out, (newton > lo) & (newton < hi), sign * (newton - c) > 0)
        in_bracket &= good_slope & np.isfinite(newton)
        width = np.where(have_out, np.abs(out[active] - lo_in[active]), math.inf)
        done = (in_bracket & (newton_step < xtol)) | (width < xtol)
        root[active[done]] = np.where(in_bracket[done], newton[done], c[done])
        # next trial
        nxt = np.where(in_bracket, newton, 0.5 * (lo_in[active] + out[active]))
        # before an outer point is known, a trial never goes beyond the next outward move
        beyond = sign * (newton - reach[active]) > 0
        grow = ~have_out & (~in_bracket | beyond)
        sel = active[grow]
        step[sel] *= growth
        reach[sel] += sign * step[sel]
        n_moves[sel] += 1
        nxt[grow] = np.where(
            in_bracket[grow] & ~(sign * (newton[grow] - reach[sel]) > 0), newton[grow], reach[sel]
        )
        beta[active] = b_hat + dbeta * (nxt - c)
        trial[active] = nxt
        lost = n_moves[active] > max_steps
        active = active[~done & ~lost]
    return root


def _profile_intervals_db(
    batch: _Batch,
    ll_hat: np.ndarray,
    x: np.ndarray,
    hess: np.ndarray,
    var_log_gamma: np.ndarray,
    energy_weight: np.ndarray,
) -> np.ndarray:
    """95 % profile-likelihood intervals of Es/N0 [dB]: 2·(ℓ̂ − ℓ_p(γ)) = χ²₁(0.95) = 3.841.

    Near 0 dB the likelihood in log γ is skewed (a weak signal and a small rise of N0 look
    alike), so the Wald interval under-covers; the profile interval follows the actual
    shape. Each end is found outward from the optimum, starting at the Wald end (see
    :func:`_profile_roots`, to 1e-4 in log γ, 4e-4 dB). NaN where an end cannot be
    bracketed (the Wald interval is then used). Shape (B, 2).
    """
    lg_hat = _log_gamma(x)  # log γ_on = 2·log A − log N0
    target = ll_hat - 0.5 * _CHI2_1_Q95
    # path of the profiled log N0 at the optimum (implicit-function theorem)
    h_bb = 0.25 * hess[:, 0, 0] + hess[:, 0, 1] + hess[:, 1, 1]
    h_gb = 0.25 * hess[:, 0, 0] + 0.5 * hess[:, 0, 1]
    dbeta = np.where(h_bb < 0, -h_gb / np.where(h_bb < 0, h_bb, -1.0), 0.0)
    step = np.maximum(_Z975 * np.sqrt(var_log_gamma), 1e-3)
    ends = [
        _profile_roots(batch, target, lg_hat, x[:, 1], dbeta, sign, step, 1.5, 8, 1e-4)
        for sign in (-1.0, 1.0)
    ]
    shift = _db_array(energy_weight)
    return np.stack([10.0 / math.log(10.0) * e + shift for e in ends], axis=1)


def _upper_bounds_db(
    batch: _Batch, ll_max: np.ndarray, x: np.ndarray, energy_weight: np.ndarray
) -> np.ndarray:
    """One-sided 95 % upper bounds on Es/N0 (dB) by profile likelihood: 2·(ℓmax − ℓp) = 2.706.

    Searched upward from max(γ̂, 1e-4) in steps of 0.5 in log γ (at most 40); NaN if not
    bracketed there.
    """
    lo = np.maximum(_log_gamma(x), math.log(1e-4))
    target = ll_max - 0.5 * _CHI2_1_Q90
    ll, beta, _, dbeta = _profile(batch, lo, x[:, 1])
    out = np.where(ll < target, lo, math.nan)
    idx = np.flatnonzero(~(ll < target))
    if idx.size:
        out[idx] = _profile_roots(
            batch.take(idx),
            target[idx],
            lo[idx],
            beta[idx],
            dbeta[idx],
            1.0,
            np.full(idx.size, 0.5),
            1.0,
            40,
            1e-4,
        )
    return _db_array(energy_weight * np.exp(out))
