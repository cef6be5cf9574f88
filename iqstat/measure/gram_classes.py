"""The templates' Gram matrices as the fit and the theory take them, and the correlator bank.

The bank assigns samples whole (:mod:`iqstat.correlate`), so with a fractional symbol period P
the symbols are ⌊P⌋ or ⌈P⌉ samples long and their tones are not orthogonal in the same way.
:func:`_gram_classes` gives the one mixed matrix of the fractional period, the per-symbol stack
where the two lengths' matrices differ by more than GRAM_CLASS_TOL, and the classes with their
shares for the theory. :func:`_fit_z` scales each output by √(P/N_k) where the lengths matter
(LENGTH_SPREAD_TOL), so that the sent tone's amplitude is the same for every symbol.
:func:`_theory_rho` puts the tone correlation in the form :func:`iqstat.theory.predicted_ber`
takes (|ρ| for 2-FSK; the |ρ| matrix, union bound, for 4-FSK tones that leak by more than
NEAR_ORTHOGONAL_RHO; 0 otherwise).
"""

from __future__ import annotations

import math

import numpy as np

from iqstat.correlate import correlate_symbols, symbol_boundaries, template_gram
from iqstat.estimate import LinkEstimate
from iqstat.measure.work import _Work
from iqstat.sync import SymbolTiming

#: The ⌊P⌋- and ⌈P⌉-sample symbols' Gram matrices are given to the fit per symbol when their
#: share-weighted mean square deviation from the one mixed matrix exceeds this: the leak the
#: mixed matrix misses is that times Es/N0 of the noise, 1 % at 20 dB (at 52.08 samples per
#: symbol it is 2.7e-5: the mixed matrix stays; at 6.51, 6.4e-3).
GRAM_CLASS_TOL = 1e-4

#: Outputs are scaled to equal amplitudes, √(P/N_k), when the symbols' energy spread,
#: share·(1 − share)/P², exceeds this (times Es/N0 it is the noise the spread fakes: 1 % at
#: 20 dB; 2.7e-5 at 52.08 samples per symbol, where outputs stay as they are).
LENGTH_SPREAD_TOL = 1e-4

#: 4-FSK tones whose |ρ| stay below this are treated as orthogonal by the theory.
NEAR_ORTHOGONAL_RHO = 0.05


def _gram_classes(tones, timing: SymbolTiming, fs: float):
    """The Gram matrix of the symbols as the fit and the theory take it.

    Returns (mixed, per_symbol, classes): the one matrix of template_gram for the fractional
    period; the (n_symbols, M, M) stack of each symbol's own matrix (by its ⌊P⌋ or ⌈P⌉
    samples), or None where the two hardly differ; and [(matrix, share of symbols)] for the
    theory. The bank assigns samples whole (iqstat.correlate.bank), so at few samples per
    symbol a symbol's tones are not orthogonal in the same way as its neighbour's: 2-FSK at
    h = 1 with 6.51 samples per symbol has ρ = +0.088 over 6 samples and −0.072 over 7.
    """
    p = timing.period_samples
    mixed = template_gram(tones, p, fs)
    n_lo, n_hi = math.floor(p), math.ceil(p)
    if n_lo == n_hi or n_lo < 1:
        return mixed, None, [(mixed, 1.0)]
    g_lo, g_hi = template_gram(tones, n_lo, fs), template_gram(tones, n_hi, fs)
    share = p - n_lo  # of the symbols, the longer
    dev = (1.0 - share) * np.abs(g_lo - mixed) ** 2 + share * np.abs(g_hi - mixed) ** 2
    if float(dev.max()) <= GRAM_CLASS_TOL:
        return mixed, None, [(mixed, 1.0)]
    longer = np.diff(symbol_boundaries(timing.t0_samples, p, timing.n_symbols)) == n_hi
    stack = np.where(longer[:, None, None], g_hi[None], g_lo[None])
    share = float(np.mean(longer)) if longer.size else share
    return mixed, stack, [(g_lo, 1.0 - share), (g_hi, share)]


def _fit_gram(w: _Work, lo: int, hi: int):
    """The gram argument of the fit for symbols [lo, hi) of the burst's grid."""
    return w.gram if w.sym_grams is None else w.sym_grams[lo:hi]


def _fit_z(w: _Work, lo: int, hi: int) -> np.ndarray:
    """Correlator outputs of symbols [lo, hi) as the fit takes them.

    Where the symbols' lengths matter (per-symbol Gram matrices, or an energy spread above
    LENGTH_SPREAD_TOL: few samples per symbol), each output is scaled by √(P/N_k): a
    unit-energy template over N_k samples gives the sent
    tone an amplitude A·√N_k, which the fit's one amplitude would read as noise (−0.4 dB at
    20 dB, 6.51 samples per symbol); scaled, the amplitude is A·√P for every symbol and only
    the noise level varies, by N_k/P (a relative error of its mean of var(N_k)/P², 0.6 %).
    """
    z = w.z_all[lo:hi]
    t = w.timing
    p = t.period_samples
    share = p - math.floor(p)
    if w.sym_grams is None and share * (1.0 - share) / p**2 <= LENGTH_SPREAD_TOL:
        return z
    n_k = np.diff(symbol_boundaries(t.t0_samples, t.period_samples, t.n_symbols))[lo:hi]
    return z * np.sqrt(t.period_samples / n_k)[:, None]


def _bank(x, fs, link: LinkEstimate, timing: SymbolTiming, cum):
    """Correlator outputs of every symbol of the grid, and the templates' Gram matrix."""
    z = correlate_symbols(
        x,
        fs,
        link.tone_freqs_hz,
        timing.t0_samples,
        timing.period_samples,
        timing.n_symbols,
        cumulative=cum,
    )
    return z, _gram_classes(link.tone_freqs_hz, timing, fs)


def _theory_rho(rho_abs: np.ndarray, modulation: str):
    """Tone correlation in the form theory takes: |ρ| for 2-FSK, the |ρ| matrix for 4-FSK
    (union bound over tone pairs when the tones are not orthogonal), 0 for OOK and
    orthogonal 4-FSK."""
    rho_abs = np.clip(rho_abs, 0.0, 1.0)
    if modulation == "2fsk":
        return float(rho_abs[0, 1])  # Stein's formula is exact for any |ρ|
    if modulation == "4fsk":
        # The union bound is only worth its looseness where the tones really leak; a
        # fractional symbol length leaves |ρ| ~ 1e-3 between nominally orthogonal tones.
        off = rho_abs - np.diag(np.diag(rho_abs))
        if float(off.max()) <= NEAR_ORTHOGONAL_RHO:
            return 0.0
        np.fill_diagonal(rho_abs, 1.0)
        return rho_abs
    return 0.0
