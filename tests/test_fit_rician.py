"""Tests of iqstat.fit.rician: the fading fit (mean Es/N0, K and N0 under Rician fading).

References:
- The model's density, checked by brute force: given tone k, the correlator outputs are
  complex Gaussian with mean A_s·e^{jφ}·r_k and covariance N0·R + σ_d²·r_k r_kᴴ (Rician
  channel: steady part plus CN(0, σ_d²); Simon & Alouini, Digital Communication over Fading
  Channels, 2nd ed., Wiley 2005, §2.2.1.3, from memory); the density averaged over a uniform
  φ by numerical quadrature of scipy.stats.multivariate_normal, against the fit's closed form.
- Tone correlation of binary FSK at h = ½: |ρ| = 2/π (Proakis & Salehi, Digital
  Communications, 5th ed., §3.2, from memory).
- Synthetic outputs with known truth (numpy, fixed seeds): the channel drawn per symbol as
  h = √(K/(K+1))·e^{jθ} + √(1/(K+1))·CN(0, 1).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from iqstat.fit import fit_nda
from iqstat.fit.rician import FADING_LR_MIN, _log_lik, _prepared, fit_rician

RHO_HALF = 2 / math.pi


def _outputs(rng, n, m, esn0_db, k, rho=0.0, n0=1.0):
    """Correlator outputs of n symbols of M-FSK (m tones) under Rician fading, and the Gram."""
    g = 10 ** (esn0_db / 10)
    sent = rng.integers(0, m, n)
    h = math.sqrt(k / (k + 1)) * np.exp(2j * np.pi * rng.random(n)) + math.sqrt(1 / (k + 1)) * (
        rng.standard_normal(n) + 1j * rng.standard_normal(n)
    ) / math.sqrt(2)
    gram = np.eye(m, dtype=complex)
    if rho:
        gram = np.array([[1.0, rho], [rho, 1.0]], dtype=complex)
    chol = np.linalg.cholesky(gram)
    white = (rng.standard_normal((n, m)) + 1j * rng.standard_normal((n, m))) * math.sqrt(n0 / 2)
    z = white @ chol.T + math.sqrt(g * n0) * h[:, None] * gram[:, sent].T
    return z, sent, gram


def _fit(z, m, gram=None, **kw):
    steady = fit_nda(z, modulation=f"{m}fsk", gram=gram)
    return steady, fit_rician(
        z,
        modulation=f"{m}fsk",
        gram=gram,
        start_esn0=steady.esn0,
        start_noise_var=steady.noise_var,
        **kw,
    )


def test_closed_form_density_against_brute_force_phase_average():
    # h = 1/2 tones (|rho| = 2/pi), a steady part and a scattered part, tone 1 sent
    n0, a_s, sd2 = 0.7, 1.3, 0.9
    rho = RHO_HALF
    gram = np.array([[1.0, rho], [rho, 1.0]], dtype=complex)
    z = np.array([[0.4 - 0.9j, 1.1 + 0.3j]])
    r_k = gram[:, 1]
    cov_c = n0 * gram + sd2 * np.outer(r_k, r_k.conj())
    cov_r = 0.5 * np.block([[cov_c.real, -cov_c.imag], [cov_c.imag, cov_c.real]])
    phis = np.linspace(0, 2 * np.pi, 4001)[:-1]
    dens = []
    for phi in phis:
        mean = a_s * np.exp(1j * phi) * r_k
        dens.append(
            stats.multivariate_normal.pdf(
                np.concatenate([z[0].real, z[0].imag]),
                np.concatenate([mean.real, mean.imag]),
                cov_r,
            )
        )
    ref = math.log(np.mean(dens))  # real 4-dim density = complex 2-dim density
    e, r, q, log_det = _prepared(z, gram)
    gam = (a_s**2 + sd2) / n0
    f = a_s**2 / (a_s**2 + sd2)
    theta = (math.log(n0), math.log(gam), math.log(f / (1 - f)))
    ll = _log_lik(theta, e, r, q, 2, np.log([1e-300, 1.0]), np.array([1]), False)
    assert ll - 2 * math.log(math.pi) - log_det == pytest.approx(ref, abs=1e-9)


@pytest.mark.parametrize(
    ("m", "k_db", "esn0_db", "rho"),
    [(2, 0.0, 12.0, 0.0), (2, 6.0, 12.0, 0.0), (2, 12.0, 12.0, 0.0), (2, 6.0, 3.0, 0.0),
     (4, 3.0, 13.0, 0.0), (2, 6.0, 12.0, RHO_HALF)],
)  # fmt: skip
def test_mean_esn0_and_k_are_recovered(m, k_db, esn0_db, rho):
    rng = np.random.default_rng(int(10 * k_db + esn0_db + m))
    z, _, gram = _outputs(rng, 4000, m, esn0_db, 10 ** (k_db / 10), rho)
    steady, rf = _fit(z, m, gram if rho else None, test=True)
    fit = rf.fit
    assert fit.converged and fit.method == "nda-ml-rician"
    lo, hi = fit.esn0_db_ci95
    assert lo <= esn0_db <= hi
    assert hi - lo < 0.8
    assert rf.k_db == pytest.approx(k_db, abs=1.5)
    # the constant-amplitude fit reads low (its noise takes the fades); the test sees it
    assert steady.esn0_db < lo
    assert rf.likelihood_ratio > FADING_LR_MIN
    assert fit.gof_pvalue > 1e-3  # the energies follow the fitted fading laws


def test_ook_mean_energy_and_k():
    rng = np.random.default_rng(5)
    n, k, avg_db = 4000, 10**0.6, 14.0
    on = rng.integers(0, 2, n)
    g_on = 2 * 10 ** (avg_db / 10)
    h = math.sqrt(k / (k + 1)) * np.exp(2j * np.pi * rng.random(n)) + math.sqrt(1 / (k + 1)) * (
        rng.standard_normal(n) + 1j * rng.standard_normal(n)
    ) / math.sqrt(2)
    z = ((rng.standard_normal(n) + 1j * rng.standard_normal(n)) / math.sqrt(2))[:, None]
    z[:, 0] += on * math.sqrt(g_on) * h
    steady = fit_nda(z, modulation="ook")
    rf = fit_rician(
        z, modulation="ook", priors=steady.priors, start_esn0=steady.esn0,
        start_noise_var=steady.noise_var,
    )  # fmt: skip
    lo, hi = rf.fit.esn0_db_ci95
    assert lo <= avg_db <= hi  # OOK: p_on times the "on" level
    assert rf.k_db == pytest.approx(6.0, abs=1.5)


def test_steady_amplitude_gives_the_constant_amplitude_figure():
    rng = np.random.default_rng(9)
    lrs = []
    for _ in range(20):
        z, _, _ = _outputs(rng, 500, 2, 8.0, 1e9)  # K = 90 dB: no fading
        steady, rf = _fit(z, 2, test=True)
        lrs.append(rf.likelihood_ratio)
        # the same figure to within the estimate's own uncertainty (half its 95 % interval)
        half = 0.5 * (steady.esn0_db_ci95[1] - steady.esn0_db_ci95[0])
        assert rf.fit.esn0_db == pytest.approx(steady.esn0_db, abs=half)
        # nested models: the fading fit's likelihood is at least the steady one's (to the
        # optimisers' tolerance, ~1e-8 relative)
        assert rf.fit.log_likelihood >= steady.log_likelihood - 1e-3
    assert max(lrs) < FADING_LR_MIN  # no false fading over 20 steady bursts


def test_data_aided_fit_uses_the_known_tones():
    rng = np.random.default_rng(3)
    z, sent, _ = _outputs(rng, 3000, 2, 2.0, 1.0)  # 2 dB: decisions err often
    steady = fit_nda(z, modulation="2fsk")
    da = fit_rician(
        z, modulation="2fsk", sent=sent, start_esn0=steady.esn0, start_noise_var=steady.noise_var
    )
    assert da.fit.method == "da-ml-rician"
    lo, hi = da.fit.esn0_db_ci95
    assert lo <= 2.0 <= hi


def test_too_few_symbols_say_why():
    rng = np.random.default_rng(1)
    z, _, _ = _outputs(rng, 10, 2, 10.0, 1.0)
    rf = fit_rician(z, modulation="2fsk", start_esn0=10.0, start_noise_var=1.0)
    assert not rf.fit.converged
    assert "at least" in rf.fit.message
    rf = fit_rician(
        np.ones((100, 2), complex), modulation="2fsk", start_esn0=0.0, start_noise_var=1.0
    )
    assert not rf.fit.converged


@pytest.mark.parametrize(
    ("m", "rho", "known"), [(2, 0.0, False), (2, RHO_HALF, True), (4, 0.0, False)]
)
def test_gradient_matches_central_differences(m, rho, known):
    rng = np.random.default_rng(4)
    z, sent, gram = _outputs(rng, 300, m, 8.0, 2.0, rho)
    sent = np.where(np.arange(300) < 100, sent, -1) if known else np.full(300, -1)
    e, r, q, _ = _prepared(z, gram if rho else None)
    args = (e, r, q, m, np.log(np.full(m, 1 / m)), sent, False)
    theta = np.array([0.1, 1.7, 0.4])
    _, grad = _log_lik(theta, *args, grad=True)
    h = 1e-6
    num = [
        (_log_lik(theta + d, *args) - _log_lik(theta - d, *args)) / (2 * h) for d in np.eye(3) * h
    ]
    np.testing.assert_allclose(grad, num, rtol=1e-6, atol=1e-5)
