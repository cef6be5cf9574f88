"""Steady lines inside the signal band, cancelled coherently from the samples.

A carrier or spur inside the band cannot be cut out of the spectrum (that would cut the signal
too), but a *steady* one can be subtracted: it is there all through the capture, so the gaps
between bursts give its frequency, amplitude and phase, and the line the gaps show is taken
off every sample, bursts included. What the subtraction removes of a burst is its projection
onto a line of the gaps' duration, a fraction ~1/(T_gap·B) of its power (B its bandwidth):
nothing the correlators would miss.

:func:`fit_line_model` measures each line in every gap long enough (the complex amplitude at
the line's frequency, refined from the longest gap's spectrum, then from the phase advance
across the gaps) and keeps it as knots that :class:`LineModel` interpolates linearly in time
(amplitude and phase may drift slowly). A line is cancelled only when it is steady enough
that what would be left, measured by predicting each interior gap from its neighbours, leaks
less into a symbol correlator than the interference threshold allows; a modulated interferer
fails that test and stays flagged. :class:`LineCancelledCapture` is the capture with the lines
taken off, read by the same API, so burst detection and measurement run on it unchanged.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.fft

from iqstat.bursts.results import INTERFERENCE_LEAK_RATIO, BurstDetection, ContinuousLine
from iqstat.capture import Capture, CorrectedCapture

__all__ = ["LineModel", "LineCancelledCapture", "fit_line_model"]

#: Gaps shorter than this many detection frames (after a guard of GUARD_FRAMES at each end)
#: are not used.
MIN_GAP_FRAMES = 4
GUARD_FRAMES = 2
#: At least this many gaps: the steadiness test predicts the interior ones from neighbours.
MIN_GAPS = 3
#: Without enough gaps (a strong line can hide them from the detection), blocks of this
#: duration over the whole capture: what a burst adds to a block's estimate is its projection
#: onto a line of the block's duration, ~P_s/(T·B) of its power.
BLOCK_S = 0.1
#: Memory stays bounded: at most MAX_SPANS gaps (or blocks), evenly spread over the capture,
#: each at most MAX_SPAN_S long (its middle), are read.
MAX_SPANS = 64
MAX_SPAN_S = 0.1
#: The residual a cancelled line may leave, as a fraction of the interference threshold.
RESIDUAL_SHARE = 0.5
#: Samples of the line model made at a time.
_BLOCK = 1 << 16
#: Zero padding of the frequency search on the longest gap.
_PAD = 8


@dataclass(frozen=True)
class _Track:
    freq_hz: float
    knots: np.ndarray  # sample positions
    amps: np.ndarray  # complex amplitude at the knots (after demodulation at freq_hz)


class LineModel:
    """Steady lines as complex amplitudes at knots (linear in time between them, constant
    before the first and after the last), each at its own frequency."""

    def __init__(self, tracks: Sequence[_Track], fs: float) -> None:
        self.tracks = tuple(tracks)
        self.fs = float(fs)

    def samples(self, start: int, n: int) -> np.ndarray:
        """The lines' sum over samples [start, start + n), complex64 (made in blocks of
        _BLOCK samples, so that the temporaries stay small whatever n is)."""
        out = np.zeros(n, dtype=np.complex64)
        for a in range(0, n, _BLOCK):
            m = min(_BLOCK, n - a)
            pos = (start + a) + np.arange(m, dtype=np.float64)
            for tr in self.tracks:
                c = np.interp(pos, tr.knots, tr.amps.real) + 1j * np.interp(
                    pos, tr.knots, tr.amps.imag
                )
                step = tr.freq_hz / self.fs
                frac0 = (step * (start + a)) % 1.0  # the phase at the block's start, kept small
                out[a : a + m] += c * np.exp(2j * np.pi * (frac0 + step * np.arange(m)))
        return out


class LineCancelledCapture(CorrectedCapture):
    """A capture read with steady lines subtracted (every read path of :class:`Capture`)."""

    def __init__(self, base: Capture, model: LineModel) -> None:
        super().__init__(base)
        self.line_model = model

    def _correct(self, start: int, x: np.ndarray, scale: float) -> None:
        lines = self.line_model.samples(start, len(x))
        x -= lines if scale == 1.0 else lines / np.float32(scale)


def _gap_spans(detection: BurstDetection, n_samples: int) -> list[tuple[int, int]]:
    """Noise-only spans between the bursts, less a guard at each end."""
    guard = GUARD_FRAMES * detection.frame_samples
    edges = [0]
    for b in detection.bursts:
        edges += [b.start_sample, b.stop_sample]
    edges.append(n_samples)
    spans = []
    for a, b in zip(edges[::2], edges[1::2], strict=True):
        a2 = a + (guard if a > 0 else 0)
        b2 = b - (guard if b < n_samples else 0)
        if b2 - a2 >= MIN_GAP_FRAMES * detection.frame_samples:
            spans.append((a2, b2))
    return spans


def _bounded(spans, max_len: int) -> list[tuple[int, int]]:
    """At most MAX_SPANS of the spans, evenly spread, each cut to its middle max_len."""
    if len(spans) > MAX_SPANS:
        pick = np.unique(np.linspace(0, len(spans) - 1, MAX_SPANS).round().astype(int))
        spans = [spans[i] for i in pick]
    out = []
    for a, b in spans:
        if b - a > max_len:
            a = (a + b - max_len) // 2
            b = a + max_len
        out.append((a, b))
    return out


def _peak_hz(x: np.ndarray, lo_hz: float, hi_hz: float, fs: float) -> float:
    """Frequency of the largest zero-padded DFT bin of x in [lo, hi], refined by a parabola
    through its log magnitudes and its two neighbours."""
    nfft = scipy.fft.next_fast_len(_PAD * len(x))
    spec = np.abs(scipy.fft.fft(x, nfft)) ** 2
    f = scipy.fft.fftfreq(nfft, 1.0 / fs)
    idx = np.flatnonzero((f >= lo_hz) & (f <= hi_hz))
    if idx.size == 0:
        return 0.5 * (lo_hz + hi_hz)
    k = int(idx[np.argmax(spec[idx])])
    a, b, c = (math.log(max(spec[(k + d) % nfft], 1e-300)) for d in (-1, 0, 1))
    den = a - 2.0 * b + c
    shift = 0.5 * (a - c) / den if den < 0 else 0.0
    return float(f[k] + shift * fs / nfft)


def _amplitudes(xs, spans, freq_hz: float, fs: float) -> np.ndarray:
    """Mean of x·e^{−j2πf n/fs} over each span (n the absolute sample index)."""
    out = []
    for x, (a, _) in zip(xs, spans, strict=True):
        step = freq_hz / fs
        ph = 2j * np.pi * ((step * a) % 1.0 + step * np.arange(len(x)))
        out.append(np.mean(x * np.exp(-ph)))
    return np.array(out)


def fit_line_model(
    capture: Capture,
    detection: BurstDetection,
    lines: Sequence[ContinuousLine],
    symbol_rate_hz: float,
) -> tuple[LineModel | None, str]:
    """Measure the given lines in the gaps and decide whether they can be cancelled.

    Returns
    -------
    (LineModel or None, str)
        The model of every line (None when any of them cannot be cancelled) and why.
    """
    fs = capture.sample_rate_hz
    spans = _gap_spans(detection, capture.n_samples)
    in_gaps = len(spans) >= MIN_GAPS
    if not in_gaps:
        blk = int(BLOCK_S * fs)
        spans = [(a, min(a + blk, capture.n_samples)) for a in range(0, capture.n_samples, blk)]
        spans = [sp for sp in spans if sp[1] - sp[0] >= blk // 2]
        if len(spans) < MIN_GAPS:
            return None, "the capture is too short to measure the line's steadiness"
    spans = _bounded(spans, int(MAX_SPAN_S * fs))
    dc = np.complex64(detection.dc_offset)
    xs = [capture.read(a, b - a) - dc for a, b in spans]
    n = np.array([b - a for a, b in spans], dtype=float)
    centres = np.array([0.5 * (a + b) for a, b in spans])
    sigma2 = detection.noise_var
    # What a symbol correlator may be left with: a line of power C leaks C·T into it, against
    # its noise N0 = σ²/fs; RESIDUAL_SHARE of the interference threshold.
    allowed = RESIDUAL_SHARE * INTERFERENCE_LEAK_RATIO * (sigma2 / fs) * symbol_rate_hz
    longest = int(np.argmax(n))
    tracks = []
    for ln in lines:
        half_bin = fs / detection.frame_samples
        f = _peak_hz(xs[longest], ln.f_lo_hz - half_bin, ln.f_hi_hz + half_bin, fs)
        c = _amplitudes(xs, spans, f, fs)
        # The phase advance across the gaps refines the frequency (weighted by |c|²·n), over
        # spans ever farther from the longest one, so that the phase never wraps unseen.
        t = centres / fs
        reach = 4.0 * float(np.min(np.diff(t))) if len(t) > 1 else 0.0
        while True:
            near = np.abs(t - t[longest]) <= reach
            if np.count_nonzero(near) >= 2:
                phi = np.unwrap(np.angle(c[near]))
                wts = (np.abs(c) ** 2 * n)[near]
                tn = t[near]
                tm = np.sum(wts * tn) / np.sum(wts)
                slope = np.sum(wts * (tn - tm) * phi) / np.sum(wts * (tn - tm) ** 2)
                f += slope / (2.0 * np.pi)
                c = _amplitudes(xs, spans, f, fs)
            if near.all():
                break
            reach *= 2.0
        # Steadiness: each interior gap predicted linearly from its neighbours; the error
        # beyond what the noise of the three estimates explains is what would be left.
        w2 = (centres[1:-1] - centres[:-2]) / (centres[2:] - centres[:-2])
        pred = (1.0 - w2) * c[:-2] + w2 * c[2:]
        err = np.abs(c[1:-1] - pred) ** 2
        # Each estimate's variance: σ²/n in the gaps; in blocks with bursts, what is left of
        # the block's power after the line, over n (the bursts act as noise on it).
        rest = (
            np.full(len(c), sigma2)
            if in_gaps
            else np.array([np.mean(np.abs(x) ** 2) for x in xs]) - np.abs(c) ** 2
        )
        var = rest / n
        noise = var[1:-1] + (1.0 - w2) ** 2 * var[:-2] + w2**2 * var[2:]
        left = max(float(np.mean(err - noise)), 0.0)
        if left > allowed:
            return None, (
                f"the line at {f:.1f} Hz is not steady enough to cancel: it would leave "
                f"{10 * math.log10(left / sigma2):.1f} dBc of the noise power"
            )
        tracks.append(_Track(freq_hz=float(f), knots=centres, amps=c))
    return LineModel(tracks, fs), f"{len(tracks)} steady line(s) in the band cancelled"
