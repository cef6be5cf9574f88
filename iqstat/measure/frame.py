"""Frame and payload: the header found, the payload checked, timing refined on known symbols.

:func:`_stage_frame` aligns each burst's decisions on the profile's preamble and sync word
(:func:`iqstat.sync.align_frame_many`, inverted links too); where no header is found and the
payload is a known pattern, a looser match (LOOSE_HEADER_ERROR_FRACTION of the header's bits)
is accepted when the payload then locks. A header whose errors are implausible at the payload's
error rate (binomial tail below HEADER_CONSISTENCY_P) is flagged "header-mismatch". The known
symbols (header, and the payload where its check locked) go to the data-aided fit.
:func:`_refine_on_known` refines a weak burst's timing (line below DA_REFINE_LINE_DB) and
carrier (corrections above CFO_REFINE_MIN_HZ) on those symbols and decides again.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence

import numpy as np
from scipy import special

from iqstat.correlate import mix_cumulative
from iqstat.estimate import link_with
from iqstat.measure.gram_classes import _bank
from iqstat.measure.link_timing import _hard_decisions, _symbols_inside
from iqstat.measure.work import _Context, _Work
from iqstat.patterns import BitCheck, check_known_many, check_prbs_many, prbs_bits
from iqstat.profile import FrameLayout, LinkProfile, bits_to_symbols, symbols_to_bits
from iqstat.sync import STRONG_LINE_DB, FrameAlignment, align_frame_many, refine_timing_known

#: Header errors tolerated (fraction of its bits) when the payload pattern confirms the lock.
LOOSE_HEADER_ERROR_FRACTION = 0.3

#: Header errors less probable than this at the payload's error rate reject the header
#: (lenient: the first symbols of a burst err more often than the payload).
HEADER_CONSISTENCY_P = 1e-5


def _cap(w: _Work) -> int | None:
    """The last symbol (exclusive) a burst's frame may take: the part's own end when the
    transmission goes on in a next part (which measures it from there, not twice)."""
    return w.k1 if w.burst.parts > 1 else None


def _checked_as_is(batch: list[_Work], ctx: _Context) -> None:
    """No frame: every symbol measured, the payload pattern checked on all the bits (a later
    part of a long transmission: up to where its frame ends, when the first part found it)."""
    profile, m = ctx.profile, ctx.profile.modulation
    for w in batch:
        end = ctx.frame_ends.get(w.burst.index - w.burst.part) if w.burst.part else None
        if end is not None:
            t = w.timing
            k_end = math.floor((end - w.x0 - t.t0_samples) / t.period_samples + 1e-9)
            w.k1 = max(w.k0, min(w.k1, k_end))
    checks = [None] * len(batch)
    if profile.payload_kind != "unknown":
        checks = _check_payload_many(
            [symbols_to_bits(w.hard[w.k0 : w.k1], m) for w in batch], ctx.layout, profile
        )
    for w, c in zip(batch, checks, strict=True):
        w.frame, w.sel, w.known, w.check = None, (w.k0, w.k1), None, c


#: Below this line SNR [dB] the timing is refined on the known symbols of a found frame (the
#: bursts timed again at full rate, see :func:`~iqstat.measure.link_timing._stage_timing`).
DA_REFINE_LINE_DB = STRONG_LINE_DB

#: A carrier correction from the known symbols smaller than this [Hz] is not applied.
CFO_REFINE_MIN_HZ = 1.0


def _check_payload_many(bits_list: Sequence[np.ndarray], layout: FrameLayout, profile: LinkProfile):
    """Payload checks of several bursts (None where nothing is known or there are no bits)."""
    out: list[BitCheck | None] = [None] * len(bits_list)
    kind = profile.payload_kind
    use = [i for i, b in enumerate(bits_list) if len(b)]
    if kind == "unknown" or not use:
        return out
    bits = [bits_list[i] for i in use]
    if kind in ("pn9", "pn15"):
        checks = check_prbs_many(bits, kind)
    else:
        checks = check_known_many(bits, layout.payload_bits)
    for i, c in zip(use, checks, strict=True):
        out[i] = c
    return out


def _known_payload_symbols(check: BitCheck | None, layout, profile, n_bits: int):
    """Sent payload symbols implied by a locked check (for the data-aided fit)."""
    if check is None or not check.locked:
        return None
    kind = profile.payload_kind
    if kind in ("pn9", "pn15"):
        ref = prbs_bits(kind, n_bits, check.phase or 0)
    else:
        ref = np.asarray(layout.payload_bits[:n_bits], dtype=np.uint8)
    if check.inverted:
        ref = 1 - ref
    if profile.modulation == "4fsk":
        ref = ref[: len(ref) - len(ref) % 2]
    return bits_to_symbols(ref, profile.modulation)


def _header_consistent_many(
    frames: Sequence[FrameAlignment], checks: Sequence[BitCheck], profile: LinkProfile
) -> np.ndarray:
    """Whether each header's bit errors are plausible at its payload's measured error rate.

    A header matched with many errors while the payload is nearly error-free means the
    profile's preamble or sync word is not what was sent (or the position is a sidelobe):
    P(X ≥ header errors) under Binomial(header bits, payload BER) below 1e-5 rejects it.
    """
    ok = np.ones(len(frames), dtype=bool)
    test = [
        i
        for i, (f, c) in enumerate(zip(frames, checks, strict=True))
        if f.bit_errors is not None and c.bits_checked
    ]
    if test:
        errors = np.array([frames[i].bit_errors for i in test], dtype=np.int64)
        n_bits = np.array([frames[i].header_bits for i in test], dtype=np.int64)
        p = np.array([(checks[i].bit_errors + 0.5) / (checks[i].bits_checked + 1) for i in test])
        p = np.maximum(p, 1e-6)
        # P(X >= errors) = binomial survival function at errors − 1 (scipy.special.bdtrc is
        # the routine under scipy.stats.binom.sf).
        ok[test] = special.bdtrc(errors - 1, n_bits, p) >= HEADER_CONSISTENCY_P
    return ok


def _frame_symbols_many(items, n_tones: int, header, layout: FrameLayout, profile: LinkProfile):
    """Symbols of the frames found: per ``(frame, hard decisions, k1, timing, cap)`` item
    (``cap``: the last symbol the frame may take, or None; see :func:`_cap`), the
    ``(selection, known symbols, payload check)`` of that burst."""
    m = profile.modulation
    n_payload_sym = None
    if layout.payload_length is not None:
        n_payload_sym = layout.payload_length // profile.bits_per_symbol
    plans = []
    for frame, hard, k1, timing, cap in items:
        start = frame.start_symbol
        stop = (
            k1
            if n_payload_sym is None
            else min(timing.n_symbols, start + len(header) + n_payload_sym)
        )
        if cap is not None:  # the first part of a long transmission ends at its own end
            stop = min(stop, cap)
        stop = max(stop, start)
        # An inverted link reverses the tone order (t → M−1−t): undo it on the decisions,
        # apply it to the known symbols.
        sign = frame.inverted
        known = np.full(stop - start, -1, dtype=np.int64)
        known[: len(header)] = (n_tones - 1 - header if sign else header)[: stop - start]
        payload = hard[start + len(header) : stop]
        bits = symbols_to_bits(n_tones - 1 - payload if sign else payload, m)
        plans.append((start, stop, known, bits, sign))
    checks = _check_payload_many([p[3] for p in plans], layout, profile)
    out = []
    for (start, stop, known, bits, sign), check in zip(plans, checks, strict=True):
        ref = _known_payload_symbols(check, layout, profile, len(bits))
        if ref is not None:
            n_ref = min(len(ref), len(known) - len(header))
            ref = ref[:n_ref]
            known[len(header) : len(header) + n_ref] = n_tones - 1 - ref if sign else ref
        out.append(((start, stop), known, check))
    return out


def _stage_frame(batch: list[_Work], ctx: _Context) -> None:
    """Frame alignment on the header (a looser match confirmed by the payload), payload check."""
    profile, layout, header = ctx.profile, ctx.layout, ctx.header
    m = profile.modulation
    # Per burst: (frame, selection, known symbols, payload check, flags to add).
    outcome: dict[int, tuple] = {}
    cont = [w for w in batch if w.burst.part > 0]
    if cont and len(header):
        # The continuations of a long transmission hold no header: their payload is checked
        # where it stands (a pattern locks at any phase), the rest framed as usual.
        heads = [w for w in batch if w.burst.part == 0]
        if heads:
            _stage_frame(heads, ctx)  # first: where their frames end
        _checked_as_is(cont, ctx)
        return
    if not len(header):
        _checked_as_is(batch, ctx)
        return
    # Search the whole read window: a detected edge can be a symbol or two off, and a
    # header that starts before it must still be found.
    n_tones = 2 if m == "ook" else batch[0].z_all.shape[1]
    softs = [None if m == "ook" else np.abs(w.z_all) ** 2 for w in batch]

    def align(ws, idx, **kw):
        idx = list(idx)
        return align_frame_many(
            [ws[i].hard for i in idx],
            header,
            softs=None if m == "ook" else [softs[i] for i in idx],
            n_tones=n_tones,
            detect_inverted=m != "ook",
            **kw,
        )

    def checked(frame_of, idx):
        """Frame symbols and payload check of bursts idx at frame_of[i]; and, for those
        whose payload locked, whether the header's errors are consistent with it."""
        framed = _frame_symbols_many(
            [
                (frame_of[i], batch[i].hard, batch[i].k1, batch[i].timing, _cap(batch[i]))
                for i in idx
            ],
            n_tones,
            header,
            layout,
            profile,
        )
        locked = [j for j, fr in enumerate(framed) if fr[2] is not None and fr[2].locked]
        ok = _header_consistent_many(
            [frame_of[idx[j]] for j in locked], [framed[j][2] for j in locked], profile
        )
        verdict = {idx[j]: bool(o) for j, o in zip(locked, ok, strict=True)}
        return dict(zip(idx, framed, strict=True)), verdict

    frames = align(batch, range(len(batch)))
    found = [i for i, f in enumerate(frames) if f.found]
    framed, verdict = checked(frames, found)
    for i in found:
        bad = verdict.get(i) is False
        outcome[i] = (frames[i], *framed[i], ("header-mismatch",) if bad else ())
    rest = [i for i, f in enumerate(frames) if not f.found]
    if rest and profile.payload_kind != "unknown":
        # At low Eb/N0 a header has too many errors for a safe lock on its own; accept a
        # looser match only when the payload pattern then locks (its own false-lock
        # probability is 1e-6), which confirms the position.
        max_errors = int(LOOSE_HEADER_ERROR_FRACTION * len(header) * profile.bits_per_symbol)
        loose = dict(zip(rest, align(batch, rest, max_errors=max_errors), strict=True))
        trials, verdict = checked(loose, [i for i in rest if loose[i].found])
        for i, ok in verdict.items():
            if ok:
                frame = dataclasses.replace(
                    loose[i], message=loose[i].message + "; confirmed by the payload pattern"
                )
                outcome[i] = (frame, *trials[i], ())
    for i in rest:
        if i not in outcome:
            w = batch[i]
            outcome[i] = (frames[i], (w.k0, w.k1), None, None, ("sync-not-found",))
    for i, w in enumerate(batch):
        w.frame, w.sel, w.known, w.check, more = outcome[i]
        w.flags.extend(more)
        if w.burst.parts > 1 and w.frame is not None and w.frame.found:
            # The first part of a long transmission: its frame goes on in the next parts,
            # which measure it up to its end (not the noise after).
            t = w.timing
            n_frame = len(header) + (
                layout.payload_length // profile.bits_per_symbol
                if layout.payload_length is not None
                else 10**12
            )
            end = w.frame.start_symbol + n_frame
            ctx.frame_ends[w.burst.index] = w.x0 + t.t0_samples + end * t.period_samples


def _refine_on_known(w: _Work, ctx: _Context) -> None:
    """Known symbols give a sharper timing criterion than the feature line: correlate the
    burst with their waveform (energy criteria are flat for h = 1/2), then again."""
    if (
        w.known is None
        or w.frame is None
        or not w.frame.found
        or w.timing.quality.get("line_snr_db", np.inf) >= DA_REFINE_LINE_DB
    ):
        return
    fs, m, header = ctx.fs, ctx.profile.modulation, ctx.header
    known, sel, link = w.known, w.sel, w.link
    n_known = int(np.argmin(known >= 0)) if (known < 0).any() else len(known)
    timing, shift, dcfo = refine_timing_known(
        w.x,
        fs,
        w.timing,
        first_symbol=sel[0],
        symbols=known[:n_known],
        modulation=m,
        symbol_rate_hz=link.symbol_rate_hz,
        tone_spacing_hz=link.tone_spacing_hz,
        cfo_hz=link.cfo_hz,
    )
    cum = w.cum
    if abs(dcfo) > CFO_REFINE_MIN_HZ:
        # The known symbols show a residual carrier offset: retune the correlators.
        link = link_with(link, cfo_hz=link.cfo_hz + dcfo)
        cum = mix_cumulative(w.x, fs, link.tone_freqs_hz)
    frame = dataclasses.replace(w.frame, start_symbol=sel[0] + shift)
    if frame.start_symbol < 0 or frame.start_symbol + len(header) > timing.n_symbols:
        return  # the refined grid puts the frame outside the window: keep the first grid
    z_all, (gram, sym_grams, gram_classes) = _bank(w.x, fs, link, timing, cum)
    # Decide and check the payload again on the refined grid.
    probe = dataclasses.replace(
        w, z_all=z_all, gram=gram, sym_grams=sym_grams, gram_classes=gram_classes
    )
    hard = _hard_decisions(probe, m)
    k1 = _symbols_inside(timing, w.lo_edge, w.hi_edge)[1]
    n_tones = 2 if m == "ook" else z_all.shape[1]
    ((sel, known, check),) = _frame_symbols_many(
        [(frame, hard, k1, timing, k1 if w.burst.parts > 1 else None)],
        n_tones,
        header,
        ctx.layout,
        ctx.profile,
    )
    w.timing, w.link, w.cum, w.z_all, w.hard = timing, link, cum, z_all, hard
    w.gram, w.sym_grams, w.gram_classes = gram, sym_grams, gram_classes
    w.frame, w.k1, w.sel, w.known, w.check = frame, k1, sel, known, check
