"""Eb/N0 available from power alone, with its uncertainty (the "available vs detected" stage).

The correlator bank measures the energy a noncoherent receiver detects; this stage measures
the energy the burst brought: the burst's in-band energy minus the noise that band holds,
against the noise PSD measured in the gaps between bursts. The difference of the two Eb/N0
figures is the detection loss (timing, frequency error, template mismatch, pulse shaping).

Both inputs are noisy: the burst's band energy holds a random noise energy and a random
signal × noise cross term, and the gap noise PSD is a mean over a finite number of DFT bins.
Short captures with short gaps make the second one matter (a few hundred noise frames give a
PSD good to ~0.1 dB, which the noise subtraction magnifies), so the figure carries its 95 %
interval, and the detection loss too, so that a user can tell a loss from the noise of its
measurement.

Pure functions of numbers; :mod:`iqstat.measure` feeds them.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

#: Two-sided 95 % point of the standard normal law, Φ⁻¹(0.975).
Z95 = 1.959963984540054
_DB_PER_NEPER = 10.0 / math.log(10.0)


@dataclass(frozen=True)
class AvailableEbN0:
    """Eb/N0 from burst power and gap noise, with the parts of its variance.

    Attributes
    ----------
    ebn0 : float
        Available Eb/N0, linear.
    var_burst : float
        Variance of ``ebn0`` from the burst's own noise (independent between bursts).
    n0_slope : float
        ∂ebn0/∂ln N0: the change of ``ebn0`` per relative error of the gap noise PSD, an error
        all bursts of a capture share.
    n0_rel_var : float
        Relative variance of the gap noise PSD estimate, 1/K for a Gamma shape K; 0 when the
        PSD is taken as exact.
    """

    ebn0: float
    var_burst: float
    n0_slope: float
    n0_rel_var: float

    @property
    def ebn0_db(self) -> float:
        return 10.0 * math.log10(self.ebn0)

    @property
    def std(self) -> float:
        """Standard deviation of ``ebn0`` (linear)."""
        return math.sqrt(self.var_burst + self.n0_slope**2 * self.n0_rel_var)

    @property
    def std_db(self) -> float:
        """Standard deviation in dB (delta method on 10·log10)."""
        return _DB_PER_NEPER * self.std / self.ebn0

    @property
    def ebn0_db_ci95(self) -> tuple[float, float]:
        """95 % interval in dB, symmetric in dB (delta method: the figure is positive)."""
        h = Z95 * self.std_db
        return (self.ebn0_db - h, self.ebn0_db + h)


def available_ebn0(
    band_energy: float,
    band_width_hz: float,
    n_window: int,
    n_burst: int,
    noise_psd: float,
    noise_psd_dof: float,
    bit_rate_hz: float,
    sample_rate_hz: float,
) -> AvailableEbN0 | None:
    """Eb/N0 from power alone, (burst energy − noise energy) / (n_burst · N0 · Rb), METHODS §9.

    Parameters
    ----------
    band_energy : float
        E = Σ|x_B|² over the burst's read window, x_B the window limited to the band
        [full-scale² · samples] (from :func:`~iqstat.estimate.estimate_link_many`).
    band_width_hz : float
        Width B of that band [Hz].
    n_window : int
        Samples in the window, n_w.
    n_burst : int
        Samples of the burst inside the window, n_b (the signal's duration).
    noise_psd : float
        Gap noise PSD N0 in the band [full-scale²/Hz], linear.
    noise_psd_dof : float
        Gamma shape K of the ``noise_psd`` estimate (in-band DFT bins × gap frames averaged);
        ``inf`` for an exactly known N0.
    bit_rate_hz : float
        Rb [bit/s].
    sample_rate_hz : float
        fs [Hz].

    Returns
    -------
    AvailableEbN0 or None
        None when N0 is unknown or the band holds no more than the noise expected.

    Notes
    -----
    Model: x = s + w over the window, w white complex Gaussian of PSD N0 (variance σ² = N0·fs
    per sample). Then E = S + W + C with S the signal's in-band energy, W the noise energy in
    the band and C = 2·Re⟨s_B, w⟩ the cross term. W is Gamma distributed with mean N0·B·n_w
    and D = B·n_w/fs complex degrees of freedom (the band's share of the window's n_w
    independent samples), so Var W = (N0·B·n_w)²/D = N0²·B·n_w·fs [1]_; C is Gaussian with
    Var C = 2·σ²·S. With Ŝ = E − N̂0·B·n_w and γ̂ = Ŝ/(n_b·N̂0·Rb):

        Var_burst γ̂ = N0·fs·(N0·B·n_w + 2·Ŝ) / (n_b·N0·Rb)²,
        ∂γ̂/∂ln N0 = −(Ŝ + N0·B·n_w)/(n_b·N0·Rb) = −E/(n_b·N0·Rb),

    and the relative variance of a Gamma(K) mean is 1/K, so
    Var γ̂ = Var_burst + (∂γ̂/∂ln N0)²/K (first order; independent noise in gaps and burst).

    References
    ----------
    .. [1] S. M. Kay, Fundamentals of Statistical Signal Processing, Vol. II: Detection
       Theory, Prentice Hall, 1998, §2.2 (chi-squared and Gamma laws) [mem].
    """
    if not (n_burst > 0 and noise_psd > 0 and math.isfinite(noise_psd)):
        return None
    n0, fs = float(noise_psd), float(sample_rate_hz)
    noise_energy = n0 * band_width_hz * n_window
    s = band_energy - noise_energy
    scale = n_burst * n0 * bit_rate_hz  # energy of Eb/N0 = 1 over the burst
    if not (s > 0 and scale > 0):
        return None
    var_energy = n0 * fs * (noise_energy + 2.0 * s)
    k = float(noise_psd_dof)
    return AvailableEbN0(
        ebn0=s / scale,
        var_burst=var_energy / scale**2,
        n0_slope=-band_energy / scale,
        n0_rel_var=1.0 / k if k > 0 and math.isfinite(k) else 0.0,
    )


def pool_available(
    values: Sequence[AvailableEbN0], weights: Sequence[float] | None = None
) -> AvailableEbN0 | None:
    """Weighted mean of bursts' available Eb/N0 (linear), with the variance of the mean.

    The bursts' own noise is independent; the gap noise PSD error is one for all of them, so
    its slopes add before squaring: Var = Σ wᵢ²·Var_burst,ᵢ + (Σ wᵢ·slopeᵢ)²/K, with the
    weights normalised to sum to one (symbols per burst, as for the capture's Eb/N0).
    """
    if not values:
        return None
    w = np.ones(len(values)) if weights is None else np.asarray(weights, dtype=float)
    w = w / w.sum()
    e = np.array([v.ebn0 for v in values])
    vb = np.array([v.var_burst for v in values])
    sl = np.array([v.n0_slope for v in values])
    rel = max(v.n0_rel_var for v in values)  # one gap estimate per capture: all equal
    return AvailableEbN0(
        ebn0=float(w @ e),
        var_burst=float((w * w) @ vb),
        n0_slope=float(w @ sl),
        n0_rel_var=rel,
    )


def detection_loss_ci95(
    available: AvailableEbN0 | None, ebn0_db: float | None, ebn0_db_ci95
) -> tuple[float, float] | None:
    """95 % interval of available − detected Eb/N0 [dB].

    The two errors are combined as if independent (root sum of squares of the half widths,
    the detected one taken as half its interval's width). They share the burst's noise and
    move together, so the true spread of the difference is smaller: the interval errs wide.
    """
    if available is None or ebn0_db is None or ebn0_db_ci95 is None:
        return None
    lo, hi = ebn0_db_ci95
    if lo is None or hi is None:
        return None
    loss = available.ebn0_db - ebn0_db
    h = math.hypot(Z95 * available.std_db, 0.5 * (hi - lo))
    return (loss - h, loss + h)
