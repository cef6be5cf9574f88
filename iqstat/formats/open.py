"""Open any supported capture: SigMF recording or archive, or a raw file with parameters."""

from __future__ import annotations

from pathlib import Path

from iqstat.capture import Capture
from iqstat.errors import CaptureError
from iqstat.formats.raw import open_raw
from iqstat.formats.sigmf_reader import DATA_EXT, META_EXT, is_sigmf_path, open_sigmf


def open_capture(
    path: str | Path,
    *,
    datatype: str | None = None,
    sample_rate_hz: float | None = None,
    center_frequency_hz: float | None = None,
    header_bytes: int = 0,
    channel: int = 0,
    recording: str | None = None,
    verify: bool = False,
) -> Capture:
    """Open a capture for reading.

    Parameters
    ----------
    path : str or Path
        A SigMF ``.sigmf-meta``, ``.sigmf-data``, base name or ``.sigmf`` archive, or a raw
        sample file.
    datatype : str, optional
        SigMF datatype of a raw file (e.g. ``"cu8"``, ``"ci16_le"``); required for raw files.
    sample_rate_hz : float, optional
        Required for raw files; overrides nothing in SigMF unless the metadata lacks it.
    center_frequency_hz : float, optional
        Centre frequency of a raw file.
    header_bytes : int
        Bytes to skip at the start of a raw file.
    channel : int
        Channel to read from a multi-channel recording.
    recording : str, optional
        Recording to read from an archive holding several.
    verify : bool
        Check SigMF data against ``core:sha512`` (reads the whole file once).

    Returns
    -------
    Capture
    """
    p = Path(path)
    if p.is_dir():
        raise CaptureError(f"{p} is a folder; give a capture file")
    if is_sigmf_path(p):
        if datatype is not None:
            raise CaptureError(
                f"--datatype is for raw files; {p.name} is SigMF and states its own datatype"
            )
        return open_sigmf(
            p, channel=channel, recording=recording, sample_rate_hz=sample_rate_hz, verify=verify
        )
    if not p.exists():
        raise CaptureError(f"capture file {p} not found")
    if p.name.endswith((META_EXT, DATA_EXT)):
        raise CaptureError(f"{p} looks like SigMF but its pair is missing")
    return open_raw(
        p,
        datatype=datatype,
        sample_rate_hz=sample_rate_hz,
        center_frequency_hz=center_frequency_hz,
        header_bytes=header_bytes,
        channel=channel,
    )
