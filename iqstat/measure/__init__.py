"""The measurement chain of one capture: bursts → link → timing → correlators → fit → theory.

The glue of the stages: it reads the bursts' windows, gets the link's rates, runs every stage
over batches of consecutive bursts and pools the bursts into the capture's summary
(:mod:`iqstat.summary`). No I/O beyond reading samples through the
:class:`~iqstat.capture.Capture`; nothing is rendered here.

Submodules, in data-flow order:

* :mod:`~iqstat.measure.windows` — the bursts' windows read (DC, I/Q, lines cut out), batches
  of bursts, the narrowed view of a far oversampled burst.
* :mod:`~iqstat.measure.rates` — blind symbol rate and tone spacing across bursts, the blind
  check of the profile's rates.
* :mod:`~iqstat.measure.work` — a burst's state through the stages, the batch's context,
  running a stage over a batch (one bad burst ends alone), the unmeasured result.
* :mod:`~iqstat.measure.gram_classes` — the templates' Gram matrices per symbol length, the
  outputs as the fit takes them, the correlator bank, the tone correlation for the theory.
* :mod:`~iqstat.measure.link_timing` — stages: carrier and rates, symbol timing and bank,
  hard decisions.
* :mod:`~iqstat.measure.frame` — stages: frame alignment and payload check, timing refined on
  the known symbols.
* :mod:`~iqstat.measure.burst_figures` — stages: the fits, fading, power-based Eb/N0, predicted
  BER, flags and the burst's result.
* :mod:`~iqstat.measure.pipeline` — a batch through every stage, :func:`measure_burst`,
  :func:`measure_capture` (with the withheld headline), :func:`measure_file`.
"""

# isort: off
# Data-flow order (as the list above). It also imports scipy.fft (windows) before the
# theory's scipy.stats: in that order the package imported ~20 ms faster (scipy 1.17, measured).
from iqstat.measure.windows import (
    BATCH_BURSTS,
    BATCH_SAMPLES,
    BLIND_DECIMATE_ABOVE,
    BLIND_RATE_BANDWIDTHS,
    EDGE_MARGIN_SYMBOLS,
)
from iqstat.measure.rates import (
    BLIND_RATE_BURSTS,
    RATE_MISMATCH_FRACTION,
    SPACING_MISMATCH_FRACTION,
)
from iqstat.measure.work import MIN_FIT_SYMBOLS
from iqstat.measure.gram_classes import GRAM_CLASS_TOL, LENGTH_SPREAD_TOL, NEAR_ORTHOGONAL_RHO
from iqstat.measure.link_timing import (
    AVAILABLE_BAND_SYMBOLS,
    BLIND_SEARCH_LINE_DB,
    TIMING_SEARCH_POINTS,
)
from iqstat.measure.frame import (
    CFO_REFINE_MIN_HZ,
    DA_REFINE_LINE_DB,
    HEADER_CONSISTENCY_P,
    LOOSE_HEADER_ERROR_FRACTION,
)
from iqstat.measure.burst_figures import (
    DETECTION_LOSS_FLAG_DB,
    FADING_DECIDED_MIN_ESN0_DB,
    GOF_FLAG_PVALUE,
)
from iqstat.measure.pipeline import OOK_MERGE_SYMBOLS, measure_burst, measure_capture, measure_file
# isort: on

__all__ = [
    "AVAILABLE_BAND_SYMBOLS",
    "BATCH_BURSTS",
    "BATCH_SAMPLES",
    "BLIND_DECIMATE_ABOVE",
    "BLIND_RATE_BANDWIDTHS",
    "BLIND_RATE_BURSTS",
    "BLIND_SEARCH_LINE_DB",
    "CFO_REFINE_MIN_HZ",
    "DA_REFINE_LINE_DB",
    "DETECTION_LOSS_FLAG_DB",
    "EDGE_MARGIN_SYMBOLS",
    "FADING_DECIDED_MIN_ESN0_DB",
    "GOF_FLAG_PVALUE",
    "GRAM_CLASS_TOL",
    "HEADER_CONSISTENCY_P",
    "LENGTH_SPREAD_TOL",
    "LOOSE_HEADER_ERROR_FRACTION",
    "MIN_FIT_SYMBOLS",
    "NEAR_ORTHOGONAL_RHO",
    "OOK_MERGE_SYMBOLS",
    "RATE_MISMATCH_FRACTION",
    "SPACING_MISMATCH_FRACTION",
    "TIMING_SEARCH_POINTS",
    "measure_burst",
    "measure_capture",
    "measure_file",
]
