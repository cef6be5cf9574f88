"""Noncoherent Es/N0 estimation from the outputs of a quadrature correlator bank.

The input is one complex correlator output per symbol and branch, ``z[k, i]`` (shape
``(n_symbols, n_branches)``), each branch correlating with a unit-energy template of tone ``i``
(one branch for OOK). With the tone sent unknown, its phase unknown and uniform, and white
Gaussian noise, the outputs follow (docs/estimator.md derives all of this)::

    z = A·e^{jθ}·r_i + n,    r_i = column i of the template Gram matrix R,    n ~ CN(0, N0·R)

and, averaged over θ, ``p(z | i) ∝ N0^{-M} exp(-zᴴR⁻¹z / N0) · exp(-A²/N0) · I0(2A|z_i| / N0)``.

Three estimators of ``Es/N0``: :func:`fit_nda` (non-data-aided maximum likelihood, the
headline), :func:`fit_da` (data-aided, symbols known) and :func:`fit_dd` (decision-directed
moments, biased high at low Es/N0, for comparison). Each returns a frozen
:class:`NoncoherentFit` that carries its own health: convergence, a message, the symbol count,
a 95 % interval, and a goodness-of-fit test of the branch energies against the fitted
noncentral/central chi-square laws. Pure array code: no I/O, nothing computed at import time.

Submodules, in data-flow order:

* :mod:`~iqstat.fit.result` — :class:`NoncoherentFit`, the per-modulation constants, building
  a result (dB values, Wald interval) and the failed results.
* :mod:`~iqstat.fit.inputs` — input checks; a batch of bursts concatenated, scaled, whitened.
* :mod:`~iqstat.fit.bessel` — log I0 and I1/I0 (piecewise-polynomial table, built lazily).
* :mod:`~iqstat.fit.likelihood` — the batch log-likelihood with its gradient and Hessian.
* :mod:`~iqstat.fit.maximise` — batched damped Newton, profile likelihood, intervals.
* :mod:`~iqstat.fit.ncx2_cdf` — the 2-dof (non)central chi-square CDF (series, table, chndtr).
* :mod:`~iqstat.fit.goodness_of_fit` — branch-energy CDFs and the branchwise KS test.
* :mod:`~iqstat.fit.decisions` — OOK threshold, symbol posteriors, hard decisions.
* :mod:`~iqstat.fit.decision_directed` — DD moments (:func:`fit_dd`), the ML starting point.
* :mod:`~iqstat.fit.maximum_likelihood` — :func:`fit_nda`, :func:`fit_da` and their health.
* :mod:`~iqstat.fit.combined` — :func:`fit_bursts_many`: NDA, DD and DA of a batch at once.
"""

from iqstat.fit.combined import fit_bursts_many
from iqstat.fit.decision_directed import fit_dd, fit_dd_many
from iqstat.fit.decisions import decide_symbols, ook_decision_threshold, symbol_posteriors
from iqstat.fit.goodness_of_fit import GOF_MAX_VALUES, branch_energy_cdf, check_energy_laws
from iqstat.fit.inputs import MAX_GRAM_CONDITION, Grams
from iqstat.fit.maximum_likelihood import (
    PROFILE_CI_BELOW_DB,
    fit_da,
    fit_da_many,
    fit_nda,
    fit_nda_many,
)
from iqstat.fit.result import (
    BITS_PER_SYMBOL,
    MAX_PLAUSIBLE_ESN0_DB,
    MIN_SYMBOLS,
    N_BRANCHES,
    N_HYPOTHESES,
    FitMethod,
    Modulation,
    NoncoherentFit,
)

__all__ = [
    "BITS_PER_SYMBOL",
    "GOF_MAX_VALUES",
    "MAX_GRAM_CONDITION",
    "MAX_PLAUSIBLE_ESN0_DB",
    "MIN_SYMBOLS",
    "N_BRANCHES",
    "N_HYPOTHESES",
    "PROFILE_CI_BELOW_DB",
    "FitMethod",
    "Grams",
    "Modulation",
    "NoncoherentFit",
    "branch_energy_cdf",
    "check_energy_laws",
    "decide_symbols",
    "fit_bursts_many",
    "fit_da",
    "fit_da_many",
    "fit_dd",
    "fit_dd_many",
    "fit_nda",
    "fit_nda_many",
    "ook_decision_threshold",
    "symbol_posteriors",
]
