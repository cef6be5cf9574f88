"""Reading SigMF recordings and archives.

Metadata is parsed with ``json`` (so syntax errors can name their line and column) and checked
with the ``sigmf`` library's validator plus our own stricter checks (the library accepts
datatypes such as ``cf32`` that the specification does not). Samples are never read by the
library: the :class:`~iqstat.capture.Capture` reads them window by window, from the data file
or in place from inside a ``.sigmf`` tar archive.

References
----------
.. [1] SigMF specification v1.2.x, "SigMF Recording", "Non-Conforming Datasets",
   "Archive" and "Dataset Format" sections.
"""

from __future__ import annotations

import hashlib
import json
import tarfile
import warnings
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

import jsonschema
import numpy as np
import sigmf.validate

from iqstat.capture import Annotation, Capture, Segment
from iqstat.errors import CaptureError, CaptureWarning
from iqstat.formats.datatypes import parse_datatype

META_EXT = ".sigmf-meta"
DATA_EXT = ".sigmf-data"
ARCHIVE_EXT = ".sigmf"


@dataclass(frozen=True)
class _DataSource:
    """Where a recording's bytes live: a file, or a region of a file (archive member)."""

    path: Path
    offset: int
    size: int
    label: str


def is_sigmf_path(path: Path) -> bool:
    """True if ``path`` names a SigMF meta, data or archive file, or a base name with a meta."""
    if path.suffix in (META_EXT, DATA_EXT, ARCHIVE_EXT):
        return True
    return path.with_name(path.name + META_EXT).exists()


def open_sigmf(
    path: Path,
    *,
    channel: int = 0,
    recording: str | None = None,
    sample_rate_hz: float | None = None,
    verify: bool = False,
) -> Capture:
    """Open a SigMF recording (meta, data or base name) or a ``.sigmf`` archive.

    Parameters
    ----------
    path : Path
    channel : int
        Channel to read when ``core:num_channels`` > 1.
    recording : str, optional
        Name of the recording inside an archive holding several.
    sample_rate_hz : float, optional
        Sample rate to use when the metadata lacks ``core:sample_rate``.
    verify : bool
        Check the data against ``core:sha512``.
    """
    if path.suffix == ARCHIVE_EXT:
        meta_text, meta_label, source = _archive_member(path, recording)
    else:
        base = path.with_suffix("") if path.suffix in (META_EXT, DATA_EXT) else path
        meta_path = base.with_name(base.name + META_EXT)
        if not meta_path.exists():
            raise CaptureError(
                f"metadata file {meta_path} not found; a SigMF recording needs NAME{META_EXT} "
                f"beside NAME{DATA_EXT} (for a raw file give --datatype and --sample-rate)"
            )
        meta_text = _read_text(meta_path)
        meta_label = str(meta_path)
        source = None
    meta = parse_metadata(meta_text, meta_label)
    glob = meta["global"]
    if source is None:
        source = _data_file_source(meta_path, glob)
    return _build_capture(meta, meta_label, source, channel, sample_rate_hz, verify, path)


def _read_text(p: Path) -> str:
    try:
        return p.read_text(encoding="utf-8")
    except UnicodeDecodeError as exc:
        raise CaptureError(
            f"metadata {p} is not UTF-8 text ({exc.reason} at byte {exc.start})"
        ) from None
    except OSError as exc:
        raise CaptureError(f"cannot read {p}: {exc.strerror}") from None


def parse_metadata(text: str, label: str) -> dict:
    """Parse and check SigMF metadata text; raise CaptureError with a clear message."""
    try:
        meta = json.loads(text)
    except json.JSONDecodeError as exc:
        raise CaptureError(
            f"metadata {label} is not valid JSON: {exc.msg} at line {exc.lineno}, "
            f"column {exc.colno}"
        ) from None
    if not isinstance(meta, dict) or not isinstance(meta.get("global"), dict):
        raise CaptureError(
            f"metadata {label} is JSON but not SigMF: it needs a 'global' object "
            "(with core:datatype and core:version), 'captures' and 'annotations'"
        )
    missing = [k for k in ("captures", "annotations") if k not in meta]
    if missing:
        raise CaptureError(f"metadata {label} is not SigMF: missing top-level {', '.join(missing)}")
    if "core:datatype" not in meta["global"]:
        raise CaptureError(f'metadata {label} lacks global core:datatype (e.g. "ci16_le")')
    validate_metadata(meta, f"metadata {label}")
    return meta


def validate_metadata(meta: dict, what: str) -> None:
    """The sigmf library's schema check; CaptureError "<what> fails SigMF validation at …".

    The library warns (DeprecationWarning) about undeclared extension namespaces; a recording
    from another tool may have them, and they do not affect reading, so that is silenced.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        try:
            sigmf.validate.validate(meta)
        except jsonschema.exceptions.ValidationError as exc:
            where = "/".join(str(p) for p in exc.absolute_path) or "top level"
            first = str(exc.message).splitlines()[0][:160]
            raise CaptureError(f"{what} fails SigMF validation at {where}: {first}") from None


def _data_file_source(meta_path: Path, glob: dict) -> _DataSource:
    dataset = glob.get("core:dataset")
    if dataset is not None:
        if not isinstance(dataset, str) or Path(dataset).name != dataset:
            raise CaptureError(
                f"core:dataset {dataset!r} must be a bare file name in the metadata's folder"
            )
        data_path = meta_path.with_name(dataset)
    else:
        data_path = meta_path.with_name(meta_path.name[: -len(META_EXT)] + DATA_EXT)
    if not data_path.exists():
        raise CaptureError(
            f"data file {data_path} not found (the metadata {meta_path.name} describes it); "
            "copy it beside the metadata"
        )
    return _DataSource(data_path, 0, data_path.stat().st_size, str(data_path))


def _safe_member_name(name: str) -> bool:
    p = PurePosixPath(name)
    return not (p.is_absolute() or ".." in p.parts or name.startswith("\\") or ":" in p.parts[0])


def _archive_member(path: Path, recording: str | None) -> tuple[str, str, _DataSource]:
    if not path.exists():
        raise CaptureError(f"archive {path} not found")
    try:
        tar = tarfile.open(path, mode="r:")
    except (tarfile.TarError, OSError) as exc:
        raise CaptureError(f"{path} is not a readable SigMF archive (tar): {exc}") from None
    with tar:
        members = tar.getmembers()
        bad = [m.name for m in members if not _safe_member_name(m.name)]
        if bad:
            raise CaptureError(
                f"archive {path} has unsafe member path {bad[0]!r} (absolute or with '..'); "
                "refusing it"
            )
        metas = {
            PurePosixPath(m.name).name[: -len(META_EXT)]: m
            for m in members
            if m.isfile() and m.name.endswith(META_EXT)
        }
        if not metas:
            raise CaptureError(f"archive {path} holds no {META_EXT} file")
        if recording is None:
            if len(metas) > 1:
                raise CaptureError(
                    f"archive {path} holds {len(metas)} recordings ({', '.join(sorted(metas))}); "
                    "choose one with --recording NAME"
                )
            recording = next(iter(metas))
        if recording not in metas:
            raise CaptureError(
                f"archive {path} has no recording {recording!r}; "
                f"it holds {', '.join(sorted(metas))}"
            )
        meta_member = metas[recording]
        f = tar.extractfile(meta_member)
        try:
            meta_text = f.read().decode("utf-8")
        except UnicodeDecodeError:
            raise CaptureError(
                f"metadata {recording}{META_EXT} in {path} is not UTF-8 text"
            ) from None
        meta_dir = PurePosixPath(meta_member.name).parent
        try:
            glob = json.loads(meta_text).get("global", {})
        except (json.JSONDecodeError, AttributeError):
            glob = {}
        data_name = glob.get("core:dataset") if isinstance(glob, dict) else None
        data_name = data_name if isinstance(data_name, str) else recording + DATA_EXT
        want = str(meta_dir / data_name) if str(meta_dir) != "." else data_name
        data_member = next((m for m in members if m.name == want and m.isfile()), None)
        if data_member is None:
            raise CaptureError(f"archive {path} lacks the data member {want} of {recording!r}")
        if data_member.sparse is not None:
            raise CaptureError(f"archive member {want} is a sparse file; repack the archive")
        label = f"{path}:{want}"
        return (
            meta_text,
            f"{path}:{meta_member.name}",
            _DataSource(path, data_member.offset_data, data_member.size, label),
        )


def _positive_rate(value, label: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value):
        raise CaptureError(
            f"core:sample_rate {value!r} in {label} is not a number; give the rate in Hz "
            "(or --sample-rate)"
        )
    if value <= 0:
        raise CaptureError(f"core:sample_rate {value!r} in {label} must be positive")
    return float(value)


def _build_capture(meta, label, source, channel, sample_rate_override, verify, path) -> Capture:
    glob = meta["global"]
    dt = parse_datatype(glob["core:datatype"])
    if sample_rate_override is not None:
        rate = _positive_rate(sample_rate_override, "--sample-rate")
    elif "core:sample_rate" in glob:
        rate = _positive_rate(glob["core:sample_rate"], label)
    else:
        raise CaptureError(f"metadata {label} has no core:sample_rate; give --sample-rate")
    n_ch = glob.get("core:num_channels", 1)
    per_sample = dt.sample_bytes * n_ch
    ncd = "core:dataset" in glob
    trailing = int(glob.get("core:trailing_bytes", 0)) if ncd else 0
    captures = meta["captures"] or [{"core:sample_start": 0}]
    headers = [int(c.get("core:header_bytes", 0)) if ncd else 0 for c in captures]
    usable = source.size - sum(headers) - trailing
    if usable < 0:
        raise CaptureError(
            f"data {source.label} is shorter than its declared header/trailing bytes"
        )
    n_samples = usable // per_sample
    leftover = usable - n_samples * per_sample
    if n_samples == 0:
        raise CaptureError(
            f"data {source.label} holds no samples ({source.size} bytes for {dt.name} with "
            f"{n_ch} channel(s))"
        )
    if leftover:
        warnings.warn(
            f"{source.label}: {leftover} byte(s) after the last whole {dt.name} sample ignored "
            "(truncated file?)",
            CaptureWarning,
            stacklevel=3,
        )
    segments = []
    byte_pos = 0
    for i, cap in enumerate(captures):
        start = int(cap["core:sample_start"])
        stop = int(captures[i + 1]["core:sample_start"]) if i + 1 < len(captures) else n_samples
        stop = min(stop, n_samples)
        if start > n_samples:
            raise CaptureError(
                f"capture segment {i} starts at sample {start}, beyond the {n_samples} samples "
                f"in {source.label}"
            )
        byte_pos += headers[i]
        freq = cap.get("core:frequency")
        segments.append(
            Segment(
                start,
                max(stop - start, 0),
                None if freq is None else float(freq),
                cap.get("core:datetime"),
                byte_pos,
            )
        )
        byte_pos += max(stop - start, 0) * per_sample
    annotations = tuple(
        Annotation(
            int(a["core:sample_start"]), a.get("core:sample_count"), a.get("core:label"), dict(a)
        )
        for a in meta["annotations"]
    )
    if verify:
        verify_sha512(source, glob.get("core:sha512"))
    name = Path(label.split(":")[-1]).name
    for suffix in (META_EXT,):
        name = name[: -len(suffix)] if name.endswith(suffix) else name
    return Capture(
        sample_rate_hz=rate,
        datatype=dt,
        n_samples=n_samples,
        segments=tuple(segments),
        data_path=source.path,
        data_offset=source.offset,
        num_channels=n_ch,
        channel=channel,
        annotations=annotations,
        metadata=dict(glob),
        path=Path(path),
        name=name,
        leftover_bytes=leftover,
    )


def verify_sha512(source: _DataSource, expected: str | None, block: int = 1 << 24) -> None:
    """Stream the data bytes through SHA-512 and compare with ``core:sha512``."""
    if expected is None:
        raise CaptureError(f"--verify: the metadata of {source.label} has no core:sha512 to check")
    h = hashlib.sha512()
    with open(source.path, "rb") as f:
        f.seek(source.offset)
        left = source.size
        while left > 0:
            chunk = f.read(min(block, left))
            if not chunk:
                break
            h.update(chunk)
            left -= len(chunk)
    if h.hexdigest().lower() != expected.lower():
        raise CaptureError(
            f"--verify: {source.label} does not match core:sha512 (the data changed or is corrupt)"
        )
