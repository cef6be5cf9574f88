"""Burst detection: where in a capture are the bursts, and what is the noise between them.

Pipeline stage after reading the capture and before the link estimates. A spectrum survey picks
the signal's band; one streaming pass gives the per-frame full-band and in-band powers (and the
frames' sums, for the receiver's DC offset); a gamma-law hysteresis test at several smoothing
lengths finds and groups the detections; each edge is refined to one sample on band-limited
samples read back; the noise-only gaps give the noise variance, the noise PSD, the DC offset and
the I/Q imbalance. Results: :class:`BurstDetection` holding one :class:`Burst` per burst.

Submodules:

* :mod:`~iqstat.bursts.detect`: everything (being split into one submodule per piece).
"""

from iqstat.bursts.detect import (
    Burst,
    BurstDetection,
    FramePowers,
    detect_bursts,
    measure_frame_powers,
    survey_capture,
)

__all__ = [
    "Burst",
    "BurstDetection",
    "FramePowers",
    "detect_bursts",
    "measure_frame_powers",
    "survey_capture",
]
