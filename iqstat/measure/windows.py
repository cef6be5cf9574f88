"""Reading the bursts' windows: margins, fast lengths, front-end corrections, batches, narrowing.

Owns what the later stages see of the samples. A burst's window is its detected span with
EDGE_MARGIN_SYMBOLS symbols more on each side, widened to a length with small prime factors
(scipy.fft.next_fast_len). Every window is read with the receiver's DC offset and quadrature
imbalance (measured in the gaps by :mod:`iqstat.bursts`, :mod:`iqstat.frontend`) taken off and
the continuous lines beside the band cut out (:mod:`iqstat.excise`); consecutive dense bursts
are read with one read of their span. Bursts are measured in batches of at most BATCH_BURSTS
and about BATCH_SAMPLES samples. For the blind rate estimates of a far oversampled capture a
window is narrowed to a few band widths by a brick-wall choice of DFT bins (:func:`_narrowed`).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence

import numpy as np
import scipy.fft

from iqstat.bursts import Burst, BurstDetection
from iqstat.capture import Capture
from iqstat.excise import cut_bands, notch_bands

#: Symbols read beyond each detected edge, so that timing and frame search see whole symbols.
EDGE_MARGIN_SYMBOLS = 2.0

#: Bursts measured together (each stage runs over the batch): at most this many …
BATCH_BURSTS = 64

#: … and about this many samples in their windows (bounds the batch's memory).
BATCH_SAMPLES = 1 << 20

#: Blind estimates see the burst band-limited and decimated to about this many times the
#: detection band's width when the capture is sampled far faster than that (the blind symbol
#: rate search spans fs/1000 to fs/4: a 4.8 kBd link at 10 MS/s lay below it).
BLIND_RATE_BANDWIDTHS = 4.0

#: ... when fs is more than this many times the detection band (else the samples as they are).
BLIND_DECIMATE_ABOVE = 64.0


def _window(capture: Capture, burst: Burst, margin: int) -> tuple[int, int]:
    """The burst's sample range with ``margin`` more on each side, as ``(first, stop)``.

    The window is widened to a length with small prime factors, so that every FFT the later
    stages take of it is fast (an arbitrary length can be prime and cost 10× more).
    """
    a = max(0, burst.start_sample - margin)
    b = min(capture.n_samples, burst.stop_sample + margin)
    n = min(scipy.fft.next_fast_len(b - a), capture.n_samples)
    b = min(capture.n_samples, a + n)
    a = max(0, b - n)
    return a, b


def _read(capture: Capture, start: int, count: int, det: BurstDetection) -> np.ndarray:
    """Samples [start, start + count) with the receiver's DC offset and quadrature imbalance
    (measured in the gaps by the burst detection) taken off, and the continuous lines beside
    the band cut out (iqstat.excise); a new array."""
    x = capture.read(start, count)
    if det.dc_offset:
        x -= np.complex64(det.dc_offset)
    x = det.iq.apply(x)
    if det.lines:
        fs = capture.sample_rate_hz
        x = cut_bands(x, notch_bands(det.lines, det.band_hz, fs / det.frame_samples), fs)
    return x


def _read_burst(
    capture: Capture, burst: Burst, margin: int, det: BurstDetection
) -> tuple[int, np.ndarray]:
    """The burst's window (see :func:`_window`) as ``(first index, samples)``; see _read."""
    a, b = _window(capture, burst, margin)
    return a, _read(capture, a, b - a, det)


def _read_bursts(
    capture: Capture, bursts: Sequence[Burst], margin: int, det: BurstDetection
) -> list[tuple[int, np.ndarray]]:
    """The windows of consecutive bursts; one read of their whole span where they are dense.

    The front end's artefacts measured in the gaps are taken off (:func:`_read`). The DC
    offset: a constant leaks into every tone correlator over a symbol (for a tone half a
    cycle per symbol from DC, 2/π of its amplitude times the symbol's samples) and adds
    coherently, where noise adds in power; a DC 16 dB under the noise power costs ~2 dB of
    Eb/N0. The quadrature imbalance: the image of the sent tone lands on the other tone's
    correlator (:mod:`iqstat.frontend`).
    Windows may overlap (close bursts); they are views of one array then, and no stage
    writes into its samples.
    """
    spans = [_window(capture, b, margin) for b in bursts]
    if not spans:
        return []
    lo, hi = spans[0][0], max(b for _, b in spans)
    if hi - lo > 2 * sum(b - a for a, b in spans):
        return [(a, _read(capture, a, b - a, det)) for a, b in spans]
    block = _read(capture, lo, hi - lo, det)
    return [(a, block[a - lo : b - lo]) for a, b in spans]


#: A transmission longer than this many samples is measured in consecutive parts of at most
#: it (each with its own carrier, timing and fit): memory stays bounded whatever its length
#: (a 100 s continuous stream at 250 kS/s took 6.4 GB read whole), and a slow drift of the
#: carrier or clock is followed part by part. 2^19 samples: 2.1 s at 250 kS/s, some 10 000
#: symbols at 4.8 kBd.
MAX_PART_SAMPLES = 1 << 19


def _parts(bursts: Sequence[Burst]) -> tuple[Burst, ...]:
    """The bursts, those longer than MAX_PART_SAMPLES cut into equal consecutive parts, all
    numbered again in order."""
    out = []
    for b in bursts:
        n = b.stop_sample - b.start_sample
        k = -(-n // MAX_PART_SAMPLES)
        edges = [b.start_sample + (n * i) // k for i in range(k + 1)]
        for j in range(k):
            out.append(
                dataclasses.replace(
                    b,
                    index=len(out),
                    start_sample=edges[j],
                    stop_sample=edges[j + 1],
                    part=j,
                    parts=k,
                )  # fmt: skip
            )
    return tuple(out)


def _batches(bursts: Sequence[Burst], margin: int) -> list[list[Burst]]:
    """Consecutive bursts in groups of at most BATCH_BURSTS and about BATCH_SAMPLES samples."""
    out: list[list[Burst]] = [[]]
    total = 0
    for b in bursts:
        n = b.n_samples + 2 * margin
        if out[-1] and (len(out[-1]) >= BATCH_BURSTS or total + n > BATCH_SAMPLES):
            out.append([])
            total = 0
        out[-1].append(b)
        total += n
    return out if out[0] else []


def _narrowed(x: np.ndarray, fs: float, band_hz) -> tuple[np.ndarray, float]:
    """The burst kept to a band around the detection band and resampled to its width.

    A brick-wall choice of DFT bins (a power of two of them, about BLIND_RATE_BANDWIDTHS band
    widths, centred on the band) and their inverse transform: the samples at rate fs·k/n with
    the band's centre at 0 Hz. Unchanged when the capture is not far oversampled.
    """
    if band_hz is None or x.size < 64:
        return x, fs
    lo, hi = band_hz
    width = hi - lo
    if not width > 0 or fs <= BLIND_DECIMATE_ABOVE * width:
        return x, fs
    n = x.size
    keep = 1 << max(6, math.ceil(math.log2(BLIND_RATE_BANDWIDTHS * width / fs * n)))
    if 2 * keep > n:
        return x, fs
    spec = scipy.fft.fft(x)
    k0 = int(round(0.5 * (lo + hi) / fs * n))
    idx = (k0 + np.arange(-(keep // 2), keep - keep // 2)) % n
    y = scipy.fft.ifft(np.fft.ifftshift(spec[idx])) * (keep / n)
    return y.astype(np.complex64), fs * keep / n
