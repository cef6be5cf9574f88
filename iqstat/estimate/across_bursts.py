"""Link parameters combined over the bursts of one link, and an estimate with fields replaced.

Owns :func:`refine_link_across_bursts`: a quantity the profile gave is kept; an estimated one
is the weighted median of the per-burst values, then the weighted mean of the bursts within
max(3 robust σ, a floor) of it (robust σ = 1.4826·weighted MAD, the Gaussian consistency
factor), so one outlier burst does not move it. And :func:`link_with`, a copy of a
:class:`~iqstat.estimate.link_estimate.LinkEstimate` with given fields replaced and the tones
recomputed.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from iqstat.errors import MeasurementError, ParameterError
from iqstat.estimate.link_estimate import LinkEstimate, _check_rates, tone_frequencies_hz


def _weighted_median(v: np.ndarray, w: np.ndarray) -> float:
    order = np.argsort(v)
    cw = np.cumsum(w[order])
    return float(v[order][np.searchsorted(cw, 0.5 * cw[-1])])


def _robust_mean(v: np.ndarray, w: np.ndarray, floor_rel: float) -> float:
    """Weighted median, then the weighted mean of values within 3 robust sigmas of it."""
    med = _weighted_median(v, w)
    dev = np.abs(v - med)
    scale = 1.4826 * _weighted_median(dev, w)  # MAD → σ for Gaussian spread
    tol = max(3.0 * scale, floor_rel * abs(med))
    inl = dev <= tol
    return float(np.sum(w[inl] * v[inl]) / np.sum(w[inl])) if np.sum(w[inl]) > 0 else med


def refine_link_across_bursts(
    estimates: Sequence[LinkEstimate], weights: Sequence[float]
) -> tuple[float, float | None]:
    """Symbol rate and tone spacing combined over the bursts of one link.

    Parameters
    ----------
    estimates : sequence of LinkEstimate
        One per burst, same modulation.
    weights : sequence of float
        Non-negative weight per burst (e.g. its number of symbols × a quality figure).

    Returns
    -------
    (symbol_rate_hz, tone_spacing_hz)
        A quantity taken from the profile is returned as it is; estimated ones are combined:
        weighted median, then the weighted mean of the bursts within max(3 robust σ, a floor)
        of it (floor 50 ppm for the rate, 0.2 % for the spacing), so one outlier burst does not
        move the result. tone_spacing_hz is None for OOK.
    """
    ests = list(estimates)
    w = np.asarray(list(weights), dtype=float)
    if not ests:
        raise MeasurementError("no burst estimates to combine; the capture has no usable burst")
    if w.shape != (len(ests),):
        raise ParameterError(
            f"weights has {w.size} entries for {len(ests)} estimates; give one weight per burst"
        )
    if not np.all(np.isfinite(w)) or np.any(w < 0) or not np.sum(w) > 0:
        raise ParameterError(
            f"weights {w.tolist()!r} must be finite, non-negative and not all zero"
        )
    mods = {e.modulation for e in ests}
    if len(mods) != 1:
        raise ParameterError(f"estimates mix modulations {sorted(mods)}; combine one link at once")

    def combine(values, sources, floor_rel):
        for v, s in zip(values, sources, strict=True):
            if s == "profile":
                return float(v)
        return _robust_mean(np.asarray(values, dtype=float), w, floor_rel)

    rate = combine([e.symbol_rate_hz for e in ests], [e.symbol_rate_source for e in ests], 5e-5)
    if ests[0].modulation == "ook":
        return rate, None
    spacing = combine(
        [e.tone_spacing_hz for e in ests], [e.tone_spacing_source for e in ests], 2e-3
    )
    return rate, spacing


def link_with(
    estimate: LinkEstimate,
    *,
    symbol_rate_hz: float | None = None,
    tone_spacing_hz: float | None = None,
    cfo_hz: float | None = None,
) -> LinkEstimate:
    """A copy of ``estimate`` with the given fields replaced and tone_freqs_hz recomputed."""
    rs, df = _check_rates(
        estimate.modulation, estimate.sample_rate_hz, symbol_rate_hz, tone_spacing_hz
    )
    changes: dict = {}
    if rs is not None:
        changes["symbol_rate_hz"] = rs
    if df is not None:
        changes["tone_spacing_hz"] = df
    if cfo_hz is not None:
        try:
            c = float(cfo_hz)
        except (TypeError, ValueError):
            raise ParameterError(f"cfo_hz {cfo_hz!r} is not a number; give it in Hz") from None
        if not math.isfinite(c):
            raise ParameterError(f"cfo_hz {cfo_hz!r} must be finite")
        changes["cfo_hz"] = c
    new = replace(estimate, **changes)
    tones = tone_frequencies_hz(new.modulation, new.cfo_hz, new.tone_spacing_hz)
    quality = dict(new.quality)
    quality["n_symbols"] = float(new.n_samples * new.symbol_rate_hz / new.sample_rate_hz)
    return replace(new, tone_freqs_hz=tones, quality=quality)
