"""The link stage's result, and what its submodules share.

Owns :class:`LinkEstimate` (carrier offset, tone spacing and symbol rate of one burst, with
their provenance and figures of merit); ``_ToneFit``, the carrier fit of one method, and
``_link_result``, which turns a fit and a symbol rate into a :class:`LinkEstimate`; the tone
layout, tone i (i = 0 lowest) at cfo + (i − (M−1)/2)·Δf (:func:`tone_offsets_hz`,
:func:`tone_frequencies_hz`); the checks of given rates; and the limits every estimate of the
stage obeys (:data:`MIN_SYMBOLS`, :data:`MIN_SAMPLES`, :data:`LINE_THRESHOLD_DB`).
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields
from typing import Literal

import numpy as np

from iqstat.errors import MeasurementError, ParameterError
from iqstat.units import check_positive

Modulation = Literal["2fsk", "4fsk", "ook"]
Source = Literal["profile", "estimated"]
SpacingSource = Literal["profile", "estimated", "n/a"]

#: Tones (correlator branches) per modulation; OOK has one branch, the carrier.
N_TONES: dict[str, int] = {"2fsk": 2, "4fsk": 4, "ook": 1}
#: A burst needs at least this many symbols for any estimate here.
MIN_SYMBOLS = 16
#: And at least this many samples.
MIN_SAMPLES = 64
#: A spectral line counts when its peak stands this far above the median of its search window.
#: A periodogram bin of noise is exponential: it exceeds 13 dB (×19.95) over its median with
#: probability exp(−19.95·ln 2) ≈ 1e-6 [derived], ~1e-4 over a window of a few hundred bins.
LINE_THRESHOLD_DB = 13.0


@dataclass(frozen=True)
class LinkEstimate:
    """Carrier offset, tone spacing and symbol rate of one burst, with their provenance.

    Attributes
    ----------
    modulation : {"2fsk", "4fsk", "ook"}
    sample_rate_hz : float
        Sample rate of the burst [Hz].
    symbol_rate_hz : float
        Symbol rate [Bd] (for a transmitter with a clock offset, the rate actually received).
    symbol_rate_source : {"profile", "estimated"}
    tone_spacing_hz : float or None
        Spacing of adjacent FSK tones [Hz]; None for OOK.
    tone_spacing_source : {"profile", "estimated", "n/a"}
    cfo_hz : float
        Carrier offset [Hz]: midpoint of the FSK tones, or the OOK carrier.
    tone_freqs_hz : tuple of float
        Baseband frequencies of tones 0..M−1, lowest first [Hz]; one entry (the carrier) for OOK.
    n_samples : int
        Samples in the burst the estimate was made on.
    quality : dict
        Figures of merit: ``n_symbols``; ``rate_line_db`` (symbol-rate line over the median of
        its neighbourhood, None when the rate came from the profile); ``tone_line_db`` (weakest
        tone/carrier line used, None when no line was used); ``line_power`` (p of the p-th power
        whose lines gave the carrier, 0 for the energy search or the centroid);
        ``carrier_method``; ``reliable`` (every estimated quantity passed its check).
    message : str
        One line saying how each quantity was obtained and anything doubtful.
    """

    modulation: str
    sample_rate_hz: float
    symbol_rate_hz: float
    symbol_rate_source: Source
    tone_spacing_hz: float | None
    tone_spacing_source: SpacingSource
    cfo_hz: float
    tone_freqs_hz: tuple[float, ...]
    n_samples: int
    quality: dict = field(default_factory=dict, compare=False)
    message: str = ""

    @property
    def modulation_index(self) -> float | None:
        """h = Δf/Rs (None for OOK)."""
        if self.tone_spacing_hz is None:
            return None
        return self.tone_spacing_hz / self.symbol_rate_hz

    @property
    def samples_per_symbol(self) -> float:
        """fs/Rs, generally not an integer."""
        return self.sample_rate_hz / self.symbol_rate_hz

    def to_dict(self) -> dict:
        """Plain JSON-ready dict of the fields plus the derived properties."""
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["tone_freqs_hz"] = [float(f) for f in self.tone_freqs_hz]
        d["quality"] = dict(self.quality)
        d["modulation_index"] = self.modulation_index
        d["samples_per_symbol"] = self.samples_per_symbol
        return d


@dataclass(frozen=True)
class _ToneFit:
    """Carrier and spacing from one method, with the weakest line used (private)."""

    cfo_hz: float
    spacing_hz: float | None
    line_power: int
    line_db: float | None
    method: str


def tone_offsets_hz(modulation: Modulation, tone_spacing_hz: float | None) -> np.ndarray:
    """Offsets of tones 0..M−1 from the carrier, (i − (M−1)/2)·Δf [Hz]; ``[0.0]`` for OOK."""
    m = _n_tones(modulation)
    if m == 1:
        return np.zeros(1)
    if tone_spacing_hz is None:
        raise ParameterError(f"tone_spacing_hz is required for {modulation}; give it in Hz")
    return (np.arange(m) - (m - 1) / 2.0) * float(tone_spacing_hz)


def tone_frequencies_hz(
    modulation: Modulation, cfo_hz: float, tone_spacing_hz: float | None
) -> tuple[float, ...]:
    """Absolute baseband tone frequencies cfo + (i − (M−1)/2)·Δf, lowest first [Hz]."""
    return tuple(float(f) for f in cfo_hz + tone_offsets_hz(modulation, tone_spacing_hz))


def _n_tones(modulation: str) -> int:
    if modulation in N_TONES:
        return N_TONES[modulation]
    raise ParameterError(f"modulation {modulation!r} is not known; use one of {', '.join(N_TONES)}")


def _check_rates(
    modulation: str, fs: float, symbol_rate_hz, tone_spacing_hz
) -> tuple[float | None, float | None]:
    rs = None
    if symbol_rate_hz is not None:
        rs = check_positive("symbol_rate_hz", symbol_rate_hz, "give the symbol rate in Bd")
        if rs > fs / 2:
            raise ParameterError(
                f"symbol_rate_hz {symbol_rate_hz!r} exceeds half the sample rate {fs:g} Hz; "
                "a symbol must span at least two samples"
            )
    df = None
    if modulation == "ook":
        if tone_spacing_hz is not None:
            raise ParameterError(
                f"tone_spacing_hz {tone_spacing_hz!r} applies to FSK only; pass None for ook"
            )
    elif tone_spacing_hz is not None:
        df = check_positive("tone_spacing_hz", tone_spacing_hz, "give the tone spacing in Hz")
        span = (N_TONES[modulation] - 1) * df
        if span >= fs:
            raise ParameterError(
                f"tone_spacing_hz {tone_spacing_hz!r} puts the {modulation} tones "
                f"{span:g} Hz apart, beyond the sample rate {fs:g} Hz"
            )
    return rs, df


def _signal_width(m: int, spacing_hz: float | None, rate_hz: float) -> float:
    return (m - 1) * (spacing_hz or 0.0) + 2.0 * rate_hz


def _link_result(
    modulation: str,
    fs: float,
    n: int,
    rs: float,
    rate_known: bool,
    df: float | None,
    fit: _ToneFit,
    rate_db: float | None,
    rate_std: float | None,
    extra: dict | None = None,
) -> LinkEstimate:
    """The LinkEstimate of one burst from its carrier fit and symbol rate (one place)."""
    m = _n_tones(modulation)
    spacing = fit.spacing_hz if m > 1 else None
    if m > 1 and not (spacing > 0):
        raise MeasurementError(
            "tone spacing estimate is not positive; give tone_spacing_hz from the link profile"
        )
    tones = tone_frequencies_hz(modulation, fit.cfo_hz, spacing)
    n_sym = n * rs / fs
    reliable = (rate_db is None or rate_db >= LINE_THRESHOLD_DB) and fit.line_power > 0
    parts = [f"carrier by {fit.method}"]
    if fit.line_db is not None:
        parts[0] += f" ({fit.line_db:.1f} dB)"
    parts.append(
        "symbol rate from profile"
        if rate_db is None
        else f"symbol rate from feature line ({rate_db:.1f} dB)"
    )
    if m > 1:
        parts.append("tone spacing from " + ("profile" if df is not None else fit.method))
    if fit.line_power == 0:
        parts.append("no spectral line: carrier from the energy search, less precise")
    if rate_db is not None and rate_db < LINE_THRESHOLD_DB:
        parts.append(f"weak symbol-rate line (< {LINE_THRESHOLD_DB:g} dB): rate doubtful")
    quality = {
        "n_symbols": float(n_sym),
        "rate_line_db": None if rate_db is None else float(rate_db),
        "rate_std_hz": None if rate_std is None else float(rate_std),
        "tone_line_db": None if fit.line_db is None else float(fit.line_db),
        "line_power": int(fit.line_power),
        "carrier_method": fit.method,
        "reliable": bool(reliable),
    }
    if extra:
        quality.update(extra)
    return LinkEstimate(
        modulation=modulation,
        sample_rate_hz=fs,
        symbol_rate_hz=float(rs),
        symbol_rate_source="profile" if rate_known else "estimated",
        tone_spacing_hz=None if spacing is None else float(spacing),
        tone_spacing_source="n/a" if m == 1 else ("profile" if df is not None else "estimated"),
        cfo_hz=float(fit.cfo_hz),
        tone_freqs_hz=tones,
        n_samples=n,
        quality=quality,
        message="; ".join(parts),
    )
