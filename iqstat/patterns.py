"""ITU-T O.150 test patterns, a phase-free pattern checker and exact binomial intervals.

A link under test often sends a pseudo-random binary sequence (PRBS) as its payload. The
receiver does not know where in the sequence a burst starts, so :func:`check_prbs` finds the
phase (and the polarity) by circular cross-correlation with one period, then counts errors
against a free-running copy of the sequence from that phase. Every wrong bit counts once.

The checks work on batches of bursts: :func:`check_prbs_many` and :func:`check_known_many`
process a list of ragged bit arrays with a fixed number of array operations (concatenation,
one fold, one FFT pair per block of bursts), and :func:`check_prbs` / :func:`check_known` are
those functions on a list of one. :func:`clopper_pearson` takes arrays of counts.

The module is a pure array core: no I/O, nothing computed at import time (the one period of
each sequence is generated on first use and cached).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, fields
from functools import lru_cache
from typing import Literal

import numpy as np
import scipy.fft
from scipy import special

from iqstat.errors import ParameterError

PrbsName = Literal["pn9", "pn15"]

#: Period in bits of each maximal-length sequence, 2**n - 1.
PRBS_PERIOD = {"pn9": 511, "pn15": 32767}

# (register length n, second tap m, output inverted): a[k] = a[k-n] xor a[k-m].
_PRBS_TAPS = {"pn9": (9, 5, False), "pn15": (15, 14, True)}

#: Target probability that a random (pattern-free) stream is declared locked.
FALSE_LOCK_PROBABILITY = 1e-6


def _check_name(name: str) -> str:
    if name not in _PRBS_TAPS:
        raise ParameterError(
            f"pattern name {name!r} is not known; choose one of {', '.join(_PRBS_TAPS)}"
        )
    return name


@lru_cache(maxsize=4)
def _one_period(name: str) -> np.ndarray:
    """One period of the sequence from the all-ones register, read-only uint8 array."""
    n, m, inverted = _PRBS_TAPS[name]
    period = (1 << n) - 1
    a = bytearray(period)
    a[:n] = b"\x01" * n
    # A one-off loop over one period (at most 32767 steps), cached afterwards.
    for k in range(n, period):
        a[k] = a[k - n] ^ a[k - m]  # ITU-T O.150 recursion a[k] = a[k-n] xor a[k-m]
    out = np.frombuffer(bytes(a), dtype=np.uint8).copy()
    if inverted:
        out ^= 1  # O.150 sends the 2^15 - 1 sequence inverted
    out.flags.writeable = False
    return out


def prbs_bits(name: PrbsName, n_bits: int, phase: int = 0) -> np.ndarray:
    """Bits of an ITU-T O.150 pseudo-random sequence.

    Parameters
    ----------
    name : {"pn9", "pn15"}
        ``"pn9"``: x^9 + x^5 + 1, a[k] = a[k-9] xor a[k-5], period 511. ``"pn15"``:
        x^15 + x^14 + 1, a[k] = a[k-15] xor a[k-14], period 32767, output inverted.
    n_bits : int
        Number of bits to return, >= 0.
    phase : int
        Bits skipped from the all-ones start (taken modulo the period; negative allowed).

    Returns
    -------
    numpy.ndarray
        uint8 array of 0/1, shape (n_bits,).

    Notes
    -----
    Phase 0 is the all-ones register state, so pn9 begins with nine ones and pn15 (inverted)
    with fifteen zeros. O.150 does not fix the starting phase of a transmitter.

    References
    ----------
    1. ITU-T Recommendation O.150, "Digital test patterns for performance measurements on
       digital transmission equipment", clauses 5.1 and 5.3.
    """
    _check_name(name)
    if isinstance(n_bits, bool) or not isinstance(n_bits, (int, np.integer)) or n_bits < 0:
        raise ParameterError(f"n_bits {n_bits!r} must be a whole number >= 0")
    if isinstance(phase, bool) or not isinstance(phase, (int, np.integer)):
        raise ParameterError(f"phase {phase!r} must be a whole number of bits")
    period = _one_period(name)
    idx = (int(phase) + np.arange(int(n_bits), dtype=np.int64)) % period.size
    return period[idx]


def clopper_pearson(k, n, confidence: float = 0.95):
    """Exact (Clopper–Pearson) confidence interval of a binomial proportion.

    Parameters
    ----------
    k : int or array_like of int
        Number of events (bit errors), 0 <= k <= n.
    n : int or array_like of int
        Number of trials (bits checked), >= 0. Broadcast against ``k``.
    confidence : float
        Two-sided confidence level in (0, 1).

    Returns
    -------
    (float, float) or (ndarray, ndarray)
        Lower and upper bound; ``(0.0, 1.0)`` when n = 0. Two floats when k and n are both
        scalars, else two float64 arrays of the broadcast shape.

    Notes
    -----
    With alpha = 1 - confidence, the bounds are beta quantiles [1]_:
    lower = B^-1(alpha/2; k, n-k+1) (0 when k = 0), upper = B^-1(1-alpha/2; k+1, n-k)
    (1 when k = n). The interval assumes independent errors; bursty errors make it too narrow.
    The quantiles come from ``scipy.special.betaincinv`` in one vectorised call per bound (the
    same Boost routine ``scipy.stats.beta.ppf`` uses, without its per-call overhead).

    References
    ----------
    .. [1] C. J. Clopper and E. S. Pearson, "The use of confidence or fiducial limits
       illustrated in the case of the binomial", Biometrika 26(4):404-413, 1934.
    """
    arrays = {}
    for label, v in (("k", k), ("n", n)):
        if np.ndim(v) == 0:
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)):
                raise ParameterError(f"{label} {v!r} must be a whole number")
            arrays[label] = np.asarray(int(v), dtype=np.int64)
        else:
            arr = np.asarray(v)
            if arr.dtype.kind not in "iu":
                raise ParameterError(
                    f"{label} must hold whole numbers (an integer array), got dtype {arr.dtype}"
                )
            arrays[label] = arr.astype(np.int64)
    try:
        k_arr, n_arr = np.broadcast_arrays(arrays["k"], arrays["n"])
    except ValueError:
        raise ParameterError(
            f"k of shape {arrays['k'].shape} and n of shape {arrays['n'].shape} do not "
            "broadcast; give one count pair per interval"
        ) from None
    bad = (n_arr < 0) | (k_arr < 0) | (k_arr > np.maximum(n_arr, 0))
    if np.any(bad):
        i = np.flatnonzero(bad.ravel())[0]
        raise ParameterError(
            f"counts k={int(k_arr.ravel()[i])}, n={int(n_arr.ravel()[i])} must satisfy 0 <= k <= n"
        )
    if not (
        isinstance(confidence, (float, int))
        and not isinstance(confidence, bool)
        and 0.0 < float(confidence) < 1.0
    ):
        raise ParameterError(f"confidence {confidence!r} must lie strictly between 0 and 1")
    alpha = 1.0 - float(confidence)
    kf, nf = k_arr.astype(np.float64), n_arr.astype(np.float64)
    # Safe shape parameters where the bound is fixed (k = 0 or k = n); overwritten below.
    lo_a = np.where(k_arr == 0, 1.0, kf)
    hi_b = np.where(k_arr == n_arr, 1.0, nf - kf)
    lo = np.where(k_arr == 0, 0.0, special.betaincinv(lo_a, nf - kf + 1.0, alpha / 2))
    hi = np.where(k_arr == n_arr, 1.0, special.betaincinv(kf + 1.0, hi_b, 1.0 - alpha / 2))
    if np.ndim(k) == 0 and np.ndim(n) == 0:
        return (float(lo), float(hi))
    return (lo, hi)


@dataclass(frozen=True)
class BitCheck:
    """Outcome of checking received bits against a known pattern.

    Attributes
    ----------
    locked : bool
        True when the bits were found to follow the pattern (at some phase and polarity).
    pattern : str
        ``"pn9"``, ``"pn15"`` or ``"known"``.
    inverted : bool
        The bits follow the complement of the pattern.
    phase : int or None
        Pattern phase (bits from the all-ones start) at the first checked bit; None for a
        known payload or when not locked.
    bit_errors : int
        Bits differing from the (polarity-corrected) reference, each counted once.
    bits_checked : int
        Bits compared.
    ber : float or None
        bit_errors / bits_checked; None when not locked.
    ber_ci95 : (float, float) or None
        Clopper–Pearson 95 % interval of the error rate; None when not locked.
    message : str
        One line on how the lock was found or why it was not.
    """

    locked: bool
    pattern: str
    inverted: bool
    phase: int | None
    bit_errors: int
    bits_checked: int
    ber: float | None
    ber_ci95: tuple[float, float] | None
    message: str

    def to_dict(self) -> dict:
        d = {f.name: getattr(self, f.name) for f in fields(self)}
        d["ber_ci95"] = None if self.ber_ci95 is None else list(self.ber_ci95)
        return d


def _as_bits_many(bits_list, label: str) -> tuple[np.ndarray, np.ndarray]:
    """Concatenated uint8 bits of a list of 1-D 0/1 arrays and the (B + 1,) offsets.

    ``label`` names the argument in messages: ``"bits"`` for one array (the per-burst
    wrappers), ``"bits_list"`` for a list, whose entries are then named ``bits_list[i]``.
    """
    one = label != "bits_list"
    if not one and (isinstance(bits_list, np.ndarray) or not hasattr(bits_list, "__len__")):
        raise ParameterError(
            f"bits_list must be a list of 1-D bit arrays (one per burst), got "
            f"{type(bits_list).__name__}"
        )
    arrs = [np.asarray(b) for b in bits_list]
    for i, b in enumerate(arrs):
        name = label if one else f"{label}[{i}]"
        if b.ndim != 1:
            raise ParameterError(f"{name} must be a 1-D array of 0/1, got shape {b.shape}")
        if b.size and b.dtype.kind not in "biu":
            raise ParameterError(f"{name} must hold integers 0/1, got dtype {b.dtype}")
    offsets = np.zeros(len(arrs) + 1, dtype=np.int64)
    np.cumsum([b.size for b in arrs], out=offsets[1:])
    full = [b for b in arrs if b.size]
    if not full:
        return np.zeros(0, dtype=np.uint8), offsets
    if all(b.dtype.itemsize == 1 and b.dtype.kind in "bu" for b in full):
        # bool/uint8 (what demodulators return): no sign, no widening copy
        flat = np.concatenate([b.view(np.uint8) for b in full])
        bad = flat > 1
    else:
        flat = np.concatenate(full, dtype=np.int64, casting="unsafe")
        bad = (flat < 0) | (flat > 1)
    if bad.any():
        j = int(np.argmax(bad))
        i = int(np.searchsorted(offsets, j, side="right")) - 1
        name = label if one else f"{label}[{i}]"
        raise ParameterError(
            f"{name} must hold only 0 and 1, found {arrs[i][j - offsets[i]].item()!r}"
        )
    return flat.astype(np.uint8, copy=False), offsets


def _lock_threshold(n_bits, n_hypotheses: int):
    """Correlation magnitude a random stream exceeds with probability FALSE_LOCK_PROBABILITY.

    Hoeffding's inequality for a sum S of n independent fair ±1 terms, P(|S| >= t) <=
    2 exp(-t^2 / (2n)), with a union bound over the hypotheses tried (phases x polarities),
    gives t = sqrt(2 n ln(2 H / p)). Valid at every n, unlike a Gaussian approximation.
    ``n_bits`` may be an array (one threshold per burst).
    """
    return np.sqrt(2.0 * np.asarray(n_bits, dtype=np.float64) * _log_hyp(n_hypotheses))


def _log_hyp(n_hypotheses: int) -> float:
    return math.log(2.0 * n_hypotheses / FALSE_LOCK_PROBABILITY)


def _not_locked(pattern: str, message: str) -> BitCheck:
    return BitCheck(False, pattern, False, None, 0, 0, None, None, message)


def _intervals(errors: np.ndarray, n: np.ndarray, locked: np.ndarray) -> list:
    """95 % Clopper–Pearson interval of each locked burst (one vectorised call), else None."""
    lo = np.zeros(errors.size)
    hi = np.ones(errors.size)
    if np.any(locked):
        lo[locked], hi[locked] = clopper_pearson(errors[locked], n[locked], 0.95)
    return list(zip(lo.tolist(), hi.tolist(), strict=True))


def _counted(pattern, inverted, phase, errors, n, ci, message) -> BitCheck:
    return BitCheck(
        True, pattern, bool(inverted), phase, int(errors), int(n), int(errors) / int(n),
        (float(ci[0]), float(ci[1])), message,
    )  # fmt: skip


@lru_cache(maxsize=4)
def _period_spectrum(name: str) -> np.ndarray:
    """rfft of the ±1 form of one period (read-only)."""
    r = 1.0 - 2.0 * _one_period(name).astype(np.float64)
    out = scipy.fft.rfft(r)
    out.flags.writeable = False
    return out


#: Elements (bursts x period) per FFT block of check_prbs_many: bounds its temporaries to
#: ~25 MB (float64 fold, complex spectrum, correlation, score) whatever the batch size.
_FOLD_BLOCK_ELEMENTS = 1 << 19


def _segment_ids(offsets: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(burst index, position within the burst) of every concatenated element."""
    sizes = np.diff(offsets)
    seg = np.repeat(np.arange(sizes.size), sizes)
    pos = np.arange(int(offsets[-1]), dtype=np.int64) - offsets[:-1][seg]
    return seg, pos


def _segment_sums(values: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Sum of ``values`` over each segment [offsets[i], offsets[i + 1]) (empty ones give 0)."""
    cs = np.zeros(values.size + 1, dtype=np.int64)
    np.cumsum(values, out=cs[1:])
    return cs[offsets[1:]] - cs[offsets[:-1]]


@lru_cache(maxsize=8)
def _section_spectra(name: str, L: int) -> np.ndarray:
    """rfft of the sections g_q[j] = r[(q W + j) mod P], j < L, W = 3L/4, shape (Q, L/2 + 1).

    For streams of at most L/4 bits the P circular correlations split into Q = ceil(P / W)
    linear correlations of length-L sections of the ±1 period: FFTs of a power-of-two length
    L instead of one of length P = 2^15 - 1 = 7·31·151, several times faster per point.
    """
    P = PRBS_PERIOD[name]
    width = L - L // 4
    q = -(-P // width)
    r = 1.0 - 2.0 * _one_period(name).astype(np.float64)
    g = r[(np.arange(q)[:, None] * width + np.arange(L)[None, :]) % P]
    out = scipy.fft.rfft(g, axis=1)
    out.flags.writeable = False
    return out


def _search_phases(
    bits: np.ndarray,
    seg: np.ndarray,
    pos_mod: np.ndarray,
    n_bursts: int,
    name: str,
    allow_inverted: bool,
) -> tuple[np.ndarray, ...]:
    """Best and second-best phase of every burst from c[i, s] = Σ_k x_i[k]·r[(k + s) mod P].

    ``pos_mod`` is each bit's position within its burst modulo P (equal to the position
    when the streams are shorter than the period, the case of the sectioned FFT of
    :func:`_section_spectra`, used when every stream is short against P). Returns, per burst, the
    best phase s, c at s, min_s c, the runner-up phase s2, its score and |c| there (score =
    |c|, or c when the inverted sequence is not allowed). The correlations are whole numbers
    (sums of ±1), so the FFT result is rounded to them: exact ties between phases then
    resolve to the lowest phase whatever the rounding of the transform. Only one block of
    bursts' correlations (about 2^19 values) exists at a time.
    """
    P = PRBS_PERIOD[name]
    x = 1.0 - 2.0 * bits.astype(np.float64)
    out = [np.empty(n_bursts, dtype=dt) for dt in (np.int64, float, float, np.int64, float, float)]
    best, peak, c_min, best2, second, c2 = out
    n_max = int(np.bincount(seg, minlength=n_bursts).max()) if seg.size else 0
    L = 1 << max(8, (4 * n_max - 1).bit_length())  # power of two >= 4 n_max
    sectioned = L <= P // 4  # short streams on a long period (pn15): see _section_spectra
    if sectioned:
        sections = _section_spectra(name, L)
        width = L - L // 4
        step = max(1, _FOLD_BLOCK_ELEMENTS // (sections.shape[0] * L))
    else:
        spectrum = _period_spectrum(name)
        step = max(1, _FOLD_BLOCK_ELEMENTS // P)
    # Blocks of bursts (not one per burst) bound the memory for pn15's long period.
    for i0 in range(0, n_bursts, step):
        i1 = min(n_bursts, i0 + step)
        lo, hi = np.searchsorted(seg, [i0, i1])
        if sectioned:
            # every stream is shorter than L / 4: place it at the start of a row of L
            idx = (seg[lo:hi] - i0) * L + (pos_mod[lo:hi])
            rows_x = np.bincount(idx, weights=x[lo:hi], minlength=(i1 - i0) * L)
            spec_x = np.conj(scipy.fft.rfft(rows_x.reshape(i1 - i0, L), axis=1))
            # section q holds c[q W + u] = sum_k x[k] g_q[k + u], u < W (no wrap: k + u < L)
            corr = scipy.fft.irfft(spec_x[:, None, :] * sections[None], n=L, axis=2)
            c = corr[:, :, :width].reshape(i1 - i0, -1)[:, :P]
        else:
            # fold modulo P (c is linear in x): one bincount over the whole block
            idx = (seg[lo:hi] - i0) * P + pos_mod[lo:hi]
            folded = np.bincount(idx, weights=x[lo:hi], minlength=(i1 - i0) * P)
            folded = folded.reshape(i1 - i0, P)
            # c[s] = sum_j folded[j] r[(j + s) mod P]: circular cross-correlation via FFT.
            c = scipy.fft.irfft(np.conj(scipy.fft.rfft(folded, axis=1)) * spectrum, n=P, axis=1)
        np.rint(c, out=c)
        score = np.abs(c) if allow_inverted else c.copy()
        rows = np.arange(i1 - i0)
        s = np.argmax(score, axis=1)
        best[i0:i1], peak[i0:i1], c_min[i0:i1] = s, c[rows, s], np.min(c, axis=1)
        score[rows, s] = 0.0
        s2 = np.argmax(score, axis=1)
        best2[i0:i1], second[i0:i1], c2[i0:i1] = s2, score[rows, s2], np.abs(c[rows, s2])
    return best, peak, c_min, best2, second, c2


def check_prbs_many(
    bits_list: Sequence[np.ndarray], name: PrbsName, *, allow_inverted: bool = True
) -> list[BitCheck]:
    """Lock each of several bit streams to an O.150 sequence and count its bit errors.

    Parameters
    ----------
    bits_list : sequence of numpy.ndarray
        Received bits of each burst, 0/1, each of shape (n_i,) (lengths may differ, 0 allowed).
    name : {"pn9", "pn15"}
        The sequence the transmitter sends.
    allow_inverted : bool
        Also accept the complemented sequence (reported with ``inverted=True``).

    Returns
    -------
    list of BitCheck
        One per stream, equal to :func:`check_prbs` on that stream alone (that function is
        this one on a list of one).

    Notes
    -----
    With x[k] = 1 - 2 b[k] and r the ±1 form of one period (length P), the correlation
    c[s] = sum_k x[k] r[(k + s) mod P] is computed for every s at once: the stream is folded
    modulo P (c is linear in x) and circularly cross-correlated by FFT. Without errors the peak
    is ±n at the true phase; with error rate p it is n(1 - 2p). The lock requires
    |c| >= sqrt(2 n ln(2H/p_fa)) (Hoeffding bound, H = hypotheses tried, p_fa = 1e-6), so a
    random stream locks with probability below 1e-6, while at p = 0.2 a few hundred bits lock.
    Errors are then counted against a free-running reference from the found phase, so each
    wrong bit counts once (a self-synchronising predictor would count it three times).

    The batch is one array computation: the streams are concatenated, folded with one
    ``bincount`` into a (B, P) array, correlated by one FFT pair along the rows (in blocks of
    about 2^20 elements for pn15), and the errors against each stream's reference are counted
    with one more ``bincount``; only the BitCheck objects are built per stream.

    References
    ----------
    1. ITU-T Recommendation O.150, clauses 5.1, 5.3.
    2. W. Hoeffding, "Probability inequalities for sums of bounded random variables",
       J. Amer. Statist. Assoc. 58(301):13-30, 1963, Theorem 2.
    """
    return _check_prbs_batch(bits_list, name, allow_inverted, "bits_list")


def _check_prbs_batch(bits_list, name, allow_inverted, label) -> list[BitCheck]:
    _check_name(name)
    flat, offsets = _as_bits_many(bits_list, label)
    n = np.diff(offsets)
    B = n.size
    if B == 0:
        return []
    period = _one_period(name)
    P = period.size
    n_hyp = P * (2 if allow_inverted else 1)
    t = _lock_threshold(n, n_hyp)
    seg, pos = _segment_ids(offsets)
    wrap = np.arange(P + int(n.max()), dtype=np.int64) % P  # k -> k mod P, by table lookup
    s, peak, c_min, s2, second, c2 = _search_phases(flat, seg, wrap[pos], B, name, allow_inverted)
    inverted = peak < 0
    # errors against the free-running reference from phase s, one pass for the batch
    ref = period[wrap[s[seg] + pos]]
    wrong = (flat ^ ref) != inverted[seg]
    errors = _segment_sums(wrong, offsets)
    n_min = math.ceil(2.0 * _log_hyp(n_hyp))
    locked = (n > 0) & (t <= n) & (np.abs(peak) >= t)
    ci_of = _intervals(errors, n, locked)

    def one(i: int, n_i: int, t_i: float, s_i: int, peak_i: float) -> BitCheck:
        if n_i == 0:
            return _not_locked(name, f"no bits to check against {name}")
        if t_i > n_i:
            return _not_locked(
                name, f"{n_i} bits are too few to lock to {name} reliably; need at least {n_min}"
            )
        if abs(peak_i) < t_i:
            if not allow_inverted and -float(c_min[i]) >= t_i:
                return _not_locked(
                    name, f"the bits follow the inverted {name}; allow_inverted=False refuses it"
                )
            best_p = 0.5 * (1.0 - abs(peak_i) / n_i)
            return _not_locked(
                name,
                f"no phase of {name} matches: best correlation {abs(peak_i):.0f} of {n_i} bits "
                f"(error rate {best_p:.2f} there) is below the lock threshold {t_i:.0f}",
            )
        inv = peak_i < 0
        slip = ""
        if second[i] >= t_i:
            # Two phases both explain part of the stream: bits were lost or repeated on the way.
            slip = f"; phase {int(s2[i])} also matches (correlation {c2[i]:.0f}): bit slip?"
        return _counted(
            name, inv, s_i, errors[i], n_i, ci_of[i],
            f"locked to {'inverted ' if inv else ''}{name} at phase {s_i} "
            f"(correlation {abs(peak_i):.0f} of {n_i}, {abs(peak_i) / t_i:.1f}x the lock "
            f"threshold){slip}",
        )  # fmt: skip

    return [
        one(i, n_i, t_i, s_i, p_i)
        for i, (n_i, t_i, s_i, p_i) in enumerate(
            zip(n.tolist(), t.tolist(), s.tolist(), peak.tolist(), strict=True)
        )
    ]


def check_prbs(bits: np.ndarray, name: PrbsName, *, allow_inverted: bool = True) -> BitCheck:
    """Lock to an O.150 sequence at any phase and count bit errors.

    Parameters
    ----------
    bits : numpy.ndarray
        Received bits, 0/1, shape (n,), in order of reception.
    name : {"pn9", "pn15"}
        The sequence the transmitter sends.
    allow_inverted : bool
        Also accept the complemented sequence (reported with ``inverted=True``).

    Returns
    -------
    BitCheck
        Locked with phase, polarity and an exact error count, or not locked with the reason.

    Notes
    -----
    :func:`check_prbs_many` on a list of one stream; the method is described there.
    """
    return _check_prbs_batch([bits], name, allow_inverted, "bits")[0]


def check_known_many(
    bits_list: Sequence[np.ndarray], reference: np.ndarray, *, allow_inverted: bool = True
) -> list[BitCheck]:
    """Count bit errors of several bursts against one known, aligned payload.

    Parameters
    ----------
    bits_list : sequence of numpy.ndarray
        Received payload bits of each burst, 0/1, each of shape (n_i,), aligned with the
        reference (the frame sync has placed them). Lengths may differ.
    reference : numpy.ndarray
        The bits the transmitter sent, 0/1, shape (m,). The first min(n_i, m) bits are compared.
    allow_inverted : bool
        Decide the polarity from the data (a complemented stream is reported with
        ``inverted=True``). Needs the agreement to be clearly away from chance; with False
        the bits are always compared as they are.

    Returns
    -------
    list of BitCheck
        One per burst, ``pattern="known"``, ``phase=None``; equal to :func:`check_known` on
        each burst (that function is this one on a list of one).

    Notes
    -----
    Polarity is the one with fewer disagreements. It is only trusted when
    |n - 2e| >= sqrt(2 n ln(4/p_fa)) (Hoeffding's bound for random bits, two polarities,
    p_fa = 1e-6); otherwise the result is not locked, because an error rate near 0.5 cannot
    tell a complemented stream from a failing one. The disagreements of the whole batch are
    counted with one ``bincount`` over the concatenated bits.
    """
    return _check_known_batch(bits_list, reference, allow_inverted, "bits_list")


def _check_known_batch(bits_list, reference, allow_inverted, label) -> list[BitCheck]:
    flat, offsets = _as_bits_many(bits_list, label)
    ref, _ = _as_bits_many([reference], "reference")
    sizes = np.diff(offsets)
    B = sizes.size
    if B == 0:
        return []
    n = np.minimum(sizes, ref.size)
    seg, pos = _segment_ids(offsets)
    inside = pos < ref.size
    diff = flat[inside] != ref[pos[inside]]
    raw = np.bincount(seg[inside], weights=diff, minlength=B).astype(np.int64)
    if allow_inverted:
        inverted = raw > n - raw
        errors = np.where(inverted, n - raw, raw)
        agreement = n - 2 * errors
        t = _lock_threshold(n, 2)
        locked = (n > 0) & (agreement >= t)
    else:
        inverted = np.zeros(B, dtype=bool)
        errors = raw
        agreement = n
        t = np.zeros(B)
        locked = n > 0
    ci_of = _intervals(errors, n, locked)

    def one(i: int, size: int, n_i: int, e_i: int, inv: bool, agr: int, t_i: float):
        if n_i == 0:
            what = "received bits" if size == 0 else "reference bits"
            return _not_locked("known", f"no {what} to compare")
        note = ""
        if size != ref.size:
            note = f"; compared the first {n_i} of {size} received and {ref.size} reference bits"
        if not allow_inverted:
            return _counted("known", False, None, e_i, n_i, ci_of[i], f"compared {n_i} bits{note}")
        if agr < t_i:
            return _not_locked(
                "known",
                f"the bits do not match the known payload in either polarity: {e_i} of {n_i} "
                f"differ, too close to chance to decide (need agreement {t_i:.0f}, got {agr})",
            )
        return _counted(
            "known", inv, None, e_i, n_i, ci_of[i],
            f"matched the known payload{' inverted' if inv else ''}{note}",
        )  # fmt: skip

    return [
        one(i, *vals)
        for i, vals in enumerate(
            zip(
                sizes.tolist(),
                n.tolist(),
                errors.tolist(),
                inverted.tolist(),
                np.broadcast_to(agreement, (B,)).tolist(),
                t.tolist(),
                strict=True,
            )  # fmt: skip
        )
    ]


def check_known(
    bits: np.ndarray, reference: np.ndarray, *, allow_inverted: bool = True
) -> BitCheck:
    """Count bit errors against a known, aligned payload.

    Parameters
    ----------
    bits : numpy.ndarray
        Received payload bits, 0/1, shape (n,), aligned with the reference (the frame sync
        has placed them).
    reference : numpy.ndarray
        The bits the transmitter sent, 0/1, shape (m,). The first min(n, m) bits are compared.
    allow_inverted : bool
        Decide the polarity from the data (a complemented stream is reported with
        ``inverted=True``). Needs the agreement to be clearly away from chance; with False
        the bits are always compared as they are.

    Returns
    -------
    BitCheck
        ``pattern="known"``, ``phase=None``.

    Notes
    -----
    :func:`check_known_many` on a list of one burst; the polarity rule is described there.
    """
    return _check_known_batch([bits], reference, allow_inverted, "bits")[0]
