"""JSON output helpers: no NaN ever reaches a file, numpy scalars become Python numbers."""

from __future__ import annotations

import json
import math
import os
import sys
import tempfile
from collections.abc import Iterable
from pathlib import Path

import numpy as np

from iqstat.errors import ParameterError

_PLAIN = (str, int, bool, type(None))


def json_safe(obj):
    """Recursively convert to JSON-safe values: NaN/Inf → None, numpy → Python, tuples → lists."""
    t = type(obj)
    if t is float:
        return obj if math.isfinite(obj) else None
    if t in _PLAIN:
        return obj
    if t is dict:
        return {str(k): json_safe(v) for k, v in obj.items()}
    if t is list or t is tuple:
        return [json_safe(v) for v in obj]
    return _json_safe_other(obj)


def _json_safe_other(obj):
    """:func:`json_safe` for the less common types (numpy values, subclasses)."""
    if isinstance(obj, dict):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [json_safe(v) for v in obj.tolist()]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if math.isfinite(v) else None
    return obj


def dumps_line(obj) -> str:
    """One-line JSON of ``obj`` as ``json.dumps(json_safe(obj), allow_nan=False)`` gives it,
    without walking ``obj`` when it needs no conversion.

    json's C encoder writes plain dicts, lists, tuples, str, int, float (numpy's float64 is
    one) and None as :func:`json_safe` would have them; a non-finite float comes out as a bare
    NaN/Infinity token, and numpy integers, bools and float32 raise TypeError. Either way the
    object takes the safe path. (A string holding the text NaN or Infinity only costs that.)
    """
    try:
        text = json.dumps(obj)
    except TypeError:
        return json.dumps(json_safe(obj), allow_nan=False)
    if "NaN" in text or "Infinity" in text:
        return json.dumps(json_safe(obj), allow_nan=False)
    return text


def dumps(obj) -> str:
    return json.dumps(json_safe(obj), indent=2, allow_nan=False) + "\n"


def write_json(obj, target: str | Path) -> None:
    """Write JSON to a path (atomically, via a temporary file) or to stdout for ``-``."""
    write_text(iter([dumps(obj)]), target)


def write_text(pieces: Iterable[str], target: str | Path) -> None:
    """Write text pieces to a path (atomically) or to stdout for ``-``, streaming them.

    Nothing is left at ``target`` unless the whole text was written: the pieces go to a
    temporary file in the same folder that replaces ``target`` at the end.
    """
    if str(target) == "-":
        for piece in pieces:
            sys.stdout.write(piece)
        return
    path = Path(target)
    if path.is_dir():
        raise ParameterError(f"--json {path} is a folder; give a file name")
    if not path.parent.exists():
        raise ParameterError(f"--json {path}: folder {path.parent} does not exist")
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            for piece in pieces:
                f.write(piece)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
