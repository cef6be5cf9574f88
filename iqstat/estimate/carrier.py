"""Carrier offset (and a blind spacing) of one burst whose symbol rate is known.

Owns the carrier fit of one burst: the lines of the p-th power where p·h is an integer, the
joint search of all M lines next to a coarse carrier, and the energy search where no line
stands out; and :func:`_line_power_for`, which says which power has lines.

* **Carrier and tones from spectral lines.** A CPFSK signal whose p-th power has a modulation
  index p·h that is an integer carries discrete spectral lines at p·f_i (h = 1: the signal itself;
  h = ½: its square). For h = ½ the spectrum of the signal itself has no lines (METHODS §10), so
  the strongest spectral peaks are not the tones; the squared signal's lines are. Each line is
  located on the FFT grid and refined by three-bin interpolation (Jacobsen with Candan's
  correction, METHODS §5); a line is coherent over the whole burst, so the precision is that of a
  tone estimate over the burst, not over one symbol. OOK with a continuous carrier has a line at
  the carrier.
* **Energy search** (fallback when no lines stand out: other modulation indices, a carrier whose
  phase jumps). The carrier offset maximises the mean of E[n] = max_i |y_i[n]|², y_i the sliding
  one-symbol correlators on the trial tones: a residual offset δf scales the matched energy by
  sinc²(δf·T) whichever tone is sent, so the maximum does not move with the data balance.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
from scipy import special

from iqstat.estimate.link_estimate import LINE_THRESHOLD_DB, _ToneFit, tone_offsets_hz
from iqstat.estimate.spectrum import (
    _LINE_POWERS,
    _Burst,
    _power_spectrum_for_lines,
    interpolate_peak_bin,
)

#: Lines sought next to the energy search's carrier within ± this many symbol rates.
LINE_NEAR_REACH_SYMBOLS = 0.1


def _square_band_hz(offsets_hz: np.ndarray, rate_hz: float) -> float:
    """Half-width kept around the carrier before the p-th power: outer tone + 0.4·Rs.

    The noise × noise part of x² grows with the bandwidth kept; the main lobe of h = 1/2
    CPFSK ends 0.75·Rs from the carrier. Measured at 0 dB Eb/N0, 2-FSK h = 1/2 (200 bursts
    of 560 symbols): half-widths 0.52–0.75·Rs all find both lines with errors below 1.5 Hz,
    0.94·Rs loses 0.5 % of the bursts, the former outer tone + 2·Rs was 4–5 dB worse.
    """
    return float(np.max(np.abs(offsets_hz))) + 0.4 * rate_hz


def _fit_lines(
    b: _Burst,
    p: int,
    center_hz: float,
    spacing_hz: float | None,
    rate_hz: float,
    spacing_known: bool,
) -> _ToneFit | None:
    """Tones from the lines of the p-th power; None if any line is below the threshold."""
    offsets = tone_offsets_hz(b.modulation, spacing_hz)
    sig_half = float(offsets[-1]) + rate_hz if b.m > 1 else rate_hz
    spec = _power_spectrum_for_lines(b, p, center_hz, sig_half + rate_hz)
    pw = b.power if p == 1 else spec.real**2 + spec.imag**2
    half = 0.4 * p * spacing_hz if b.m > 1 else 0.5 * rate_hz
    freqs, powers, proms = [], [], []
    for pred in p * (center_hz + offsets):  # M ≤ 4 tones
        idx = b.bins_near(float(pred), half)
        k = int(idx[np.argmax(pw[idx])])
        med = float(np.median(pw[idx]))
        prom = 10 * math.log10(pw[k] / med) if med > 0 and pw[k] > 0 else -math.inf
        fk = interpolate_peak_bin(spec, k) * b.df_hz
        fk = fk + b.fs * round((pred - fk) / b.fs)  # representative nearest the prediction
        freqs.append(fk / p)
        powers.append(pw[k])
        proms.append(prom)
    # Use the lines that stand out (GFSK weakens the outer 4fsk lines): one is enough with a
    # known spacing, two are needed to measure it.
    ok = np.asarray(proms) >= LINE_THRESHOLD_DB
    if ok.sum() < (1 if spacing_known else 2):
        return None
    f = np.asarray(freqs)[ok]
    w = np.asarray(powers)[ok] / np.sum(np.asarray(powers)[ok])
    weakest = float(np.min(np.asarray(proms)[ok]))
    if b.m == 1:
        return _ToneFit(float(f[0]), None, p, weakest, "carrier-line")
    idx = (np.arange(b.m) - (b.m - 1) / 2.0)[ok]
    offsets = offsets[ok]
    if spacing_known:
        cfo, spacing = float(np.sum(w * (f - offsets))), spacing_hz
    else:
        # weighted least squares of f_i = cfo + idx_i·Δf
        mi = np.sum(w * idx)
        mf = np.sum(w * f)
        spacing = float(np.sum(w * (idx - mi) * (f - mf)) / np.sum(w * (idx - mi) ** 2))
        cfo = float(mf - spacing * mi)
    method = "tone-lines" if p == 1 else f"power-{p}-lines"
    return _ToneFit(cfo, spacing, p, weakest, method)


def _grid_maximise(fun, lo: float, hi: float, n: int = 33, rounds: int = 3) -> float:
    """Maximise a smooth scalar function: grid, then parabolic steps on shrinking grids."""
    best = 0.5 * (lo + hi)
    for _ in range(rounds):
        grid = np.linspace(lo, hi, n)
        vals = np.array([fun(g) for g in grid])  # loop over trial values, not samples
        k = int(np.clip(np.argmax(vals), 1, n - 2))
        a, b0, c = vals[k - 1], vals[k], vals[k + 1]
        den = a - 2 * b0 + c
        step = grid[1] - grid[0]
        best = grid[k] + (0.5 * (a - c) / den * step if den < 0 else 0.0)
        lo, hi = best - 2 * step, best + 2 * step
        n = 9
    return float(best)


def _energy_search(
    b: _Burst, center_hz: float, spacing_hz: float | None, rate_hz: float, spacing_known: bool
) -> _ToneFit:
    """Carrier (and spacing) maximising the mean sliding correlator energy."""
    window = max(2, int(round(b.fs / rate_hz)))
    offsets = tone_offsets_hz(b.modulation, spacing_hz)

    def energy(cfo: float, offs: np.ndarray) -> float:
        c = b.mixed_cumsum(cfo + offs)
        y = c[:, window:] - c[:, :-window]
        return float(np.mean(np.max(y.real**2 + y.imag**2, axis=0)))

    reach = 0.5 * spacing_hz if b.m > 1 else 0.5 * rate_hz
    cfo = _grid_maximise(lambda c: energy(c, offsets), center_hz - reach, center_hz + reach)
    spacing = spacing_hz
    if b.m > 1 and not spacing_known:
        for _ in range(2):
            unit = offsets / spacing
            spacing = _grid_maximise(
                lambda s, c=cfo, u=unit: energy(c, u * s), 0.7 * spacing, 1.3 * spacing, n=25
            )
            offsets = unit * spacing
            cfo = _grid_maximise(
                lambda c, o=offsets: energy(c, o), cfo - 0.1 * spacing, cfo + 0.1 * spacing, n=17
            )
    return _ToneFit(cfo, spacing, 0, None, "energy-search")


def _lines_near(
    b: _Burst, p: int, guess: _ToneFit, rate_hz: float, reach_hz: float | None = None
) -> _ToneFit | None:
    """The energy search's carrier refined by the p-th-power lines found right next to it.

    Where the lines are too weak to find in the whole window (0–2 dB at h = ½), they can
    still be found within the energy search's flat top: the line powers of all M tones at a
    common shift are summed over shifts of ±``LINE_NEAR_REACH_SYMBOLS``·Rs·p, and the best
    shift is kept only when its sum is improbable for noise over that many shifts (a Gamma(M)
    tail below 1e-3 for the largest of them).
    """
    offsets = tone_offsets_hz(b.modulation, guess.spacing_hz)
    spec = _power_spectrum_for_lines(b, p, guess.cfo_hz, _square_band_hz(offsets, rate_hz))
    pw = b.power if p == 1 else spec.real**2 + spec.imag**2
    if reach_hz is None:
        reach_hz = LINE_NEAR_REACH_SYMBOLS * rate_hz
    reach = max(1, int(round(reach_hz * p / b.df_hz)))
    shifts = np.arange(-reach, reach + 1)
    centres = np.round(p * (guess.cfo_hz + offsets) / b.df_hz).astype(np.int64)
    idx = (centres[:, None] + shifts[None, :]) % b.n  # (M, shifts)
    total = pw[idx].sum(axis=0)
    # Noise level per bin: the median of a wide neighbourhood of each line (ln 2·mean).
    wide = (centres[:, None] + np.arange(-8 * reach, 8 * reach + 1)[None, :]) % b.n
    mean_noise = float(np.median(pw[wide])) / math.log(2.0)
    if not mean_noise > 0:
        return None
    m = len(offsets)
    threshold = float(special.gammainccinv(m, 1e-3 / len(shifts)))  # Gamma(M, 1) tail
    best = int(np.argmax(total))
    if total[best] / mean_noise < threshold:
        return None
    freqs = []
    for c, off in zip(centres, offsets, strict=True):
        k = int((c + shifts[best]) % b.n)
        fk = interpolate_peak_bin(spec, k) * b.df_hz
        pred = p * (guess.cfo_hz + off)
        fk = fk + b.fs * round((pred - fk) / b.fs)  # representative nearest the prediction
        freqs.append(fk / p)
    cfo = float(np.mean(np.asarray(freqs) - offsets))
    line_db = 10 * math.log10(total[best] / (m * mean_noise))
    return _ToneFit(cfo, guess.spacing_hz, p, line_db, f"{guess.method}+lines-near")


def _fit_tones(
    b: _Burst, center_hz: float, spacing_hz: float | None, rate_hz: float, spacing_known: bool
) -> _ToneFit:
    """Lines of the p-th power where p·h is near an integer, else the energy search."""
    if b.m == 1:
        fit = _fit_lines(b, 1, center_hz, None, rate_hz, True)
        if fit is not None:
            return fit
        return _carrier_by_energy(b, center_hz, None, rate_hz, True)
    h = spacing_hz / rate_hz
    for p in _LINE_POWERS:
        ph = p * h
        k = round(ph)
        if k < 1 or abs(ph - k) > (0.02 if spacing_known else 0.3):
            continue
        if spacing_known:
            # All M lines at one common shift: their powers add, so they are found where no
            # single one stands out (h = 1/2 at 0 dB).
            coarse = _ToneFit(center_hz, spacing_hz, 0, None, "centroid")
            fit = _lines_near(b, p, coarse, rate_hz, reach_hz=0.5 * spacing_hz)
            if fit is not None:
                return replace(fit, method="tone-lines" if p == 1 else f"power-{p}-lines")
        # blind: predict the lines with the nearest p·h integer, the lines then say where
        guess = spacing_hz if spacing_known else k * rate_hz / p
        fit = _fit_lines(b, p, center_hz, guess, rate_hz, spacing_known)
        if fit is not None:
            return fit
    return _carrier_by_energy(b, center_hz, spacing_hz, rate_hz, spacing_known)


def _carrier_by_energy(
    b: _Burst, center_hz: float, spacing_hz: float | None, rate_hz: float, spacing_known: bool
) -> _ToneFit:
    """The energy search, then the lines right next to its carrier where p·h is an integer."""
    coarse = _energy_search(b, center_hz, spacing_hz, rate_hz, spacing_known)
    if b.m == 1:
        return coarse
    for p in _LINE_POWERS:
        ph = p * coarse.spacing_hz / rate_hz
        if round(ph) >= 1 and abs(ph - round(ph)) <= 0.02:
            near = _lines_near(b, p, coarse, rate_hz)
            if near is not None:
                return near
    return coarse


def _line_power_for(m: int, spacing_hz: float | None, rate_hz: float) -> int | None:
    """p of the p-th power with lines (p·h within 0.02 of an integer), 1 for OOK, or None."""
    if m == 1:
        return 1
    h = spacing_hz / rate_hz
    for p in _LINE_POWERS:
        k = round(p * h)
        if k >= 1 and abs(p * h - k) <= 0.02:
            return p
    return None
