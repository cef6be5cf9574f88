"""Fading within a burst: is the sent tone's energy steadier or not than noise alone allows?

The headline fit assumes a constant amplitude over a burst. Where the channel fades (multipath,
a moving transmitter), the energy of the matched correlator, P_k = |z_k,i_k|², spreads beyond
what the noise gives. Under a constant amplitude A with noise of variance N0 per branch, P is
(N0/2)·χ'²(2, 2A²/N0) [1]_: mean A² + N0, variance N0² + 2A²N0. A Rician channel h (E|h|² = 1)
adds A⁴·Var|h|², and γ = Var|h|²/(E|h|²)² = (1 + 2K)/(1 + K)² gives the K factor back,
K = √(1 − γ)/(1 − √(1 − γ)) [2]_. The excess variance is tested against its standard error
under the constant-amplitude law (cumulants of the noncentral χ² [1]_), so that noise does not
read as fading. A burst that fades is then refitted on the Rician model
(:mod:`iqstat.fit.rician`), which gives its mean Eb/N0 and a better K.

References
----------
.. [1] M. K. Simon, Probability Distributions Involving Gaussian Random Variables, Springer,
   2002, §2.2 (noncentral chi-square, its cumulants κ_r = 2^(r−1)(r−1)!(k + rλ)) [mem].
.. [2] L. J. Greenstein, D. G. Michelson, V. Erceg, "Moment-method estimation of the Ricean
   K-factor", IEEE Commun. Lett. 3(6), 175–176, 1999.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Excess variance of the matched energy, in standard errors under a constant amplitude,
#: above which a burst is said to fade (a false alarm ~3e-5 if the statistic were normal).
FADING_Z = 4.0
#: Fewest symbols for the test (the fourth moment needs many).
MIN_SYMBOLS = 64


@dataclass(frozen=True)
class FadingEstimate:
    """Fading of one burst from the spread of its matched-branch energies.

    Attributes
    ----------
    gamma : float
        Var|h|² estimate (0 for a steady amplitude; 1 for Rayleigh fading, K = 0).
    k_db : float or None
        Rician K factor, dB, when ``fading``; else None.
    z : float
        Excess variance over its standard error under a constant amplitude.
    fading : bool
        Whether the excess is significant (z > FADING_Z).
    symbols : int
    k_source : str
        Where ``k_db`` comes from: ``"moments"`` (this test's γ) or ``"fading-fit"`` (the
        maximum-likelihood fit of :mod:`iqstat.fit.rician`, which then also gives γ).
    esn0_law : tuple of (float, float)
        With the fading fit: the burst's own law of the per-symbol Es/N0 (linear; OOK the "on"
        level) as (level, weight) pairs (:mod:`iqstat.fit.level_mixture`); else empty.
    """

    gamma: float
    k_db: float | None
    z: float
    fading: bool
    symbols: int
    k_source: str = "moments"
    esn0_law: tuple[tuple[float, float], ...] = ()

    def to_dict(self) -> dict:
        d = dict(self.__dict__)
        d["esn0_law"] = [list(p) for p in self.esn0_law]
        return d


def k_from_gamma(gamma: float) -> float:
    """Rician K (linear) from γ = Var|h|²/(E|h|²)² = (1 + 2K)/(1 + K)², Greenstein et al. 1999.

    γ ≥ 1 is Rayleigh or worse (K = 0); γ ≤ 0 a steady amplitude (K = ∞).
    """
    if gamma >= 1.0:
        return 0.0
    if gamma <= 0.0:
        return math.inf
    r = math.sqrt(1.0 - gamma)
    return r / (1.0 - r)


def fading_from_energies(energy: np.ndarray, noise_var: float) -> FadingEstimate | None:
    """Test the matched-branch energies of a burst for fading and estimate its K factor.

    Parameters
    ----------
    energy : ndarray of float, shape (n,)
        |z_k,i_k|² of the symbols whose sent tone is known (or decided reliably).
    noise_var : float
        N0, the noise variance per correlator branch (the fit's).

    Returns
    -------
    FadingEstimate or None
        None with fewer than MIN_SYMBOLS symbols, no noise figure or no signal above it.
    """
    p = np.asarray(energy, dtype=np.float64).ravel()
    n = p.size
    n0 = float(noise_var)
    if n < MIN_SYMBOLS or not (n0 > 0 and math.isfinite(n0)):
        return None
    mean = float(p.mean())
    s = mean - n0  # A², the signal's mean energy
    if not s > 0:
        return None
    var = float(p.var(ddof=1))
    steady = n0 * n0 + 2.0 * s * n0  # Var P under a constant amplitude
    # Cumulants of P = (N0/2)·χ'²(2, λ), λ = 2s/N0: κ_r = (N0/2)^r·2^(r−1)(r−1)!(2 + rλ).
    lam = 2.0 * s / n0
    k2 = (n0 / 2.0) ** 2 * 2.0 * (2.0 + 2.0 * lam)
    k4 = (n0 / 2.0) ** 4 * 48.0 * (2.0 + 4.0 * lam)
    se = math.sqrt((k4 + 2.0 * k2 * k2) / n)  # of the sample variance (n large)
    z = (var - steady) / se
    gamma = max((var - steady) / (s * s), 0.0)
    fading = z > FADING_Z
    k_db = None
    if fading:
        # Rayleigh or worse (γ ≥ 1, K = 0) is given as K = −20 dB: no steady part to speak of.
        k_db = 10.0 * math.log10(max(k_from_gamma(gamma), 0.01))
    return FadingEstimate(gamma=gamma, k_db=k_db, z=float(z), fading=bool(fading), symbols=n)
