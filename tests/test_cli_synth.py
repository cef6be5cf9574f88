"""``iqstat synth`` through typer's test runner: files written, truth beside, bad scenarios."""

from __future__ import annotations

import json

import sigmf
from typer.testing import CliRunner

from iqstat.cli import app

SCENARIO = """
[link]
modulation = "2fsk"
symbol_rate = "4.8k"
tone_spacing = "4.8k"
[frame]
preamble = "aaaaaaaa"
sync_word = "2dd4"
payload = "pn9"
payload_bits = 128
[capture]
sample_rate = "250k"
datatype = "cu8"
seed = 3
[bursts]
count = 2
ebn0_db = 12.0
"""


def test_synth_writes_a_valid_recording_and_its_truth(tmp_path):
    sc = tmp_path / "gauge.toml"
    sc.write_text(SCENARIO)
    r = CliRunner().invoke(app, ["synth", str(sc), "--out", str(tmp_path / "out")])
    assert r.exit_code == 0, r.stderr
    meta = tmp_path / "out" / "gauge.sigmf-meta"
    rec = sigmf.fromfile(str(meta))  # the sigmf library reads it (and checks the sha512)
    rec.validate()
    assert rec.get_global_field("core:datatype") == "cu8"
    truth = json.loads((tmp_path / "out" / "gauge.truth.json").read_text())
    assert len(truth["truth"]["bursts"]) == 2
    # Refuses to overwrite without --overwrite, in one line with exit 2.
    again = CliRunner().invoke(app, ["synth", str(sc), "--out", str(tmp_path / "out")])
    assert again.exit_code == 2
    assert len([ln for ln in again.stderr.splitlines() if ln.strip()]) == 1
    ok = CliRunner().invoke(
        app, ["synth", str(sc), "--out", str(tmp_path / "out"), "--overwrite", "--seed", "9"]
    )
    assert ok.exit_code == 0, ok.stderr


def test_synth_bad_scenario_is_one_line(tmp_path):
    sc = tmp_path / "bad.toml"
    sc.write_text(SCENARIO.replace("count = 2", "cont = 2"))
    r = CliRunner().invoke(app, ["synth", str(sc), "--out", str(tmp_path / "o")])
    assert r.exit_code == 2
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1 and "did you mean" in lines[0] and "count" in lines[0]
