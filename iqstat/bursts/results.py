"""Results of burst detection: :class:`Burst`, :class:`BurstDetection`, :class:`FramePowers`.

Frozen dataclasses with ``to_dict()``; no computation beyond the dB conversion of the figures.
:class:`FramePowers` is the detector's input (per-frame powers and sums of the streaming pass),
the other two its output (bursts, and the noise, DC offset and I/Q imbalance of the gaps).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import numpy as np

from iqstat.frontend import IqCorrection


@dataclass(frozen=True)
class Burst:
    """One detected burst.

    Attributes
    ----------
    index : int
        Position of the burst in the capture, 0-based.
    start_sample, stop_sample : int
        First sample and one past the last sample of the burst.
    power_dbfs : float
        Mean power of the samples inside, full band, dBFS (signal plus noise).
    band_snr_db : float
        In-band SNR, (P_band − N_band)/N_band, from the frames inside; floored at −30 dB.
    peak_dbfs : float
        Highest one-frame mean power (full band) among frames wholly inside the burst, dBFS
        (the mean power for bursts shorter than two frames).
    part, parts : int
        Part ``part`` (0-based) of ``parts``: measurement cuts transmissions longer than a
        few seconds into parts (iqstat.measure.windows.MAX_PART_SAMPLES; the power figures
        are the whole one's). 0 of 1 for a burst on its own.
    """

    index: int
    start_sample: int
    stop_sample: int
    power_dbfs: float
    band_snr_db: float
    peak_dbfs: float
    part: int = 0
    parts: int = 1

    @property
    def n_samples(self) -> int:
        return self.stop_sample - self.start_sample

    def to_dict(self) -> dict:
        d = asdict(self)
        d["n_samples"] = self.n_samples
        return d


#: A continuous line left in the band is reported as interference when what it leaks into a
#: symbol correlator exceeds this fraction of the correlator's noise (common practice, no
#: source).
INTERFERENCE_LEAK_RATIO = 0.1


@dataclass(frozen=True)
class ContinuousLine:
    """A narrowband signal present all through the capture (in the gaps too): a spur, a
    carrier, an interferer; not one of the bursts.

    Attributes
    ----------
    f_lo_hz, f_hi_hz : float
        Edges of its survey bins, Hz relative to the centre frequency.
    power_dbfs : float
        Its power above the noise, dBFS.
    cn0_dbhz : float
        That power over the noise PSD under it, dB-Hz (a line C/N0).
    cancelled : bool
        Whether it was steady enough to be subtracted from the samples (a line inside the
        band, :mod:`iqstat.cancel`); the figures are then those of the capture without it.
    freq_hz : float or None
        Its frequency as measured for the cancellation (to a fraction of a hertz); else None.
    """

    f_lo_hz: float
    f_hi_hz: float
    power_dbfs: float
    cn0_dbhz: float
    cancelled: bool = False
    freq_hz: float | None = None

    @classmethod
    def of(cls, f_lo_hz: float, f_hi_hz: float, power: float, n0: float) -> ContinuousLine:
        """From its edges, its power (linear, full-scale²) and the noise PSD under it."""
        return cls(
            f_lo_hz=f_lo_hz,
            f_hi_hz=f_hi_hz,
            power_dbfs=10.0 * math.log10(power),
            cn0_dbhz=10.0 * math.log10(power / n0),
        )

    def to_dict(self) -> dict:
        return dict(self.__dict__)


@dataclass(frozen=True)
class BurstDetection:
    """Bursts of a capture and the noise measured in the gaps between them.

    Attributes
    ----------
    bursts : tuple of Burst
    noise_floor_dbfs : float
        Full-band noise power per sample, dBFS (10·log10 of ``noise_var``).
    noise_var : float
        σ², full-band noise variance per complex sample (linear, full-scale units).
    noise_psd_db_per_hz : float
        Noise PSD in the detection band with the DC offset removed, dBFS/Hz (white noise:
        σ²/fs).
    noise_psd_dof : float
        Gamma shape of that PSD estimate under white Gaussian noise (in-band DFT bins per
        frame × gap frames); its relative variance is 1/dof. 0 when there are no gaps.
    band_hz : tuple of float or None
        Edges of the occupied band used for detection (bin edges), Hz relative to the centre
        frequency; None when the full band was used.
    threshold_dbfs : float
        Start threshold of the one-frame in-band power, dBFS.
    frame_samples : int
        Frame length L used for the frame powers.
    gap_samples : int
        Samples in the noise-only gaps the noise estimates come from.
    message : str
        One line on the outcome.
    dc_offset : complex
        Mean of the samples in the gaps (full-scale units): the receiver's DC offset, which
        the noise figures above exclude and measurement subtracts. 0 without gaps, or when it
        is not significantly above what the gap noise alone gives (bursts.detect.DC_SIGNIFICANCE).
    iq : IqCorrection
        The receiver's quadrature imbalance measured on the gap noise (after the DC), and the
        correction measurement applies when it is significant.
    lines : tuple of ContinuousLine
        Narrowband signals present all through the capture, gaps included (spurs, carriers,
        interferers), from the band survey; the band is chosen among what comes and goes.
    """

    bursts: tuple[Burst, ...]
    noise_floor_dbfs: float
    noise_var: float
    noise_psd_db_per_hz: float
    noise_psd_dof: float
    band_hz: tuple[float, float] | None
    threshold_dbfs: float
    frame_samples: int
    gap_samples: int
    message: str
    dc_offset: complex
    iq: IqCorrection
    lines: tuple[ContinuousLine, ...]
    #: When the receiver's gain moved during the capture (the survey saw every bin's level
    #: move at once): how far, dB, and the per-frame noise level over its median (tracked
    #: outside the band) that iqstat.levels undoes; 0.0 and None when steady.
    gain_span_db: float = 0.0
    gain_track: np.ndarray | None = field(default=None, compare=False, repr=False)

    def interfering_lines(self, symbol_rate_hz: float | None) -> tuple[ContinuousLine, ...]:
        """The continuous lines left in the measured samples that a symbol correlator sees
        above 1/10 of its noise.

        Lines beside the band are cut out of the samples (:mod:`iqstat.excise`); those
        overlapping it stay unless they were cancelled (:mod:`iqstat.cancel`). A line of
        power C inside the band leaks C·T into a rectangular correlator of a symbol T = 1/Rs,
        whose noise is N0: flagged when (C/N0)·T exceeds INTERFERENCE_LEAK_RATIO. All lines
        count when the full band was used;
        with Rs unknown, every line left in the band.
        """
        if self.band_hz is None:
            return tuple(ln for ln in self.lines if not ln.cancelled)
        lo, hi = self.band_hz
        left = [ln for ln in self.lines if ln.f_hi_hz > lo and ln.f_lo_hz < hi and not ln.cancelled]
        if not symbol_rate_hz:
            return tuple(left)
        t = 1.0 / symbol_rate_hz
        return tuple(
            ln for ln in left if 10.0 ** (ln.cn0_dbhz / 10.0) * t > INTERFERENCE_LEAK_RATIO
        )

    @property
    def dc_offset_dbfs(self) -> float:
        """|dc|² in dBFS (−inf for none)."""
        return _db(abs(self.dc_offset) ** 2)

    def to_dict(self) -> dict:
        return {
            "bursts": [b.to_dict() for b in self.bursts],
            "noise_floor_dbfs": self.noise_floor_dbfs,
            "noise_var": self.noise_var,
            "noise_psd_db_per_hz": self.noise_psd_db_per_hz,
            "noise_psd_dof": self.noise_psd_dof,
            "band_hz": list(self.band_hz) if self.band_hz is not None else None,
            "threshold_dbfs": self.threshold_dbfs,
            "frame_samples": self.frame_samples,
            "gap_samples": self.gap_samples,
            "message": self.message,
            "dc_offset": [self.dc_offset.real, self.dc_offset.imag],
            "iq_improperness": self.iq.improperness,
            "iq_image_rejection_db": self.iq.image_rejection_db,
            "iq_corrected": self.iq.applied,
            "lines": [ln.to_dict() for ln in self.lines],
            "gain_span_db": self.gain_span_db,
        }


@dataclass(frozen=True)
class FramePowers:
    """Per-frame mean powers of a capture (the detector's input).

    Attributes
    ----------
    full : ndarray of float32, shape (n_frames,)
        Mean |x|² per frame, full band.
    band : ndarray of float32, shape (n_frames,)
        Mean in-band power per sample per frame: Σ_{k∈band}|X_k|²/L² (equals ``full`` when the
        full band is used).
    band_dof : float
        Gamma shape of one ``band`` value under white Gaussian noise (number of DFT bins in the
        band; L for the full band of a complex capture, L/2 for a real one).
    band_hz : tuple of float or None
        Band edges used (bin edges), Hz; None for the full band.
    frame_samples : int
    sums : ndarray of complex64, shape (n_frames,)
        Σx per frame (DFT bin 0): the gap frames' mean of it is the receiver's DC offset.
    dc_in_band : bool
        Whether bin 0 is one of the band's bins (so that ``band`` holds the DC's power).
    """

    full: np.ndarray
    band: np.ndarray
    band_dof: float
    band_hz: tuple[float, float] | None
    frame_samples: int
    sums: np.ndarray
    dc_in_band: bool


def _db(x: float) -> float:
    return 10.0 * math.log10(x) if x > 0 else float("-inf")
