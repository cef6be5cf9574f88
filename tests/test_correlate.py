"""Tests of the correlator bank: noise level, matched energy, template Gram matrix, genie Es/N0."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats

from iqstat.correlate import (
    branch_energies,
    correlate_symbols,
    interval_energies,
    mix_cumulative,
    symbol_boundaries,
    template_gram,
    tone_phasors,
)
from iqstat.errors import ParameterError
from iqstat.synth import modulate

FS = 250e3
RS = 4800.0
PERIOD = FS / RS  # 52.083… samples, deliberately not an integer


def _tones(m: int, spacing_hz: float, cfo_hz: float = 0.0) -> list[float]:
    # Project convention: tone i at cfo + (i − (M−1)/2)·spacing.
    return [cfo_hz + (i - (m - 1) / 2) * spacing_hz for i in range(m)]


def test_boundaries_are_rounded_per_symbol_without_drift():
    # b_k = ceil(t0 + k·P) exactly; the counts average P (no accumulated rounding).
    b = symbol_boundaries(0.37, PERIOD, 560)
    assert b[0] == 1 and b[-1] == math.ceil(0.37 + 560 * PERIOD)
    assert abs(np.diff(b).mean() - PERIOD) < 1.0 / 560
    assert set(np.diff(b)) == {52, 53}


@pytest.mark.parametrize("m", [1, 2, 4])
def test_noise_only_gives_noise_variance_per_branch(m):
    # Unit-energy template: white noise of variance σ² per sample gives |z|² ~ Exp(σ²)
    # in every branch (METHODS §0; scipy.stats.expon as the reference law).
    rng = np.random.default_rng(11 + m)
    sigma2 = 0.37
    n_sym = 3000
    x = np.sqrt(sigma2 / 2) * (
        rng.standard_normal(int(n_sym * PERIOD) + 60)
        + 1j * rng.standard_normal(int(n_sym * PERIOD) + 60)
    )
    z = correlate_symbols(x, FS, _tones(m, RS), 0.4, PERIOD, n_sym)
    e = branch_energies(z)
    assert e.shape == (n_sym, m)
    # Mean of n Exp(σ²) values has standard deviation σ²/√n: allow 4 of them.
    assert np.all(np.abs(e.mean(axis=0) - sigma2) < 4 * sigma2 / math.sqrt(n_sym))
    for i in range(m):
        assert scipy.stats.kstest(e[:, i], scipy.stats.expon(scale=sigma2).cdf).pvalue > 1e-3


@pytest.mark.parametrize("t0", [0.0, 0.49, 17.93])
def test_matched_tone_gives_power_times_samples(t0):
    # A tone of power C matched over N_k samples: |z|² = C·N_k exactly (Cauchy–Schwarz
    # equality); the other tone at h = 1 with N_k samples picks up |ρ|²·C·N_k only.
    c_power = 0.3
    n = np.arange(12000)
    f = _tones(2, RS, cfo_hz=2500.0)
    x = math.sqrt(c_power) * np.exp(2j * np.pi * f[1] * n / FS + 0.7j)
    n_sym = 200
    z = correlate_symbols(x, FS, f, t0, PERIOD, n_sym)
    nk = np.diff(symbol_boundaries(t0, PERIOD, n_sym))
    np.testing.assert_allclose(branch_energies(z[:, 1]), c_power * nk, rtol=1e-10)
    rho2 = np.array([abs(template_gram(f, int(k), FS)[0, 1]) ** 2 for k in (52, 53)])
    assert np.all(branch_energies(z[:, 0]) <= c_power * nk * rho2.max() * (1 + 1e-9))


def test_gram_h1_orthogonal_and_h_half_two_over_pi():
    # |ρ| = |sinc(Δf·T)| for rectangular templates (METHODS §1; Proakis & Salehi 5th ed.
    # §4.5 [mem]): h = 1 → 0, h = 1/2 → 2/π. The discrete sum is the Dirichlet kernel
    # sin(πh)/(N sin(πh/N)), which exceeds the sinc by the factor (πh/N)/sin(πh/N) =
    # 1 + (πh)²/(6N²) + …: that is the tolerance used against the continuous-time value.
    n = 40  # 48 kS/s, 1200 Bd: a whole number of samples per symbol
    fs, rs = 48000.0, 1200.0
    r1 = template_gram(_tones(2, rs), n, fs)
    assert abs(r1[0, 1]) < 1e-12
    np.testing.assert_allclose(np.diag(r1).real, 1.0, rtol=1e-12)
    r_half = template_gram(_tones(2, rs / 2), n, fs)
    dirichlet = math.sin(math.pi / 2) / (n * math.sin(math.pi / (2 * n)))
    assert abs(r_half[0, 1] - dirichlet) < 1e-12  # real and positive with centre reference
    assert (
        abs(abs(r_half[0, 1]) - 2 / math.pi) < 2 / math.pi * (math.pi / 2) ** 2 / (6 * n**2) * 1.01
    )
    np.testing.assert_allclose(r_half, r_half.conj().T, atol=1e-15)
    assert np.all(np.linalg.eigvalsh(r_half) > 0)


def test_gram_phase_is_the_one_the_samples_produce():
    # Noiseless CPFSK, h = 1/2, fractional period: for every symbol sent on tone j the ratio
    # z[k, i]/z[k, j] must equal R[i, j] of that symbol's own length N_k (model
    # z = A·e^{jθ}·R[:, j]), independent of the symbol's carrier phase θ_k.
    rng = np.random.default_rng(3)
    sym = rng.integers(0, 2, 300)
    t0 = 4.6
    x = modulate(
        sym, modulation="2fsk", sample_rate_hz=FS, symbol_rate_hz=RS,
        tone_spacing_hz=RS / 2, timing_offset_samples=t0, phase_rad=1.1,
    )  # fmt: skip
    f = _tones(2, RS / 2)
    z = correlate_symbols(x, FS, f, t0, PERIOD, 300)
    nk = np.diff(symbol_boundaries(t0, PERIOD, 300))
    for n_len in (52, 53):
        r = template_gram(f, n_len, FS)
        for j in (0, 1):
            sel = (sym == j) & (nk == n_len)
            ratio = z[sel, 1 - j] / z[sel, j]
            np.testing.assert_allclose(ratio, r[1 - j, j], atol=1e-9)
    # The fractional-period Gram is the length-weighted mix of the two.
    frac = PERIOD - 52
    mix = (1 - frac) * template_gram(f, 52, FS) + frac * template_gram(f, 53, FS)
    np.testing.assert_allclose(template_gram(f, PERIOD, FS), mix, atol=1e-14)


def test_genie_esn0_at_true_timing_matches_truth():
    # Truth convention Eb/N0 = P·(fs/bit_rate)/σ² (common brief); for 2-FSK Es = Eb.
    # Data-aided moment estimate γ̂ = m1/m0 − 1 (m1 mean matched energy, m0 mean other
    # energy). Delta method: var(γ̂) ≈ [(1 + 2γ) + (1 + γ)²]/N [derived].
    rng = np.random.default_rng(2024)
    n_sym, ebn0_db, t0 = 3000, 10.0, 7.31
    sym = rng.integers(0, 2, n_sym)
    s = modulate(
        sym, modulation="2fsk", sample_rate_hz=FS, symbol_rate_hz=RS,
        tone_spacing_hz=RS, timing_offset_samples=t0, cfo_hz=-3000.0,
    )  # fmt: skip
    p = np.mean(np.abs(s[math.ceil(t0) :]) ** 2)
    sigma2 = p * (FS / RS) / 10 ** (ebn0_db / 10)
    x = s + np.sqrt(sigma2 / 2) * (rng.standard_normal(s.size) + 1j * rng.standard_normal(s.size))
    e = branch_energies(correlate_symbols(x, FS, _tones(2, RS, -3000.0), t0, PERIOD, n_sym))
    k = np.arange(n_sym)
    m1, m0 = e[k, sym].mean(), e[k, 1 - sym].mean()
    gamma = 10 ** (ebn0_db / 10)
    sd = math.sqrt(((1 + 2 * gamma) + (1 + gamma) ** 2) / n_sym)
    assert abs(m0 - sigma2) < 4 * sigma2 / math.sqrt(n_sym)
    assert abs((m1 / m0 - 1) - gamma) < 4 * sd


def test_cumulative_energies_equal_the_bank():
    rng = np.random.default_rng(8)
    x = rng.standard_normal(6000) + 1j * rng.standard_normal(6000)
    f = _tones(4, RS, 800.0)
    b = symbol_boundaries(2.2, PERIOD, 100)
    e_cum = interval_energies(mix_cumulative(x, FS, f), b)
    e_bank = branch_energies(correlate_symbols(x, FS, f, 2.2, PERIOD, 100))
    np.testing.assert_allclose(e_cum, e_bank, rtol=1e-9)


@pytest.mark.parametrize(
    ("kwargs", "text"),
    [
        ({"t0_samples": -1.5}, "t0_samples"),
        ({"n_symbols": 1000}, "n_symbols"),
        ({"tone_freqs_hz": [200e3]}, "tone_freqs_hz"),
        ({"period_samples": 0.5}, "period_samples"),
        ({"sample_rate_hz": 0.0}, "sample_rate_hz"),
        ({"n_symbols": 2.5}, "n_symbols"),
    ],
)
def test_bad_parameters_raise_parameter_error(kwargs, text):
    args = {
        "x": np.zeros(5000, complex),
        "sample_rate_hz": FS,
        "tone_freqs_hz": [-2400.0, 2400.0],
        "t0_samples": 0.0,
        "period_samples": PERIOD,
        "n_symbols": 10,
    }
    args.update(kwargs)
    with pytest.raises(ParameterError, match=text):
        correlate_symbols(**args)


def test_two_dimensional_input_is_refused():
    with pytest.raises(ParameterError, match="1-D"):
        correlate_symbols(np.zeros((2, 100), complex), FS, [0.0], 0.0, PERIOD, 1)


@pytest.mark.parametrize("n", [1, 2, 3, 17, 1000, 29_401])
def test_tone_phasors_equal_direct_exponentials(n):
    # e^{−j2πcm} from block tables against numpy's exp of each phase (reduced mod 1 cycle);
    # both round c·m, so they agree to ~1e-16·c·n cycles (here c·n <= 0.4·29401 ≈ 1.2e4).
    c = np.array([-0.0123456789, 0.0, 0.25, 0.4])
    ref = np.exp(-2j * np.pi * np.mod(np.outer(c, np.arange(n)), 1.0))
    got = tone_phasors(c, n)
    assert got.shape == (4, n)
    np.testing.assert_allclose(got, ref, rtol=0, atol=1e-11)
    assert np.all(got[:, 0] == 1.0)


def test_mix_cumulative_is_the_running_sum_of_the_mixed_samples():
    # S[i, n] = Σ_{m<n} x[m]·e^{−j2πf_i m/fs}, written out directly (mix_cumulative docstring).
    rng = np.random.default_rng(81)
    x = (rng.standard_normal(3001) + 1j * rng.standard_normal(3001)).astype(np.complex64)
    f = _tones(2, RS, -1234.5)
    ref = np.zeros((2, x.size + 1), complex)
    for i, fi in enumerate(f):
        ref[i, 1:] = np.cumsum(x * np.exp(-2j * np.pi * fi / FS * np.arange(x.size)))
    np.testing.assert_allclose(mix_cumulative(x, FS, f), ref, rtol=0, atol=1e-9)


@pytest.mark.parametrize("m", [1, 2, 4])
def test_bank_from_running_sums_equals_the_templates(m):
    # Eq. (2) of correlate_symbols (differences of the running sums re-referenced to each
    # symbol's centre) against eq. (1) (the templates), complex values, phase included.
    rng = np.random.default_rng(82 + m)
    x = rng.standard_normal(30000) + 1j * rng.standard_normal(30000)
    f = _tones(m, RS, 733.3)
    n_sym = 570
    z_tpl = correlate_symbols(x, FS, f, 3.7, PERIOD * (1 - 20e-6), n_sym)
    cum = mix_cumulative(x, FS, f)
    z_cum = correlate_symbols(x, FS, f, 3.7, PERIOD * (1 - 20e-6), n_sym, cumulative=cum)
    # the running sums reach ~sqrt(n)·|x|: rounding of 1e-16 of that, relative to |z| ~ 1
    np.testing.assert_allclose(z_cum, z_tpl, rtol=0, atol=1e-10)


def test_energies_tones_first_are_the_same_numbers():
    rng = np.random.default_rng(9)
    x = rng.standard_normal(6000) + 1j * rng.standard_normal(6000)
    cum = mix_cumulative(x, FS, _tones(2, RS))
    b = np.stack([symbol_boundaries(t0, PERIOD, 100) for t0 in (0.1, 1.6, 9.9)])
    e = interval_energies(cum, b)
    et = interval_energies(cum, b, tones_first=True)
    assert e.shape == (3, 100, 2) and et.shape == (2, 3, 100)
    np.testing.assert_array_equal(np.moveaxis(et, 0, -1), e)


def test_cumulative_of_other_samples_is_refused():
    x = np.zeros(5000, complex)
    cum = mix_cumulative(np.zeros(4000, complex), FS, [-2400.0, 2400.0])
    with pytest.raises(ParameterError, match="cumulative"):
        correlate_symbols(x, FS, [-2400.0, 2400.0], 0.0, PERIOD, 10, cumulative=cum)
