"""Tests of iqstat.levels: receiver gain steps found and undone before measuring.

References: the synthetic truth (iqstat synth; Eb/N0 = P·(fs/Rb)/σ², docs/synth.md) with a
gain step applied afterwards (a receiver gain scales signal and noise alike, so each burst's
Eb/N0 is the truth's); the Gamma law of a frame's out-of-band power (shape: its DFT bins;
Kay, Fundamentals of Statistical Signal Processing vol. II, Prentice Hall 1998, §2.2, from
memory) drawn with numpy.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import robustness_lib as R

from iqstat.capture import Capture
from iqstat.facts import iter_unscaled_chunks
from iqstat.formats.open import open_capture
from iqstat.levels import LevelNormalisedCapture, gain_track
from iqstat.measure import measure_capture
from iqstat.profile import profile_from_dict
from iqstat.synth import scenario_from_dict, synthesize, write_synthetic


def test_track_finds_a_step_and_keeps_a_steady_level():
    rng = np.random.default_rng(41)
    shape = 240.0
    steady = rng.gamma(shape, 1.0 / shape, 4000)
    assert gain_track(steady, shape) == (None, 0.0)
    stepped = steady.copy()
    stepped[2500:] *= 10**0.4  # +4 dB
    track, span = gain_track(stepped, shape)
    assert span == pytest.approx(4.0, abs=0.2)
    assert np.median(track[2600:]) / np.median(track[:2400]) == pytest.approx(10**0.4, rel=0.02)


def _stepped(name: str, step_db: float, where: str):
    case = R.CASES[name]
    doc = R._doc(case, 10, 7)
    syn = synthesize(scenario_from_dict(doc), seed=7)
    tb = syn.truth.bursts
    if where == "gap":
        cut = (tb[4].stop_sample + tb[5].start_sample) // 2
    else:
        cut = (tb[5].start_sample + tb[5].stop_sample) // 2
    x = syn.samples.copy()
    x[cut:] *= 10 ** (step_db / 20)
    profile = profile_from_dict({k: doc[k] for k in ("link", "frame", "requirement")})
    truth = 10 * math.log10(np.mean([10 ** (b.ebn0_db / 10) for b in tb]))
    return measure_capture(Capture.from_array(x, case[3]), profile), truth, len(tb)


@pytest.mark.parametrize(("step_db", "where"), [(6.0, "gap"), (-10.0, "gap"), (6.0, "mid")])
def test_a_gain_step_is_undone(step_db, where):
    # Left alone, a 6 dB step hid the gaps after it: 11 bursts, a power-based Eb/N0 of
    # 15.8 dB for 12, and false fading and detection-loss flags.
    report, truth, sent = _stepped("clean", step_db, where)
    s = report.summary
    assert s.bursts == sent
    assert "gain-steps" in s.flags
    assert report.detection.gain_span_db == pytest.approx(abs(step_db), abs=0.5)
    lo, hi = s.ebn0_db_ci95
    assert lo - 0.1 <= truth <= hi + 0.1
    assert abs(s.available_ebn0_db - truth) < 0.3
    assert not {"fading", "detection-loss", "ber-disagrees-with-ebn0"} & set(s.flags)


def test_no_gain_step_no_flag():
    report, _, _ = _stepped("clean", 0.0, "gap")
    assert "gain-steps" not in report.summary.flags
    assert report.detection.gain_span_db == 0.0


def test_every_read_path_is_levelled(tmp_path):
    doc = R._doc(R.CASES["clean"], 3, 7)
    out = write_synthetic(scenario_from_dict(doc), tmp_path)
    cap = open_capture(out.meta_path)
    n_frames = cap.n_samples // 256
    track = np.where(np.arange(n_frames) < n_frames // 2, 1.0, 4.0).astype(np.float32)
    even = LevelNormalisedCapture(cap, track, 256)
    n = cap.n_samples
    frames = np.minimum(np.arange(n) // 256, n_frames - 1)
    ref = cap.read(0, n) / np.sqrt(track[frames])
    np.testing.assert_allclose(even.read(0, n), ref, rtol=1e-6, atol=1e-7)
    scale = cap.datatype.scale
    got = np.concatenate([x.copy() for _, x, _, _ in iter_unscaled_chunks(even, 10_000)])
    np.testing.assert_allclose(got * scale, ref, rtol=1e-6, atol=1e-7)
