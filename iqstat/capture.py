"""Capture: a recording's metadata plus chunked access to its samples.

A :class:`Capture` never holds a whole file in memory. Samples are read on demand, each
window by one positional read of the data file into a new array (``os.preadv``), and
converted chunk by chunk to complex64 full-scale values. Non-finite float
samples (NaN, Inf) are erasures: they read as 0 and are counted.
"""

from __future__ import annotations

import abc
import datetime
import os
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from iqstat.errors import CaptureError, ParameterError
from iqstat.formats.datatypes import DataType, convert_components, parse_datatype

DEFAULT_CHUNK_SAMPLES = 1 << 20


def _pread_into(fd: int, buf: np.ndarray, offset: int) -> int:
    """Read ``buf.nbytes`` bytes at ``offset`` of ``fd`` into ``buf``; returns the bytes read.

    One positional read (``os.preadv``) straight into the array where the platform has it,
    else seek + readinto; short reads are continued until the end of the file.
    """
    view = memoryview(buf.reshape(-1).view(np.uint8))
    done = 0
    while done < len(view):
        if hasattr(os, "preadv"):
            n = os.preadv(fd, [view[done:]], offset + done)
        else:  # pragma: no cover - platforms without preadv
            os.lseek(fd, offset + done, os.SEEK_SET)
            n = os.readv(fd, [view[done:]])
        if n <= 0:
            break
        done += n
    return done


@dataclass(frozen=True)
class Segment:
    """A SigMF capture segment: a run of samples sharing centre frequency and start time.

    Attributes
    ----------
    sample_start : int
        Index of the segment's first sample in the recording.
    sample_count : int
        Samples in the segment.
    frequency_hz : float or None
        Centre frequency of the segment (``core:frequency``).
    datetime : str or None
        Time of the segment's first sample (``core:datetime``, RFC 3339).
    byte_offset : int
        Offset of the segment's first sample from the start of the data region (file or
        archive member), in bytes, header bytes included.
    """

    sample_start: int
    sample_count: int
    frequency_hz: float | None = None
    datetime: str | None = None
    byte_offset: int = 0

    @property
    def sample_stop(self) -> int:
        return self.sample_start + self.sample_count


@dataclass(frozen=True)
class Annotation:
    """A SigMF annotation kept from the recording (all its fields in ``fields``)."""

    sample_start: int
    sample_count: int | None
    label: str | None
    fields: dict = field(default_factory=dict, compare=False)


class Capture:
    """A recording opened for reading.

    Use :func:`iqstat.open_capture` to open files; :meth:`from_array` wraps an array (tests,
    notebooks). Samples are read with :meth:`read` or :meth:`iter_chunks`.

    Attributes
    ----------
    path : Path or None
        The data file (or archive) read.
    name : str
        A short name for reports.
    sample_rate_hz : float
    datatype : DataType
    n_samples : int
        Samples per channel.
    num_channels : int
    channel : int
        The channel read (0-based).
    segments : tuple of Segment
    annotations : tuple of Annotation
    metadata : dict
        The ``global`` object of the SigMF metadata (empty for raw files).
    leftover_bytes : int
        Bytes after the last whole sample that were ignored.
    """

    def __init__(
        self,
        *,
        sample_rate_hz: float,
        datatype: DataType,
        n_samples: int,
        segments: tuple[Segment, ...],
        data_path: Path | None = None,
        data_offset: int = 0,
        array: np.ndarray | None = None,
        num_channels: int = 1,
        channel: int = 0,
        annotations: tuple[Annotation, ...] = (),
        metadata: dict | None = None,
        path: Path | None = None,
        name: str = "capture",
        leftover_bytes: int = 0,
    ) -> None:
        if not (sample_rate_hz > 0 and np.isfinite(sample_rate_hz)):
            raise CaptureError(f"sample rate {sample_rate_hz!r} must be a positive number of Hz")
        if not 0 <= channel < num_channels:
            raise ParameterError(
                f"channel {channel} does not exist: the recording has {num_channels} channel(s), "
                f"choose --channel 0 to {num_channels - 1}"
            )
        self.sample_rate_hz = float(sample_rate_hz)
        self.datatype = datatype
        self.n_samples = int(n_samples)
        self.segments = segments
        self.num_channels = int(num_channels)
        self.channel = int(channel)
        self.annotations = annotations
        self.metadata = metadata or {}
        self.path = path
        self.name = name
        self.leftover_bytes = int(leftover_bytes)
        self._data_path = data_path
        self._data_offset = int(data_offset)
        self._array = array
        self._file = None

    # -- construction ---------------------------------------------------------------------
    @classmethod
    def from_array(
        cls,
        x: np.ndarray,
        sample_rate_hz: float,
        *,
        center_frequency_hz: float | None = None,
        name: str = "array",
    ) -> Capture:
        """Wrap an in-memory complex (or real) array as a capture (full-scale units)."""
        x = np.asarray(x)
        if x.ndim != 1:
            raise ParameterError(f"array capture must be 1-D, got shape {x.shape}")
        is_complex = np.iscomplexobj(x)
        dt = parse_datatype("cf32_le" if is_complex else "rf32_le")
        arr = x.astype(np.complex64 if is_complex else np.float32, copy=False)
        seg = (Segment(0, len(arr), center_frequency_hz, None, 0),)
        return cls(
            sample_rate_hz=sample_rate_hz,
            datatype=dt,
            n_samples=len(arr),
            segments=seg,
            array=arr,
            name=name,
        )

    # -- properties -----------------------------------------------------------------------
    @property
    def is_complex(self) -> bool:
        return self.datatype.is_complex

    @property
    def duration_s(self) -> float:
        return self.n_samples / self.sample_rate_hz

    @property
    def center_frequency_hz(self) -> float | None:
        """Centre frequency of the first segment (None if not recorded)."""
        return self.segments[0].frequency_hz if self.segments else None

    @property
    def start_datetime(self) -> str | None:
        return self.segments[0].datetime if self.segments else None

    def segment_of(self, sample: int) -> Segment:
        """The segment holding sample index ``sample``."""
        starts = [s.sample_start for s in self.segments]
        i = int(np.searchsorted(starts, sample, side="right")) - 1
        return self.segments[max(i, 0)]

    def sample_datetime(self, sample: int) -> str | None:
        """UTC time of sample ``sample`` (RFC 3339, ``Z``) from its segment's ``core:datetime``.

        None when the segment has no time. Fractional seconds are given to the microsecond.
        """
        seg = self.segment_of(sample)
        if seg.datetime is None:
            return None
        try:
            t0 = datetime.datetime.fromisoformat(seg.datetime.replace("Z", "+00:00"))
        except ValueError:
            return None
        t = t0 + datetime.timedelta(seconds=(sample - seg.sample_start) / self.sample_rate_hz)
        return t.astimezone(datetime.UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")

    # -- sample access --------------------------------------------------------------------
    def _map_components(self, index: int, first_item: int, n_items: int) -> np.ndarray:
        """Stored components ``[first_item, first_item + n_items)`` of segment ``index``.

        Read into a new array by one positional read of the data file (kept open by the
        capture): resident memory is just that array however large the file is, and a read
        costs no memory mapping (~10 µs for a burst instead of ~50-100 µs).
        """
        dt = self.datatype
        item = dt.component_dtype.itemsize
        seg = self.segments[index]
        out = np.empty(n_items, dtype=dt.component_dtype)
        offset = self._data_offset + seg.byte_offset + first_item * item
        got = _pread_into(self._fd(), out, offset)
        if got != out.nbytes:
            raise CaptureError(
                f"{self._data_path}: only {got} of {out.nbytes} bytes at offset {offset} could "
                "be read; the file is shorter than its metadata says (truncated, or still "
                "being written?)"
            )
        return out

    def _fd(self) -> int:
        """File descriptor of the data file, opened read-only on first use."""
        if self._file is None:
            self._file = os.open(self._data_path, os.O_RDONLY | getattr(os, "O_BINARY", 0))
        return self._file

    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        state["_file"] = None  # an open file does not travel to another process
        return state

    def __del__(self) -> None:
        self.close()

    def read(self, start: int = 0, count: int | None = None) -> np.ndarray:
        """Read samples ``[start, start + count)`` of the selected channel as complex64.

        Real recordings are returned as complex64 with zero imaginary part (check
        :attr:`is_complex`). Non-finite values read as 0.

        Parameters
        ----------
        start : int
            First sample index.
        count : int, optional
            Number of samples; default to the end of the recording.

        Returns
        -------
        ndarray of complex64, shape (count,)
        """
        start = int(start)
        stop = self.n_samples if count is None else min(self.n_samples, start + int(count))
        if start < 0 or start > self.n_samples:
            raise ParameterError(
                f"start sample {start} is outside the capture (0..{self.n_samples})"
            )
        stop = max(stop, start)
        out = np.empty(stop - start, dtype=np.complex64)
        self._read_into(start, stop, out)
        return out

    def _read_into(self, start: int, stop: int, out: np.ndarray) -> int:
        """Fill ``out[:stop-start]``; returns the number of non-finite samples replaced."""
        if self._array is not None:
            out[: stop - start] = self._array[start:stop]
            bad = ~np.isfinite(out[: stop - start])
            n_bad = int(np.count_nonzero(bad))
            if n_bad:
                out[: stop - start][bad] = 0
            return n_bad
        n_bad = 0
        pos = start
        for i, seg in enumerate(self.segments):
            if pos >= stop:
                break
            if seg.sample_stop <= pos or seg.sample_count == 0:
                continue
            a, b = pos, min(stop, seg.sample_stop)
            n_bad += self._read_segment(i, a, b, out[a - start : b - start])
            pos = b
        return n_bad

    def _read_segment(self, index: int, a: int, b: int, out: np.ndarray) -> int:
        dt = self.datatype
        seg = self.segments[index]
        per_sample_items = dt.components * self.num_channels
        first = (a - seg.sample_start) * per_sample_items
        raw = self._map_components(index, first, (b - a) * per_sample_items)
        if self.num_channels > 1:
            raw = raw.reshape(b - a, self.num_channels, dt.components)[:, self.channel, :].ravel()
        if dt.is_complex:
            buf = out.view(np.float32)
            convert_components(raw, dt, out=buf)
        else:
            re = convert_components(raw, dt)
            out.real = re
            out.imag = 0
        if dt.kind == "f":
            bad = ~np.isfinite(out)
            n_bad = int(np.count_nonzero(bad))
            if n_bad:
                out[bad] = 0
            return n_bad
        return 0

    def iter_chunks(
        self,
        chunk_samples: int = DEFAULT_CHUNK_SAMPLES,
        start: int = 0,
        stop: int | None = None,
    ) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(start_index, samples)`` chunks of complex64 over ``[start, stop)``.

        The yielded array is a reused buffer: copy it if you keep it past the next iteration.
        """
        stop = self.n_samples if stop is None else min(int(stop), self.n_samples)
        buf = np.empty(int(chunk_samples), dtype=np.complex64)
        for a in range(int(start), stop, int(chunk_samples)):
            b = min(stop, a + int(chunk_samples))
            self._read_into(a, b, buf)
            yield a, buf[: b - a]

    def iter_chunks_counted(
        self, chunk_samples: int = DEFAULT_CHUNK_SAMPLES
    ) -> Iterator[tuple[int, np.ndarray, int]]:
        """Like :meth:`iter_chunks` over the whole capture, also yielding the erasure count."""
        buf = np.empty(int(chunk_samples), dtype=np.complex64)
        for a in range(0, self.n_samples, int(chunk_samples)):
            b = min(self.n_samples, a + int(chunk_samples))
            n_bad = self._read_into(a, b, buf)
            yield a, buf[: b - a], n_bad

    def iter_raw_chunks(
        self, chunk_samples: int = DEFAULT_CHUNK_SAMPLES
    ) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(start_index, stored components)`` of the selected channel, unconverted.

        Used by the facts pass to count samples at full scale in integer recordings.
        Array-backed captures yield nothing.
        """
        if self._array is not None:
            return
        dt = self.datatype
        per = dt.components * self.num_channels
        for i, seg in enumerate(self.segments):
            if seg.sample_count == 0:
                continue
            for a in range(seg.sample_start, seg.sample_stop, int(chunk_samples)):
                b = min(seg.sample_stop, a + int(chunk_samples))
                first = (a - seg.sample_start) * per
                raw = self._map_components(i, first, (b - a) * per)
                if self.num_channels > 1:
                    raw = raw.reshape(b - a, self.num_channels, dt.components)[:, self.channel, :]
                yield a, raw.reshape(b - a, dt.components)

    def close(self) -> None:
        """Close the data file (it is opened again if the capture is read later)."""
        fd, self._file = getattr(self, "_file", None), None
        if fd is not None:
            os.close(fd)

    def __enter__(self) -> Capture:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return (
            f"Capture({self.name!r}, {self.datatype.name}, {self.n_samples} samples, "
            f"{self.sample_rate_hz:g} Hz)"
        )


class CorrectedCapture(Capture, abc.ABC):
    """A capture read through a correction of its samples: every read path of the capture it
    wraps (``base``, which may itself be corrected), then :meth:`_correct`.

    Subclasses define ``_correct(start, x, scale)``, which corrects in place the samples
    ``x`` starting at index ``start`` that are in units of ``scale`` × full scale (1 for
    :meth:`read`; the integer type's scale for the unscaled chunks of the facts pass). The
    stored components (:meth:`iter_raw_chunks`) stay those of the recording.
    """

    def __init__(self, base: Capture) -> None:
        self.__dict__.update(base.__getstate__())
        self._file = None
        self._base = base

    @abc.abstractmethod
    def _correct(self, start: int, x: np.ndarray, scale: float) -> None:
        """Correct ``x`` (samples from index ``start``, in units of ``scale``) in place."""

    def _read_into(self, start: int, stop: int, out: np.ndarray) -> int:
        n_bad = self._base._read_into(start, stop, out)
        self._correct(start, out[: stop - start], 1.0)
        return n_bad

    def iter_raw_chunks(self, chunk_samples: int = DEFAULT_CHUNK_SAMPLES):
        yield from self._base.iter_raw_chunks(chunk_samples)

    def correct_unscaled(self, start: int, x: np.ndarray, scale: float) -> None:
        """Apply the corrections of the whole chain to unscaled samples (innermost first)."""
        if isinstance(self._base, CorrectedCapture):
            self._base.correct_unscaled(start, x, scale)
        self._correct(start, x, scale)
