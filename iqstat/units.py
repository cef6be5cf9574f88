"""Units: decibels, energy-per-bit ratios and quantities written with SI prefixes."""

from __future__ import annotations

import math
import re

import numpy as np

from iqstat.errors import ParameterError

_PREFIX = {"": 1.0, "k": 1e3, "K": 1e3, "M": 1e6, "G": 1e9}
_QUANTITY = re.compile(
    r"^\s*([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*([kKMG]?)\s*(Hz|S/s|sps|Sps|Bd|baud)?\s*$"
)


def parse_quantity(text: str | float | int, name: str = "value") -> float:
    """Parse a rate or frequency such as ``"250k"``, ``"2.4M"``, ``"915MHz"``, ``"4800"``.

    Parameters
    ----------
    text : str or number
        The quantity. Accepted suffixes: an SI prefix (k, M, G) optionally followed by
        ``Hz``, ``S/s``, ``sps`` or ``Bd``.
    name : str
        The parameter's name, used in the error message.

    Returns
    -------
    float
        The value in base SI units (Hz, samples/s or baud).
    """
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        value = float(text)
    else:
        m = _QUANTITY.match(str(text))
        if m is None:
            raise ParameterError(
                f"{name} {text!r} is not a number; write e.g. 250000, 250k, 2.4M or 915MHz"
            )
        value = float(m.group(1)) * _PREFIX[m.group(2)]
    if not math.isfinite(value):
        raise ParameterError(f"{name} {text!r} is not a finite number")
    return value


def db(x):
    """Power ratio to decibels, 10·log10(x); returns -inf for 0."""
    with np.errstate(divide="ignore"):
        return 10.0 * np.log10(x)


def undb(x_db):
    """Decibels to a linear power ratio, 10**(x/10)."""
    if np.ndim(x_db):
        return 10.0 ** (np.asarray(x_db, dtype=float) / 10.0)
    return 10.0 ** (x_db / 10.0)


def esn0_to_ebn0(esn0, bits_per_symbol: float):
    """Linear Es/N0 to linear Eb/N0: Eb = Es / log2(M)."""
    return esn0 / bits_per_symbol


def ebn0_to_esn0(ebn0, bits_per_symbol: float):
    """Linear Eb/N0 to linear Es/N0."""
    return ebn0 * bits_per_symbol


def ebn0_db_to_cn0_dbhz(ebn0_db: float, bit_rate_hz: float) -> float:
    """C/N0 [dB-Hz] = Eb/N0 [dB] + 10·log10(R_b)."""
    return ebn0_db + 10.0 * math.log10(bit_rate_hz)


def cn0_dbhz_to_ebn0_db(cn0_dbhz: float, bit_rate_hz: float) -> float:
    """Eb/N0 [dB] = C/N0 [dB-Hz] − 10·log10(R_b)."""
    return cn0_dbhz - 10.0 * math.log10(bit_rate_hz)


def check_positive(name: str, value, hint: str) -> float:
    """``value`` as a positive finite float, or ParameterError naming ``name`` and the fix."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} {value!r} is not a number; {hint}") from None
    if not math.isfinite(v) or v <= 0:
        raise ParameterError(f"{name} {value!r} must be a positive finite number; {hint}")
    return v
