"""Tests of iqstat.theory.fading: error rates under Rician fading.

References:
- The Rician power law: 2(1 + K)·|h|² is noncentral chi-square, 2 degrees of freedom,
  noncentrality 2K (Simon & Alouini, Digital Communication over Fading Channels, 2nd ed.,
  Wiley 2005, §2.2.1.3, from memory); checked against scipy.stats.ncx2.
- Noncoherent orthogonal M-FSK over a fading channel by the MGF of the SNR (ibid., ch. 8, from
  memory): SER = Σ_{n=1}^{M−1} (−1)^{n+1} C(M−1, n)/(n+1) · M_γs(−n/(n+1)), with the Rician
  MGF M_γ(s) = (1+K)/(1+K−sγ̄)·exp(Ksγ̄/(1+K−sγ̄)) (ibid., Table 2.2, from memory), and
  BER = SER·(M/2)/(M−1) (Proakis & Salehi, Digital Communications, 5th ed., §4.5, from
  memory). For binary FSK: P_b = (1+K)/(2+2K+γ̄)·exp(−Kγ̄/(2+2K+γ̄)).
- Rayleigh fading (K = 0), binary noncoherent FSK: P_b = 1/(2 + γ̄) (Proakis & Salehi, 5th
  ed., §13.3, from memory), so the Eb/N0 a target P needs is 1/P − 2.
- Monte Carlo of square-law decisions on Rician-faded tones (numpy, fixed seed).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, special, stats

from iqstat.errors import ParameterError
from iqstat.theory import predicted_ber
from iqstat.theory.fading import ber_rician, required_ebn0_db_rician, rician_power_pdf


def _mgf_rician(s: float, gbar: float, k: float) -> float:
    d = 1.0 + k - s * gbar
    return (1.0 + k) / d * math.exp(k * s * gbar / d)


def _ber_mfsk_rician(gbar_b: float, m: int, k: float) -> float:
    gs = gbar_b * math.log2(m)
    ser = sum(
        (-1) ** (n + 1) * special.comb(m - 1, n) / (n + 1) * _mgf_rician(-n / (n + 1), gs, k)
        for n in range(1, m)
    )
    return ser * (m / 2) / (m - 1)


@pytest.mark.parametrize("k", [0.0, 1.0, 4.0, 40.0])
def test_power_law_is_scipys_noncentral_chi_square(k):
    x = np.linspace(0.01, 4.0, 9)
    ref = stats.ncx2.pdf(2 * (1 + k) * x, 2, 2 * k) * 2 * (1 + k) if k > 0 else np.exp(-x)
    np.testing.assert_allclose(rician_power_pdf(x, k), ref, rtol=1e-10)
    total, _ = integrate.quad(rician_power_pdf, 0, np.inf, args=(k,))
    assert total == pytest.approx(1.0, abs=1e-8)


@pytest.mark.parametrize("k", [0.0, 0.5, 1.0, 4.0, 15.85, 100.0])
@pytest.mark.parametrize("ebn0_db", [0.0, 6.0, 12.0, 20.0, 30.0, 40.0])
def test_binary_fsk_matches_the_mgf_closed_form(k, ebn0_db):
    g = 10 ** (ebn0_db / 10)
    ref = (1 + k) / (2 + 2 * k + g) * math.exp(-k * g / (2 + 2 * k + g))
    assert ber_rician(g, "2fsk", k) == pytest.approx(ref, rel=1e-5)


@pytest.mark.parametrize("k", [0.0, 2.0, 10.0])
@pytest.mark.parametrize("ebn0_db", [4.0, 10.0, 20.0])
def test_orthogonal_4fsk_matches_the_mgf_closed_form(k, ebn0_db):
    g = 10 ** (ebn0_db / 10)
    assert ber_rician(g, "4fsk", k) == pytest.approx(_ber_mfsk_rician(g, 4, k), rel=1e-5)


def test_rayleigh_binary_fsk_and_its_inverse():
    for g_db in (10.0, 20.0, 30.0):
        g = 10 ** (g_db / 10)
        assert ber_rician(g, "2fsk", 0.0) == pytest.approx(1 / (2 + g), rel=1e-5)
    # 1e-3 needs 1/1e-3 − 2 = 998 -> 29.991 dB
    assert required_ebn0_db_rician(1e-3, "2fsk", 0.0) == pytest.approx(
        10 * math.log10(998), abs=1e-4
    )


def test_strong_specular_part_tends_to_white_noise():
    g = 10 ** (12 / 10)
    awgn = predicted_ber(g, "2fsk")
    assert ber_rician(g, "2fsk", 1e4) == pytest.approx(awgn, rel=0.02)
    assert ber_rician(g, "2fsk", 1e7) == pytest.approx(awgn, rel=1e-12)
    # fading always costs: the mean BER exceeds the white-noise BER at the same mean (Jensen)
    assert ber_rician(g, "ook", 3.0) > predicted_ber(g, "ook")
    assert ber_rician(g, "2fsk", 3.0, 0.6366) > predicted_ber(g, "2fsk", 0.6366)


def test_required_eb_n0_grows_as_k_falls_and_unreachable_targets_are_none():
    req = [required_ebn0_db_rician(1e-4, "2fsk", k) for k in (100.0, 10.0, 1.0, 0.0)]
    assert all(a < b for a, b in zip(req, req[1:], strict=False))
    assert required_ebn0_db_rician(1e-12, "2fsk", 0.0) is None  # needs ~120 dB


def test_monte_carlo_of_faded_square_law_decisions():
    rng = np.random.default_rng(11)
    n, k, g = 400_000, 2.0, 10 ** (14 / 10)
    h = math.sqrt(k / (k + 1)) + math.sqrt(1 / (k + 1)) * (
        rng.standard_normal(n) + 1j * rng.standard_normal(n)
    ) / math.sqrt(2)
    noise = (rng.standard_normal((n, 2)) + 1j * rng.standard_normal((n, 2))) / math.sqrt(2)
    z0 = math.sqrt(g) * h + noise[:, 0]  # tone 0 sent, N0 = 1
    errors = int(np.count_nonzero(np.abs(noise[:, 1]) > np.abs(z0)))
    p = ber_rician(g, "2fsk", k)
    # binomial 99.9 % band around the prediction
    lo, hi = stats.binom.ppf([0.0005, 0.9995], n, p)
    assert lo <= errors <= hi


def test_bad_arguments():
    with pytest.raises(ParameterError):
        ber_rician(10.0, "2fsk", -1.0)
    with pytest.raises(ParameterError):
        ber_rician(-1.0, "2fsk", 1.0)
    with pytest.raises(ParameterError):
        ber_rician(10.0, "8fsk", 1.0)
    with pytest.raises(ParameterError):
        required_ebn0_db_rician(0.7, "2fsk", 1.0)
