"""The synthetic captures' modulator: the waveform model of :mod:`iqstat.waveform`, re-exported.

The model (CPFSK and OOK at exact fractional symbol timing) lives in :mod:`iqstat.waveform`
so that the receiver (:mod:`iqstat.sync.known_symbols`, the known-symbol reference waveform)
uses it without importing the synthesis package; synth code and users of this module keep
their imports.
"""

from iqstat.waveform import (
    ALPHABET_SIZE,
    Modulation,
    OokShape,
    modulate,
    n_output_samples,
    symbol_boundaries,
    symbol_period_samples,
)

__all__ = [
    "ALPHABET_SIZE",
    "Modulation",
    "OokShape",
    "modulate",
    "n_output_samples",
    "symbol_boundaries",
    "symbol_period_samples",
]
