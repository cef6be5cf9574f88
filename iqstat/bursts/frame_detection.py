"""Detection on frame powers: gamma-law hysteresis at several smoothing lengths, and grouping.

Moving means of the in-band frame powers over 1, 4, 16 and 64 frames are tested with hysteresis
against the noise floor N: a detection starts where the mean passes the Gamma-law threshold for
the false-alarm probability pfa and continues down to the threshold for √pfa
(:func:`iqstat.noise.threshold_from_floor`). The detections of all lengths are joined into
clusters; within a cluster, from the coarsest length down, two detections are split only where
the gap between them is decisively noise (Gamma log-likelihood ratio of noise against "burst
continues" above ln 1e4), and the finest length that still sees a burst whole gives its edges.
Each group carries the frame windows in which its edges are refined to the sample
(:mod:`iqstat.bursts.edges`). When the link's burst length is known, groups much longer than it
are cut at their quietest stretches.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass

import numpy as np

from iqstat.noise import threshold_from_floor

# Smoothing lengths of the detector, in frames (~1, 4, 16, 65 ms at the default frame length).
SMOOTHING_FRAMES = (1, 4, 16, 64)
# A gap between two detections is kept (the bursts are split) when the noise hypothesis beats
# the "burst continues" hypothesis by this log-likelihood ratio (1e4 : 1; common practice).
_SPLIT_LOG_LR = math.log(1e4)
#: Detections longer than this many expected bursts are split (see _split_long_groups).
LONG_BURST_FACTOR = 1.5


def _runs(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start and stop (exclusive) indices of the runs of True in a boolean array."""
    d = np.diff(np.concatenate(([0], mask.view(np.int8), [0])))
    return np.flatnonzero(d == 1), np.flatnonzero(d == -1)


def _prefix_sums(p: np.ndarray) -> np.ndarray:
    """[0, p0, p0 + p1, …] in float64."""
    return np.concatenate(([0.0], np.cumsum(p, dtype=np.float64)))


def _scale_regions(
    p: np.ndarray, dof: float, floor: float, pfa: float, m: int, cs: np.ndarray | None = None
) -> np.ndarray:
    """Frame intervals (k, 2) where the m-frame moving mean passes the hysteresis test.

    ``cs`` may give :func:`_prefix_sums` of ``p``.
    """
    if cs is None:
        cs = _prefix_sums(p)
    stat = (cs[m:] - cs[:-m]) / m  # window i covers frames [i, i + m)
    t_start = threshold_from_floor(floor, m * dof, pfa)
    t_stop = threshold_from_floor(floor, m * dof, math.sqrt(pfa))
    r0, r1 = _runs(stat > t_stop)
    if r0.size == 0:
        return np.empty((0, 2), dtype=np.int64)
    above = np.concatenate(([0], np.cumsum(stat > t_start)))
    keep = above[r1] - above[r0] > 0
    return np.stack([r0[keep], r1[keep] - 1 + m], axis=1).astype(np.int64)


@dataclass(frozen=True)
class _Group:
    start: int  # frames, first piece
    stop: int  # frames, last piece (exclusive)
    start_lo: int  # window for the start edge, frames
    start_hi: int
    stop_lo: int  # window for the stop edge, frames
    stop_hi: int


class _Prefix:
    """Means of frame powers over frame ranges from prefix sums (O(1) per mean).

    The grouping asks for thousands of short means; one numpy call each cost more than the
    rest of the grouping. Ranges are clipped to [0, n) like slices.
    """

    def __init__(self, p: np.ndarray) -> None:
        self.sums = _prefix_sums(p)
        self.cs = self.sums.tolist()
        self.size = p.size

    def count(self, a: int, b: int) -> int:
        return max(min(b, self.size) - max(a, 0), 0)

    def mean(self, a: int, b: int) -> float:
        a, b = max(a, 0), min(b, self.size)
        return (self.cs[b] - self.cs[a]) / (b - a) if b > a else math.nan


def _split_gap(p: _Prefix, dof: float, floor: float, a, b) -> bool:
    """Whether the frames between pieces a and b are decisively noise rather than burst."""
    n_gap = p.count(a[1], b[0])
    if n_gap == 0 or floor <= 0:
        return False
    s = min(p.mean(a[0], a[1]), p.mean(b[0], b[1])) - floor
    if s <= 0:
        return False
    n, x = floor, p.mean(a[1], b[0])
    # log p(gap | noise N) − log p(gap | burst N + S) for a Gamma(G, ·/G) mean, G = n_gap·dof
    llr = n_gap * dof * (math.log((n + s) / n) - x / n + x / (n + s))
    return llr > _SPLIT_LOG_LR


def _part_of_burst(p: _Prefix, dof: float, floor: float, level: float, a: int, b: int) -> bool:
    """Whether frames [a, b) belong to a burst of mean power ``level`` next to them.

    Their mean must be clearly above the noise (3 σ) and at least half-way from the floor
    to the burst's level: a noise bump beside a strong burst is not part of it, the weak
    fringe of a burst that only a longer average saw is.
    """
    count = p.count(a, b)
    if count == 0:
        return False
    mean = p.mean(a, b)
    return mean > floor * (1.0 + 3.0 / math.sqrt(count * dof)) and mean > 0.5 * (floor + level)


class _Intervals:
    """One smoothing length's detections, sorted, with their starts and ends for bisection.

    Hysteresis runs of one length are disjoint and sorted and all extend by m − 1 frames, so
    starts and ends both increase: the intervals overlapping [a, b) are a contiguous slice,
    found by bisection instead of a scan of every interval of the capture (which made the
    grouping quadratic in the number of bursts). Should the ends not increase, the scan is
    used.
    """

    def __init__(self, intervals):
        self.items = sorted(intervals)
        self.starts = [x for x, _ in self.items]
        self.ends = [y for _, y in self.items]
        self.sorted_ends = all(u <= v for u, v in zip(self.ends, self.ends[1:], strict=False))

    def overlapping(self, a: int, b: int) -> list[tuple[int, int]]:
        """The intervals (x, y) with y > a and x < b, in order."""
        if not self.sorted_ends:
            return [(x, y) for x, y in self.items if y > a and x < b]
        i0 = bisect.bisect_right(self.ends, a)
        i1 = bisect.bisect_left(self.starts, b)
        return self.items[i0:i1] if i0 < i1 else []


def _split_by_scale(p: _Prefix, dof, floor, by_scale, scales_desc, a, b) -> list[list[int]]:
    """Pieces ``[start, stop, m_first, m_last]`` of the frames [a, b), coarse to fine."""
    if not scales_desc:
        return []
    m = scales_desc[0]
    inside = by_scale[m].overlapping(a, b)
    if not inside:
        return _split_by_scale(p, dof, floor, by_scale, scales_desc[1:], a, b)
    groups = [[inside[0][0], inside[0][1], m, m]]
    for x, y in inside[1:]:
        last = groups[-1]
        if x <= last[1] or not _split_gap(p, dof, floor, last, (x, y)):
            last[1] = max(last[1], y)
        else:
            groups.append([x, y, m, m])
    out = []
    for g in groups:
        finer = _split_by_scale(p, dof, floor, by_scale, scales_desc[1:], g[0], g[1])
        if len(finer) > 1:
            out.extend(finer)
            # A burst seen only at this length (too weak for the finer ones) must not be
            # lost between the finer pieces: keep this length's intervals that no finer
            # piece overlaps.
            left = []
            # the intervals of ``inside`` that overlap g (y > a, x < b, y > g0, x < g1)
            for x, y in by_scale[m].overlapping(max(a, g[0]), min(b, g[1])):
                if all(y <= f[0] or x >= f[1] for f in finer):
                    if left and x <= left[-1][1]:
                        left[-1][1] = max(left[-1][1], y)
                    else:
                        left.append([x, y, m, m])
            out.extend(left)
        elif len(finer) == 1:
            # One burst at the finer length too: its edges are the sharper ones, unless it
            # saw only part of the burst (then the coarser extent stands).
            # The coarser extent stands only where the frames it adds hold signal.
            f = finer[0]
            # The coarse group's own mean: a short fine piece of a weak burst is a lucky,
            # inflated sample of its level.
            level = p.mean(g[0], g[1])
            ext_lo = f[0] > g[0] + m and _part_of_burst(p, dof, floor, level, g[0], f[0])
            ext_hi = f[1] < g[1] - m and _part_of_burst(p, dof, floor, level, f[1], g[1])
            out.append(
                [
                    g[0] if ext_lo else f[0],
                    g[1] if ext_hi else f[1],
                    m if ext_lo else f[2],
                    m if ext_hi else f[3],
                ]
            )
        else:
            out.append(g)
    return sorted(out)


def _chain_groups(x, y, m, present, a0, b0, cs, dof, floor, n_frames):
    """Groups of clusters holding at most one interval per smoothing length, vectorised.

    Row c of ``x``, ``y`` (int64, (n_clusters, n_scales), scales fine to coarse ``m``) holds
    cluster c's interval of each length where ``present``; [a0, b0) are the clusters' frame
    ranges. With one interval per length :func:`_split_by_scale` returns one piece: the
    coarsest interval, replaced from the finest length up by the sharper edges of the chain
    of finer intervals that overlap it, unless the coarser one's extra frames hold signal.
    This evaluates that recursion for all clusters at once with the same arithmetic (same
    bits). Returns start, stop, start_lo, start_hi, stop_lo, stop_hi as int64 arrays.
    """
    n_c, n_s = x.shape
    # Top down: which lengths the recursion visits (the first length, coarse to fine, with
    # an interval overlapping the window of the length visited before it).
    chain = np.zeros((n_c, n_s), dtype=bool)
    wa, wb = a0.copy(), b0.copy()
    for s in range(n_s - 1, -1, -1):
        v = present[:, s] & (y[:, s] > wa) & (x[:, s] < wb)
        chain[:, s] = v
        wa = np.where(v, x[:, s], wa)
        wb = np.where(v, y[:, s], wb)
    # Bottom up: the piece of the finer lengths, extended where _part_of_burst says so.
    has = np.zeros(n_c, dtype=bool)
    f0 = np.zeros(n_c, dtype=np.int64)
    f1 = np.zeros(n_c, dtype=np.int64)
    mf = np.zeros(n_c, dtype=np.int64)
    ml = np.zeros(n_c, dtype=np.int64)
    n = cs.size - 1

    def part_of_burst(lo, hi, level):  # _part_of_burst on arrays, same operations
        lo, hi = np.maximum(lo, 0), np.minimum(hi, n)
        count = np.maximum(hi - lo, 0)
        ok = count > 0
        cnt = np.where(ok, count, 1)
        mean = (cs[np.where(ok, hi, 0)] - cs[np.where(ok, lo, 0)]) / cnt
        return (
            ok & (mean > floor * (1.0 + 3.0 / np.sqrt(cnt * dof))) & (mean > 0.5 * (floor + level))
        )

    for s in range(n_s):
        c = chain[:, s]
        if not c.any():
            continue
        xs, ys, ms = x[:, s], y[:, s], m[s]
        level = (cs[np.minimum(ys, n)] - cs[xs]) / np.maximum(np.minimum(ys, n) - xs, 1)
        ext_lo = (f0 > xs + ms) & part_of_burst(xs, f0, level)
        ext_hi = (f1 < ys - ms) & part_of_burst(f1, ys, level)
        new = c & ~has
        upd = c & has
        lo_x = upd & ext_lo | new
        hi_x = upd & ext_hi | new
        f0 = np.where(lo_x, xs, f0)
        mf = np.where(lo_x, ms, mf)
        f1 = np.where(hi_x, ys, f1)
        ml = np.where(hi_x, ms, ml)
        has |= c
    # Edge windows: every interval of the cluster overlapping the piece (neighbours: none).
    over = present & (y > f0[:, None]) & (x < f1[:, None])
    big = np.iinfo(np.int64).max
    lo = np.maximum(np.min(np.where(over, x, big), axis=1) - 1, 0)
    hi = np.minimum(np.max(np.where(over, y, -big), axis=1) + 1, n_frames)
    mid = (f0 + f1 + 1) // 2
    start_hi = np.maximum(np.minimum(f0 + mf + 1, mid), lo + 1)
    stop_lo = np.minimum(np.maximum(f1 - ml - 1, mid), hi - 1)
    return f0, f1, lo, start_hi, stop_lo, hi


def _detect_groups(
    p: np.ndarray,
    dof: float,
    floor: float,
    pfa: float,
    pm: _Prefix | None = None,
    fast: bool = True,
) -> list[_Group]:
    """Join the detections of all smoothing lengths into bursts with edge search windows.

    ``pm`` may give ``_Prefix(p)`` (the floor iterations call this on the same powers).
    ``fast`` groups clusters with at most one interval per smoothing length in one
    vectorised pass (:func:`_chain_groups`, same groups); False runs the general code on
    every cluster (kept for the tests that check the two agree).
    """
    n_frames = p.size
    if pm is None:
        pm = _Prefix(p)
    scales = [m for m in SMOOTHING_FRAMES if m <= n_frames]
    per_scale = [_scale_regions(p, dof, floor, pfa, m, pm.sums) for m in scales]
    sizes = [r.shape[0] for r in per_scale]
    if not sum(sizes):
        return []
    # Clusters: connected components of the union of all intervals, in sorted order.
    iv = np.concatenate(per_scale)
    si = np.repeat(np.arange(len(scales)), sizes)
    order = np.lexsort((si, iv[:, 1], iv[:, 0]))
    xa, ya, sa = iv[order, 0], iv[order, 1], si[order]
    reach = np.maximum.accumulate(ya)
    first = np.concatenate(([True], xa[1:] > reach[:-1]))
    cid = np.cumsum(first) - 1
    n_c = int(cid[-1]) + 1
    bounds = np.append(np.flatnonzero(first), xa.size)
    counts = np.zeros((n_c, len(scales)), dtype=np.int64)
    np.add.at(counts, (cid, sa), 1)
    single = counts.max(axis=1) <= 1 if fast else np.zeros(n_c, dtype=bool)

    done: dict[int, _Group] = {}
    if single.any():
        sel = single[cid]
        rows = np.cumsum(single) - 1
        n_f = int(single.sum())
        x = np.zeros((n_f, len(scales)), dtype=np.int64)
        y = np.zeros_like(x)
        present = np.zeros(x.shape, dtype=bool)
        r, s = rows[cid[sel]], sa[sel]
        x[r, s], y[r, s], present[r, s] = xa[sel], ya[sel], True
        fc = np.flatnonzero(single)
        a0 = xa[bounds[fc]]
        b0 = reach[bounds[fc + 1] - 1]
        cols = _chain_groups(
            x,
            y,
            np.array(scales, dtype=np.int64),
            present,
            a0,
            b0,
            pm.sums,
            dof,
            floor,
            n_frames,
        )
        for c, g in zip(fc.tolist(), zip(*(v.tolist() for v in cols), strict=True), strict=True):
            done[c] = _Group(*g)
    if len(done) == n_c:
        return [done[c] for c in range(n_c)]
    m_of = np.array(scales)[sa].tolist()
    xl, yl, bl = xa.tolist(), ya.tolist(), bounds.tolist()

    groups: list[_Group] = []
    for ci in range(n_c):
        if ci in done:
            groups.append(done[ci])
            continue
        i0, i1 = bl[ci], bl[ci + 1]
        # From the coarsest smoothing length down: a burst is split only where a finer length
        # shows a gap that is decisively noise; within a burst, the finest length that still
        # sees it whole gives its edges. (Taking the finest fragments everywhere would let a
        # weak burst's dips mask the true gaps, and bursts would merge.)
        per_m: dict[int, list[tuple[int, int]]] = {m: [] for m in scales}
        for k in range(i0, i1):
            per_m[m_of[k]].append((xl[k], yl[k]))
        by_scale = {m: _Intervals(per_m[m]) for m in scales}
        merged = _split_by_scale(pm, dof, floor, by_scale, scales[::-1], xl[i0], max(yl[i0:i1]))
        # A piece found at smoothing length m may start up to m frames before the true edge.
        for i, (a, b, m_first, m_last) in enumerate(merged):
            left = merged[i - 1][1] if i else 0
            right = merged[i + 1][0] if i + 1 < len(merged) else n_frames
            over = [iv for m in scales for iv in by_scale[m].overlapping(a, b)]
            lo = max(left, min(iv[0] for iv in over) - 1)
            hi = min(right, max(iv[1] for iv in over) + 1)
            mid = (a + b + 1) // 2
            groups.append(
                _Group(
                    start=a,
                    stop=b,
                    start_lo=lo,
                    start_hi=max(min(a + m_first + 1, mid), lo + 1),
                    stop_lo=min(max(b - m_last - 1, mid), hi - 1),
                    stop_hi=hi,
                )
            )
    return groups


def _split_long_groups(groups: list[_Group], p: np.ndarray, expected: float) -> list[_Group]:
    """Split groups much longer than the expected burst at their quietest stretches.

    Weak bursts a short gap apart can merge into one detection (the gap's power is only a
    little below theirs). When the link's frame length is known, a detection longer than
    ``LONG_BURST_FACTOR`` frames' worth is cut where a moving mean of a tenth of a burst is
    lowest, searched between 0.8 and 2 expected lengths from its start, repeatedly.
    """
    w = max(1, int(round(expected / 10)))
    cs = np.concatenate(([0.0], np.cumsum(p, dtype=np.float64)))
    out: list[_Group] = []
    for g in groups:
        a = g.start
        lo_edge = (g.start_lo, g.start_hi)
        while g.stop - a > LONG_BURST_FACTOR * expected:
            s0 = int(a + 0.8 * expected)
            s1 = int(min(g.stop - 0.8 * expected, a + 2.0 * expected))
            if s1 - s0 < w:
                break
            mm = (cs[s0 + w : s1 + 1] - cs[s0 : s1 + 1 - w]) / w
            cut = s0 + int(np.argmin(mm)) + w // 2
            out.append(_Group(a, cut, lo_edge[0], lo_edge[1], max(a + 1, cut - w), cut + w))
            a = cut
            lo_edge = (max(a - w, 0), a + w)
        out.append(
            _Group(a, g.stop, lo_edge[0], lo_edge[1], g.stop_lo, g.stop_hi) if a != g.start else g
        )
    return out
