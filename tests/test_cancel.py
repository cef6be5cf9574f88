"""Tests of iqstat.cancel: steady lines inside the band measured and subtracted.

References:
- A complex sinusoid A·e^{j(2πf n/fs + φ)} (the model's definition) and the Cramér–Rao bound
  of a tone's frequency in white noise, var f̂ ≥ 6·fs²/((2π)²·SNR·N³) (Kay, Fundamentals of
  Statistical Signal Processing: Estimation Theory, Prentice Hall 1993, §3.11, eq. 3.41,
  from memory): the gap estimate must come within a few of its bound's standard deviations.
- The ci16 read paths against the plain ones (Capture.read is checked against the sigmf
  library's reader in tests/test_formats.py).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from iqstat.bursts import detect_bursts
from iqstat.bursts.results import Burst, BurstDetection, ContinuousLine
from iqstat.cancel import LineCancelledCapture, LineModel, _Track, fit_line_model
from iqstat.capture import Capture
from iqstat.facts import iter_unscaled_chunks
from iqstat.formats.open import open_capture
from iqstat.frontend import NO_CORRECTION
from iqstat.synth import scenario_from_dict, write_synthetic

FS = 250e3


def _detection(noise_var: float, spans, n: int) -> BurstDetection:
    """A detection whose bursts leave the given gaps (only what fit_line_model reads)."""
    bursts, last = [], 0
    for i, (a, b) in enumerate(spans):
        if a > last:
            bursts.append(Burst(i, last, a, -20.0, 10.0, -20.0))
        last = b
    return BurstDetection(
        bursts=tuple(bursts), noise_floor_dbfs=10 * math.log10(noise_var), noise_var=noise_var,
        noise_psd_db_per_hz=10 * math.log10(noise_var / FS), noise_psd_dof=1e4,
        band_hz=(-5000.0, 5000.0), threshold_dbfs=0.0, frame_samples=256, gap_samples=0,
        message="", lines=(), dc_offset=0j, iq=NO_CORRECTION,
    )  # fmt: skip


def test_model_is_the_interpolated_sinusoid():
    knots = np.array([0.0, 1000.0])
    amps = np.array([1.0 + 0.0j, 0.0 + 2.0j])
    model = LineModel([_Track(1234.5, knots, amps)], FS)
    x = model.samples(10_000_000, 50)  # far into a capture: the phase stays exact
    pos = 10_000_000 + np.arange(50)
    ref = (0.0 + 2.0j) * np.exp(2j * np.pi * 1234.5 * pos / FS)
    np.testing.assert_allclose(x, ref, atol=2e-6)
    mid = model.samples(500, 1)[0]
    assert mid == pytest.approx((0.5 + 1.0j) * np.exp(2j * np.pi * 1234.5 * 500 / FS), abs=1e-6)


def test_a_steady_tone_is_measured_to_its_bound_and_cancelled():
    rng = np.random.default_rng(31)
    n, f, amp, sigma2 = 200_000, 1000.3, 0.2, 0.04
    pos = np.arange(n)
    tone = amp * np.exp(1j * (2 * np.pi * f * pos / FS + 0.7))
    noise = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * math.sqrt(sigma2 / 2)
    x = (tone + noise).astype(np.complex64)
    cap = Capture.from_array(x, FS)
    spans = [(0, 20_000), (60_000, 80_000), (120_000, 140_000), (180_000, 200_000)]
    det = _detection(sigma2, spans, n)
    line = ContinuousLine.of(900.0, 1100.0, amp**2, sigma2 / FS)
    model, why = fit_line_model(cap, det, [line], 4800.0)
    assert model is not None, why
    f_hat = model.tracks[0].freq_hz
    # bound over the gap samples alone (4 × 18 976 after the guards), spread over the capture
    # they sit in: much tighter than one gap's; 5 standard deviations of one gap's bound
    snr = amp**2 / sigma2
    sd_one_gap = math.sqrt(6 * FS**2 / ((2 * np.pi) ** 2 * snr * 18_976**3))
    assert abs(f_hat - f) < 5 * sd_one_gap
    clean = LineCancelledCapture(cap, model)
    left = clean.read(0, n) - noise.astype(np.complex64)
    assert np.mean(np.abs(left) ** 2) < 1e-3 * amp**2  # the tone, 30 dB down at least


def test_an_unsteady_line_is_not_cancelled():
    rng = np.random.default_rng(32)
    n, sigma2 = 200_000, 0.04
    pos = np.arange(n)
    # a tone whose amplitude swings by ±50 % at 3 Hz: not a steady line
    amp = 0.2 * (1 + 0.5 * np.sin(2 * np.pi * 3.0 * pos / FS))
    x = amp * np.exp(2j * np.pi * 1000.0 * pos / FS)
    x = (x + (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * 0.1414).astype(np.complex64)
    spans = [(a, a + 15_000) for a in range(0, n, 25_000)]
    det = _detection(sigma2, spans, n)
    line = ContinuousLine.of(900.0, 1100.0, 0.04, sigma2 / FS)
    model, why = fit_line_model(Capture.from_array(x, FS), det, [line], 4800.0)
    assert model is None and "not steady" in why


def test_every_read_path_of_a_ci16_file_sees_the_line_removed(tmp_path):
    doc = {
        "link": {"modulation": "2fsk", "symbol_rate": 4800.0, "tone_spacing": 4800.0},
        "frame": {"preamble": "aaaaaaaa", "sync_word": "2dd4", "payload": "pn9",
                  "payload_bits": 400},
        "capture": {"sample_rate": FS, "datatype": "ci16_le", "peak_dbfs": -3.0, "seed": 4},
        "bursts": {"count": 3, "ebn0_db": 12.0, "cfo_hz": 0.0, "gap_s": 0.05},
        "impairments": {"interferer": {"kind": "tone", "offset_hz": 1000.0, "inr_db": 0.0}},
    }  # fmt: skip
    sc = scenario_from_dict(doc)
    out = write_synthetic(sc, tmp_path)
    cap = open_capture(out.meta_path)
    model = LineModel([_Track(1000.0, np.array([0.0]), np.array([0.05 + 0.02j]))], FS)
    clean = LineCancelledCapture(cap, model)
    n = cap.n_samples
    ref = cap.read(0, n) - model.samples(0, n)
    np.testing.assert_allclose(clean.read(0, n), ref, atol=1e-6)
    got = np.concatenate([x.copy() for _, x in clean.iter_chunks(10_000)])
    np.testing.assert_allclose(got, ref, atol=1e-6)
    scale = cap.datatype.scale
    unscaled = np.concatenate([x.copy() for _, x, _, _ in iter_unscaled_chunks(clean, 10_000)])
    np.testing.assert_allclose(unscaled * scale, ref, atol=1e-5)
    # the recording itself is untouched
    np.testing.assert_allclose(open_capture(out.meta_path).read(0, n), cap.read(0, n))
    # and detection runs on the cleaned capture as on any
    assert isinstance(detect_bursts(clean), BurstDetection)
