"""Tests of iqstat.fading: the fading test and the Rician K from moments.

References: Greenstein, Michelson & Erceg, IEEE Commun. Lett. 3(6):175-176, 1999
(γ = (1+2K)/(1+K)²: K = 1 -> 0.75, K = 3 -> 0.4375, K = 10 -> 0.173554, METHODS §7); the
constant-amplitude energy law from scipy.stats.ncx2 (P = (N0/2)·χ'²(2, 2A²/N0)); a Rician
channel drawn as h = √(K/(K+1)) + √(1/(K+1))·CN(0, 1) (the model's definition).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from iqstat.fading import FADING_Z, fading_from_energies, k_from_gamma


@pytest.mark.parametrize(("k", "gamma"), [(1.0, 0.75), (3.0, 0.4375), (10.0, 0.173554)])
def test_k_from_gamma_inverts_greenstein(k, gamma):
    # check values from METHODS §7 (Greenstein et al. 1999), and the formula both ways
    assert (1 + 2 * k) / (1 + k) ** 2 == pytest.approx(gamma, abs=1e-6)
    assert k_from_gamma(gamma) == pytest.approx(k, rel=1e-5)


def test_limits():
    assert k_from_gamma(1.0) == 0.0 and k_from_gamma(1.3) == 0.0
    assert k_from_gamma(0.0) == math.inf


def test_steady_amplitude_statistic_is_standard_under_the_ncx2_law():
    # 400 bursts of 500 symbols at Es/N0 = 10 dB from scipy.stats.ncx2: the statistic has mean
    # ~0 and spread ~1 (its standard error is right), and almost never passes FADING_Z.
    rng = np.random.default_rng(1)
    n0, a2 = 1.0, 10.0
    law = stats.ncx2(2, 2 * a2 / n0, scale=n0 / 2)
    zs = np.array([fading_from_energies(law.rvs(500, random_state=rng), n0).z for _ in range(400)])
    assert abs(zs.mean()) < 0.25 and 0.8 < zs.std() < 1.25
    assert np.mean(zs > FADING_Z) < 0.01


@pytest.mark.parametrize("k_db", [0.0, 6.0, 12.0])
def test_rician_fading_is_found_and_its_k_estimated(k_db):
    rng = np.random.default_rng(2)
    n, k, n0, a2 = 20_000, 10 ** (k_db / 10), 1.0, 100.0
    h = math.sqrt(k / (k + 1)) + math.sqrt(1 / (k + 1)) * (
        rng.standard_normal(n) + 1j * rng.standard_normal(n)
    ) / math.sqrt(2)
    noise = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * math.sqrt(n0 / 2)
    est = fading_from_energies(np.abs(math.sqrt(a2) * h + noise) ** 2, n0)
    assert est.fading
    # moment estimate over 20 000 independent symbols: unbiased, spread 0.15 / 0.07 / 0.05 dB
    # at K = 0 / 6 / 12 dB (a 200-trial check): within 0.75 dB, 5 of those spreads at K = 0
    assert est.k_db == pytest.approx(k_db, abs=0.75)


def test_too_few_symbols_or_no_signal():
    assert fading_from_energies(np.ones(10), 1.0) is None
    assert fading_from_energies(np.ones(100) * 0.5, 1.0) is None  # below the noise
    assert fading_from_energies(np.ones(100), 0.0) is None
