"""Synthetic captures with known truth: modulator, impairments, scenarios, writer.

Nothing here reads or writes files except :func:`load_scenario` and :func:`write_synthetic`.
"""

from iqstat.synth.generate import (
    CONVENTION,
    BurstTruth,
    Synthesis,
    SynthOutput,
    Truth,
    synthesize,
    truth_document,
    write_synthetic,
)
from iqstat.synth.modulator import (
    ALPHABET_SIZE,
    modulate,
    n_output_samples,
    symbol_boundaries,
    symbol_period_samples,
)
from iqstat.synth.scenario import Scenario, load_scenario, scenario_from_dict

__all__ = [
    "ALPHABET_SIZE",
    "CONVENTION",
    "BurstTruth",
    "Scenario",
    "SynthOutput",
    "Synthesis",
    "Truth",
    "load_scenario",
    "modulate",
    "n_output_samples",
    "scenario_from_dict",
    "symbol_boundaries",
    "symbol_period_samples",
    "synthesize",
    "truth_document",
    "write_synthetic",
]
