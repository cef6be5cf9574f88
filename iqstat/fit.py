"""Noncoherent Es/N0 estimation from the outputs of a quadrature correlator bank.

The input is one complex correlator output per symbol and branch, ``z[k, i]`` (shape
``(n_symbols, n_branches)``), each branch correlating with a unit-energy template of tone ``i``
(one branch for OOK). With the tone sent unknown, its phase unknown and uniform, and white
Gaussian noise, the outputs follow (docs/estimator.md derives all of this)::

    z = A·e^{jθ}·r_i + n,    r_i = column i of the template Gram matrix R,    n ~ CN(0, N0·R)

and, averaged over θ, ``p(z | i) ∝ N0^{-M} exp(-zᴴR⁻¹z / N0) · exp(-A²/N0) · I0(2A|z_i| / N0)``.

Three estimators of ``Es/N0`` are offered:

* :func:`fit_nda` — non-data-aided maximum likelihood on the mixture over the symbol sent. Decision
  errors are part of the model, so it stays unbiased where hard decisions err (down to 0 dB
  and below). This is the headline estimator.
* :func:`fit_da` — data-aided maximum likelihood with the symbols known (preamble, sync word,
  or a pattern the checker has locked to).
* :func:`fit_dd` — decision-directed moments (largest branch = signal). Biased high at low
  Es/N0; kept only to show how much the naive estimate is off.

Each returns a frozen :class:`NoncoherentFit` that carries its own health: convergence, a
message, the symbol count, a 95 % interval, and a goodness-of-fit test of the branch energies
against the fitted noncentral/central chi-square laws.

The module is a pure array core: no I/O, nothing computed at import time.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, replace
from typing import Literal

import numpy as np
from scipy import optimize, special

from iqstat.errors import ParameterError

Modulation = Literal["2fsk", "4fsk", "ook"]
FitMethod = Literal["nda-ml", "da-ml", "dd-moment"]

#: Correlator branches per modulation (OOK: one envelope branch at the carrier).
N_BRANCHES: dict[str, int] = {"2fsk": 2, "4fsk": 4, "ook": 1}
#: Hypotheses per symbol (OOK: 0 = off, 1 = on).
N_HYPOTHESES: dict[str, int] = {"2fsk": 2, "4fsk": 4, "ook": 2}
#: Bits carried by one symbol.
BITS_PER_SYMBOL: dict[str, int] = {"2fsk": 1, "4fsk": 2, "ook": 1}

#: Fewer symbols than this and no estimate is attempted.
MIN_SYMBOLS = 20
#: An Es/N0 above this (dB) is not plausible for a correlator output: flagged.
MAX_PLAUSIBLE_ESN0_DB = 60.0
#: Template Gram matrices worse conditioned than this cannot separate the tones.
MAX_GRAM_CONDITION = 1e6
#: At most this many energies enter the goodness-of-fit test (a fixed-seed subsample).
GOF_MAX_VALUES = 20000
#: Symbols used by the Newton iterations before the final polish on all symbols.
_SUBSAMPLE_SYMBOLS = 20000

_GOF_SEED = 20261202
_Z975 = 1.959963984540054  # scipy.stats.norm.ppf(0.975)
# chi2(1).ppf(0.90): 2·Δℓ for a one-sided 95 % bound, and the 5 % critical value of the
# likelihood-ratio test of A = 0, a parameter on the boundary (50:50 mixture of chi2_0 and
# chi2_1; Self & Liang, J. Amer. Statist. Assoc. 82(398):605-610, 1987).
_CHI2_1_Q90 = 2.705543454095404
_CHI2_1_Q95 = 3.841458820694124  # chi2(1).ppf(0.95): the two-sided 95 % profile interval
_LOG_GAMMA_FLOOR = math.log(1e-4)  # γ below this (−40 dB) is taken as the boundary A = 0
_NEWTON_TOL = 1e-9  # Newton decrement (log-likelihood units) at which we stop
_MAX_NEWTON = 100


# --------------------------------------------------------------------------------------------
# Special functions
# --------------------------------------------------------------------------------------------


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


# --------------------------------------------------------------------------------------------
# Result
# --------------------------------------------------------------------------------------------


def _finite_or_none(v: float | None) -> float | None:
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


@dataclass(frozen=True)
class NoncoherentFit:
    """An Es/N0 estimate from correlator outputs, with its health.

    Attributes
    ----------
    method : str
        ``"nda-ml"``, ``"da-ml"`` or ``"dd-moment"``.
    modulation : str
        ``"2fsk"``, ``"4fsk"`` or ``"ook"``.
    esn0, esn0_db : float or None
        Es/N0, linear and dB. OOK: average energy per symbol, ``p_on·A²/N0``.
    esn0_db_ci95 : (float, float) or None
        95 % interval of Es/N0 in dB (see ``ci_method``).
    esn0_db_upper95 : float or None
        One-sided 95 % upper bound (dB) when no signal was detected, else None.
    ebn0_db, ebn0_db_ci95 : float, (float, float) or None
        The same per bit: Es/N0 − 10·log10(bits per symbol).
    amplitude : float or None
        A = √E of the matched branch ("on" amplitude for OOK).
    noise_var : float or None
        N0 = E|n|² at the correlator output.
    priors : tuple of float
        Hypothesis priors used (FSK: one per tone; OOK: (p_off, p_on)).
    n_symbols : int
        Symbols the estimate uses.
    converged : bool
        True when the optimiser converged to an interior, plausible estimate with the signal
        significantly present.
    message : str
        What happened, in one line.
    iterations : int
        Optimiser iterations (Newton steps; hard-decision rounds for DD OOK; 0 for DD FSK).
    log_likelihood : float or None
        Log density of z at the estimate (nats, all constants included); None for DD.
    detection_statistic : float or None
        2·(ℓ̂ − ℓ₀), the likelihood ratio against "noise only"; None for DD.
    ci_method : str
        How the interval was made (``"profile-likelihood"`` below 6 dB,
        ``"wald-log-observed-info"``, or ``"none"``).
    gof_statistic, gof_pvalue : float or None
        Kolmogorov–Smirnov statistic and p-value of the probability-integral transforms.
    gof_test : str
        ``"ks-pit-branchwise"`` (see :func:`check_energy_laws`), ``"none"`` if not run.
    gof_n_values : int
        Energies that entered the test.
    """

    method: str
    modulation: str
    esn0: float | None
    esn0_db: float | None
    esn0_db_ci95: tuple[float, float] | None
    esn0_db_upper95: float | None
    ebn0_db: float | None
    ebn0_db_ci95: tuple[float, float] | None
    amplitude: float | None
    noise_var: float | None
    priors: tuple[float, ...]
    n_symbols: int
    converged: bool
    message: str
    iterations: int
    log_likelihood: float | None
    detection_statistic: float | None
    ci_method: str
    gof_statistic: float | None
    gof_pvalue: float | None
    gof_test: str
    gof_n_values: int

    def to_dict(self) -> dict:
        """JSON-safe dictionary: floats or None (never NaN), lists for tuples."""
        out = {}
        for key, value in asdict(self).items():
            if isinstance(value, (tuple, list)):
                items = [_finite_or_none(v) for v in value]
                out[key] = None if any(v is None for v in items) else items
            elif isinstance(value, bool) or value is None or isinstance(value, str):
                out[key] = value
            elif isinstance(value, (int, np.integer)):
                out[key] = int(value)
            else:
                out[key] = _finite_or_none(value)
        return out


# --------------------------------------------------------------------------------------------
# Input checks
# --------------------------------------------------------------------------------------------


def _check_modulation(modulation: str) -> str:
    if modulation not in N_BRANCHES:
        raise ParameterError(
            f"modulation {modulation!r} is not known; choose one of {', '.join(N_BRANCHES)}"
        )
    return modulation


def _check_outputs(z: np.ndarray, modulation: str) -> np.ndarray:
    """z as complex128 (n_symbols, n_branches); raises ParameterError on bad shape or values."""
    m = N_BRANCHES[modulation]
    try:
        arr = np.asarray(z)
    except Exception as exc:  # pragma: no cover - numpy raises many types here
        raise ParameterError(
            f"z could not be read as an array ({exc}); pass a numpy array"
        ) from None
    if arr.dtype.kind not in "biufc":
        raise ParameterError(
            f"z has dtype {arr.dtype}; pass complex correlator outputs of shape (n_symbols, {m})"
        )
    if modulation == "ook" and arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[1] != m:
        raise ParameterError(
            f"z has shape {arr.shape} but {modulation} needs (n_symbols, {m}): one column per "
            f"correlator branch"
        )
    arr = arr.astype(np.complex128, copy=False)
    bad = ~np.isfinite(arr)
    if np.any(bad):
        raise ParameterError(
            f"z contains {int(bad.sum())} non-finite values (NaN or inf) in "
            f"{int(bad.any(axis=1).sum())} symbols; drop those symbols before fitting"
        )
    return arr


def _check_gram(gram: np.ndarray | None, m: int) -> tuple[np.ndarray, bool]:
    """The Gram matrix as complex (m, m) and whether it is the identity."""
    if gram is None:
        return np.eye(m, dtype=complex), True
    r = np.asarray(gram)
    if r.dtype.kind not in "biufc" or r.shape != (m, m):
        raise ParameterError(
            f"gram has shape {r.shape} and dtype {r.dtype}; pass a ({m}, {m}) complex Hermitian "
            f"matrix of template correlations (identity for orthogonal tones)"
        )
    r = r.astype(complex)
    if not np.all(np.isfinite(r)):
        raise ParameterError("gram contains NaN or inf; pass finite template correlations")
    if np.max(np.abs(r - r.conj().T)) > 1e-8:
        raise ParameterError(
            "gram is not Hermitian (R[i, j] must equal conj(R[j, i])); "
            "rebuild it from the templates"
        )
    diag = np.real(np.diag(r))
    if np.max(np.abs(diag - 1.0)) > 1e-6:
        raise ParameterError(
            f"gram diagonal is {np.round(diag, 6).tolist()} but unit-energy templates give 1; "
            f"normalise the templates"
        )
    eig = np.linalg.eigvalsh(r)
    if eig[0] <= 0 or eig[-1] / eig[0] > MAX_GRAM_CONDITION:
        cond = math.inf if eig[0] <= 0 else eig[-1] / eig[0]
        raise ParameterError(
            f"gram has condition number {cond:.3g} (> {MAX_GRAM_CONDITION:.0e}): the tones are too "
            f"close to separate; check the tone spacing or the symbol length"
        )
    identity = bool(np.max(np.abs(r - np.eye(m))) < 1e-12)
    return r, identity


def _check_priors(priors: Sequence[float] | None, modulation: str) -> np.ndarray:
    h = N_HYPOTHESES[modulation]
    if priors is None:
        return np.full(h, 1.0 / h)
    p = np.asarray(priors, dtype=float).ravel()
    what = "(p_off, p_on)" if modulation == "ook" else f"one probability per tone ({h})"
    if p.shape != (h,) or not np.all(np.isfinite(p)) or np.any(p <= 0) or np.any(p >= 1):
        raise ParameterError(
            f"priors {list(np.round(p, 6))} are not valid for {modulation}; give {what}, each "
            f"strictly between 0 and 1"
        )
    if abs(p.sum() - 1.0) > 1e-6:
        raise ParameterError(f"priors {p.tolist()} sum to {p.sum():.6g}; they must sum to 1")
    return p / p.sum()


def _whitened_energy(z: np.ndarray, gram: np.ndarray, identity: bool) -> np.ndarray:
    """q_k = z_kᴴ R⁻¹ z_k, shape (n_symbols,), E[q] = M·N0 + A² (docs/estimator.md eq. 4)."""
    if identity:
        return np.sum(z.real**2 + z.imag**2, axis=1)
    rinv = np.linalg.inv(gram)
    rz = z @ rinv.T  # (R⁻¹z_k)ᵀ per row; einsum with optimize=True cost 0.15 ms of planning
    q = np.sum(z.real * rz.real + z.imag * rz.imag, axis=1)  # Re(z_kᴴ·R⁻¹z_k)
    return np.maximum(q, 0.0)


def _scaled(z: np.ndarray) -> tuple[np.ndarray, float]:
    """z divided by its largest component magnitude (1 if all zero): no overflow in |z|²."""
    scale = float(max(np.max(np.abs(z.real), initial=0.0), np.max(np.abs(z.imag), initial=0.0)))
    return (z / scale, scale) if scale > 0 else (z, 0.0)


def _unscaled(fit: NoncoherentFit, scale: float) -> NoncoherentFit:
    """Undo :func:`_scaled`: A·s, N0·s², log-density − 2·N·M·log s (Jacobian of z/s)."""
    if scale == 1.0:
        return fit
    ll = fit.log_likelihood
    if ll is not None:
        ll = ll - 2.0 * fit.n_symbols * N_BRANCHES[fit.modulation] * math.log(scale)
    return replace(
        fit,
        amplitude=None if fit.amplitude is None else fit.amplitude * scale,
        noise_var=None if fit.noise_var is None else _finite_or_none(fit.noise_var * scale**2),
        log_likelihood=_finite_or_none(ll),
    )


def _failed_fit(method: str, modulation: str, n: int, priors, message: str) -> NoncoherentFit:
    """A fit that could not be made: no estimate, the reason in ``message``."""
    return _build(
        method=method,
        modulation=modulation,
        n_symbols=n,
        esn0=None,
        log_gamma_var=None,
        amplitude=None,
        noise_var=None,
        priors=priors,
        converged=False,
        message=message,
        iterations=0,
        log_likelihood=None,
        detection_statistic=None,
        upper95_db=None,
        gof=None,
    )


def _no_energy(method: str, modulation: str, n: int, priors: np.ndarray) -> NoncoherentFit:
    return _failed_fit(
        method,
        modulation,
        n,
        priors,
        "z is zero in every symbol and branch: no signal and no noise to measure",
    )


# --------------------------------------------------------------------------------------------
# The likelihood and its maximisation
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Mixture:
    """The log-likelihood ℓ = Σ_k [−M·log N0 − q_k/N0] + Σ_rows (signal term), two kinds.

    ``"tones"``: each row k (a column of ``r``, which is stored hypothesis-major so that the
    sums over hypotheses run across contiguous rows) is one symbol with the signal on one of H
    hypotheses, log Σ_h π_h·Λ(r_hk), Λ(r) = exp(−A²/N0)·I0(2A·r/N0) (NDA FSK: H = M; DA:
    H = 1, one row per symbol that carries signal). ``"on-off"``: OOK NDA,
    log[(1 − p) + p·Λ(r_k)] per symbol.
    """

    kind: Literal["tones", "on-off"]
    r: np.ndarray  # (H, rows) envelopes |z| of the branch each hypothesis is matched to
    log_prior: np.ndarray  # (H,) for "tones"
    q: np.ndarray  # (N,) whitened energies
    n_dims: int  # M, complex dimensions of z
    p_on: float  # "on-off" with p_on fixed
    p_on_free: bool  # "on-off" with p_on a third parameter, logit(p_on)

    def subsample(self, n: int) -> _Mixture:
        """Every k-th symbol (NDA only, where rows are symbols)."""
        step = max(1, len(self.q) // n)
        return _Mixture(
            self.kind,
            self.r[:, ::step],
            self.log_prior,
            self.q[::step],
            self.n_dims,
            self.p_on,
            self.p_on_free,
        )


def _p_on(mix: _Mixture, x: np.ndarray) -> float:
    return float(special.expit(x[2])) if mix.p_on_free else mix.p_on


_BLOCK_VALUES = 32768  # envelopes per block: keeps the temporaries in cache (2-3x faster)


def _signal_sums(mix: _Mixture, a_over: float, g: float, p: float, derivatives: bool):
    """Block-wise sums over symbols of the signal part of ℓ and of the posterior moments.

    ``a_over`` = 2A/N0 (u = a_over·r), ``g`` = A²/N0, ``p`` = p_on ("on-off"). Returns a
    vector: "tones" [Σ log Σ_h π_h Λ, Σ E_w ψ, Σ Var_w ψ, Σ E_w κ]; "on-off" [Σ log(1 − p + pΛ),
    Σ w, Σ wψ, Σ wκ, Σ v, Σ vψ, Σ vψ²] with w the posterior of "on" and v = w(1 − w).
    """
    h, rows = mix.r.shape
    step = max(1, _BLOCK_VALUES // h)
    acc = np.zeros(7 if mix.kind == "on-off" else 4)
    log_q, log_p = (math.log1p(-p), math.log(p)) if mix.kind == "on-off" else (0.0, 0.0)
    for i in range(0, rows, step):  # blocks of thousands of symbols, not one per symbol
        u = a_over * mix.r[:, i : i + step]
        i0e_u = special.i0e(u)
        lik = _log_i0(u, i0e_u)
        lik -= g  # log Λ = −A²/N0 + log I0(u)  (eq. 3)
        if mix.kind == "on-off":
            lik = lik[0] + log_p
            lse = np.logaddexp(log_q, lik)  # log[(1 − p) + p·Λ]
            acc[0] += lse.sum()
            if not derivatives:
                continue
            w = np.exp(lik - lse)
            psi = u[0] * (special.i1e(u[0]) / i0e_u[0])
            kappa = u[0] ** 2 - psi**2
            v = w * (1.0 - w)
            vpsi = v * psi
            # (a * b).sum(), not a @ b: BLAS dot products spawn threads and were 20x slower
            acc[1:] += (
                w.sum(),
                (w * psi).sum(),
                (w * kappa).sum(),
                v.sum(),
                vpsi.sum(),
                (vpsi * psi).sum(),
            )
            continue
        lik += mix.log_prior[:, None]
        top = lik.max(axis=0)
        e = np.exp(lik - top)
        tot = e.sum(axis=0)
        acc[0] += np.sum(top + np.log(tot))
        if not derivatives:
            continue
        e /= tot  # posterior weights w
        psi = special.i1e(u)
        psi /= i0e_u
        psi *= u  # ψ = u·I1/I0
        wpsi = e * psi
        e_psi = wpsi.sum(axis=0)
        wpsi *= psi
        u *= u
        u -= psi * psi  # κ = u² − ψ² = u²(1 − ρ²)
        u *= e
        acc[1:] += (e_psi.sum(), wpsi.sum() - (e_psi * e_psi).sum(), u.sum())
    return acc


def _evaluate(mix: _Mixture, x: np.ndarray, derivatives: bool):
    """ℓ(x) and, if asked, its gradient and Hessian in x = (log A, log N0[, logit p_on]).

    With γ = A²/N0, u = 2A·r/N0, ρ = I1(u)/I0(u), ψ = uρ, κ = u²(1 − ρ²) (docs/estimator.md
    §4): ∂logΛ/∂logA = ψ − 2γ, ∂logΛ/∂logN0 = γ − ψ, since dψ/du = u(1 − ρ²), and the
    Hessian of a log-mixture is E_w[∂²] + Cov_w[∂] over the posterior weights w.
    """
    alpha, beta = float(x[0]), float(x[1])
    a, n0 = math.exp(alpha), math.exp(beta)
    g = a * a / n0
    p = _p_on(mix, x) if mix.kind == "on-off" else math.nan
    acc = _signal_sums(mix, 2.0 * a / n0, g, p, derivatives)
    n, m = len(mix.q), mix.n_dims
    q_sum = float(mix.q.sum())
    ll = -n * m * beta - q_sum / n0 + float(acc[0])  # Σ[−M·log N0 − q/N0] + signal part
    if not derivatives:
        return ll, None, None
    if mix.kind == "tones":
        _, s_psi, var_psi, k_sum = acc
        rows = mix.r.shape[1]
        grad = np.array([s_psi - 2.0 * g * rows, -n * m + q_sum / n0 + g * rows - s_psi])
        h00 = k_sum - 4.0 * g * rows + var_psi
        h01 = 2.0 * g * rows - k_sum - var_psi
        h11 = k_sum - g * rows + var_psi - q_sum / n0
        return ll, grad, np.array([[h00, h01], [h01, h11]])
    _, sw, swp, swk, sv, svp, svpp = acc
    # d0 = ψ − 2γ, d1 = γ − ψ on "on"; Cov_w over the on/off indicator is v·d·dᵀ
    grad = [swp - 2.0 * g * sw, -n * m + q_sum / n0 + g * sw - swp]
    h00 = swk - 4.0 * g * sw + (svpp - 4.0 * g * svp + 4.0 * g * g * sv)
    h01 = 2.0 * g * sw - swk + (-svpp + 3.0 * g * svp - 2.0 * g * g * sv)
    h11 = swk - g * sw + (svpp - 2.0 * g * svp + g * g * sv) - q_sum / n0
    if not mix.p_on_free:
        return ll, np.array(grad), np.array([[h00, h01], [h01, h11]])
    grad.append(sw - n * p)  # ∂log π_h/∂logit p = s_h − p
    h02, h12 = svp - 2.0 * g * sv, g * sv - svp
    h22 = sv - n * p * (1.0 - p)
    return ll, np.array(grad), np.array([[h00, h01, h02], [h01, h11, h12], [h02, h12, h22]])


def _newton_step(grad: np.ndarray, hess: np.ndarray) -> np.ndarray:
    """Ascent step: Newton where −H is positive definite, else eigenvalue-modified Newton."""
    lam, vec = np.linalg.eigh(-hess)
    floor = 1e-8 * max(1.0, float(np.max(np.abs(lam))))
    lam = np.maximum(np.abs(lam), floor)
    step = vec @ ((vec.T @ grad) / lam)
    big = float(np.max(np.abs(step)))
    if big > 2.0:  # never move A or N0 by more than e² in one step
        step *= 2.0 / big
    return step


@dataclass(frozen=True)
class _Optimum:
    x: np.ndarray
    ll: float
    grad: np.ndarray
    hess: np.ndarray
    iterations: int
    converged: bool
    boundary: bool
    message: str


def _log_gamma(x: np.ndarray) -> float:
    """log(A²/N0) from x = (log A, log N0, ...)."""
    return 2.0 * float(x[0]) - float(x[1])


def _maximise(mix: _Mixture, x0: np.ndarray, tol: float = _NEWTON_TOL) -> _Optimum:
    """Damped Newton ascent with backtracking; stops at A → 0 (the boundary)."""
    x = np.array(x0, dtype=float)
    ll, grad, hess = _evaluate(mix, x, True)
    for it in range(_MAX_NEWTON):
        step = _newton_step(grad, hess)
        decrement = float(grad @ step)
        if decrement < tol:
            return _Optimum(x, ll, grad, hess, it, True, False, "converged")
        t = 1.0
        while True:
            x_new = x + t * step
            ll_new, g_new, h_new = _evaluate(mix, x_new, True)
            if np.isfinite(ll_new) and ll_new >= ll + 1e-4 * t * decrement:
                break
            t *= 0.5
            if t < 1e-8:
                return _Optimum(
                    x,
                    ll,
                    grad,
                    hess,
                    it,
                    decrement < 1e-6,
                    False,
                    "line search failed to increase the likelihood",
                )
        x, ll, grad, hess = x_new, ll_new, g_new, h_new
        if _log_gamma(x) < _LOG_GAMMA_FLOOR:
            return _Optimum(
                x,
                ll,
                grad,
                hess,
                it + 1,
                False,
                True,
                "the likelihood is largest at A = 0 (no signal)",
            )
    return _Optimum(
        x,
        ll,
        grad,
        hess,
        _MAX_NEWTON,
        False,
        False,
        f"no convergence in {_MAX_NEWTON} Newton iterations",
    )


#: Below this Es/N0 [dB] the interval is the profile-likelihood one (the Wald one above).
PROFILE_CI_BELOW_DB = 6.0


def _profile_log_likelihood(
    mix: _Mixture, log_gamma_on: float, beta0: float
) -> tuple[float, float]:
    """max over log N0 of ℓ with γ_on = A²/N0 held fixed (p_on fixed). Returns (ℓ, log N0)."""
    beta = beta0

    def at(b: float):
        x = np.array([(log_gamma_on + b) / 2.0, b])
        ll, g, h = _evaluate(mix, x, True)
        # chain rule: log A = (log γ + log N0)/2
        return ll, 0.5 * g[0] + g[1], 0.25 * h[0, 0] + h[0, 1] + h[1, 1]

    ll, g, h = at(beta)
    for _ in range(50):
        step = -g / h if h < 0 else math.copysign(0.5, g)
        step = max(-2.0, min(2.0, step))
        if abs(step * g) < _NEWTON_TOL:
            break
        t = 1.0
        while t > 1e-8:
            ll_new, g_new, h_new = at(beta + t * step)
            if ll_new >= ll:
                break
            t *= 0.5
        else:
            break
        beta, ll, g, h = beta + t * step, ll_new, g_new, h_new
    return ll, beta


# --------------------------------------------------------------------------------------------
# Decision-directed moments (also the starting point of the ML fits)
# --------------------------------------------------------------------------------------------


def ook_decision_threshold(amplitude: float, noise_var: float, p_on: float = 0.5) -> float:
    """Envelope threshold |z| that minimises the OOK error probability of the fitted model.

    Parameters
    ----------
    amplitude : float
        A, the "on" amplitude at the correlator output (same units as |z|).
    noise_var : float
        N0 = E|n|² at the correlator output.
    p_on : float
        Prior probability of "on", 0 < p_on < 1.

    Returns
    -------
    float
        r_t: decide "on" where |z| > r_t. 0 when "on" always wins.

    Notes
    -----
    The weighted likelihoods cross where p·e^{−A²/N0}·I0(2A·r/N0) = 1 − p (eq. 1). Solved in
    the log domain, log I0(u) = A²/N0 + log((1−p)/p), u = 2A·r/N0, with Brent's method. With
    σ² = N0/2 per dimension this is b = r/σ of [1] (optimum b: 10 dB → 3.55271, METHODS §1).

    References
    ----------
    .. [1] A. Annamalai, V. K. Bhargava, IEEE Trans. Commun. 47(9):1293, 1999.
    """
    a = float(amplitude)
    n0 = float(noise_var)
    p = float(p_on)
    if not (math.isfinite(a) and a > 0):
        raise ParameterError(f"amplitude {amplitude!r} must be a positive finite number")
    if not (math.isfinite(n0) and n0 > 0):
        raise ParameterError(f"noise_var {noise_var!r} must be a positive finite number")
    if not (0.0 < p < 1.0):
        raise ParameterError(f"p_on {p_on!r} must lie strictly between 0 and 1")
    c = a * a / n0 + math.log((1.0 - p) / p)  # eq. 1 in the log domain
    if c <= 0.0:
        return 0.0

    def f(u: float) -> float:
        return float(_log_i0(np.array([u]))[0]) - c

    hi = c + 0.5 * math.log(2.0 * math.pi * (c + 1.0)) + 2.0  # log I0(u) > u − ½log(2πu) − …
    while f(hi) < 0.0:
        hi *= 2.0
    u = optimize.brentq(f, 0.0, hi, xtol=1e-14, rtol=1e-14)
    return u * n0 / (2.0 * a)


def _dd_fsk(z: np.ndarray, q: np.ndarray) -> tuple[float, float, np.ndarray]:
    """DD moments: (A², N0, decisions). E|z_î|² = A² + N0, E[q] = M·N0 + A² (correct decisions)."""
    m = z.shape[1]
    energy = z.real**2 + z.imag**2
    sym = np.argmax(energy, axis=1)
    m1 = float(np.mean(energy[np.arange(len(sym)), sym]))
    n0 = (float(np.mean(q)) - m1) / (m - 1)
    return m1 - n0, n0, sym


def _dd_ook(z: np.ndarray, max_rounds: int = 50) -> tuple[float, float, float, np.ndarray, int]:
    """Hard-decision rounds: split energies at the model's optimum threshold, re-estimate.

    Returns (A², N0, p_on, decisions, rounds); A² is NaN when the split degenerates.
    """
    x = z[:, 0].real ** 2 + z[:, 0].imag ** 2
    thr = float(np.mean(x))
    on = x > thr
    a2 = n0 = p = math.nan
    for k in range(1, max_rounds + 1):
        if on.all() or not on.any():
            return math.nan, math.nan, math.nan, on.astype(int), k
        n0 = float(np.mean(x[~on]))
        a2 = float(np.mean(x[on])) - n0
        p = float(np.mean(on))
        if not a2 > 0:
            return math.nan, n0, p, on.astype(int), k
        thr = ook_decision_threshold(math.sqrt(a2), n0, p) ** 2
        new_on = x > thr
        if np.array_equal(new_on, on):
            return a2, n0, p, on.astype(int), k
        on = new_on
    return a2, n0, p, on.astype(int), max_rounds


# --------------------------------------------------------------------------------------------
# Energy laws and the goodness-of-fit test
# --------------------------------------------------------------------------------------------


def _noncentrality(amplitude: float, noise_var: float, gram: np.ndarray, modulation: str):
    """λ[h, j] = 2A²|R_j,b(h)|²·s_h/N0 for hypothesis h and branch j (eq. 6), and s_h."""
    g = amplitude * amplitude / noise_var
    if modulation == "ook":
        return np.array([[0.0], [2.0 * g]])
    return 2.0 * g * np.abs(gram.T) ** 2  # row h = tone sent, column j = branch


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


def branch_energy_cdf(
    energy: np.ndarray,
    *,
    amplitude: float,
    noise_var: float,
    gram: np.ndarray | None = None,
    modulation: Modulation,
    priors: Sequence[float] | None = None,
    symbols: np.ndarray | None = None,
) -> np.ndarray:
    """Fitted CDF of every branch energy |z_kj|².

    Parameters
    ----------
    energy : ndarray, shape (n_symbols, n_branches)
        Branch energies |z|² (same units as N0).
    amplitude, noise_var : float
        A and N0 of the fit (A = 0 allowed: noise only).
    gram : ndarray, shape (n_branches, n_branches), optional
        Template Gram matrix; identity if omitted.
    modulation : {"2fsk", "4fsk", "ook"}
    priors : sequence of float, optional
        Hypothesis priors (FSK: per tone; OOK: (p_off, p_on)); uniform if omitted.
    symbols : ndarray of int, shape (n_symbols,), optional
        Known hypothesis per symbol: the conditional CDF instead of the marginal.

    Returns
    -------
    ndarray, shape (n_symbols, n_branches)
        F_j(|z_kj|²) in [0, 1].

    Notes
    -----
    Given hypothesis h, |z_j|² / (N0/2) is noncentral chi-square with 2 degrees of freedom and
    λ = 2A²|ρ_jh|²/N0, ρ_jh = R[j, h] (central, i.e. exponential of mean N0, when ρ = 0) [1].
    The marginal is F_j(x) = Σ_h π_h F(x; λ_hj) (docs/estimator.md eq. 6).

    References
    ----------
    .. [1] J. G. Proakis, M. Salehi, Digital Communications, 5th ed., §4.5 (from memory).
    """
    _check_modulation(modulation)
    m = N_BRANCHES[modulation]
    x = np.asarray(energy, dtype=float)
    if modulation == "ook" and x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2 or x.shape[1] != m:
        raise ParameterError(f"energy has shape {x.shape}; {modulation} needs (n_symbols, {m})")
    if not (math.isfinite(noise_var) and noise_var > 0):
        raise ParameterError(f"noise_var {noise_var!r} must be a positive finite number")
    if not (math.isfinite(amplitude) and amplitude >= 0):
        raise ParameterError(f"amplitude {amplitude!r} must be a finite number >= 0")
    r, _ = _check_gram(gram if modulation != "ook" else None, m)
    pi = _check_priors(priors, modulation)
    lam = _noncentrality(amplitude, noise_var, r, modulation)
    y = x / (0.5 * noise_var)
    out = np.zeros_like(y)
    for j in range(m):  # loop over branches and hypotheses (≤ 4 × 4), vectorised over symbols
        if symbols is None:
            for h in range(len(pi)):
                out[:, j] += pi[h] * _chi2_2_cdf(y[:, j], lam[h, j])
        else:
            sym = np.asarray(symbols)
            for h in np.unique(sym):
                sel = sym == h
                out[sel, j] = _chi2_2_cdf(y[sel, j], lam[h, j])
    return np.clip(out, 0.0, 1.0)


def _ks_uniform(u: np.ndarray) -> tuple[float, float]:
    """Two-sided one-sample KS test of u against U(0, 1): (D, p-value).

    D is computed exactly; the p-value uses Stephens' modified statistic
    (√n + 0.12 + 0.11/√n)·D with the Kolmogorov limit law, accurate to a few per cent of p for
    n ≥ 5 [1]_, and free of the per-call overhead of scipy.stats.kstest (this runs once per
    branch per burst).

    References
    ----------
    .. [1] M. A. Stephens, "Use of the Kolmogorov–Smirnov, Cramér–von Mises and related
       statistics without extensive tables," J. R. Stat. Soc. B 32(1):115–122, 1970 [mem].
    """
    x = np.sort(u)
    n = x.size
    i = np.arange(1, n + 1)
    d = float(max(np.max(i / n - x), np.max(x - (i - 1) / n)))
    rn = math.sqrt(n)
    return d, float(special.kolmogorov((rn + 0.12 + 0.11 / rn) * d))


#: Block lengths of the successive passes of :func:`_ks_monotone` (then every value left).
_KS_BLOCKS = (16, 4)


def _ks_monotone(y_sorted: np.ndarray, cdf) -> tuple[float, float]:
    """The KS test of :func:`_ks_uniform` on cdf(y) for a nondecreasing cdf and sorted y.

    The statistic D = max_k max((k + 1)/n − F_k, F_k − k/n), F_k = cdf(y_k), is the same
    number, but F is evaluated only where it can matter: between two evaluated points i0 < i1,
    monotonicity bounds every deviation inside by max(i1/n − F_i0, F_i1 − (i0 + 1)/n), and an
    interval whose bound does not exceed the largest deviation found so far is skipped.
    Passes at every 16th, then every 4th value of the open intervals, then all values left
    (at 540 symbols about a quarter of the CDF evaluations; fewer for more symbols).
    """
    n = y_sorted.size
    f = np.empty(n)
    known = np.zeros(n, dtype=bool)
    new = np.arange(0, n, _KS_BLOCKS[0])
    if new[-1] != n - 1:
        new = np.r_[new, n - 1]
    d = 0.0
    for block in (*_KS_BLOCKS[1:], 1, 0):
        if new.size:
            f[new] = cdf(y_sorted[new])
            known[new] = True
            d = max(d, float(np.max(np.maximum((new + 1) / n - f[new], f[new] - new / n))))
        if block == 0:
            break
        ev = np.flatnonzero(known)
        lo, hi = ev[:-1], ev[1:]
        bound = np.maximum(hi / n - f[lo], f[hi] - (lo + 1) / n)
        keep = (bound > d) & (hi - lo > 1)
        lo, hi = lo[keep], hi[keep]
        # every block-th index strictly inside each open interval (lo, hi)
        count = (hi - lo - 1) // block
        first = np.cumsum(count) - count
        step = np.arange(int(count.sum())) - np.repeat(first, count) + 1
        new = np.repeat(lo, count) + block * step
    rn = math.sqrt(n)
    return d, float(special.kolmogorov((rn + 0.12 + 0.11 / rn) * d))


def check_energy_laws(
    z: np.ndarray,
    *,
    amplitude: float,
    noise_var: float,
    gram: np.ndarray | None = None,
    modulation: Modulation,
    priors: Sequence[float] | None = None,
    symbols: np.ndarray | None = None,
    max_values: int = GOF_MAX_VALUES,
) -> tuple[float, float, int]:
    """Kolmogorov–Smirnov test of the branch energies against the fitted chi-square laws.

    Parameters
    ----------
    z : ndarray, shape (n_symbols, n_branches)
        Correlator outputs.
    amplitude, noise_var, gram, modulation, priors, symbols
        As :func:`branch_energy_cdf`.
    max_values : int
        At most this many energies are tested (a fixed-seed subsample of symbols).

    Returns
    -------
    (statistic, pvalue, n_values)
        The largest per-branch KS statistic, the Bonferroni-combined p-value and the number of
        energies tested.

    Notes
    -----
    Each energy is mapped through its fitted CDF (probability-integral transform); under the
    model the results are uniform on [0, 1]. Branch by branch, the transforms of all symbols
    are KS-tested against the uniform law (scipy.stats.kstest): within one branch the values
    are independent across symbols, whereas the branches of one symbol are dependent (the
    branch holding the signal excludes the others; non-orthogonal templates correlate the
    noise), so pooling them would void the KS null distribution. The M branch p-values are
    combined by Bonferroni, p = min(1, M·min_j p_j), which keeps the level and is sensitive to
    an impairment in a single branch (an interferer near one tone). The parameters are
    estimated from the same data, which makes the p-value approximate and conservative (too
    large): a small p-value is a reliable sign of non-AWGN impairments (impulsive noise,
    interferers, leakage from a frequency offset); a large one is no proof of AWGN. Above
    ``max_values`` energies a fixed-seed subsample of symbols is tested.
    """
    zz = _check_outputs(z, modulation)
    n, m = zz.shape
    if max_values < m:
        raise ParameterError(f"max_values {max_values!r} must be at least {m} (one per branch)")
    idx = np.arange(n)
    n_keep = max_values // m
    if n > n_keep:
        rng = np.random.default_rng(_GOF_SEED)
        idx = np.sort(rng.choice(n, size=n_keep, replace=False))
    sub = zz[idx]
    energy = sub.real**2 + sub.imag**2
    sym = None if symbols is None else np.asarray(symbols)[idx]
    if sym is None:
        # Marginal laws: each branch's transform is a monotone function of its energy, so the
        # KS statistic can be found evaluating the CDF only where it can matter.
        _check_modulation(modulation)
        if not (math.isfinite(noise_var) and noise_var > 0):
            raise ParameterError(f"noise_var {noise_var!r} must be a positive finite number")
        if not (math.isfinite(amplitude) and amplitude >= 0):
            raise ParameterError(f"amplitude {amplitude!r} must be a finite number >= 0")
        r, _ = _check_gram(gram if modulation != "ook" else None, m)
        pi = _check_priors(priors, modulation)
        lam = _noncentrality(amplitude, noise_var, r, modulation)
        y = energy / (0.5 * noise_var)
        tests = []
        for j in range(m):  # branches, each vectorised over symbols

            def cdf(v, j=j):
                out = pi[0] * _chi2_2_cdf(v, lam[0, j])  # same sums as branch_energy_cdf
                for h in range(1, len(pi)):
                    out += pi[h] * _chi2_2_cdf(v, lam[h, j])
                return np.clip(out, 0.0, 1.0)

            tests.append(_ks_monotone(np.sort(y[:, j]), cdf))
    else:
        cdf = branch_energy_cdf(
            energy,
            amplitude=amplitude,
            noise_var=noise_var,
            gram=gram,
            modulation=modulation,
            priors=priors,
            symbols=sym,
        )
        tests = [_ks_uniform(cdf[:, j]) for j in range(m)]
    statistic = max(t[0] for t in tests)
    pvalue = min(1.0, m * min(t[1] for t in tests))  # Bonferroni over branches
    return statistic, pvalue, int(energy.size)


# --------------------------------------------------------------------------------------------
# Assembling a result
# --------------------------------------------------------------------------------------------


def _db(x: float) -> float:
    return 10.0 * math.log10(x) if x > 0 and math.isfinite(x) else math.nan


def _build(
    *,
    method: str,
    modulation: str,
    n_symbols: int,
    esn0: float | None,
    log_gamma_var: float | None,
    amplitude: float | None,
    noise_var: float | None,
    priors: np.ndarray,
    converged: bool,
    message: str,
    iterations: int,
    log_likelihood: float | None,
    detection_statistic: float | None,
    upper95_db: float | None,
    gof: tuple[float, float, int] | None,
    profile_ci_db: tuple[float, float] | None = None,
) -> NoncoherentFit:
    esn0 = _finite_or_none(esn0)
    esn0_db = _finite_or_none(_db(esn0)) if esn0 is not None else None
    ci = None
    ci_method = "none"
    if esn0_db is not None and profile_ci_db is not None:
        ci, ci_method = profile_ci_db, "profile-likelihood"
    elif esn0_db is not None and log_gamma_var is not None and log_gamma_var > 0:
        half = _Z975 * math.sqrt(log_gamma_var) * 10.0 / math.log(10.0)  # dB per neper
        ci, ci_method = (esn0_db - half, esn0_db + half), "wald-log-observed-info"
    shift = 10.0 * math.log10(BITS_PER_SYMBOL[modulation])
    return NoncoherentFit(
        method=method,
        modulation=modulation,
        esn0=esn0,
        esn0_db=esn0_db,
        esn0_db_ci95=ci,
        esn0_db_upper95=_finite_or_none(upper95_db),
        ebn0_db=None if esn0_db is None else esn0_db - shift,
        ebn0_db_ci95=None if ci is None else (ci[0] - shift, ci[1] - shift),
        amplitude=_finite_or_none(amplitude),
        noise_var=_finite_or_none(noise_var),
        priors=tuple(float(p) for p in priors),
        n_symbols=int(n_symbols),
        converged=bool(converged),
        message=message,
        iterations=int(iterations),
        log_likelihood=_finite_or_none(log_likelihood),
        detection_statistic=_finite_or_none(detection_statistic),
        ci_method=ci_method,
        gof_statistic=None if gof is None else _finite_or_none(gof[0]),
        gof_pvalue=None if gof is None else _finite_or_none(gof[1]),
        gof_test="ks-pit-branchwise" if gof is not None else "none",
        gof_n_values=0 if gof is None else int(gof[2]),
    )


def _too_few(method: str, modulation: str, n: int, priors: np.ndarray) -> NoncoherentFit:
    return _failed_fit(
        method,
        modulation,
        n,
        priors,
        f"{n} symbols given; at least {MIN_SYMBOLS} are needed for an Es/N0 estimate",
    )


def _plausibility(esn0_db: float) -> str | None:
    if not math.isfinite(esn0_db):
        return "the estimate is not finite"
    if esn0_db > MAX_PLAUSIBLE_ESN0_DB:
        return (
            f"Es/N0 {esn0_db:.1f} dB exceeds {MAX_PLAUSIBLE_ESN0_DB:.0f} dB: implausible for "
            f"correlator outputs (noise-free or clipped data?)"
        )
    return None


def _ml_result(
    *,
    method: str,
    modulation: str,
    mix: _Mixture,
    opt: _Optimum,
    energy_weight: float,
    log_norm: float,
    z: np.ndarray,
    gram: np.ndarray,
    priors_fixed: np.ndarray,
    symbols: np.ndarray | None,
    run_gof: bool,
) -> NoncoherentFit:
    """Health checks, interval, detection test and GOF around an ML optimum."""
    n, m = len(mix.q), mix.n_dims
    x = opt.x
    a, n0 = math.exp(x[0]), math.exp(x[1])
    p_on = _p_on(mix, x)
    priors = np.array([1.0 - p_on, p_on]) if mix.p_on_free else priors_fixed
    if mix.p_on_free:
        energy_weight = p_on
    ll_hat = opt.ll
    # noise only: N0 = mean(q)/M, ℓ0 = −N·M·(log N0 + 1) (the priors sum to one)
    n0_null = float(np.mean(mix.q)) / m
    ll_null = -n * m * (math.log(n0_null) + 1.0)
    lr = max(0.0, 2.0 * (ll_hat - ll_null)) if not opt.boundary else 0.0
    esn0 = energy_weight * a * a / n0
    converged, message = opt.converged, opt.message
    var_log_gamma = None
    upper = None
    if opt.converged:
        info = -opt.hess
        c = np.zeros(len(x))
        c[0], c[1] = 2.0, -1.0  # log γ = log w + 2·log A − log N0
        if mix.p_on_free:
            c[2] = 1.0 - p_on
        try:
            lam = np.linalg.eigvalsh(info)
            if lam[0] <= 0:
                raise np.linalg.LinAlgError
            var_log_gamma = float(c @ np.linalg.solve(info, c))
        except np.linalg.LinAlgError:
            converged, message = False, "observed information is not positive definite"
    if converged and lr < _CHI2_1_Q90:
        converged = False
        message = (
            f"no signal detected: likelihood ratio {lr:.2f} against noise only is below "
            f"{_CHI2_1_Q90:.2f} (5 % test)"
        )
    if not converged and (opt.boundary or lr < _CHI2_1_Q90) and not mix.p_on_free:
        upper = _upper_bound_db(mix, max(ll_hat, ll_null), x, energy_weight)
        if upper is not None:
            message += f"; Es/N0 below {upper:.1f} dB (one-sided 95 %)"
    if opt.boundary:
        esn0 = None
        var_log_gamma = None
    else:
        bad = _plausibility(_db(esn0))
        if bad is not None:
            converged, message = False, bad
    if converged:
        message = f"converged in {opt.iterations} Newton iterations"
    profile_ci = None
    if converged and not mix.p_on_free and _db(esn0) < PROFILE_CI_BELOW_DB:
        profile_ci = _profile_interval_db(mix, ll_hat, x, var_log_gamma, energy_weight)
    gof = None
    if run_gof:  # at the boundary this tests the noise-only model (A = 0)
        gof = check_energy_laws(
            z,
            amplitude=0.0 if opt.boundary else a,
            noise_var=n0,
            gram=gram,
            modulation=modulation,
            priors=priors,
            symbols=symbols,
        )
    return _build(
        method=method,
        modulation=modulation,
        n_symbols=n,
        esn0=esn0,
        log_gamma_var=var_log_gamma if converged else None,
        amplitude=a,
        noise_var=n0,
        priors=priors,
        converged=converged,
        message=message,
        iterations=opt.iterations,
        log_likelihood=ll_hat + log_norm,
        detection_statistic=lr,
        upper95_db=upper,
        gof=gof,
        profile_ci_db=profile_ci,
    )


def _profile_interval_db(
    mix: _Mixture, ll_hat: float, x: np.ndarray, var_log_gamma: float, energy_weight: float
) -> tuple[float, float] | None:
    """95 % profile-likelihood interval of Es/N0 [dB]: 2·(ℓ̂ − ℓ_p(γ)) = χ²₁(0.95) = 3.841.

    Near 0 dB the likelihood in log γ is skewed (a weak signal and a small rise of N0 look
    alike), so the Wald interval under-covers; the profile interval follows the actual
    shape. None when an end cannot be bracketed (the Wald interval is then used).
    """
    lg_hat = 2.0 * x[0] - x[1]  # log γ_on = 2·log A − log N0
    target = ll_hat - 0.5 * _CHI2_1_Q95

    beta = [x[1]]  # warm start: the profiled log N0 of the previous evaluation

    def excess(lg: float) -> float:
        ll, beta[0] = _profile_log_likelihood(mix, lg, beta[0])
        return ll - target

    step = max(_Z975 * math.sqrt(var_log_gamma), 1e-3)
    ends = []
    for sign in (-1.0, 1.0):
        inner, outer = lg_hat, lg_hat + sign * step
        for _ in range(8):
            if excess(outer) < 0:
                break
            inner, outer = outer, outer + sign * step
            step *= 1.5
        else:
            return None
        try:
            ends.append(
                optimize.brentq(excess, min(inner, outer), max(inner, outer), xtol=1e-3)
            )  # 0.004 dB
        except ValueError:
            return None
    lo, hi = (10.0 / math.log(10.0) * e + _db(energy_weight) for e in ends)
    return (float(lo), float(hi))


def _upper_bound_db(mix: _Mixture, ll_max: float, x: np.ndarray, energy_weight: float):
    """One-sided 95 % upper bound on Es/N0 (dB) by profile likelihood: 2·(ℓmax − ℓp) = 2.706."""
    beta0 = float(x[1])
    lo = max(_log_gamma(x), math.log(1e-4))

    def excess(log_g: float) -> float:
        ll, _ = _profile_log_likelihood(mix, log_g, beta0)
        return 2.0 * (ll_max - ll) - _CHI2_1_Q90

    hi = lo + 0.5
    for _ in range(40):
        if excess(hi) > 0:
            break
        lo, hi = hi, hi + 0.5
    else:
        return None
    if excess(lo) > 0:
        return _db(energy_weight * math.exp(lo))
    log_g = optimize.brentq(excess, lo, hi, xtol=1e-4)
    return _db(energy_weight * math.exp(log_g))


# --------------------------------------------------------------------------------------------
# Public estimators
# --------------------------------------------------------------------------------------------


def _log_normaliser(n: int, m: int, gram: np.ndarray) -> float:
    """−N·M·log π − N·log det R: the constants left out of ℓ."""
    logdet = float(np.linalg.slogdet(gram)[1])
    return -n * m * math.log(math.pi) - n * logdet


def fit_nda(
    z: np.ndarray,
    gram: np.ndarray | None = None,
    *,
    modulation: Modulation,
    priors: Sequence[float] | None = None,
    estimate_p_on: bool = False,
    gof: bool = True,
) -> NoncoherentFit:
    """Non-data-aided maximum-likelihood Es/N0 from noncoherent correlator outputs.

    Parameters
    ----------
    z : ndarray, complex, shape (n_symbols, n_branches)
        Correlator outputs, one column per tone (lowest first); OOK: one column (or 1-D).
    gram : ndarray, complex, shape (n_branches, n_branches), optional
        Gram matrix of the unit-energy templates, R[i, j] = <t_i, t_j> (R[i, i] = 1). Omit for
        orthogonal tones (identity). Condition number above 1e6 raises ParameterError.
    modulation : {"2fsk", "4fsk", "ook"}
    priors : sequence of float, optional
        FSK: probability of each tone (uniform if omitted). OOK: (p_off, p_on), default
        (0.5, 0.5).
    estimate_p_on : bool
        OOK only: estimate p_on jointly (third parameter, logit p_on) instead of fixing it.
    gof : bool
        Run the goodness-of-fit test (:func:`check_energy_laws`); False skips it (Monte Carlo).

    Returns
    -------
    NoncoherentFit
        ``method="nda-ml"``. ``esn0`` is A²/N0 (FSK) or p_on·A²/N0 (OOK, average energy).

    Notes
    -----
    Per symbol, marginalised over the hypothesis h sent (docs/estimator.md eq. 3):

        ℓ_k = −M·log(πN0) − log det R − q_k/N0 + log Σ_h π_h·[e^{−A²/N0}·I0(2A·r_kh/N0)]^{s_h}

    with q_k = z_kᴴR⁻¹z_k, r_kh = |z_k,h| (FSK) or |z_k| (OOK "on"; s = 0 for "off"). It is
    maximised over (log A, log N0[, logit p_on]) by damped Newton iterations with the analytic
    gradient and Hessian, in the log domain (log I0 = log i0e + x), started from the
    decision-directed moments — above the optimum, so the iteration never creeps to the
    spurious stationary point A = 0 (METHODS §3). Beyond 20000 symbols the iterations run on an
    evenly strided subsample and finish with Newton steps on all symbols.

    The 95 % interval is Wald's in log γ with the observed information (the negative Hessian
    at the optimum, delta method to log γ), mapped to dB. A likelihood-ratio test against
    "noise only" (5 %, boundary-corrected critical value 2.706) decides whether a signal is
    present; if not, ``converged`` is False and the message gives a one-sided 95 % upper bound
    from the profile likelihood (also in ``esn0_db_upper95``).

    References
    ----------
    .. [1] J. G. Proakis, M. Salehi, Digital Communications, 5th ed., §4.5 (from memory).
    .. [2] A. Hassan, M. A. Ingram, "SNR estimation for noncoherent M-FSK", IEEE Trans. Commun.
       59(10):2786-2795, 2011.
    .. [3] D. R. Pauluzzi, N. C. Beaulieu, IEEE Trans. Commun. 48(10):1681-1691, 2000.
    """
    _check_modulation(modulation)
    zz = _check_outputs(z, modulation)
    pi = _check_priors(priors, modulation)
    if estimate_p_on and modulation != "ook":
        raise ParameterError(
            f"estimate_p_on=True applies to ook only, not {modulation}; drop the option"
        )
    n, m = zz.shape
    if n < MIN_SYMBOLS:
        return _too_few("nda-ml", modulation, n, pi)
    zz, scale = _scaled(zz)
    if scale == 0.0:
        return _no_energy("nda-ml", modulation, n, pi)
    r_gram, identity = _check_gram(gram if modulation != "ook" else _ook_gram(gram), m)
    q = _whitened_energy(zz, r_gram, identity)
    if modulation == "ook":
        mix = _Mixture("on-off", np.abs(zz).T, np.zeros(1), q, m, float(pi[1]), estimate_p_on)
    else:
        r_env = np.ascontiguousarray(np.abs(zz).T)
        mix = _Mixture("tones", r_env, np.log(pi), q, m, math.nan, False)
    # starting point: decision-directed moments (biased high: above the ML optimum)
    if modulation == "ook":
        a2, n0, p_dd, _, _ = _dd_ook(zz)
        if not (a2 > 0 and n0 > 0):
            n0 = 0.5 * float(np.mean(q))
            a2 = float(np.mean(q)) / pi[1]
            p_dd = pi[1]
        x0 = [0.5 * math.log(a2), math.log(n0)]
        if estimate_p_on:
            x0.append(float(special.logit(min(max(p_dd, 0.05), 0.95))))
        energy_weight = pi[1]
    else:
        a2, n0, _ = _dd_fsk(zz, q)
        if not (a2 > 0 and n0 > 0):
            n0 = float(np.mean(q)) / (m + 1)
            a2 = n0
        x0 = [0.5 * math.log(a2), math.log(n0)]
        energy_weight = 1.0
    x0 = np.array(x0)
    iterations = 0
    if n > 2 * _SUBSAMPLE_SYMBOLS:
        pre = _maximise(mix.subsample(_SUBSAMPLE_SYMBOLS), x0, tol=1e-3)
        iterations += pre.iterations
        if pre.converged:
            x0 = pre.x
    opt = _maximise(mix, x0)
    opt = _Optimum(
        opt.x,
        opt.ll,
        opt.grad,
        opt.hess,
        opt.iterations + iterations,
        opt.converged,
        opt.boundary,
        opt.message,
    )
    return _unscaled(
        _ml_result(
            method="nda-ml",
            modulation=modulation,
            mix=mix,
            opt=opt,
            energy_weight=energy_weight,
            log_norm=_log_normaliser(n, m, r_gram),
            z=zz,
            gram=r_gram,
            priors_fixed=pi,
            symbols=None,
            run_gof=gof,
        ),
        scale,
    )


def _ook_gram(gram: np.ndarray | None) -> None:
    if gram is not None and not np.allclose(np.asarray(gram), 1.0):
        raise ParameterError(
            f"gram {np.asarray(gram).tolist()} given for ook; ook has one "
            f"branch, so omit gram (or pass [[1]])"
        )
    return None


def _check_symbols(symbols: np.ndarray, n: int, modulation: str) -> np.ndarray:
    h = N_HYPOTHESES[modulation]
    sym = np.asarray(symbols)
    if sym.shape != (n,) or sym.dtype.kind not in "biu":
        raise ParameterError(
            f"symbols has shape {sym.shape} and dtype {sym.dtype}; pass {n} integer symbol "
            f"indices, one per row of z"
        )
    if n and (sym.min() < 0 or sym.max() >= h):
        raise ParameterError(
            f"symbols range from {sym.min()} to {sym.max()}; {modulation} symbols are 0..{h - 1}"
            + (" (0 = off, 1 = on)" if modulation == "ook" else " (tone index, lowest = 0)")
        )
    return sym.astype(np.intp)


def fit_da(
    z: np.ndarray,
    symbols: np.ndarray,
    gram: np.ndarray | None = None,
    *,
    modulation: Modulation,
    gof: bool = True,
) -> NoncoherentFit:
    """Data-aided maximum-likelihood Es/N0 with the symbols known.

    Parameters
    ----------
    z : ndarray, complex, shape (n_symbols, n_branches)
        Correlator outputs.
    symbols : ndarray of int, shape (n_symbols,)
        Tone index sent (FSK, lowest tone = 0) or 0/1 off/on (OOK).
    gram : ndarray, optional
        Template Gram matrix (see :func:`fit_nda`).
    modulation : {"2fsk", "4fsk", "ook"}
    gof : bool
        Run the goodness-of-fit test (conditional on the known symbols).

    Returns
    -------
    NoncoherentFit
        ``method="da-ml"``. OOK: ``esn0`` = (fraction of "on" symbols)·A²/N0.

    Notes
    -----
    ℓ_k = −M·log(πN0) − log det R − q_k/N0 + s_k·[−A²/N0 + log I0(2A·|z_k,i_k|/N0)]: a Rician
    envelope on the branch sent plus the whitened noise energy of the rest (docs/estimator.md
    eq. 5). Maximised like :func:`fit_nda` (Newton on log A, log N0, from the known-symbol
    moments); Wald interval in log γ from the observed information. At high Es/N0 its
    normalised variance tends to 2/γ + 1/(M − ½) (METHODS §3, derived).
    """
    _check_modulation(modulation)
    zz = _check_outputs(z, modulation)
    n, m = zz.shape
    sym = _check_symbols(symbols, n, modulation)
    pi = _check_priors(None, modulation)
    if n < MIN_SYMBOLS:
        return _too_few("da-ml", modulation, n, pi)
    zz, scale = _scaled(zz)
    if scale == 0.0:
        return _no_energy("da-ml", modulation, n, pi)
    r_gram, identity = _check_gram(gram if modulation != "ook" else _ook_gram(gram), m)
    q = _whitened_energy(zz, r_gram, identity)
    mag = np.abs(zz)
    if modulation == "ook":
        on = sym == 1
        n_on = int(on.sum())
        if n_on == 0:
            return _failed_fit(
                "da-ml",
                modulation,
                n,
                pi,
                "no 'on' symbol among the known symbols: the amplitude is not observable",
            )
        pi = np.array([1.0 - n_on / n, n_on / n])
        if n_on < n:
            n0 = float(np.mean(q[~on]))
            a2 = float(np.mean(q[on])) - n0
        else:
            n0, a2 = 0.5 * float(np.mean(q)), 0.5 * float(np.mean(q))
        r = mag[on, 0][None, :]  # the Rician term only where the carrier was on
        energy_weight = n_on / n
    else:
        m1 = float(np.mean(mag[np.arange(n), sym] ** 2))
        n0 = (float(np.mean(q)) - m1) / (m - 1)
        a2 = m1 - n0
        r = mag[np.arange(n), sym][None, :]
        energy_weight = 1.0
    if not (n0 > 0):
        n0 = float(np.mean(q)) / (m + 1)
    if not (a2 > 0):
        a2 = n0
    mix = _Mixture("tones", r, np.zeros(1), q, m, math.nan, False)
    opt = _maximise(mix, np.array([0.5 * math.log(a2), math.log(n0)]))
    return _unscaled(
        _ml_result(
            method="da-ml",
            modulation=modulation,
            mix=mix,
            opt=opt,
            energy_weight=energy_weight,
            log_norm=_log_normaliser(n, m, r_gram),
            z=zz,
            gram=r_gram,
            priors_fixed=pi,
            symbols=sym,
            run_gof=gof,
        ),
        scale,
    )


def fit_dd(
    z: np.ndarray,
    gram: np.ndarray | None = None,
    *,
    modulation: Modulation,
    gof: bool = True,
) -> NoncoherentFit:
    """Decision-directed moment estimate of Es/N0 — for comparison only, never a headline.

    Parameters
    ----------
    z : ndarray, complex, shape (n_symbols, n_branches)
    gram : ndarray, optional
        Template Gram matrix (see :func:`fit_nda`).
    modulation : {"2fsk", "4fsk", "ook"}
    gof : bool
        Run the goodness-of-fit test with the DD parameters.

    Returns
    -------
    NoncoherentFit
        ``method="dd-moment"``; no likelihood, no interval.

    Notes
    -----
    FSK: the largest branch is taken as the one sent; with E|z_î|² = A² + N0 and
    E[zᴴR⁻¹z] = M·N0 + A², N0 = (mean q − mean |z_î|²)/(M − 1), A² = mean |z_î|² − N0 (for
    orthogonal tones N0 is the mean energy of the other branches). OOK: energies are split at
    the model's optimum threshold and the two means re-estimated until the split is stable.
    Decision errors make it biased high below about 8 dB: with no signal at all it returns
    3.01 dB (M = 2) and 3.54 dB (M = 4) (METHODS §3).
    """
    _check_modulation(modulation)
    zz = _check_outputs(z, modulation)
    n, m = zz.shape
    pi = _check_priors(None, modulation)
    if n < MIN_SYMBOLS:
        return _too_few("dd-moment", modulation, n, pi)
    zz, scale = _scaled(zz)
    if scale == 0.0:
        return _no_energy("dd-moment", modulation, n, pi)
    r_gram, identity = _check_gram(gram if modulation != "ook" else _ook_gram(gram), m)
    rounds = 0
    if modulation == "ook":
        a2, n0, p, _, rounds = _dd_ook(zz)
        weight = p
        if a2 > 0 and n0 > 0:
            pi = np.array([1.0 - p, p])
    else:
        q = _whitened_energy(zz, r_gram, identity)
        a2, n0, _ = _dd_fsk(zz, q)
        weight = 1.0
    if not (a2 > 0 and n0 > 0):
        return _unscaled(
            _build(
                method="dd-moment",
                modulation=modulation,
                n_symbols=n,
                esn0=None,
                log_gamma_var=None,
                amplitude=None,
                noise_var=_finite_or_none(n0) if n0 > 0 else None,
                priors=pi,
                converged=False,
                message="decision-directed split found no signal (non-positive signal energy)",
                iterations=rounds,
                log_likelihood=None,
                detection_statistic=None,
                upper95_db=None,
                gof=None,
            ),
            scale,
        )
    esn0 = weight * a2 / n0
    bad = _plausibility(_db(esn0))
    a = math.sqrt(a2)
    gof_result = None
    if gof:
        gof_result = check_energy_laws(
            zz, amplitude=a, noise_var=n0, gram=r_gram, modulation=modulation, priors=pi
        )
    return _unscaled(
        _build(
            method="dd-moment",
            modulation=modulation,
            n_symbols=n,
            esn0=esn0,
            log_gamma_var=None,
            amplitude=a,
            noise_var=n0,
            priors=pi,
            converged=bad is None,
            message=bad or "decision-directed moments (biased high below about 8 dB Es/N0)",
            iterations=rounds,
            log_likelihood=None,
            detection_statistic=None,
            upper95_db=None,
            gof=gof_result,
        ),
        scale,
    )


# --------------------------------------------------------------------------------------------
# Decisions
# --------------------------------------------------------------------------------------------


def _fit_parameters(fit: NoncoherentFit) -> tuple[float, float]:
    if fit.amplitude is None or fit.noise_var is None or not fit.amplitude > 0:
        raise ParameterError(
            f"the {fit.method} fit has no amplitude/noise estimate ({fit.message}); decisions need "
            f"a fit with a signal"
        )
    return fit.amplitude, fit.noise_var


def symbol_posteriors(
    z: np.ndarray,
    fit: NoncoherentFit,
    gram: np.ndarray | None = None,
    *,
    modulation: Modulation,
) -> np.ndarray:
    """Posterior probability of each hypothesis per symbol under the fitted model.

    Parameters
    ----------
    z : ndarray, shape (n_symbols, n_branches)
    fit : NoncoherentFit
        Supplies A, N0 and the priors.
    gram : ndarray, optional
        Unused by the posterior itself (R⁻¹r_i = e_i removes it), accepted for symmetry.
    modulation : {"2fsk", "4fsk", "ook"}

    Returns
    -------
    ndarray, shape (n_symbols, n_hypotheses)
        Rows sum to 1. OOK columns: (off, on).

    Notes
    -----
    w_kh = softmax_h(log π_h + s_h·[−A²/N0 + log I0(2A·r_kh/N0)]) (docs/estimator.md eq. 3).
    """
    _check_modulation(modulation)
    zz = _check_outputs(z, modulation)
    if modulation != "ook":
        _check_gram(gram, zz.shape[1])
    a, n0 = _fit_parameters(fit)
    pi = _check_priors(fit.priors, modulation)
    log_lam = _log_i0((2.0 * a / n0) * np.abs(zz)) - (a / n0) * a  # log Λ, eq. 3
    if modulation == "ook":
        log_lam = np.concatenate([np.zeros_like(log_lam), log_lam], axis=1)  # off: Λ = 1
    return special.softmax(log_lam + np.log(pi), axis=1)


def decide_symbols(
    z: np.ndarray,
    fit: NoncoherentFit,
    gram: np.ndarray | None = None,
    *,
    modulation: Modulation,
) -> np.ndarray:
    """Hard symbol decisions.

    Parameters
    ----------
    z : ndarray, shape (n_symbols, n_branches)
    fit : NoncoherentFit
        Needed for OOK (threshold) and for non-uniform FSK priors.
    gram : ndarray, optional
        Accepted for symmetry; the noncoherent ML decision does not depend on it.
    modulation : {"2fsk", "4fsk", "ook"}

    Returns
    -------
    ndarray of int, shape (n_symbols,)
        FSK: tone index (largest |z_i|; MAP through the posteriors when the priors are not
        uniform). OOK: 1 where |z| exceeds :func:`ook_decision_threshold` of the fit.
    """
    _check_modulation(modulation)
    zz = _check_outputs(z, modulation)
    if modulation == "ook":
        a, n0 = _fit_parameters(fit)
        p_on = fit.priors[1] if len(fit.priors) == 2 else 0.5
        thr = ook_decision_threshold(a, n0, p_on)
        return (np.abs(zz[:, 0]) > thr).astype(np.intp)
    _check_gram(gram, zz.shape[1])
    pri = np.asarray(fit.priors, dtype=float)
    if pri.shape == (zz.shape[1],) and np.ptp(pri) > 1e-12:
        return np.argmax(symbol_posteriors(zz, fit, gram, modulation=modulation), axis=1)
    return np.argmax(np.abs(zz), axis=1).astype(np.intp)
