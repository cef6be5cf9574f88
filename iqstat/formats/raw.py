"""Raw IQ files without metadata (``.cu8``, ``.cs16``, ``.cf32``-style dumps).

The datatype (a SigMF datatype name) and the sample rate must be given: a raw file says
nothing about itself, and guessing either would silently corrupt every figure.
"""

from __future__ import annotations

import warnings
from pathlib import Path

from iqstat.capture import Capture, Segment
from iqstat.errors import CaptureError, CaptureWarning
from iqstat.formats.datatypes import parse_datatype

# Common raw-dump suffixes and the SigMF datatype they usually hold (only used to suggest).
_SUFFIX_HINTS = {
    ".cu8": "cu8",
    ".cs8": "ci8",
    ".cs16": "ci16_le",
    ".cf32": "cf32_le",
    ".cfile": "cf32_le",
    ".raw": "cu8",
    ".bin": "ci16_le",
    ".iq": "ci16_le",
}


def open_raw(
    path: Path,
    *,
    datatype: str | None,
    sample_rate_hz: float | None,
    center_frequency_hz: float | None = None,
    header_bytes: int = 0,
    num_channels: int = 1,
    channel: int = 0,
) -> Capture:
    """Open a raw sample file given its datatype and sample rate."""
    if not path.exists():
        raise CaptureError(f"capture file {path} not found")
    if datatype is None or sample_rate_hz is None:
        hint = _SUFFIX_HINTS.get(path.suffix.lower())
        example = f" (for {path.suffix} files usually --datatype {hint})" if hint else ""
        missing = " and ".join(
            n for n, v in (("--datatype", datatype), ("--sample-rate", sample_rate_hz)) if v is None
        )
        raise CaptureError(f"{path.name} has no SigMF metadata: give {missing}{example}")
    dt = parse_datatype(datatype)
    if not sample_rate_hz > 0:
        raise CaptureError(f"--sample-rate {sample_rate_hz!r} must be positive")
    if header_bytes < 0:
        raise CaptureError(f"--header-bytes {header_bytes} must not be negative")
    size = path.stat().st_size
    per_sample = dt.sample_bytes * num_channels
    usable = size - header_bytes
    n_samples = max(usable, 0) // per_sample
    if n_samples == 0:
        raise CaptureError(f"{path} holds no samples ({size} bytes, {dt.name})")
    leftover = usable - n_samples * per_sample
    if leftover:
        warnings.warn(
            f"{path.name}: {leftover} byte(s) after the last whole {dt.name} sample ignored "
            "(truncated file?)",
            CaptureWarning,
            stacklevel=2,
        )
    return Capture(
        sample_rate_hz=sample_rate_hz,
        datatype=dt,
        n_samples=n_samples,
        segments=(Segment(0, n_samples, center_frequency_hz, None, header_bytes),),
        data_path=path,
        num_channels=num_channels,
        channel=channel,
        path=path,
        name=path.name,
        leftover_bytes=leftover,
    )
