"""Es/N0 of a fading burst: maximum likelihood on the Rician-faded noncoherent model.

The constant-amplitude fit (:mod:`iqstat.fit.maximum_likelihood`) reads a burst whose level
moves within itself (multipath, a moving transmitter) low: the spread of the sent tone's
energy is taken for noise, and a Rayleigh-faded 12 dB burst reads ~5 dB. Here each symbol
sees its own channel gain, h = h_s + h_d with a steady (specular) part of power A_s² and a
scattered part CN(0, σ_d²) [1]_; with the carrier phase unknown and uniform per symbol the
specular part is the constant-amplitude model's signal, and the scattered part adds σ_d² to
the variance of the sent tone's output along its template. With unit-energy templates of
Gram matrix R (R_kk = 1), noise CN(0, N0·R) and ρ = σ_d²/N0, Sherman–Morrison gives, for
hypothesis k (docs/estimator.md has the constant-amplitude case, ρ = 0)::

    log p(z | k) = −M·log(πN0) − log det R − zᴴR⁻¹z/N0
                   − log(1 + ρ) + ρ|z_k|²/(N0(1 + ρ)) − A_s²/(N0(1 + ρ))
                   + log I0(2A_s|z_k| / (N0(1 + ρ)))

where z_k is branch k's raw output. The symbols are taken as independent draws of h (a
composite likelihood: over a burst that sees few fade cycles, h's own law is its empirical
one, which is what the burst's errors see). Marginalised over the symbol sent (or on the
known symbols, data-aided), the likelihood is maximised over (ln N0, ln γ̄, logit f) with
γ̄ = (A_s² + σ_d²)/N0 the mean Es/N0 and f = A_s²/(A_s² + σ_d²) the specular share, so that
K = f/(1 − f). The 95 % interval is Wald's in ln γ̄ from the observed information (a finite-
difference Hessian). The branch energies are then tested against their laws: branch i under
hypothesis k is (v/2)·χ'²(2, 2|R_ik|²A_s²/v) with v = N0 + |R_ik|²σ_d² [2]_.

References
----------
.. [1] M. K. Simon, M.-S. Alouini, Digital Communication over Fading Channels, 2nd ed., Wiley,
   2005, §2.2.1.3 (the Rician channel) [mem].
.. [2] J. G. Proakis, M. Salehi, Digital Communications, 5th ed., McGraw-Hill, 2008, §2.3
   (noncentral chi-square of a complex Gaussian's squared magnitude) [mem].
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, special

from iqstat.fit.bessel import _log_i0
from iqstat.fit.goodness_of_fit import faded_energy_laws
from iqstat.fit.result import MIN_SYMBOLS, NoncoherentFit, _build

__all__ = ["RicianFit", "fit_rician", "FADING_LR_MIN"]

#: Likelihood-ratio statistic 2(ℓ_fading − ℓ_steady) above which fading is said to be present
#: when the moment test could not be run (a χ²₁ tail of 8e-6; the boundary makes it smaller).
FADING_LR_MIN = 20.0

#: Bounds of logit f: K from −20 dB (f = 0.0099: Rayleigh, for the BER) to +100 dB (a steady
#: amplitude: the constant-amplitude model to within 1e-10 of γ̄ in ρ).
_LOGIT_F_BOUNDS = (math.log(0.01), math.log(1e10))
#: Finite-difference step of the observed information, in the fit's parameters.
_HESSIAN_STEP = 1e-4
#: L-BFGS-B tolerances: the log-likelihood to ~1e-12 relative, its gradient to 1e-8.
_OPTIMISER_OPTIONS = {"ftol": 1e-12, "gtol": 1e-8}
#: logit f of the constant-amplitude model (f = 1 − 2e-18: no scattered part).
_STEADY_LOGIT = 40.0


@dataclass(frozen=True)
class RicianFit:
    """The Rician-faded fit of one burst.

    Attributes
    ----------
    fit : NoncoherentFit
        Mean Es/N0 (= (A_s² + σ_d²)/N0), its interval and goodness of fit, in the form of the
        constant-amplitude fits (``amplitude`` is the RMS amplitude √(A_s² + σ_d²)).
    k_factor : float or None
        Specular over scattered power, linear.
    k_db : float or None
    specular_share : float or None
        f = A_s²/(A_s² + σ_d²).
    """

    fit: NoncoherentFit
    k_factor: float | None
    k_db: float | None
    specular_share: float | None
    likelihood_ratio: float | None = None


def _hypotheses(z, modulation: str, priors, sent):
    """(z as an array, OOK or not, the hypothesis priors, the known hypothesis per symbol or
    −1): FSK has one hypothesis per tone, OOK two (off, on) on its one branch; priors
    uniform unless given."""
    z = np.asarray(z)
    n, m = z.shape
    ook = modulation == "ook"
    n_hyp = 2 if ook else m
    pi = np.full(n_hyp, 1.0 / n_hyp) if priors is None else np.asarray(priors, dtype=float)
    known = np.full(n, -1, dtype=np.intp) if sent is None else np.asarray(sent, dtype=np.intp)
    return z, ook, pi, known


def _prepared(z: np.ndarray, gram):
    """|z_k|², |z_k|, the common quadratic form zᴴR⁻¹z of every symbol, and Σ log det R."""
    e = z.real**2 + z.imag**2
    n, m = z.shape
    if gram is None or m == 1:
        return e, np.sqrt(e), e.sum(axis=1), 0.0
    g = np.asarray(gram, dtype=complex)
    if g.ndim == 2:
        w = np.linalg.solve(g, z.T).T
        log_det = n * float(np.linalg.slogdet(g)[1])
    else:  # one matrix per symbol
        w = np.linalg.solve(g, z[:, :, None])[:, :, 0]
        log_det = float(np.sum(np.linalg.slogdet(g)[1]))
    return e, np.sqrt(e), np.real(np.sum(np.conj(z) * w, axis=1)), log_det


def _log_lik(theta, e, r, q, m, log_pi, sent, ook, grad: bool = False):
    """Log-likelihood of the symbols, less −n·M·log π − Σ log det R (free of θ); with
    ``grad``, (value, gradient in θ = (ln N0, ln γ̄, logit f)).

    With E = |z_k|²/N0, R = |z_k|/√N0, P = fγ̄ and ρ = (1 − f)γ̄, hypothesis k contributes
    ℓ_k = −ln(1 + ρ) + ρE/(1 + ρ) − P/(1 + ρ) + ln I0(u), u = 2R√P/(1 + ρ), and the symbol
    −M·ln N0 − zᴴR⁻¹z/N0; the gradient is the posterior-weighted sum of ∂ℓ_k (I0' = I1).
    """
    a, g, c = theta
    n0 = math.exp(a)
    gam = math.exp(g)
    f = 1.0 / (1.0 + math.exp(-c))
    rho = (1.0 - f) * gam
    p = f * gam
    big_e = e / n0
    u = (2.0 * math.sqrt(p) / (1.0 + rho)) * (r / math.sqrt(n0))
    i0e_u = special.i0e(u)
    lk = -math.log1p(rho) + (rho / (1.0 + rho)) * big_e - p / (1.0 + rho) + _log_i0(u, i0e_u)
    if ook:  # hypotheses off (0) and on (1), one branch
        hyp = np.stack([np.zeros_like(lk[:, 0]), lk[:, 0]], axis=1)
    else:
        hyp = lk
    hyp = hyp + log_pi
    known = sent >= 0
    rows = np.arange(len(sent))
    top = hyp.max(axis=1)
    norm = top + np.log(np.sum(np.exp(hyp - top[:, None]), axis=1))  # log Σ_k exp(hyp_k)
    per = np.where(known, hyp[rows, np.maximum(sent, 0)], norm)
    value = float(np.sum(per) - m * a * len(q) - np.sum(q) / n0)
    if not grad:
        return value
    post = np.exp(hyp - norm[:, None])
    post[known] = 0.0
    post[rows[known], sent[known]] = 1.0
    w = post[:, 1:2] if ook else post  # the weights of the hypotheses with a signal
    ratio_u = u * (special.i1e(u) / i0e_u)  # u·I1(u)/I0(u)
    d_a = -(rho / (1.0 + rho)) * big_e - 0.5 * ratio_u
    d_rho = (-1.0 / (1.0 + rho)) + (big_e + p) / (1.0 + rho) ** 2 - ratio_u / (1.0 + rho)
    d_p = -1.0 / (1.0 + rho) + ratio_u / (2.0 * p)
    s_a, s_rho, s_p = (float(np.sum(w * d)) for d in (d_a, d_rho, d_p))
    grad_a = s_a - m * len(q) + float(np.sum(q)) / n0
    fpr = f * (1.0 - f) * gam  # ∂P/∂c = −∂ρ/∂c
    return value, np.array([grad_a, s_rho * rho + s_p * p, (s_p - s_rho) * fpr])


def _hessian(neg_grad, x: np.ndarray, step: float) -> np.ndarray:
    """Hessian of the negative log-likelihood: central differences of its gradient,
    symmetrised."""
    cols = [
        (neg_grad(x + step * ei)[1] - neg_grad(x - step * ei)[1]) / (2.0 * step)
        for ei in np.eye(len(x))
    ]
    h = np.array(cols)
    return 0.5 * (h + h.T)


def fit_rician(
    z: np.ndarray,
    *,
    modulation: str,
    gram=None,
    priors=None,
    sent: np.ndarray | None = None,
    start_esn0: float,
    start_noise_var: float,
    start_k: float = 1.0,
    test: bool = False,
) -> RicianFit:
    """Fit mean Es/N0, K factor and N0 of one burst's correlator outputs under Rician fading.

    Parameters
    ----------
    z : ndarray of complex, shape (n_symbols, n_branches)
        Correlator outputs (unit-energy templates).
    modulation : {"2fsk", "4fsk", "ook"}
    gram : ndarray, shape (M, M) or (n_symbols, M, M), optional
        Template Gram matrix (unit diagonal); None for orthogonal tones.
    priors : sequence of float, optional
        Hypothesis priors (FSK: one per tone; OOK: (p_off, p_on)); uniform by default.
    sent : ndarray of int, shape (n_symbols,), optional
        Known hypothesis per symbol, −1 where unknown (marginalised). All known: data-aided.
    start_esn0, start_noise_var, start_k : float
        Starting point (e.g. the constant-amplitude fit and the moment K).
    test : bool
        Also fit the constant-amplitude model (f = 1) by the same likelihood and give the
        likelihood-ratio statistic 2(ℓ̂ − ℓ̂_steady) (``likelihood_ratio``).

    Returns
    -------
    RicianFit
        ``fit.method`` is ``"nda-ml-rician"`` or, when every symbol is known,
        ``"da-ml-rician"``. A fit that cannot be made says why in ``fit.message``.
    """
    z, ook, pi, sent_arr = _hypotheses(z, modulation, priors, sent)
    n, m = z.shape
    method = "da-ml-rician" if np.all(sent_arr >= 0) else "nda-ml-rician"
    e, r, q, log_det = _prepared(z, gram)
    log_pi = np.log(np.maximum(pi, 1e-300))

    def failed(message: str) -> RicianFit:
        fit = _build(
            method=method, modulation=modulation, n_symbols=n, esn0=None, log_gamma_var=None,
            amplitude=None, noise_var=None, priors=pi, converged=False, message=message,
            iterations=0, log_likelihood=None, detection_statistic=None, upper95_db=None,
            gof=None,
        )  # fmt: skip
        return RicianFit(fit=fit, k_factor=None, k_db=None, specular_share=None)

    if n < MIN_SYMBOLS:
        return failed(f"{n} symbols; at least {MIN_SYMBOLS} are needed for the fading fit")
    if not (start_esn0 > 0 and start_noise_var > 0):
        return failed("no constant-amplitude estimate to start the fading fit from")
    # OOK: the fitted Es/N0 is the "on" level; the reported one is p_on times it.
    on_share = pi[1] if ook else 1.0
    f0 = min(max(start_k / (1.0 + start_k), 0.02), 0.99)
    x0 = np.array(
        [math.log(start_noise_var), math.log(start_esn0 / on_share), math.log(f0 / (1.0 - f0))]
    )

    def neg(theta):
        value, grad = _log_lik(theta, e, r, q, m, log_pi, sent_arr, ook, grad=True)
        return -value, -grad

    bounds = [(x0[0] - 5.0, x0[0] + 5.0), (x0[1] - 10.0, x0[1] + 10.0), _LOGIT_F_BOUNDS]
    res = optimize.minimize(
        neg, x0, jac=True, method="L-BFGS-B", bounds=bounds, options=_OPTIMISER_OPTIONS
    )
    if not res.success or not np.all(np.isfinite(res.x)):
        return failed(f"fading fit did not converge: {res.message}")
    a, g, c = res.x
    n0, gam = math.exp(a), math.exp(g)
    f = 1.0 / (1.0 + math.exp(-c))
    at_bound = [abs(v - b) < 1e-6 for v, lim in zip(res.x, bounds, strict=True) for b in lim]
    hess = _hessian(neg, res.x, _HESSIAN_STEP)
    try:
        cov = np.linalg.inv(hess)
        var_g = float(cov[1, 1])
    except np.linalg.LinAlgError:
        var_g = math.nan
    if any(at_bound[:4]):
        return failed("fading fit ran to the edge of its N0 or Es/N0 range")
    if not (var_g > 0):
        # f at its bound (no scattered part, or no steady part): its row is left out.
        sub = hess[:2, :2]
        try:
            var_g = float(np.linalg.inv(sub)[1, 1])
        except np.linalg.LinAlgError:
            var_g = math.nan
    lr = None
    if test:

        def neg_steady(t):
            value, grad = neg(np.array([t[0], t[1], _STEADY_LOGIT]))
            return value, grad[:2]

        steady = optimize.minimize(
            neg_steady, x0[:2], jac=True, method="L-BFGS-B", bounds=bounds[:2],
            options=_OPTIMISER_OPTIONS,
        )  # fmt: skip
        lr = max(2.0 * (float(steady.fun) - float(res.fun)), 0.0)
    amp2, diff = f * gam * n0, (1.0 - f) * gam * n0
    gof = faded_energy_laws(e, n0, [(1.0, diff, amp2)], gram, pi, sent_arr, ook)
    k = f / (1.0 - f)
    fit = _build(
        method=method,
        modulation=modulation,
        n_symbols=n,
        esn0=on_share * gam,
        log_gamma_var=var_g if var_g > 0 else None,
        amplitude=math.sqrt(amp2 + diff),
        noise_var=n0,
        priors=pi,
        converged=True,
        message=f"fading fit converged in {res.nit} iterations (K {10 * math.log10(k):.1f} dB)",
        iterations=int(res.nit),
        log_likelihood=-float(res.fun) - n * m * math.log(math.pi) - log_det,
        detection_statistic=None,
        upper95_db=None,
        gof=gof,
    )
    return RicianFit(
        fit=fit, k_factor=k, k_db=10.0 * math.log10(k), specular_share=f, likelihood_ratio=lr
    )
