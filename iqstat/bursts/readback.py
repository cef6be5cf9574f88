"""Samples read back from a capture: windows at given starts, and exact powers of sample ranges.

The streaming pass keeps only per-frame figures; the band survey, the edge refinement, the I/Q
imbalance of the gaps and the bursts' mean powers read a few samples back by position.
:func:`_read_windows` reads nearby windows with one positional read per span (one read costs
about as much as converting a few thousand samples). :func:`_mean_power` takes the whole frames
of a sample range from the frame powers and sums (Σ|x − dc|² = Σ|x|² − 2·Re(dc*·Σx) + L·|dc|²
per frame) and reads only the partial frames at its ends.
"""

from __future__ import annotations

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from iqstat.bursts.results import FramePowers
from iqstat.capture import Capture

# Edge refinement reads regions less than this many samples apart with one call (one
# positional read costs about 10 us, as much as converting a few thousand samples), in spans of
# about _READ_SPAN_MAX.
_READ_MERGE_GAP = 1 << 12
_READ_SPAN_MAX = 1 << 19


def _read_windows(capture: Capture, starts: np.ndarray, width: int) -> np.ndarray:
    """Samples ``[starts_i, starts_i + width)`` of a capture as rows (zeros past its end).

    Parameters
    ----------
    capture : Capture
    starts : ndarray of int, shape (n,)
        First sample of each window, sorted ascending.
    width : int

    Returns
    -------
    ndarray of complex64, shape (n, width)

    Notes
    -----
    Windows less than ``_READ_MERGE_GAP`` samples apart are read with one call (one read
    costs about as much as converting that many samples), in spans of about
    ``_READ_SPAN_MAX`` samples; the rows are copied out of each span's samples through a
    sliding-window view.
    """
    starts = np.asarray(starts, dtype=np.int64)
    out = np.empty((starts.size, width), dtype=np.complex64)
    if starts.size == 0:
        return out
    new = np.ones(starts.size, dtype=bool)
    new[1:] = (starts[1:] > starts[:-1] + width + _READ_MERGE_GAP) | (
        starts[1:] // _READ_SPAN_MAX != starts[:-1] // _READ_SPAN_MAX
    )
    bounds = np.append(np.flatnonzero(new), starts.size).tolist()
    n = capture.n_samples
    for i0, i1 in zip(bounds[:-1], bounds[1:], strict=True):
        lo = int(starts[i0])
        hi = int(starts[i1 - 1]) + width
        x = capture.read(lo, min(hi, n) - lo)
        if x.size < hi - lo:
            x = np.concatenate((x, np.zeros(hi - lo - x.size, dtype=np.complex64)))
        if i1 - i0 == 1:
            out[i0] = x[:width]
        else:
            out[i0:i1] = sliding_window_view(x, width)[starts[i0:i1] - lo]
    return out


def _power64(x: np.ndarray) -> np.ndarray:
    """|x|² = re² + im² of complex64 samples, in float64."""
    v = np.square(x.view(np.float32), dtype=np.float64)
    return v[..., 0::2] + v[..., 1::2]


def _energy(x: np.ndarray) -> float:
    """Σ|x|² in float64 (the partial frames of :func:`_mean_power`)."""
    return float(np.sum(_power64(x)))


def _mean_power(
    capture: Capture,
    fp: FramePowers,
    s0: int,
    s1: int,
    end_energy: dict | None = None,
    dc: complex = 0j,
) -> float:
    """Mean |x − dc|² over samples [s0, s1): whole frames from the frame powers and sums,
    ends read back.

    ``end_energy`` may hold the partial ends' Σ|x − dc|² already (from
    :func:`iqstat.bursts.edges._refine_many`).
    Per frame, Σ|x − dc|² = Σ|x|² − 2·Re(dc*·Σx) + L·|dc|².
    """
    L = fp.frame_samples
    f0, f1 = -(-s0 // L), min(s1 // L, fp.full.size)
    if f1 - f0 < 1:
        x = capture.read(s0, s1 - s0) - np.complex64(dc)
        return float(np.mean(_power64(x))) if x.size else 0.0
    total = float(np.sum(fp.full[f0:f1], dtype=np.float64)) * L
    if dc:
        total += (f1 - f0) * L * abs(dc) ** 2 - 2.0 * float(
            (np.conj(dc) * fp.sums[f0:f1].sum()).real
        )
    for a, b in ((s0, f0 * L), (f1 * L, s1)):
        if b > a:
            known = None if end_energy is None else end_energy.get((a, b))
            if known is None:
                known = _energy(capture.read(a, b - a) - np.complex64(dc))
            total += known
    return total / (s1 - s0)
