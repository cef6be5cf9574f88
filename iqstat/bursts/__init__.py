"""Burst detection: where in a capture are the bursts, and what is the noise between them.

Pipeline stage after reading the capture and before the link estimates. A spectrum survey picks
the signal's band; one streaming pass gives the per-frame full-band and in-band powers (and the
frames' sums, for the receiver's DC offset); a gamma-law hysteresis test at several smoothing
lengths finds and groups the detections; each edge is refined to one sample on band-limited
samples read back; the noise-only gaps give the noise variance, the noise PSD, the DC offset and
the I/Q imbalance. Results: :class:`BurstDetection` holding one :class:`Burst` per burst.

Submodules, in data-flow order:

* :mod:`~iqstat.bursts.results`: the results :class:`Burst`, :class:`BurstDetection` and the
  detector's input :class:`FramePowers`.
* :mod:`~iqstat.bursts.readback`: samples read back by position (windows, and the exact mean
  power of a sample range from the frame powers plus its partial end frames).
* :mod:`~iqstat.bursts.band`: the default frame length, DFT bins of a band, and the spectrum
  survey that picks the occupied band and gives a per-bin noise reference.
* :mod:`~iqstat.bursts.frame_powers`: the streaming pass, :func:`measure_frame_powers`.
* :mod:`~iqstat.bursts.frame_detection`: gamma-law hysteresis at several smoothing lengths,
  grouping of the detections into bursts with edge windows, splitting of long groups.
* :mod:`~iqstat.bursts.edges`: edge refinement to one sample (change points with known levels).
* :mod:`~iqstat.bursts.detect`: the entry points :func:`detect_bursts` and
  :func:`survey_capture`, with the noise, DC offset and I/Q figures of the gaps.
"""

from iqstat.bursts.detect import detect_bursts, survey_capture
from iqstat.bursts.frame_powers import measure_frame_powers
from iqstat.bursts.results import Burst, BurstDetection, ContinuousLine, FramePowers

__all__ = [
    "Burst",
    "BurstDetection",
    "ContinuousLine",
    "FramePowers",
    "detect_bursts",
    "measure_frame_powers",
    "survey_capture",
]
