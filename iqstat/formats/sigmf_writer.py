"""Writing SigMF recordings (``NAME.sigmf-meta`` + ``NAME.sigmf-data``) chunk by chunk.

The data file is written by us, not by the ``sigmf`` library: samples arrive in chunks, are
quantised with :func:`~iqstat.formats.datatypes.encode_components` (saturating, clipped
components counted) and hashed with SHA-512 as they are written. The metadata dict is built
here, validated with the library's schema validator plus a few stricter checks of our own, and
written last. Both files are first written under temporary names in the target directory and
renamed at the end, so a failure never leaves a half-written pair.

Full-scale convention (matches the sigmf library's autoscale): signed integers v/2^(b−1)
(ci16: v/32768), unsigned (v − 2^(b−1))/2^(b−1) (cu8: (v − 128)/128).

References
----------
.. [1] SigMF specification v1.2.x, "SigMF Recording", "Global Object", "Captures Array",
   "Annotations Array", "Dataset Format" sections.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import re
import tempfile
from collections.abc import Iterable, Sequence
from pathlib import Path

import numpy as np
import sigmf
import sigmf.validate

from iqstat.errors import CaptureError, ParameterError
from iqstat.formats.datatypes import DataType, encode_components, parse_datatype
from iqstat.formats.sigmf_reader import validate_metadata

META_EXT = ".sigmf-meta"
DATA_EXT = ".sigmf-data"

#: RFC 3339 in UTC with a ``Z`` suffix, as the SigMF specification asks for core:datetime.
_DATETIME_Z = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d+)?Z$")
_FIELD = re.compile(r"^(?P<ns>[A-Za-z][A-Za-z0-9_]*):(?P<name>[A-Za-z_][A-Za-z0-9_]*)$")

#: Samples per chunk when a whole array is passed in.
WRITE_CHUNK_SAMPLES = 1 << 20


class WrittenRecording(tuple):
    """``(meta_path, data_path)``, with the facts of the write as attributes.

    Unpacks like a 2-tuple. Attributes: ``meta_path``, ``data_path``, ``n_samples``,
    ``n_clipped`` (components saturated by the integer datatype) and ``sha512`` (hex).
    """

    meta_path: Path
    data_path: Path
    n_samples: int
    n_clipped: int
    sha512: str

    def __new__(
        cls, meta_path: Path, data_path: Path, n_samples: int, n_clipped: int, sha512: str
    ) -> WrittenRecording:
        obj = super().__new__(cls, (meta_path, data_path))
        obj.meta_path = meta_path
        obj.data_path = data_path
        obj.n_samples = n_samples
        obj.n_clipped = n_clipped
        obj.sha512 = sha512
        return obj


def recording_paths(base_path: Path | str) -> tuple[Path, Path]:
    """``(NAME.sigmf-meta, NAME.sigmf-data)`` for a base name (a SigMF suffix is dropped)."""
    base = Path(base_path)
    if base.suffix in (META_EXT, DATA_EXT, ".sigmf"):
        base = base.with_suffix("")
    if not base.name:
        raise ParameterError(f"base_path {str(base_path)!r} has no file name; use e.g. out/burst01")
    return base.with_name(base.name + META_EXT), base.with_name(base.name + DATA_EXT)


def _jsonable(value):
    """Cast numpy scalars/arrays inside metadata to plain Python (the schema rejects numpy)."""
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return [_jsonable(v) for v in value.tolist()]
    if isinstance(value, np.bool_):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value)
    return value


def _encode_chunk(chunk: np.ndarray, dt: DataType, index: int) -> tuple[bytes, int, int]:
    """Interleave, quantise and serialise one chunk; returns (bytes, samples, clipped)."""
    x = np.asarray(chunk)
    if x.ndim != 1:
        raise ParameterError(f"sample chunk {index} has shape {x.shape}; give 1-D arrays")
    if dt.is_complex:
        if not (np.iscomplexobj(x) or np.issubdtype(x.dtype, np.number)):
            raise ParameterError(f"sample chunk {index} has dtype {x.dtype}; give complex samples")
        comps = np.empty(2 * x.size, dtype=np.float64)
        comps[0::2] = x.real
        comps[1::2] = x.imag if np.iscomplexobj(x) else 0.0
    else:
        if np.iscomplexobj(x):
            raise ParameterError(
                f"datatype {dt.name} is real but sample chunk {index} is complex; "
                "use a c… datatype such as cf32_le"
            )
        comps = x.astype(np.float64)
    if not np.all(np.isfinite(comps)):
        raise ParameterError(
            f"sample chunk {index} holds NaN or Inf; only finite samples can be written"
        )
    stored, n_clipped = encode_components(comps, dt)
    return stored.tobytes(), x.size, n_clipped


def _iter_chunks(samples: np.ndarray | Iterable[np.ndarray]) -> Iterable[np.ndarray]:
    if isinstance(samples, np.ndarray):
        flat = samples.reshape(-1) if samples.ndim == 1 else samples
        for a in range(0, max(flat.shape[0], 1), WRITE_CHUNK_SAMPLES):
            yield flat[a : a + WRITE_CHUNK_SAMPLES]
    else:
        yield from samples


def _check_namespaces(meta: dict) -> None:
    """Our strict checks: field names are ``ns:name`` and every non-core namespace is declared."""
    declared = {"core"} | {
        e.get("name") for e in meta["global"].get("core:extensions", []) if isinstance(e, dict)
    }
    objects = [("global", meta["global"])]
    objects += [(f"captures[{i}]", c) for i, c in enumerate(meta["captures"])]
    objects += [(f"annotations[{i}]", a) for i, a in enumerate(meta["annotations"])]
    for where, obj in objects:
        for key in obj:
            m = _FIELD.match(key)
            if m is None:
                raise ParameterError(
                    f"metadata field {key!r} in {where} is not 'namespace:name' with letters, "
                    "digits and '_'; rename it, e.g. iqstat:my_field"
                )
            if m["ns"] not in declared:
                raise ParameterError(
                    f"metadata field {key!r} in {where} uses namespace {m['ns']!r}, which "
                    "global core:extensions does not declare; add "
                    f'{{"name": "{m["ns"]}", "version": "…", "optional": true}}'
                )


def _check_annotations(annotations: list[dict]) -> list[dict]:
    out = []
    for i, a in enumerate(annotations):
        if not isinstance(a, dict) or "core:sample_start" not in a:
            raise ParameterError(f"annotation {i} {a!r} needs core:sample_start")
        start = a["core:sample_start"]
        if not isinstance(start, int) or isinstance(start, bool) or start < 0:
            raise ParameterError(f"annotation {i}: core:sample_start {start!r} must be an int >= 0")
        if ("core:freq_lower_edge" in a) != ("core:freq_upper_edge" in a):
            raise ParameterError(
                f"annotation {i} has only one frequency edge; give both core:freq_lower_edge "
                "and core:freq_upper_edge, or neither"
            )
        out.append(a)
    return sorted(out, key=lambda a: a["core:sample_start"])


def build_metadata(
    *,
    datatype: str,
    sample_rate_hz: float,
    sha512: str | None,
    frequency_hz: float | None = None,
    datetime_utc: str | None = None,
    description: str | None = None,
    author: str | None = None,
    recorder: str | None = None,
    annotations: Sequence[dict] = (),
    extra_global: dict | None = None,
) -> dict:
    """Build and validate a SigMF metadata dict (one capture segment from sample 0).

    Raises
    ------
    ParameterError
        For a bad argument (datetime not RFC 3339 with ``Z``, undeclared namespace, …).
    CaptureError
        If the result fails the sigmf library's schema validation.
    """
    parse_datatype(datatype)
    rate = float(sample_rate_hz)
    if not np.isfinite(rate) or rate <= 0:
        raise ParameterError(f"sample_rate_hz {sample_rate_hz!r} must be a positive number of Hz")
    glob: dict = {
        "core:datatype": datatype,
        "core:version": sigmf.__specification__,
        "core:sample_rate": rate,
    }
    if description is not None:
        glob["core:description"] = str(description)
    if author is not None:
        glob["core:author"] = str(author)
    if recorder is None:
        from iqstat import __version__

        recorder = f"iqstat synth {__version__}"
    glob["core:recorder"] = str(recorder)
    if sha512 is not None:
        glob["core:sha512"] = sha512
    if extra_global:
        clash = sorted(set(extra_global) & set(glob))
        if clash:
            raise ParameterError(
                f"extra_global sets {', '.join(clash)}, which the writer sets itself; "
                "pass them as arguments instead"
            )
        glob.update(_jsonable(dict(extra_global)))
    capture: dict = {"core:sample_start": 0}
    if frequency_hz is not None:
        f = float(frequency_hz)
        if not np.isfinite(f):
            raise ParameterError(f"frequency_hz {frequency_hz!r} must be a finite number of Hz")
        capture["core:frequency"] = f
    if datetime_utc is not None:
        if not isinstance(datetime_utc, str) or not _DATETIME_Z.match(datetime_utc):
            raise ParameterError(
                f"datetime_utc {datetime_utc!r} is not RFC 3339 UTC; write e.g. "
                "2026-04-01T06:30:00Z (SigMF requires the Z suffix)"
            )
        capture["core:datetime"] = datetime_utc
    meta = {
        "global": glob,
        "captures": [capture],
        "annotations": _check_annotations(_jsonable(list(annotations))),
    }
    _check_namespaces(meta)
    validate_metadata(meta, "metadata to be written")
    return meta


def write_recording(
    base_path: Path | str,
    samples: np.ndarray | Iterable[np.ndarray],
    *,
    datatype: str,
    sample_rate_hz: float,
    frequency_hz: float | None = None,
    datetime_utc: str | None = None,
    description: str | None = None,
    author: str | None = None,
    annotations: Sequence[dict] = (),
    extra_global: dict | None = None,
    overwrite: bool = False,
    recorder: str | None = None,
) -> WrittenRecording:
    """Write a SigMF recording from full-scale samples, chunk by chunk.

    Parameters
    ----------
    base_path : Path or str
        ``out/NAME`` (a ``.sigmf-meta``/``.sigmf-data`` suffix is dropped).
    samples : ndarray or iterable of ndarray, shape (n,) each
        Complex samples for ``c…`` datatypes, real for ``r…``; full scale ±1. An iterable is
        consumed once, so peak memory is one chunk.
    datatype : str
        SigMF datatype, e.g. ``"ci16_le"``, ``"cu8"``, ``"cf32_le"``.
    sample_rate_hz : float
        ``core:sample_rate`` [Hz].
    frequency_hz : float, optional
        Centre frequency of the capture segment ``core:frequency`` [Hz].
    datetime_utc : str, optional
        ``core:datetime`` of sample 0, RFC 3339 with ``Z``.
    description, author : str, optional
        ``core:description``, ``core:author``.
    annotations : sequence of dict
        SigMF annotation objects (sorted by ``core:sample_start`` here).
    extra_global : dict, optional
        More global fields; non-core namespaces must be declared in ``core:extensions``.
    overwrite : bool
        Replace an existing pair; otherwise existing files raise :class:`CaptureError`.
    recorder : str, optional
        ``core:recorder``; default ``"iqstat synth <version>"``.

    Returns
    -------
    WrittenRecording
        ``(meta_path, data_path)`` with ``n_samples``, ``n_clipped`` and ``sha512``.
    """
    dt = parse_datatype(datatype)
    meta_path, data_path = recording_paths(base_path)
    if not overwrite:
        existing = [str(p) for p in (meta_path, data_path) if p.exists()]
        if existing:
            raise CaptureError(
                f"{' and '.join(existing)} already exist; choose another name or pass "
                "overwrite=True (--overwrite) to replace them"
            )
    directory = meta_path.parent
    if not directory.is_dir():
        raise CaptureError(f"output directory {directory} does not exist; create it first")
    # validate the arguments before writing any data
    build_metadata(
        datatype=datatype, sample_rate_hz=sample_rate_hz, sha512=None, frequency_hz=frequency_hz,
        datetime_utc=datetime_utc, description=description, author=author, recorder=recorder,
        annotations=annotations, extra_global=extra_global,
    )  # fmt: skip

    tmp_paths: list[Path] = []
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{data_path.name}.", suffix=".tmp", dir=directory)
        tmp_data = Path(tmp)
        tmp_paths.append(tmp_data)
        hasher = hashlib.sha512()
        n_samples = n_clipped = 0
        with os.fdopen(fd, "wb") as fh:
            for i, chunk in enumerate(_iter_chunks(samples)):
                raw, n, c = _encode_chunk(chunk, dt, i)
                fh.write(raw)
                hasher.update(raw)
                n_samples += n
                n_clipped += c
        if n_samples == 0:
            raise ParameterError("samples are empty; a recording needs at least one sample")
        digest = hasher.hexdigest()
        meta = build_metadata(
            datatype=datatype, sample_rate_hz=sample_rate_hz, sha512=digest,
            frequency_hz=frequency_hz, datetime_utc=datetime_utc, description=description,
            author=author, recorder=recorder, annotations=annotations, extra_global=extra_global,
        )  # fmt: skip
        for a in meta["annotations"]:
            if a["core:sample_start"] >= n_samples:
                raise ParameterError(
                    f"annotation at sample {a['core:sample_start']} lies beyond the "
                    f"{n_samples} samples written"
                )
        fd, tmp = tempfile.mkstemp(prefix=f".{meta_path.name}.", suffix=".tmp", dir=directory)
        tmp_meta = Path(tmp)
        tmp_paths.append(tmp_meta)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(meta, fh, indent=2, ensure_ascii=False)
            fh.write("\n")
        for p in tmp_paths:
            os.chmod(p, 0o644)
        if not overwrite and (meta_path.exists() or data_path.exists()):
            raise CaptureError(
                f"{meta_path} or {data_path} appeared while writing; pass overwrite=True "
                "to replace them"
            )
        os.replace(tmp_data, data_path)
        os.replace(tmp_meta, meta_path)
        tmp_paths.clear()
    except OSError as exc:
        raise CaptureError(f"cannot write {data_path}: {exc.strerror or exc}") from None
    finally:
        for p in tmp_paths:
            with contextlib.suppress(OSError):
                p.unlink()
    return WrittenRecording(meta_path, data_path, n_samples, n_clipped, digest)
