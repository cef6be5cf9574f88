"""Robustness cases shared by tests/test_robustness.py and tests/benchmarks/bench_robustness.py.

Each case synthesises one capture with `iqstat synth` (in process) and measures it with its link
profile; the truth is the synthesiser's (the convention Eb/N0 = P·(fs/Rb)/σ², docs/synth.md).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from iqstat.capture import Capture
from iqstat.measure import measure_capture
from iqstat.profile import profile_from_dict
from iqstat.synth import scenario_from_dict, synthesize

# name: (modulation, Rs, spacing, fs, cfo range, Eb/N0, impairments, waveform, expect)
# expect: "truth" (within 0.3 dB), "loss" (a real detection loss: the power figure is the
# truth), or a flag that must be raised.
CASES = {
    "clean": ("2fsk", 4800, 4800, 250e3, (-3e3, 3e3), 12, {}, {}, "truth"),
    "far-off-centre": ("2fsk", 4800, 4800, 250e3, (49e3, 51e3), 12, {}, {}, "truth"),
    "2.4MS/s": ("2fsk", 4800, 4800, 2.4e6, (199e3, 201e3), 12, {}, {}, "truth"),
    "48kS/s": ("2fsk", 4800, 4800, 48e3, (-1e3, 1e3), 12, {}, {}, "truth"),
    "1.2kBd": ("2fsk", 1200, 1200, 250e3, (-3e3, 3e3), 12, {}, {}, "truth"),
    "6.5sps": ("2fsk", 38400, 38400, 250e3, (-3e3, 3e3), 16, {}, {}, "truth"),
    "6.5sps-h0.5": ("2fsk", 38400, 19200, 250e3, (-3e3, 3e3), 12, {}, {}, "truth"),
    "5sps": ("2fsk", 50000, 50000, 250e3, (-3e3, 3e3), 12, {}, {}, "truth"),
    "100kBd": ("2fsk", 100e3, 100e3, 1e6, (-10e3, 10e3), 12, {}, {}, "truth"),
    "4fsk-13sps": ("4fsk", 19200, 19200, 250e3, (-3e3, 3e3), 12, {}, {}, "truth"),
    "ook-1.2kBd": ("ook", 1200, None, 250e3, (-3e3, 3e3), 14, {}, {}, "truth"),
    "dc-offset": (
        "2fsk",
        4800,
        4800,
        250e3,
        (-500, 500),
        10,
        {"dc_offset": [0.05, 0.05]},
        {},
        "truth",
    ),
    "iq-imbalance": (
        "2fsk",
        4800,
        4800,
        250e3,
        (-500, 500),
        10,
        {"iq_gain_db": 3.0, "iq_phase_deg": 10.0},
        {},
        "truth",
    ),
    "carrier-beside": (
        "2fsk",
        4800,
        4800,
        250e3,
        (-500, 500),
        10,
        {"interferer": {"kind": "tone", "offset_hz": 30e3, "inr_db": 20.0}},
        {},
        "truth",
    ),
    "carrier-inside": (
        "2fsk",
        4800,
        4800,
        250e3,
        (-500, 500),
        10,
        {"interferer": {"kind": "tone", "offset_hz": 1e3, "inr_db": 0.0}},
        {},
        "truth",
    ),
    "interferer-inside": (
        "2fsk",
        4800,
        4800,
        250e3,
        (-500, 500),
        10,
        {
            "interferer": {
                "kind": "narrowband",
                "offset_hz": 1e3,
                "inr_db": 0.0,
                "bandwidth_hz": 200.0,
            }
        },
        {},
        "interference",
    ),
    "fading": (
        "2fsk",
        4800,
        4800,
        250e3,
        (-500, 500),
        10,
        {"rician_k_db": 6.0, "doppler_hz": 20.0},
        {},
        "fading",
    ),
    "ook-fading": (
        "ook",
        4800,
        None,
        250e3,
        (-500, 500),
        14,
        {"rician_k_db": 6.0, "doppler_hz": 20.0},
        {},
        "fading",
    ),
    "clipping": ("2fsk", 4800, 4800, 250e3, (-500, 500), 10, {"clip_dbfs": -6.0}, {}, "clipping"),
    # A receiver gain step of +6 dB halfway (an AGC), applied to the recording afterwards.
    "gain-step": ("2fsk", 4800, 4800, 250e3, (-500, 500), 12, {}, {}, "truth"),
    "long-50ppm": (
        "2fsk",
        4800,
        4800,
        250e3,
        (-3e3, 3e3),
        12,
        {"clock_offset_ppm": 50.0},
        {},
        "truth",
    ),
    "gfsk-bt0.5": ("2fsk", 4800, 4800, 250e3, (-3e3, 3e3), 12, {}, {"bt": 0.5}, "loss"),
    "ook-raised-cos": (
        "ook",
        4800,
        None,
        250e3,
        (-3e3, 3e3),
        14,
        {},
        {"ook_shape": "raised-cosine"},
        "loss",
    ),
}


def _doc(case, n_bursts: int, seed: int) -> dict:
    mod, rs, sp, fs, (c0, c1), eb, imp, wf, _ = case
    link = {"modulation": mod, "symbol_rate": float(rs)}
    if sp is not None:
        link["tone_spacing"] = float(sp)
    payload = 4000 if "clock_offset_ppm" in imp else 400
    burst_s = (48 + payload) / rs / (2 if mod == "4fsk" else 1)
    doc = {
        "link": link,
        "frame": {
            "preamble": "aaaaaaaa",
            "sync_word": "2dd4",
            "payload": "pn9",
            "payload_bits": payload,
        },
        "requirement": {"ber": 1e-4},
        "capture": {"sample_rate": fs, "datatype": "ci16_le", "peak_dbfs": -3.0, "seed": seed},
        "bursts": {
            "count": n_bursts,
            "ebn0_db": float(eb),
            "cfo_hz": {"uniform": [float(c0), float(c1)]},
            "gap_s": {"uniform": [0.3 * burst_s, 0.6 * burst_s]},
        },
        "impairments": {"clock_offset_ppm": 10.0, **imp},
    }
    if wf:
        doc["waveform"] = dict(wf)
    return doc


@dataclass(frozen=True)
class CaseResult:
    name: str
    sent: int
    report: object
    truth_db: float

    @property
    def verdict(self) -> tuple[bool, str]:
        """Whether the case came out as expected, and what was expected."""
        s = self.report.summary
        expect = CASES[self.name][-1]
        all_found = s.bursts == self.sent
        if expect == "truth":
            ok = all_found and s.ebn0_db is not None and abs(s.ebn0_db - self.truth_db) < 0.3
            return ok, "reads the truth within 0.3 dB, every burst found"
        if expect == "loss":
            ok = (
                all_found
                and s.available_ebn0_db is not None
                and abs(s.available_ebn0_db - self.truth_db) < 0.3
                and s.ebn0_db is not None
                and s.ebn0_db < self.truth_db
            )
            return ok, "power reads the truth within 0.3 dB, correlators below it"
        if expect == "fading":
            # The fading fit reads the mean Eb/N0 and predicts the BER the fades give: the
            # measured error count must be consistent with it (binomial tails, p > 1e-3).
            ok = (
                "fading" in s.flags
                and s.ebn0_db is not None
                and abs(s.ebn0_db - self.truth_db) < 0.5
                and s.bits_checked
                and _binomial_p(s.bit_errors, s.bits_checked, s.predicted_ber_checked) > 1e-3
            )
            return ok, "flagged fading, reads the truth within 0.5 dB, BER as predicted"
        return expect in s.flags, f"flagged {expect}"


def _binomial_p(errors: int, n: int, p: float) -> float:
    """Two-sided binomial tail probability of ``errors`` in ``n`` at rate p (scipy.stats)."""
    lo, hi = stats.binom.cdf(errors, n, p), stats.binom.sf(errors - 1, n, p)
    return float(min(1.0, 2.0 * min(lo, hi)))


#: Cases whose recording is changed after synthesis: a gain step (dB) in the middle gap.
GAIN_STEPS_DB = {"gain-step": 6.0}


def run_case(name: str, n_bursts: int = 10, seed: int = 7) -> CaseResult:
    case = CASES[name]
    doc = _doc(case, n_bursts, seed)
    syn = synthesize(scenario_from_dict(doc), seed=seed)
    profile = profile_from_dict({k: doc[k] for k in ("link", "frame", "requirement")})
    x = syn.samples
    if name in GAIN_STEPS_DB:
        tb = syn.truth.bursts
        k = len(tb) // 2
        cut = (tb[k - 1].stop_sample + tb[k].start_sample) // 2
        x = x.copy()
        x[cut:] *= np.float32(10 ** (GAIN_STEPS_DB[name] / 20))
    report = measure_capture(Capture.from_array(x, case[3]), profile)
    truth = 10 * math.log10(np.mean([10 ** (b.ebn0_db / 10) for b in syn.truth.bursts]))
    return CaseResult(name, len(syn.truth.bursts), report, truth)
