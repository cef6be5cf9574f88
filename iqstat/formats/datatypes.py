"""SigMF sample datatypes: parsing the datatype string and converting raw samples.

The grammar and scaling follow the SigMF specification v1.2.x, section "Dataset Format"
(the ``core:datatype`` field): ``(r|c)`` then ``(f64|f32|i32|i16|u32|u16)`` with ``_le`` or
``_be``, or ``(r|c)(i8|u8)``; complex samples are interleaved I, Q. Integer samples map to
[-1, 1) "full scale": signed values are divided by 2**(bits-1); unsigned values have
2**(bits-1) subtracted first (so cu8 is (v - 128) / 128), as the sigmf library's autoscale does.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from iqstat.errors import CaptureError

_DATATYPE = re.compile(r"^(?P<cplx>[rc])(?P<kind>[fiu])(?P<bits>8|16|32|64)(?P<endian>_le|_be)?$")
_VALID = {("f", 32), ("f", 64), ("i", 32), ("i", 16), ("u", 32), ("u", 16), ("i", 8), ("u", 8)}

ALL_DATATYPES: tuple[str, ...] = tuple(
    f"{c}{k}{b}{e}"
    for c in "rc"
    for k, b in [("f", 64), ("f", 32), ("i", 32), ("i", 16), ("u", 32), ("u", 16)]
    for e in ("_le", "_be")
) + tuple(f"{c}{k}8" for c in "rc" for k in "iu")


@dataclass(frozen=True)
class DataType:
    """A parsed SigMF datatype.

    Attributes
    ----------
    name : str
        The SigMF string, e.g. ``"ci16_le"``.
    is_complex : bool
        True for ``c…`` types (interleaved I/Q), False for real ``r…`` types.
    kind : str
        ``"f"`` float, ``"i"`` signed integer, ``"u"`` unsigned integer.
    bits : int
        Bits per component.
    endian : str
        ``"<"``, ``">"`` or ``"|"`` (single byte).
    """

    name: str
    is_complex: bool
    kind: str
    bits: int
    endian: str

    @property
    def component_dtype(self) -> np.dtype:
        """numpy dtype of one component (I or Q) as stored."""
        return np.dtype(f"{self.endian}{self.kind}{self.bits // 8}")

    @property
    def components(self) -> int:
        """Components per sample per channel: 2 for complex, 1 for real."""
        return 2 if self.is_complex else 1

    @property
    def sample_bytes(self) -> int:
        """Bytes per sample of one channel."""
        return self.components * self.bits // 8

    @property
    def is_integer(self) -> bool:
        return self.kind in "iu"

    @property
    def scale(self) -> float:
        """Factor applied after the offset to reach full scale ±1 (1 for floats)."""
        return 1.0 if self.kind == "f" else 1.0 / float(2 ** (self.bits - 1))

    @property
    def offset(self) -> float:
        """Value subtracted before scaling (2**(bits-1) for unsigned types, else 0)."""
        return float(2 ** (self.bits - 1)) if self.kind == "u" else 0.0

    @property
    def full_scale_max(self) -> float:
        """Largest stored component value (for clipping statistics); inf for floats."""
        if self.kind == "i":
            return float(2 ** (self.bits - 1) - 1)
        if self.kind == "u":
            return float(2**self.bits - 1)
        return float("inf")

    @property
    def full_scale_min(self) -> float:
        """Smallest stored component value; -inf for floats."""
        if self.kind == "i":
            return float(-(2 ** (self.bits - 1)))
        if self.kind == "u":
            return 0.0
        return float("-inf")


def parse_datatype(name: str) -> DataType:
    """Parse and strictly validate a SigMF datatype string.

    Raises
    ------
    CaptureError
        If the string is not one of the 28 datatypes of the SigMF specification
        (e.g. ``"cf32"`` without byte order, or ``"cf32_lexyz"``).
    """
    if not isinstance(name, str):
        raise CaptureError(
            f"datatype {name!r} is not a string; use a SigMF datatype such as ci16_le"
        )
    m = _DATATYPE.match(name)
    if m is None or (m["kind"], int(m["bits"])) not in _VALID:
        raise CaptureError(
            f"unknown datatype {name!r}; valid SigMF datatypes are e.g. cf32_le, ci16_le, cu8, "
            "ri16_be (see the SigMF specification, core:datatype)"
        )
    bits = int(m["bits"])
    if bits == 8:
        if m["endian"]:
            raise CaptureError(
                f"datatype {name!r}: 8-bit types take no byte order; write {name[:-3]}"
            )
        endian = "|"
    else:
        if not m["endian"]:
            raise CaptureError(
                f"datatype {name!r} lacks its byte order; write {name}_le or {name}_be"
            )
        endian = "<" if m["endian"] == "_le" else ">"
    return DataType(name, m["cplx"] == "c", m["kind"], bits, endian)


def convert_components(raw: np.ndarray, dt: DataType, out: np.ndarray | None = None) -> np.ndarray:
    """Convert stored components to float32 full-scale values.

    Parameters
    ----------
    raw : ndarray of ``dt.component_dtype``, shape (n,)
        Stored components (interleaved I, Q for complex types).
    dt : DataType
    out : ndarray of float32, shape (n,), optional
        Reused buffer.

    Returns
    -------
    ndarray of float32, shape (n,)
    """
    if out is None:
        out = np.empty(raw.shape, dtype=np.float32)
    if dt.offset or dt.scale == 1.0:
        np.copyto(out, raw, casting="unsafe")
        if dt.offset:
            out -= np.float32(dt.offset)
        if dt.scale != 1.0:
            out *= np.float32(dt.scale)
    else:
        # One pass: integer × float32 scale computed in float32 (a power of two: exact).
        np.multiply(raw, np.float32(dt.scale), out=out, casting="unsafe")
    return out


def encode_components(values: np.ndarray, dt: DataType) -> tuple[np.ndarray, int]:
    """Quantise full-scale float components to a stored datatype, saturating.

    Parameters
    ----------
    values : ndarray of float, shape (n,)
        Components in full-scale units (±1).
    dt : DataType

    Returns
    -------
    stored : ndarray of ``dt.component_dtype``
    n_clipped : int
        Components that exceeded the representable range and were saturated.
    """
    values = np.asarray(values, dtype=np.float64)
    if dt.kind == "f":
        return values.astype(dt.component_dtype), 0
    q = np.rint(values / dt.scale + dt.offset)
    lo, hi = dt.full_scale_min, dt.full_scale_max
    n_clipped = int(np.count_nonzero((q < lo) | (q > hi)))
    np.clip(q, lo, hi, out=q)
    return q.astype(dt.component_dtype), n_clipped
