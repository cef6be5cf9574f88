"""The receiver front end's own artefacts, measured in the noise gaps: quadrature imbalance.

A direct-conversion receiver whose I and Q paths differ in gain or are not exactly 90° apart
turns each sample x into μ·x + ν·x̄: every signal component gets an image at the mirrored
frequency, ν/μ below it. For FSK with its tones placed symmetrically about the centre, the
image of the sent tone falls on the other tone's correlator, where the fit reads it as noise
(1 dB / 5° of imbalance, an image 23 dB down, cost 0.2 dB of Eb/N0; 3 dB / 10°, 1.2 dB).

The receiver's noise passes the same imbalance; before it the noise is circular (E[x²] = 0),
after it it is not. So the gaps between bursts give the imbalance blind: whitening the 2×2
covariance of (I, Q) measured there undoes it up to a rotation of the IQ plane (a carrier
phase, which a noncoherent receiver does not see) [1]_. The DC offset is taken off first
(:mod:`iqstat.bursts` measures it in the same gaps).

References
----------
.. [1] L. Anttila, M. Valkama, M. Renfors, "Circularity-based I/Q imbalance compensation in
   wideband direct-conversion receivers", IEEE Trans. Vehicular Technology 57(4), 2008
   [mem].
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Improperness |E[x²]|/E[|x|²] below this many standard errors (1/√n for n circular
#: Gaussian samples) is taken as none: no correction is applied.
SIGNIFICANT_Z = 5.0


@dataclass(frozen=True)
class IqCorrection:
    """The quadrature correction x ← α·x + β·x̄ measured in the gaps, and its evidence.

    Attributes
    ----------
    alpha, beta : complex
        Coefficients of the correction (α = 1, β = 0 is none).
    improperness : float
        |E[x²]|/E[|x|²] of the gap noise (0 for a balanced receiver).
    image_rejection_db : float
        The receiver's image rejection |μ|²/|ν|² implied by it, dB (inf when balanced).
    samples : int
        Gap samples it was measured on.
    applied : bool
        Whether the improperness is significant (``SIGNIFICANT_Z`` standard errors), so that
        measurement applies the correction.
    """

    alpha: complex
    beta: complex
    improperness: float
    image_rejection_db: float
    samples: int
    applied: bool

    def apply(self, x: np.ndarray) -> np.ndarray:
        """α·x + β·x̄ of complex64 samples (a new array), or ``x`` itself when not applied."""
        if not self.applied:
            return x
        y = x * np.complex64(self.alpha)
        y += np.conj(x) * np.complex64(self.beta)
        return y


NO_CORRECTION = IqCorrection(1.0 + 0j, 0j, 0.0, math.inf, 0, False)


def measure_iq_correction(noise: np.ndarray) -> IqCorrection:
    """Quadrature correction from noise-only samples (DC already removed).

    Parameters
    ----------
    noise : ndarray of complex, any shape
        Samples of the gaps between bursts.

    Returns
    -------
    IqCorrection

    Notes
    -----
    With C the covariance of (I, Q) over the samples, W = C^(−1/2)·√(tr C/2) makes the noise
    circular with its power kept (W·C·Wᵀ = tr C/2 · 1). A real 2×2 map W on (I, Q) is
    x ← α·x + β·x̄ with α = (w11 + w22 + j(w21 − w12))/2, β = (w11 − w22 + j(w21 + w12))/2.
    The symmetric square root has det W > 0, so the map is no mirror image (it keeps the
    sense of frequency). Impropriety ρ = E[x²]/E[|x|²] = 2μν/(|μ|² + |ν|²) for x = μ·n + ν·n̄
    and circular n; so r = |ν/μ| = (1 − √(1 − |ρ|²))/|ρ| and the image rejection is −20·log10 r.
    """
    x = np.asarray(noise).ravel()
    n = x.size
    if n < 2:
        return NO_CORRECTION
    i = x.real.astype(np.float64)
    q = x.imag.astype(np.float64)
    a, b, c = float(i @ i) / n, float(q @ q) / n, float(i @ q) / n
    total = a + b
    if not total > 0:
        return NO_CORRECTION
    rho = math.hypot(a - b, 2.0 * c) / total  # |E[x²]| / E[|x|²]
    irr = math.inf if rho == 0 else -20.0 * math.log10((1.0 - math.sqrt(1.0 - rho**2)) / rho)
    applied = rho > SIGNIFICANT_Z / math.sqrt(n)
    if not applied:
        return IqCorrection(1.0 + 0j, 0j, rho, irr, n, False)
    vals, vecs = np.linalg.eigh(np.array([[a, c], [c, b]]))
    if vals[0] <= 1e-9 * total:
        # I or Q (or a combination) carries nothing: a dead branch (or a real-valued stream
        # stored as complex) cannot be whitened back; leave it and say how improper it is.
        return IqCorrection(1.0 + 0j, 0j, rho, irr, n, False)
    w = (vecs * (1.0 / np.sqrt(vals))) @ vecs.T * math.sqrt(total / 2.0)
    alpha = complex(w[0, 0] + w[1, 1], w[1, 0] - w[0, 1]) / 2
    beta = complex(w[0, 0] - w[1, 1], w[1, 0] + w[0, 1]) / 2
    return IqCorrection(alpha, beta, rho, irr, n, True)
