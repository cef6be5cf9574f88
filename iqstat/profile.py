"""Link profiles: what the measured link is supposed to send, read from a small TOML file.

A profile names the modulation, optionally the symbol rate and tone spacing (estimated from the
capture when omitted), the frame (preamble, sync word, payload pattern) and the bit error rate
the link must meet. The file format is described in docs/profile.md::

    [link]
    modulation = "2fsk"        # 2fsk | 4fsk | ook
    symbol_rate = 4800.0       # Hz
    tone_spacing = 4800.0      # Hz between adjacent tones (FSK only)
    [frame]
    preamble = "aaaaaaaa"      # hex, MSB first
    sync_word = "2dd4"         # hex, MSB first
    payload = "pn9"            # pn9 | pn15 | unknown | hex of known bits
    payload_bits = 512
    [requirement]
    ber = 1e-5

This module also maps bits to tone indices and back (2-FSK, Gray-coded 4-FSK, OOK) and lays
out the bits of a frame. It reads files only in :func:`load_profile`.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import os
import re
import tomllib
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from iqstat.errors import IqstatError, ProfileError
from iqstat.patterns import PRBS_PERIOD, prbs_bits
from iqstat.units import parse_quantity

Modulation = Literal["2fsk", "4fsk", "ook"]
MODULATIONS: tuple[str, ...] = ("2fsk", "4fsk", "ook")
PayloadKind = Literal["pn9", "pn15", "unknown", "hex"]
PAYLOAD_WORDS: tuple[str, ...] = ("pn9", "pn15", "unknown")

_BITS_PER_SYMBOL = {"2fsk": 1, "4fsk": 2, "ook": 1}
_N_TONES = {"2fsk": 2, "4fsk": 4, "ook": 1}

#: Keys of each table of a profile file, mapped to the LinkProfile field they fill.
PROFILE_KEYS: dict[str, dict[str, str]] = {
    "link": {
        "modulation": "modulation",
        "symbol_rate": "symbol_rate_hz",
        "tone_spacing": "tone_spacing_hz",
    },
    "frame": {
        "preamble": "preamble",
        "sync_word": "sync_word",
        "payload": "payload",
        "payload_bits": "payload_bits",
    },
    "requirement": {"ber": "required_ber"},
}
# Field -> "[table] key", for messages that name what the user wrote.
_WHERE = {f: f"[{t}] {k}" for t, keys in PROFILE_KEYS.items() for k, f in keys.items()}
# Fields override_profile sets, named as command-line options (a suggestion to cli.py).
_OPTION = {
    "modulation": "--modulation",
    "symbol_rate_hz": "--symbol-rate",
    "tone_spacing_hz": "--tone-spacing",
    "required_ber": "--required-ber",
}

# 4-FSK Gray mapping: value of the bit pair (first bit more significant) -> tone index, low to
# high tones carrying 00, 01, 11, 10; and its inverse.
_GRAY_PAIR_TO_TONE = np.array([0, 1, 3, 2], dtype=np.int64)
_GRAY_TONE_TO_PAIR = np.array([0, 1, 3, 2], dtype=np.int64)

_HEX_DIGITS = re.compile(r"^[0-9a-f]+$")


def _suggest(word: str, choices, cutoff: float = 0.6) -> str:
    """' (did you mean X?)' for the closest choice, or '' when nothing is close."""
    w = str(word).strip().lower()
    squeezed = re.sub(r"[\s_\-]", "", w)
    # Letters in another order ("fsk2") or with separators ("2-fsk") are caught first.
    for c in choices:
        if squeezed == c.replace("_", "") or sorted(squeezed) == sorted(c.replace("_", "")):
            return f" (did you mean {c!r}?)"
    close = difflib.get_close_matches(w, list(choices), n=1, cutoff=cutoff)
    return f" (did you mean {close[0]!r}?)" if close else ""


def _hex_problem(text: Any) -> tuple[str, str]:
    """(normalised hex digits, "") or ("", what is wrong with ``text``)."""
    if not isinstance(text, str):
        return "", f'{text!r} must be a quoted string of hex digits, e.g. "2dd4"'
    s = text.strip().lower().replace("_", "")
    if s.startswith("0x"):
        s = s[2:]
    if not s:
        return "", f"{text!r} is empty; give hex digits or leave the key out"
    if not _HEX_DIGITS.match(s):
        bad = next(ch for ch in s if ch not in "0123456789abcdef")
        return "", f"{text!r} is not hex: {bad!r} is not a hex digit (use 0-9, a-f)"
    return s, ""


def normalize_hex(text: str, name: str = "hex string") -> str:
    """Lower-case hex digits of ``text``, with an optional ``0x`` prefix and ``_`` removed.

    Raises ProfileError naming ``name`` when the text is empty or has a non-hex character.
    """
    s, problem = _hex_problem(text)
    if problem:
        raise ProfileError(f"{name} {problem}")
    return s


@dataclass(frozen=True)
class LinkProfile:
    """What a link sends and must achieve.

    Attributes
    ----------
    modulation : {"2fsk", "4fsk", "ook"}
        Modulation of the link.
    symbol_rate_hz : float or None
        Symbol rate Rs in Hz (baud); None: estimate it from the capture.
    tone_spacing_hz : float or None
        Spacing of adjacent FSK tones in Hz; None: estimate it. Always None for OOK.
    preamble, sync_word : str or None
        Hex digits (lower case), sent MSB first; None when the frame has none / unknown.
    payload : str
        ``"pn9"``, ``"pn15"``, ``"unknown"`` or lower-case hex of known payload bits.
    payload_bits : int or None
        Payload length in bits. For a hex payload it defaults to 4 x its digits.
    required_ber : float or None
        Bit error rate the link must meet, in (0, 0.5).
    source : str or None
        Where the profile came from (file path, "command line", …).
    """

    modulation: Modulation
    symbol_rate_hz: float | None = None
    tone_spacing_hz: float | None = None
    preamble: str | None = None
    sync_word: str | None = None
    payload: str = "unknown"
    payload_bits: int | None = None
    required_ber: float | None = None
    source: str | None = None

    def __post_init__(self) -> None:
        from_cli = bool(self.source) and str(self.source).endswith("command line")

        def fail(field: str, text: str) -> None:
            where = f"{self.source}: " if self.source else ""
            name = _OPTION[field] if from_cli and field in _OPTION else _WHERE[field]
            raise ProfileError(f"{where}{name} {text}")

        def put(field: str, value: Any) -> None:
            object.__setattr__(self, field, value)

        mod = self.modulation
        if not isinstance(mod, str) or mod.strip().lower() not in MODULATIONS:
            fail(
                "modulation",
                f"{mod!r} is not a known modulation{_suggest(mod, MODULATIONS)}; "
                f"choose one of {', '.join(MODULATIONS)}",
            )
        put("modulation", mod.strip().lower())

        for field in ("symbol_rate_hz", "tone_spacing_hz"):
            v = getattr(self, field)
            if v is None:
                continue
            if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)):
                fail(field, f'{v!r} must be a number in Hz, e.g. 4800 or "4.8k"')
            if not (math.isfinite(float(v)) and float(v) > 0):
                fail(field, f"{v!r} must be a positive, finite rate in Hz")
            put(field, float(v))
        if self.modulation == "ook" and self.tone_spacing_hz is not None:
            fail(
                "tone_spacing_hz",
                f"{self.tone_spacing_hz!r} is only meaningful for FSK; remove it for ook",
            )

        for field in ("preamble", "sync_word"):
            v = getattr(self, field)
            if v is not None:
                digits, problem = _hex_problem(v)
                if problem:
                    fail(field, problem)
                put(field, digits)

        pay = self.payload
        if not isinstance(pay, str):
            fail("payload", f"{pay!r} must be a string: pn9, pn15, unknown or hex digits")
        word = pay.strip().lower()
        if word in PAYLOAD_WORDS:
            put("payload", word)
        else:
            digits, problem = _hex_problem(pay)
            if problem:
                fail(
                    "payload",
                    f"{pay!r} is neither pn9, pn15, unknown nor hex digits"
                    f"{_suggest(pay, PAYLOAD_WORDS)}",
                )
            put("payload", digits)

        nb = self.payload_bits
        if nb is not None:
            if isinstance(nb, float) and nb.is_integer():
                nb = int(nb)
            if isinstance(nb, bool) or not isinstance(nb, (int, np.integer)) or nb <= 0:
                fail("payload_bits", f"{nb!r} must be a positive whole number of bits")
            put("payload_bits", int(nb))
        if self.payload_kind == "hex":
            n_known = 4 * len(self.payload)
            if self.payload_bits is None:
                put("payload_bits", n_known)
            elif self.payload_bits > n_known:
                fail(
                    "payload_bits",
                    f"{self.payload_bits} exceeds the {n_known} bits of the hex payload; "
                    "lengthen the payload or lower payload_bits",
                )

        if self.modulation == "4fsk" and self.payload_bits is not None and self.payload_bits % 2:
            fail(
                "payload_bits",
                f"{self.payload_bits} is odd but 4fsk carries bit pairs; "
                "give the even length actually sent (with its padding bit)",
            )

        ber = self.required_ber
        if ber is not None:
            if isinstance(ber, bool) or not isinstance(ber, (int, float, np.integer, np.floating)):
                fail("required_ber", f"{ber!r} must be a number, e.g. 1e-5")
            if not (math.isfinite(float(ber)) and 0.0 < float(ber) < 0.5):
                fail("required_ber", f"{ber!r} must lie strictly between 0 and 0.5, e.g. 1e-5")
            put("required_ber", float(ber))

    @property
    def bits_per_symbol(self) -> int:
        """Bits carried by one symbol: 1 (2fsk, ook) or 2 (4fsk)."""
        return _BITS_PER_SYMBOL[self.modulation]

    @property
    def n_tones(self) -> int:
        """Correlator branches: 2 (2fsk), 4 (4fsk), 1 (ook, the carrier)."""
        return _N_TONES[self.modulation]

    @property
    def bit_rate_hz(self) -> float | None:
        """Bit rate Rb = Rs·log2(M) in bit/s, None while the symbol rate is unknown."""
        if self.symbol_rate_hz is None:
            return None
        return self.symbol_rate_hz * self.bits_per_symbol

    @property
    def payload_kind(self) -> PayloadKind:
        """``"pn9"``, ``"pn15"``, ``"unknown"`` or ``"hex"`` (known bits)."""
        return self.payload if self.payload in PAYLOAD_WORDS else "hex"  # type: ignore[return-value]

    @property
    def modulation_index(self) -> float | None:
        """h = tone_spacing / Rs for FSK when both are known, else None."""
        if self.tone_spacing_hz is None or self.symbol_rate_hz is None:
            return None
        return self.tone_spacing_hz / self.symbol_rate_hz

    def to_dict(self) -> dict:
        """Fields plus derived values, JSON-ready."""
        d = dataclasses.asdict(self)
        d.update(
            bits_per_symbol=self.bits_per_symbol,
            n_tones=self.n_tones,
            bit_rate_hz=self.bit_rate_hz,
            payload_kind=self.payload_kind,
        )
        return d


def _read_rate(value: Any, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, str)):
        raise ProfileError(
            f"{where} = {value!r} has the wrong type ({type(value).__name__}); "
            'write a number in Hz, e.g. 4800 or "4.8k"'
        )
    try:
        return parse_quantity(value, where)
    except IqstatError as e:
        raise ProfileError(str(e)) from None


def _read_value(table: str, key: str, value: Any, where: str) -> Any:
    """Check the TOML type of one value and convert it to what LinkProfile takes."""
    if key in ("symbol_rate", "tone_spacing"):
        return _read_rate(value, where)
    if key in ("modulation", "preamble", "sync_word", "payload"):
        if not isinstance(value, str):
            hint = ""
            if isinstance(value, int) and not isinstance(value, bool):
                hint = f'; quote it so leading zeros survive, e.g. {key} = "..."'
            raise ProfileError(
                f"{where} = {value!r} must be a quoted string, not {type(value).__name__}{hint}"
            )
        return value
    if key == "payload_bits":
        if isinstance(value, str) and value.strip().isdigit():
            return int(value.strip())
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ProfileError(
                f"{where} = {value!r} must be a whole number of bits, e.g. payload_bits = 512"
            )
        return value
    if key == "ber":
        if isinstance(value, str):
            try:
                return float(value)
            except ValueError:
                pass
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise ProfileError(f"{where} = {value!r} must be a number, e.g. ber = 1e-5")
        return value
    raise AssertionError(f"unhandled profile key [{table}] {key}")  # keys come from PROFILE_KEYS


def profile_from_dict(
    d: dict, source: str = "<dict>", extra_tables: frozenset[str] = frozenset()
) -> LinkProfile:
    """Build a LinkProfile from the tables of a parsed profile file.

    Parameters
    ----------
    d : dict
        ``{"link": {...}, "frame": {...}, "requirement": {...}}`` as tomllib returns it.
    source : str
        Named in error messages and stored in ``LinkProfile.source``.
    extra_tables : frozenset of str
        Top-level tables to ignore (a scenario file's ``capture``, ``burst``, …).

    Returns
    -------
    LinkProfile

    Raises
    ------
    ProfileError
        Unknown table or key (with the closest known name), wrong type or invalid value.
    """
    if not isinstance(d, dict):
        raise ProfileError(f"{source}: a profile must be a table of tables, got {type(d).__name__}")
    all_keys = {k: t for t, keys in PROFILE_KEYS.items() for k in keys}
    fields: dict[str, Any] = {}
    for table, body in d.items():
        if table in extra_tables:
            continue
        if table not in PROFILE_KEYS:
            if table in all_keys:
                raise ProfileError(
                    f"{source}: key {table!r} is outside any table; "
                    f"put it under [{all_keys[table]}]"
                )
            known = sorted(set(PROFILE_KEYS) | set(extra_tables))
            raise ProfileError(
                f"{source}: unknown table [{table}]{_suggest(table, known)}; "
                f"known tables: {', '.join(known)}"
            )
        if not isinstance(body, dict):
            raise ProfileError(
                f"{source}: [{table}] must be a table of keys, got {type(body).__name__} {body!r}"
            )
        for key, value in body.items():
            where = f"{source}: [{table}] {key}"
            if key not in PROFILE_KEYS[table]:
                if key in all_keys:
                    hint = f"; it belongs in [{all_keys[key]}]"
                else:
                    hint = f"{_suggest(key, PROFILE_KEYS[table])}; known keys of [{table}]: " + (
                        ", ".join(PROFILE_KEYS[table])
                    )
                raise ProfileError(f"{source}: unknown key {key!r} in [{table}]{hint}")
            fields[PROFILE_KEYS[table][key]] = _read_value(table, key, value, where)
    if "modulation" not in fields:
        raise ProfileError(
            f"{source}: [link] modulation is missing; add it under [link], "
            f'e.g. modulation = "2fsk" (one of {", ".join(MODULATIONS)})'
        )
    return LinkProfile(**fields, source=source)


def load_profile(path: str | os.PathLike) -> LinkProfile:
    """Read a link profile from a TOML file.

    Parameters
    ----------
    path : str or path-like
        The profile file.

    Returns
    -------
    LinkProfile
        With ``source`` set to the path.

    Raises
    ------
    ProfileError
        Missing or unreadable file, TOML syntax error (with line and column), unknown table or
        key, wrong type or invalid value.
    """
    p = os.fspath(path)
    return profile_from_dict(read_toml(p, "profile"), source=p)


def read_toml(path: str | os.PathLike, what: str) -> dict:
    """Parse a TOML file; ProfileError naming ``what`` ("profile", "scenario") on any problem."""
    p = os.fspath(path)
    if not os.path.exists(p):
        raise ProfileError(f"{what} file {p} not found; check the path")
    if os.path.isdir(p):
        raise ProfileError(f"{what} file {p} is a directory; give the path of a .toml file")
    try:
        with open(p, "rb") as fh:
            return tomllib.load(fh)
    except tomllib.TOMLDecodeError as e:
        raise ProfileError(f"{what} file {p}: TOML syntax error: {e}") from None
    except UnicodeDecodeError as e:
        raise ProfileError(f"{what} file {p} is not UTF-8 text ({e.reason})") from None
    except OSError as e:
        raise ProfileError(f"{what} file {p} cannot be read: {e.strerror}") from None


def _toml_value(v: Any) -> str:
    if isinstance(v, str):
        return f'"{v}"'
    return repr(v)


def profile_to_toml(profile: LinkProfile) -> str:
    """The profile as profile-file text (``load_profile`` reads it back to an equal profile)."""
    lines: list[str] = []
    for table, keys in PROFILE_KEYS.items():
        body = [
            f"{key} = {_toml_value(getattr(profile, field))}"
            for key, field in keys.items()
            if getattr(profile, field) is not None
        ]
        if body:
            lines += ([""] if lines else []) + [f"[{table}]"] + body
    return "\n".join(lines) + "\n"


def override_profile(
    profile: LinkProfile | None,
    *,
    modulation: str | None = None,
    symbol_rate_hz: float | str | None = None,
    tone_spacing_hz: float | str | None = None,
    required_ber: float | None = None,
) -> LinkProfile:
    """Apply command-line values over a profile (None means "not given").

    Parameters
    ----------
    profile : LinkProfile or None
        The profile from ``--profile``, if any.
    modulation, symbol_rate_hz, tone_spacing_hz, required_ber
        Values given on the command line. Rates may be strings such as ``"4.8k"``.

    Returns
    -------
    LinkProfile
        A new, validated profile. Switching the modulation to ook drops a tone spacing that
        came from the file.
    """
    given: dict[str, Any] = {}
    for field, value in (("symbol_rate_hz", symbol_rate_hz), ("tone_spacing_hz", tone_spacing_hz)):
        if value is not None:
            try:
                if isinstance(value, str):
                    value = parse_quantity(value, _OPTION[field])
                given[field] = value
            except IqstatError as e:
                raise ProfileError(str(e)) from None
    if modulation is not None:
        given["modulation"] = modulation
    if required_ber is not None:
        given["required_ber"] = required_ber
    if profile is None:
        if modulation is None:
            raise ProfileError(
                "no link profile and no modulation: give --profile FILE or --modulation "
                + "|".join(MODULATIONS)
            )
        return LinkProfile(**given, source="command line")
    if not given:
        return profile
    if (
        isinstance(modulation, str)
        and modulation.strip().lower() == "ook"
        and tone_spacing_hz is None
    ):
        given["tone_spacing_hz"] = None
    source = f"{profile.source} + command line" if profile.source else "command line"
    return dataclasses.replace(profile, **given, source=source)


# ---------------------------------------------------------------------------- bit mapping


def _check_modulation(modulation: str) -> str:
    if modulation not in MODULATIONS:
        raise ProfileError(
            f"modulation {modulation!r} is not known{_suggest(modulation, MODULATIONS)}; "
            f"choose one of {', '.join(MODULATIONS)}"
        )
    return modulation


def hex_to_bits(hex_str: str) -> np.ndarray:
    """Bits of a hex string, most significant bit of each digit first.

    Parameters
    ----------
    hex_str : str
        Hex digits; an optional ``0x`` prefix and ``_`` separators are allowed.

    Returns
    -------
    numpy.ndarray
        uint8 0/1, shape (4·digits,). ``"2dd4"`` gives 0010 1101 1101 0100.
    """
    s = normalize_hex(hex_str, "hex string")
    codes = np.frombuffer(s.encode("ascii"), dtype=np.uint8)
    nibbles = np.where(codes >= ord("a"), codes - ord("a") + 10, codes - ord("0")).astype(np.uint8)
    return np.unpackbits(nibbles[:, None], axis=1)[:, 4:].reshape(-1)


def _bits_array(bits: np.ndarray) -> np.ndarray:
    b = np.asarray(bits)
    if b.ndim != 1:
        raise ProfileError(f"bits must be a 1-D array of 0/1, got shape {b.shape}")
    if b.size and (b.dtype.kind not in "biu" or b.min() < 0 or b.max() > 1):
        raise ProfileError("bits must hold only the integers 0 and 1")
    return b.astype(np.int64, copy=False)


def bits_to_symbols(bits: np.ndarray, modulation: Modulation) -> np.ndarray:
    """Tone index of each symbol for a bit sequence.

    Parameters
    ----------
    bits : numpy.ndarray
        0/1, shape (n,), in order of transmission.
    modulation : {"2fsk", "4fsk", "ook"}

    Returns
    -------
    numpy.ndarray
        int64, shape (n / bits_per_symbol,). 2fsk: tone = bit (1 = upper tone). 4fsk: pairs,
        first bit more significant, tones low to high carry 00, 01, 11, 10 (Gray). ook: 1 = on.
    """
    _check_modulation(modulation)
    b = _bits_array(bits)
    if modulation != "4fsk":
        return b.copy()
    if b.size % 2:
        raise ProfileError(
            f"4fsk carries bit pairs but {b.size} bits is odd; "
            "pad or trim the bits to an even count"
        )
    pair = 2 * b[0::2] + b[1::2]
    return _GRAY_PAIR_TO_TONE[pair]


def symbols_to_bits(symbols: np.ndarray, modulation: Modulation) -> np.ndarray:
    """Bits carried by a sequence of tone indices (inverse of :func:`bits_to_symbols`).

    Parameters
    ----------
    symbols : numpy.ndarray
        Integer tone indices, shape (k,): 0..1 for 2fsk and ook, 0..3 for 4fsk.
    modulation : {"2fsk", "4fsk", "ook"}

    Returns
    -------
    numpy.ndarray
        uint8 0/1, shape (k·bits_per_symbol,).
    """
    _check_modulation(modulation)
    s = np.asarray(symbols)
    n_levels = 4 if modulation == "4fsk" else 2
    if s.ndim != 1:
        raise ProfileError(f"symbols must be a 1-D array of tone indices, got shape {s.shape}")
    if s.size and (s.dtype.kind not in "biu" or s.min() < 0 or s.max() >= n_levels):
        raise ProfileError(
            f"symbols for {modulation} must be integers 0..{n_levels - 1}; "
            f"got values from {s.min()!r} to {s.max()!r}"
        )
    s = s.astype(np.int64, copy=False)
    if modulation != "4fsk":
        return s.astype(np.uint8)
    pair = _GRAY_TONE_TO_PAIR[s]
    out = np.empty(2 * s.size, dtype=np.uint8)
    out[0::2] = pair >> 1
    out[1::2] = pair & 1
    return out


# ---------------------------------------------------------------------------- frame layout


@dataclass(frozen=True, eq=False)
class FrameLayout:
    """The known bits of a frame, in order of transmission.

    Attributes
    ----------
    preamble_bits, sync_bits : numpy.ndarray
        uint8 0/1, possibly empty.
    payload_bits : numpy.ndarray or None
        The payload's bits when they are known (pn9/pn15 with a length, or hex); else None.
    payload_length : int or None
        Payload length in bits when known.
    """

    preamble_bits: np.ndarray
    sync_bits: np.ndarray
    payload_bits: np.ndarray | None
    payload_length: int | None

    @property
    def header_bits(self) -> np.ndarray:
        """Preamble followed by sync word."""
        return np.concatenate([self.preamble_bits, self.sync_bits]).astype(np.uint8)

    @property
    def n_header_bits(self) -> int:
        return int(self.preamble_bits.size + self.sync_bits.size)

    def to_dict(self) -> dict:
        return {
            "n_preamble_bits": int(self.preamble_bits.size),
            "n_sync_bits": int(self.sync_bits.size),
            "n_header_bits": self.n_header_bits,
            "payload_length": self.payload_length,
            "payload_known": self.payload_bits is not None,
        }


def _frozen(a: np.ndarray) -> np.ndarray:
    a = np.array(a, dtype=np.uint8)
    a.flags.writeable = False
    return a


def frame_layout(profile: LinkProfile, payload_phase: int = 0) -> FrameLayout:
    """Bits of the frame a profile describes.

    Parameters
    ----------
    profile : LinkProfile
    payload_phase : int
        For a pn9/pn15 payload, the sequence phase (bits from the all-ones start) of the
        payload's first bit.

    Returns
    -------
    FrameLayout
        For pn9/pn15 the payload is ``prbs_bits(name, payload_bits, payload_phase)``, or None
        when the profile gives no payload_bits; a hex payload gives its first payload_bits
        bits; an unknown payload gives None.
    """
    empty = np.zeros(0, dtype=np.uint8)
    pre = hex_to_bits(profile.preamble) if profile.preamble else empty
    sync = hex_to_bits(profile.sync_word) if profile.sync_word else empty
    kind = profile.payload_kind
    payload = None
    if kind in PRBS_PERIOD:
        if profile.payload_bits is not None:
            payload = prbs_bits(kind, profile.payload_bits, payload_phase)
    elif kind == "hex":
        payload = hex_to_bits(profile.payload)[: profile.payload_bits]
    elif kind != "unknown":
        raise ProfileError(f"payload kind {kind!r} is not one of pn9, pn15, unknown, hex")
    return FrameLayout(
        preamble_bits=_frozen(pre),
        sync_bits=_frozen(sync),
        payload_bits=None if payload is None else _frozen(payload),
        payload_length=profile.payload_bits,
    )
