"""Scenario files: what a synthetic capture contains, read from TOML and validated strictly.

A scenario holds the same ``[link]``, ``[frame]`` (and optional ``[requirement]``) tables as a
link profile, plus ``[capture]``, ``[bursts]``, ``[waveform]`` and ``[impairments]`` (with an
optional ``[impairments.interferer]``). The format is described in docs/synth.md.

Per-burst quantities take a *value spec*: a number (every burst), a list with one number per
burst, or ``{uniform = [lo, hi]}`` (drawn per burst from the scenario's random stream).
"""

from __future__ import annotations

import difflib
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

from iqstat.errors import IqstatError, ProfileError
from iqstat.formats.datatypes import parse_datatype
from iqstat.profile import LinkProfile, profile_from_dict, read_toml
from iqstat.units import parse_quantity

#: Keys of the scenario's own tables (and of the interferer sub-table).
SCENARIO_KEYS: dict[str, tuple[str, ...]] = {
    "capture": (
        "sample_rate", "datatype", "center_frequency", "datetime", "description", "author",
        "peak_dbfs", "noise_dbfs", "lead_in_s", "tail_s", "seed",
    ),
    "bursts": ("count", "ebn0_db", "cfo_hz", "gap_s", "payload_phase"),
    "waveform": ("bt", "ook_shape", "ook_rolloff"),
    "impairments": (
        "clock_offset_ppm", "timing", "phase", "rician_k_db", "doppler_hz", "dc_offset",
        "iq_gain_db", "iq_phase_deg", "clip_dbfs", "interferer",
    ),
    "interferer": ("kind", "offset_hz", "inr_db", "bandwidth_hz"),
}  # fmt: skip
SCENARIO_TABLES = frozenset(("capture", "bursts", "waveform", "impairments"))
_DATETIME_Z = re.compile(r"^\d{4}-\d{2}-\d{2}T\d{2}:\d{2}:\d{2}(\.\d+)?Z$")


@dataclass(frozen=True)
class ValueSpec:
    """A per-burst value: ``constant``, ``values`` (one per burst) or ``uniform`` (lo, hi)."""

    constant: float | None = None
    values: tuple[float, ...] | None = None
    uniform: tuple[float, float] | None = None

    def to_dict(self) -> Any:
        if self.constant is not None:
            return self.constant
        if self.values is not None:
            return list(self.values)
        return {"uniform": list(self.uniform)}


@dataclass(frozen=True)
class Interferer:
    kind: Literal["tone", "narrowband"]
    offset_hz: float
    inr_db: float
    bandwidth_hz: float | None = None


@dataclass(frozen=True)
class Scenario:
    """A validated scenario. Times in seconds, rates in Hz, levels in dB as named."""

    name: str
    profile: LinkProfile
    sample_rate_hz: float
    datatype: str
    n_bursts: int
    ebn0_db: ValueSpec
    cfo_hz: ValueSpec
    gap_s: ValueSpec
    clock_offset_ppm: ValueSpec
    payload_phase: Literal["random"] | tuple[int, ...] = "random"
    center_frequency_hz: float | None = None
    datetime_utc: str | None = None
    description: str | None = None
    author: str | None = None
    peak_dbfs: float | None = -3.0
    noise_dbfs: float | None = None
    lead_in_s: float = 0.002
    tail_s: float = 0.002
    seed: int | None = None
    bt: float | None = None
    ook_shape: Literal["rect", "raised-cosine"] = "rect"
    ook_rolloff: float = 0.5
    timing: Literal["random"] | float = "random"
    phase: Literal["random"] | float = "random"
    rician_k_db: float | None = None
    doppler_hz: float | None = None
    dc_offset: tuple[float, float] = (0.0, 0.0)
    iq_gain_db: float = 0.0
    iq_phase_deg: float = 0.0
    clip_dbfs: float | None = None
    interferer: Interferer | None = None
    source: str = "<dict>"
    document: dict = field(default_factory=dict, compare=False, repr=False)


def _suggest(word: str, choices) -> str:
    close = difflib.get_close_matches(str(word), list(choices), n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


class _Reader:
    """Typed access to one table, with messages naming ``source: [table] key``."""

    def __init__(self, source: str, table: str, body: Any, keys: tuple[str, ...]):
        if not isinstance(body, dict):
            raise ProfileError(f"{source}: [{table}] must be a table of keys, got {body!r}")
        for key in body:
            if key not in keys:
                raise ProfileError(
                    f"{source}: unknown key {key!r} in [{table}]{_suggest(key, keys)}; "
                    f"known keys: {', '.join(keys)}"
                )
        self.source, self.table, self.body = source, table, body

    def where(self, key: str) -> str:
        return f"{self.source}: [{self.table}] {key}"

    def has(self, key: str) -> bool:
        return key in self.body

    def number(self, key: str, default=None, *, lo=None, hi=None, lo_open=False, hint=""):
        if key not in self.body:
            return default
        v = self.body[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise ProfileError(f"{self.where(key)} = {v!r} must be a finite number{hint}")
        v = float(v)
        if lo is not None and (v < lo or (lo_open and v == lo)):
            raise ProfileError(f"{self.where(key)} = {v!r} must be {'>' if lo_open else '>='} {lo}")
        if hi is not None and v > hi:
            raise ProfileError(f"{self.where(key)} = {v!r} must be <= {hi}")
        return v

    def rate(self, key: str, default=None, *, required=False, hint=""):
        if key not in self.body:
            if required:
                raise ProfileError(f"{self.where(key)} is missing{hint}")
            return default
        v = self.body[key]
        if isinstance(v, bool) or not isinstance(v, (int, float, str)):
            raise ProfileError(f'{self.where(key)} = {v!r} must be a number or e.g. "250k"')
        try:
            r = parse_quantity(v, self.where(key))
        except IqstatError as e:
            raise ProfileError(str(e)) from None
        return r

    def string(self, key: str, default=None, choices=None):
        if key not in self.body:
            return default
        v = self.body[key]
        if not isinstance(v, str):
            raise ProfileError(f"{self.where(key)} = {v!r} must be a quoted string")
        if choices is not None and v not in choices:
            raise ProfileError(
                f"{self.where(key)} = {v!r} is not one of {', '.join(choices)}"
                f"{_suggest(v, choices)}"
            )
        return v

    def spec(self, key: str, n: int, default: float | None, *, lo=None) -> ValueSpec:
        where = self.where(key)
        if key not in self.body:
            if default is None:
                raise ProfileError(
                    f"{where} is missing; give a number, a list or {{uniform=[lo, hi]}}"
                )
            return ValueSpec(constant=float(default))
        v = self.body[key]

        def num(x, what):
            if isinstance(x, bool) or not isinstance(x, (int, float)) or not math.isfinite(x):
                raise ProfileError(f"{where}: {what} {x!r} must be a finite number")
            if lo is not None and x < lo:
                raise ProfileError(f"{where}: {what} {x!r} must be >= {lo}")
            return float(x)

        if isinstance(v, (int, float)) and not isinstance(v, bool):
            return ValueSpec(constant=num(v, "value"))
        if isinstance(v, list):
            if len(v) != n:
                raise ProfileError(
                    f"{where} lists {len(v)} values but [bursts] count = {n}; give one per burst"
                )
            return ValueSpec(values=tuple(num(x, "value") for x in v))
        if isinstance(v, dict):
            if set(v) != {"uniform"}:
                bad = sorted(set(v) - {"uniform"})
                raise ProfileError(
                    f"{where}: unknown key {bad[0] if bad else '?'!r}"
                    f"{_suggest(bad[0], ['uniform']) if bad else ''}; write {{uniform = [lo, hi]}}"
                )
            u = v["uniform"]
            if not isinstance(u, list) or len(u) != 2:
                raise ProfileError(f"{where}: uniform = {u!r} must be [lo, hi]")
            a, b = num(u[0], "lo"), num(u[1], "hi")
            if b < a:
                raise ProfileError(f"{where}: uniform = {u!r} has hi < lo")
            return ValueSpec(uniform=(a, b))
        raise ProfileError(
            f"{where} = {v!r} must be a number, a list of {n} numbers or {{uniform = [lo, hi]}}"
        )


def scenario_from_dict(d: dict, source: str = "<dict>", name: str = "synthetic") -> Scenario:
    """Validate a parsed scenario document.

    Parameters
    ----------
    d : dict
        The TOML document as ``tomllib`` returns it.
    source : str
        Named in error messages.
    name : str
        Base name of the recording (the scenario file's stem).

    Raises
    ------
    ProfileError
        Unknown table or key (with the closest known name), wrong type, missing or invalid value.
    """
    if not isinstance(d, dict):
        raise ProfileError(f"{source}: a scenario must be a table of tables")
    profile = profile_from_dict(d, source=source, extra_tables=SCENARIO_TABLES)
    if profile.symbol_rate_hz is None:
        raise ProfileError(f"{source}: [link] symbol_rate is missing; a scenario must give it")
    if profile.modulation != "ook" and profile.tone_spacing_hz is None:
        raise ProfileError(
            f"{source}: [link] tone_spacing is missing; a {profile.modulation} scenario "
            "must give it"
        )
    if profile.payload_bits is None:
        raise ProfileError(f"{source}: [frame] payload_bits is missing; a scenario must give it")
    if profile.payload_kind == "unknown":
        raise ProfileError(
            f'{source}: [frame] payload = "unknown" cannot be synthesised; use pn9, pn15 or hex'
        )
    for t in SCENARIO_TABLES - {"waveform", "impairments"}:
        if t not in d:
            raise ProfileError(f"{source}: table [{t}] is missing; see docs/synth.md")

    cap = _Reader(source, "capture", d["capture"], SCENARIO_KEYS["capture"])
    fs = cap.rate("sample_rate", required=True, hint='; e.g. sample_rate = "250k"')
    if fs <= 0:
        raise ProfileError(f"{cap.where('sample_rate')} = {fs!r} must be positive")
    if profile.symbol_rate_hz * 2 > fs:
        raise ProfileError(
            f"{source}: [link] symbol_rate {profile.symbol_rate_hz:g} Bd needs a sample rate of at "
            f"least twice that; [capture] sample_rate is {fs:g}"
        )
    datatype = cap.string("datatype", "ci16_le")
    try:
        dt = parse_datatype(datatype)
    except IqstatError as e:
        raise ProfileError(f"{cap.where('datatype')}: {e}") from None
    if not dt.is_complex:
        raise ProfileError(
            f"{cap.where('datatype')} = {datatype!r} is real; use a complex type: cf32_le, "
            "ci16_le or cu8"
        )
    fc = cap.rate("center_frequency")
    dtime = cap.string("datetime")
    if dtime is not None and not _DATETIME_Z.match(dtime):
        raise ProfileError(
            f"{cap.where('datetime')} = {dtime!r} is not RFC 3339 UTC; write e.g. "
            '"2026-04-01T06:30:00Z"'
        )
    if cap.has("peak_dbfs") and cap.has("noise_dbfs"):
        raise ProfileError(
            f"{source}: [capture] gives both peak_dbfs and noise_dbfs; keep one of them"
        )
    noise_dbfs = cap.number("noise_dbfs", hi=0.0)
    peak_dbfs = None if noise_dbfs is not None else cap.number("peak_dbfs", -3.0, hi=0.0)
    seed = None
    if cap.has("seed"):
        seed = cap.body["seed"]
        if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
            raise ProfileError(f"{cap.where('seed')} = {seed!r} must be a whole number >= 0")

    bur = _Reader(source, "bursts", d["bursts"], SCENARIO_KEYS["bursts"])
    if "count" not in bur.body:
        raise ProfileError(f"{bur.where('count')} is missing; e.g. count = 4")
    n = bur.body["count"]
    if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= 100000:
        raise ProfileError(f"{bur.where('count')} = {n!r} must be a whole number in 1..100000")
    ebn0 = bur.spec("ebn0_db", n, None)
    cfo = bur.spec("cfo_hz", n, 0.0)
    gap = bur.spec("gap_s", n, 0.005, lo=0.0)
    pp = bur.body.get("payload_phase", "random")
    if pp == "random":
        payload_phase: Any = "random"
    elif isinstance(pp, int) and not isinstance(pp, bool) and pp >= 0:
        payload_phase = (pp,) * n
    elif (
        isinstance(pp, list)
        and len(pp) == n
        and all(isinstance(x, int) and not isinstance(x, bool) and x >= 0 for x in pp)
    ):
        payload_phase = tuple(pp)
    else:
        raise ProfileError(
            f'{bur.where("payload_phase")} = {pp!r} must be "random", a whole number >= 0 or '
            f"a list of {n} of them"
        )

    wav = _Reader(source, "waveform", d.get("waveform", {}), SCENARIO_KEYS["waveform"])
    bt = wav.number("bt", lo=0.0, lo_open=True)
    if bt is not None and profile.modulation == "ook":
        raise ProfileError(f"{wav.where('bt')} applies to FSK only; use ook_shape for ook")
    ook_shape = wav.string("ook_shape", "rect", ("rect", "raised-cosine"))
    ook_rolloff = wav.number("ook_rolloff", 0.5, lo=0.0, hi=1.0, lo_open=True)
    if profile.modulation != "ook" and (wav.has("ook_shape") or wav.has("ook_rolloff")):
        raise ProfileError(f"{source}: [waveform] ook_shape/ook_rolloff apply to ook only")

    imp = _Reader(source, "impairments", d.get("impairments", {}), SCENARIO_KEYS["impairments"])
    ppm = imp.spec("clock_offset_ppm", n, 0.0)
    for spec in (ppm,):
        vals = [spec.constant] if spec.constant is not None else list(spec.values or spec.uniform)
        if any(abs(v) > 1000 for v in vals):
            raise ProfileError(f"{imp.where('clock_offset_ppm')}: use |ppm| <= 1000")

    def random_or_number(key: str, lo: float, hi: float):
        v = imp.body.get(key, "random")
        if v == "random":
            return "random"
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not lo <= v < hi:
            raise ProfileError(
                f'{imp.where(key)} = {v!r} must be "random" or a number in [{lo}, {hi})'
            )
        return float(v)

    timing = random_or_number("timing", 0.0, 1.0)
    phase = random_or_number("phase", -2 * math.pi, 2 * math.pi)
    k_db = imp.number("rician_k_db")
    doppler = imp.number("doppler_hz", lo=0.0, lo_open=True)
    if (k_db is None) != (doppler is None):
        raise ProfileError(
            f"{source}: [impairments] rician_k_db and doppler_hz go together; give both or neither"
        )
    dc = imp.body.get("dc_offset", [0.0, 0.0])
    if (
        not isinstance(dc, list)
        or len(dc) != 2
        or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in dc)
        or not all(abs(x) < 0.5 for x in dc)
    ):
        raise ProfileError(
            f"{imp.where('dc_offset')} = {dc!r} must be [I, Q] in full-scale units, each |v| < 0.5"
        )
    iq_gain = imp.number("iq_gain_db", 0.0, lo=-6.0, hi=6.0)
    iq_phase = imp.number("iq_phase_deg", 0.0, lo=-30.0, hi=30.0)
    clip = imp.number("clip_dbfs", hi=0.0)
    interferer = None
    if "interferer" in imp.body:
        itf = _Reader(
            source, "impairments.interferer", imp.body["interferer"], SCENARIO_KEYS["interferer"]
        )
        kind = itf.string("kind", None, ("tone", "narrowband"))
        if kind is None:
            raise ProfileError(f'{itf.where("kind")} is missing; "tone" or "narrowband"')
        off = itf.rate("offset_hz", required=True, hint="; e.g. offset_hz = 30000")
        if abs(off) >= fs / 2:
            raise ProfileError(f"{itf.where('offset_hz')} = {off:g} lies outside ±fs/2")
        inr = itf.number("inr_db", hint=" (interference-to-noise power ratio, dB)")
        if inr is None:
            raise ProfileError(f"{itf.where('inr_db')} is missing; e.g. inr_db = 10")
        bw = itf.rate("bandwidth_hz")
        if kind == "narrowband" and (bw is None or not 0 < bw < fs):
            raise ProfileError(f"{itf.where('bandwidth_hz')} must be given, in (0, {fs:g}) Hz")
        if kind == "tone" and bw is not None:
            raise ProfileError(f"{itf.where('bandwidth_hz')} applies to a narrowband interferer")
        interferer = Interferer(kind, off, inr, bw)

    return Scenario(
        name=name, profile=profile, sample_rate_hz=fs, datatype=datatype, n_bursts=n,
        ebn0_db=ebn0, cfo_hz=cfo, gap_s=gap, clock_offset_ppm=ppm, payload_phase=payload_phase,
        center_frequency_hz=fc, datetime_utc=dtime, description=cap.string("description"),
        author=cap.string("author"), peak_dbfs=peak_dbfs, noise_dbfs=noise_dbfs,
        lead_in_s=cap.number("lead_in_s", 0.002, lo=0.0),
        tail_s=cap.number("tail_s", 0.002, lo=0.0), seed=seed, bt=bt, ook_shape=ook_shape,
        ook_rolloff=ook_rolloff, timing=timing, phase=phase, rician_k_db=k_db,
        doppler_hz=doppler, dc_offset=(float(dc[0]), float(dc[1])), iq_gain_db=iq_gain,
        iq_phase_deg=iq_phase, clip_dbfs=clip, interferer=interferer, source=source, document=d,
    )  # fmt: skip


def load_scenario(path: str | os.PathLike) -> Scenario:
    """Read and validate a scenario TOML file (see docs/synth.md).

    Raises
    ------
    ProfileError
        Missing or unreadable file, TOML syntax error, or an invalid scenario.
    """
    p = Path(path)
    return scenario_from_dict(read_toml(p, "scenario"), source=str(p), name=p.stem)
