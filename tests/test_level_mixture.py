"""Tests of iqstat.fit.level_mixture (a burst's own law of Es/N0) and of the goodness-of-fit
test against fading laws (iqstat.fit.goodness_of_fit.faded_energy_laws).

References:
- Synthetic correlator outputs with known per-symbol levels (numpy, fixed seeds), and the
  square-law decisions made on those same outputs: the mixture's predicted BER must agree with
  the errors counted (binomial band from scipy.stats.binom).
- The white-noise laws of noncoherent binary FSK, P_b = ½·exp(−γ/2) (Proakis & Salehi,
  Digital Communications, 5th ed., §4.5, from memory), for the expected BER of a known law.
- The constant-amplitude goodness-of-fit test (check_energy_laws, itself checked against
  scipy.stats.ncx2 in tests/test_fit.py): with one steady component the fading test is it.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from iqstat.fit import check_energy_laws
from iqstat.fit.goodness_of_fit import faded_energy_laws
from iqstat.fit.level_mixture import fit_level_mixture
from iqstat.theory import predicted_ber


def _two_level_outputs(rng, n, g1, g2, share1):
    """2-FSK outputs (N0 = 1) whose symbols sit at Es/N0 g1 (a share of them) or g2."""
    sent = rng.integers(0, 2, n)
    level = np.where(rng.random(n) < share1, g1, g2)
    z = (rng.standard_normal((n, 2)) + 1j * rng.standard_normal((n, 2))) / math.sqrt(2)
    z[np.arange(n), sent] += np.sqrt(level) * np.exp(2j * np.pi * rng.random(n))
    return z, sent, level


def test_a_burst_with_a_long_deep_fade_is_worse_than_rayleigh_and_is_predicted():
    # 60 % of the symbols in a deep fade (0 dB), the rest at 20 dB: Var|h|²/E² > 1
    rng = np.random.default_rng(21)
    n, g1, g2 = 4000, 1.0, 100.0
    z, sent, level = _two_level_outputs(rng, n, g1, g2, 0.6)
    mean = float(level.mean())
    assert np.var(level) / mean**2 > 1.0  # beyond any Rician law
    lm = fit_level_mixture(z, modulation="2fsk", noise_var=1.0, mean_esn0=mean)
    assert lm.converged
    assert lm.mean == pytest.approx(mean, rel=0.05)
    pred = lm.average(lambda g: predicted_ber(g, "2fsk"))
    truth = float(np.mean(0.5 * np.exp(-level / 2)))  # the law of these symbols
    assert pred == pytest.approx(truth, rel=0.1)
    errors = int(np.count_nonzero(np.argmax(np.abs(z), axis=1) != sent))
    lo, hi = stats.binom.ppf([0.0005, 0.9995], n, pred)
    assert lo <= errors <= hi


def test_known_tones_and_a_steady_level():
    rng = np.random.default_rng(22)
    n, g = 3000, 10**0.8
    z, sent, _ = _two_level_outputs(rng, n, g, g, 1.0)
    lm = fit_level_mixture(z, modulation="2fsk", noise_var=1.0, mean_esn0=g, sent=sent)
    assert lm.mean == pytest.approx(g, rel=0.05)
    # a steady level: the mixture's BER is the white-noise BER at it, to the estimate's noise
    assert lm.average(lambda x: predicted_ber(x, "2fsk")) == pytest.approx(
        float(predicted_ber(g, "2fsk")), rel=0.25
    )
    law = lm.support()
    assert sum(w for _, w in law) == pytest.approx(1.0)


def test_ook_on_level_law():
    rng = np.random.default_rng(23)
    n, g_on = 4000, 60.0
    on = rng.integers(0, 2, n)
    level = np.where(rng.random(n) < 0.3, 2.0, g_on)
    z = ((rng.standard_normal(n) + 1j * rng.standard_normal(n)) / math.sqrt(2))[:, None]
    z[:, 0] += on * np.sqrt(level) * np.exp(2j * np.pi * rng.random(n))
    lm = fit_level_mixture(
        z, modulation="ook", noise_var=1.0, mean_esn0=float(level.mean()), priors=(0.5, 0.5)
    )
    assert lm.mean == pytest.approx(float(level.mean()), rel=0.08)


def test_fading_gof_with_one_steady_component_is_the_constant_amplitude_test():
    rng = np.random.default_rng(24)
    z, _, _ = _two_level_outputs(rng, 2000, 8.0, 8.0, 1.0)
    e = np.abs(z) ** 2
    ours = faded_energy_laws(e, 1.0, [(1.0, 0.0, 8.0)], None, np.array([0.5, 0.5]),
                             np.full(2000, -1), False)  # fmt: skip
    ref = check_energy_laws(z, amplitude=math.sqrt(8.0), noise_var=1.0, modulation="2fsk")
    assert ours[0] == pytest.approx(ref[0], abs=1e-9)
    assert ours[1] == pytest.approx(ref[1], rel=1e-6)


def test_fading_gof_tells_the_right_law_from_a_wrong_one():
    rng = np.random.default_rng(25)
    n, g1, g2 = 4000, 1.0, 100.0
    z, _, _ = _two_level_outputs(rng, n, g1, g2, 0.5)
    e = np.abs(z) ** 2
    pi, unknown = np.array([0.5, 0.5]), np.full(n, -1)
    right = faded_energy_laws(e, 1.0, [(0.5, 0.0, g1), (0.5, 0.0, g2)], None, pi, unknown, False)
    wrong = faded_energy_laws(e, 1.0, [(1.0, 0.0, 0.5 * (g1 + g2))], None, pi, unknown, False)
    assert right[1] > 0.01
    assert wrong[1] < 1e-6
