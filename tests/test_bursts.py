"""Tests of iqstat.bursts: gamma-law helpers, noise floor, burst detection, noise PSD.

Scenario of the synthetic captures (invented): a 2-FSK telemetry link, 4.8 kBd, tone spacing
4.8 kHz (h = 1), carrier offset +12 kHz, 560-symbol bursts, recorded at 250 kS/s with noise at
−20 dBFS. Truth convention (project): Eb/N0 = P·(fs/bit_rate)/σ², σ² = E|noise|² per sample.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import stats

from iqstat.bursts import (
    Burst,
    BurstDetection,
    detect_bursts,
    measure_frame_powers,
    survey_capture,
)
from iqstat.capture import Capture
from iqstat.errors import IqstatError, MeasurementError, ParameterError
from iqstat.facts import compute_facts
from iqstat.formats.open import open_capture
from iqstat.noise import noise_floor_from_frames, noise_floor_lowest_cluster, threshold_from_floor
from iqstat.synth import modulate

FS_HZ = 250e3
RS_HZ = 4800.0
SPACING_HZ = 4800.0
CFO_HZ = 12e3
N_SYM = 560
NOISE_VAR = 1e-2
SPS = FS_HZ / RS_HZ  # 52.083 samples per symbol (= per bit for 2-FSK)


def _noise(rng: np.random.Generator, n: int, noise_var: float = NOISE_VAR) -> np.ndarray:
    return (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * math.sqrt(noise_var / 2)


def _capture_with_bursts(
    rng, n_samples, bursts, noise_var=NOISE_VAR, rs_hz=RS_HZ, spacing_hz=SPACING_HZ, cfo_hz=CFO_HZ
):
    """Noise everywhere plus 2-FSK bursts of N_SYM symbols; bursts = [(start_sample, ebn0_db)].

    Returns the capture and the true (first, stop) sample of each burst's signal.
    """
    x = _noise(rng, n_samples, noise_var)
    truth = []
    for start, ebn0_db in bursts:
        amp = math.sqrt(10 ** (ebn0_db / 10) * noise_var * rs_hz / FS_HZ)  # P = amp²
        t0 = float(rng.uniform(0, 10))
        s = modulate(
            rng.integers(0, 2, N_SYM),
            modulation="2fsk",
            sample_rate_hz=FS_HZ,
            symbol_rate_hz=rs_hz,
            tone_spacing_hz=spacing_hz,
            cfo_hz=cfo_hz,
            phase_rad=float(rng.uniform(0, 2 * np.pi)),
            timing_offset_samples=t0,
            amplitude=amp,
        )
        x[start : start + s.size] += s
        truth.append((start + math.ceil(t0), start + s.size))
    return Capture.from_array(x.astype(np.complex64), FS_HZ), truth


def _edge_std_samples(band_snr: float, band_hz: tuple[float, float]) -> float:
    """Expected spread of a change-point edge estimate on in-band power, in samples.

    For a step in the mean of independent samples with shift δ (in noise standard deviations)
    the ML change point has E(τ̂−τ)² ≈ 26/δ⁴ (Hinkley, Biometrika 57(1), 1970 [mem]). For
    exponential powers the per-sample information of the step is the KL divergence
    D = s − ln(1 + s) (s the in-band SNR), δ² ≈ 2D. The band-limited samples are correlated
    over fs/B samples, so one independent sample spans fs/B samples. [derived]
    """
    d = band_snr - math.log1p(band_snr)
    return math.sqrt(26.0) / (2.0 * d) * FS_HZ / (band_hz[1] - band_hz[0])


# ------------------------------------------------------------------------------------------
# Gamma-law helpers
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("n, factor", [(4, 0.918), (16, 0.979), (64, 0.9948)])
def test_median_factor_matches_methods_table(n, factor):
    # METHODS §5: median of an n-sample mean power is factor·σ² (Gamma(n, σ²/n)).
    assert stats.gamma.median(n, scale=1.0 / n) == pytest.approx(factor, abs=6e-4)
    # The estimator inverts exactly that factor: frames all at the median give σ² = 1.
    frames = np.full(11, factor)
    assert noise_floor_from_frames(frames, n, quantile=0.5) == pytest.approx(1.0, abs=1e-3)


@pytest.mark.parametrize("n, expected", [(1, 13.8155), (16, 2.6635), (64, 1.7102), (256, 1.3257)])
def test_threshold_matches_methods_table_and_scipy(n, expected):
    # METHODS §5 [computed]: gamma.isf(1e-6, n, scale=1/n) × noise power.
    floor = 3.7e-4
    t = threshold_from_floor(floor, n, 1e-6)
    assert t / floor == pytest.approx(expected, rel=1e-4)
    assert t == pytest.approx(floor * stats.gamma.isf(1e-6, n, scale=1.0 / n), rel=1e-12)


def test_threshold_single_sample_is_exponential_tail():
    # One complex Gaussian sample's power is Exp(σ²): P(p > t) = exp(−t/σ²) (textbook fact).
    assert threshold_from_floor(2.0, 1, 1e-3) == pytest.approx(2.0 * math.log(1e3), rel=1e-10)


@pytest.mark.parametrize("frame_len", [4, 16, 64])
def test_floor_on_pure_noise_within_quantile_spread(frame_len):
    rng = np.random.default_rng(101 + frame_len)
    n_frames, q, var = 20000, 0.1, 0.37
    x = _noise(rng, n_frames * frame_len, var)
    frames = np.mean(np.abs(x.reshape(n_frames, frame_len)) ** 2, axis=1)
    est = noise_floor_from_frames(frames, frame_len, quantile=q)
    # Asymptotic std of a sample quantile: sqrt(q(1−q)/n)/f(x_q) (e.g. Cramér 1946, §28.5
    # [mem]), f the Gamma(L, 1/L) density at its q-quantile x_q; relative to x_q.
    g = stats.gamma(frame_len, scale=1.0 / frame_len)
    xq = g.ppf(q)
    rel_std = math.sqrt(q * (1 - q) / n_frames) / (g.pdf(xq) * xq)
    assert abs(est / var - 1) < 4 * rel_std


def test_helpers_reject_bad_input():
    with pytest.raises(ParameterError, match="frame_power"):
        noise_floor_from_frames([], 16)
    with pytest.raises(ParameterError, match="quantile"):
        noise_floor_from_frames([1.0, 2.0], 16, quantile=1.5)
    with pytest.raises(ParameterError, match="frame_len"):
        noise_floor_from_frames([1.0, 2.0], 0)
    with pytest.raises(ParameterError, match="pfa"):
        threshold_from_floor(1.0, 16, 0.0)
    with pytest.raises(ParameterError, match="n_avg"):
        threshold_from_floor(1.0, -1, 1e-6)


# ------------------------------------------------------------------------------------------
# Frame powers
# ------------------------------------------------------------------------------------------
@pytest.mark.parametrize("band_hz", [None, (5e3, 19e3)])
def test_frame_powers_follow_gamma_law_on_noise(band_hz):
    # Rectangular-window DFT bins of white complex Gaussian noise are independent with
    # E|X_k|² = Lσ² (Kay, Detection Theory, 1998, §2.2 [mem]): the in-band frame power is
    # Gamma(n_bins, σ²/L). Checked with a Kolmogorov–Smirnov test against scipy.stats.gamma.
    rng = np.random.default_rng(7)
    cap = Capture.from_array(_noise(rng, 256 * 4000).astype(np.complex64), FS_HZ)
    fp = measure_frame_powers(cap, frame_samples=256, band_hz=band_hz)
    if band_hz is None:
        assert fp.band_dof == 256
    else:
        assert fp.band_dof == 14  # bins at k·976.6 Hz, k = 6..19, inside 5..19 kHz
        assert fp.band_hz == pytest.approx((5.37109375e3, 19.04296875e3))
    mean = NOISE_VAR * fp.band_dof / 256
    res = stats.kstest(fp.band / mean, stats.gamma(fp.band_dof, scale=1.0 / fp.band_dof).cdf)
    assert res.pvalue > 1e-3


@pytest.mark.parametrize("band_hz", [(5e3, 19e3), (-100e3, 100e3)])
def test_frame_powers_equal_direct_fft(band_hz):
    # Narrow band: matrix-product path; wide band: FFT path. Reference: numpy.fft per frame.
    rng = np.random.default_rng(8)
    x = _noise(rng, 256 * 300 + 77).astype(np.complex64)
    fp = measure_frame_powers(
        Capture.from_array(x, FS_HZ), frame_samples=256, band_hz=band_hz, chunk_samples=10_000
    )
    frames = x[: 256 * 300].astype(np.complex128).reshape(300, 256)
    X = np.fft.fft(frames, axis=1)
    f = np.fft.fftfreq(256, 1 / FS_HZ)
    sel = (f >= band_hz[0]) & (f <= band_hz[1])
    ref = np.sum(np.abs(X[:, sel]) ** 2, axis=1) / 256**2
    np.testing.assert_allclose(fp.band, ref, rtol=2e-5)
    np.testing.assert_allclose(fp.full, np.mean(np.abs(frames) ** 2, axis=1), rtol=2e-5)


@pytest.mark.parametrize("band_hz", [(5e3, 19e3), (-5e3, 9e3), (-100e3, 100e3), None])
def test_frame_sums_are_bin_zero(band_hz):
    # Bin 0 of each frame's DFT (its sum) comes from the matrix product (band without or with
    # bin 0), the FFT (wide band) or a plain sum (full band). Reference: numpy sums per frame.
    rng = np.random.default_rng(9)
    x = (_noise(rng, 256 * 300 + 77) + (0.03 - 0.02j)).astype(np.complex64)
    fp = measure_frame_powers(
        Capture.from_array(x, FS_HZ), frame_samples=256, band_hz=band_hz, chunk_samples=10_000
    )
    ref = x[: 256 * 300].astype(np.complex128).reshape(300, 256).sum(axis=1)
    # float32 products of 256 terms: relative to the frame's noise sum, ~1e-6
    np.testing.assert_allclose(fp.sums, ref, atol=2e-5 * math.sqrt(256 * NOISE_VAR))
    assert fp.dc_in_band == (band_hz is None or band_hz[0] < 0 < band_hz[1])


def test_dc_offset_above_the_in_band_noise_does_not_hide_the_gaps():
    # A receiver DC offset is a stationary line at 0 Hz: in the signal band it lifts every
    # frame alike. 4.4 dB above the in-band noise, it once read as a single capture-long
    # burst; now the gaps give it (a mean, standard error sqrt(σ²/2/n) per component) and
    # the noise figures and edges are those without it.
    rng = np.random.default_rng(12)
    starts = [5_000 + k * 40_000 for k in range(6)]
    cap, truth = _capture_with_bursts(rng, 250_000, [(a, 14.0) for a in starts])
    dc = 0.04 + 0.03j  # |dc|² = 2.5e-3 ≈ 2.5x the noise in a 25-bin band (σ²·22/256)
    x = cap.read(0, cap.n_samples) + np.complex64(dc)
    det = detect_bursts(
        Capture.from_array(x, FS_HZ), band_hz=(CFO_HZ - 15e3, CFO_HZ + 9e3), min_burst_s=0.01
    )
    assert len(det.bursts) == len(truth)
    se = math.sqrt(NOISE_VAR / 2 / det.gap_samples)
    assert abs(det.dc_offset - dc) < 5 * math.sqrt(2) * se
    assert det.noise_var == pytest.approx(NOISE_VAR, rel=5 / math.sqrt(det.gap_samples))
    n0 = 10 ** (det.noise_psd_db_per_hz / 10)
    assert n0 == pytest.approx(NOISE_VAR / FS_HZ, rel=5 / math.sqrt(det.noise_psd_dof))
    for b, (t0, t1) in zip(det.bursts, truth, strict=True):
        assert abs(b.start_sample - t0) < 30 and abs(b.stop_sample - t1) < 30


# ------------------------------------------------------------------------------------------
# Detection
# ------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def three_bursts():
    rng = np.random.default_rng(20261202)
    cap, truth = _capture_with_bursts(rng, 250_000, [(20000, 4), (90000, 8), (160000, 20)])
    return cap, truth, detect_bursts(cap)


def test_three_bursts_found_with_edges(three_bursts):
    cap, truth, det = three_bursts
    assert len(det.bursts) == 3
    lo, hi = det.band_hz
    assert lo < CFO_HZ - SPACING_HZ / 2 and hi > CFO_HZ + SPACING_HZ / 2  # both tones in band
    assert hi - lo < 30e3  # and band-limited (Carson bandwidth ≈ 2·(2.4 + 4.8) kHz)
    for b, (t_start, t_stop), ebn0_db in zip(det.bursts, truth, (4, 8, 20), strict=True):
        # In-band SNR from the truth: P/(σ²·B/fs).
        snr = 10 ** (ebn0_db / 10) * RS_HZ / FS_HZ / ((hi - lo) / FS_HZ)
        # Tolerance: 6 standard deviations of the change-point estimate, at least 1 symbol.
        # 20 dB → 1 symbol; 8 dB → ~5 symbols; 4 dB → ~23 symbols (energy detection cannot
        # do better at an in-band SNR near 0 dB; the timing stage refines from the preamble).
        tol = max(SPS, 6 * _edge_std_samples(snr, det.band_hz))
        assert abs(b.start_sample - t_start) <= tol
        assert abs(b.stop_sample - t_stop) <= tol
        # The in-band SNR estimate: (P_band − N)/N with N from ≥ 100k gap samples; its spread
        # over ~110 frames of 15 bins is ≈ (1+s)/sqrt(110·15) relative: 0.5 dB is > 4σ here.
        assert b.band_snr_db == pytest.approx(10 * math.log10(snr), abs=0.5 + 0.25 * (ebn0_db < 5))
    # Full-band power of the strong burst: P + σ², within its spread (29k samples → 0.6 %).
    p_true = 10 ** (20 / 10) * NOISE_VAR * RS_HZ / FS_HZ + NOISE_VAR
    assert det.bursts[2].power_dbfs == pytest.approx(10 * math.log10(p_true), abs=0.1)
    assert det.bursts[2].peak_dbfs >= det.bursts[2].power_dbfs


@pytest.mark.parametrize("ebn0_db", [4, 8])
def test_edge_spread_matches_change_point_theory(ebn0_db):
    # RMS edge error over 12 captures (24 edges) stays within 2× the predicted std (Hinkley
    # 26/δ⁴ law, see _edge_std_samples); 2× allows for the rms estimate's spread.
    errors, std = [], []
    for seed in range(12):
        rng = np.random.default_rng(900 + seed)
        cap, truth = _capture_with_bursts(rng, 80_000, [(25_000, ebn0_db)])
        det = detect_bursts(cap)
        assert len(det.bursts) == 1
        b = det.bursts[0]
        errors += [b.start_sample - truth[0][0], b.stop_sample - truth[0][1]]
        lo, hi = det.band_hz
        snr = 10 ** (ebn0_db / 10) * RS_HZ / FS_HZ / ((hi - lo) / FS_HZ)
        std.append(_edge_std_samples(snr, det.band_hz))
    assert math.sqrt(np.mean(np.square(errors))) < 2 * np.mean(std)


def test_no_false_alarms_on_ten_seconds_of_noise():
    # 10 s at 250 kS/s = 9765 frames; 4 smoothing lengths × 9765 × 1e-6 ≈ 0.04 expected
    # false starts (overlapping windows make it an upper bound), so zero is expected.
    rng = np.random.default_rng(31)
    cap = Capture.from_array(_noise(rng, 2_500_000).astype(np.complex64), FS_HZ)
    det = detect_bursts(cap, pfa=1e-6)
    assert det.bursts == ()
    assert det.message.startswith("no bursts above the floor of ")
    assert det.message.endswith(f"{det.noise_floor_dbfs:.1f} dBFS")
    assert det.noise_floor_dbfs == pytest.approx(-20.0, abs=0.01)  # 2.5 M samples: 0.0027 dB
    assert det.gap_samples == 9765 * 256


def test_false_alarm_rate_is_calibrated_at_high_pfa():
    # The one-frame test must fire at about pfa: at pfa 1e-2, 9765 frames give ~98 starts at
    # the finest length. Each start becomes a short detection; with min_burst 0 and no
    # merging, the count is within a loose factor of n·pfa (runs from the longer lengths
    # and hysteresis join some). A wrong gamma shape (e.g. bins assumed independent when
    # they are not) would miss this by orders of magnitude.
    rng = np.random.default_rng(32)
    cap = Capture.from_array(_noise(rng, 2_500_000).astype(np.complex64), FS_HZ)
    det = detect_bursts(cap, pfa=1e-2, min_burst_s=0.0, merge_gap_s=0.0, band_hz=(5e3, 19e3))
    assert 0.5 * 98 < len(det.bursts) < 4 * 98


@pytest.mark.parametrize("ebn0_db", [12, 20])
def test_close_bursts_split_unless_merge_gap_covers_them(ebn0_db):
    rng = np.random.default_rng(41)
    n_burst = math.ceil(N_SYM * SPS)
    gap = 500  # 2 ms at 250 kS/s
    cap, truth = _capture_with_bursts(
        rng, 150_000, [(20_000, ebn0_db), (20_000 + n_burst + gap, ebn0_db)]
    )
    det = detect_bursts(cap, merge_gap_s=1e-3)
    assert len(det.bursts) == 2
    assert det.bursts[0].stop_sample <= truth[1][0]
    merged = detect_bursts(cap, merge_gap_s=5e-3)
    assert len(merged.bursts) == 1
    assert merged.bursts[0].n_samples > 2 * n_burst


@pytest.mark.parametrize("seed", range(6))
def test_single_weak_burst_not_split(seed):
    rng = np.random.default_rng(500 + seed)
    cap, truth = _capture_with_bursts(rng, 100_000, [(30_000, 4)])
    det = detect_bursts(cap)
    assert len(det.bursts) == 1
    b = det.bursts[0]
    assert b.start_sample < truth[0][0] + 0.2 * (truth[0][1] - truth[0][0])
    assert b.stop_sample > truth[0][1] - 0.2 * (truth[0][1] - truth[0][0])


def test_floor_holds_when_bursts_fill_seventy_percent():
    # METHODS §10 trap: a median-over-time floor lands inside the bursts.
    rng = np.random.default_rng(61)
    n_burst = math.ceil(N_SYM * SPS)  # 29167 samples
    starts = [2_000 + i * (n_burst + 2_500) for i in range(6)]  # 6 bursts ≈ 70 % of 250k
    cap, truth = _capture_with_bursts(rng, 250_000, [(s, 12) for s in starts])
    filled = sum(b - a for a, b in truth) / cap.n_samples
    assert 0.68 < filled < 0.72
    det = detect_bursts(cap)
    assert len(det.bursts) == 6
    # Full-band σ² from the gaps: mean of gap_samples exponential powers, rel. std 1/sqrt(n).
    assert abs(det.noise_var / NOISE_VAR - 1) < 4 / math.sqrt(det.gap_samples)
    # The trap itself: the median-based floor of the in-band power is far off.
    fp = measure_frame_powers(cap, frame_samples=256, band_hz=det.band_hz)
    n_band = NOISE_VAR * fp.band_dof / 256
    assert noise_floor_from_frames(fp.band, fp.band_dof, quantile=0.5) > 2 * n_band


@pytest.mark.parametrize("band_hz", [None, (5e3, 19e3)])
def test_noise_psd_equals_white_noise_density(band_hz):
    # METHODS §9: white noise of variance σ² has N0 = σ²/fs (two-sided complex PSD).
    rng = np.random.default_rng(71)
    cap = Capture.from_array(_noise(rng, 500_000).astype(np.complex64), FS_HZ)
    det = detect_bursts(cap, band_hz=band_hz)
    # Median over K bins of 1024-frame periodogram means: rel. std ≈ 1.2533·sqrt(2/(n·K))
    # (median of normal samples, Hann neighbours correlated: K/2 independent) [derived].
    k_bins = 14 if band_hz is not None else 200
    rel = 1.2533 * math.sqrt(2 / (1024 * k_bins))
    assert det.noise_psd_db_per_hz == pytest.approx(
        10 * math.log10(NOISE_VAR / FS_HZ), abs=4 * 4.343 * rel
    )


def test_noise_psd_from_gaps_between_bursts(three_bursts):
    _, _, det = three_bursts
    n_frames = min(1024, det.gap_samples // 256)
    rel = 1.2533 * math.sqrt(2 / (n_frames * 12))
    assert det.noise_psd_db_per_hz == pytest.approx(
        10 * math.log10(NOISE_VAR / FS_HZ), abs=4 * 4.343 * rel
    )
    assert det.noise_var == pytest.approx(NOISE_VAR, rel=4 / math.sqrt(det.gap_samples))


def test_chunk_size_invariance():
    rng = np.random.default_rng(81)
    # Bursts straddling the 65536-sample chunk edges at 65536 and 131072.
    cap, _ = _capture_with_bursts(rng, 300_000, [(50_000, 10), (120_000, 6), (200_000, 20)])
    ref = detect_bursts(cap, chunk_samples=1 << 20)
    assert len(ref.bursts) == 3
    for chunk in (65536, 100_003):  # 100 003: not a multiple of the frame length
        det = detect_bursts(cap, chunk_samples=chunk)
        assert [(b.start_sample, b.stop_sample) for b in det.bursts] == [
            (b.start_sample, b.stop_sample) for b in ref.bursts
        ]
        assert det.noise_var == pytest.approx(ref.noise_var, rel=1e-6)
        assert det.band_hz == ref.band_hz


# ------------------------------------------------------------------------------------------
# Results and errors
# ------------------------------------------------------------------------------------------
def test_results_serialise(three_bursts):
    _, _, det = three_bursts
    assert isinstance(det, BurstDetection) and isinstance(det.bursts[0], Burst)
    d = json.loads(json.dumps(det.to_dict()))
    assert len(d["bursts"]) == 3
    assert d["bursts"][0]["n_samples"] == det.bursts[0].n_samples
    assert [b["index"] for b in d["bursts"]] == [0, 1, 2]
    assert d["frame_samples"] == 256


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"pfa": 0.0}, "pfa"),
        ({"pfa": 0.5}, "pfa"),
        ({"frame_samples": 10}, "frame_samples"),
        ({"band_hz": (19e3, 5e3)}, "band_hz"),
        ({"band_hz": (200e3, 300e3)}, "band_hz"),
        ({"band_hz": "wide"}, "band_hz"),
        ({"min_burst_s": -1.0}, "min_burst_s"),
        ({"merge_gap_s": float("nan")}, "merge_gap_s"),
        ({"chunk_samples": 0}, "chunk_samples"),
    ],
)
def test_detect_rejects_bad_parameters(kwargs, match):
    cap = Capture.from_array(np.zeros(10_000, np.complex64), FS_HZ)
    with pytest.raises(ParameterError, match=match):
        detect_bursts(cap, **kwargs)


def test_too_short_capture_is_a_measurement_error():
    cap = Capture.from_array(np.zeros(1000, np.complex64), FS_HZ)
    with pytest.raises(MeasurementError, match="too short to find bursts"):
        detect_bursts(cap)
    assert issubclass(MeasurementError, IqstatError)


def test_interval_bisection_equals_the_scan():
    # The grouping finds the detections overlapping [a, b) by bisection; it must return what
    # the plain scan (y > a and x < b) returns, in order, for runs that overlap each other
    # (extended by m − 1 frames) and, through the fallback, for ends that do not increase.
    from iqstat.bursts.frame_detection import _Intervals

    rng = np.random.default_rng(31)
    starts = np.sort(rng.choice(5000, 300, replace=False))
    runs = [(int(s), int(s) + 40) for s in starts]  # one length: starts and ends increase
    widths = rng.integers(1, 90, 300)
    odd = [(int(s), int(s) + int(w)) for s, w in zip(starts, widths, strict=True)]
    for ivs in (runs, odd):
        iv = _Intervals(ivs)
        for a, b in rng.integers(-50, 5100, (400, 2)):
            a, b = int(min(a, b)), int(max(a, b))
            assert iv.overlapping(a, b) == [(x, y) for x, y in sorted(ivs) if y > a and x < b]


def test_lowest_cluster_floor_with_bursts_filling_most_frames():
    # The Gamma law of an L-bin mean of exponential powers (METHODS §5): frames of pure noise
    # (shape 14, mean 1) in 8 % of the capture, the rest at in-band SNR 1 — a 10 % quantile
    # lands in the bursts; the truncated-Gamma fixed point finds the noise mean. (Much weaker
    # bursts blur into the noise in time: detect_bursts then falls back on the spectrum.)
    rng = np.random.default_rng(41)
    dof = 14.0
    n = 4000
    level = np.where(np.arange(n) % 250 < 20, 1.0, 2.0)  # gaps of 20 frames every 250
    p = rng.gamma(dof, level / dof)
    assert noise_floor_lowest_cluster(p, dof) == pytest.approx(1.0, abs=0.03)
    assert noise_floor_from_frames(p, dof, 0.1) > 1.1  # the quantile estimator fails here


# ------------------------------------------------------------------------------------------
# One pass for facts and detection; batched edge refinement
# ------------------------------------------------------------------------------------------
def _write_ci16(path, x: np.ndarray) -> None:
    comps = np.empty(2 * x.size)
    comps[0::2], comps[1::2] = x.real, x.imag
    np.clip(np.rint(comps * 32768), -32768, 32767).astype("<i2").tofile(path)


@pytest.mark.parametrize("stored", ["array", "ci16"])
def test_survey_capture_equals_facts_and_detection_separately(tmp_path, stored):
    # The one streaming pass must give exactly what the two separate passes give (same
    # chunks, same arithmetic): project requirement, no external reference needed for
    # equality. Chunks of 100 003 samples are not a multiple of any frame length.
    rng = np.random.default_rng(97)
    cap, _ = _capture_with_bursts(rng, 400_000, [(30_000, 6), (150_000, 15), (300_000, 25)])
    if stored == "ci16":
        _write_ci16(tmp_path / "s.cs16", cap.read())
        cap = open_capture(tmp_path / "s.cs16", datatype="ci16_le", sample_rate_hz=FS_HZ)
    for chunk in (1 << 20, 100_003):
        facts, det = survey_capture(cap, chunk_samples=chunk, expected_burst_s=N_SYM / RS_HZ)
        assert len(det.bursts) == 3
        assert facts.to_dict() == compute_facts(cap, chunk_samples=chunk).to_dict()
        assert (
            det.to_dict()
            == detect_bursts(cap, chunk_samples=chunk, expected_burst_s=N_SYM / RS_HZ).to_dict()
        )


def test_survey_capture_rejects_bad_parameters():
    cap = Capture.from_array(np.zeros(10_000, np.complex64), FS_HZ)
    with pytest.raises(ParameterError, match="chunk_samples"):
        survey_capture(cap, chunk_samples="many")
    with pytest.raises(ParameterError, match="capture must be"):
        survey_capture(np.zeros(10))


def test_batched_refinement_equals_one_group_at_a_time():
    # Edges refined for all groups in one batch must equal those refined one group at a
    # time: bursts of different lengths and SNRs, one at the very start of the capture, one
    # running into its end, and a degenerate group on noise alone (no step: its coarse
    # frame extent is kept) in the middle, which must not disturb the others.
    from iqstat.bursts.edges import _refine_many
    from iqstat.bursts.frame_detection import _Group

    rng = np.random.default_rng(59)
    n = 600_000
    x = _noise(rng, n)
    spans = [(0, 120, 25), (40_000, 560, 4), (150_000, 200, 12), (400_000, 800, 8)]
    for start, n_sym, ebn0_db in spans:
        amp = math.sqrt(10 ** (ebn0_db / 10) * NOISE_VAR * RS_HZ / FS_HZ)
        s = modulate(
            rng.integers(0, 2, n_sym),
            modulation="2fsk",
            sample_rate_hz=FS_HZ,
            symbol_rate_hz=RS_HZ,
            tone_spacing_hz=SPACING_HZ,
            cfo_hz=CFO_HZ,
            amplitude=amp,
        )
        x[start : start + s.size] += s
    amp = math.sqrt(10 ** (15 / 10) * NOISE_VAR * RS_HZ / FS_HZ)
    tail = modulate(
        rng.integers(0, 2, 400),
        modulation="2fsk",
        sample_rate_hz=FS_HZ,
        symbol_rate_hz=RS_HZ,
        tone_spacing_hz=SPACING_HZ,
        cfo_hz=CFO_HZ,
        amplitude=amp,
    )
    x[n - 5_000 :] += tail[:5_000]  # cut off by the end of the capture
    L = 256
    band = (CFO_HZ - 8e3, CFO_HZ + 8e3)
    cap = Capture.from_array(x.astype(np.complex64), FS_HZ)
    fp = measure_frame_powers(cap, frame_samples=L, band_hz=band)
    p = fp.band.astype(np.float64)
    floor = noise_floor_lowest_cluster(p, fp.band_dof)
    n_frames = p.size

    def group(a: int, b: int) -> _Group:
        return _Group(a, b, max(a - 3, 0), a + 3, b - 3, min(b + 3, p.size))

    sizes = [(s, s + int(n_sym * SPS)) for s, n_sym, _ in spans]
    groups = [group(a // L, -(-b // L)) for a, b in sizes]
    groups.insert(2, group(1000, 1040))  # noise only
    groups.append(
        _Group(n_frames - 20, n_frames, n_frames - 23, n_frames - 17, n_frames - 2, n_frames)
    )
    for band_hz in (fp.band_hz, None):
        e_all: dict = {}
        together = _refine_many(cap, groups, L, band_hz, p, floor, fp.band_dof, e_all)
        e_one: dict = {}
        alone = [
            _refine_many(cap, [g], L, band_hz, p, floor, fp.band_dof, e_one)[0] for g in groups
        ]
        assert together == alone
        assert e_all.keys() == e_one.keys()
        for k, v in e_all.items():
            assert v == pytest.approx(e_one[k], rel=1e-12)
        # The noise-only group keeps its coarse extent; the real bursts' edges are found
        # within a few symbols of the truth (spread: test_three_bursts_found_with_edges).
        assert together[2] == (1000 * L, 1040 * L)
        for (a, b), (t0, t1) in zip(together[:2] + together[3:5], sizes, strict=True):
            assert abs(a - t0) < 20 * SPS and abs(b - t1) < 20 * SPS
        assert together[-1][1] == n


@pytest.mark.parametrize("seed", [3, 8])
def test_vectorised_grouping_equals_the_general_code(seed, monkeypatch):
    # Clusters with at most one interval per smoothing length are grouped in one vectorised
    # pass; it must give the general recursion's groups exactly (same edges and windows), on
    # frame powers with strong, weak and split bursts, near the ends, and in a mix with
    # clusters the general code handles (several intervals of one length).
    import iqstat.bursts.frame_detection as bursts_mod

    rng = np.random.default_rng(seed)
    n_frames, dof = 40_000, 12.0
    level = np.ones(n_frames)
    pos = 0
    while pos < n_frames:
        pos += int(rng.integers(30, 400))
        width = int(rng.integers(2, 200))
        level[pos : pos + width] += float(10 ** rng.uniform(-0.8, 1.5))
        pos += width
    level[:5] += 3.0  # a burst at the very start
    p = rng.gamma(dof, level / dof)  # Gamma(dof) frame powers of mean `level`
    floor = noise_floor_lowest_cluster(p, dof)
    chained = []
    inner = bursts_mod._chain_groups
    monkeypatch.setattr(
        bursts_mod, "_chain_groups", lambda x, *a: (chained.append(x.shape[0]), inner(x, *a))[1]
    )
    fast = bursts_mod._detect_groups(p, dof, floor, 1e-4)
    general = bursts_mod._detect_groups(p, dof, floor, 1e-4, fast=False)
    assert fast == general
    assert 0 < chained[0] < len(fast)  # both paths ran


def test_a_continuous_carrier_does_not_take_the_band_and_is_reported():
    # A spur or an adjacent carrier is present all the time, the bursts come and go: the
    # survey picks the band of what comes and goes even when the carrier is far stronger
    # (here 10x the full-band noise power), and lists the carrier as a continuous line.
    # Its rectangular-window leakage into the band's frame bins (Dirichlet kernel) is in
    # every frame, gaps included: the noise floor must account for it, or every frame
    # would pass the threshold.
    rng = np.random.default_rng(13)
    starts = [5_000 + k * 40_000 for k in range(6)]
    cap, truth = _capture_with_bursts(rng, 250_000, [(a, 12.0) for a in starts])
    n = np.arange(cap.n_samples)
    f_cw, p_cw = -40_300.0, 10 * NOISE_VAR
    x = cap.read(0, cap.n_samples) + np.sqrt(p_cw) * np.exp(2j * np.pi * f_cw / FS_HZ * n)
    det = detect_bursts(Capture.from_array(x.astype(np.complex64), FS_HZ), min_burst_s=0.01)
    lo, hi = det.band_hz
    assert lo < CFO_HZ < hi and hi - lo < 40e3
    assert len(det.bursts) == len(truth)
    assert len(det.lines) == 1
    line = det.lines[0]
    # its bins: the Hann main lobe and the sidelobes still above the noise (34 dB per bin)
    assert line.f_lo_hz < f_cw < line.f_hi_hz and line.f_hi_hz - line.f_lo_hz < 10e3
    # power from the survey's Hann bins: within 0.5 dB (common practice, no source)
    assert line.power_dbfs == pytest.approx(10 * math.log10(p_cw), abs=0.5)
    # C/N0 of the line: P/N0 with N0 = σ²/fs
    assert line.cn0_dbhz == pytest.approx(10 * math.log10(p_cw * FS_HZ / NOISE_VAR), abs=0.5)
    # beside the band it is cut out of the samples measured (iqstat.excise): not interference
    assert det.interfering_lines(RS_HZ) == ()
    # the leakage through the frames' rectangular window is taken off the gap powers: the
    # in-band noise PSD and the full-band noise are those of the noise (5 standard errors)
    n0 = 10 ** (det.noise_psd_db_per_hz / 10)
    assert n0 == pytest.approx(NOISE_VAR / FS_HZ, rel=5 / math.sqrt(det.noise_psd_dof))
    assert det.noise_var == pytest.approx(NOISE_VAR, rel=0.05)
    # edges: the carrier × noise term widens the frame powers' spread (an effective Gamma
    # shape of a third here), so within 3 symbols rather than the clean case's few samples
    for b, (t0, t1) in zip(det.bursts, truth, strict=True):
        assert abs(b.start_sample - t0) < 160 and abs(b.stop_sample - t1) < 160


def test_a_continuous_carrier_inside_the_band_is_interference():
    rng = np.random.default_rng(15)
    starts = [5_000 + k * 40_000 for k in range(6)]
    cap, _ = _capture_with_bursts(rng, 250_000, [(a, 14.0) for a in starts])
    n = np.arange(cap.n_samples)
    f_cw, p_cw = CFO_HZ + 600.0, 0.05 * NOISE_VAR  # C/N0 ~ 51 dB-Hz, (C/N0)·T ~ 26
    x = cap.read(0, cap.n_samples) + np.sqrt(p_cw) * np.exp(2j * np.pi * f_cw / FS_HZ * n)
    det = detect_bursts(Capture.from_array(x.astype(np.complex64), FS_HZ), min_burst_s=0.01)
    assert len(det.lines) == 1 and det.lines[0].f_lo_hz < f_cw < det.lines[0].f_hi_hz
    assert det.interfering_lines(RS_HZ) == det.lines
    # (C/N0)·T·... at a thousand times the symbol rate: below a tenth of the noise
    assert det.interfering_lines(RS_HZ * 1000) == ()


def test_no_continuous_lines_in_plain_noise_and_bursts():
    rng = np.random.default_rng(14)
    cap, _ = _capture_with_bursts(rng, 250_000, [(5_000 + k * 40_000, 12.0) for k in range(6)])
    assert detect_bursts(cap, min_burst_s=0.01).lines == ()


def test_a_burst_faded_in_its_middle_is_one_burst_when_its_length_is_known():
    # A fade (here: 60 symbols of the burst at zero amplitude) splits the detection; with
    # the frame length known, the pieces span one expected burst and are joined. Two real
    # bursts of that length, even close, span two lengths and stay apart.
    rng = np.random.default_rng(16)
    cap, truth = _capture_with_bursts(rng, 200_000, [(5_000, 14.0), (35_000, 14.0)])
    x = cap.read(0, cap.n_samples)
    t0, t1 = truth[0]
    mid = (t0 + t1) // 2
    x[mid - 1500 : mid + 1500] = _noise(rng, 3000).astype(np.complex64)  # signal faded out
    faded = Capture.from_array(x, FS_HZ)
    expected = N_SYM / RS_HZ
    split = detect_bursts(faded, min_burst_s=0.005)
    assert len(split.bursts) == 3  # the fade cuts the first burst in two
    det = detect_bursts(faded, min_burst_s=0.005, expected_burst_s=expected)
    assert len(det.bursts) == 2
    first, second = det.bursts
    assert abs(first.start_sample - t0) < 30 and abs(first.stop_sample - t1) < 30
    assert abs(second.start_sample - truth[1][0]) < 30


def test_fast_links_with_short_gaps_keep_noise_frames():
    # 38.4 kBd bursts of 560 symbols last 14.6 ms, their gaps 3 ms (754 samples, a fifth of a
    # burst), and the capture ends with its last burst: with the default 1 ms frames (256
    # samples) no frame of a gap survives the one-frame guards and the noise PSD is lost (as
    # the first check shows). With the burst length known, frames are at most 1/16 of a burst.
    rng = np.random.default_rng(17)
    rs = 38_400.0
    starts = [500 + k * 4_400 for k in range(8)]
    cap, _ = _capture_with_bursts(
        rng, 35_400, [(a, 12.0) for a in starts], rs_hz=rs, spacing_hz=rs, cfo_hz=2e3
    )
    coarse = detect_bursts(cap, frame_samples=256, expected_burst_s=N_SYM / rs)
    assert coarse.noise_psd_dof == 0
    det = detect_bursts(cap, expected_burst_s=N_SYM / rs)
    assert det.frame_samples == 128  # 3 646 samples / 16 = 228 -> 128
    assert len(det.bursts) == len(starts)
    n0 = 10 ** (det.noise_psd_db_per_hz / 10)
    assert det.noise_psd_dof > 0
    assert n0 == pytest.approx(NOISE_VAR / FS_HZ, rel=5 / math.sqrt(det.noise_psd_dof))
