"""The bundled sample captures: readable, valid SigMF, measured close to their truth files.

References: the `sigmf` library's validator (SigMF v1.2 schema) and each capture's truth file
written by iqstat synth (the truth convention Eb/N0 = P·(fs/Rb)/σ²); tolerance from the
capture's own 95 % interval, widened for the spread of per-burst truths.
"""

from __future__ import annotations

import json
import tomllib
import warnings
from pathlib import Path

import numpy as np
import pytest
import sigmf.validate
from typer.testing import CliRunner

import iqstat
from iqstat.cli import app

SAMPLES = Path(__file__).resolve().parents[1] / "sample_captures"
NAMES = sorted(p.name[: -len(".sigmf-meta")] for p in SAMPLES.glob("*.sigmf-meta"))


def test_there_are_sample_captures():
    assert len(NAMES) >= 2


@pytest.mark.parametrize("name", NAMES)
def test_sample_is_valid_sigmf(name):
    meta = json.loads((SAMPLES / f"{name}.sigmf-meta").read_text())
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        sigmf.validate.validate(meta)
    # The recording carries no truth (measurement must not be able to read the answer).
    text = json.dumps(meta).lower()
    assert "ebn0" not in text and "truth" not in text


@pytest.mark.parametrize("name", NAMES)
def test_measure_sample_capture_cli_and_api(tmp_path, name):
    out = tmp_path / "r.json"
    r = CliRunner().invoke(
        app,
        [
            "measure",
            str(SAMPLES / f"{name}.sigmf-meta"),
            "--profile",
            str(SAMPLES / "link.toml"),
            "--json",
            str(out),
        ],
    )
    assert r.exit_code == 0, r.stderr
    assert "margin" in r.stdout
    d = json.loads(out.read_text())
    s = d["summary"]
    truth = json.loads((SAMPLES / f"{name}.truth.json").read_text())["truth"]
    sent = [b["ebn0_db"] for b in truth["bursts"]]
    w = np.array([b["n_symbols"] for b in truth["bursts"]], dtype=float)
    truth_db = 10 * np.log10(np.sum(w * 10 ** (np.array(sent) / 10)) / w.sum())
    lo, hi = s["ebn0_db_ci95"]
    assert s["bursts"] == len(sent)
    assert lo - 0.3 <= truth_db <= hi + 0.3, (s["ebn0_db"], truth_db)
    # Under fading a burst whose sync word falls in a deep fade goes unchecked: 80 % then.
    scenario = tomllib.loads((SAMPLES / f"{name}.toml").read_text())
    fades = "rician_k_db" in scenario.get("impairments", {})
    assert s["bits_checked"] >= (0.8 if fades else 0.9) * len(sent) * 400
    assert ("fading" in s["flags"]) == fades
    # Eb/N0 from power: the capture's interval holds the truth (the band keeps all but a
    # sliver of the CPFSK spectrum), and so do the bursts' intervals but for a few: with 10
    # bursts, binomial(10, 0.05) gives P(at most two misses) = 0.988.
    a_lo, a_hi = s["available_ebn0_db_ci95"]
    assert a_lo <= truth_db <= a_hi, (s["available_ebn0_db"], truth_db)
    missed = sum(
        not (b["available_ebn0_db_ci95"][0] <= x <= b["available_ebn0_db_ci95"][1])
        for b, x in zip(d["bursts"], sent, strict=True)
    )
    assert missed <= 2
    l_lo, l_hi = s["detection_loss_db_ci95"]
    assert l_lo <= s["detection_loss_db"] <= l_hi
    # Burst times from the recording's core:datetime (UTC) plus start_sample/fs.
    meta = json.loads((SAMPLES / f"{name}.sigmf-meta").read_text())
    t0 = meta["captures"][0]["core:datetime"]
    first = d["bursts"][0]
    assert first["start_time"].startswith(t0[:16])
    # The notebook API gives the same figure.
    rep = iqstat.measure_file(SAMPLES / f"{name}.sigmf-meta", profile=SAMPLES / "link.toml")
    assert rep.summary.ebn0_db == pytest.approx(s["ebn0_db"], abs=1e-9)
