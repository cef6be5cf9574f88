"""Link parameters of each burst: carrier offset, tone spacing and symbol rate (split follows)."""

from iqstat.estimate.batch import (
    LinkEstimate,
    estimate_carrier,
    estimate_link,
    estimate_link_many,
    estimate_symbol_rate,
    estimate_tone_spacing,
    fft_size,
    interpolate_peak_bin,
    link_with,
    refine_link_across_bursts,
    tone_frequencies_hz,
    tone_offsets_hz,
)

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
