"""Noise level of frame powers: the Gamma laws of averaged powers of complex Gaussian noise.

Pure array functions shared by the capture facts and burst detection.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import special

from iqstat.errors import ParameterError

#: Degrees of freedom the smoothed powers of :func:`noise_floor_lowest_cluster` aim for.
FLOOR_SMOOTH_DOF = (50.0, 400.0)
#: Noise quantile where :func:`noise_floor_lowest_cluster` truncates.
FLOOR_TRUNCATION_QUANTILE = 0.9


def noise_floor_lowest_cluster(frame_power, dof: float) -> float:
    """Noise power as the lowest cluster of frame powers, robust to bursts filling most frames.

    Parameters
    ----------
    frame_power : array_like of float, shape (n_frames,)
        Mean (in-band) power per frame, linear.
    dof : float
        Gamma shape of one frame's power under white noise (independent complex samples or
        DFT bins averaged).

    Returns
    -------
    float
        Noise power per frame (same units).

    Notes
    -----
    A low quantile scaled by its Gamma quantile assumes that the quantile is one of the noise
    frames' own; when gaps are only a few per cent of the frames, the 1 % quantile overall is
    the 20 % quantile of the noise frames and the estimate is far too high. Instead, frames are
    smoothed by a moving mean of m frames (m·dof ≥ 50, so noise and a burst a few dB in-band
    above it separate; and m·dof ≥ 400 for bursts barely above the noise; the smaller wins),
    and the noise level N is the fixed point of the truncated-Gamma mean

        N = mean(p_m | p_m < t) / (P(G+1, t·G/N) / P(G, t·G/N)),   t = N·Q(0.9; G)/G,

    with G = m·dof and P the regularised lower incomplete gamma function: the mean of a
    Gamma(G, N/G) variable below t is N·P(G+1, tG/N)/P(G, tG/N). The iteration starts below
    the noise (the smallest smoothed power) and rises to it; burst frames above t do not enter.
    """
    pw = np.asarray(frame_power, dtype=np.float64).ravel()
    if pw.size == 0:
        raise ParameterError("frame_power is empty; give at least one frame power")
    cs = np.concatenate(([0.0], np.cumsum(pw)))
    estimates = []
    for target in FLOOR_SMOOTH_DOF:
        m = int(min(max(1, math.ceil(target / dof)), max(1, pw.size // 8)))
        pm = (cs[m:] - cs[:-m]) / m
        g = m * dof
        q = float(special.gammaincinv(g, FLOOR_TRUNCATION_QUANTILE)) / g  # Gamma(g, 1/g) quantile
        # Sorted once, with prefix sums: each iteration's truncated mean is then one binary
        # search (the iterations are many when the start lies far below the noise).
        ps = np.sort(pm)
        n = float(ps[0])
        if n <= 0:
            continue
        cps = np.cumsum(ps)
        for _ in range(100):
            t = n * q
            k = int(np.searchsorted(ps, t, side="left"))  # values below t
            if k == 0:
                break
            x = t * g / n
            factor = float(special.gammainc(g + 1, x) / special.gammainc(g, x))
            new = float(cps[k - 1]) / k / factor
            if abs(new - n) <= 1e-6 * n:
                n = new
                break
            n = new
        estimates.append(n)
    if not estimates:
        return noise_floor_from_frames(pw, dof)
    # A weak burst (in-band SNR of a few tenths) blurs into the noise at light smoothing and
    # pulls that estimate up; heavier smoothing separates them where the gaps are long enough.
    # Each estimate is a mean of many values, so the smallest is not noticeably biased low.
    return min(estimates)


def noise_floor_from_frames(frame_power, frame_len: float, quantile: float = 0.1) -> float:
    """Noise power from a low quantile of frame powers, scaled by its Gamma-law quantile.

    Parameters
    ----------
    frame_power : array_like of float, shape (n_frames,)
        Mean power of each frame (linear).
    frame_len : float
        Number of independent complex Gaussian samples averaged per frame (the Gamma shape;
        the number of DFT bins for an in-band power; may be non-integer).
    quantile : float
        Quantile used, 0 < quantile < 1. A low quantile stays on the noise when bursts fill
        up to about (1 − quantile) of the frames; the median does not.

    Returns
    -------
    float
        Estimated noise power per sample (same units as ``frame_power``).

    Notes
    -----
    The power of one complex Gaussian sample of variance σ² is exponential with mean σ²; the
    mean of L such samples is Gamma(L, σ²/L) [1]_. The q-quantile of the frame powers is thus
    σ²·G⁻¹(q; L)/L and σ̂² = Q̂(q)·L / G⁻¹(q; L).

    References
    ----------
    .. [1] S. M. Kay, Fundamentals of Statistical Signal Processing, Vol. II: Detection
       Theory, Prentice Hall, 1998, §2.2 (chi-squared laws) [mem].
    """
    p = np.asarray(frame_power, dtype=np.float64).ravel()
    if p.size == 0:
        raise ParameterError("frame_power is empty; give at least one frame power")
    if not np.all(np.isfinite(p)) or np.any(p < 0):
        raise ParameterError("frame_power must be finite and non-negative")
    if not (np.isfinite(frame_len) and frame_len > 0):
        raise ParameterError(f"frame_len {frame_len!r} must be a positive number of samples")
    if not 0.0 < quantile < 1.0:
        raise ParameterError(f"quantile {quantile!r} must be between 0 and 1 (e.g. 0.1)")
    q_hat = float(np.quantile(p, quantile))
    # Q(q) = σ²·G⁻¹(q; L)/L (Notes)
    # gamma.ppf(q, L, scale=1/L) = P⁻¹(L, q)/L (regularised incomplete gamma inverse)
    return q_hat / (float(special.gammaincinv(frame_len, quantile)) / frame_len)


def threshold_from_floor(floor: float, n_avg: float, pfa: float) -> float:
    """Detection threshold on an n_avg-sample mean power for a false-alarm probability.

    Parameters
    ----------
    floor : float
        Noise power per sample σ² (linear).
    n_avg : float
        Independent complex samples (Gamma shape) in the averaged power.
    pfa : float
        Probability that noise alone exceeds the threshold, 0 < pfa < 1.

    Returns
    -------
    float
        Threshold t with P(mean power > t | noise) = pfa: t = σ²·G⁻¹(1 − pfa; n)/n.
    """
    if not (np.isfinite(floor) and floor >= 0):
        raise ParameterError(f"floor {floor!r} must be a finite non-negative power")
    if not (np.isfinite(n_avg) and n_avg > 0):
        raise ParameterError(f"n_avg {n_avg!r} must be a positive number of samples")
    if not 0.0 < pfa < 1.0:
        raise ParameterError(f"pfa {pfa!r} must be between 0 and 1 (e.g. 1e-6)")
    # gamma.isf(p, L, scale=1/L) = Q⁻¹(L, p)/L
    return float(floor) * float(special.gammainccinv(n_avg, pfa)) / n_avg
