"""The measurement chain of one capture: bursts → link → timing → correlators → fit → theory.

This module wires the stages together and computes the capture's summary; it does no I/O
beyond reading samples through the :class:`~iqstat.capture.Capture`, and renders nothing.
:func:`_measure_batch` runs every stage over a batch of bursts; :func:`measure_capture` detects
the bursts, gets the rates (profile, or blind), measures the batches, checks the profile's
rates, pools the bursts (:func:`iqstat.summary.summarise`) and withholds the headline figure
where the bursts do not follow the model; :func:`measure_file` opens a capture and measures it.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence

import numpy as np

from iqstat import theory
from iqstat.bursts import Burst, BurstDetection, detect_bursts, survey_capture
from iqstat.cancel import LineCancelledCapture, fit_line_model
from iqstat.capture import Capture
from iqstat.errors import MeasurementError
from iqstat.estimate import LinkEstimate
from iqstat.facts import CaptureFacts, compute_facts
from iqstat.formats.open import open_capture
from iqstat.levels import LevelNormalisedCapture
from iqstat.measure.burst_figures import (
    _finish,
    _stage_available,
    _stage_fading,
    _stage_fit,
    _stage_predict,
)
from iqstat.measure.frame import _refine_on_known, _stage_frame
from iqstat.measure.gram_classes import _theory_rho
from iqstat.measure.link_timing import _stage_decide, _stage_link, _stage_timing
from iqstat.measure.rates import _blind_rates, _check_profile_rates
from iqstat.measure.windows import (
    EDGE_MARGIN_SYMBOLS,
    MAX_PART_SAMPLES,
    _batches,
    _parts,
    _read_bursts,
)
from iqstat.measure.work import _batched, _Context, _context, _each, _unmeasured, _Work
from iqstat.profile import FrameLayout, LinkProfile, frame_layout, load_profile, override_profile
from iqstat.results import BurstResult, LinkSummary, MeasurementReport
from iqstat.summary import profile_mismatch, summarise

#: OOK bursts: detections closer than this many symbols are one burst (runs of "off").
OOK_MERGE_SYMBOLS = 24


def _link_summary(profile: LinkProfile, links: list[LinkEstimate], rho: float | None):
    rate = spacing = None
    rate_src = "profile" if profile.symbol_rate_hz is not None else "estimated"
    sp_src = (
        "n/a"
        if profile.modulation == "ook"
        else "profile"
        if profile.tone_spacing_hz is not None
        else "estimated"
    )
    if links:
        rate = links[0].symbol_rate_hz
        spacing = links[0].tone_spacing_hz
    else:
        rate, spacing = profile.symbol_rate_hz, profile.tone_spacing_hz
        rate_src = "profile" if rate is not None else "unknown"
        if profile.modulation != "ook":
            sp_src = "profile" if spacing is not None else "unknown"
    h = spacing / rate if (spacing is not None and rate) else None
    return LinkSummary(
        modulation=profile.modulation,
        symbol_rate_hz=rate,
        symbol_rate_source=rate_src,
        tone_spacing_hz=spacing,
        tone_spacing_source=sp_src,
        modulation_index=h,
        tone_correlation=rho,
        bit_rate_hz=None if rate is None else rate * profile.bits_per_symbol,
    )


def _measure_batch(capture: Capture, bursts: Sequence[Burst], ctx: _Context) -> list[BurstResult]:
    """Every stage of the chain over a batch of bursts; one result per burst, in order."""
    if ctx.header_error is not None:
        return [
            dataclasses.replace(
                _unmeasured(b, "not-measured", ctx.header_error),
                start_time=capture.sample_datetime(b.start_sample),
            )
            for b in bursts
        ]
    margin = int(math.ceil(EDGE_MARGIN_SYMBOLS * ctx.fs / ctx.symbol_rate_hz))
    windows = _read_bursts(capture, bursts, margin, ctx.detection)
    works = [_Work(burst=b, x0=a, x=x) for b, (a, x) in zip(bursts, windows, strict=True)]
    _batched(works, lambda batch: _stage_link(batch, ctx))
    _batched(works, lambda batch: _stage_timing(batch, ctx))
    _stage_decide(works, ctx)
    _batched(works, lambda batch: _stage_frame(batch, ctx))
    _each(works, lambda w: _refine_on_known(w, ctx))
    _stage_fit(works, ctx)
    _batched(works, lambda batch: _stage_available(batch, ctx))
    _batched(works, lambda batch: _stage_fading(batch, ctx))
    _batched(works, lambda batch: _stage_predict(batch, ctx))
    _each(works, lambda w: _finish(w, ctx))
    return [
        dataclasses.replace(w.result, start_time=capture.sample_datetime(w.burst.start_sample))
        for w in works
    ]


def _undo_gain_steps(capture, detection, options):
    """Where the receiver's gain moved during the capture, the samples are brought back to
    one noise level (iqstat.levels) and the bursts detected again."""
    if detection.gain_track is None:
        return capture, detection
    even = LevelNormalisedCapture(capture, detection.gain_track, detection.frame_samples)
    again = detect_bursts(even, **options)
    return even, dataclasses.replace(again, gain_span_db=detection.gain_span_db, gain_track=None)


def _cancel_steady_lines(capture, detection, profile, options):
    """A steady line inside the band (a spur, a carrier) is subtracted from the samples
    (:mod:`iqstat.cancel`) and the bursts detected again without it; an unsteady one stays
    and is flagged as interference."""
    rate = profile.symbol_rate_hz
    inside = detection.interfering_lines(rate)
    if not inside or not rate:
        return capture, detection
    model, _why = fit_line_model(capture, detection, inside, rate)
    if model is None:
        return capture, detection
    clean = LineCancelledCapture(capture, model)
    again = detect_bursts(clean, **options)
    done = tuple(
        dataclasses.replace(ln, cancelled=True, freq_hz=tr.freq_hz)
        for ln, tr in zip(inside, model.tracks, strict=True)
    )
    return clean, dataclasses.replace(
        again, lines=again.lines + done, gain_span_db=detection.gain_span_db
    )


def measure_burst(
    capture: Capture,
    burst: Burst,
    profile: LinkProfile,
    layout: FrameLayout,
    detection: BurstDetection,
    *,
    symbol_rate_hz: float,
    tone_spacing_hz: float | None,
) -> BurstResult:
    """Estimate the carrier, synchronise, correlate, fit and check one burst.

    ``symbol_rate_hz`` and ``tone_spacing_hz`` are the link's (from the profile, or refined
    across bursts by :func:`measure_capture` when the profile lacks them). A burst that cannot
    be measured gives a result that says why (its flags and message), not an exception.
    """
    ctx = _context(capture, profile, layout, detection, symbol_rate_hz, tone_spacing_hz)
    return _measure_batch(capture, [burst], ctx)[0]


def measure_capture(
    capture: Capture,
    profile: LinkProfile,
    *,
    facts: CaptureFacts | None = None,
    detection: BurstDetection | None = None,
) -> MeasurementReport:
    """Measure Eb/N0, error rates and margin of every burst of a capture.

    Parameters
    ----------
    capture : Capture
        Complex baseband recording.
    profile : LinkProfile
        What was sent (modulation, rates if known, frame, requirement).
    facts, detection : optional
        Precomputed capture facts / burst detection (else computed here).

    Returns
    -------
    MeasurementReport
    """
    if not capture.is_complex:
        raise MeasurementError(
            "this recording is real-valued; Eb/N0 measurement needs complex baseband (I/Q) samples"
        )
    layout = frame_layout(profile)
    if detection is None:
        merge_gap_s = None
        if profile.modulation == "ook":
            # An OOK burst is silent during runs of zeros (15 symbols in PN15): bridge them.
            rate = profile.symbol_rate_hz or capture.sample_rate_hz / 50
            merge_gap_s = OOK_MERGE_SYMBOLS / rate
        expected_s = None
        if profile.symbol_rate_hz and layout.payload_length is not None:
            n_sym = (layout.n_header_bits + layout.payload_length) / profile.bits_per_symbol
            expected_s = n_sym / profile.symbol_rate_hz
        bandwidth = None
        if profile.symbol_rate_hz:
            spread = (profile.n_tones - 1) * (profile.tone_spacing_hz or 0.0)
            bandwidth = spread + 2.0 * profile.symbol_rate_hz
        options = dict(
            merge_gap_s=merge_gap_s, expected_burst_s=expected_s, signal_bandwidth_hz=bandwidth
        )
        if facts is None:
            # One pass over the samples gives both.
            facts, detection = survey_capture(capture, **options)
        else:
            detection = detect_bursts(capture, **options)
        capture, detection = _undo_gain_steps(capture, detection, options)
        capture, detection = _cancel_steady_lines(capture, detection, profile, options)
    facts = compute_facts(capture) if facts is None else facts
    if any(b.n_samples > MAX_PART_SAMPLES for b in detection.bursts):
        detection = dataclasses.replace(detection, bursts=_parts(detection.bursts))
    fs = capture.sample_rate_hz
    rate_guess = profile.symbol_rate_hz or fs / 50
    margin = int(math.ceil(EDGE_MARGIN_SYMBOLS * fs / rate_guess))
    blind = profile.symbol_rate_hz is None or (
        profile.modulation != "ook" and profile.tone_spacing_hz is None
    )
    rate, spacing = profile.symbol_rate_hz, profile.tone_spacing_hz
    if blind and detection.bursts:
        rate, spacing = _blind_rates(capture, detection, profile, margin)
    missing = None
    if rate is None:
        missing = "the symbol rate could not be estimated on any burst; give it with --symbol-rate"
    elif spacing is None and profile.modulation != "ook":
        missing = (
            "the tone spacing could not be estimated on any burst; give it with --tone-spacing"
        )
    if missing is None:
        ctx = _context(capture, profile, layout, detection, rate, spacing)
        results = [
            r
            for batch in _batches(detection.bursts, margin)
            for r in _measure_batch(capture, batch, ctx)
        ]
    else:
        results = [_unmeasured(b, "link-not-estimated", missing) for b in detection.bursts]
    mismatch = _check_profile_rates(capture, detection, profile, margin)
    good_links = [r.link for r in results if r.link is not None]
    rho_display, rho_theory = None, 0.0
    if good_links and profile.modulation != "ook":
        g = good_links[0]
        rho_mat = np.abs(
            theory.tone_correlation_matrix(
                profile.n_tones, g.tone_spacing_hz, 1.0 / g.symbol_rate_hz
            )
        )
        rho_display = float(rho_mat[0, 1])
        rho_theory = _theory_rho(rho_mat, profile.modulation)
    link_sum = _link_summary(profile, good_links, rho_display)
    summary = summarise(results, profile, link_sum, facts, detection, rho_theory)
    if mismatch:
        summary = dataclasses.replace(summary, flags=tuple(dict.fromkeys(summary.flags + mismatch)))
    reason = profile_mismatch(results, mismatch, layout)
    if reason is not None and summary.ebn0_db is not None:
        # The model the figures rest on does not describe this capture: report what was seen
        # per burst, but no headline figure. A continuous signal in the band explains that
        # as well as a wrong profile does, and is what to look at first.
        lines = detection.interfering_lines(link_sum.symbol_rate_hz)
        if lines:
            flag = "interference"
            where = ", ".join(f"{0.5e-3 * (ln.f_lo_hz + ln.f_hi_hz):+.1f} kHz" for ln in lines[:3])
            message = (
                f"a continuous signal lies in the band ({where}, see capture.lines) and the "
                f"bursts do not follow the noise model ({reason}): no headline figure"
            )
        else:
            flag = "profile-mismatch"
            message = (
                f"the capture does not match the profile ({reason}): no headline figure; "
                "check the modulation, rates and frame"
            )
        summary = dataclasses.replace(
            summary,
            ebn0_db=None,
            ebn0_db_ci95=None,
            esn0_db=None,
            predicted_ber=None,
            predicted_ber_checked=None,
            margin_db=None,
            worst_burst_margin_db=None,
            fading_required_ebn0_db=None,
            fading_margin_db=None,
            flags=tuple(dict.fromkeys((*summary.flags, flag))),
            message=message,
        )
    return MeasurementReport(
        facts=facts,
        profile=profile,
        link=link_sum,
        detection=detection,
        bursts=tuple(results),
        summary=summary,
    )


def measure_file(
    path,
    *,
    profile=None,
    modulation: str | None = None,
    symbol_rate_hz: float | None = None,
    tone_spacing_hz: float | None = None,
    required_ber: float | None = None,
    **capture_options,
) -> MeasurementReport:
    """Open a capture and measure it: the Python form of ``iqstat measure``.

    Parameters
    ----------
    path : str or Path
        The capture (see :func:`iqstat.open_capture`; ``capture_options`` such as
        ``datatype=``, ``sample_rate_hz=``, ``channel=`` are passed on to it).
    profile : str, Path or LinkProfile, optional
        The link profile; the keyword arguments override its fields.
    """
    base = (
        load_profile(profile)
        if isinstance(profile, (str, bytes)) or hasattr(profile, "__fspath__")
        else profile
    )
    prof = override_profile(
        base,
        modulation=modulation,
        symbol_rate_hz=symbol_rate_hz,
        tone_spacing_hz=tone_spacing_hz,
        required_ber=required_ber,
    )
    return measure_capture(open_capture(path, **capture_options), prof)
