"""Quadrature correlator bank of a noncoherent receiver: complex outputs per symbol and tone.

For every symbol of a timing grid and every tone, the correlation of the received samples
with a unit-energy complex exponential at the tone frequency: z[k, i], shape
(n_symbols, n_tones), the matched branch with mean √Es·e^{jθ_k}, noise E|n|² = N0 in every
branch. The symbol intervals and the phase reference are set out in
:mod:`iqstat.correlate.bank`.

Submodules, upstream first:

- :mod:`~iqstat.correlate.inputs`: checks of rates, tone lists, samples and periods.
- :mod:`~iqstat.correlate.templates`: tone phasors and the Gram matrix of the templates.
- :mod:`~iqstat.correlate.running_sums`: full-rate running sums per tone, interval energies.
- :mod:`~iqstat.correlate.block_sums`: block-rate mixing and the bank from block sums.
- :mod:`~iqstat.correlate.bank`: the symbol grid and the bank (from samples, running sums or
  block sums), branch energies.
"""

from iqstat.correlate.bank import (
    branch_energies,
    correlate_symbols,
    correlate_symbols_many,
    symbol_boundaries,
)
from iqstat.correlate.block_sums import (
    MIN_BLOCKS_PER_SYMBOL,
    BlockSums,
    Scratch,
    block_samples_for,
    mix_blocks_many,
)
from iqstat.correlate.inputs import (
    check_samples,
    check_tone_freqs,
)
from iqstat.correlate.running_sums import (
    batch_buffer,
    interval_energies,
    mix_cumulative,
    mix_cumulative_many,
)
from iqstat.correlate.templates import template_gram, tone_phasors, unit_phasors

__all__ = [
    "check_tone_freqs",
    "check_samples",
    "unit_phasors",
    "tone_phasors",
    "template_gram",
    "mix_cumulative",
    "mix_cumulative_many",
    "batch_buffer",
    "interval_energies",
    "MIN_BLOCKS_PER_SYMBOL",
    "BlockSums",
    "Scratch",
    "block_samples_for",
    "mix_blocks_many",
    "symbol_boundaries",
    "correlate_symbols",
    "correlate_symbols_many",
    "branch_energies",
]
