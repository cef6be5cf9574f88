"""Terminal rendering of a capture's facts (``iqstat describe``)."""

from __future__ import annotations

from rich.console import Console
from rich.table import Table

from iqstat.facts import CaptureFacts


def _fmt(v, unit: str = "", digits: int = 1) -> str:
    if v is None:
        return "—"
    if isinstance(v, float):
        return f"{v:.{digits}f}{(' ' + unit) if unit else ''}"
    return f"{v}{(' ' + unit) if unit else ''}"


def _hz(v: float | None) -> str:
    if v is None:
        return "—"
    for scale, unit in ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if abs(v) >= scale:
            return f"{v / scale:.6g} {unit}"
    return f"{v:.4g} Hz"


def render_facts(facts: CaptureFacts, console: Console) -> None:
    """Print the facts as a two-column table."""
    t = Table(title=f"Capture {facts.name}", show_header=False, title_justify="left")
    t.add_column("fact", style="bold")
    t.add_column("value")
    rows = [
        (
            "datatype",
            f"{facts.datatype}"
            + ("" if facts.is_complex else "  (REAL: iqstat measures complex baseband only)"),
        ),
        ("channel", f"{facts.channel + 1} of {facts.num_channels}"),
        ("sample rate", _hz(facts.sample_rate_hz).replace("Hz", "S/s")),
        ("centre frequency", _hz(facts.center_frequency_hz)),
        ("samples", f"{facts.samples:,}"),
        ("duration", _fmt(facts.duration_s, "s", 3)),
        ("start time", facts.start_datetime or "—"),
        ("segments / annotations", f"{facts.segments} / {facts.annotations}"),
        ("mean power", _fmt(facts.mean_power_dbfs, "dBFS")),
        ("peak power", _fmt(facts.peak_power_dbfs, "dBFS")),
        ("crest factor", _fmt(facts.crest_factor_db, "dB")),
        (
            "noise floor",
            _fmt(facts.noise_floor_dbfs, "dBFS")
            + (
                f"  ({facts.noise_psd_dbfs_per_hz:.1f} dBFS/Hz)"
                if facts.noise_psd_dbfs_per_hz is not None
                else ""
            ),
        ),
        (
            "clipped samples",
            _clipping(facts),
        ),
        (
            "DC offset",
            f"I {facts.dc_offset_i:+.5f}, Q {facts.dc_offset_q:+.5f}  "
            f"({_fmt(facts.dc_offset_dbfs, 'dBFS')})",
        ),
        (
            "occupied bandwidth",
            "— (nothing above the floor)"
            if facts.occupied_bandwidth_hz is None
            else f"{_hz(facts.occupied_bandwidth_hz)} around {_hz(facts.occupied_center_hz)}"
            " from centre",
        ),
    ]
    if facts.nonfinite_samples:
        rows.append(("non-finite samples", f"{facts.nonfinite_samples:,} (read as 0)"))
    if facts.leftover_bytes:
        rows.append(("ignored trailing bytes", str(facts.leftover_bytes)))
    for k, v in rows:
        t.add_row(k, v)
    console.print(t)


def _clipping(facts) -> str:
    if facts.clip_level_dbfs is not None:
        where = (
            "full scale" if facts.clip_level_dbfs == 0.0 else f"{facts.clip_level_dbfs:.1f} dBFS"
        )
        return f"{100 * facts.clipped_fraction:.4f} % at {where} (clipped)"
    if facts.clipped_fraction is None:
        return "none found (float data: no clip level)"
    return f"{100 * facts.clipped_fraction:.4f} % at full scale"
