"""Tests of iqstat.estimate: carrier offset, tone spacing and symbol rate of one burst.

Every burst is synthetic with known truth: iqstat.synth.modulate plus complex white Gaussian
noise at a given Eb/N0 with the project's truth convention Eb/N0 = P·(fs/bit_rate)/σ²
(METHODS §0), P the mean |s|² over the burst's samples. Scenario: 250 kS/s, 4.8 kBd
(52.083 samples per symbol, not an integer), 500 symbols unless said otherwise.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.fft

from iqstat.errors import MeasurementError, ParameterError
from iqstat.estimate import (
    LinkEstimate,
    estimate_carrier,
    estimate_link,
    estimate_link_many,
    estimate_symbol_rate,
    estimate_tone_spacing,
    fft_size,
    interpolate_peak_bin,
    link_with,
    refine_link_across_bursts,
    tone_frequencies_hz,
)
from iqstat.synth import modulate

FS = 250e3
RS = 4800.0
BITS = {"2fsk": 1, "4fsk": 2, "ook": 1}
ALPHABET = {"2fsk": 2, "4fsk": 4, "ook": 2}
# (modulation, modulation index h); None for OOK
LINKS = [("2fsk", 1.0), ("4fsk", 1.0), ("2fsk", 0.5), ("ook", None)]
LINK_IDS = ["2fsk-h1", "4fsk-h1", "2fsk-h0.5", "ook"]


def make_burst(
    modulation: str,
    h: float | None,
    ebn0_db: float,
    *,
    seed: int,
    n_symbols: int = 500,
    cfo_hz: float = 0.0,
    clock_offset_ppm: float = 0.0,
    pad: int = 300,
) -> tuple[np.ndarray, float]:
    """A burst with ``pad`` noise-only samples before and after; returns (x, noise_var)."""
    rng = np.random.default_rng(seed)
    symbols = rng.integers(0, ALPHABET[modulation], n_symbols)
    t0 = float(rng.uniform(0.0, 5.0))
    s = modulate(
        symbols,
        modulation=modulation,
        sample_rate_hz=FS,
        symbol_rate_hz=RS,
        tone_spacing_hz=None if h is None else h * RS,
        cfo_hz=cfo_hz,
        phase_rad=float(rng.uniform(0, 2 * np.pi)),
        timing_offset_samples=t0,
        clock_offset_ppm=clock_offset_ppm,
    )
    p = float(np.mean(np.abs(s[int(math.ceil(t0)) :]) ** 2))
    noise_var = p * (FS / (RS * BITS[modulation])) / 10 ** (ebn0_db / 10)  # truth convention
    s = np.concatenate([np.zeros(pad), s, np.zeros(pad)])
    noise = rng.standard_normal(s.size) + 1j * rng.standard_normal(s.size)
    return (s + noise * math.sqrt(noise_var / 2)).astype(np.complex64), noise_var


def profile_spacing(h):
    return None if h is None else h * RS


# ---------------------------------------------------------------------------------------------
# Three-bin interpolation
# ---------------------------------------------------------------------------------------------


def test_interpolation_matches_methods_check_values():
    # METHODS §5: noiseless tone at bin 10.3, N = 64, rectangular window:
    # Jacobsen 10.299781, Candan 10.300022 [computed; Jacobsen & Kootsookos 2007, Candan 2011].
    n = np.arange(64)
    spec = np.fft.fft(np.exp(2j * np.pi * 10.3 * n / 64))
    assert interpolate_peak_bin(spec, 10, correction="none") == pytest.approx(10.299781, abs=1e-6)
    assert interpolate_peak_bin(spec, 10) == pytest.approx(10.300022, abs=1e-6)


@pytest.mark.parametrize("true_bin", [3.05, 17.25, 40.5 - 0.01, 63.7])
def test_candan_is_closer_to_the_truth_than_jacobsen(true_bin):
    # The correction removes Jacobsen's bias on a noiseless tone (Candan 2011 [mem]): the
    # truth is the frequency we generated. Bin 63.7 checks the circular neighbours.
    n = np.arange(64)
    spec = np.fft.fft(np.exp(2j * np.pi * true_bin * n / 64))
    k = int(np.argmax(np.abs(spec)))
    err_c = (interpolate_peak_bin(spec, k) - true_bin + 32) % 64 - 32  # bins are circular
    err_j = (interpolate_peak_bin(spec, k, correction="none") - true_bin + 32) % 64 - 32
    assert abs(err_c) < 1e-3
    assert abs(err_c) <= abs(err_j) + 1e-12


def test_interpolation_rejects_an_unknown_correction():
    with pytest.raises(ParameterError, match="correction"):
        interpolate_peak_bin(np.ones(8, complex), 2, correction="quadratic")


# ---------------------------------------------------------------------------------------------
# Carrier offset with the rates from the profile
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("modulation", "h"), LINKS, ids=LINK_IDS)
@pytest.mark.parametrize("ebn0_db", [6.0, 12.0, 20.0])
def test_carrier_offset_within_tolerance(modulation, h, ebn0_db):
    # Requirement: |error| ≤ max(50 Hz, 1 % of Rs) over ±3 kHz [project requirement].
    tol = max(50.0, 0.01 * RS)
    for i, cfo in enumerate([-3000.0, -1234.5, 0.0, 2222.2, 3000.0]):
        x, _ = make_burst(modulation, h, ebn0_db, seed=1000 + i, cfo_hz=cfo)
        est = estimate_carrier(
            x,
            FS,
            modulation=modulation,
            tone_spacing_hz=profile_spacing(h),
            symbol_rate_hz=RS,
        )
        assert abs(est - cfo) <= tol, (modulation, h, ebn0_db, cfo, est)


def test_profile_rates_give_profile_sources_and_tone_frequencies():
    x, _ = make_burst("4fsk", 1.0, 10.0, seed=7, cfo_hz=1500.0)
    est = estimate_link(x, FS, modulation="4fsk", symbol_rate_hz=RS, tone_spacing_hz=RS)
    assert est.symbol_rate_source == "profile"
    assert est.tone_spacing_source == "profile"
    assert est.symbol_rate_hz == RS and est.tone_spacing_hz == RS
    assert est.quality["rate_line_db"] is None
    # tone i at cfo + (i − (M−1)/2)·Δf (project convention)
    expected = [est.cfo_hz + (i - 1.5) * RS for i in range(4)]
    assert est.tone_freqs_hz == pytest.approx(expected, abs=1e-9)
    assert est.cfo_hz == pytest.approx(1500.0, abs=50.0)
    assert est.modulation_index == pytest.approx(1.0)
    assert est.samples_per_symbol == pytest.approx(FS / RS)
    d = est.to_dict()
    assert d["tone_freqs_hz"] == list(est.tone_freqs_hz) and d["modulation_index"] == 1.0


def test_ook_profile_sources():
    x, _ = make_burst("ook", None, 10.0, seed=8, cfo_hz=-700.0)
    est = estimate_link(x, FS, modulation="ook", symbol_rate_hz=RS)
    assert est.tone_spacing_hz is None and est.tone_spacing_source == "n/a"
    assert est.modulation_index is None
    assert len(est.tone_freqs_hz) == 1 and est.tone_freqs_hz[0] == est.cfo_hz
    assert est.cfo_hz == pytest.approx(-700.0, abs=50.0)


def _tone_crb_std_hz(amplitude: float, noise_var: float, n: int) -> float:
    # Rife & Boorstyn 1974 [mem], METHODS §5: var(f̂) ≥ 6/((2π)²·SNR·N(N²−1)) cycles²/sample²,
    # SNR = A²/σ² per sample, times fs² for Hz².
    snr = amplitude**2 / noise_var
    return FS * math.sqrt(6.0 / ((2 * math.pi) ** 2 * snr * n * (n * n - 1)))


def test_ook_carrier_spread_against_the_frequency_crb():
    # The OOK carrier is a line of amplitude A·(fraction of ones) ≈ A/2 over the burst's N
    # samples; its estimate cannot beat the CRB of that tone in white noise. The random data
    # add a continuous part of PSD A²T/4 at the carrier [derived: rect on/off keying], i.e.
    # an effective noise (1 + A²·sps/(4σ²)) times larger: the spread should sit between the
    # bound and twice that effective bound.
    ebn0_db = 10.0
    errs, crb, crb_eff = [], [], []
    for seed in range(24):
        x, noise_var = make_burst("ook", None, ebn0_db, seed=2000 + seed, cfo_hz=900.0, pad=0)
        est = estimate_carrier(x, FS, modulation="ook", tone_spacing_hz=None, symbol_rate_hz=RS)
        errs.append(est - 900.0)
        n = x.size
        bound = _tone_crb_std_hz(0.5, noise_var, n)
        crb.append(bound)
        crb_eff.append(bound * math.sqrt(1.0 + 1.0 * (FS / RS) / (4 * noise_var)))
    spread = float(np.std(errs))
    # 24 samples: the sample std is within ±30 % of the true one with high probability
    assert spread >= 0.7 * float(np.mean(crb))
    assert spread <= 2.0 * float(np.mean(crb_eff))


def test_fsk_h1_carrier_spread_against_the_frequency_crb():
    # 2fsk h = 1: each tone is a line carrying a quarter of the power (amplitude A/2) [derived:
    # E[e^{jψ(t)}] = cos(πt/T) for binary CPFSK h = 1]; the two lines give two independent
    # estimates, so the CRB of their mean is the single-line bound / √2.
    errs, crb = [], []
    for seed in range(24):
        x, noise_var = make_burst("2fsk", 1.0, 8.0, seed=3000 + seed, cfo_hz=-400.0, pad=0)
        est = estimate_carrier(x, FS, modulation="2fsk", tone_spacing_hz=RS, symbol_rate_hz=RS)
        errs.append(est + 400.0)
        crb.append(_tone_crb_std_hz(0.5, noise_var, x.size) / math.sqrt(2))
    spread = float(np.std(errs))
    assert spread >= 0.7 * float(np.mean(crb))
    # the data's continuous spectrum next to each line is ~Es/N0/2 times the noise
    # PSD [derived, as above]: stay within a factor 2 of that effective bound
    assert spread <= 2.0 * float(np.mean(crb)) * math.sqrt(1.0 + 10**0.8 * 26.0 / 52.083)


# ---------------------------------------------------------------------------------------------
# Blind symbol rate and tone spacing
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("modulation", "h"), LINKS, ids=LINK_IDS)
def test_blind_rate_and_spacing_at_10_db(modulation, h):
    # Requirement: rate within 100 ppm, spacing within 1 % (10 dB, 500 symbols). The rate's
    # spread is that of a line frequency (Rife & Boorstyn [mem]): the estimator reports its own
    # predicted σ from the line height; the measured RMS must agree with it, and stay below
    # 100 ppm. Per burst: |error| ≤ 4 predicted σ.
    errs_ppm, pred_ppm = [], []
    for seed in range(10):
        cfo = float(np.random.default_rng(seed).uniform(-3000, 3000))
        x, _ = make_burst(modulation, h, 10.0, seed=4000 + seed, cfo_hz=cfo)
        est = estimate_link(x, FS, modulation=modulation)
        assert est.symbol_rate_source == "estimated"
        err = (est.symbol_rate_hz / RS - 1) * 1e6
        pred = est.quality["rate_std_hz"] / RS * 1e6
        assert abs(err) <= 4 * pred, (seed, err, pred)
        errs_ppm.append(err)
        pred_ppm.append(pred)
        if h is not None:
            assert est.tone_spacing_source == "estimated"
            assert est.tone_spacing_hz == pytest.approx(h * RS, rel=0.01)
        assert est.cfo_hz == pytest.approx(cfo, abs=max(50.0, 0.01 * RS))
        assert est.quality["reliable"]
    rms = math.sqrt(np.mean(np.square(errs_ppm)))
    assert rms <= 100.0
    # 10 samples: sample RMS within a factor 1.6 of the true σ (χ²₁₀ 0.5 %…99.5 %: 0.47…1.59)
    assert 0.45 * np.median(pred_ppm) <= rms <= 1.6 * np.median(pred_ppm)


def test_blind_rate_4fsk_each_burst_within_100_ppm():
    for seed in range(6):
        x, _ = make_burst("4fsk", 1.0, 10.0, seed=5000 + seed, cfo_hz=300.0 * seed)
        est = estimate_link(x, FS, modulation="4fsk")
        assert abs(est.symbol_rate_hz / RS - 1) <= 100e-6


@pytest.mark.parametrize(("modulation", "h"), [("2fsk", 1.0), ("2fsk", 0.5), ("ook", None)])
def test_rate_reflects_a_20_ppm_clock_offset(modulation, h):
    # A transmitter clock 20 ppm fast gives symbols at Rs·(1 + 20e-6) (synth module docstring).
    # Long burst (2000 symbols, 20 dB): the predicted σ is a few ppm, so the 20 ppm offset is
    # resolved: the estimate must be closer to the offset rate than to the nominal one.
    true_rate = RS * (1 + 20e-6)
    for seed in range(3):
        x, _ = make_burst(
            modulation, h, 20.0, seed=6000 + seed, n_symbols=2000, clock_offset_ppm=20.0
        )
        est = estimate_link(x, FS, modulation=modulation, tone_spacing_hz=profile_spacing(h))
        pred = est.quality["rate_std_hz"]
        assert pred / true_rate < 8e-6
        assert abs(est.symbol_rate_hz - true_rate) <= max(4 * pred, 100e-6 * true_rate)
        assert abs(est.symbol_rate_hz - true_rate) < abs(est.symbol_rate_hz - RS)


def test_rate_with_profile_spacing_and_with_approx():
    x, _ = make_burst("2fsk", 0.5, 12.0, seed=11, cfo_hz=-1000.0)
    est = estimate_link(x, FS, modulation="2fsk", tone_spacing_hz=0.5 * RS)
    assert est.tone_spacing_source == "profile" and est.symbol_rate_source == "estimated"
    assert est.symbol_rate_hz == pytest.approx(RS, rel=300e-6)
    tones = tone_frequencies_hz("2fsk", -1000.0, 0.5 * RS)
    r = estimate_symbol_rate(x, FS, modulation="2fsk", tone_freqs_hz=tones, approx=4700.0)
    assert r == pytest.approx(RS, rel=300e-6)
    r = estimate_symbol_rate(x, FS, modulation="2fsk")  # tones estimated too
    assert r == pytest.approx(RS, rel=300e-6)


@pytest.mark.parametrize(("modulation", "h"), [("2fsk", 1.0), ("4fsk", 1.0), ("2fsk", 0.5)])
def test_estimate_tone_spacing(modulation, h):
    x, _ = make_burst(modulation, h, 10.0, seed=12, cfo_hz=2500.0)
    assert estimate_tone_spacing(x, FS, modulation=modulation) == pytest.approx(h * RS, rel=0.01)
    got = estimate_tone_spacing(x, FS, modulation=modulation, symbol_rate_hz=RS)
    assert got == pytest.approx(h * RS, rel=0.01)


def test_h_half_carrier_is_not_a_spectral_peak():
    # METHODS §10: at h = 0.5 the strongest spectral peak is not a tone; the estimate must
    # still land within tolerance while the naive argmax of |X(f)|² is off.
    x, _ = make_burst("2fsk", 0.5, 20.0, seed=13, cfo_hz=1700.0, pad=0)
    est = estimate_carrier(x, FS, modulation="2fsk", tone_spacing_hz=0.5 * RS, symbol_rate_hz=RS)
    assert abs(est - 1700.0) <= 50.0
    spec = np.abs(np.fft.fft(x))
    freqs = np.fft.fftfreq(x.size, 1 / FS)
    peak = freqs[np.argmax(spec)]
    # the naive reading (peak = one tone, ±Δf/2 from the carrier) misses by far more
    assert min(abs(peak - 1200.0 - 1700.0), abs(peak + 1200.0 - 1700.0)) > 100.0


def _gfsk_burst(modulation, h, seed, cfo_hz):
    rng = np.random.default_rng(seed)
    s = modulate(
        rng.integers(0, ALPHABET[modulation], 500),
        modulation=modulation,
        sample_rate_hz=FS,
        symbol_rate_hz=RS,
        tone_spacing_hz=h * RS,
        bt=0.5,
        cfo_hz=cfo_hz,
        timing_offset_samples=2.5,
    )
    noise_var = (FS / (RS * BITS[modulation])) / 10.0  # |s| = 1, Eb/N0 = 10 dB
    noise = rng.standard_normal(s.size) + 1j * rng.standard_normal(s.size)
    return (s + noise * math.sqrt(noise_var / 2)).astype(np.complex64)


@pytest.mark.parametrize(("modulation", "h"), [("2fsk", 1.0), ("4fsk", 1.0), ("2fsk", 0.5)])
def test_gaussian_filtered_fsk(modulation, h):
    # GFSK (BT = 0.5) keeps the per-symbol phase advance of CPFSK, hence the lines; the outer
    # 4fsk lines weaken. Same requirements as above (CFO, 1 % spacing, rate within 4 σ).
    for seed in range(3):
        x = _gfsk_burst(modulation, h, 7000 + seed, 800.0)
        est = estimate_link(x, FS, modulation=modulation, symbol_rate_hz=RS, tone_spacing_hz=h * RS)
        assert est.cfo_hz == pytest.approx(800.0, abs=max(50.0, 0.01 * RS))
        blind = estimate_link(x, FS, modulation=modulation)
        assert blind.tone_spacing_hz == pytest.approx(h * RS, rel=0.01)
        assert abs(blind.symbol_rate_hz - RS) <= 4 * blind.quality["rate_std_hz"]


# ---------------------------------------------------------------------------------------------
# Across bursts, copies
# ---------------------------------------------------------------------------------------------


def _est(rate, spacing, *, source="estimated", modulation="2fsk"):
    return LinkEstimate(
        modulation=modulation,
        sample_rate_hz=FS,
        symbol_rate_hz=rate,
        symbol_rate_source=source,
        tone_spacing_hz=spacing,
        tone_spacing_source="n/a" if spacing is None else source,
        cfo_hz=0.0,
        tone_freqs_hz=(0.0,),
        n_samples=1000,
    )


def test_refine_across_bursts_ignores_an_outlier():
    rates = [4800.1, 4799.9, 4800.05, 4799.95, 5100.0]  # last burst locked on nonsense
    spacings = [4801.0, 4799.0, 4800.5, 4799.5, 2400.0]
    ests = [_est(r, s) for r, s in zip(rates, spacings, strict=True)]
    rate, spacing = refine_link_across_bursts(ests, [1, 1, 1, 1, 3])
    assert rate == pytest.approx(np.mean(rates[:4]), abs=1e-9)
    assert spacing == pytest.approx(np.mean(spacings[:4]), abs=1e-9)


def test_refine_across_bursts_weights_and_profile_values():
    ests = [_est(4800.0, 4800.0), _est(4800.2, 4800.0)]
    rate, _ = refine_link_across_bursts(ests, [3.0, 1.0])
    assert rate == pytest.approx((3 * 4800.0 + 4800.2) / 4)
    prof = [_est(4800.0, 4800.0, source="profile"), _est(4810.0, 4790.0, source="profile")]
    assert refine_link_across_bursts(prof, [1, 1]) == (4800.0, 4800.0)
    ook = [_est(4800.0, None, modulation="ook"), _est(4800.2, None, modulation="ook")]
    assert refine_link_across_bursts(ook, [1, 1])[1] is None


def test_refine_across_bursts_bad_input():
    with pytest.raises(MeasurementError, match="no burst"):
        refine_link_across_bursts([], [])
    with pytest.raises(ParameterError, match="one weight per burst"):
        refine_link_across_bursts([_est(4800.0, 4800.0)], [1, 2])
    with pytest.raises(ParameterError, match="non-negative"):
        refine_link_across_bursts([_est(4800.0, 4800.0)], [-1])


def test_link_with_recomputes_tones():
    x, _ = make_burst("4fsk", 1.0, 15.0, seed=14)
    est = estimate_link(x, FS, modulation="4fsk", symbol_rate_hz=RS, tone_spacing_hz=RS)
    new = link_with(est, tone_spacing_hz=4000.0, cfo_hz=100.0, symbol_rate_hz=4000.0)
    assert new.tone_freqs_hz == pytest.approx([100 - 6000, 100 - 2000, 100 + 2000, 100 + 6000])
    assert new.modulation_index == pytest.approx(1.0)
    assert est.cfo_hz != 100.0  # the original is unchanged
    with pytest.raises(ParameterError, match="tone_spacing_hz"):
        link_with(est, tone_spacing_hz=-5.0)


# ---------------------------------------------------------------------------------------------
# Bad input
# ---------------------------------------------------------------------------------------------


def test_empty_and_short_bursts_raise_measurement_error():
    with pytest.raises(MeasurementError, match="samples"):
        estimate_link(np.zeros(0, np.complex64), FS, modulation="2fsk")
    x, _ = make_burst("2fsk", 1.0, 20.0, seed=15, n_symbols=10, pad=0)
    with pytest.raises(MeasurementError, match="symbols"):
        estimate_link(x, FS, modulation="2fsk", symbol_rate_hz=RS, tone_spacing_hz=RS)
    with pytest.raises(MeasurementError, match="symbol"):
        estimate_link(x, FS, modulation="2fsk")
    with pytest.raises(MeasurementError, match="all zeros"):
        estimate_link(np.zeros(5000, np.complex64), FS, modulation="ook", symbol_rate_hz=RS)
    bad = np.ones(5000, np.complex64)
    bad[10] = np.nan
    with pytest.raises(MeasurementError, match="NaN"):
        estimate_link(bad, FS, modulation="ook", symbol_rate_hz=RS)


def test_bad_parameters_raise_parameter_error():
    x, _ = make_burst("ook", None, 20.0, seed=16)
    with pytest.raises(ParameterError, match="modulation"):
        estimate_link(x, FS, modulation="8psk")
    with pytest.raises(ParameterError, match="sample_rate_hz"):
        estimate_link(x, 0.0, modulation="ook")
    with pytest.raises(ParameterError, match="symbol_rate_hz"):
        estimate_link(x, FS, modulation="ook", symbol_rate_hz=-4800)
    with pytest.raises(ParameterError, match="tone_spacing_hz"):
        estimate_link(x, FS, modulation="ook", tone_spacing_hz=4800.0)
    with pytest.raises(ParameterError, match="tone_spacing_hz"):
        estimate_carrier(x, FS, modulation="2fsk", tone_spacing_hz=None, symbol_rate_hz=RS)


@pytest.mark.parametrize("n", [1, 2, 7, 1000, 29400])
@pytest.mark.parametrize("q", [0.0, 0.2, 0.5, 0.97, 1.0])
def test_noise_floor_percentile_equals_numpy(n, q):
    # The one-partition percentile used for the spectral noise floor is numpy's default
    # (linear interpolation between order statistics).
    from iqstat.estimate.spectrum import _percentile

    v = np.random.default_rng(n).exponential(size=n)
    assert _percentile(v, q) == pytest.approx(np.percentile(v, 100 * q), rel=1e-15, abs=0)


# ---------------------------------------------------------------------------------------------
# Batched estimate
# ---------------------------------------------------------------------------------------------


def test_h_half_carrier_within_requirement_at_0db():
    # Requirement: |error| ≤ max(50 Hz, 1 % of Rs) at every Eb/N0 of the accuracy benchmark,
    # 0 dB included [project requirement]. 2-FSK h = 1/2 has no line at its tones; its square
    # has lines at 2·fc ± Rs/2 (h·2 = 1: CPFSK with an integer index has discrete lines at
    # its tones, Proakis & Salehi 5th ed. §3.4 [from memory]).
    tol = max(50.0, 0.01 * RS)
    rng = np.random.default_rng(77)
    xs, cfos = [], rng.uniform(-3000.0, 3000.0, 40)
    for i, cfo in enumerate(cfos):
        x, _ = make_burst(
            "2fsk", 0.5, 0.0, seed=500 + i, cfo_hz=cfo, n_symbols=560, clock_offset_ppm=20.0
        )
        xs.append(x)
    ests = estimate_link_many(
        xs, FS, modulation="2fsk", symbol_rate_hz=RS, tone_spacing_hz=0.5 * RS
    )
    errors = np.array([e.cfo_hz for e in ests]) - cfos
    assert np.max(np.abs(errors)) <= tol, errors
    assert all(e.quality["carrier_method"] == "power-2-lines" for e in ests)


@pytest.mark.parametrize(("modulation", "h"), LINKS, ids=LINK_IDS)
def test_batch_equals_single_bursts_and_keeps_failures_in_their_slots(modulation, h):
    # One implementation: the batch must give each burst what estimate_link gives it alone,
    # and a degenerate burst in the middle must not spoil the others [project design rule].
    spacing = profile_spacing(h)
    xs = [
        make_burst(modulation, h, 20.0, seed=31, cfo_hz=-2500.0, n_symbols=300)[0],
        make_burst(modulation, h, 2.0, seed=32, cfo_hz=1700.0, n_symbols=560)[0],
        np.zeros(20000, np.complex64),  # all zeros
        np.full(40, 0.1 + 0.1j),  # too short
        make_burst(modulation, h, 8.0, seed=33, cfo_hz=300.0, n_symbols=120)[0],
        np.random.default_rng(34).standard_normal(9000).astype(np.complex64),  # noise only
        make_burst(modulation, h, 12.0, seed=35, cfo_hz=2900.0, n_symbols=700, pad=1000)[0],
    ]
    batch = estimate_link_many(
        xs, FS, modulation=modulation, symbol_rate_hz=RS, tone_spacing_hz=spacing
    )
    assert len(batch) == len(xs)
    assert isinstance(batch[2], MeasurementError) and "all zeros" in str(batch[2])
    assert isinstance(batch[3], MeasurementError) and "samples" in str(batch[3])
    for x, got in zip(xs, batch, strict=True):
        try:
            alone = estimate_link(
                x, FS, modulation=modulation, symbol_rate_hz=RS, tone_spacing_hz=spacing
            )
        except MeasurementError as exc:
            assert isinstance(got, MeasurementError) and str(got) == str(exc)
            continue
        assert isinstance(got, LinkEstimate)
        assert got.cfo_hz == pytest.approx(alone.cfo_hz, rel=1e-9, abs=1e-9)
        assert got.message == alone.message
        assert got.quality == alone.quality
    for i, cfo in ((0, -2500.0), (1, 1700.0), (4, 300.0), (6, 2900.0)):
        assert abs(batch[i].cfo_hz - cfo) <= max(50.0, 0.01 * RS), (i, batch[i].cfo_hz)


def test_batch_split_into_chunks_equals_one_chunk(monkeypatch):
    # Bursts of one DFT length go through the FFT in chunks of at most BATCH_ROWS rows; a
    # row's numbers depend on that row alone, so chunking must not change any result (and a
    # zeroed burst stays a failure in its slot) [project design rule].
    import iqstat.estimate.link as link_module

    xs = [
        make_burst("2fsk", 1.0, 4.0 + 2.0 * i, seed=60 + i, cfo_hz=-2000.0 + 400.0 * i)[0]
        for i in range(11)
    ]
    xs[5] = np.zeros_like(xs[5])
    kw = dict(modulation="2fsk", symbol_rate_hz=RS, tone_spacing_hz=RS, band_margin_symbols=2.0)
    whole = estimate_link_many(xs, FS, **kw)
    monkeypatch.setattr(link_module, "BATCH_ROWS", 4)  # chunks of 4, 4 and 3 (+ 1 zero row)
    split = estimate_link_many(xs, FS, **kw)
    assert isinstance(whole[5], MeasurementError) and str(split[5]) == str(whole[5])
    for i, (a, b) in enumerate(zip(whole, split, strict=True)):
        if i != 5:
            assert a.to_dict() == b.to_dict(), i


def test_band_energy_matches_a_direct_dft_sum():
    # Parseval (Σ|X_k|²/N = Σ|x_n|², any DFT text): the band energy is the bins' power over the
    # DFT length; recomputed here with numpy's FFT and fftfreq on the same zero-padded length.
    x, _ = make_burst("2fsk", 1.0, 10.0, seed=41, cfo_hz=800.0)
    est = estimate_link_many(
        [x], FS, modulation="2fsk", symbol_rate_hz=RS, tone_spacing_hz=RS, band_margin_symbols=1.5
    )[0]
    nfft = fft_size(x.size)
    spec = np.abs(np.fft.fft(x.astype(np.complex128), nfft)) ** 2
    f = np.fft.fftfreq(nfft, 1.0 / FS)
    lo, hi = min(est.tone_freqs_hz) - 1.5 * RS, max(est.tone_freqs_hz) + 1.5 * RS
    sel = (f >= lo) & (f <= hi)
    assert est.quality["band_energy"] == pytest.approx(spec[sel].sum() / nfft, rel=1e-5)
    assert est.quality["band_width_hz"] == pytest.approx(sel.sum() * FS / nfft, rel=1e-12)
    # most of a 10 dB burst's signal energy and a band's share of the noise
    assert est.quality["band_energy"] < float(np.vdot(x, x).real)


@pytest.mark.parametrize("n", [64, 100, 1000, 29400, 29568, 40001, 1 << 20])
def test_fft_size_is_a_fast_length_with_little_padding(n):
    size = fft_size(n)
    assert n <= size <= math.ceil(1.125 * n)
    assert scipy.fft.next_fast_len(size) == size  # a length pocketfft handles fast (scipy)


@pytest.mark.parametrize("n", [1, 2, 7, 1182, 1183])
def test_row_median_equals_numpy(n):
    # The one-partition median of the line windows is numpy's median (mean of the two middle
    # order statistics for an even count) [numpy.median documentation].
    from iqstat.rowstats import median_rows as _median_rows

    v = np.random.default_rng(n).exponential(size=(5, n)).astype(np.float32)
    assert np.array_equal(_median_rows(v), np.median(v, axis=1))


def test_spectrum_windows_equal_circular_indexing():
    # Windows read from the spectrum followed by its first bins again must hold exactly the
    # bins k mod nfft (the DFT is periodic in k, any DFT text), also across the wrap and
    # after a window is gathered again far away.
    from iqstat.estimate.batch import _runs_view, _Windows

    rng = np.random.default_rng(3)
    nfft, width = 1000, 150
    spec = (rng.standard_normal((4, nfft)) + 1j * rng.standard_normal((4, nfft))).astype(
        np.complex64
    )
    ext = np.concatenate([spec, spec[:, :width]], axis=1)
    win = _Windows(ext, nfft, width, np.array([0, 500, 999, -30]))

    def held(w, r):
        return (w.kstart[r] + np.arange(width)) % nfft

    for r in range(4):
        assert np.array_equal(win.x[r], spec[r, held(win, r)])
        assert np.array_equal(
            win.pw[r], spec[r, held(win, r)].real ** 2 + spec[r].imag[held(win, r)] ** 2
        )
    lo = np.array([10, 500, 990, 300])  # rows 0 and 3 must be gathered again
    win.hold(lo, lo + 100)
    for r in range(4):
        local = win.local(lo)[r]
        assert local + 100 < width
        assert np.array_equal(
            win.x[r, local : local + 101], spec[r, np.arange(lo[r], lo[r] + 101) % nfft]
        )
    a = np.array([[0, 5], [7, 1], [3, 3], [49, 0]])
    runs = win.runs(a, 100)
    for r in range(4):
        for i in range(2):
            assert np.array_equal(runs[r, i], win.pw[r, a[r, i] : a[r, i] + 100].astype(float))
    view = _runs_view(win.pw, 100)
    assert view.shape == (4, width - 99, 100) and view[2, 17, 3] == win.pw[2, 20]


def test_batch_equals_single_near_the_band_edges_with_a_nan_burst():
    # Carriers near 0 Hz and near ±fs/2 put the line and band windows across the DFT's wrap
    # point; a NaN burst in the middle must get its own error and spoil nothing
    # [project design rule]; carriers within max(50 Hz, 1 % of Rs) of the truth
    # [project requirement].
    cfos = [0.0, 0.5 * FS - 9000.0, -0.5 * FS + 8000.0, -600.0]
    xs = [
        make_burst("2fsk", 1.0, 10.0, seed=60 + i, cfo_hz=c, n_symbols=300 + 90 * i)[0]
        for i, c in enumerate(cfos)
    ]
    bad = xs[1].copy()
    bad[100] = np.nan
    xs.insert(2, bad)
    kw = dict(modulation="2fsk", symbol_rate_hz=RS, tone_spacing_hz=RS, band_margin_symbols=2.0)
    batch = estimate_link_many(xs, FS, **kw)
    assert isinstance(batch[2], MeasurementError) and "NaN" in str(batch[2])
    good = [b for i, b in enumerate(batch) if i != 2]
    for x, got, cfo in zip([x for i, x in enumerate(xs) if i != 2], good, cfos, strict=True):
        alone = estimate_link_many([x], FS, **kw)[0]
        assert got.cfo_hz == pytest.approx(alone.cfo_hz, rel=1e-9, abs=1e-9)
        assert got.quality.keys() == alone.quality.keys()
        for key, value in alone.quality.items():  # numbers to 1e-9, None/str/bool equal
            if isinstance(value, float):
                assert got.quality[key] == pytest.approx(value, rel=1e-9), key
            else:
                assert got.quality[key] == value, key
        assert got.message == alone.message
        err = (got.cfo_hz - cfo + FS / 2) % FS - FS / 2  # the carrier is circular in fs
        assert abs(err) <= max(50.0, 0.01 * RS), (cfo, got.cfo_hz)


@pytest.mark.parametrize("modulation", ["2fsk", "4fsk"])
def test_feature_is_largest_minus_second_largest_magnitude(modulation):
    # The symbol-boundary feature E[n] = |y|(1) − |y|(2) (largest minus second largest branch
    # magnitude), checked against numpy's sort of the branch magnitudes.
    from iqstat.estimate.spectrum import _Burst

    x, _ = make_burst(modulation, 1.0, 10.0, seed=70, n_symbols=60)
    b = _Burst(x, FS, modulation)
    tones = tone_frequencies_hz(modulation, 0.0, RS)
    window = 52
    c = b.mixed_cumsum(tones)
    mag = np.sort(np.abs(c[:, window:] - c[:, :-window]), axis=0)
    assert np.array_equal(b.feature(tones, window), mag[-1] - mag[-2])
