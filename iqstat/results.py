"""Results of measuring a capture: per burst, the link, the capture's summary, the report.

Frozen dataclasses with ``to_dict()``; the renderers in :mod:`iqstat.report` and the notebook
API read them. They hold no samples.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from iqstat.available import AvailableEbN0, detection_loss_ci95
from iqstat.bursts import BurstDetection
from iqstat.estimate import LinkEstimate
from iqstat.facts import CaptureFacts
from iqstat.fading import FadingEstimate
from iqstat.fit import NoncoherentFit
from iqstat.patterns import BitCheck
from iqstat.profile import LinkProfile
from iqstat.sync import FrameAlignment, SymbolTiming


@dataclass(frozen=True)
class BurstResult:
    """Everything measured on one burst.

    ``ebn0_db`` is the headline (maximum likelihood, marginalised over the sent symbols);
    ``ebn0_db_da`` uses the known symbols (header, and payload where known); ``ebn0_db_dd`` is
    the decision-directed moment estimate, biased high below about 8 dB, for comparison only.
    """

    index: int
    start_sample: int
    stop_sample: int
    symbols: int
    link: LinkEstimate | None
    timing: SymbolTiming | None
    frame: FrameAlignment | None
    fit: NoncoherentFit | None
    fit_da: NoncoherentFit | None
    fit_dd: NoncoherentFit | None
    bit_check: BitCheck | None
    available: AvailableEbN0 | None
    fading: FadingEstimate | None
    predicted_ber: float | None
    power_dbfs: float
    flags: tuple[str, ...]
    message: str
    start_time: str | None = None  # UTC time of start_sample (RFC 3339), if recorded
    #: Where the burst fades and ``fit`` is the fading fit: the constant-amplitude fit.
    fit_steady: NoncoherentFit | None = None
    #: 0, or k for the k-th continuation of a transmission measured in parts (Burst.part).
    part: int = 0

    @property
    def ebn0_db(self) -> float | None:
        return self.fit.ebn0_db if self.fit is not None and self.fit.converged else None

    @property
    def ebn0(self) -> float | None:
        v = self.ebn0_db
        return None if v is None else 10.0 ** (v / 10.0)

    @property
    def available_ebn0_db(self) -> float | None:
        """Eb/N0 from power alone (burst power − gap noise), dB."""
        return None if self.available is None else self.available.ebn0_db

    @property
    def available_ebn0_db_ci95(self) -> tuple[float, float] | None:
        return None if self.available is None else self.available.ebn0_db_ci95

    @property
    def detection_loss_db(self) -> float | None:
        if self.available_ebn0_db is None or self.ebn0_db is None:
            return None
        return self.available_ebn0_db - self.ebn0_db

    @property
    def detection_loss_db_ci95(self) -> tuple[float, float] | None:
        fit = self.fit
        ci = None if fit is None or not fit.converged else fit.ebn0_db_ci95
        return detection_loss_ci95(self.available, self.ebn0_db, ci)

    @property
    def cfo_hz(self) -> float | None:
        return None if self.link is None else self.link.cfo_hz

    def to_dict(self) -> dict:
        fit = self.fit
        bc = self.bit_check
        counted = bc is not None and bc.locked
        return {
            "index": self.index,
            "start_sample": self.start_sample,
            "stop_sample": self.stop_sample,
            "start_time": self.start_time,
            "symbols": self.symbols,
            "cfo_hz": self.cfo_hz,
            "symbol_rate_hz": None if self.link is None else self.link.symbol_rate_hz,
            "tone_spacing_hz": None if self.link is None else self.link.tone_spacing_hz,
            "clock_offset_ppm": None if self.timing is None else self.timing.clock_offset_ppm,
            "timing_offset_samples": None if self.timing is None else self.timing.t0_samples,
            "part": self.part,
            "power_dbfs": self.power_dbfs,
            "ebn0_db": self.ebn0_db,
            "ebn0_db_ci95": None if fit is None or not fit.converged else fit.ebn0_db_ci95,
            "esn0_db": None if fit is None or not fit.converged else fit.esn0_db,
            "ebn0_db_da": _fit_ebn0(self.fit_da),
            "ebn0_db_dd": _fit_ebn0(self.fit_dd),
            "available_ebn0_db": self.available_ebn0_db,
            "available_ebn0_db_ci95": self.available_ebn0_db_ci95,
            "detection_loss_db": self.detection_loss_db,
            "detection_loss_db_ci95": self.detection_loss_db_ci95,
            "rician_k_db": None if self.fading is None else self.fading.k_db,
            "fading": None if self.fading is None else self.fading.to_dict(),
            "predicted_ber": self.predicted_ber,
            "bit_errors": bc.bit_errors if counted else None,
            "bits_checked": bc.bits_checked if counted else None,
            "measured_ber": bc.ber if counted else None,
            "measured_ber_ci95": bc.ber_ci95 if counted else None,
            "frame_found": None if self.frame is None else self.frame.found,
            "frame_start_symbol": None if self.frame is None else self.frame.start_symbol,
            "header_bit_errors": None if self.frame is None else self.frame.bit_errors,
            "gof_pvalue": None if fit is None else fit.gof_pvalue,
            "flags": list(self.flags),
            "message": self.message,
            "fit": None if fit is None else fit.to_dict(),
            "fit_da": None if self.fit_da is None else self.fit_da.to_dict(),
            "fit_dd": None if self.fit_dd is None else self.fit_dd.to_dict(),
            "fit_steady": None if self.fit_steady is None else self.fit_steady.to_dict(),
            "link": None if self.link is None else self.link.to_dict(),
            "timing": None if self.timing is None else self.timing.to_dict(),
            "frame": None if self.frame is None else self.frame.to_dict(),
            "bit_check": None if bc is None else bc.to_dict(),
        }


def _fit_ebn0(fit: NoncoherentFit | None) -> float | None:
    return fit.ebn0_db if fit is not None and fit.converged else None


@dataclass(frozen=True)
class LinkSummary:
    """The link's parameters as used, and where each came from."""

    modulation: str
    symbol_rate_hz: float | None
    symbol_rate_source: str
    tone_spacing_hz: float | None
    tone_spacing_source: str
    modulation_index: float | None
    tone_correlation: float | None
    bit_rate_hz: float | None

    def to_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass(frozen=True)
class Summary:
    """The capture's headline figures."""

    bursts: int
    bursts_measured: int
    symbols: int
    ebn0_db: float | None
    ebn0_db_ci95: tuple[float, float] | None
    ebn0_db_min: float | None
    ebn0_db_max: float | None
    ebn0_db_std: float | None
    esn0_db: float | None
    ebn0_db_da: float | None
    ebn0_db_dd: float | None
    available_ebn0_db: float | None
    available_ebn0_db_ci95: tuple[float, float] | None
    detection_loss_db: float | None
    detection_loss_db_ci95: tuple[float, float] | None
    predicted_ber: float | None
    #: The prediction for the bits checked (the bursts whose payload locked, weighted by their
    #: bits): what measured_ber is to be compared with.
    predicted_ber_checked: float | None
    measured_ber: float | None
    measured_ber_ci95: tuple[float, float] | None
    bit_errors: int | None
    bits_checked: int | None
    bursts_checked: int
    required_ber: float | None
    required_ebn0_db: float | None
    margin_db: float | None
    worst_burst_margin_db: float | None
    #: Where bursts fade (fitted on the fading model): the median K of those bursts [dB], the
    #: mean Eb/N0 the target BER needs under a Rician law of that K, and the margin to it.
    fading_k_db: float | None
    fading_required_ebn0_db: float | None
    fading_margin_db: float | None
    flags: tuple[str, ...]
    message: str

    def to_dict(self) -> dict:
        d = dict(self.__dict__)
        d["flags"] = list(self.flags)
        return d


@dataclass(frozen=True)
class MeasurementReport:
    """The full result of measuring one capture."""

    facts: CaptureFacts
    profile: LinkProfile
    link: LinkSummary
    detection: BurstDetection
    bursts: tuple[BurstResult, ...]
    summary: Summary
    warnings: tuple[str, ...] = field(default=())
