"""Receiver gain steps (AGC): the samples brought back to one noise level before measuring.

A receiver whose gain changes during a capture (an automatic gain control, a gain switched by
hand) scales the noise and the bursts alike. Each burst's correlator Eb/N0 does not care (its
noise is measured with it), but the burst detection does: its threshold is set on the noise of
the quieter part, so that the louder part's noise reads as one long burst and its gaps vanish,
and the band survey sees every bin come and go. The survey notices such steps (every bin's
level moves at once, :func:`iqstat.bursts.band._level_steps`); the detection then tracks the
noise level frame by frame outside the signal band, where there is only noise whatever the
bursts do (the frames' out-of-band power, a running median over :data:`TRACK_FRAMES` frames),
and :class:`LevelNormalisedCapture` divides the samples by the square root of that level over
its median, so that the measurement sees one noise level throughout.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.ndimage import median_filter

from iqstat.capture import Capture, CorrectedCapture

__all__ = ["TRACK_FRAMES", "LevelNormalisedCapture", "gain_track"]

#: Frames of the running median of the out-of-band power (the step is placed to a few frames;
#: one frame's out-of-band power has a relative spread of 1/√(L − |B|), ~6 % at 256 samples).
TRACK_FRAMES = 9


#: The track is kept when the medians of its blocks of SPAN_BLOCK_FRAMES frames differ by
#: more than SPAN_MIN_DB and by more than SPAN_Z standard errors: the survey's test of every
#: bin at once can also be moved by strong bursts that fill most of the band.
SPAN_BLOCK_FRAMES, SPAN_MIN_DB, SPAN_Z = 64, 0.5, 6.0


def gain_track(out_of_band: np.ndarray, shape: float) -> tuple[np.ndarray | None, float]:
    """Per-frame noise level over its median, from the frames' out-of-band mean powers (each
    Gamma with shape ``shape``, the out-of-band bins), and how far it moves (dB); (None, 0.0)
    when it does not move significantly.

    The span is that of the medians of blocks of SPAN_BLOCK_FRAMES frames, whose relative
    standard error is about √(π/2)/√(shape·frames) (the normal approximation of a median,
    common practice, no source).
    """
    level = median_filter(out_of_band.astype(np.float64), size=TRACK_FRAMES, mode="nearest")
    ref = float(np.median(level))
    n_blocks = len(out_of_band) // SPAN_BLOCK_FRAMES
    if not ref > 0 or n_blocks < 2 or not shape > 0:
        return None, 0.0
    blocks = np.array_split(out_of_band.astype(np.float64), n_blocks)
    med = np.array([np.median(b) for b in blocks])
    if not np.all(med > 0):
        return None, 0.0
    se = math.sqrt(math.pi / 2.0) / math.sqrt(shape * len(out_of_band) / n_blocks)
    ratio = float(med.max() / med.min())
    if 10.0 * math.log10(ratio) < SPAN_MIN_DB or ratio - 1.0 < 2.0 * SPAN_Z * se:
        return None, 0.0
    return np.maximum(level / ref, 1e-6).astype(np.float32), 10.0 * math.log10(ratio)


class LevelNormalisedCapture(CorrectedCapture):
    """A capture read with each frame's samples divided by √(its noise level / the median)."""

    def __init__(self, base: Capture, track: np.ndarray, frame_samples: int) -> None:
        super().__init__(base)
        self.gain = np.asarray(track, dtype=np.float32)
        self.frame_samples = int(frame_samples)

    def _correct(self, start: int, x: np.ndarray, scale: float) -> None:
        frames = np.minimum((start + np.arange(len(x))) // self.frame_samples, len(self.gain) - 1)
        x *= (1.0 / np.sqrt(self.gain[frames])).astype(np.float32)
