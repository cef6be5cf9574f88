"""Rendering a :class:`~iqstat.results.MeasurementReport`: JSON document and terminal view.

The JSON layout is documented in docs/report-format.md (format "iqstat-report", version 1).
Unknown values are ``null``: never omitted, never NaN.
"""

from __future__ import annotations

import math
from collections.abc import Iterator

from rich.console import Console
from rich.markup import escape
from rich.table import Table
from rich.text import Text

from iqstat import __version__
from iqstat.report.jsonio import dumps, dumps_line, json_safe
from iqstat.results import BurstResult, MeasurementReport

FORMAT = "iqstat-report"
FORMAT_VERSION = 1
#: The removed DC offset is shown on the terminal when it is within this many dB of the noise
#: floor (further below, what it leaks into a correlator is a few per cent of the noise there
#: at ~50 samples per symbol).
DC_SHOWN_BELOW_NOISE_DB = 30.0

CAUTION = (
    "Figures are estimates from a model of a noncoherent receiver; a predicted error rate is a "
    "model, not a compliance measurement. iqstat only reads recordings and never transmits."
)

#: Plain-language meaning of every flag the measurement can raise.
FLAG_TEXT = {
    "no-bursts": "no bursts were found above the noise floor",
    "nothing-measured": "bursts were found but none could be measured",
    "clipping": "samples at the converter's limit (full scale or a lower clip level): the "
    "front end was overdriven",
    "real-valued-capture": "real-valued recording: complex baseband is needed",
    "sync-not-found": "the profile's preamble/sync word was not found in some bursts",
    "profile-mismatch": "the capture does not match the profile: no headline figure",
    "header-mismatch": "header errors far above the payload's: check the preamble/sync word",
    "pattern-not-locked": "the known payload pattern did not lock in some bursts",
    "not-awgn": "branch energies do not follow the white-noise laws (interference, fading?)",
    "detection-loss": "correlators capture much less energy than the power suggests",
    "level-spread": "burst levels differ by more than 3 dB (fading or several transmitters)",
    "below-requirement": "the mean Eb/N0 is below what the required BER needs",
    "some-bursts-below-requirement": "the weakest bursts are below the requirement",
    "ber-disagrees-with-ebn0": "measured errors disagree with the fitted Eb/N0: not plain noise",
    "fit-failed": "the Eb/N0 fit failed on some bursts",
    "not-measured": "some bursts could not be measured (too short, no timing)",
    "too-few-symbols": "some bursts hold too few symbols to fit",
    "link-not-estimated": "carrier or rates could not be estimated on some bursts",
    "symbol-rate-mismatch": "the symbol rate in the capture differs from the profile's",
    "tone-spacing-mismatch": "the tone spacing in the capture differs from the profile's",
    "fading": "the sent tone's energy varies within bursts beyond what noise allows: those "
    "bursts are fitted on a Rician fading model (K per burst: rician_k_db), their Eb/N0 is the "
    "mean over the fades and their predicted BER is averaged over them",
    "below-requirement-in-fading": "the mean Eb/N0 meets the requirement in steady noise but "
    "not under the fading measured (see the margin in fading)",
    "unmodulated": "the decisions keep one tone (OOK: one state) in some bursts: a carrier, not "
    "the profile's modulation",
    "gain-steps": "the receiver's gain moved during the capture (AGC?): the samples were "
    "brought back to one noise level before measuring (see gain_span_db)",
    "interference": "a continuous narrowband signal (in the gaps too) lies in the signal band "
    "and is not steady enough to cancel: the figures count it as noise",
}


def report_to_dict(report: MeasurementReport) -> dict:
    """The JSON document of a measurement (see docs/report-format.md)."""
    d = _document(report)
    d["bursts"] = [json_safe(b.to_dict()) for b in report.bursts]
    return d


def report_json_pieces(report: MeasurementReport) -> Iterator[str]:
    """The same document as :func:`report_to_dict`, as text pieces, one burst at a time.

    A capture with tens of thousands of bursts would otherwise need its whole document and
    its text in memory at once; each burst is written on one line.
    """
    marker = '"__bursts__"'
    head, tail = dumps({**_document(report), "bursts": "__bursts__"}).split(marker)
    yield head + "["
    for i, b in enumerate(report.bursts):
        yield ("\n    " if i == 0 else ",\n    ") + dumps_line(b.to_dict())
    yield ("\n  ]" if report.bursts else "]") + tail


def _document(report: MeasurementReport) -> dict:
    """Everything of the JSON document but the bursts."""
    f = report.facts
    s = report.summary
    d = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "generator": f"iqstat {__version__}",
        "caution": CAUTION,
        "capture": {
            "name": f.name,
            "datatype": f.datatype,
            "sample_rate_hz": f.sample_rate_hz,
            "samples": f.samples,
            "duration_s": f.duration_s,
            "center_frequency_hz": f.center_frequency_hz,
            "start_datetime": f.start_datetime,
            "mean_power_dbfs": f.mean_power_dbfs,
            "peak_power_dbfs": f.peak_power_dbfs,
            "clipped_fraction": f.clipped_fraction,
            "clip_level_dbfs": f.clip_level_dbfs,
            "dc_offset_dbfs": f.dc_offset_dbfs,
            "noise_floor_dbfs": report.detection.noise_floor_dbfs,
            "noise_psd_dbfs_per_hz": report.detection.noise_psd_db_per_hz,
            "dc_offset_removed_dbfs": report.detection.dc_offset_dbfs,
            "iq_image_rejection_db": report.detection.iq.image_rejection_db,
            "iq_corrected": report.detection.iq.applied,
            "gain_span_db": report.detection.gain_span_db,
            "lines": [ln.to_dict() for ln in report.detection.lines],
            "detection_band_hz": report.detection.band_hz,
        },
        "profile": report.profile.to_dict(),
        "link": report.link.to_dict(),
        "bursts": [],
        "summary": s.to_dict(),
    }
    return json_safe(d)


def _db(v, digits=1, unit=" dB") -> str:
    return "—" if v is None or not math.isfinite(v) else f"{v:.{digits}f}{unit}"


def _ber(v) -> str:
    if v is None:
        return "—"
    if v == 0:
        return "0"
    return f"{v:.1e}"


def _ci(ci, fmt) -> str:
    if ci is None:
        return ""
    return f" [{fmt(ci[0])} … {fmt(ci[1])}]"


def _hz(v) -> str:
    if v is None:
        return "—"
    return f"{v / 1e3:.4g} kHz" if abs(v) >= 1e3 else f"{v:.1f} Hz"


def render_report(report: MeasurementReport, console: Console, *, max_bursts: int = 40) -> None:
    """Print the capture facts, link, per-burst table and headline."""
    f, link = report.facts, report.link
    console.print(Text(f"iqstat {__version__} · {f.name}", style="bold"))
    det = report.detection
    dc = ""
    if det.dc_offset_dbfs > det.noise_floor_dbfs - DC_SHOWN_BELOW_NOISE_DB:
        dc = f", DC offset {det.dc_offset_dbfs:.1f} dBFS (removed)"
    if det.iq.applied:
        dc += f", I/Q image {det.iq.image_rejection_db:.1f} dB down (corrected)"
    if det.gain_span_db > 0:
        dc += f", gain moved by {det.gain_span_db:.1f} dB (levelled)"
    for ln in det.lines[:3]:
        inside = det.band_hz is None or (
            ln.f_hi_hz > det.band_hz[0] and ln.f_lo_hz < det.band_hz[1]
        )
        state = "cancelled" if ln.cancelled else ("in the band" if inside else "cut out")
        where = (
            f"{0.5e-3 * (ln.f_lo_hz + ln.f_hi_hz):+.1f} kHz"
            if ln.freq_hz is None
            else f"{ln.freq_hz:+.1f} Hz"
        )
        dc += f"; continuous signal at {where} ({ln.power_dbfs:.1f} dBFS, {state})"

    console.print(
        f"  {f.samples:,} samples of {f.datatype} at {f.sample_rate_hz / 1e3:g} kS/s "
        f"({f.duration_s:.3f} s); noise floor {_db(det.noise_floor_dbfs, 1, ' dBFS')}"
        f", peak {_db(f.peak_power_dbfs, 1, ' dBFS')}{dc}",
        markup=False,
        highlight=False,
    )
    src = {"profile": "given", "estimated": "estimated", "n/a": "", "unknown": "unknown"}
    parts = [link.modulation]
    if link.symbol_rate_hz is not None:
        parts.append(f"{link.symbol_rate_hz:.2f} Bd ({src[link.symbol_rate_source]})")
    if link.tone_spacing_hz is not None:
        parts.append(
            f"tone spacing {link.tone_spacing_hz:.1f} Hz "
            f"({src[link.tone_spacing_source]}), h = {link.modulation_index:.3f}"
        )
    if link.tone_correlation:
        parts.append(f"|ρ| = {link.tone_correlation:.3f}")
    console.print("  link: " + ", ".join(parts), markup=False, highlight=False)
    if report.bursts:
        console.print(_burst_table(report.bursts, f.sample_rate_hz, max_bursts))
        console.print(
            "  P-based: Eb/N0 from power and gap noise; clk: clock offset if significant",
            markup=False,
            highlight=False,
            style="dim",
        )
        for line in _transmission_notes(report.bursts) + _burst_notes(report.bursts[:max_bursts]):
            console.print(line, markup=False, highlight=False)
    _headline(report, console)


def _ranges(indices: list[int]) -> str:
    """ "0–3, 5, 7–9" for [0, 1, 2, 3, 5, 7, 8, 9]."""
    parts, start = [], indices[0]
    for prev, cur in zip(indices, [*indices[1:], None], strict=True):
        if cur != prev + 1:
            parts.append(f"{start}" if start == prev else f"{start}–{prev}")
            start = cur
    return ", ".join(parts)


def _burst_notes(bursts) -> list[str]:
    """One line per set of flags the bursts raise, the bursts as index ranges (a burst not
    measured gets its own line, with the reason); fading shows the K factors."""
    groups: dict[tuple[str, ...], list] = {}
    lines = []
    for b in bursts:
        if not b.flags:
            continue
        if b.message and b.ebn0_db is None:
            lines.append((b.index, f"  burst {b.index}: {', '.join(b.flags)} ({b.message})"))
        else:
            groups.setdefault(tuple(b.flags), []).append(b)
    for flags, members in groups.items():
        ks = [b.fading.k_db for b in members if b.fading is not None and b.fading.k_db is not None]
        if ks:
            k_text = f"K ≈ {ks[0]:.0f} dB"
            if len(ks) > 1:
                k_text = f"K {min(ks):.0f} … {max(ks):.0f} dB"
        words = [f"fading ({k_text})" if fl == "fading" and ks else fl for fl in flags]
        label = "burst" if len(members) == 1 else "bursts"
        idx = [b.index for b in members]
        lines.append((idx[0], f"  {label} {_ranges(idx)}: {', '.join(words)}"))
    return [text for _, text in sorted(lines)]


def _transmission_notes(bursts) -> list[str]:
    """One line per transmission measured in parts (consecutive parts 0, 1, …)."""
    lines, run = [], []
    for b in [*bursts, None]:
        if b is not None and run and b.part == run[-1].part + 1:
            run.append(b)
            continue
        if len(run) > 1:
            lines.append(
                f"  bursts {run[0].index}–{run[-1].index}: one transmission, measured in "
                f"{len(run)} parts"
            )
        run = [b] if b is not None and b.part == 0 else []
    return lines


def _burst_table(bursts: tuple[BurstResult, ...], fs: float, max_rows: int) -> Table:
    t = Table(title="Bursts", title_justify="left", pad_edge=False, padding=(0, 1))
    for col in (
        "#",
        "t [s]",
        "sym",
        "CFO [Hz]",
        "clk [ppm]",
        "Eb/N0 [dB]",
        "95 % CI",
        "P-based",
        "BER pred",
        "err/bits",
    ):
        t.add_column(escape(col), justify="right", no_wrap=True)
    shown = bursts if len(bursts) <= max_rows else bursts[:max_rows]
    for b in shown:
        fit = b.fit
        ci = fit.ebn0_db_ci95 if fit is not None and fit.converged else None
        bc = b.bit_check
        errs = f"{bc.bit_errors}/{bc.bits_checked}" if bc is not None and bc.locked else "—"
        clock = "—"
        if b.timing is not None and b.timing.clock_offset_ppm != 0.0:
            clock = f"{b.timing.clock_offset_ppm:+.1f}"
        t.add_row(
            str(b.index),
            f"{b.start_sample / fs:.3f}",
            str(b.symbols),
            "—" if b.cfo_hz is None else f"{b.cfo_hz:+.0f}",
            clock,
            _db(b.ebn0_db, 1, ""),
            "—" if ci is None else f"{ci[0]:.1f}–{ci[1]:.1f}",
            _db(b.available_ebn0_db, 1, ""),
            _ber(b.predicted_ber),
            errs,
        )
    if len(bursts) > max_rows:
        t.caption = f"{len(bursts) - max_rows} more bursts in the JSON report"
    return t


def _headline(report: MeasurementReport, console: Console) -> None:
    s = report.summary
    t = Table(
        show_header=False, title="Capture result", title_justify="left", box=None, pad_edge=False
    )
    t.add_column("what", style="bold")
    t.add_column("value")
    t.add_row("bursts measured", f"{s.bursts_measured} of {s.bursts} ({s.symbols:,} symbols)")
    t.add_row(
        "Eb/N0 at the correlators",
        _db(s.ebn0_db, 2)
        + _ci(s.ebn0_db_ci95, lambda v: f"{v:.2f}")
        + (
            f"   spread {s.ebn0_db_min:.1f} … {s.ebn0_db_max:.1f} dB"
            if s.ebn0_db_min is not None and s.bursts_measured > 1
            else ""
        ),
    )
    t.add_row("Es/N0", _db(s.esn0_db, 2))
    if s.available_ebn0_db is not None:
        t.add_row(
            "Eb/N0 from power",
            _db(s.available_ebn0_db, 2)
            + _ci(s.available_ebn0_db_ci95, lambda v: f"{v:.2f}")
            + f"   detection loss {_db(s.detection_loss_db, 2)}"
            + _ci(s.detection_loss_db_ci95, lambda v: f"{v:+.2f}"),
        )
    if s.ebn0_db_dd is not None:
        t.add_row(
            "decision-directed Eb/N0",
            _db(s.ebn0_db_dd, 2) + "   (for comparison; biased high at low Eb/N0)",
        )
    t.add_row("predicted BER", _ber(s.predicted_ber))
    if s.bits_checked:
        for_them = ""
        pc, pa = s.predicted_ber_checked, s.predicted_ber
        if pc is not None and pa is not None and abs(pc - pa) > 0.1 * max(pc, pa):
            for_them = f"; predicted for them {_ber(pc)}"
        t.add_row(
            "measured BER",
            f"{_ber(s.measured_ber)}{_ci(s.measured_ber_ci95, _ber)}"
            f"   ({s.bit_errors} errors in {s.bits_checked:,} known bits, "
            f"{s.bursts_checked} bursts{for_them})",
        )
    else:
        t.add_row("measured BER", "— (no known bits checked)")
    if s.required_ber is not None:
        t.add_row("required", f"BER {s.required_ber:.0e} → Eb/N0 {_db(s.required_ebn0_db, 2)}")
        style = "green" if s.margin_db is not None and s.margin_db >= 0 else "red"
        t.add_row(
            "margin",
            Text(
                _db(s.margin_db, 2)
                + (
                    f"   (weakest burst {_db(s.worst_burst_margin_db, 2)})"
                    if s.worst_burst_margin_db is not None and s.bursts_measured > 1
                    else ""
                ),
                style=style,
            ),
        )
        if s.fading_k_db is not None:
            t.add_row(
                "required in fading",
                f"BER {s.required_ber:.0e}, Rician K ≈ {s.fading_k_db:.1f} dB → mean Eb/N0 "
                f"{_db(s.fading_required_ebn0_db, 2)}",
            )
            ok = s.fading_margin_db is not None and s.fading_margin_db >= 0
            t.add_row(
                "margin in fading", Text(_db(s.fading_margin_db, 2), style="green" if ok else "red")
            )
    console.print(t)
    if s.flags:
        console.print(Text("flags:", style="bold yellow"))
        for fl in s.flags:
            console.print(f"  {fl}: {FLAG_TEXT.get(fl, '')}", markup=False, highlight=False)
    console.print(Text(s.message, style="dim"))
    console.print(Text(CAUTION, style="dim italic"))
