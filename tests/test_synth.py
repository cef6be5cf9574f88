"""Tests of the synthetic-capture generator: modulator, SigMF writer, scenarios.

References used below:
[PS] J. G. Proakis and M. Salehi, Digital Communications, 5th ed., 2008, §3.3: CPFSK has a
     constant envelope and a phase that is the integral of the instantaneous frequency [mem].
[MH] K. Murota and K. Hirade, "GMSK modulation for digital mobile radio telephony", IEEE Trans.
     Commun. 29(7):1044–1050, 1981: Gaussian premodulation filter with 3-dB bandwidth B,
     impulse-response standard deviation σ = √(ln 2)/(2πB) [mem].
[M§3] /work/shared/METHODS.md §0 and §3 (correlator conventions; Es/N0 estimate spread).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, stats

from iqstat.errors import ParameterError
from iqstat.synth import modulate, n_output_samples, symbol_boundaries, symbol_period_samples

FS = 250e3
RS = 4800.0  # 52.083 samples per symbol: deliberately not an integer


def inst_freq_hz(s: np.ndarray, fs: float) -> np.ndarray:
    """Mean instantaneous frequency over each sample interval [n−1, n]."""
    return np.angle(s[1:] * np.conj(s[:-1])) * fs / (2 * np.pi)


def tone_hz(i, m, spacing, cfo):
    """Tone i of M at cfo + (i − (M−1)/2)·Δf (project convention)."""
    return cfo + (np.asarray(i) - (m - 1) / 2) * spacing


# ----------------------------------------------------------------------------- modulator

FSK_CASES = [
    ("2fsk", 1.0),
    ("2fsk", 0.5),
    ("4fsk", 1.0),
    ("4fsk", 0.5),
]


@pytest.mark.parametrize("modulation,h", FSK_CASES)
@pytest.mark.parametrize("bt", [None, 0.5])
def test_cpfsk_constant_envelope(modulation, h, bt):
    # [PS]: CPFSK is a constant-envelope signal, |s(t)| = A at every sample of the burst.
    rng = np.random.default_rng(11)
    m = 2 if modulation == "2fsk" else 4
    sym = rng.integers(0, m, 300)
    s = modulate(
        sym, modulation=modulation, sample_rate_hz=FS, symbol_rate_hz=RS,
        tone_spacing_hz=h * RS, bt=bt, cfo_hz=1234.5, amplitude=0.7,
        timing_offset_samples=3.3, clock_offset_ppm=40.0,
    )  # fmt: skip
    burst = s[4:]  # samples at t >= t0 = 3.3
    assert np.all(s[:4] == 0)
    np.testing.assert_allclose(np.abs(burst), 0.7, rtol=1e-12)


@pytest.mark.parametrize("modulation,h", FSK_CASES)
def test_mid_symbol_frequency_is_the_tone(modulation, h):
    # [PS]: with a rectangular frequency pulse the instantaneous frequency over symbol k is the
    # tone frequency; the tone map is the project convention cfo + (i − (M−1)/2)·Δf.
    rng = np.random.default_rng(12)
    m = 2 if modulation == "2fsk" else 4
    sym = rng.integers(0, m, 400)
    cfo, spacing, t0, ppm = -2100.0, h * RS, 7.61, -25.0
    s = modulate(
        sym, modulation=modulation, sample_rate_hz=FS, symbol_rate_hz=RS,
        tone_spacing_hz=spacing, cfo_hz=cfo, timing_offset_samples=t0, clock_offset_ppm=ppm,
    )  # fmt: skip
    f = inst_freq_hz(s, FS)  # f[n-1] covers [n-1, n]
    edges = symbol_boundaries(
        sym.size, sample_rate_hz=FS, symbol_rate_hz=RS, timing_offset_samples=t0,
        clock_offset_ppm=ppm,
    )  # fmt: skip
    n = np.arange(1, s.size)
    k_lo = np.floor((n - 1 - t0) / (edges[1] - edges[0]))
    k_hi = np.floor((n - t0) / (edges[1] - edges[0]))
    whole = (k_lo == k_hi) & (n - 1 >= t0)  # interval inside one symbol
    k = k_lo[whole].astype(int)
    expected = tone_hz(sym[k], m, spacing, cfo)
    # exact up to float64 phase rounding (~1e-12 rad per sample → ~1e-7 Hz)
    np.testing.assert_allclose(f[whole], expected, atol=1e-6)
    # every tone occurred
    assert set(np.unique(sym[k])) == set(range(m))


@pytest.mark.parametrize("modulation,h", FSK_CASES)
def test_fractional_symbol_boundaries_and_phase_continuity(modulation, h):
    # [PS]: the phase is the integral of the frequency. Over a sample interval [n−1, n] that holds
    # the boundary τ between symbols k−1 and k, the phase advance is
    # 2π/fs·[f_{k−1}(τ − (n−1)) + f_k(n − τ)]: solving for τ recovers each boundary exactly.
    # A modulator that rounded the period (52.083 → 52 samples) would drift by 0.083 sample
    # per symbol, i.e. 125 samples over these 1500 symbols.
    rng = np.random.default_rng(13)
    m = 2 if modulation == "2fsk" else 4
    sym = rng.integers(0, m, 1500)
    cfo, spacing, t0, ppm = 800.0, h * RS, 0.37, 20.0
    s = modulate(
        sym, modulation=modulation, sample_rate_hz=FS, symbol_rate_hz=RS,
        tone_spacing_hz=spacing, cfo_hz=cfo, timing_offset_samples=t0, clock_offset_ppm=ppm,
    )  # fmt: skip
    f = inst_freq_hz(s, FS)
    period = (FS / RS) / (1 + ppm * 1e-6)
    tau = t0 + np.arange(1, sym.size) * period  # boundary before symbol k = 1..n−1
    n = np.ceil(tau).astype(int)
    keep = (sym[1:] != sym[:-1]) & (n - tau > 1e-6) & (n - tau < 1 - 1e-6)
    f_prev = tone_hz(sym[:-1], m, spacing, cfo)[keep]
    f_next = tone_hz(sym[1:], m, spacing, cfo)[keep]
    f_meas = f[n[keep] - 1]
    tau_est = n[keep] - (f_meas - f_prev) / (f_next - f_prev)
    np.testing.assert_allclose(tau_est, tau[keep], atol=1e-6)
    assert keep.sum() > 500
    # continuity: no sample-to-sample phase step larger than the highest tone allows
    assert np.max(np.abs(f)) <= np.max(np.abs(tone_hz([0, m - 1], m, spacing, cfo))) + 1e-6


def test_clock_offset_sign_and_length():
    # Documented convention: transmitter clock fast by ppm → T' = (fs/Rs)/(1 + ppm·1e-6);
    # output length ceil(t0 + n·T').
    period = symbol_period_samples(FS, RS, 100.0)
    assert period == pytest.approx((FS / RS) / 1.0001, rel=1e-15)
    assert period < FS / RS
    n = n_output_samples(1000, sample_rate_hz=FS, symbol_rate_hz=RS,
                         timing_offset_samples=2.5, clock_offset_ppm=100.0)  # fmt: skip
    assert n == math.ceil(2.5 + 1000 * (FS / RS) / 1.0001)
    s = modulate(np.zeros(1000, int), modulation="2fsk", sample_rate_hz=FS, symbol_rate_hz=RS,
                 tone_spacing_hz=RS, timing_offset_samples=2.5, clock_offset_ppm=100.0)  # fmt: skip
    assert s.size == n and s.dtype == np.complex128
    # integer sps: 48 kS/s, 1200 Bd, 10 symbols → exactly 400 samples, none extra
    assert n_output_samples(10, sample_rate_hz=48e3, symbol_rate_hz=1200) == 400


def test_gaussian_pulse_matches_the_filtered_step():
    # [MH]: a step of the frequency level from a to b at τ through a Gaussian filter of
    # 3-dB bandwidth B = BT/T gives f(t) = Δf·[a + (b − a)·Φ((t − τ)/σ)], σ = √(ln 2)/(2πB).
    # The per-sample phase advance is the integral of that over [n−1, n] (quadrature, scipy).
    bt, spacing, cfo = 0.5, 4800.0, 0.0
    sym = np.array([0] * 30 + [1] * 30)
    s = modulate(sym, modulation="2fsk", sample_rate_hz=FS, symbol_rate_hz=RS,
                 tone_spacing_hz=spacing, bt=bt, cfo_hz=cfo)  # fmt: skip
    period = FS / RS
    tau = 30 * period
    sigma = math.sqrt(math.log(2)) / (2 * math.pi * bt / period)

    def f_model(t):
        return spacing * (-0.5 + stats.norm.cdf((t - tau) / sigma))

    f = inst_freq_hz(s, FS)
    for n in range(int(tau) - 60, int(tau) + 60, 7):
        ref, _ = integrate.quad(f_model, n - 1, n, epsabs=1e-10)
        assert f[n - 1] == pytest.approx(ref, abs=1e-5)


def test_gaussian_bt_smooths_transitions():
    # Smoothing: rectangular CPFSK steps by the whole spacing within one sample; BT = 0.5 limits
    # the slope to Δf·max φ(x)/σ per sample = Δf/(σ√(2π)) [MH], σ ≈ 19.5 samples here.
    rng = np.random.default_rng(14)
    sym = rng.integers(0, 2, 400)
    kw = dict(modulation="2fsk", sample_rate_hz=FS, symbol_rate_hz=RS, tone_spacing_hz=RS)
    f_rect = inst_freq_hz(modulate(sym, **kw), FS)
    f_gauss = inst_freq_hz(modulate(sym, bt=0.5, **kw), FS)
    sigma = math.sqrt(math.log(2)) / (2 * math.pi * 0.5) * FS / RS
    slope_limit = RS / (sigma * math.sqrt(2 * math.pi))
    assert np.max(np.abs(np.diff(f_rect))) > 0.5 * RS
    assert np.max(np.abs(np.diff(f_gauss))) <= slope_limit * 1.001
    # area preserved: over the burst the total phase equals that of the rectangular pulse
    # except for the pulses cut by the burst ends (q(∞) = T).
    long_run = np.ones(200, int)
    ph_r = np.unwrap(np.angle(modulate(long_run, **kw)))
    ph_g = np.unwrap(np.angle(modulate(long_run, bt=0.5, **kw)))
    mid = slice(2000, 8000)
    np.testing.assert_allclose(np.diff(ph_g[mid]), np.diff(ph_r[mid]), atol=1e-9)


def test_ook_rect_and_raised_cosine():
    bits = np.array([1, 1, 0, 1, 0, 0, 1, 1, 1, 0])
    t0 = 30.2
    kw = dict(modulation="ook", sample_rate_hz=FS, symbol_rate_hz=RS, cfo_hz=3000.0,
              timing_offset_samples=t0, amplitude=0.5)  # fmt: skip
    s = modulate(bits, **kw)
    period = FS / RS
    t = np.arange(s.size)
    k = np.floor((t - t0) / period).astype(int)
    on = (k >= 0) & (k < bits.size)
    expected = np.zeros(s.size)
    expected[on] = 0.5 * bits[k[on]]
    np.testing.assert_allclose(np.abs(s), expected, atol=1e-12)
    # carrier at cfo_hz during "on" (fact: a pure tone's phase advance is 2π f/fs per sample)
    f = inst_freq_hz(s, FS)
    both_on = (expected[1:] > 0) & (expected[:-1] > 0)
    np.testing.assert_allclose(f[both_on], 3000.0, atol=1e-6)
    # raised cosine: ramps centred on boundaries, complementary (a run of ones stays flat),
    # value ½ exactly at a 0/1 boundary, envelope within [0, A].
    rc = modulate(bits, ook_shape="raised-cosine", ook_rolloff=0.5, **kw)
    env = np.abs(rc) / 0.5
    u = (t - t0) / period
    far = np.abs(u - np.rint(u)) > 0.25 + 1e-9
    np.testing.assert_allclose(env[far], expected[far] / 0.5, atol=1e-12)
    assert np.all(env <= 1 + 1e-12) and np.all(env >= 0)
    # inside the run 6..8 the boundaries 7 and 8 join ones: envelope stays 1
    run = (u > 6.3) & (u < 8.7)
    np.testing.assert_allclose(env[run], 1.0, atol=1e-12)
    # the envelope follows r(x) = ½(1 + sin(πx/α)) across the 1→0 boundary at u = 2
    near = np.abs(u - 2) < 0.25
    x = u[near] - 2
    np.testing.assert_allclose(env[near], 1 - 0.5 * (1 + np.sin(np.pi * x / 0.5)), atol=1e-12)
    # the leading ramp begins α·T'/2 before t0
    assert env[int(t0) - 5] > 0 and env[int(t0 - 0.25 * period) - 1] == 0


@pytest.mark.parametrize(
    "kwargs,match",
    [
        (dict(modulation="3fsk"), "modulation"),
        (dict(modulation="2fsk"), "tone_spacing_hz"),
        (dict(modulation="2fsk", tone_spacing_hz=-5.0), "tone_spacing_hz"),
        (dict(modulation="ook", tone_spacing_hz=4800.0), "tone_spacing_hz"),
        (dict(modulation="ook", ook_shape="gauss"), "ook_shape"),
        (dict(modulation="ook", ook_rolloff=1.5), "ook_rolloff"),
        (dict(modulation="2fsk", tone_spacing_hz=4800.0, timing_offset_samples=-1), "timing"),
        (dict(modulation="2fsk", tone_spacing_hz=4800.0, sample_rate_hz=0.0), "sample_rate"),
        (dict(modulation="2fsk", tone_spacing_hz=4800.0, symbol_rate_hz=1e6), "symbol_rate"),
    ],
)
def test_modulate_rejects_bad_parameters(kwargs, match):
    args = dict(sample_rate_hz=FS, symbol_rate_hz=RS)
    args.update(kwargs)
    with pytest.raises(ParameterError, match=match):
        modulate(np.array([0, 1, 1]), **args)


def test_modulate_rejects_out_of_range_symbols():
    with pytest.raises(ParameterError, match="out of range"):
        modulate(np.array([0, 2]), modulation="2fsk", sample_rate_hz=FS, symbol_rate_hz=RS,
                 tone_spacing_hz=RS)  # fmt: skip
    with pytest.raises(ParameterError, match="integers"):
        modulate(np.array([0.5]), modulation="ook", sample_rate_hz=FS, symbol_rate_hz=RS)


# ----------------------------------------------------------------------------- SigMF writer


def _quantise_reference(x: np.ndarray, datatype: str) -> tuple[np.ndarray, int]:
    """Expected read-back after quantisation, from the SigMF spec's integer full-scale rule
    (signed v/2^(b−1); unsigned (v − 2^(b−1))/2^(b−1)), as sigmf-python's autoscale applies it.
    Returns the complex values and the number of saturated components."""
    comps = np.stack([x.real, x.imag], axis=-1).ravel()
    if datatype == "cf32_le":
        return x.astype(np.complex64), 0
    if datatype == "ci16_le":
        q = np.rint(comps * 32768.0)
        clipped = int(np.count_nonzero((q < -32768) | (q > 32767)))
        v = np.clip(q, -32768, 32767) / 32768.0
    elif datatype == "cu8":
        q = np.rint(comps * 128.0 + 128.0)
        clipped = int(np.count_nonzero((q < 0) | (q > 255)))
        v = (np.clip(q, 0, 255) - 128.0) / 128.0
    else:
        raise AssertionError(datatype)
    return (v[0::2] + 1j * v[1::2]).astype(np.complex64), clipped


@pytest.mark.parametrize("datatype", ["cf32_le", "ci16_le", "cu8"])
def test_write_recording_reads_back_with_sigmf(tmp_path, datatype):
    import hashlib
    import json

    import sigmf

    from iqstat.formats.sigmf_writer import write_recording

    rng = np.random.default_rng(21)
    x = 0.35 * (rng.standard_normal(5000) + 1j * rng.standard_normal(5000))  # some clip at ±1
    chunks = [x[:1234], x[1234:4000], x[4000:]]
    res = write_recording(
        tmp_path / "hill", iter(chunks), datatype=datatype, sample_rate_hz=250e3,
        frequency_hz=402.5e6, datetime_utc="2026-04-01T06:30:00Z", description="unit test",
        author="test suite", annotations=[{"core:sample_start": np.int64(100),
                                           "core:sample_count": np.int64(50),
                                           "core:label": "burst"}],
    )  # fmt: skip
    meta_path, data_path = res
    assert meta_path.name == "hill.sigmf-meta" and data_path.name == "hill.sigmf-data"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["hill.sigmf-data", "hill.sigmf-meta"]
    # the library verifies our sha512 on open (skip_checksum=False) and validates the schema
    rec = sigmf.fromfile(str(meta_path), skip_checksum=False)
    rec.validate()
    y = rec.read_samples()
    expected, n_clip = _quantise_reference(x, datatype)
    assert y.shape == x.shape
    np.testing.assert_array_equal(y.astype(np.complex64), expected)
    assert res.n_samples == 5000 and res.n_clipped == n_clip
    if datatype != "cf32_le":
        assert n_clip > 0  # σ = 0.35 per component: P(|v| > 1) ≈ 0.4 % of 10000 components
    digest = hashlib.sha512(data_path.read_bytes()).hexdigest()
    meta = json.loads(meta_path.read_text())
    assert meta["global"]["core:sha512"] == digest == res.sha512
    assert meta["global"]["core:version"] == sigmf.__specification__
    assert meta["global"]["core:recorder"].startswith("iqstat synth ")
    assert meta["captures"] == [{"core:sample_start": 0, "core:frequency": 402.5e6,
                                 "core:datetime": "2026-04-01T06:30:00Z"}]  # fmt: skip
    assert rec.get_global_field("core:datatype") == datatype


def test_write_recording_refuses_to_overwrite(tmp_path):
    from iqstat.errors import CaptureError
    from iqstat.formats.sigmf_writer import write_recording

    x = np.full(10, 0.5 + 0.25j)
    write_recording(tmp_path / "a", x, datatype="ci16_le", sample_rate_hz=1e3)
    before = (tmp_path / "a.sigmf-data").read_bytes()
    with pytest.raises(CaptureError, match="already exist.*overwrite=True"):
        write_recording(tmp_path / "a", -x, datatype="ci16_le", sample_rate_hz=1e3)
    assert (tmp_path / "a.sigmf-data").read_bytes() == before
    write_recording(tmp_path / "a", -x, datatype="ci16_le", sample_rate_hz=1e3, overwrite=True)
    assert (tmp_path / "a.sigmf-data").read_bytes() != before
    assert len(list(tmp_path.iterdir())) == 2


def test_write_recording_leaves_nothing_on_failure(tmp_path):
    from iqstat.formats.sigmf_writer import write_recording

    def chunks():
        yield np.zeros(100, complex)
        yield np.array([np.nan + 0j])

    with pytest.raises(ParameterError, match="NaN"):
        write_recording(tmp_path / "b", chunks(), datatype="cf32_le", sample_rate_hz=1e3)
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize(
    "kwargs,match",
    [
        (dict(datetime_utc="2026-04-01T06:30:00+02:00"), "RFC 3339"),
        (dict(extra_global={"pumphouse:site": "x"}), "core:extensions"),
        (dict(extra_global={"core:datatype": "cu8"}), "sets core:datatype"),
        (dict(annotations=[{"core:sample_start": 1, "core:freq_lower_edge": 1.0}]), "edge"),
        (dict(annotations=[{"core:sample_start": 99}]), "beyond"),
        (dict(sample_rate_hz=-1.0), "sample_rate_hz"),
    ],
)
def test_write_recording_rejects_bad_metadata(tmp_path, kwargs, match):
    from iqstat.formats.sigmf_writer import write_recording

    args = dict(datatype="ci16_le", sample_rate_hz=1e3)
    args.update(kwargs)
    with pytest.raises(ParameterError, match=match):
        write_recording(tmp_path / "c", np.zeros(10, complex), **args)
    assert list(tmp_path.iterdir()) == []


def test_write_recording_bad_datatype(tmp_path):
    from iqstat.errors import CaptureError
    from iqstat.formats.sigmf_writer import write_recording

    with pytest.raises(CaptureError, match="cf32"):
        write_recording(tmp_path / "d", np.zeros(4, complex), datatype="cf32", sample_rate_hz=1e3)


# ----------------------------------------------------------------------------- scenarios

BASE_SCENARIO = {
    "link": {"modulation": "2fsk", "symbol_rate": "4.8k", "tone_spacing": "4.8k"},
    "frame": {"preamble": "aaaaaaaa", "sync_word": "2dd4", "payload": "pn9", "payload_bits": 320},
    "capture": {"sample_rate": "250k", "datatype": "ci16_le", "seed": 5},
    "bursts": {"count": 2, "ebn0_db": 12.0},
}


def make_scenario(**tables):
    """BASE_SCENARIO with tables updated key by key (a table set to None is removed)."""
    import copy

    from iqstat.synth import scenario_from_dict

    d = copy.deepcopy(BASE_SCENARIO)
    for t, body in tables.items():
        if body is None:
            d.pop(t, None)
        else:
            d.setdefault(t, {}).update(body)
    return scenario_from_dict(d, source="test.toml", name="test")


def genie_correlate(x: np.ndarray, burst, truth) -> np.ndarray:
    """Correlator outputs z[k, i] over the known symbol intervals with the known tones.

    Unit-energy templates e^{j2π f_i n/fs}/√N_k over the samples n of symbol k (those with
    t0 + k·T' ≤ n < t0 + (k+1)·T'), so noise gives E|z|² = σ² (= N0) [M§3].
    """
    n = np.arange(burst.start_sample, burst.stop_sample)
    k = np.floor((n - burst.timing_offset_samples) / burst.symbol_period_samples).astype(int)
    m = 1 if truth.modulation == "ook" else (2 if truth.modulation == "2fsk" else 4)
    if truth.modulation == "ook":
        freqs = np.array([burst.cfo_hz])
    else:
        freqs = tone_hz(np.arange(m), m, truth.tone_spacing_hz, burst.cfo_hz)
    counts = np.bincount(k, minlength=burst.n_symbols)
    z = np.empty((burst.n_symbols, freqs.size), dtype=complex)
    for i, f in enumerate(freqs):
        prod = x[n] * np.exp(-2j * np.pi * f * n / truth.sample_rate_hz)
        z[:, i] = np.bincount(k, prod.real, burst.n_symbols) + 1j * np.bincount(
            k, prod.imag, burst.n_symbols
        )
    return z / np.sqrt(counts)[:, None]


@pytest.mark.parametrize("modulation", ["2fsk", "4fsk", "ook"])
def test_genie_recovers_requested_ebn0_and_noise(modulation):
    from iqstat.synth import synthesize

    ebn0_db, n_bits = 10.0, 4000
    link = {"modulation": modulation, "symbol_rate": "4.8k"}
    if modulation != "ook":
        link["tone_spacing"] = "4.8k"
    else:
        link["tone_spacing"] = None
    d_link = {k: v for k, v in link.items() if v is not None}
    import copy

    from iqstat.synth import scenario_from_dict

    d = copy.deepcopy(BASE_SCENARIO)
    d["link"] = d_link
    d["frame"]["payload_bits"] = n_bits
    d["capture"].update(lead_in_s=1.0, tail_s=1.0, datatype="cf32_le")
    d["bursts"] = {"count": 1, "ebn0_db": ebn0_db, "cfo_hz": 1500.0}
    d["impairments"] = {"clock_offset_ppm": 30.0}
    sc = scenario_from_dict(d, source="genie.toml", name="genie")
    syn = synthesize(sc, seed=101)
    x, truth = syn.samples, syn.truth
    (burst,) = truth.bursts
    assert burst.ebn0_db == pytest.approx(ebn0_db, abs=1e-9)

    # Noise variance from the gaps: the mean of N values |n|² ~ Exp(σ²) has sd σ²/√N.
    gap = np.concatenate([x[: burst.start_sample - 1], x[burst.stop_sample + 1 :]])
    sigma2_hat = np.mean(np.abs(gap) ** 2)
    sd_sigma2 = truth.noise_var / np.sqrt(gap.size)
    assert abs(sigma2_hat - truth.noise_var) < 4 * sd_sigma2

    # Eb/N0 from the correlators (data-aided, known symbols): average matched-branch energy
    # minus the noise, per bit.  S = Σ|z_matched|² over the matched symbols, in σ² units:
    # mean n_m(1+γ_m), var n_m(1+2γ_m) (noncentral χ²₂, [M§3]).
    z = genie_correlate(x, burst, truth)
    sym = burst.symbols_array()
    k_bits = truth.bits_per_symbol
    n_sym = sym.size
    if modulation == "ook":
        matched = np.abs(z[sym == 1, 0]) ** 2
    else:
        matched = np.abs(z[np.arange(n_sym), sym]) ** 2
    n_m = matched.size
    gamma_b_hat = (matched.sum() / sigma2_hat - n_m) / (n_sym * k_bits)
    # delta-method spread of that estimate, using the truth γ_b:
    gamma_b = 10 ** (ebn0_db / 10)
    gamma_m = gamma_b * k_bits * n_sym / n_m
    var = (
        n_m * (1 + 2 * gamma_m) / (n_sym * k_bits) ** 2
        + (n_m * (1 + gamma_m) / (n_sym * k_bits)) ** 2 / gap.size
    )
    sd_db = 10 / math.log(10) * math.sqrt(var) / gamma_b
    assert 4 * sd_db <= 0.2, "test design: 0.2 dB must be >= 4 standard deviations"
    err_db = 10 * math.log10(gamma_b_hat) - ebn0_db
    assert abs(err_db) < 0.2
    # and the non-matched FSK branches hold only noise: E|z|² = σ²
    if modulation != "ook":
        other = np.ones_like(z, dtype=bool)
        other[np.arange(n_sym), sym] = False
        e_other = np.mean(np.abs(z[other]) ** 2)
        assert abs(e_other / truth.noise_var - 1) < 4 / math.sqrt(other.sum())


def test_gray_map_4fsk_tones():
    # Project convention (common brief): 4fsk bit pairs, first bit more significant, on tones
    # lowest→highest 00, 01, 11, 10. Checked through the profile's mapper and the modulator.
    from iqstat.profile import bits_to_symbols

    bits = np.array([0, 0, 0, 1, 1, 1, 1, 0])
    sym = bits_to_symbols(bits, "4fsk")
    np.testing.assert_array_equal(sym, [0, 1, 2, 3])
    s = modulate(sym, modulation="4fsk", sample_rate_hz=48e3, symbol_rate_hz=1200,
                 tone_spacing_hz=1200)  # fmt: skip
    f = inst_freq_hz(s, 48e3)
    mid = f[np.arange(4) * 40 + 20]
    np.testing.assert_allclose(mid, [-1800, -600, 600, 1800], atol=1e-6)
    # in a synthesized burst the truth's symbols are the Gray map of its bits
    from iqstat.synth import synthesize

    sc = make_scenario(link={"modulation": "4fsk"})
    b = synthesize(sc).truth.bursts[0]
    np.testing.assert_array_equal(b.symbols_array(), bits_to_symbols(b.bits_array(), "4fsk"))


def test_truth_matches_frame_layout():
    # The sent bits are preamble + sync + pn9 payload from the recorded phase (O.150 PRBS9).
    from iqstat.patterns import prbs_bits
    from iqstat.profile import hex_to_bits
    from iqstat.synth import synthesize

    truth = synthesize(make_scenario()).truth
    for b in truth.bursts:
        bits = b.bits_array()
        np.testing.assert_array_equal(bits[:32], hex_to_bits("aaaaaaaa"))
        np.testing.assert_array_equal(bits[32:48], hex_to_bits("2dd4"))
        np.testing.assert_array_equal(bits[48:], prbs_bits("pn9", 320, b.payload_phase))
    assert truth.bursts[0].payload_phase != truth.bursts[1].payload_phase


def test_write_synthetic_files_truth_separate_and_deterministic(tmp_path):
    import json

    import sigmf

    from iqstat.synth import write_synthetic

    sc = make_scenario(bursts={"count": 3, "ebn0_db": [18, 14, 9]})
    a = write_synthetic(sc, tmp_path / "a", seed=3)
    b = write_synthetic(sc, tmp_path / "b", seed=3)
    c = write_synthetic(sc, tmp_path / "c", seed=4)
    for p, q in [(a.meta_path, b.meta_path), (a.data_path, b.data_path),
                 (a.truth_path, b.truth_path)]:  # fmt: skip
        assert p.read_bytes() == q.read_bytes()
    assert a.data_path.read_bytes() != c.data_path.read_bytes()
    assert a.meta_path.name == "test.sigmf-meta" and a.truth_path.name == "test.truth.json"
    rec = sigmf.fromfile(str(a.meta_path), skip_checksum=False)
    rec.validate()
    assert rec.read_samples().size == a.n_samples
    meta_text = a.meta_path.read_text().lower()
    truth = json.loads(a.truth_path.read_text())
    assert truth["format"] == "iqstat-synth-truth" and truth["version"] == 1
    assert truth["seed"] == 3 and len(truth["truth"]["bursts"]) == 3
    for word in ("ebn0", "esn0", "bits", "cfo", "truth", "timing"):
        assert word not in meta_text
    assert truth["truth"]["bursts"][0]["bits"] not in meta_text
    assert json.loads(meta_text)["annotations"] == []
    # the written recording is the in-memory synthesis, quantised
    from iqstat.synth import synthesize

    x = synthesize(sc, seed=3).samples
    expected, _ = _quantise_reference(x, "ci16_le")
    np.testing.assert_array_equal(rec.read_samples(), expected)
    # existing files are kept unless overwrite=True
    from iqstat.errors import CaptureError

    with pytest.raises(CaptureError, match="already exist"):
        write_synthetic(sc, tmp_path / "a", seed=3)
    write_synthetic(sc, tmp_path / "a", seed=3, overwrite=True)


def test_write_synthetic_needs_a_seed(tmp_path):
    from iqstat.synth import scenario_from_dict, write_synthetic

    d = dict(BASE_SCENARIO)
    d["capture"] = {k: v for k, v in BASE_SCENARIO["capture"].items() if k != "seed"}
    sc = scenario_from_dict(d, source="noseed.toml", name="noseed")
    with pytest.raises(ParameterError, match="seed"):
        write_synthetic(sc, tmp_path)


def test_load_scenario_file(tmp_path):
    from iqstat.synth import load_scenario

    p = tmp_path / "hill.toml"
    p.write_text(
        '[link]\nmodulation = "ook"\nsymbol_rate = 2400\n'
        '[frame]\npreamble = "aa"\npayload = "pn9"\npayload_bits = 64\n'
        '[capture]\nsample_rate = "100k"\ndatatype = "cu8"\nseed = 1\n'
        "[bursts]\ncount = 2\nebn0_db = {uniform = [8, 12]}\n"
        '[waveform]\nook_shape = "raised-cosine"\n'
    )
    sc = load_scenario(p)
    assert sc.name == "hill" and sc.profile.modulation == "ook" and sc.datatype == "cu8"
    assert sc.ebn0_db.uniform == (8.0, 12.0)


@pytest.mark.parametrize(
    "tables,match",
    [
        (dict(bursts={"ebno_db": 3}), r"unknown key 'ebno_db'.*did you mean 'ebn0_db'"),
        (dict(capture={"datatype": "ci16"}), r"datatype.*ci16_le"),
        (dict(capture={"datatype": "ri16_le"}), r"real"),
        (dict(link={"symbol_rate": None}), r"symbol_rate is missing"),
        (dict(impairment={"timing": "random"}), r"unknown table \[impairment\].*impairments"),
        (dict(capture={"sample_rate": "fast"}), r"sample_rate"),
        (dict(bursts={"ebn0_db": [1, 2, 3]}), r"lists 3 values.*count = 2"),
        (dict(bursts={"cfo_hz": {"unifrom": [0, 1]}}), r"did you mean 'uniform'"),
        (dict(impairments={"rician_k_db": 3.0}), r"doppler_hz"),
        (dict(impairments={"interferer": {"kind": "tones"}}), r"did you mean 'tone'"),
        (dict(capture={"datetime": "2026-04-01 06:30"}), r"RFC 3339"),
        (dict(bursts={"count": 0}), r"count"),
    ],
)
def test_bad_scenario_raises_profile_error(tables, match):
    import copy

    from iqstat.errors import ProfileError
    from iqstat.synth import scenario_from_dict

    d = copy.deepcopy(BASE_SCENARIO)
    for t, body in tables.items():
        d.setdefault(t, {})
        for k, v in body.items():
            if v is None:
                d[t].pop(k, None)
            else:
                d[t][k] = v
    with pytest.raises(ProfileError, match=match):
        scenario_from_dict(d, source="bad.toml", name="bad")


# ----------------------------------------------------------------------------- impairments


@pytest.mark.parametrize("gain_db,phase_deg", [(0.5, 0.0), (0.0, 3.0), (-1.0, -5.0)])
def test_iq_imbalance_image_rejection(gain_db, phase_deg):
    # Image rejection ratio of a receiver with Q-branch gain g and quadrature error φ:
    # IRR = (1 + 2g·cos φ + g²)/(1 − 2g·cos φ + g²) (widely published image-rejection formula,
    # e.g. Razavi, RF Microelectronics, 2nd ed., §4.2 [mem]). A tone on an exact FFT bin
    # has no leakage, so the image bin holds exactly the image.
    from iqstat.synth.impairments import apply_iq_imbalance

    n, k = 4096, 300
    x = np.exp(2j * np.pi * k * np.arange(n) / n)
    spec = np.abs(np.fft.fft(apply_iq_imbalance(x, gain_db, phase_deg))) ** 2
    g, phi = 10 ** (gain_db / 20), math.radians(phase_deg)
    irr = (1 + 2 * g * math.cos(phi) + g * g) / (1 - 2 * g * math.cos(phi) + g * g)
    assert spec[k] / spec[n - k] == pytest.approx(irr, rel=1e-9)


def test_rician_gain_moments_and_doppler():
    # Greenstein, Michelson & Erceg 1999 (METHODS §7): for a Rician amplitude, the power
    # P = |h|² has Var(P)/E[P]² = (1 + 2K)/(1 + K)². For the N-oscillator sum-of-sinusoids
    # scattered part E|g|⁴ = 2 − 1/N [derived: sum of N unit phasors with random phases], which
    # lowers that by b⁴/N, b² = 1/(K+1). Clarke's model: E[g(t)g*(t+τ)] = J0(2π f_d τ)
    # (Zheng & Xiao 2003 [mem]). Ensemble over independent realisations; tolerances are 4
    # standard errors estimated from the same samples.
    from scipy.special import j0

    from iqstat.synth.impairments import N_FADING_OSCILLATORS, rician_gain

    k_db, fd, fs, lag = 4.77, 20.0, 1000.0, 10
    kf = 10 ** (k_db / 10)
    rng = np.random.default_rng(31)
    h = np.array([rician_gain(lag + 1, sample_rate_hz=fs, k_factor=kf, doppler_hz=fd, rng=rng)
                  for _ in range(6000)])  # fmt: skip
    p = np.abs(h[:, 0]) ** 2
    n = p.size
    assert abs(p.mean() - 1) < 4 * p.std() / math.sqrt(n)
    b4 = 1 / (kf + 1) ** 2
    gamma_ref = (1 + 2 * kf) / (1 + kf) ** 2 - b4 / N_FADING_OSCILLATORS
    gamma_hat = p.var() / p.mean() ** 2
    se = ((p - p.mean()) ** 2).std() / math.sqrt(n) / p.mean() ** 2
    assert abs(gamma_hat - gamma_ref) < 4 * se
    a = math.sqrt(kf / (kf + 1))
    g = (h - a) * math.sqrt(kf + 1)  # the scattered part, unit power
    r = g[:, 0] * np.conj(g[:, lag])
    ref = j0(2 * np.pi * fd * lag / fs)
    assert abs(r.real.mean() - ref) < 4 * r.real.std() / math.sqrt(n)


def test_scenario_clipping():
    # Clipping bounds every component at the clip level (ADC saturation, common practice)
    # and the truth counts the clipped components.
    from iqstat.synth import synthesize

    syn = synthesize(make_scenario(capture={"noise_dbfs": -20.0, "lead_in_s": 0.2},
                                   impairments={"clip_dbfs": -20.0}))  # fmt: skip
    x, truth = syn.samples, syn.truth
    level = 10 ** (-20 / 20)
    assert max(np.abs(x.real).max(), np.abs(x.imag).max()) <= level + 1e-15
    n_at = np.count_nonzero(np.abs(x.real) == level) + np.count_nonzero(np.abs(x.imag) == level)
    assert truth.n_clipped == n_at
    # noise-only lead-in: σ per component = 0.1/√2, so a component clips with probability
    # q = 2Φ(−√2) ≈ 15.7 % (normal tail, scipy.stats.norm); binomial spread √(q(1−q)/n).
    gap = x[: truth.bursts[0].start_sample - 1]
    n_gap = 2 * gap.size
    frac = (np.count_nonzero(np.abs(gap.real) == level)
            + np.count_nonzero(np.abs(gap.imag) == level)) / n_gap  # fmt: skip
    q = 2 * stats.norm.sf(math.sqrt(2))
    assert abs(frac - q) < 4 * math.sqrt(q * (1 - q) / n_gap)


def test_scenario_dc_offset_and_tone_interferer():
    # DC offset and a tone interferer measured in the noise-only lead-in.
    from iqstat.synth import synthesize

    sc = make_scenario(
        capture={"lead_in_s": 0.4, "noise_dbfs": -30.0},
        impairments={"dc_offset": [0.01, -0.02],
                     "interferer": {"kind": "tone", "offset_hz": 31250.0, "inr_db": 6.0}},
    )  # fmt: skip
    syn = synthesize(sc)
    x, truth = syn.samples, syn.truth
    assert truth.noise_var == pytest.approx(1e-3, rel=1e-12)
    gap = x[: truth.bursts[0].start_sample - 1]
    # 31.25 kHz at 250 kS/s is a whole cycle per 8 samples: over a multiple of 8 samples the
    # DC and the tone do not leak into each other's average.
    gap = gap[: gap.size // 8 * 8]
    n = np.arange(gap.size)
    tone_power = 10**0.6 * 1e-3
    # mean of x·e^{-j2πfn/fs} = a·e^{jφ} + complex noise of variance σ²/N: |.| has sd √(σ²/2N)
    c = np.mean(gap * np.exp(-2j * np.pi * 31250.0 * n / 250e3))
    sd_amp = math.sqrt(1e-3 / (2 * gap.size))
    assert abs(abs(c) - math.sqrt(tone_power)) < 4 * sd_amp
    dc = np.mean(gap)
    sd_dc = math.sqrt(5e-4 / gap.size)  # σ²/2 per component
    assert abs(dc.real - 0.01) < 4 * sd_dc
    assert abs(dc.imag + 0.02) < 4 * sd_dc


def test_scenario_narrowband_interferer_power_and_band():
    # Interference-to-noise ratio in the noise-only lead-in: mean |x|² = σ²(1 + INR); the
    # interferer's power sits within its band (Welch PSD, scipy.signal).
    from scipy import signal

    from iqstat.synth import synthesize

    sc = make_scenario(
        capture={"lead_in_s": 0.5},
        impairments={"interferer": {"kind": "narrowband", "offset_hz": -40000.0,
                                    "inr_db": 10.0, "bandwidth_hz": 8000.0}},
    )  # fmt: skip
    syn = synthesize(sc)
    x, truth = syn.samples, syn.truth
    gap = x[: truth.bursts[0].start_sample - 1]
    s2 = truth.noise_var
    p = np.mean(np.abs(gap) ** 2)
    # filtered noise is correlated over ~fs/B samples: allow for it in the spread
    n_eff = gap.size * 8000.0 / 250e3
    assert abs(p / (s2 * 11) - 1) < 4 / math.sqrt(n_eff)
    f, psd = signal.welch(gap, fs=250e3, nperseg=4096, return_onesided=False,
                          scaling="density")  # fmt: skip
    df = f[1] - f[0]
    excess = np.clip(psd - s2 / 250e3, 0, None)
    in_band = np.abs(f + 40000.0) <= 5000.0
    assert excess[in_band].sum() / excess.sum() > 0.97
    assert excess.sum() * df == pytest.approx(10 * s2, rel=0.1)


def test_peak_level_sits_below_full_scale():
    # Level rule (project choice, no source): the expected peak component of signal + noise
    # sits at peak_dbfs (default −3 dBFS), so clipping at ±1 is rare and the recording uses
    # the integer range.
    from iqstat.synth import synthesize

    syn = synthesize(make_scenario(bursts={"ebn0_db": 25.0}))
    peak = max(np.abs(syn.samples.real).max(), np.abs(syn.samples.imag).max())
    assert 10 ** (-6 / 20) < peak < 1.0


def test_bursts_spliced_across_chunk_boundaries():
    # The chunked generator must place each burst identically whatever the chunk size: with the
    # noise at −120 dBFS two chunkings differ only by noise (|Δ| ≤ 2·6σ per component).
    from iqstat.synth.generate import _Generator

    sc = make_scenario(capture={"noise_dbfs": -120.0}, bursts={"count": 3, "ebn0_db": 150.0},
                       impairments={"rician_k_db": 3.0, "doppler_hz": 5.0})  # fmt: skip
    gen = _Generator(sc, 8)
    whole = np.concatenate([x for _, x in gen.chunks()])
    small = np.concatenate([x.copy() for _, x in _Generator(sc, 8).chunks(chunk_samples=1777)])
    sigma_c = math.sqrt(gen.noise_var / 2)
    assert np.max(np.abs(whole - small)) < 2 * 6 * sigma_c * math.sqrt(2)
    assert np.max(np.abs(whole)) > 0.1  # the bursts are there


@pytest.mark.parametrize(
    "link,waveform",
    [
        ({"modulation": "2fsk"}, {"bt": 0.5}),
        ({"modulation": "4fsk"}, {}),
        ({"modulation": "ook", "tone_spacing": None}, {"ook_shape": "raised-cosine"}),
    ],
)
def test_truth_reproduces_the_bursts(link, waveform):
    # The documented truth contract: modulate() fed with a burst's truth reproduces it on the
    # capture's sample grid (here with the noise at −140 dBFS, far below the bursts).
    import copy

    from iqstat.synth import scenario_from_dict, synthesize

    d = copy.deepcopy(BASE_SCENARIO)
    for k, v in link.items():
        if v is None:
            d["link"].pop(k)
        else:
            d["link"][k] = v
    d["waveform"] = waveform
    d["capture"]["noise_dbfs"] = -140.0
    d["bursts"] = {"count": 2, "ebn0_db": 150.0, "cfo_hz": {"uniform": [-3000, 3000]}}
    d["impairments"] = {"clock_offset_ppm": {"uniform": [-40, 40]}}
    syn = synthesize(scenario_from_dict(d, source="t.toml", name="t"), seed=12)
    t = syn.truth
    for b in t.bursts:
        s = modulate(
            b.symbols_array(), modulation=t.modulation, sample_rate_hz=t.sample_rate_hz,
            symbol_rate_hz=t.symbol_rate_hz, tone_spacing_hz=t.tone_spacing_hz,
            bt=waveform.get("bt"), ook_shape=waveform.get("ook_shape", "rect"),
            cfo_hz=b.cfo_hz, phase_rad=b.phase_rad, timing_offset_samples=b.timing_offset_samples,
            clock_offset_ppm=b.clock_offset_ppm, amplitude=b.amplitude,
        )  # fmt: skip
        seg = slice(b.start_sample, b.stop_sample)
        np.testing.assert_allclose(syn.samples[seg], s[seg], atol=1e-5)
        p = np.mean(np.abs(s[seg]) ** 2)
        assert p == pytest.approx(b.signal_power, rel=1e-9)


def test_a_burst_too_long_to_make_in_memory_is_refused_with_a_reason():
    from iqstat.synth import scenario_from_dict, synthesize
    from iqstat.synth.generate import MAX_BURST_SAMPLES

    bits = int(MAX_BURST_SAMPLES / (250e3 / 4800.0)) + 10_000  # just over the limit
    doc = {
        "link": {"modulation": "2fsk", "symbol_rate": 4800.0, "tone_spacing": 4800.0},
        "frame": {"payload": "pn9", "payload_bits": bits},
        "capture": {"sample_rate": 250e3, "datatype": "ci16_le", "seed": 1},
        "bursts": {"count": 1, "ebn0_db": 10.0},
    }
    with pytest.raises(ParameterError, match="at most"):
        synthesize(scenario_from_dict(doc))
