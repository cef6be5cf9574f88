"""``iqstat describe`` and the bad-input contract through typer's test runner.

Contract (ours): every bad input gives exactly one line on stderr and exit status 2, never a
traceback; a readable-but-odd file gives a one-line warning and exit 0.
"""

from __future__ import annotations

import json
import tarfile

import numpy as np
import pytest
import sigmf
from typer.testing import CliRunner

from iqstat.cli import app

runner = CliRunner()


def _meta(tmp_path, name="rec", **global_fields):
    g = {
        "core:datatype": "ci16_le",
        "core:version": sigmf.__specification__,
        "core:sample_rate": 250000.0,
    }
    g.update(global_fields)
    g = {k: v for k, v in g.items() if v is not None}
    meta = {"global": g, "captures": [{"core:sample_start": 0}], "annotations": []}
    p = tmp_path / f"{name}.sigmf-meta"
    p.write_text(json.dumps(meta))
    return p


def _data(tmp_path, name="rec", n=4096, seed=3):
    rng = np.random.default_rng(seed)
    x = (rng.standard_normal(2 * n) * 300).astype("<i2")
    p = tmp_path / f"{name}.sigmf-data"
    x.tofile(p)
    return p


def _bad(args, match):
    r = runner.invoke(app, args)
    assert r.exit_code == 2, (r.exit_code, r.stdout, r.stderr)
    lines = [ln for ln in r.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, r.stderr
    assert lines[0].startswith("iqstat: error: ")
    assert match in lines[0], lines[0]
    assert "Traceback" not in r.stderr + r.stdout
    return lines[0]


def test_good_recording(tmp_path):
    _data(tmp_path)
    m = _meta(tmp_path)
    r = runner.invoke(app, ["describe", str(m)])
    assert r.exit_code == 0, r.stderr
    assert "4,096" in r.stdout
    r = runner.invoke(app, ["describe", str(m), "--json"])
    d = json.loads(r.stdout)
    assert d["format"] == "iqstat-facts" and d["samples"] == 4096
    assert d["sample_rate_hz"] == 250000.0


@pytest.mark.parametrize("which", ["meta", "data"])
def test_missing_half_of_a_recording(tmp_path, which):
    if which == "meta":
        d = _data(tmp_path)
        _bad(["describe", str(d)], "metadata file")
    else:
        m = _meta(tmp_path)
        _bad(["describe", str(m)], "data file")


def test_missing_file(tmp_path):
    _bad(["describe", str(tmp_path / "nothing.cu8")], "not found")


def test_truncated_data_warns_with_leftover_bytes(tmp_path):
    d = _data(tmp_path, n=1000)
    with open(d, "ab") as f:
        f.write(b"\x00\x01\x02")
    m = _meta(tmp_path)
    r = runner.invoke(app, ["describe", str(m)])
    assert r.exit_code == 0
    assert "3 byte(s) after the last whole ci16_le sample ignored" in r.stderr
    assert "1,000" in r.stdout


@pytest.mark.parametrize("dt", ["cf32", "cf32_lexyz", "ci12_le", 7])
def test_bad_datatype_in_metadata(tmp_path, dt):
    _data(tmp_path)
    m = _meta(tmp_path, **{"core:datatype": dt})
    _bad(["describe", str(m)], "datatype")


@pytest.mark.parametrize("dt", ["cf32", "cs16", "cf32_lexyz"])
def test_bad_datatype_for_raw(tmp_path, dt):
    p = tmp_path / "dump.bin"
    p.write_bytes(b"\x00" * 64)
    _bad(["describe", str(p), "--datatype", dt, "--sample-rate", "1M"], "datatype")


@pytest.mark.parametrize(
    ("rate", "match"),
    [(None, "no core:sample_rate"), (0, "sample"), (-250000, "sample"), ("fast", "sample")],
)
def test_bad_sample_rate_in_metadata(tmp_path, rate, match):
    _data(tmp_path)
    g = {"core:sample_rate": rate}
    m = _meta(tmp_path, **g)
    if rate is None:
        meta = json.loads(m.read_text())
        meta["global"].pop("core:sample_rate", None)
        m.write_text(json.dumps(meta))
    _bad(["describe", str(m)], match)


@pytest.mark.parametrize("rate", ["0", "-250k", "fast", "nan"])
def test_bad_sample_rate_for_raw(tmp_path, rate):
    p = tmp_path / "dump.cu8"
    p.write_bytes(b"\x80" * 64)
    r = runner.invoke(app, ["describe", str(p), "--datatype", "cu8", "--sample-rate", rate])
    assert r.exit_code == 2
    assert "Traceback" not in r.stderr


def test_raw_without_parameters_says_what_to_give(tmp_path):
    p = tmp_path / "site7.cu8"
    p.write_bytes(b"\x80" * 64)
    line = _bad(["describe", str(p)], "--datatype and --sample-rate")
    assert "cu8" in line


def test_rates_with_units(tmp_path):
    p = tmp_path / "site7.cu8"
    p.write_bytes(b"\x80" * 2000)
    r = runner.invoke(
        app,
        [
            "describe",
            str(p),
            "--datatype",
            "cu8",
            "--sample-rate",
            "2.4M",
            "--center-frequency",
            "869.5MHz",
            "--json",
        ],
    )
    d = json.loads(r.stdout)
    assert d["sample_rate_hz"] == 2.4e6 and d["center_frequency_hz"] == 869.5e6


def test_metadata_not_json_names_line_and_column(tmp_path):
    _data(tmp_path)
    m = tmp_path / "rec.sigmf-meta"
    m.write_text('{\n  "global": {\n    "core:datatype": "ci16_le",\n  }\n}\n')
    _bad(["describe", str(m)], "line 4, column 3")


def test_json_that_is_not_sigmf(tmp_path):
    _data(tmp_path)
    m = tmp_path / "rec.sigmf-meta"
    m.write_text(json.dumps({"hello": "reservoir"}))
    _bad(["describe", str(m)], "not SigMF")


def test_sigmf_schema_violation(tmp_path):
    _data(tmp_path)
    m = _meta(tmp_path)
    meta = json.loads(m.read_text())
    meta["captures"] = [{"core:sample_start": -5}]
    m.write_text(json.dumps(meta))
    _bad(["describe", str(m)], "fails SigMF validation")


def test_empty_capture(tmp_path):
    (tmp_path / "rec.sigmf-data").write_bytes(b"")
    m = _meta(tmp_path)
    _bad(["describe", str(m)], "holds no samples")


def test_nan_inf_counted_not_crashed(tmp_path):
    x = np.zeros(2 * 5000, dtype="<f4")
    x[10] = np.nan
    x[21] = np.inf
    x[4001] = -np.inf
    x.tofile(tmp_path / "f.cf32")
    r = runner.invoke(
        app,
        [
            "describe",
            str(tmp_path / "f.cf32"),
            "--datatype",
            "cf32_le",
            "--sample-rate",
            "250k",
            "--json",
        ],
    )
    assert r.exit_code == 0, r.stderr
    assert json.loads(r.stdout)["nonfinite_samples"] == 3


@pytest.mark.parametrize("member", ["/abs/x.sigmf-meta", "rec/../../x.sigmf-meta"])
def test_archive_with_traversal_paths(tmp_path, member):
    import io

    arch = tmp_path / "evil.sigmf"
    with tarfile.open(arch, "w") as tar:
        info = tarfile.TarInfo(member)  # addfile keeps the name as given (tar.add strips '/')
        info.size = 2
        tar.addfile(info, io.BytesIO(b"{}"))
    _bad(["describe", str(arch)], "unsafe member path")


def test_not_a_tar_archive(tmp_path):
    arch = tmp_path / "broken.sigmf"
    arch.write_bytes(b"not a tar file at all" * 10)
    _bad(["describe", str(arch)], "not a readable SigMF archive")


def test_wrong_channel(tmp_path):
    _data(tmp_path)
    m = _meta(tmp_path)
    _bad(["describe", str(m), "--channel", "2"], "channel 2 does not exist")


def test_real_recording_is_flagged(tmp_path):
    x = (np.random.default_rng(1).standard_normal(4000) * 1000).astype("<i2")
    x.tofile(tmp_path / "r.sigmf-data")
    m = _meta(tmp_path, name="r", **{"core:datatype": "ri16_le"})
    r = runner.invoke(app, ["describe", str(m)])
    assert r.exit_code == 0
    assert "complex baseband" in r.stderr


def test_input_files_untouched(tmp_path):
    d = _data(tmp_path)
    m = _meta(tmp_path)
    before = {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in (d, m)}
    runner.invoke(app, ["describe", str(m), "--json"])
    assert {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in (d, m)} == before
    assert sorted(x.name for x in tmp_path.iterdir()) == ["rec.sigmf-data", "rec.sigmf-meta"]
