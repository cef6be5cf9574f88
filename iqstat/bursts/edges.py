"""Edge refinement: every burst edge to one sample, by change points with known levels.

Each group's edges are first placed on the frame powers inside the windows the grouping allows,
then to the sample on the power of band-limited samples read back around that frame (a
brick-wall FFT mask on each window). Both levels use the same CUSUM with known mean powers
(noise N, burst B): the step maximises the summed log-likelihood ratio of exponential powers
after a rising or before a falling edge (Page, Biometrika 41, 1954 [mem]). Groups are refined in
batches with a fixed number of numpy calls per batch.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.fft

from iqstat.bursts.frame_detection import _Group, _runs
from iqstat.bursts.readback import _power64, _read_windows
from iqstat.capture import Capture

# Sample-level edge search: this many frames either side of the frame-level edge.
_REFINE_HALF_FRAMES = 3
# Groups refined per batch: bounds the temporaries (a few 2-D arrays of 2 edges × ~2 k
# samples per group, complex64) to ~20 MB.
_REFINE_BATCH_GROUPS = 256


def _change_points(
    rows: np.ndarray, lengths: np.ndarray, noise: float, burst: np.ndarray, rising: np.ndarray
) -> np.ndarray:
    """ML positions of steps between two known mean powers, one per row; −1 where none.

    Parameters
    ----------
    rows : ndarray, shape (n_edges, width)
        Powers; row e holds ``lengths[e]`` values, the rest is padding.
    lengths : ndarray of int, shape (n_edges,)
    noise : float
        Mean power N before a rising (after a falling) edge.
    burst : ndarray, shape (n_edges,)
        Mean power B of the burst beside each edge.
    rising : ndarray of bool, shape (n_edges,)

    Notes
    -----
    Each sample adds the log-likelihood ratio r = p·(1/N − 1/B) − ln(B/N) of exponential
    powers of mean B (burst) against N (noise); the step maximises Σ r after it (rising edge)
    or before it (falling edge), a CUSUM with known levels (Page, Biometrika 41, 1954 [mem]).
    Signal-plus-noise power is not exponential, but r stays linear in p, so only the
    variance, not the location, of the estimate depends on that approximation. No step is
    placed (−1) when B ≤ 1.01·N or a row has fewer than two values. The sums run in the
    rows' precision.
    """
    burst = np.asarray(burst, dtype=np.float64)
    ok = (burst > 1.01 * noise) & (1.01 * noise > 0) & (lengths >= 2)
    n = noise if noise > 0 else 1.0
    b = np.where(ok, burst, 2.0 * n)
    dt = rows.dtype
    # rising: maximise c[n] − c[τ] → minimise c[τ]; falling: maximise c[τ] (minimise −c[τ]).
    # The sign goes into the coefficients: negation is exact, so −c is the sum of −r.
    sign = np.where(rising, 1.0, -1.0)
    c = np.empty((rows.shape[0], rows.shape[1] + 1), dtype=dt)
    c[:, 0] = 0
    r = c[:, 1:]
    np.multiply(rows, (sign * (1.0 / n - 1.0 / b)).astype(dt)[:, None], out=r)
    r -= (sign * np.log(b / n)).astype(dt)[:, None]
    np.cumsum(r, axis=1, out=r)
    np.copyto(c, np.inf, where=np.arange(c.shape[1]) > lengths[:, None])
    return np.where(ok, np.argmin(c, axis=1), -1)


def _refine_many(
    capture: Capture,
    groups: list[_Group],
    L: int,
    band_hz,
    p: np.ndarray,
    floor: float,
    dof: float,
    end_energy: dict | None = None,
    dc: complex = 0j,
    taper: bool = False,
) -> list[tuple[int, int]]:
    """Edges of every group to one sample: frame-level CUSUM, then sample level around it.

    ``taper`` ramps the ends of each window read (the pads beside the searched samples), for
    captures with a strong continuous line beside the band.

    Groups are refined in batches of ``_REFINE_BATCH_GROUPS`` with a fixed number of numpy
    calls per batch (plus one read per span of nearby edges, and one FFT per distinct length
    of the band-limited windows). ``end_energy``, if given, receives Σ|x|² of the partial frame
    inside each refined edge, keyed by its sample range, from the samples read here
    (:func:`_mean_power` needs them). The samples read are taken less ``dc``, the receiver's
    DC offset (as the frame powers ``p`` are).
    """
    out: list[tuple[int, int]] = []
    for i in range(0, len(groups), _REFINE_BATCH_GROUPS):
        batch = groups[i : i + _REFINE_BATCH_GROUPS]
        out.extend(_refine_batch(capture, batch, L, band_hz, p, floor, dof, end_energy, dc, taper))
    return out


def _refine_batch(capture, groups, L, band_hz, p, floor, dof, end_energy, dc, taper):
    n = capture.n_samples
    n_frames = p.size
    fs = capture.sample_rate_hz
    g = np.array(
        [(x.start, x.stop, x.start_lo, x.start_hi, x.stop_lo, x.stop_hi) for x in groups],
        dtype=np.int64,
    ).reshape(-1, 6)
    n_g = g.shape[0]
    if n_g == 0:
        return []
    # Mean in-band frame power of each group (pairs [start, stop) of an index list).
    level = np.add.reduceat(np.append(p, 0.0), g[:, :2].ravel())[0::2] / np.maximum(
        g[:, 1] - g[:, 0], 1
    )
    # Both edges of every group: starts (rising) first, then stops (falling).
    lo = np.concatenate((g[:, 2], g[:, 4]))
    hi = np.concatenate((g[:, 3], g[:, 5]))
    rising = np.repeat([True, False], n_g)
    lev = np.concatenate((level, level))
    edges = np.concatenate((g[:, 0] * L, np.minimum(g[:, 1] * L, n)))

    # Frame level: the same CUSUM on frame powers (Gamma(dof) ≈ dof exponential samples).
    w = np.maximum(hi - lo, 0)
    j = np.arange(max(int(w.max()), 1))
    pd = p * dof
    rows = np.where(j < w[:, None], pd[np.clip(lo[:, None] + j, 0, n_frames - 1)], 0.0)
    t = _change_points(rows, w, floor * dof, lev * dof, rising)
    e = lo + t
    a = np.maximum(lo, e - _REFINE_HALF_FRAMES) * L
    b = np.minimum(hi, e + _REFINE_HALF_FRAMES)
    # A window reaching the last frame also takes the partial frame after it.
    b = np.where(b >= n_frames, n, b * L)
    # Sample level, on the edges that have a frame-level change point, in capture order.
    sel = np.flatnonzero(t >= 0)
    sel = sel[np.argsort(a[sel], kind="stable")]
    if sel.size == 0:
        return _edges_to_spans(edges, g, L, n)
    e, a, b, rising, lev = e[sel], a[sel], b[sel], rising[sel], lev[sel]
    m = b - a
    pad = 0 if band_hz is None else int(math.ceil(8.0 * fs / (band_hz[1] - band_hz[0])))
    ra, rb = np.maximum(a - pad, 0), np.minimum(b + pad, n)
    size = rb - ra
    x = _read_windows(capture, ra, int(size.max()))
    if dc:
        x -= np.complex64(dc)
    if taper and band_hz is not None and pad > 0:
        # A strong line beside the band leaks through the window's abrupt ends into the
        # band's bins (a sinc of the window length, far wider than a frame's); a raised-cosine
        # ramp over the pads (the samples before a and after b) cuts that leakage to its
        # 1/Δf³ tail and leaves the searched samples [a, b) as they are.
        j = np.arange(x.shape[1]) + 0.5
        lead = (a - ra)[:, None].astype(np.float64)
        tail = (rb - b)[:, None].astype(np.float64)
        up = np.where(lead > 0, np.clip(j / np.maximum(lead, 1.0), 0.0, 1.0), 1.0)
        down = np.where(
            tail > 0, np.clip((size[:, None] - j) / np.maximum(tail, 1.0), 0.0, 1.0), 1.0
        )
        x *= (np.sin(0.5 * np.pi * np.minimum(up, down)) ** 2).astype(np.float32)
    k = np.arange(int(m.max()))
    if band_hz is None:
        power = x.real.astype(np.float64) ** 2 + x.imag.astype(np.float64) ** 2
    else:
        # Brick-wall FFT mask on each window padded by `pad` samples each side (zero-padded
        # to its own FFT length: one FFT per distinct length).
        np.copyto(x, 0, where=np.arange(x.shape[1]) >= size[:, None])
        power = np.zeros((sel.size, k.size), dtype=np.float32)
        nffts = np.array([scipy.fft.next_fast_len(s + pad) for s in np.unique(size).tolist()])
        nfft_of = nffts[np.searchsorted(np.unique(size), size)]
        shift = a - ra  # pad, except where the window was clipped at the capture's start
        for nfft in np.unique(nfft_of).tolist():
            r = np.flatnonzero(nfft_of == nfft)
            # One copy into the zero-padded rows, transformed in place (x is zero beyond each
            # row's size already: rows that fit are taken as they are).
            if nfft <= x.shape[1]:
                X = x[:, :nfft].copy() if r.size == x.shape[0] else x[r, :nfft]
            else:
                X = np.zeros((r.size, nfft), dtype=x.dtype)
                X[:, : x.shape[1]] = x if r.size == x.shape[0] else x[r]
            X = scipy.fft.fft(X, axis=1, overwrite_x=True)
            f = scipy.fft.fftfreq(nfft, 1.0 / fs)
            r0, r1 = _runs((f < band_hz[0]) | (f > band_hz[1]))
            for u, v in zip(r0.tolist(), r1.tolist(), strict=True):
                X[:, u:v] = 0
            y = scipy.fft.ifft(X, axis=1, overwrite_x=True)
            shifts = shift[r]
            for s in np.unique(shifts).tolist():
                if shifts[0] == shifts[-1]:  # one shift (the usual case): no row selection
                    rs, ys = r, y[:, s : s + k.size]
                else:
                    rs, ys = r[shifts == s], y[shifts == s, s : s + k.size]
                # |y|² as re² + im² in float32, squares taken in place on the contiguous values
                sq = ys.view(np.float32)
                np.square(sq, out=sq)
                if rs.size == r.size and r[0] + r.size - 1 == r[-1]:
                    np.add(sq[:, 0::2], sq[:, 1::2], out=power[r[0] : r[-1] + 1, : ys.shape[1]])
                else:
                    power[rs, : ys.shape[1]] = sq[:, 0::2] + sq[:, 1::2]
    t = _change_points(power, m, floor, lev, rising)
    edge = np.where(t >= 0, a + t, e * L)
    edges[sel] = edge
    if end_energy is not None:
        # Σ|x|² of the partial frame inside the edge: [edge, next frame) or [frame, edge).
        r0 = np.where(rising, edge, edge // L * L)
        r1 = np.where(rising, -(-edge // L) * L, edge)
        has = (r1 > r0) & (ra <= r0) & (r1 <= rb)
        if has.any():
            r0, r1 = r0[has], r1[has]
            q = np.arange(L)
            col = np.minimum((r0 - ra[has])[:, None] + q, x.shape[1] - 1)
            e2 = _power64(x[np.flatnonzero(has)[:, None], col])
            np.copyto(e2, 0.0, where=q >= (r1 - r0)[:, None])
            keys = zip(r0.tolist(), r1.tolist(), strict=True)
            end_energy.update(zip(keys, e2.sum(axis=1).tolist(), strict=True))
    return _edges_to_spans(edges, g, L, n)


def _edges_to_spans(edges: np.ndarray, g: np.ndarray, L: int, n: int) -> list[tuple[int, int]]:
    """(start, stop) per group from its refined edges; the coarse extent if they cross."""
    n_g = g.shape[0]
    start, stop = edges[:n_g].copy(), edges[n_g:].copy()
    bad = stop <= start
    start[bad] = g[bad, 0] * L
    stop[bad] = np.minimum(g[bad, 1] * L, n)
    return list(zip(start.tolist(), stop.tolist(), strict=True))
