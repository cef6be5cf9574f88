"""Link parameters of each burst: carrier offset, tone spacing and symbol rate.

Pipeline stage between burst detection and the timing/correlator stages. For each burst it
returns a :class:`LinkEstimate`: the carrier offset (midpoint of the FSK tones, or the OOK
carrier), the tone spacing and the symbol rate, each taken from the link profile or estimated
blind, with figures of merit; then combines the rates over the bursts of one link.

Submodules, in data-flow order:

* :mod:`~iqstat.estimate.link_estimate`: the result :class:`LinkEstimate`, the tone layout,
  the checks of given rates and the limits shared by the stage.
* :mod:`~iqstat.estimate.spectrum`: the burst's cached DFT and sliding correlators, three-bin
  peak interpolation, the noise floor and the coarse centre.
* :mod:`~iqstat.estimate.blind`: blind coarse tones and spacing; the symbol rate from the line
  of the correlator feature.
* :mod:`~iqstat.estimate.carrier`: the carrier of one burst with the rates known, from the
  lines of the burst or its square, or the energy search.
* :mod:`~iqstat.estimate.batch`: the same carrier estimate for many bursts at once, rows of
  one 2-D FFT (rates given, a modulation index with lines).
* :mod:`~iqstat.estimate.link`: the entry points :func:`estimate_link`,
  :func:`estimate_link_many` and the single-quantity wrappers.
* :mod:`~iqstat.estimate.across_bursts`: :func:`refine_link_across_bursts` and
  :func:`link_with`.
"""

from iqstat.estimate.across_bursts import link_with, refine_link_across_bursts
from iqstat.estimate.batch import fft_size
from iqstat.estimate.link import (
    estimate_carrier,
    estimate_link,
    estimate_link_many,
    estimate_symbol_rate,
    estimate_tone_spacing,
)
from iqstat.estimate.link_estimate import LinkEstimate, tone_frequencies_hz, tone_offsets_hz
from iqstat.estimate.spectrum import interpolate_peak_bin

__all__ = [
    "LinkEstimate",
    "estimate_carrier",
    "estimate_link",
    "estimate_link_many",
    "estimate_symbol_rate",
    "estimate_tone_spacing",
    "fft_size",
    "interpolate_peak_bin",
    "link_with",
    "refine_link_across_bursts",
    "tone_frequencies_hz",
    "tone_offsets_hz",
]
