"""Error-probability theory of noncoherent FSK and OOK receivers.

Closed forms and numerically safe evaluations of the laws a noncoherent (square-law / envelope)
receiver obeys in additive white Gaussian noise: the Marcum Q function, log I0, symbol and bit
error probabilities of orthogonal and non-orthogonal noncoherent FSK, the envelope-detected OOK
error rate with its optimum threshold, the Eb/N0 a link needs for a target BER, and the margin.

Every Eb/N0 argument is a LINEAR power ratio unless its name ends in ``_db``. Functions accept
scalars or arrays (broadcast) and return a Python ``float`` for scalar input, a float64 array
otherwise. Extreme Eb/N0 (40 dB and beyond) underflows to tiny numbers or exactly 0, never NaN.
A pure array core: no I/O, nothing runs at import time.

Submodules, upstream first:

- :mod:`~iqstat.theory.inputs`: argument checks, modulation names, scalar-or-array returns.
- :mod:`~iqstat.theory.marcum`: Marcum Q (the Rician tails) and log I0.
- :mod:`~iqstat.theory.orthogonal_fsk`: SER and BER of orthogonal noncoherent M-FSK.
- :mod:`~iqstat.theory.nonorthogonal_fsk`: tone correlation, Stein's binary law, the union bound.
- :mod:`~iqstat.theory.ook`: the optimum envelope threshold and BER of noncoherent OOK.
- :mod:`~iqstat.theory.link`: predicted BER per modulation, required Eb/N0, margin, the
  capture's mean BER over its bursts.
"""

from iqstat.theory.inputs import MODULATIONS, Modulation
from iqstat.theory.link import margin_db, mean_ber_over_bursts, predicted_ber, required_ebn0_db
from iqstat.theory.marcum import log_i0, marcum_q
from iqstat.theory.nonorthogonal_fsk import (
    ber_ncbfsk_nonorthogonal,
    ber_ncfsk_union_bound,
    tone_correlation,
    tone_correlation_matrix,
)
from iqstat.theory.ook import ber_ook, ook_threshold
from iqstat.theory.orthogonal_fsk import ber_ncfsk, ser_ncfsk

__all__ = [
    "Modulation",
    "MODULATIONS",
    "marcum_q",
    "log_i0",
    "ser_ncfsk",
    "ber_ncfsk",
    "ber_ncbfsk_nonorthogonal",
    "ber_ncfsk_union_bound",
    "ook_threshold",
    "ber_ook",
    "tone_correlation",
    "tone_correlation_matrix",
    "predicted_ber",
    "required_ebn0_db",
    "margin_db",
    "mean_ber_over_bursts",
]
