"""Continuous narrowband signals outside the signal band, cut out of the samples.

A rectangular symbol correlator has no channel filter before it: its response is a sinc of
the symbol rate, so a carrier beside the band reaches it through the sidelobes (20 dB over
the noise and 30 kHz off at 4.8 kBd, ~10 dB over the noise in each correlator, where a real
receiver's channel filter would have removed it). The lines the burst detection found in the
gaps (:class:`iqstat.bursts.ContinuousLine`) are known to hold no burst, so cutting their
bins out of a window's spectrum loses nothing of the signal and a negligible sliver of the
noise. Lines overlapping the band are left alone (cutting them would cut the signal): those
are flagged, not removed.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import scipy.fft

#: Bins kept clear on each side of a line's survey bins, as a fraction of its width (and at
#: least one survey bin): its window sidelobes fall off as 1/Δf² beyond (common practice, no
#: source).
GUARD_FRACTION = 0.5


def notch_bands(lines: Sequence, band_hz, bin_hz: float) -> tuple[tuple[float, float], ...]:
    """Frequency ranges to cut: each line outside ``band_hz`` widened by its guard, clipped
    so that it never reaches into the band."""
    out = []
    for ln in lines:
        if band_hz is not None and ln.f_hi_hz > band_hz[0] and ln.f_lo_hz < band_hz[1]:
            continue
        g = max(GUARD_FRACTION * (ln.f_hi_hz - ln.f_lo_hz), bin_hz)
        lo, hi = ln.f_lo_hz - g, ln.f_hi_hz + g
        if band_hz is not None:
            if hi <= band_hz[0] + g:  # below the band
                hi = min(hi, band_hz[0])
            else:
                lo = max(lo, band_hz[1])
        out.append((lo, hi))
    return tuple(out)


def cut_bands(x: np.ndarray, bands: Sequence[tuple[float, float]], fs: float) -> np.ndarray:
    """``x`` with the DFT bins inside ``bands`` (Hz, relative to the centre) set to zero.

    One FFT of the window's next fast length (zero-padded) and its inverse; complex64 in and
    out. A continuous line leaves its window sidelobes (the window is rectangular), which
    decay as 1/Δf² away from the cut; the bursts lie far from it.
    """
    if not bands or x.size == 0:
        return x
    n = x.size
    nfft = scipy.fft.next_fast_len(n)
    X = scipy.fft.fft(x, nfft)
    f = scipy.fft.fftfreq(nfft, 1.0 / fs)
    for lo, hi in bands:
        X[(f >= lo) & (f <= hi)] = 0
    return scipy.fft.ifft(X, overwrite_x=True)[:n].astype(np.complex64, copy=False)
