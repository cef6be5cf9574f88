"""The main job on the captures field work brings: rates, oversampling, receiver artefacts,
interference, fading, gain steps, pulse shaping, clipping (tests/robustness_lib.py).

References: the synthetic truth (iqstat synth; Eb/N0 = P·(fs/Rb)/σ², docs/synth.md). The
0.3 dB tolerance is about 3 standard errors of a capture's Eb/N0 over 10 bursts of ~450
symbols at 10-16 dB (the Cramér–Rao bound, iqstat.bounds: ~0.2 dB per burst), common practice
for a pass/fail check. Fading (K = 6 dB, 20 Hz, ~2 fade cycles per burst): the bursts' own
mean |h|² scatters about the channel's mean of 1, so the tolerance is 0.5 dB (common practice,
no source), and the measured BER is checked against the fading fit's prediction (binomial tails
from scipy.stats.binom).
"""

from __future__ import annotations

import pytest
from robustness_lib import CASES, run_case


@pytest.mark.parametrize("name", list(CASES))
def test_case_comes_out_as_expected(name):
    r = run_case(name)
    ok, what = r.verdict
    s = r.report.summary
    assert ok, (
        f"{name}: expected it {what}; got {s.ebn0_db} dB (truth {r.truth_db:.2f}), "
        f"power {s.available_ebn0_db}, {s.bursts}/{r.sent} bursts, flags {s.flags}"
    )
