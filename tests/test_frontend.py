"""Tests of iqstat.frontend: the receiver's quadrature imbalance measured on gap noise.

References: the imbalance model of the synthesiser (docs/synth.md: I' = I,
Q' = g·(Q cos φ − I sin φ), i.e. x' = μ·x + ν·x̄ with μ, ν from iq_imbalance_coefficients);
image rejection |μ|²/|ν|² (common practice, no source); the circularity of complex Gaussian
noise, E[x²] = 0, whose sample estimate has standard error 1/√n relative to E|x|² (from
memory); the whitening method of Anttila, Valkama & Renfors, IEEE Trans. Veh. Technol.
57(4), 2008 [mem].
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from iqstat.frontend import measure_iq_correction
from iqstat.synth.impairments import apply_iq_imbalance, iq_imbalance_coefficients

N = 200_000


def _noise(seed: int, n: int = N) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return ((rng.standard_normal(n) + 1j * rng.standard_normal(n)) * math.sqrt(0.5)).astype(
        np.complex64
    )


def _improper(y: np.ndarray) -> float:
    y = y.astype(np.complex128)
    return abs(np.mean(y * y)) / np.mean(np.abs(y) ** 2)


@pytest.mark.parametrize(("gain_db", "phase_deg"), [(1.0, 5.0), (3.0, -10.0), (-0.5, 2.0)])
def test_imbalance_is_measured_and_undone(gain_db, phase_deg):
    x = apply_iq_imbalance(_noise(1), gain_db, phase_deg).astype(np.complex64)
    corr = measure_iq_correction(x)
    mu, nu = iq_imbalance_coefficients(gain_db, phase_deg)
    rho = 2 * abs(mu * nu) / (abs(mu) ** 2 + abs(nu) ** 2)
    se = 1 / math.sqrt(N)
    assert corr.applied
    assert corr.improperness == pytest.approx(rho, abs=5 * se)
    irr = 10 * math.log10(abs(mu) ** 2 / abs(nu) ** 2)
    # d(IRR)/dρ ≈ 20/ln10 · (1/ρ) for small ρ (r ≈ ρ/2): the tolerance in dB
    assert corr.image_rejection_db == pytest.approx(irr, abs=5 * se * 8.7 / rho + 0.01)
    y = corr.apply(x)
    assert _improper(y) < 5 * se  # circular again
    assert np.mean(np.abs(y) ** 2) == pytest.approx(np.mean(np.abs(x) ** 2), rel=1e-6)
    # A tone through the same receiver: its image is gone and it keeps its sign of frequency
    n = np.arange(8192)
    tone = np.exp(2j * np.pi * 1000 / 8192 * n).astype(np.complex64)
    spec = np.abs(np.fft.fft(corr.apply(apply_iq_imbalance(tone, gain_db, phase_deg)))) ** 2
    assert np.argmax(spec) == 1000
    before = np.abs(np.fft.fft(apply_iq_imbalance(tone, gain_db, phase_deg))) ** 2
    assert 10 * math.log10(spec[1000] / spec[-1000]) > 40.0
    assert 10 * math.log10(before[1000] / before[-1000]) == pytest.approx(irr, abs=0.01)


def test_a_balanced_receiver_gets_no_correction():
    x = _noise(2)
    corr = measure_iq_correction(x)
    assert not corr.applied
    assert corr.improperness < 5 / math.sqrt(N)
    assert corr.apply(x) is x


def test_degenerate_inputs():
    assert not measure_iq_correction(np.zeros(10, np.complex64)).applied
    assert not measure_iq_correction(np.ones(1, np.complex64)).applied


def test_a_dead_branch_is_left_alone_without_warnings():
    # Q identically zero (a real-valued stream stored as complex, or a dead ADC): the
    # covariance is singular and cannot be whitened; the impropriety says so (1.0).
    x = _noise(3).real.astype(np.complex64)
    corr = measure_iq_correction(x)
    assert not corr.applied
    assert corr.improperness == pytest.approx(1.0)
