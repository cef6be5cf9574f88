"""Synthetic captures with known truth: modulator, impairments, scenarios.

Nothing here reads files except the scenario loader and the writer of synthetic recordings.
"""

from iqstat.synth.modulator import (
    ALPHABET_SIZE,
    modulate,
    n_output_samples,
    symbol_boundaries,
    symbol_period_samples,
)

__all__ = [
    "ALPHABET_SIZE",
    "modulate",
    "n_output_samples",
    "symbol_boundaries",
    "symbol_period_samples",
]
