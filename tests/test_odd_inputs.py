"""Odd profiles and odd captures: a report or a clear IqstatError, never a crash or a made-up
figure (the issue's "bad input and odd captures"). The truth is iqstat synth's; a wrong
profile must leave the headline figures null (docs/report-format.md, profile-mismatch).
"""

from __future__ import annotations

import io
import json

import numpy as np
import pytest
from rich.console import Console
from robustness_lib import CASES, _doc

from iqstat.capture import Capture
from iqstat.errors import IqstatError
from iqstat.measure import measure_capture
from iqstat.profile import profile_from_dict
from iqstat.report.measurement import render_report, report_json_pieces
from iqstat.synth import scenario_from_dict, synthesize

FS = 250e3


@pytest.fixture(scope="module")
def clean():
    doc = _doc(CASES["clean"], 6, 3)
    syn = synthesize(scenario_from_dict(doc), seed=3)
    return syn.samples, {k: doc[k] for k in ("link", "frame", "requirement")}


def _measure(x, prof, fs=FS):
    """The report, rendered to JSON (valid, no NaN) and to the terminal, or an IqstatError."""
    r = measure_capture(
        Capture.from_array(np.asarray(x, np.complex64), fs), profile_from_dict(prof)
    )
    json.loads("".join(report_json_pieces(r)), parse_constant=lambda c: pytest.fail(c))
    render_report(r, Console(file=io.StringIO(), width=100))
    return r


def _with(prof, section, **changes):
    p = json.loads(json.dumps(prof))
    for k, v in changes.items():
        if v is None:
            p[section].pop(k, None)
        else:
            p[section][k] = v
    return p


@pytest.mark.parametrize(
    ("section", "changes"),
    [
        ("link", {"symbol_rate": 9600.0}),
        ("link", {"symbol_rate": 4900.0}),
        ("link", {"tone_spacing": 9600.0}),
        ("link", {"modulation": "4fsk"}),
        ("frame", {"sync_word": "1234"}),
    ],
)
def test_a_profile_that_does_not_describe_the_capture_gives_no_headline(clean, section, changes):
    x, prof = clean
    s = _measure(x, _with(prof, section, **changes)).summary
    assert s.ebn0_db is None and s.margin_db is None and s.predicted_ber is None
    assert "profile-mismatch" in s.flags


@pytest.mark.parametrize(
    ("section", "changes"),
    [
        ("link", {"symbol_rate": None, "tone_spacing": None}),
        ("frame", {"preamble": None, "sync_word": None}),
        ("frame", {"payload": "unknown", "payload_bits": None}),
        ("frame", {"payload": "pn15"}),
    ],
)
def test_a_profile_that_says_less_still_measures(clean, section, changes):
    x, prof = clean
    s = _measure(x, _with(prof, section, **changes)).summary
    # the truth is 12 dB; 6 bursts give a pooled interval of about ±0.1 dB, and 0.4 dB leaves
    # room for blind rates (common practice, no source)
    assert s.ebn0_db == pytest.approx(12.0, abs=0.4)


@pytest.mark.parametrize(
    "make",
    [
        lambda x: x[:20_000],  # ends inside the first burst
        lambda x: x[10_000:],  # starts inside a burst
        lambda x: np.zeros(100_000),  # silence
        lambda x: x.real,  # a real stream stored as complex (dead Q)
        lambda x: x * 30,  # far over full scale (float)
        lambda x: np.conj(x),  # spectrum inverted
        lambda x: np.tile(x[:2000], 100),  # a fragment repeated
    ],
)
def test_odd_captures_give_a_report(clean, make):
    x, prof = clean
    try:
        r = _measure(make(x), prof)
    except IqstatError:
        return  # a clear, one-line error is acceptable too
    assert r.summary.message


def test_silence_is_no_bursts_and_not_clipping(clean):
    _, prof = clean
    s = _measure(np.zeros(100_000), prof).summary
    assert "no-bursts" in s.flags and "clipping" not in s.flags


@pytest.mark.parametrize("factor", [2.0, 0.5])
def test_a_wrong_sample_rate_gives_no_made_up_headline(clean, factor):
    x, prof = clean
    s = _measure(x, prof, fs=FS * factor).summary
    assert s.ebn0_db is None or "profile-mismatch" in s.flags or s.bursts_measured == 0


@pytest.mark.parametrize("mod", ["2fsk", "4fsk"])
def test_a_plain_carrier_is_not_read_as_fsk(mod):
    # A steady carrier with noise, measured with an FSK profile that gives no frame (so the
    # frame cannot tell): every decision is one tone, and no made-up Eb/N0 is given (it read
    # 20.1 dB before, with only not-awgn).
    rng = np.random.default_rng(51)
    n = 100_000
    t = np.arange(n)
    x = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * 0.01
    x = (x + 0.02 * np.exp(2j * np.pi * 1000.0 * t / FS)).astype(np.complex64)
    link = {"modulation": mod, "symbol_rate": 4800.0, "tone_spacing": 4800.0}
    report = _measure(x, {"link": link})
    s = report.summary
    assert "unmodulated" in s.flags and "profile-mismatch" in s.flags
    assert s.ebn0_db is None and s.margin_db is None
