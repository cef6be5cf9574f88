"""A batch's bookkeeping: each burst's mutable state, the batch's context, running a stage.

:class:`_Work` carries one burst through the stages (its window, link, timing, correlator
outputs, frame, fits, figures, flags); a burst that cannot be measured gets its
:func:`_unmeasured` result and leaves the chain, later stages skip it. :class:`_Context` holds
what every stage needs besides the bursts (sample rate, profile, frame layout, detection, the
header's symbols, the link's rates). :func:`_batched` runs a stage over the batch and, if it
fails, burst by burst, so that one bad burst ends alone; :func:`_each` runs a per-burst step.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from iqstat.available import AvailableEbN0
from iqstat.bursts import Burst, BurstDetection
from iqstat.errors import MeasurementError
from iqstat.estimate import LinkEstimate
from iqstat.fading import FadingEstimate
from iqstat.fit import NoncoherentFit
from iqstat.fit.level_mixture import LevelMixture
from iqstat.patterns import BitCheck
from iqstat.profile import FrameLayout, LinkProfile, bits_to_symbols
from iqstat.results import BurstResult
from iqstat.sync import FrameAlignment, SymbolTiming

#: Fewest symbols for a fit worth reporting.
MIN_FIT_SYMBOLS = 20


@dataclasses.dataclass
class _Work:
    """One burst's state while its batch moves through the stages (internal, mutable).

    ``result`` is set when the burst leaves the chain early (it could not be measured); later
    stages skip it.
    """

    burst: Burst
    x0: int
    x: np.ndarray
    lo_edge: float = 0.0
    hi_edge: float = 0.0
    flags: list[str] = dataclasses.field(default_factory=list)
    result: BurstResult | None = None
    link: LinkEstimate | None = None
    cum: np.ndarray | None = None
    timing: SymbolTiming | None = None
    z_all: np.ndarray | None = None
    gram: np.ndarray | None = None
    sym_grams: np.ndarray | None = None  # per-symbol Gram stack (few samples per symbol)
    gram_classes: list | None = None  # [(Gram, share of symbols)] for the theory
    k0: int = 0
    k1: int = 0
    first_fit: NoncoherentFit | None = None
    hard: np.ndarray | None = None
    frame: FrameAlignment | None = None
    sel: tuple[int, int] = (0, 0)
    known: np.ndarray | None = None
    check: BitCheck | None = None
    fit: NoncoherentFit | None = None
    fit_da: NoncoherentFit | None = None
    fit_dd: NoncoherentFit | None = None
    fit_steady: NoncoherentFit | None = None  # the constant-amplitude fit, where it fades
    levels: LevelMixture | None = None  # the law of the Es/N0 within a fading burst
    ook_threshold: float | None = None  # OOK envelope threshold of the fading model
    band: tuple[float | None, float | None] = (None, None)  # in-band energy, its width [Hz]
    available: AvailableEbN0 | None = None
    fading: FadingEstimate | None = None
    predicted_ber: float | None = None


@dataclasses.dataclass(frozen=True)
class _Context:
    """What every stage of a batch needs besides the bursts (internal)."""

    fs: float
    profile: LinkProfile
    layout: FrameLayout
    detection: BurstDetection
    header: np.ndarray
    header_error: str | None
    symbol_rate_hz: float
    tone_spacing_hz: float | None
    #: Where the frame of a transmission measured in parts ends (sample of the capture), by
    #: the index of its first part: the later parts measure up to there.
    frame_ends: dict = dataclasses.field(default_factory=dict)


def _header_symbols(layout: FrameLayout, modulation: str) -> np.ndarray:
    bits = layout.header_bits
    if len(bits) == 0:
        return np.zeros(0, dtype=np.int64)
    if modulation == "4fsk" and len(bits) % 2:
        raise MeasurementError("the preamble and sync word hold an odd number of bits for 4fsk")
    return bits_to_symbols(bits, modulation)


def _context(capture, profile, layout, detection, symbol_rate_hz, tone_spacing_hz) -> _Context:
    try:
        header, error = _header_symbols(layout, profile.modulation), None
    except MeasurementError as exc:
        header, error = np.zeros(0, dtype=np.int64), str(exc)
    return _Context(
        fs=capture.sample_rate_hz,
        profile=profile,
        layout=layout,
        detection=detection,
        header=header,
        header_error=error,
        symbol_rate_hz=symbol_rate_hz,
        tone_spacing_hz=tone_spacing_hz,
    )


def _unmeasured(
    burst: Burst, flag: str, message: str, *, link=None, timing=None, symbols: int = 0
) -> BurstResult:
    """The result of a burst that could not be measured (what is known, and why not)."""
    return BurstResult(
        index=burst.index,
        start_sample=burst.start_sample,
        stop_sample=burst.stop_sample,
        power_dbfs=burst.power_dbfs,
        symbols=symbols,
        link=link,
        timing=timing,
        frame=None,
        fit=None,
        fit_da=None,
        fit_dd=None,
        bit_check=None,
        available=None,
        fading=None,
        predicted_ber=None,
        flags=(flag,),
        message=message,
        part=burst.part,
    )


def _active(works: list[_Work]) -> list[_Work]:
    return [w for w in works if w.result is None]


def _each(works: list[_Work], step) -> None:
    """Apply a per-burst step to the bursts still in the chain; an error ends that burst only."""
    for w in _active(works):
        try:
            step(w)
        except MeasurementError as exc:
            w.result = _unmeasured(w.burst, "not-measured", str(exc))


def _batched(works: list[_Work], stage) -> None:
    """Apply a batched stage; if it fails, run it burst by burst so one bad burst ends alone.

    A stage computes all its outputs before it assigns any, so a retry starts clean.
    """
    act = _active(works)
    if not act:
        return
    try:
        stage(act)
    except MeasurementError:
        _each(act, lambda w: stage([w]))
