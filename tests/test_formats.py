"""Reading SigMF recordings, archives, non-conforming datasets and raw files.

References: SigMF specification v1.2.6 (the schema bundled with sigmf-python 1.14), sections
"Dataset Format" (datatypes, interleaving, byte order), "Non-Conforming Datasets"
(core:dataset, core:header_bytes, core:trailing_bytes), "Captures Array" and "Archive"; the
``sigmf`` library's own reader (``read_samples`` with autoscale) as the independent reader.
"""

from __future__ import annotations

import json
import tarfile
import warnings

import numpy as np
import pytest
import sigmf

from iqstat.errors import CaptureError, CaptureWarning
from iqstat.formats.datatypes import ALL_DATATYPES, parse_datatype
from iqstat.formats.open import open_capture


def _stored(dt_name: str, n: int, rng, channels: int = 1) -> np.ndarray:
    """Random stored components covering the datatype's whole range (incl. extremes)."""
    dt = parse_datatype(dt_name)
    shape = (n * channels * dt.components,)
    if dt.kind == "f":
        vals = rng.standard_normal(shape) * 0.3
    else:
        lo, hi = dt.full_scale_min, dt.full_scale_max
        vals = rng.integers(int(lo), int(hi), size=shape, endpoint=True, dtype=np.int64)
        vals[:2] = [lo, hi]
    return np.asarray(vals).astype(dt.component_dtype)


def _write_with_sigmf(
    tmp_path, name, dt_name, stored, *, captures=None, global_extra=None, sample_rate=250e3
):
    """Write data bytes with numpy, metadata with the sigmf library (validated on write)."""
    data = tmp_path / f"{name}.sigmf-data"
    stored.tofile(data)
    info = {
        "core:datatype": dt_name,
        "core:sample_rate": sample_rate,
        "core:version": sigmf.__specification__,
    }
    info.update(global_extra or {})
    f = sigmf.SigMFFile(data_file=str(data), global_info=info, skip_checksum=False)
    for cap in captures or [{"core:sample_start": 0}]:
        start = cap["core:sample_start"]
        f.add_capture(start, metadata={k: v for k, v in cap.items() if k != "core:sample_start"})
    f.tofile(str(tmp_path / f"{name}.sigmf-meta"))
    return tmp_path / f"{name}.sigmf-meta"


@pytest.mark.parametrize("dt_name", ALL_DATATYPES)
def test_every_datatype_matches_the_sigmf_reader(tmp_path, rng, dt_name):
    """SigMF spec v1.2.6 'Dataset Format': all 28 datatypes, as the sigmf library reads them."""
    stored = _stored(dt_name, 3000, rng)
    meta = _write_with_sigmf(tmp_path, "rec", dt_name, stored)
    ref = sigmf.fromfile(str(meta), skip_checksum=False, autoscale=True).read_samples()
    cap = open_capture(meta)
    ours = cap.read()
    assert cap.n_samples == len(ref) == 3000
    assert cap.is_complex == dt_name.startswith("c")
    ref_c = ref.astype(np.complex128)
    # The library returns float32 (f32 types) or float64; ours is complex64: compare in float32.
    np.testing.assert_allclose(ours.real, ref_c.real.astype(np.float32), rtol=0, atol=0)
    np.testing.assert_allclose(ours.imag, ref_c.imag.astype(np.float32), rtol=0, atol=0)


@pytest.mark.parametrize(
    ("dt_name", "stored", "expected"),
    [
        # SigMF spec 'Dataset Format': signed ints scale by 2^(bits-1), unsigned are offset by
        # 2^(bits-1) first; I before Q; _le/_be byte order. Expected values worked by hand.
        ("ci16_le", b"\x00\x80\xff\x7f", complex(-1.0, 32767 / 32768)),
        ("ci16_be", b"\x80\x00\x7f\xff", complex(-1.0, 32767 / 32768)),
        ("cu8", bytes([0, 255]), complex(-1.0, 127 / 128)),
        ("ci8", bytes([0x80, 0x40]), complex(-1.0, 0.5)),
        ("cu16_le", b"\x00\x80\x00\x00", complex(0.0, -1.0)),
        ("ci32_be", b"\x40\x00\x00\x00\xc0\x00\x00\x00", complex(0.5, -0.5)),
        ("cf32_be", np.array([1.5, -2.0], ">f4").tobytes(), complex(1.5, -2.0)),
        ("rf64_le", np.array([0.25], "<f8").tobytes(), complex(0.25, 0.0)),
    ],
)
def test_scaling_and_byte_order_from_the_spec(tmp_path, dt_name, stored, expected):
    path = tmp_path / "x.bin"
    path.write_bytes(stored)
    cap = open_capture(path, datatype=dt_name, sample_rate_hz=1e3)
    assert cap.read()[0] == np.complex64(expected)


def test_multi_segment_frequencies_and_times(tmp_path, rng):
    """SigMF 'Captures Array': segments keep their own core:frequency / core:datetime."""
    stored = _stored("ci16_le", 1000, rng)
    caps = [
        {
            "core:sample_start": 0,
            "core:frequency": 868.1e6,
            "core:datetime": "2026-05-01T10:00:00Z",
        },
        {
            "core:sample_start": 400,
            "core:frequency": 868.3e6,
            "core:datetime": "2026-05-01T10:00:01Z",
        },
    ]
    meta = _write_with_sigmf(tmp_path, "seg", "ci16_le", stored, captures=caps)
    cap = open_capture(meta)
    assert [s.sample_count for s in cap.segments] == [400, 600]
    assert cap.segment_of(399).frequency_hz == 868.1e6
    assert cap.segment_of(400).frequency_hz == 868.3e6
    assert cap.segment_of(999).datetime == "2026-05-01T10:00:01Z"
    # A sample's time: its segment's core:datetime plus (sample − sample_start)/fs.
    assert cap.sample_datetime(400) == "2026-05-01T10:00:01.000000Z"
    assert cap.sample_datetime(400 + 125_000) == "2026-05-01T10:00:01.500000Z"
    assert cap.sample_datetime(399) == "2026-05-01T10:00:00.001596Z"
    ref = sigmf.fromfile(str(meta)).read_samples()
    np.testing.assert_array_equal(cap.read(), ref.astype(np.complex64))


def test_non_conforming_dataset_with_headers_and_trailer(tmp_path, rng):
    """SigMF 'Non-Conforming Datasets': per-capture header bytes and global trailing bytes.

    The layout mirrors the specification's own example (cu8, 4-byte headers before each of
    two segments).
    """
    body = rng.integers(0, 256, size=(2, 1000), dtype=np.uint8)
    blob = b"HDR1" + body[0].tobytes() + b"HDR2" + body[1].tobytes() + b"TAILTAIL"
    (tmp_path / "dump.dat").write_bytes(blob)
    meta = {
        "global": {
            "core:datatype": "cu8",
            "core:version": sigmf.__specification__,
            "core:sample_rate": 1e6,
            "core:dataset": "dump.dat",
            "core:trailing_bytes": 8,
        },
        "captures": [
            {"core:sample_start": 0, "core:header_bytes": 4},
            {"core:sample_start": 500, "core:header_bytes": 4},
        ],
        "annotations": [{"core:sample_start": 10, "core:sample_count": 5, "core:label": "pump"}],
    }
    (tmp_path / "dump.sigmf-meta").write_text(json.dumps(meta))
    cap = open_capture(tmp_path / "dump.sigmf-meta")
    assert cap.n_samples == 1000
    expected = (body.reshape(-1).astype(np.float32) - 128) / 128
    got = cap.read().view(np.float32)
    np.testing.assert_array_equal(got, expected)
    assert cap.annotations[0].label == "pump"


def test_archive_read_in_place_and_multiple_recordings(tmp_path, rng):
    """SigMF 'Archive': a tar of recordings; members are memory-mapped in place."""
    metas = []
    for name in ("north", "south"):
        d = tmp_path / name
        d.mkdir()
        metas.append(_write_with_sigmf(d, name, "ci16_le", _stored("ci16_le", 777, rng)))
    arch = tmp_path / "campaign.sigmf"
    with tarfile.open(arch, "w") as tar:
        for m in metas:
            base = m.with_suffix("")
            tar.add(m, arcname=f"{base.name}/{m.name}")
            tar.add(base.with_suffix(".sigmf-data"), arcname=f"{base.name}/{base.name}.sigmf-data")
    with pytest.raises(CaptureError, match="north, south"):
        open_capture(arch)
    for m in metas:
        cap = open_capture(arch, recording=m.with_suffix("").name)
        ref = sigmf.fromfile(str(m)).read_samples().astype(np.complex64)
        np.testing.assert_array_equal(cap.read(), ref)
    before = sorted(p.name for p in tmp_path.iterdir())
    assert "north.sigmf-data" not in before  # nothing extracted beside the archive


def test_single_recording_archive_written_by_sigmf(tmp_path, rng):
    meta = _write_with_sigmf(tmp_path, "one", "cf32_le", _stored("cf32_le", 500, rng))
    f = sigmf.fromfile(str(meta))
    f.tofile(str(tmp_path / "one_arch"), toarchive=True)
    cap = open_capture(tmp_path / "one_arch.sigmf")
    np.testing.assert_array_equal(cap.read(), f.read_samples().astype(np.complex64))


def test_archive_with_traversal_path_is_refused(tmp_path):
    arch = tmp_path / "evil.sigmf"
    payload = tmp_path / "p.sigmf-meta"
    payload.write_text("{}")
    with tarfile.open(arch, "w") as tar:
        tar.add(payload, arcname="../../etc/p.sigmf-meta")
    with pytest.raises(CaptureError, match="unsafe member path"):
        open_capture(arch)


def test_multichannel_pick_channel(tmp_path, rng):
    """core:num_channels: channels interleaved sample by sample (SigMF 'Dataset Format')."""
    stored = _stored("ci16_le", 600, rng, channels=3)
    meta = _write_with_sigmf(
        tmp_path, "mc", "ci16_le", stored, global_extra={"core:num_channels": 3}
    )
    full = stored.reshape(600, 3, 2).astype(np.float32) / 32768
    for ch in range(3):
        got = open_capture(meta, channel=ch).read()
        np.testing.assert_array_equal(got.real, full[:, ch, 0])
        np.testing.assert_array_equal(got.imag, full[:, ch, 1])
    with pytest.raises(Exception, match="channel 3 does not exist"):
        open_capture(meta, channel=3)


def test_chunks_cover_the_capture_exactly(tmp_path, rng):
    stored = _stored("cu8", 10_001, rng)
    meta = _write_with_sigmf(tmp_path, "ch", "cu8", stored)
    cap = open_capture(meta)
    parts = [(a, x.copy()) for a, x in cap.iter_chunks(chunk_samples=4096)]
    assert [a for a, _ in parts] == [0, 4096, 8192]
    np.testing.assert_array_equal(np.concatenate([x for _, x in parts]), cap.read())


def test_trailing_partial_sample_is_dropped_with_a_warning(tmp_path, rng):
    stored = _stored("ci16_le", 100, rng)
    meta = _write_with_sigmf(tmp_path, "t", "ci16_le", stored)
    with open(tmp_path / "t.sigmf-data", "ab") as f:
        f.write(b"\x01\x02\x03")
    with pytest.warns(CaptureWarning, match="3 byte"):
        cap = open_capture(meta)
    assert cap.n_samples == 100 and cap.leftover_bytes == 3


def test_nan_and_inf_are_erasures(tmp_path):
    x = np.array([1, np.nan, 2, np.inf, 3, -np.inf], dtype="<f4")
    p = tmp_path / "n.cf32"
    x.tofile(p)
    cap = open_capture(p, datatype="cf32_le", sample_rate_hz=1e3)
    got = cap.read()
    assert np.all(np.isfinite(got))
    assert got[0] == 0 and got[2] == 0  # samples with a non-finite component read as 0
    counted = sum(n for _, _, n in cap.iter_chunks_counted())
    assert counted == 3


def test_verify_sha512(tmp_path, rng):
    meta = _write_with_sigmf(tmp_path, "h", "ci16_le", _stored("ci16_le", 256, rng))
    open_capture(meta, verify=True)  # matches
    data = tmp_path / "h.sigmf-data"
    raw = bytearray(data.read_bytes())
    raw[10] ^= 0xFF
    data.write_bytes(bytes(raw))
    with pytest.raises(CaptureError, match="does not match core:sha512"):
        open_capture(meta, verify=True)


def test_input_file_is_opened_read_only(tmp_path, rng):
    meta = _write_with_sigmf(tmp_path, "ro", "ci16_le", _stored("ci16_le", 256, rng))
    data = tmp_path / "ro.sigmf-data"
    before = (data.read_bytes(), meta.read_bytes())
    cap = open_capture(meta)
    arr = cap.read()
    arr[:] = 0
    assert (data.read_bytes(), meta.read_bytes()) == before


@pytest.mark.parametrize("bad", ["cf32", "cf32_lexyz", "ci12_le", "cu8_le", "xf32_le", "CF32_LE"])
def test_strict_datatype(bad):
    """SigMF spec 'Dataset Format' grammar; the sigmf validator itself accepts some of these."""
    with pytest.raises(CaptureError, match="datatype"):
        parse_datatype(bad)


def test_all_datatypes_listed():
    # SigMF spec: (r|c) x (f32,f64,i32,i16,u32,u16) x (_le,_be) + (r|c) x (i8,u8) = 28 types.
    assert len(set(ALL_DATATYPES)) == 28
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for name in ALL_DATATYPES:
            parse_datatype(name)
