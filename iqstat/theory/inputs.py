"""Input checks and the scalar-or-array return convention of the theory functions.

Owns the modulation names (``Modulation``, ``MODULATIONS``), the accepted ranges (``MAX_M``,
``MAX_EBN0``), the validators every public function of :mod:`iqstat.theory` runs on its
arguments (finite reals, non-negative values, linear Eb/N0, correlation magnitudes in [0, 1],
power-of-two alphabet sizes, modulation names; each raises :class:`~iqstat.errors.ParameterError`
naming the argument and echoing the bad value), and ``_finish``, which returns a Python float
for scalar input and a float64 array otherwise. No equations here; nothing runs at import time.
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from numpy.typing import ArrayLike

from iqstat.errors import ParameterError

__all__ = ["Modulation", "MODULATIONS", "MAX_M", "MAX_EBN0"]

Modulation = Literal["2fsk", "4fsk", "ook"]
MODULATIONS: tuple[str, ...] = ("2fsk", "4fsk", "ook")

#: Largest M accepted by :func:`ser_ncfsk`.
MAX_M = 1024
#: Largest linear Eb/N0 accepted (1000 dB; every error probability is exactly 0 long before).
MAX_EBN0 = 1e100


def _as_array(x: ArrayLike, name: str) -> np.ndarray:
    """float64 array of ``x``; raise ParameterError for non-numeric or non-finite input."""
    try:
        arr = np.asarray(x, dtype=np.float64)
    except (TypeError, ValueError):
        raise ParameterError(
            f"{name}={x!r} is not a number or an array of numbers; pass a real value"
        ) from None
    if not np.isfinite(arr).all():
        bad = float(arr[~np.isfinite(arr)].ravel()[0])
        raise ParameterError(f"{name} contains {bad!r}; every value must be a finite real number")
    return arr


def _as_nonneg(x: ArrayLike, name: str, hint: str = "") -> np.ndarray:
    arr = _as_array(x, name)
    if (arr < 0).any():
        bad = float(arr[arr < 0].ravel()[0])
        raise ParameterError(f"{name}={bad!r} is negative; it must be >= 0{hint}")
    return arr


_EBN0_HINT = " (a linear power ratio; convert dB with iqstat.units.undb)"


def _as_ebn0(ebn0: ArrayLike, name: str = "ebn0") -> np.ndarray:
    arr = _as_nonneg(ebn0, name, _EBN0_HINT)
    if (arr > MAX_EBN0).any():
        bad = float(arr[arr > MAX_EBN0].ravel()[0])
        raise ParameterError(
            f"{name}={bad!r} exceeds {MAX_EBN0:g} (1000 dB); Eb/N0 here is a linear power ratio"
            " (convert dB with iqstat.units.undb)"
        )
    return arr


def _as_rho_abs(rho_abs: ArrayLike, name: str = "rho_abs") -> np.ndarray:
    arr = _as_nonneg(rho_abs, name, " (the magnitude of a correlation coefficient)")
    if (arr > 1.0).any():
        bad = float(arr[arr > 1.0].ravel()[0])
        raise ParameterError(
            f"{name}={bad!r} exceeds 1; a correlation magnitude lies in [0, 1] "
            "(use abs(tone_correlation(...)))"
        )
    return arr


def _check_m(m: int, name: str = "m") -> int:
    if isinstance(m, bool) or not isinstance(m, (int, np.integer)):
        raise ParameterError(
            f"{name}={m!r} is not an integer; give the alphabet size M, e.g. 2 or 4"
        )
    m = int(m)
    if m < 2 or m > MAX_M or (m & (m - 1)) != 0:
        raise ParameterError(
            f"{name}={m} is not a power of two between 2 and {MAX_M}; "
            "M-FSK here carries log2(M) bits per symbol"
        )
    return m


def _check_modulation(modulation: str) -> str:
    if modulation not in MODULATIONS:
        raise ParameterError(
            f"modulation={modulation!r} is not supported; choose one of {', '.join(MODULATIONS)}"
        )
    return modulation


def _finish(result: np.ndarray, *inputs: np.ndarray):
    """Return a float when every input was a scalar, else the float64 array."""
    if all(np.ndim(i) == 0 for i in inputs):
        return float(result)
    return np.asarray(result, dtype=np.float64)
