"""Symbol synchronisation: fractional timing, sample-clock offset and frame alignment.

A burst's samples and the link's tones become a symbol grid (start t0 and period P, both
fractional, in receiver samples); the known header is then found in the hard decisions made
on that grid. Submodules, in data-flow order:

- :mod:`iqstat.sync.grid`: the grid (:class:`SymbolTiming`), its timing model, and the block
  clock fit and clock decision both timing paths share.
- :mod:`iqstat.sync.block_rate`: the fast path of a batch, :func:`time_and_correlate_many`
  (block-rate mixing, the decimated Oerder–Meyr feature, :func:`recover_timing_blocks_many`,
  and the correlator bank from the same block sums).
- :mod:`iqstat.sync.full_rate`: :func:`recover_timing` and :func:`recover_timing_many`, the
  full-rate feature and the matched-energy search, for bursts whose symbol-rate line is below
  STRONG_LINE_DB (``coarse=`` the decimated grid).
- :mod:`iqstat.sync.frame`: :func:`align_frame` and :func:`align_frame_many`, the header in
  the hard decisions (bit errors by FFT correlation, soft metric among candidates).
- :mod:`iqstat.sync.known_symbols`: :func:`refine_timing_known`, the timing from the found
  frame's known symbols correlated with their waveform (:mod:`iqstat.waveform`).
"""

from iqstat.sync.block_rate import (
    FEATURE_MIN_BLOCKS,
    STRONG_LINE_DB,
    recover_timing_blocks_many,
    time_and_correlate_many,
)
from iqstat.sync.frame import (
    FALSE_LOCK_PROBABILITY,
    FrameAlignment,
    align_frame,
    align_frame_many,
)
from iqstat.sync.full_rate import MAX_CHECK_GAIN_DB, recover_timing, recover_timing_many
from iqstat.sync.grid import (
    CLOCK_BLOCK_SYMBOLS,
    CLOCK_SIGNIFICANCE,
    MAX_CLOCK_OFFSET_PPM,
    MIN_CLOCK_BLOCKS,
    MIN_LINE_SNR_DB,
    MIN_SYMBOLS,
    SymbolTiming,
)
from iqstat.sync.known_symbols import refine_timing_known

__all__ = [
    "CLOCK_BLOCK_SYMBOLS",
    "CLOCK_SIGNIFICANCE",
    "FALSE_LOCK_PROBABILITY",
    "FEATURE_MIN_BLOCKS",
    "MAX_CHECK_GAIN_DB",
    "MAX_CLOCK_OFFSET_PPM",
    "MIN_CLOCK_BLOCKS",
    "MIN_LINE_SNR_DB",
    "MIN_SYMBOLS",
    "STRONG_LINE_DB",
    "FrameAlignment",
    "SymbolTiming",
    "align_frame",
    "align_frame_many",
    "recover_timing",
    "recover_timing_blocks_many",
    "recover_timing_many",
    "refine_timing_known",
    "time_and_correlate_many",
]
