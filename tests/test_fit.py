"""Tests of iqstat.fit: noncoherent Es/N0 estimators checked against outside references.

Correlator outputs are drawn directly from the model z = A·e^{jθ}·r_i + n, n ~ CN(0, N0·R),
with fixed seeds. References: METHODS.md values marked [computed] (recomputed here where
cheap), scipy.stats distributions (rice, ncx2, chi2, expon), scipy.integrate quadrature of the
Rician Fisher information, and the published formulas named beside each check.

Statistical tolerances are derived from the estimator's spread: a Monte Carlo mean is allowed
4 standard errors, a variance ratio 25 % when its own standard error is sqrt(2/(T-1)).
"""

from __future__ import annotations

import json
import math
from functools import cache

import numpy as np
import pytest
from scipy import integrate, optimize, special, stats

from iqstat.errors import ParameterError
from iqstat.fit import (
    NoncoherentFit,
    branch_energy_cdf,
    check_energy_laws,
    decide_symbols,
    fit_da,
    fit_dd,
    fit_nda,
    ook_decision_threshold,
    symbol_posteriors,
)
from iqstat.fit.bessel import _bessel_terms, _log_i0
from iqstat.fit.maximise import _newton_steps, _newton_steps_eigh
from iqstat.fit.ncx2_cdf import _chi2_2_cdf_rows

MOD = {2: "2fsk", 4: "4fsk"}
# h = 1/2 tone pair: rho = (1/T)∫ exp(j2π·Δf·t) dt with Δf·T = 1/2 equals 2j/π (|rho| = 2/π,
# METHODS §1 "two tones Δf apart over T: |ρ| = |sinc(ΔfT)|"); checked numerically below.
RHO_HALF = 2j / math.pi
GRAM_HALF = np.array([[1.0, RHO_HALF], [np.conj(RHO_HALF), 1.0]])


# --------------------------------------------------------------------------------------------
# Model generators
# --------------------------------------------------------------------------------------------


def draw_fsk(rng, n, m, esn0_db, n0=1.0, gram=None, priors=None):
    """n symbols of M-FSK correlator outputs, tone sent uniform (or `priors`), phase uniform."""
    a = math.sqrt(10 ** (esn0_db / 10) * n0)
    sym = rng.choice(m, size=n, p=priors) if priors is not None else rng.integers(0, m, n)
    theta = rng.uniform(0, 2 * np.pi, n)
    w = (rng.standard_normal((n, m)) + 1j * rng.standard_normal((n, m))) * math.sqrt(n0 / 2)
    r = np.eye(m) if gram is None else np.asarray(gram)
    noise = w @ np.linalg.cholesky(r).T  # rows ~ CN(0, N0·R)
    z = a * np.exp(1j * theta)[:, None] * r[:, sym].T + noise
    return z, sym


def draw_ook(rng, n, esn0_db, p_on=0.5, n0=1.0):
    """OOK envelope-branch outputs; Es/N0 is the average energy p_on·A²/N0."""
    a = math.sqrt(10 ** (esn0_db / 10) * n0 / p_on)
    sym = (rng.random(n) < p_on).astype(int)
    theta = rng.uniform(0, 2 * np.pi, n)
    w = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * math.sqrt(n0 / 2)
    return (a * sym * np.exp(1j * theta) + w)[:, None], sym


@cache
def monte_carlo(m, esn0_db, n, trials, seed, with_da=False):
    """Estimates (linear, boundary = 0) and interval coverage of NDA (and DA) over trials."""
    rng = np.random.default_rng(seed)
    out = {"nda": [], "da": [], "nda_cov": [], "da_cov": []}
    for _ in range(trials):
        z, sym = draw_fsk(rng, n, m, esn0_db)
        fits = [("nda", fit_nda(z, modulation=MOD[m], gof=False))]
        if with_da:
            fits.append(("da", fit_da(z, sym, modulation=MOD[m], gof=False)))
        for key, f in fits:
            out[key].append(f.esn0 if f.esn0 is not None else 0.0)
            ci = f.esn0_db_ci95
            out[key + "_cov"].append(ci is not None and ci[0] <= esn0_db <= ci[1])
    return {k: np.array(v) for k, v in out.items()}


# --------------------------------------------------------------------------------------------
# Special functions and the likelihood itself
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    "x, ref",
    # METHODS §8 reference values (mpmath, [computed])
    [(1.0, 0.23591435850717865), (50.0, 47.127575501871805), (700.0, 695.80569999844345)],
)
def test_log_i0_reference_values(x, ref):
    assert _log_i0(np.array([x]))[0] == pytest.approx(ref, rel=1e-14)


def test_log_i0_matches_scipy_iv_including_series_region():
    # large x: scipy.special.iv as the reference
    x = np.linspace(1.0, 30, 50)
    np.testing.assert_allclose(_log_i0(x), np.log(special.iv(0, x)), rtol=1e-13)
    # small x: log1p of the power series I0(x) − 1 = Σ_{k≥1} (x²/4)^k/(k!)² (Abramowitz &
    # Stegun 9.6.12), since log(iv(0, x)) itself loses all digits there
    x = np.geomspace(1e-8, 1.0, 40)
    series = sum((x * x / 4) ** k / math.factorial(k) ** 2 for k in range(1, 20))
    # just above the series cut (x = 1e-2) log(i0e(x)) + x cancels: relative 1e-11 there, i.e.
    # an absolute error below 1e-15, irrelevant in a log-likelihood
    np.testing.assert_allclose(_log_i0(x), np.log1p(series), rtol=1e-11)


def test_two_parameter_newton_steps_match_linear_algebra():
    # The closed-form 2 x 2 Newton step against numpy.linalg (reference library): where −H is
    # positive definite it is the solution of (−H)·s = g (capped at 2 per coordinate), and
    # indefinite or nearly singular Hessians take the eigenvalue-modified step of the general
    # path. Positive definite rows with condition numbers up to 1e8, as at high Es/N0.
    rng = np.random.default_rng(11)
    k = 400
    q, _ = np.linalg.qr(rng.standard_normal((k, 2, 2)))
    lam = np.exp(rng.uniform(-3.0, 12.0, (k, 2)))
    lam[: k // 4, 0] *= -1.0  # a quarter indefinite
    lam[k // 4 : k // 4 + 5] = [1.0, 1e-12]  # nearly singular
    hess = -np.einsum("kij,kj,klj->kil", q, lam, q)
    grad = rng.standard_normal((k, 2)) * np.exp(rng.uniform(-6.0, 6.0, (k, 1)))
    got = _newton_steps(grad, hess)
    pd = lam.min(axis=1) > 1e-8 * np.maximum(1.0, np.abs(lam).max(axis=1))  # −H's floor
    want = np.linalg.solve(-hess[pd], grad[pd][:, :, None])[:, :, 0]
    big = np.max(np.abs(want), axis=1, keepdims=True)
    want *= np.where(big > 2.0, 2.0 / big, 1.0)
    # relative to the step's size: the 2 x 2 solve loses about cond·eps (cond ≤ e^15 here)
    tol = 1e-16 * np.exp(15.0) * np.max(np.abs(want), axis=1, keepdims=True)
    assert np.all(np.abs(got[pd] - want) <= tol)
    np.testing.assert_allclose(got[~pd], _newton_steps_eigh(grad[~pd], hess[~pd]), rtol=1e-12)
    assert (~pd).sum() >= k // 4


def test_bessel_terms_match_scipy_over_the_whole_range():
    # The likelihood's piecewise polynomials against scipy.special.i0e/i1e (reference library)
    # on a dense grid over [0, 1e6], the three METHODS §8 values, and u = 0 (I1/I0 = 0).
    u = np.concatenate(
        [
            [0.0, 1.0, 50.0, 700.0],
            np.geomspace(1e-6, 1.0, 20001),
            np.linspace(1.0, 60.0, 200001),
            np.geomspace(60.0, 1e6, 20001),
        ]
    )
    log_i0e, one_minus_rho = _bessel_terms(u)
    i0e = special.i0e(u)
    rho = special.i1e(u) / i0e
    log_i0 = np.log(i0e) + u
    # log i0e enters ℓ as log I0 = log i0e + u: absolute error ≤ 1e-14 of max(1, log I0)
    assert np.max(np.abs(log_i0e - np.log(i0e)) / np.maximum(1.0, log_i0)) < 1e-14
    refs = [0.0, *(r for _, r in _LOG_I0_REFS)]  # log I0(0) = 0, METHODS §8
    np.testing.assert_allclose(log_i0e[:4] + u[:4], refs, atol=2e-13)
    # ψ = u·ρ and κ = u²(1 − ρ²) enter the gradient and Hessian; 1 − ρ → 1/(2u) for large u
    # (A&S 9.7.1 with 9.7.3), so it is checked relative to itself
    np.testing.assert_allclose(1.0 - one_minus_rho[u >= 0.1], rho[u >= 0.1], rtol=3e-12)
    assert np.max(np.abs((1.0 - one_minus_rho) - rho)) < 3e-12
    mid = (u > 1.0) & (u <= 500.0)
    np.testing.assert_allclose(one_minus_rho[mid], 1.0 - rho[mid], rtol=1e-12)
    # above 500, 1 − i1e/i0e from scipy loses ~1e-10 of itself; the reference there is the
    # asymptotic series e^{−x}·√(2πx)·I_ν(x) ~ Σ_k (−1)^k·Π_{j≤k}(4ν² − (2j − 1)²)/(k!·8^k·x^k)
    # (Abramowitz & Stegun 9.7.1), 30 terms, far more than enough there
    far = u[u > 500.0]

    def terms(nu):
        term, out = np.ones_like(far), [np.ones_like(far)]
        for k in range(1, 30):
            term = term * -(4 * nu * nu - (2 * k - 1) ** 2) / (k * 8 * far)
            out.append(term)
        return out

    t0, t1 = terms(0), terms(1)
    # 1 − ρ = Σ_k (t0_k − t1_k) / Σ_k t0_k, the difference taken term by term (no cancellation)
    ref = sum(a - b for a, b in zip(t0, t1, strict=True)) / sum(t0)
    np.testing.assert_allclose(one_minus_rho[u > 500.0], ref, rtol=1e-12)


def test_chi2_cdf_rows_match_scipy_ncx2_including_the_far_lower_tail():
    # The GOF's 2-dof (non)central chi-square CDF against scipy.stats.ncx2.cdf (reference
    # library) over λ from 0 to 400 and y from 1e-3 to 600: far below the law's bulk it returns
    # 0, which the Rayleigh-tail bound e^{−(√λ − √y)²/2} < e^{−36} allows (absolute 2.3e-16).
    lam, y = np.meshgrid(
        np.r_[0.0, 1e-6, 1e-3, np.geomspace(0.1, 400.0, 60)], np.geomspace(1e-3, 600.0, 300)
    )
    lam, y = lam.ravel(), y.ravel()
    got = _chi2_2_cdf_rows(y, lam)
    ref = stats.ncx2.cdf(y, 2, np.maximum(lam, 1e-300))
    zero = (lam >= 1e-4) & (got == 0.0)
    assert zero.sum() > 1000  # the shortcut is exercised
    assert np.max(ref[zero]) < 2.3e-16
    np.testing.assert_allclose(got, ref, rtol=2e-9, atol=3e-16)


_LOG_I0_REFS = [(1.0, 0.23591435850717865), (50.0, 47.127575501871805), (700.0, 695.80569999844345)]


def _independent_log_likelihood(z, a, n0):
    """Orthogonal 2-FSK mixture log density from scipy.stats.rice and Gaussian densities.

    The complex matched output has |z| Rician (b = A/σ, scale σ = sqrt(N0/2)) and uniform
    phase, so p(z) = rice.pdf(|z|)/(2π|z|); the other branch is CN(0, N0).
    """
    sigma = math.sqrt(n0 / 2)
    r = np.abs(z)
    terms = []
    for i in range(2):
        matched = stats.rice.pdf(r[:, i], a / sigma, scale=sigma) / (2 * np.pi * r[:, i])
        other = np.exp(-(r[:, 1 - i] ** 2) / n0) / (np.pi * n0)
        terms.append(matched * other)
    return float(np.sum(np.log(0.5 * terms[0] + 0.5 * terms[1])))


def test_nda_maximises_the_independent_likelihood():
    rng = np.random.default_rng(11)
    z, _ = draw_fsk(rng, 400, 2, 3.0, n0=0.7)
    fit = fit_nda(z, modulation="2fsk")
    assert fit.converged
    # the reported log-likelihood is the full density (constants included)
    assert fit.log_likelihood == pytest.approx(
        _independent_log_likelihood(z, fit.amplitude, fit.noise_var), rel=1e-12
    )

    # a general-purpose optimiser on the independent likelihood lands on the same point
    def nll(p):
        return -_independent_log_likelihood(z, math.exp(p[0]), math.exp(p[1]))

    res = optimize.minimize(
        nll,
        [0.0, 0.0],
        method="Nelder-Mead",
        options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 4000},
    )
    assert math.exp(res.x[0]) == pytest.approx(fit.amplitude, rel=1e-5)
    assert math.exp(res.x[1]) == pytest.approx(fit.noise_var, rel=1e-5)


def test_da_likelihood_matches_rice_plus_exponential():
    rng = np.random.default_rng(12)
    z, sym = draw_fsk(rng, 300, 4, 6.0, n0=2.0)
    fit = fit_da(z, sym, modulation="4fsk")
    a, n0 = fit.amplitude, fit.noise_var
    sigma = math.sqrt(n0 / 2)
    r = np.abs(z)
    matched = r[np.arange(300), sym]
    ll = np.sum(np.log(stats.rice.pdf(matched, a / sigma, scale=sigma) / (2 * np.pi * matched)))
    others = np.ones_like(r, dtype=bool)
    others[np.arange(300), sym] = False
    ll += np.sum(-(r[others] ** 2) / n0 - math.log(math.pi * n0))
    assert fit.converged
    assert fit.log_likelihood == pytest.approx(float(ll), rel=1e-12)


# --------------------------------------------------------------------------------------------
# Bias of the NDA estimator
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("m", [2, 4])
@pytest.mark.parametrize("esn0_db", [-3.0, 0.0, 3.0, 6.0, 10.0, 15.0])
def test_nda_unbiased(m, esn0_db):
    trials = 60
    est = monte_carlo(m, esn0_db, 3000, trials, seed=int(100 * m + 10 * esn0_db + 1000))["nda"]
    gamma = 10 ** (esn0_db / 10)
    tol = 4 * est.std(ddof=1) / math.sqrt(trials)  # 4 standard errors of the mean
    assert abs(est.mean() - gamma) < tol


@pytest.mark.parametrize(
    "esn0_db, methods_mean_db",
    # METHODS §3 [computed]: BFSK, 4000 symbols, truth -3/0/+3 dB -> -3.03/+0.02/+3.03 dB
    [(-3.0, -3.03), (0.0, 0.02), (3.0, 3.03)],
)
def test_nda_reproduces_methods_bfsk_check(esn0_db, methods_mean_db):
    trials = 100
    est = monte_carlo(2, esn0_db, 4000, trials, seed=int(7000 + 10 * esn0_db))["nda"]
    mean_db = 10 * math.log10(est.mean())
    # standard error of the mean in dB: 10/ln10 · std(γ̂)/(γ̂̄ √T)
    se_db = 10 / math.log(10) * est.std(ddof=1) / (est.mean() * math.sqrt(trials))
    assert abs(mean_db - methods_mean_db) < 4 * se_db
    assert abs(mean_db - esn0_db) < 4 * se_db


# --------------------------------------------------------------------------------------------
# Spread against the Cramér-Rao bound (METHODS §3 table, N·var(γ̂)/γ²)
# --------------------------------------------------------------------------------------------

CRB_TABLE = {  # METHODS §3 [computed]: (NC-DA M=2, NC-DA M=4, NC-NDA M=2, NC-NDA M=4)
    0.0: (5.637, 3.865, 26.46, 24.47),
    3.0: (2.563, 1.724, 5.502, 4.298),
    6.0: (1.470, 0.925, 1.900, 1.256),
    10.0: (0.958, 0.525, 0.974, 0.534),
    15.0: (0.756, 0.359, 0.757, 0.360),
}


def _crb(esn0_db, m, kind):
    da2, da4, nda2, nda4 = CRB_TABLE[esn0_db]
    return {("da", 2): da2, ("da", 4): da4, ("nda", 2): nda2, ("nda", 4): nda4}[(kind, m)]


def _check_spread_and_coverage(m, esn0_db, trials):
    n = 2000
    mc = monte_carlo(m, esn0_db, n, trials, seed=int(5000 + 100 * m + 10 * esn0_db), with_da=True)
    gamma = 10 ** (esn0_db / 10)
    for kind in ("nda", "da"):
        ratio = n * mc[kind].var(ddof=1) / gamma**2 / _crb(esn0_db, m, kind)
        # the sample variance has relative standard error sqrt(2/(T-1)) (8.9 % at T = 250): 25 %
        # is about 3 standard errors and leaves room for the ML's small-sample excess.
        assert abs(ratio - 1) < 0.25, (kind, ratio)
        coverage = mc[kind + "_cov"].mean()
        # binomial standard error at 95 % and T = 250 is 1.4 %: 90-99 % is about ±3 of them
        assert 0.90 <= coverage <= 0.99, (kind, coverage)


@pytest.mark.parametrize("m, esn0_db", [(2, 0.0), (2, 10.0), (4, 3.0), (4, 15.0)])
def test_spread_near_crb_and_ci_coverage(m, esn0_db):
    _check_spread_and_coverage(m, esn0_db, trials=250)


@pytest.mark.slow
@pytest.mark.parametrize("m", [2, 4])
@pytest.mark.parametrize("esn0_db", sorted(CRB_TABLE))
def test_spread_near_crb_full_table(m, esn0_db):
    _check_spread_and_coverage(m, esn0_db, trials=400)


def _rician_da_crb(esn0_db, m):
    """N·CRB(γ)/γ² of DA noncoherent M-FSK by quadrature of the Rician Fisher information.

    Per symbol: the matched envelope r is Rician, log p = log(2r/N0) − (r² + A²)/N0 +
    log I0(2Ar/N0); the M − 1 other branches add (M − 1)/N0² to the N0 information
    (exponential energies of mean N0). CRB of γ = A²/N0 by the delta method.
    """
    gamma, n0 = 10 ** (esn0_db / 10), 1.0
    a = math.sqrt(gamma)

    def pdf(r):
        return (2 * r / n0) * np.exp(-((r - a) ** 2) / n0) * special.i0e(2 * a * r / n0)

    def score(r):
        rho = special.i1e(2 * a * r / n0) / special.i0e(2 * a * r / n0)
        return (
            -2 * a / n0 + 2 * r / n0 * rho,
            -1 / n0 + (r * r + a * a) / n0**2 - 2 * a * r / n0**2 * rho,
        )

    info = np.zeros((2, 2))
    top = a + 15 * math.sqrt(n0 / 2) + 5
    for i, j in [(0, 0), (0, 1), (1, 1)]:
        info[i, j] = info[j, i] = integrate.quad(
            lambda r, i=i, j=j: score(r)[i] * score(r)[j] * pdf(r), 0, top, points=[a], limit=400
        )[0]
    info[1, 1] += (m - 1) / n0**2
    grad = np.array([2 * a / n0, -a * a / n0**2])
    return float(grad @ np.linalg.solve(info, grad)) / gamma**2


@pytest.mark.parametrize("m", [2, 4])
@pytest.mark.parametrize("esn0_db", sorted(CRB_TABLE))
def test_da_crb_table_by_quadrature(m, esn0_db):
    # METHODS states ±0.5 % for its table
    assert _rician_da_crb(esn0_db, m) == pytest.approx(_crb(esn0_db, m, "da"), rel=5e-3)


@pytest.mark.parametrize("m", [2, 4])
def test_da_crb_high_snr_limit(m):
    # Derived: at high SNR the envelope is Gaussian (var N0/2) around A, giving information 2/N0
    # on A and 1/(2N0²) on N0, the other branches (M−1)/N0²: N·CRB/γ² → 2/γ + 1/(M − ½).
    # The neglected terms are O(1/γ) relative (Rician vs Gaussian envelope): allow 1.5/γ.
    for esn0_db in (15.0, 30.0):
        gamma = 10 ** (esn0_db / 10)
        limit = 2 / gamma + 1 / (m - 0.5)
        exact = _crb(esn0_db, m, "da") if esn0_db in CRB_TABLE else _rician_da_crb(esn0_db, m)
        assert abs(exact / limit - 1) < 1.5 / gamma


# --------------------------------------------------------------------------------------------
# Decision-directed bias (METHODS §3, [computed])
# --------------------------------------------------------------------------------------------

# DD sampling spread at N = 200000 is about 0.01-0.02 dB; 0.06 dB is about 4 of those.
DD_N = 200_000


@pytest.mark.parametrize(
    "esn0_db, expected_db",
    [(-10.0, 3.02), (0.0, 3.63), (3.0, 4.62), (6.0, 6.45), (10.0, 10.02)],
)
def test_dd_bias_reproduced(esn0_db, expected_db):
    rng = np.random.default_rng(int(300 + 10 * esn0_db))
    z, _ = draw_fsk(rng, DD_N, 2, esn0_db)
    fit = fit_dd(z, modulation="2fsk", gof=False)
    assert fit.method == "dd-moment"
    assert fit.esn0_db == pytest.approx(expected_db, abs=0.06)


@pytest.mark.parametrize("m, expected_db", [(2, 3.01), (4, 3.54)])
def test_dd_with_no_signal(m, expected_db):
    rng = np.random.default_rng(400 + m)
    z = (rng.standard_normal((DD_N, m)) + 1j * rng.standard_normal((DD_N, m))) / math.sqrt(2)
    fit = fit_dd(z, modulation=MOD[m], gof=False)
    assert fit.esn0_db == pytest.approx(expected_db, abs=0.06)
    # order statistics of M unit exponentials (common practice, derived): E[max] = H_M
    # (harmonic number), rest mean (M − H_M)/(M − 1) -> exact asymptote
    h = sum(1 / k for k in range(1, m + 1))
    rest = (m - h) / (m - 1)
    assert fit.esn0_db == pytest.approx(10 * math.log10((h - rest) / rest), abs=0.06)


# --------------------------------------------------------------------------------------------
# Non-orthogonal tones (h = 1/2)
# --------------------------------------------------------------------------------------------


def test_half_index_correlation_is_two_over_pi():
    t = (np.arange(200000) + 0.5) / 200000  # midpoint rule over one symbol, T = 1
    rho = np.mean(np.exp(1j * 2 * np.pi * 0.5 * t))
    assert rho == pytest.approx(RHO_HALF, abs=1e-9)


@pytest.mark.parametrize("esn0_db", [3.0, 8.0, 12.0])
def test_nonorthogonal_with_gram_unbiased_without_badly_off(esn0_db):
    rng = np.random.default_rng(int(600 + esn0_db))
    trials, gamma = 40, 10 ** (esn0_db / 10)
    est, naive = [], []
    for _ in range(trials):
        z, _ = draw_fsk(rng, 2000, 2, esn0_db, gram=GRAM_HALF)
        est.append(fit_nda(z, GRAM_HALF, modulation="2fsk", gof=False).esn0)
        f = fit_nda(z, modulation="2fsk", gof=False)  # correlation ignored (R = I)
        naive.append(f.esn0_db if f.esn0_db is not None else -math.inf)
    est = np.array(est)
    assert abs(est.mean() - gamma) < 4 * est.std(ddof=1) / math.sqrt(trials)
    # ignoring the correlation: the leak into the other branch looks like noise, and the
    # mixture fit collapses: every estimate more than 3 dB off (or at A = 0)
    assert np.all(np.abs(np.array(naive) - esn0_db) > 3.0)


def test_nonorthogonal_gof_and_da():
    rng = np.random.default_rng(610)
    z, sym = draw_fsk(rng, 4000, 2, 8.0, gram=GRAM_HALF)
    good = fit_nda(z, GRAM_HALF, modulation="2fsk")
    bad = fit_nda(z, modulation="2fsk")
    assert good.converged and good.gof_pvalue > 1e-3
    assert bad.gof_pvalue is not None and bad.gof_pvalue < 1e-6
    da = fit_da(z, sym, GRAM_HALF, modulation="2fsk")
    # one trial: within 4 standard deviations from the interval (half width / 1.96)
    half = (da.esn0_db_ci95[1] - da.esn0_db_ci95[0]) / 2
    assert abs(da.esn0_db - 8.0) < 4 * half / 1.96


def test_ill_conditioned_gram_rejected():
    eps = 1e-7
    r = np.array([[1, 1 - eps], [1 - eps, 1]], dtype=complex)
    z = np.ones((50, 2), dtype=complex)
    with pytest.raises(ParameterError, match="too close to separate"):
        fit_nda(z, r, modulation="2fsk")


# --------------------------------------------------------------------------------------------
# OOK
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("esn0_db", [6.0, 10.0, 15.0])
def test_ook_nda_unbiased_average_energy(esn0_db):
    rng = np.random.default_rng(int(700 + esn0_db))
    trials, gamma = 60, 10 ** (esn0_db / 10)
    est = np.array(
        [
            fit_nda(draw_ook(rng, 2000, esn0_db)[0], modulation="ook", gof=False).esn0
            for _ in range(trials)
        ]
    )
    assert abs(est.mean() - gamma) < 4 * est.std(ddof=1) / math.sqrt(trials)


def test_ook_estimated_p_on():
    rng = np.random.default_rng(710)
    z, sym = draw_ook(rng, 20000, 10.0, p_on=0.3)
    fit = fit_nda(z, modulation="ook", estimate_p_on=True)
    assert fit.converged
    # p̂ from 20000 symbols: binomial spread sqrt(.3·.7/20000) = 0.0032 (plus mixing): 4 of them
    assert fit.priors[1] == pytest.approx(0.3, abs=0.013)
    half = (fit.esn0_db_ci95[1] - fit.esn0_db_ci95[0]) / 2
    assert abs(fit.esn0_db - 10.0) < 4 * half / 1.96
    da = fit_da(z, sym, modulation="ook")
    assert da.priors[1] == pytest.approx(sym.mean())
    assert abs(da.esn0_db - 10.0) < 4 * (da.esn0_db_ci95[1] - da.esn0_db_ci95[0]) / 2 / 1.96


@pytest.mark.parametrize(
    "ebn0_db, b_ref",
    # METHODS §1 [computed]: optimum normalised threshold b (σ = 1 per dimension, a² = 4γ_b)
    [(6.0, 2.51100), (10.0, 3.55271), (14.0, 5.30149)],
)
def test_ook_threshold_matches_theory(ebn0_db, b_ref):
    gamma_b, n0 = 10 ** (ebn0_db / 10), 2.0  # σ² = N0/2 = 1 per dimension
    a = math.sqrt(gamma_b * n0 / 0.5)  # average-energy convention: Eb = A²/2
    assert a**2 == pytest.approx(4 * gamma_b)
    b = ook_decision_threshold(a, n0, 0.5) / math.sqrt(n0 / 2)
    assert b == pytest.approx(b_ref, abs=5e-6)
    # independent root of e^{−a²/2}·I0(a·b) = 1 with scipy.special.i0 (Annamalai & Bhargava,
    # IEEE Trans. Commun. 47(9), 1999); and their approximation b ≈ sqrt(2 + a²/4) within 5 %
    ref = optimize.brentq(lambda x: -(a**2) / 2 + math.log(special.i0(a * x)), 0.1, 20)
    assert b == pytest.approx(ref, rel=1e-9)
    assert b == pytest.approx(math.sqrt(2 + a**2 / 4), rel=0.05)


@pytest.mark.parametrize(
    "modulation, ber_ref",
    # METHODS §1 BER at Eb/N0 = 10 dB [computed]: NC OOK optimum 1.91281e-3 (Annamalai &
    # Bhargava 1999), NC BFSK ½e^{−γ/2} = 3.36897e-3 (Proakis & Salehi 5th ed. §4.5, mem)
    [("ook", 1.91281e-3), ("2fsk", 3.36897e-3)],
)
def test_decisions_reach_theoretical_error_rate(modulation, ber_ref):
    rng = np.random.default_rng(720)
    n = 400_000
    if modulation == "ook":
        z, sym = draw_ook(rng, n, 10.0)
    else:
        z, sym = draw_fsk(rng, n, 2, 10.0)
    fit = fit_nda(z, modulation=modulation, gof=False)
    errors = int(np.sum(decide_symbols(z, fit, modulation=modulation) != sym))
    expected = ber_ref * n
    assert abs(errors - expected) < 4 * math.sqrt(expected)  # Poisson spread of the count


def test_posteriors_and_decisions_agree():
    rng = np.random.default_rng(730)
    z, sym = draw_fsk(rng, 3000, 4, 4.0)
    fit = fit_nda(z, modulation="4fsk")
    post = symbol_posteriors(z, fit, modulation="4fsk")
    assert post.shape == (3000, 4)
    np.testing.assert_allclose(post.sum(axis=1), 1.0, rtol=1e-12)
    np.testing.assert_array_equal(
        np.argmax(post, axis=1), decide_symbols(z, fit, modulation="4fsk")
    )
    zo, _ = draw_ook(rng, 3000, 8.0)
    fo = fit_nda(zo, modulation="ook")
    po = symbol_posteriors(zo, fo, modulation="ook")
    np.testing.assert_array_equal(
        (po[:, 1] > 0.5).astype(int), decide_symbols(zo, fo, modulation="ook")
    )


# --------------------------------------------------------------------------------------------
# Goodness of fit
# --------------------------------------------------------------------------------------------


def test_energy_cdf_matches_scipy_laws():
    x = np.linspace(0.0, 30.0, 301)
    n0, a = 1.7, 2.3
    e = np.column_stack([x, x[::-1]])
    # pure noise: chi2(2, scale = N0/2) = expon(scale = N0) (METHODS §0)
    noise = branch_energy_cdf(e, amplitude=0.0, noise_var=n0, modulation="2fsk")
    np.testing.assert_allclose(noise, stats.chi2(2, scale=n0 / 2).cdf(e), atol=1e-14)
    np.testing.assert_allclose(noise, stats.expon(scale=n0).cdf(e), atol=1e-14)
    # known tone 0 sent: branch 0 noncentral, branch 1 central
    known = branch_energy_cdf(
        e, amplitude=a, noise_var=n0, modulation="2fsk", symbols=np.zeros(301, dtype=int)
    )
    np.testing.assert_allclose(
        known[:, 0], stats.ncx2(2, 2 * a * a / n0, scale=n0 / 2).cdf(x), atol=1e-12
    )
    np.testing.assert_allclose(known[:, 1], stats.chi2(2, scale=n0 / 2).cdf(x[::-1]), atol=1e-14)
    # marginal: ½ noncentral + ½ central
    marg = branch_energy_cdf(e, amplitude=a, noise_var=n0, modulation="2fsk")
    ref = 0.5 * stats.ncx2(2, 2 * a * a / n0, scale=n0 / 2).cdf(x) + 0.5 * stats.chi2(
        2, scale=n0 / 2
    ).cdf(x)
    np.testing.assert_allclose(marg[:, 0], ref, atol=1e-12)
    # non-orthogonal leak: λ = 2A²|ρ|²/N0 in the other branch
    leak = branch_energy_cdf(
        e,
        amplitude=a,
        noise_var=n0,
        gram=GRAM_HALF,
        modulation="2fsk",
        symbols=np.zeros(301, dtype=int),
    )
    lam = 2 * a * a * abs(RHO_HALF) ** 2 / n0
    np.testing.assert_allclose(
        leak[:, 1], stats.ncx2(2, lam, scale=n0 / 2).cdf(x[::-1]), atol=1e-12
    )


@pytest.mark.parametrize("m, esn0_db", [(2, 8.0), (4, 3.0)])
def test_gof_pvalues_not_small_for_awgn(m, esn0_db):
    # Under the model each branch's KS p-value is (with parameters estimated from the same data)
    # stochastically larger than uniform, and Bonferroni over branches keeps P(p < 0.05) ≤ 0.05.
    # Of 20 independent data sets we then expect at most 1 below 0.05; 3 or more happens with
    # probability ≤ 7.5 % (binomial). A wrong law fails all 20 (next test).
    pvals = []
    for seed in range(20):
        z, _ = draw_fsk(np.random.default_rng(800 + seed), 2000, m, esn0_db)
        pvals.append(fit_nda(z, modulation=MOD[m]).gof_pvalue)
    pvals = np.array(pvals)
    assert np.sum(pvals < 0.05) < 3
    assert np.median(pvals) > 0.2


def test_gof_rejects_a_wrong_law():
    # sensitivity of the check above: a 50 % wrong noise level is rejected on every data set
    for seed in range(5):
        z, _ = draw_fsk(np.random.default_rng(820 + seed), 2000, 2, 8.0)
        fit = fit_nda(z, modulation="2fsk")
        _, p, n = check_energy_laws(
            z, amplitude=fit.amplitude, noise_var=1.5 * fit.noise_var, modulation="2fsk"
        )
        assert n == 4000 and p < 1e-6


def _with_noise(rng, n, m, esn0_db, noise):
    a = math.sqrt(10 ** (esn0_db / 10))
    sym = rng.integers(0, m, n)
    z = noise.astype(complex)
    z[np.arange(n), sym] += a * np.exp(1j * rng.uniform(0, 2 * np.pi, n))
    return z


def test_gof_flags_non_gaussian_noise():
    rng = np.random.default_rng(830)
    n, m = 2000, 2
    cn = (rng.standard_normal((n, m)) + 1j * rng.standard_normal((n, m))) / math.sqrt(2)
    # impulsive: Gaussian scale mixture, 10 % of values 3.3x larger, E|n|² = 1
    scale = np.where(rng.random((n, m)) < 0.1, math.sqrt(5.5), math.sqrt(0.5))
    impulsive = _with_noise(rng, n, m, 8.0, cn * scale)
    # Laplacian components, E|n|² = 1
    lap = (rng.laplace(size=(n, m)) + 1j * rng.laplace(size=(n, m))) / 2
    laplacian = _with_noise(rng, n, m, 8.0, lap)
    # an interfering tone of random phase in branch 1, as strong as the noise
    interfered = _with_noise(rng, n, m, 8.0, cn.copy())
    interfered[:, 1] += np.exp(1j * rng.uniform(0, 2 * np.pi, n))
    for z in (impulsive, laplacian, interfered):
        fit = fit_nda(z, modulation="2fsk")
        assert fit.gof_pvalue < 1e-4
    awgn = _with_noise(rng, n, m, 8.0, cn)
    assert fit_nda(awgn, modulation="2fsk").gof_pvalue > 1e-3


# --------------------------------------------------------------------------------------------
# Health and edge cases
# --------------------------------------------------------------------------------------------


def test_pure_noise_is_flagged_with_an_upper_bound():
    for seed in range(6):
        rng = np.random.default_rng(900 + seed)
        z = (rng.standard_normal((3000, 2)) + 1j * rng.standard_normal((3000, 2))) / math.sqrt(2)
        fit = fit_nda(z, modulation="2fsk")
        assert not fit.converged
        assert "no signal" in fit.message
        assert fit.esn0_db_upper95 is not None and fit.esn0_db_upper95 < 3.0
        assert fit.esn0 is None or fit.esn0_db < fit.esn0_db_upper95
        json.dumps(fit.to_dict(), allow_nan=False)  # never NaN


def test_too_few_symbols():
    rng = np.random.default_rng(910)
    z, sym = draw_fsk(rng, 19, 2, 10.0)
    for fit in (
        fit_nda(z, modulation="2fsk"),
        fit_da(z, sym, modulation="2fsk"),
        fit_dd(z, modulation="2fsk"),
    ):
        assert not fit.converged and fit.esn0 is None
        assert "19 symbols" in fit.message and "20" in fit.message
    assert fit_nda(draw_fsk(rng, 20, 2, 10.0)[0], modulation="2fsk").esn0 is not None


def test_noise_free_input_is_implausible():
    rng = np.random.default_rng(920)
    z, _ = draw_fsk(rng, 500, 2, 80.0)
    fit = fit_nda(z, modulation="2fsk")
    assert not fit.converged and "implausible" in fit.message


@pytest.mark.parametrize("bad", [np.nan, np.inf])
def test_non_finite_input_rejected(bad):
    z = np.ones((100, 2), dtype=complex)
    z[7, 1] = bad
    with pytest.raises(ParameterError, match="non-finite"):
        fit_nda(z, modulation="2fsk")


@pytest.mark.parametrize(
    "call, match",
    [
        (lambda: fit_nda(np.ones((50, 3)), modulation="2fsk"), "needs"),
        (lambda: fit_nda(np.ones((50, 2)), modulation="8fsk"), "not known"),
        (lambda: fit_nda(np.ones((50, 2)), np.eye(3), modulation="2fsk"), "gram"),
        (lambda: fit_nda(np.ones((50, 2)), [[1, 0.5], [0.2, 1]], modulation="2fsk"), "Hermitian"),
        (lambda: fit_nda(np.ones((50, 2)), modulation="2fsk", priors=[0.7, 0.7]), "sum"),
        (lambda: fit_nda(np.ones((50, 2)), modulation="2fsk", estimate_p_on=True), "ook"),
        (lambda: fit_da(np.ones((50, 2)), np.full(50, 2), modulation="2fsk"), "symbols"),
        (lambda: fit_da(np.ones((50, 2)), np.zeros(49, int), modulation="2fsk"), "symbols"),
        (lambda: ook_decision_threshold(1.0, -1.0), "noise_var"),
    ],
)
def test_bad_parameters_raise_parameter_error(call, match):
    with pytest.raises(ParameterError, match=match):
        call()


def test_to_dict_is_json_safe_and_complete():
    rng = np.random.default_rng(930)
    z, sym = draw_fsk(rng, 1000, 2, 7.0)
    for fit in (
        fit_nda(z, modulation="2fsk"),
        fit_da(z, sym, modulation="2fsk"),
        fit_dd(z, modulation="2fsk"),
    ):
        d = fit.to_dict()
        json.dumps(d, allow_nan=False)
        assert set(d) == set(NoncoherentFit.__dataclass_fields__)
        assert d["ebn0_db"] == pytest.approx(d["esn0_db"])  # 1 bit per 2-FSK symbol
    f4 = fit_nda(draw_fsk(rng, 1000, 4, 7.0)[0], modulation="4fsk")
    assert f4.ebn0_db == pytest.approx(f4.esn0_db - 10 * math.log10(2))
    assert fit_dd(z, modulation="2fsk").log_likelihood is None


def test_scale_invariance_and_zero_input():
    # Es/N0 is a ratio: scaling z by s scales A by s, N0 by s², and the density by s^(−2·N·M)
    rng = np.random.default_rng(940)
    z, _ = draw_fsk(rng, 500, 2, 9.0)
    base = fit_nda(z, modulation="2fsk")
    for s in (1e-150, 1e150):
        f = fit_nda(z * s, modulation="2fsk")
        assert f.esn0_db == pytest.approx(base.esn0_db, abs=1e-9)
        assert f.amplitude == pytest.approx(base.amplitude * s, rel=1e-9)
        shift = -2 * 500 * 2 * math.log(s)
        assert f.log_likelihood == pytest.approx(base.log_likelihood + shift, rel=1e-12)
        np.testing.assert_array_equal(
            decide_symbols(z * s, f, modulation="2fsk"), decide_symbols(z, base, modulation="2fsk")
        )
    for fit in (
        fit_nda(np.zeros((50, 2)), modulation="2fsk"),
        fit_dd(np.zeros((50, 1)), modulation="ook"),
    ):
        assert not fit.converged and fit.esn0 is None and "zero" in fit.message


def test_private_log_i0_agrees_with_theory():
    # fit keeps its own log I0 (it reuses i0e(u) for I1/I0 in the hot loop); the project's
    # theory module evaluates the I0 power series below x = 2, where log(i0e(x)) + x loses
    # relative digits (3.6e-12 at x = 0.01). The likelihood adds log I0 terms, so what counts
    # is the error relative to max(1, log I0): at the float64 level, 2e-15 (measured 6.6e-16).
    theory = pytest.importorskip("iqstat.theory")
    x = np.concatenate([np.geomspace(1e-9, 1e-2, 20), np.linspace(0.02, 800, 200)])
    ref = theory.log_i0(x)
    assert np.all(np.abs(_log_i0(x) - ref) <= 2e-15 * np.maximum(1.0, np.abs(ref)))
    small = x < 1e-2  # the Maclaurin branch is accurate in relative terms too
    np.testing.assert_allclose(_log_i0(x[small]), ref[small], rtol=1e-13, atol=0)


@pytest.mark.parametrize("lam", [0.0, 1e-9, 1e-6, 9.9e-5, 1e-4, 3.0, 80.0])
def test_chi2_cdf_against_scipy_noncentral_law(lam):
    # scipy.stats.ncx2 (central chi2 for λ = 0) as the reference. Below λ = 1e-4 two
    # Poisson-series terms are used; the remainder bound (λ/2)²/2 is the tolerance there.
    from scipy import stats

    from iqstat.fit.ncx2_cdf import _chi2_2_cdf

    y = np.concatenate([np.geomspace(1e-6, 1.0, 30), np.linspace(1.0, 200.0, 60)])
    ref = stats.chi2.cdf(y, 2) if lam == 0 else stats.ncx2.cdf(y, 2, lam)
    tol = (lam / 2) ** 2 / 2 + 1e-14 if lam < 1e-4 else 1e-12
    assert np.max(np.abs(_chi2_2_cdf(y, lam) - ref)) <= tol


@pytest.mark.parametrize(("modulation", "n"), [("2fsk", 540), ("4fsk", 333), ("ook", 1000)])
def test_gof_statistic_equals_scipy_kstest(modulation, n):
    # check_energy_laws evaluates the CDF only where the KS maximum can be; its statistic
    # must be scipy.stats.kstest's on the full probability-integral transform.
    from scipy import stats

    from iqstat.fit import N_BRANCHES

    rng = np.random.default_rng(n)
    m = N_BRANCHES[modulation]
    sym = rng.integers(0, 2 if modulation == "ook" else m, n)
    z = (rng.standard_normal((n, m)) + 1j * rng.standard_normal((n, m))) * np.sqrt(0.5)
    phase = np.exp(1j * rng.uniform(0, 2 * np.pi, n))
    if modulation == "ook":
        z[:, 0] += 3.0 * sym * phase
    else:
        z[np.arange(n), sym] += 3.0 * phase
    stat, _, n_values = check_energy_laws(z, amplitude=3.1, noise_var=0.95, modulation=modulation)
    u = branch_energy_cdf(np.abs(z) ** 2, amplitude=3.1, noise_var=0.95, modulation=modulation)
    ref = max(stats.kstest(u[:, j], "uniform").statistic for j in range(m))
    assert n_values == n * m
    # the GOF's CDF of λ in [4, 576] is a table with absolute error < 1e-11 (test below)
    assert stat == pytest.approx(ref, rel=1e-12, abs=1e-10)


def test_profile_likelihood_interval_at_low_esn0():
    # Below 6 dB the interval is the profile-likelihood one (2·Δℓ = χ²₁(0.95) = 3.841,
    # Wilks), which follows the skew of the likelihood in log γ; above, the Wald one.
    rng = np.random.default_rng(77)

    def outputs(n, es_db):
        a = np.sqrt(10 ** (es_db / 10))
        z = (rng.standard_normal((n, 2)) + 1j * rng.standard_normal((n, 2))) / np.sqrt(2)
        s = rng.integers(0, 2, n)
        z[np.arange(n), s] += a * np.exp(2j * np.pi * rng.random(n))
        return z

    low = fit_nda(outputs(2000, 1.0), modulation="2fsk", gof=False)
    assert low.ci_method == "profile-likelihood"
    lo, hi = low.esn0_db_ci95
    assert lo < low.esn0_db < hi
    high = fit_nda(outputs(2000, 10.0), modulation="2fsk", gof=False)
    assert high.ci_method == "wald-log-observed-info"


def test_gof_cdf_table_matches_scipy_chndtr_on_a_dense_grid():
    # The GOF's interpolation table of F(y; 2, λ) (Chebyshev interpolation of the exact law,
    # L. N. Trefethen, Approximation Theory and Approximation Practice, SIAM 2013, ch. 4 and 8)
    # against scipy.special.chndtr (the reference library's ufunc under stats.ncx2.cdf) over
    # the whole range it serves: λ in [4, 576], t = √y − √λ from below the window's lower cut
    # to above its upper end, and y down to 0 (small λ). The KS statistic resolves ~1/n, n ~
    # 500: an absolute error of 1e-9 would do; the table gives ~3e-12, 1e-10 is asserted.
    from iqstat.fit.ncx2_cdf import _ncx2_cdf_from_pairs, _ncx2_cdf_pairs

    lam = np.r_[4.0, np.geomspace(4.0, 576.0, 97)[1:-1], 576.0]
    a = np.sqrt(lam)
    t = np.r_[np.linspace(-8.6, 7.7, 1501), np.linspace(-1.0, 1.0, 77)]
    b = a[:, None] + t
    b = np.where(b < 0, np.linspace(0.0, 1.0, t.size), b)  # small λ: y from 0 instead
    y = (b * b).ravel()
    slot = np.repeat(np.arange(lam.size), t.size)
    got = _ncx2_cdf_from_pairs(y, a[slot], slot, _ncx2_cdf_pairs(lam))
    ref = special.chndtr(y, 2.0, lam[slot])
    assert 0.05 < np.mean((ref > 1e-6) & (ref < 1 - 1e-6)) < 0.95  # the bulk is covered
    assert np.max(np.abs(got - ref)) < 1e-10
    # above the window F is set to 1: the survival function there is below 6.7e-13
    top = got == 1.0
    assert top.sum() > 100
    assert np.max(stats.ncx2.sf(y[top], 2, lam[slot][top])) < 6.7e-13


def test_gof_with_table_equals_gof_with_exact_cdf(monkeypatch):
    # The batched GOF statistics and p-values with the table equal those with chndtr
    # everywhere (table range emptied) to 1e-10, on 2-FSK outputs over Es/N0 3-26 dB: λ = 4.0
    # and 796 lie outside the table's [4, 576] (chndtr), the others inside.
    # _ks_marginal_many reads the table range from its own module's globals (imported there
    # from iqstat.fit.ncx2_cdf), so that is the module to patch
    import iqstat.fit.goodness_of_fit as gof_module

    rng = np.random.default_rng(4)
    ns = [560, 300, 900, 450, 200]
    es_db = [3.0, 9.0, 16.0, 23.0, 26.0]
    zs = []
    for n, es in zip(ns, es_db, strict=True):
        z = (rng.standard_normal((n, 2)) + 1j * rng.standard_normal((n, 2))) * np.sqrt(0.5)
        s = rng.integers(0, 2, n)
        z[np.arange(n), s] += math.sqrt(10 ** (es / 10)) * np.exp(2j * np.pi * rng.random(n))
        zs.append(z)
    y = np.concatenate([np.abs(z) ** 2 / 0.5 for z in zs])
    n = np.array(ns)
    starts = np.cumsum(n) - n
    lam = np.zeros((len(ns), 2, 2))
    lam[:, 0, 0] = lam[:, 1, 1] = 2.0 * 10 ** (np.array(es_db) / 10)  # λ = 2Es/N0
    priors = np.full((len(ns), 2), 0.5)
    d_tab, p_tab = gof_module._ks_marginal_many(y, starts, n, lam, priors)
    assert np.sum((lam[:, 0, 0] >= 4.0) & (lam[:, 0, 0] <= 576.0)) == 3
    monkeypatch.setattr(gof_module, "_NCX2_LAM_MIN", math.inf)
    d_ref, p_ref = gof_module._ks_marginal_many(y, starts, n, lam, priors)
    assert np.all(d_ref > 1e-3)
    np.testing.assert_allclose(d_tab, d_ref, rtol=0, atol=1e-10)
    np.testing.assert_allclose(p_tab, p_ref, rtol=0, atol=1e-10)


def test_gof_table_nodes_by_quadrature_match_scipy_ncx2():
    # The table's node values: the Rice distribution function accumulated by 3-point
    # Gauss–Legendre over short gaps (Abramowitz & Stegun 25.4.29), against
    # scipy.stats.ncx2.cdf (reference library), including b < 0 (F even in b).
    from iqstat.fit.ncx2_cdf import _ncx2_cdf_by_quadrature

    a = np.array([2.0, 5.0, 12.0, 24.0])
    t = np.linspace(-8.5, 7.5, 321)  # gaps of 0.05, as between the table's nodes
    got = _ncx2_cdf_by_quadrature(a, t)
    b = a[:, None] + t
    ref = stats.ncx2.cdf(b * b, 2, (a * a)[:, None])
    assert np.max(np.abs(got - ref)) < 1e-12


# --------------------------------------------------------------------------------------------
# Per-symbol Gram matrices (symbols of ⌊P⌋ and ⌈P⌉ samples)
# --------------------------------------------------------------------------------------------

# 2-FSK, h = 1, fs = 250 kS/s, Rs = 38.4 kBd: P = 6.51 samples per symbol, so the bank's
# symbols hold 6 or 7 whole samples and the tone templates are not orthogonal over either
# (Dirichlet kernel, iqstat.correlate.template_gram eq. 1: ρ = +0.088 over 6, −0.072 over 7).
FS_FEW, RS_FEW = 250e3, 38400.0
P_FEW = FS_FEW / RS_FEW
TONES_FEW = [-RS_FEW / 2, RS_FEW / 2]


@cache
def few_sample_bursts(esn0_db: float, n_bursts: int, n_sym: int = 560, seed: int = 4400):
    """CPFSK bursts from iqstat.synth.modulate + AWGN, through iqstat.correlate_symbols.

    Each symbol's samples are scaled by √(P/N_k) so that every symbol carries the same energy
    A²·P: the bank's whole-sample symbols otherwise differ in energy by N_k/P (6/6.51 vs
    7/6.51), a second model mismatch that the Gram matrices do not describe (see the report of
    this change); the scaling leaves each symbol's waveform, hence its leak R_k, unchanged.
    Truth (docs/synth.md): Es/N0 = P_mean·(fs/Rs)/σ² with P_mean the mean |s|² over the
    burst's samples. Returns zs, symbols, per-symbol Gram stacks, the truth per burst [dB].
    """
    from iqstat.correlate import correlate_symbols, symbol_boundaries, template_gram
    from iqstat.synth import modulate

    rng = np.random.default_rng(seed)
    a = 1.0
    sigma2 = a * a * P_FEW / 10 ** (esn0_db / 10)
    grams = {n: template_gram(TONES_FEW, float(n), FS_FEW) for n in (6, 7)}
    zs, syms, stacks, truth = [], [], [], []
    for _ in range(n_bursts):
        sym = rng.integers(0, 2, n_sym)
        t0 = 3.0 * rng.random()
        s = modulate(
            sym,
            modulation="2fsk",
            sample_rate_hz=FS_FEW,
            symbol_rate_hz=RS_FEW,
            tone_spacing_hz=RS_FEW,
            amplitude=a,
            phase_rad=2 * np.pi * rng.random(),
            timing_offset_samples=t0,
        )
        b = symbol_boundaries(t0, P_FEW, n_sym)
        nk = np.diff(b)
        s[b[0] : b[-1]] *= np.repeat(np.sqrt(P_FEW / nk), nk)
        p_mean = np.mean(np.abs(s[b[0] : b[-1]]) ** 2)
        truth.append(10 * math.log10(p_mean * P_FEW / sigma2))
        w = rng.standard_normal(len(s)) + 1j * rng.standard_normal(len(s))
        x = s + w * math.sqrt(sigma2 / 2)
        zs.append(correlate_symbols(x, FS_FEW, TONES_FEW, t0, P_FEW, n_sym))
        syms.append(sym)
        stacks.append(np.stack([grams[int(n)] for n in nk]))
    return zs, syms, stacks, np.array(truth)


def test_few_sample_grams_differ_as_the_dirichlet_kernel_says():
    # ρ(N) = (1/N)·Σ_m exp(jΔω(m − (N−1)/2)), Δω = 2πΔf/fs: the defining sum of the centred
    # unit-energy templates (template_gram eq. 1), evaluated here term by term; the values
    # +0.088 (6 samples) and −0.072 (7 samples) are the defect report's, from memory
    from iqstat.correlate import template_gram

    for n, rho_ref in ((6, 0.088), (7, -0.072)):
        m = np.arange(n) - (n - 1) / 2
        rho = np.mean(np.exp(2j * np.pi * RS_FEW / FS_FEW * m))
        assert rho.real == pytest.approx(rho_ref, abs=5e-4)
        assert template_gram(TONES_FEW, float(n), FS_FEW)[0, 1].real == pytest.approx(rho.real)


@pytest.mark.parametrize("esn0_db", [12.0, 20.0])
def test_per_symbol_grams_remove_the_leak_bias(esn0_db):
    # 32 bursts of 560 symbols; the mean over bursts of the dB estimate may differ from the
    # truth by 4 standard errors, the per-burst standard deviation taken from the Cramér-Rao
    # bound (iqstat.bounds, METHODS §3) with 10 % slack for its Monte Carlo and the NDA excess.
    from iqstat.bounds import crb_std_db
    from iqstat.correlate import template_gram
    from iqstat.fit import fit_da_many, fit_nda_many

    n_bursts, n_sym = 32, 560
    zs, syms, stacks, truth = few_sample_bursts(esn0_db, n_bursts, n_sym)
    for kind in ("nda", "da"):
        sd = 1.1 * crb_std_db(esn0_db, "2fsk", n_sym, kind=kind, n_monte_carlo=50_000)
        tol = 4 * sd / math.sqrt(n_bursts)
        for grams, ok in ((stacks, True), (template_gram(TONES_FEW, P_FEW, FS_FEW), False)):
            if kind == "nda":
                fits = fit_nda_many(zs, grams, modulation="2fsk", gof=False)
            else:
                fits = fit_da_many(zs, syms, grams, modulation="2fsk", gof=False)
            err = np.mean([f.esn0_db for f in fits] - truth)
            if ok:
                assert abs(err) < tol, (kind, err, tol)
            else:
                # one R for the burst (P exact, ~identity): the sent tone's leak |ρ_k|²·Es is
                # read as noise; measured −0.30 dB at 12 dB and −1.56 dB at 20 dB
                assert err < -2 * tol, (kind, err, tol)


def test_per_symbol_gof_does_not_flag_the_right_model():
    # AWGN at 20 dB, the correct per-symbol model: the branchwise KS p-value (Bonferroni) is
    # not small. With one R per burst the 20 dB leak makes the p-values small more often than
    # chance (measured: median 0.13, a quarter below 0.05, smallest 6e-4 over 32 bursts).
    from iqstat.fit import fit_da_many, fit_nda_many

    zs, syms, stacks, _ = few_sample_bursts(20.0, 32)
    nda = np.array([f.gof_pvalue for f in fit_nda_many(zs, stacks, modulation="2fsk")])
    da = np.array([f.gof_pvalue for f in fit_da_many(zs, syms, stacks, modulation="2fsk")])
    for p in (nda, da):
        assert p.min() > 1e-3
        # p-values of a test that keeps its level: P(p < 0.05) ≤ 0.05 per burst, so of 32
        # bursts 6 or more below 0.05 has binomial probability < 1.5 %
        assert np.sum(p < 0.05) < 6


def _two_class_stack(rng, n):
    from iqstat.correlate import template_gram

    g6, g7 = (template_gram(TONES_FEW, float(k), FS_FEW) for k in (6, 7))
    long = rng.random(n) < 0.51
    return np.where(long[:, None, None], g7, g6), long


def _draw_per_symbol(rng, n, esn0_db, stack):
    """Model draws z_k = A·e^{jθ_k}·R_k[:, i_k] + n_k, n_k ~ CN(0, N0·R_k), N0 = 1."""
    a = math.sqrt(10 ** (esn0_db / 10))
    sym = rng.integers(0, 2, n)
    w = (rng.standard_normal((n, 2)) + 1j * rng.standard_normal((n, 2))) * math.sqrt(0.5)
    noise = np.einsum("kij,kj->ki", np.linalg.cholesky(stack), w)
    phase = np.exp(2j * np.pi * rng.random(n))
    return a * phase[:, None] * stack[np.arange(n), :, sym] + noise, sym


def test_stack_of_equal_matrices_equals_the_single_matrix():
    # reference: the single-matrix call (the accuracy tests tie that path to outside values)
    from iqstat.fit import fit_bursts_many, fit_da_many, fit_dd_many, fit_nda_many

    rng = np.random.default_rng(4500)
    zs, syms, stacks = [], [], []
    for n, es in ((400, 12.0), (300, 2.0), (500, 20.0)):
        z, s = draw_fsk(rng, n, 2, es, gram=GRAM_HALF)
        zs.append(z)
        syms.append(s)
        stacks.append(np.broadcast_to(GRAM_HALF, (n, 2, 2)))
    known = [np.where(np.arange(len(s)) < 64, s, -1) for s in syms]
    pairs = [
        (
            fit_nda_many(zs, stacks, modulation="2fsk"),
            fit_nda_many(zs, GRAM_HALF, modulation="2fsk"),
        ),
        (
            fit_da_many(zs, syms, stacks, modulation="2fsk"),
            fit_da_many(zs, syms, [GRAM_HALF] * 3, modulation="2fsk"),
        ),
        (fit_dd_many(zs, stacks, modulation="2fsk"), fit_dd_many(zs, GRAM_HALF, modulation="2fsk")),
    ]
    for a, b in zip(
        fit_bursts_many(zs, stacks, modulation="2fsk", known_list=known),
        fit_bursts_many(zs, GRAM_HALF, modulation="2fsk", known_list=known),
        strict=True,
    ):
        pairs.extend(([x], [y]) for x, y in zip(a, b, strict=True))
    for many_a, many_b in pairs:
        for fa, fb in zip(many_a, many_b, strict=True):
            da, db = fa.to_dict(), fb.to_dict()
            assert da.keys() == db.keys()
            for k in da:
                if isinstance(da[k], float):
                    assert da[k] == pytest.approx(db[k], rel=1e-12, abs=1e-12), k
                else:
                    assert da[k] == db[k], k
    z = zs[0]
    kw = dict(amplitude=3.0, noise_var=1.1, modulation="2fsk")
    np.testing.assert_array_equal(
        branch_energy_cdf(np.abs(z) ** 2, gram=stacks[0], **kw),
        branch_energy_cdf(np.abs(z) ** 2, gram=GRAM_HALF, **kw),
    )
    assert check_energy_laws(z, gram=stacks[0], **kw) == check_energy_laws(z, gram=GRAM_HALF, **kw)


def test_per_symbol_fit_is_the_likelihood_of_the_per_symbol_model():
    # independent density: z_k ~ mixture over i of the phase-averaged complex normal with mean
    # A·e^{jθ}R_k[:, i] and covariance N0·R_k (docs/estimator.md eq. 1), integrated over θ by
    # the trapezoid rule (exact to rounding for this periodic analytic integrand); its maximum
    # by Nelder-Mead must be the fit's (A, N0), its value the fit's log-likelihood.
    from iqstat.fit import fit_nda

    rng = np.random.default_rng(4600)
    stack, _ = _two_class_stack(rng, 300)
    z, _ = _draw_per_symbol(rng, 300, 10.0, stack)
    theta = 2 * np.pi * np.arange(64) / 64
    rinv = np.linalg.inv(stack)
    logdet = np.linalg.slogdet(stack)[1]

    def loglik(log_a, log_n0):
        a, n0 = math.exp(log_a), math.exp(log_n0)
        parts = []
        for i in range(2):
            mean = a * np.exp(1j * theta)[None, :, None] * stack[:, None, :, i]  # (k, θ, j)
            d = z[:, None, :] - mean
            quad = np.einsum("ktj,kjl,ktl->kt", d.conj(), rinv, d).real
            dens = special.logsumexp(-quad / n0, axis=1) - math.log(len(theta))
            parts.append(dens + math.log(0.5))
        mix = np.logaddexp(*parts)
        return float(np.sum(mix - 2 * math.log(math.pi * n0) - logdet))

    fit = fit_nda(z, stack, modulation="2fsk", gof=False)
    x0 = [math.log(fit.amplitude) + 0.05, math.log(fit.noise_var) - 0.05]
    res = optimize.minimize(
        lambda v: -loglik(*v), x0, method="Nelder-Mead", options={"xatol": 1e-7, "fatol": 1e-9}
    )
    assert math.exp(res.x[0]) == pytest.approx(fit.amplitude, rel=1e-4)
    assert math.exp(res.x[1]) == pytest.approx(fit.noise_var, rel=1e-4)
    assert fit.log_likelihood == pytest.approx(
        loglik(math.log(fit.amplitude), math.log(fit.noise_var)), rel=1e-10, abs=1e-8
    )


def test_per_symbol_energy_cdf_and_mixture_ks_match_scipy():
    # conditional CDF: symbol k's branch j is ncx2(2, 2A²|R_k[j, i_k]|²/N0, scale N0/2)
    # (docs/estimator.md eq. 6, scipy.stats.ncx2); marginal KS statistic = scipy.stats.kstest of
    # each branch against the share-weighted mixture of the classes' marginal laws (eq. 6b)
    rng = np.random.default_rng(4700)
    n, a, n0 = 400, 2.5, 0.9
    stack, long = _two_class_stack(rng, n)
    z, sym = _draw_per_symbol(rng, n, 8.0, stack)
    e = np.abs(z) ** 2
    got = branch_energy_cdf(
        e, amplitude=a, noise_var=n0, gram=stack, modulation="2fsk", symbols=sym
    )
    lam = 2 * a * a * np.abs(stack[np.arange(n), :, sym]) ** 2 / n0  # (k, j)
    ref = stats.ncx2(2, lam, scale=n0 / 2).cdf(e)
    np.testing.assert_allclose(got, ref, atol=1e-12)

    stat, _, n_values = check_energy_laws(
        z, amplitude=a, noise_var=n0, gram=stack, modulation="2fsk"
    )
    share = np.array([np.mean(~long), np.mean(long)])
    classes = [stack[np.flatnonzero(~long)[0]], stack[np.flatnonzero(long)[0]]]

    def mixture(x, j):
        out = 0.0
        for f, r in zip(share, classes, strict=True):
            for h in range(2):
                out = out + f * 0.5 * stats.ncx2(
                    2, 2 * a * a * abs(r[j, h]) ** 2 / n0, scale=n0 / 2
                ).cdf(x)
        return out

    ks = max(stats.kstest(e[:, j], lambda x, j=j: mixture(x, j)).statistic for j in range(2))
    assert n_values == 2 * n
    assert stat == pytest.approx(ks, rel=1e-9, abs=1e-10)


def test_mixed_batch_equals_each_burst_alone():
    # a burst with a two-class stack beside single-matrix bursts: each result equals its own
    # call (reference: the per-burst call; tolerance 1e-9, block cuts of the sums)
    from iqstat.fit import fit_nda_many

    rng = np.random.default_rng(4800)
    stack, _ = _two_class_stack(rng, 500)
    z0, _ = _draw_per_symbol(rng, 500, 15.0, stack)
    z1, _ = draw_fsk(rng, 300, 2, 6.0, gram=GRAM_HALF)
    z2, _ = draw_fsk(rng, 200, 2, 9.0)
    many = fit_nda_many([z1, z0, z2], [GRAM_HALF, stack, None], modulation="2fsk")
    alone = [
        fit_nda(z1, GRAM_HALF, modulation="2fsk"),
        fit_nda(z0, stack, modulation="2fsk"),
        fit_nda(z2, modulation="2fsk"),
    ]
    for f, g in zip(many, alone, strict=True):
        assert f.esn0 == pytest.approx(g.esn0, rel=1e-9)
        assert f.noise_var == pytest.approx(g.noise_var, rel=1e-9)
        assert f.log_likelihood == pytest.approx(g.log_likelihood, rel=1e-9)
        assert f.gof_pvalue == pytest.approx(g.gof_pvalue, rel=1e-9)


@pytest.mark.parametrize(
    "grams, match",
    [
        (lambda s: [s[:-1]], r"gram stack has 99 matrices for 100 symbols"),
        (lambda s: [_with(s, 17, [[1, 0.2], [0.3, 1]])], r"symbol 17: gram is not Hermitian"),
        (lambda s: [_with(s, 5, [[1, np.nan], [np.nan, 1]])], r"symbol 5: gram contains NaN"),
        (lambda s: [_with(s, 3, [[2, 0], [0, 1]])], r"symbol 3: gram diagonal"),
        (lambda s: [_with(s, 9, [[1, 1 - 1e-8], [1 - 1e-8, 1]])], r"symbol 9: gram has condition"),
        (lambda s: [s[:, :1, :1]], r"gram has shape \(100, 1, 1\)"),
    ],
)
def test_bad_per_symbol_grams_raise_naming_burst_and_symbol(grams, match):
    from iqstat.fit import fit_nda_many

    rng = np.random.default_rng(4900)
    stack, _ = _two_class_stack(rng, 100)
    z, _ = _draw_per_symbol(rng, 100, 10.0, stack)
    with pytest.raises(ParameterError, match=match):
        fit_nda(z, grams(stack)[0], modulation="2fsk")
    with pytest.raises(ParameterError, match="burst 1: " + match):
        fit_nda_many([z, z], [None, grams(stack)[0]], modulation="2fsk")


def _with(stack, k, matrix):
    out = np.array(stack)
    out[k] = matrix
    return out


def test_per_symbol_grams_accepted_by_decisions():
    rng = np.random.default_rng(5000)
    stack, _ = _two_class_stack(rng, 200)
    z, sym = _draw_per_symbol(rng, 200, 12.0, stack)
    fit = fit_nda(z, stack, modulation="2fsk")
    post = symbol_posteriors(z, fit, stack, modulation="2fsk")
    np.testing.assert_allclose(post.sum(axis=1), 1.0)
    assert np.array_equal(
        decide_symbols(z, fit, stack, modulation="2fsk"), np.argmax(np.abs(z), axis=1)
    )
    with pytest.raises(ParameterError, match="gram stack has 199 matrices for 200 symbols"):
        decide_symbols(z, fit, stack[1:], modulation="2fsk")
