"""Argument checks shared by the correlator bank, its running sums and its block sums.

Owns the validation of sample rates, tone lists (one per burst, one tone count per batch,
within ±fs/2), sample arrays (1-D, complex) and symbol periods (>= 1 sample); each check
raises :class:`~iqstat.errors.ParameterError` naming the argument and echoing the bad value.
No equations here; nothing runs at import time.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

from iqstat.errors import ParameterError

__all__ = ["check_tone_freqs", "check_samples"]


def _check_rate(name: str, value: float) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} {value!r} is not a number; give it in Hz") from None
    if not (math.isfinite(v) and v > 0):
        raise ParameterError(f"{name} {value!r} must be a positive finite number of Hz")
    return v


def check_tone_freqs(tone_freqs_hz: Sequence[float], sample_rate_hz: float) -> np.ndarray:
    """Validate tone frequencies against the sample rate; return them as float64 (M,)."""
    try:
        f = np.atleast_1d(np.asarray(tone_freqs_hz, dtype=np.float64))
    except (TypeError, ValueError):
        raise ParameterError(
            f"tone_freqs_hz {tone_freqs_hz!r} is not a list of numbers; give the tones in Hz"
        ) from None
    if f.ndim != 1 or f.size == 0:
        raise ParameterError(
            f"tone_freqs_hz {tone_freqs_hz!r} must be a non-empty 1-D list of frequencies in Hz"
        )
    if not np.all(np.isfinite(f)) or np.any(np.abs(f) > sample_rate_hz / 2):
        raise ParameterError(
            f"tone_freqs_hz {tone_freqs_hz!r} must be finite and within ±fs/2 = "
            f"±{sample_rate_hz / 2:g} Hz of the centre frequency"
        )
    return f


def check_samples(x: np.ndarray) -> np.ndarray:
    """Validate a 1-D sample array; return it as a complex ndarray (no copy if complex)."""
    a = np.asarray(x)
    if a.ndim != 1:
        raise ParameterError(f"x must be a 1-D array of samples, got shape {a.shape}")
    if not (np.issubdtype(a.dtype, np.complexfloating) or np.issubdtype(a.dtype, np.number)):
        raise ParameterError(f"x has dtype {a.dtype}; give complex (or real) samples")
    if not np.issubdtype(a.dtype, np.complexfloating):
        a = a.astype(np.complex128)
    return a


def _check_period(period_samples: float) -> float:
    try:
        p = float(period_samples)
    except (TypeError, ValueError):
        raise ParameterError(f"period_samples {period_samples!r} is not a number") from None
    if not (math.isfinite(p) and p >= 1.0):
        raise ParameterError(
            f"period_samples {period_samples!r} must be a finite number >= 1 "
            "(samples per symbol, fs / symbol rate)"
        )
    return p


def _check_tone_list(tone_freqs_list: Sequence[Sequence[float]], fs: float) -> np.ndarray:
    """Validate one tone list per burst, all of the same length M; return float64 (B, M)."""
    try:  # the usual case in one pass; anything odd goes through the per-burst checks
        f = np.array(tone_freqs_list, dtype=np.float64)
    except (TypeError, ValueError):
        f = None
    if (
        f is not None
        and f.ndim == 2
        and f.shape[1] > 0
        and np.isfinite(f).all()
        and not (np.abs(f) > fs / 2).any()
    ):
        return f
    rows = [check_tone_freqs(f, fs) for f in tone_freqs_list]
    sizes = {r.size for r in rows}
    if len(sizes) > 1:
        raise ParameterError(
            f"tone_freqs_list holds bursts with {sorted(sizes)} tones; a batch needs one "
            "tone count (split the batch by modulation)"
        )
    return np.stack(rows) if rows else np.zeros((0, 1))
