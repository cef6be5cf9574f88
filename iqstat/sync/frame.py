"""Frame alignment: where the known header (preamble + sync word) sits in the symbol decisions.

:func:`align_frame` (one stream) and :func:`align_frame_many` (a batch) count the header's
bit errors at every position by FFT correlation of the ±1 bit planes of the Gray labels
(mismatches = (L − Σ_j a[s+j]·v[j])/2), in both tone orders; positions within an error
threshold (default: a random stream passes anywhere with probability at most
FALSE_LOCK_PROBABILITY, from the binomial CDF) are candidates, and with branch energies the
soft metric (the header's centred energies) chooses among them (METHODS §10).
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from dataclasses import dataclass, fields

import numpy as np
import scipy.fft
from scipy import special

from iqstat.errors import ParameterError

#: Probability that a random symbol stream passes the default header error threshold anywhere.
FALSE_LOCK_PROBABILITY = 1e-4


@dataclass(frozen=True)
class FrameAlignment:
    """Where the known header (preamble + sync word) sits in a stream of symbol decisions.

    Attributes
    ----------
    found : bool
    start_symbol : int or None
        Index of the first header symbol in the timing grid.
    bit_errors : int or None
        Bit errors in the header at that position (Gray labels for 4-FSK).
    header_bits : int
        Bits in the header.
    inverted : bool
        The tone order is reversed (2-FSK: tones swapped, e.g. a spectrally inverted capture).
    score : float
        1 − bit_errors/header_bits at the chosen position (0 if not found).
    message : str
    symbol_errors : int or None
        Symbol errors in the header at that position.
    n_candidates : int
        Positions (either polarity) within the error threshold; the soft metric chose among
        them when given.
    """

    found: bool
    start_symbol: int | None
    bit_errors: int | None
    header_bits: int
    inverted: bool
    score: float
    message: str
    symbol_errors: int | None = None
    n_candidates: int = 0

    def to_dict(self) -> dict:
        return {f.name: getattr(self, f.name) for f in fields(self)}


def _int_symbols(name: str, a: np.ndarray) -> np.ndarray:
    s = np.asarray(a)
    if s.ndim != 1:
        raise ParameterError(f"{name} must be a 1-D array of tone indices, got shape {s.shape}")
    if s.size and (s.dtype.kind not in "biu" or s.min() < 0):
        raise ParameterError(f"{name} must hold non-negative integer tone indices")
    return s.astype(np.int64, copy=False)


def _fft_valid_correlation(a: np.ndarray, v: np.ndarray) -> np.ndarray:
    """r[b, s, ...] = Σ_j a[b, s + j, ...]·v[j, ...] for s = 0..n − m (real inputs), by one
    zero-padded real FFT along axis 1: the 'valid' part of the convolution with v reversed."""
    n, m = a.shape[1], v.shape[0]
    nfft = scipy.fft.next_fast_len(n + m - 1, real=True)
    fa = scipy.fft.rfft(a, nfft, axis=1)
    fv = scipy.fft.rfft(v[::-1], nfft, axis=0)
    r = scipy.fft.irfft(fa * fv[None], nfft, axis=1)
    return r[:, m - 1 : n]


@functools.lru_cache(maxsize=64)
def _random_match_cdf(n_bits: int) -> tuple[float, ...]:
    """P(at most e of n_bits random bits wrong), e = 0..n_bits // 4 (a header's false match)."""
    # Binomial(n_bits, 1/2) CDF by scipy.special.bdtr (the routine under scipy.stats.binom.cdf).
    return tuple(special.bdtr(np.arange(n_bits // 4 + 1), n_bits, 0.5))


def align_frame(
    symbols_hard: np.ndarray,
    header_symbols: np.ndarray,
    *,
    max_errors: int | None = None,
    soft: np.ndarray | None = None,
    n_tones: int | None = None,
    detect_inverted: bool = True,
) -> FrameAlignment:
    """Find the header in hard symbol decisions, tolerating bit errors.

    Parameters
    ----------
    symbols_hard : ndarray of int, shape (n_symbols,)
        Tone index decided per symbol (OOK: 0 off, 1 on).
    header_symbols : ndarray of int, shape (n_header,)
        The whole known pattern (preamble + sync word) as tone indices.
    max_errors : int, optional
        Most header bit errors accepted. Default: the largest count for which a random symbol
        stream passes anywhere (either polarity) with probability <= FALSE_LOCK_PROBABILITY,
        at most a quarter of the header bits.
    soft : ndarray, shape (n_symbols, n_tones), optional
        Branch energies per symbol; when given, the candidate with the largest correlation
        of the header with the centred energies (energy of the header's tone minus the mean
        over tones) wins.
    n_tones : int, optional
        Alphabet size (default: soft's width, else 4 if any index exceeds 1, else 2).
    detect_inverted : bool
        Also try the reversed tone order (t → M−1−t). Pass False for OOK.

    Returns
    -------
    FrameAlignment

    Notes
    -----
    Bit errors at shift s are counted per bit plane of the Gray labels g(t) = t xor (t >> 1)
    (tones low to high carry 00, 01, 11, 10): with ±1 planes a, v the mismatches are
    (L − Σ_j a[s+j]·v[j])/2. Reversing the tone order flips the most significant Gray bit.
    Periodic preambles match themselves at whole-period shifts, so the highest peak of a
    preamble-only correlation can sit a period off at low SNR (METHODS §10): the whole pattern
    is correlated, every position within the threshold is a candidate, and the soft metric
    (the noncoherent low-SNR log-likelihood ratio is proportional to the energy difference)
    decides among them.
    """
    return align_frame_many(
        [symbols_hard],
        header_symbols,
        softs=None if soft is None else [soft],
        n_tones=n_tones,
        detect_inverted=detect_inverted,
        max_errors=max_errors,
    )[0]


def _check_soft(soft, n_symbols: int) -> np.ndarray:
    c = np.asarray(soft, dtype=np.float64)
    if c.ndim != 2 or c.shape[0] != n_symbols or c.shape[1] < 2:
        raise ParameterError(
            f"soft has shape {c.shape}; give branch energies of shape "
            f"({n_symbols}, n_tones) matching symbols_hard"
        )
    if not np.all(np.isfinite(c)):
        raise ParameterError("soft holds non-finite values; give finite branch energies")
    return c


def _sliding_dots(a: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Σ_j a[b, s + j, ...]·v[j, ...] for every row b and shift s (pattern inside the row),
    summed over any trailing axes: one FFT correlation for the whole batch."""
    r = _fft_valid_correlation(a, v)
    return r.reshape(r.shape[0], r.shape[1], -1).sum(axis=2)


def _soft_header_dots(cc: np.ndarray, patterns: Sequence[np.ndarray]) -> list[np.ndarray]:
    """:func:`_sliding_dots` of the soft streams cc (B, K, M) with each (m, M) pattern: the
    streams' transform once for all patterns, and the sum over the M tones taken in the
    frequency domain (Σ_i IFFT(A_i·V_i) = IFFT(Σ_i A_i·V_i)), one inverse transform each."""
    n, m = cc.shape[1], patterns[0].shape[0]
    nfft = scipy.fft.next_fast_len(n + m - 1, real=True)
    fa = scipy.fft.rfft(cc, nfft, axis=1)  # (B, F, M)
    out = []
    for v in patterns:
        fv = scipy.fft.rfft(v[::-1], nfft, axis=0)  # (F, M)
        spec = fa[:, :, 0] * fv[None, :, 0]
        for i in range(1, fa.shape[2]):  # M <= 4 tones
            spec += fa[:, :, i] * fv[None, :, i]
        out.append(scipy.fft.irfft(spec, nfft, axis=1)[:, m - 1 : n])
    return out


def align_frame_many(
    hards: Sequence[np.ndarray],
    header_symbols: np.ndarray,
    *,
    softs: Sequence[np.ndarray] | None = None,
    n_tones: int | None = None,
    detect_inverted: bool = True,
    max_errors: int | None = None,
) -> list[FrameAlignment]:
    """:func:`align_frame` of a batch of symbol streams with one header, in a fixed number of
    numpy calls.

    Parameters
    ----------
    hards : sequence of B ndarrays of int, shapes (K_b,)
        Tone index decided per symbol, per burst (ragged).
    header_symbols : ndarray of int, shape (n_header,)
    softs : sequence of B ndarrays, shapes (K_b, n_tones), optional
        Branch energies per symbol (see :func:`align_frame`).
    n_tones, detect_inverted, max_errors
        As for :func:`align_frame`, common to the batch.

    Returns
    -------
    list of B FrameAlignment
        Each what :func:`align_frame` gives for that stream alone.

    Notes
    -----
    The streams are padded to a common length; the bit-plane mismatch counts and the soft
    metrics of all bursts are FFT correlations along the symbol axis (rounded to whole
    counts, so the counts are exact), and positions past each stream's end are masked. The
    candidate order (polarity, then position) and the tie-breaking are those of
    :func:`align_frame`.
    """
    hdr = _int_symbols("header_symbols", header_symbols)
    if hdr.size == 0:
        raise ParameterError("header_symbols is empty; give the preamble and sync word symbols")
    if max_errors is not None and (
        isinstance(max_errors, bool) or int(max_errors) != max_errors or max_errors < 0
    ):
        raise ParameterError(f"max_errors {max_errors!r} must be a non-negative integer")
    hs = [_int_symbols("symbols_hard", h) for h in hards]
    nb_ = len(hs)
    if softs is not None and len(softs) != nb_:
        raise ParameterError(f"softs has {len(softs)} entries for {nb_} streams; give one each")
    cs = (
        [None] * nb_
        if softs is None
        else [_check_soft(c, h.size) for c, h in zip(softs, hs, strict=True)]
    )
    ms = []
    for h, c in zip(hs, cs, strict=True):
        top = int(max(h.max(initial=0), hdr.max()))
        m = int(n_tones) if n_tones is not None else (c.shape[1] if c is not None else 0)
        m = m or (4 if top > 1 else 2)
        if m < 2 or m & (m - 1):
            raise ParameterError(f"n_tones {m} must be a power of two >= 2")
        if top >= m:
            raise ParameterError(f"tone index {top} is out of range for {m} tones; use 0..{m - 1}")
        if c is not None and c.shape[1] != m:
            raise ParameterError(f"soft has {c.shape[1]} branches but n_tones is {m}")
        ms.append(m)
    out: list = [None] * nb_
    for m in sorted(set(ms)):  # one group per alphabet size (usually one)
        ids = [j for j in range(nb_) if ms[j] == m]
        _align_group(hs, cs, ids, hdr, m, detect_inverted, max_errors, out)
    return out


def _align_group(hs, cs, ids, hdr, m, detect_inverted, max_errors, out) -> None:
    """:func:`align_frame_many` for the streams ``ids`` of one alphabet size m."""
    k = m.bit_length() - 1
    nb = hdr.size * k
    n_h = hdr.size
    lens = np.array([hs[j].size for j in ids], dtype=np.int64)
    n_pos = lens - n_h + 1
    if max_errors is None:
        n_tests = np.maximum(1, n_pos) * (2 if detect_inverted else 1)
        cdf = np.array(_random_match_cdf(nb))
        ok = n_tests[:, None] * cdf[None, :] <= FALSE_LOCK_PROBABILITY
        max_err = np.where(ok.any(axis=1), ok.shape[1] - 1 - np.argmax(ok[:, ::-1], axis=1), -1)
    else:
        max_err = np.full(len(ids), int(max_errors))
    live = [i for i in range(len(ids)) if n_pos[i] >= 1 and max_err[i] >= 0]
    for i, j in enumerate(ids):
        if n_pos[i] < 1:
            out[j] = FrameAlignment(
                False, None, None, nb, False, 0.0,
                f"stream of {lens[i]} symbols is shorter than the {n_h}-symbol header",
            )  # fmt: skip
        elif max_err[i] < 0:
            out[j] = FrameAlignment(
                False, None, None, nb, False, 0.0,
                f"a {nb}-bit header cannot be told from random symbols over {n_pos[i]} "
                "positions; give max_errors or a longer sync word",
            )  # fmt: skip
    if not live:
        return
    jl = [ids[i] for i in live]
    ln, npos, merr = lens[live], n_pos[live], max_err[live]
    k_max = int(ln.max())
    p_max = k_max - n_h + 1
    hard = np.zeros((len(live), k_max), dtype=np.int64)
    for r, j in enumerate(jl):  # ragged streams into one padded array
        hard[r, : hs[j].size] = hs[j]
    g_hard = hard ^ (hard >> 1)
    g_hdr = hdr ^ (hdr >> 1)
    err = np.zeros((len(live), p_max))
    err_msb = err
    for bit in range(k):  # bit planes of the Gray labels (1 or 2 of them)
        a = 1.0 - 2.0 * ((g_hard >> bit) & 1)
        v = 1.0 - 2.0 * ((g_hdr >> bit) & 1)
        mism = (n_h - _sliding_dots(a, v)) / 2.0
        err = err + mism
        if bit == k - 1:
            err_msb = mism
    err_inv = np.rint(err - 2 * err_msb + n_h).astype(np.int64)
    err = np.rint(err).astype(np.int64)
    errs = np.stack([err, err_inv], axis=1) if detect_inverted else err[:, None, :]
    inside = np.arange(p_max) < npos[:, None]
    big = np.iinfo(np.int64).max
    errs = np.where(inside[:, None, :], errs, big)
    cand = errs <= merr[:, None, None]
    n_cand = cand.sum(axis=(1, 2))
    if cs[jl[0]] is not None:
        soft = np.zeros((len(live), k_max, m))
        for r, j in enumerate(jl):
            soft[r, : hs[j].size] = cs[j]
        cc = soft - soft.mean(axis=2, keepdims=True)
        cc[np.arange(k_max)[None, :] >= ln[:, None]] = 0.0
        s_norm, s_inv = _soft_header_dots(
            cc,
            [
                (hdr[:, None] == np.arange(m)).astype(np.float64),
                ((m - 1 - hdr)[:, None] == np.arange(m)).astype(np.float64),
            ],
        )
        metric = np.stack([s_norm, s_inv], axis=1)[:, : errs.shape[1]]
        pick = np.argmax(np.where(cand, metric, -np.inf).reshape(len(live), -1), axis=1)
    else:
        pick = np.argmin(np.where(cand, errs, big).reshape(len(live), -1), axis=1)
    pol, pos = np.divmod(pick, p_max)
    e_pick = errs.reshape(len(live), -1)[np.arange(len(live)), pick]
    win = np.minimum(pos[:, None] + np.arange(n_h)[None, :], k_max - 1)
    seen = np.take_along_axis(hard, win, axis=1)
    ref = np.where(pol[:, None] == 1, m - 1 - hdr[None, :], hdr[None, :])
    sym_err = np.count_nonzero(seen != ref, axis=1)
    best = errs.reshape(len(live), -1).min(axis=1)
    soft_given = cs[jl[0]] is not None
    for r, j in enumerate(jl):
        me = int(merr[r])
        if n_cand[r] == 0:
            out[j] = FrameAlignment(
                False, None, None, nb, False, 0.0,
                f"header not found: best position has {int(best[r])} of {nb} bits wrong "
                f"(threshold {me})",
            )  # fmt: skip
            continue
        p, s_, e = int(pol[r]), int(pos[r]), int(e_pick[r])
        others = int(n_cand[r]) - 1
        msg = (
            f"header at symbol {s_} with {e} of {nb} bits wrong"
            + (", tones inverted" if p else "")
            + (f"; {others} other candidate(s) within {me} errors" if others else "")
            + ("; chosen by soft metric" if (soft_given and others) else "")
        )
        out[j] = FrameAlignment(
            found=True,
            start_symbol=s_,
            bit_errors=e,
            header_bits=nb,
            inverted=bool(p),
            score=1.0 - e / nb,
            message=msg,
            symbol_errors=int(sym_err[r]),
            n_candidates=int(n_cand[r]),
        )
