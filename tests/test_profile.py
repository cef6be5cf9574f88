"""Tests of iqstat.profile: the profile file, its validation, bit/tone mapping, frame layout.

References named beside each check:
- TOML v1.0.0 specification (toml.io) and Python's tomllib for the file syntax.
- Gray code: adjacent code words differ in exactly one bit (common practice; any digital
  communications text, e.g. Proakis & Salehi, Digital Communications, 5th ed., §3.2 [mem]).
- Hex digits sent MSB first: the profile format's own definition (docs/profile.md).
"""

from __future__ import annotations

import dataclasses
import itertools

import numpy as np
import pytest

from iqstat.errors import IqstatError, ProfileError
from iqstat.patterns import prbs_bits
from iqstat.profile import (
    MODULATIONS,
    FrameLayout,
    LinkProfile,
    bits_to_symbols,
    frame_layout,
    hex_to_bits,
    load_profile,
    override_profile,
    profile_from_dict,
    profile_to_toml,
    symbols_to_bits,
)

# An invented scenario: level sensors in a hillside reservoir reporting to a pump-house gateway.
GOOD = """\
# reservoir level sensors -> pump-house gateway
[link]
modulation = "2fsk"
symbol_rate = 4800.0
tone_spacing = "4.8k"

[frame]
preamble = "aaaa_aaaa"
sync_word = "0x2DD4"
payload = "pn9"
payload_bits = 512

[requirement]
ber = 1e-5
"""


def write(tmp_path, text, name="link.toml"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def test_good_profile_loads_and_normalises(tmp_path):
    p = load_profile(write(tmp_path, GOOD))
    assert p.modulation == "2fsk"
    assert p.symbol_rate_hz == 4800.0 and p.tone_spacing_hz == 4800.0
    assert p.preamble == "aaaaaaaa" and p.sync_word == "2dd4"
    assert (p.payload, p.payload_kind, p.payload_bits) == ("pn9", "pn9", 512)
    assert p.required_ber == 1e-5
    assert p.source.endswith("link.toml")
    assert (p.bits_per_symbol, p.n_tones, p.bit_rate_hz) == (1, 2, 4800.0)
    d = p.to_dict()
    assert d["symbol_rate_hz"] == 4800.0 and d["payload_kind"] == "pn9"


def test_profile_round_trips_through_toml(tmp_path):
    p = load_profile(write(tmp_path, GOOD))
    q = load_profile(write(tmp_path, profile_to_toml(p), "again.toml"))
    assert dataclasses.replace(q, source=p.source) == p
    minimal = LinkProfile(modulation="ook")
    r = load_profile(write(tmp_path, profile_to_toml(minimal), "min.toml"))
    assert dataclasses.replace(r, source=None) == minimal


@pytest.mark.parametrize(
    "modulation, bps, tones",
    [("2fsk", 1, 2), ("4fsk", 2, 4), ("ook", 1, 1)],
)
def test_derived_properties(modulation, bps, tones):
    # Trade facts: log2(M) bits per M-FSK symbol; OOK is one bit per symbol on one branch.
    p = LinkProfile(modulation=modulation, symbol_rate_hz=1200)
    assert (p.bits_per_symbol, p.n_tones, p.bit_rate_hz) == (bps, tones, 1200.0 * bps)
    assert LinkProfile(modulation=modulation).bit_rate_hz is None


def test_hex_payload_defaults_and_limits():
    p = LinkProfile(modulation="4fsk", payload="C0FFEE")
    assert (p.payload, p.payload_kind, p.payload_bits) == ("c0ffee", "hex", 24)
    assert LinkProfile(modulation="4fsk", payload="c0ffee", payload_bits=20).payload_bits == 20
    with pytest.raises(ProfileError, match=r"payload_bits 25 exceeds the 24 bits"):
        LinkProfile(modulation="4fsk", payload="c0ffee", payload_bits=25)


# --------------------------------------------------------------------------- errors


F2 = '[link]\nmodulation = "2fsk"\n'  # a valid [link] head for 2fsk
OO = '[link]\nmodulation = "ook"\n'  # ... for ook
FR = OO + "[frame]\n"  # ... followed by [frame]


@pytest.mark.parametrize(
    "text, pattern",
    [
        # typo in a key, with a suggestion
        (F2 + "symbol_rte = 4800\n", r"'symbol_rte'.*did you mean 'symbol_rate'"),
        # typo in a table name
        ('[lnik]\nmodulation = "2fsk"\n', r"\[lnik\].*did you mean 'link'"),
        # a key in the wrong table
        (F2 + "ber = 1e-4\n", r"'ber' in \[link\].*belongs in \[requirement\]"),
        # typo'd modulations
        ('[link]\nmodulation = "2-fsk"\n', r"'2-fsk'.*did you mean '2fsk'"),
        ('[link]\nmodulation = "fsk2"\n', r"'fsk2'.*did you mean '2fsk'"),
        ('[link]\nmodulation = "fsk4"\n', r"'fsk4'.*did you mean '4fsk'"),
        ('[link]\nmodulation = "okk"\n', r"'okk'.*did you mean 'ook'"),
        ('[link]\nmodulation = "qpsk"\n', r"'qpsk' is not a known modulation; choose one of"),
        # bad hex
        (FR + 'sync_word = "2dg4"\n', r"sync_word '2dg4' is not hex: 'g'"),
        (FR + 'preamble = ""\n', r"preamble '' is empty"),
        (FR + 'payload = "pn-15"\n', r"payload 'pn-15'.*did you mean 'pn15'"),
        # hex written as a TOML integer loses leading zeros
        (FR + "sync_word = 0x0dd4\n", r"sync_word = 3540 must be a quoted"),
        # negative / zero / non-finite rates
        (F2 + "symbol_rate = -4800\n", r"symbol_rate -4800.0 must be a positive"),
        (F2 + "tone_spacing = 0\n", r"tone_spacing 0.0 must be a positive"),
        (F2 + "symbol_rate = inf\n", r"symbol_rate.*finite"),
        # wrong types
        (F2 + "symbol_rate = true\n", r"symbol_rate = True has the wrong type"),
        (F2 + "symbol_rate = [4800]\n", r"symbol_rate = \[4800\] has the wrong type"),
        (F2 + 'symbol_rate = "fast"\n', r"symbol_rate 'fast' is not a number"),
        ("[link]\nmodulation = 2\n", r"modulation = 2 must be a quoted string"),
        (FR + 'payload_bits = "many"\n', r"payload_bits = 'many'"),
        (FR + "payload_bits = 0\n", r"payload_bits 0 must be a positive"),
        (FR + "payload_bits = 12.5\n", r"payload_bits 12.5"),
        # out-of-range requirement
        (OO + "[requirement]\nber = 0.5\n", r"ber 0.5 must lie strictly between"),
        (OO + "[requirement]\nber = 0\n", r"ber 0 must lie strictly between"),
        # 4fsk sends bit pairs
        ('[link]\nmodulation = "4fsk"\n[frame]\npayload_bits = 511\n', r"payload_bits 511 is odd"),
        # tone spacing is an FSK parameter
        (OO + "tone_spacing = 4800\n", r"tone_spacing 4800.0 is only meaningful for FSK"),
        # structure
        ('modulation = "ook"\n', r"'modulation' is outside any table; put it under \[link\]"),
        ('[frame]\npayload = "pn9"\n', r"\[link\] modulation is missing"),
        ("link = 3\n", r"\[link\] must be a table"),
    ],
)
def test_profile_errors_name_the_culprit(tmp_path, text, pattern):
    path = write(tmp_path, text)
    with pytest.raises(ProfileError, match=pattern) as err:
        load_profile(path)
    msg = str(err.value)
    assert str(path) in msg and "\n" not in msg


def test_missing_file(tmp_path):
    missing = tmp_path / "nowhere.toml"
    with pytest.raises(ProfileError, match=r"profile file .*nowhere.toml not found"):
        load_profile(missing)
    with pytest.raises(ProfileError, match="is a directory"):
        load_profile(tmp_path)


def test_toml_syntax_error_gives_line_and_column(tmp_path):
    text = '[link]\nmodulation = "2fsk"\nsymbol_rate = 48 00\n'
    with pytest.raises(ProfileError, match=r"TOML syntax error.*line 3, column \d+"):
        load_profile(write(tmp_path, text))


def test_not_utf8(tmp_path):
    p = tmp_path / "latin.toml"
    p.write_bytes(b'[link]\nmodulation = "\xe9"\n')
    with pytest.raises(ProfileError, match="not UTF-8|TOML syntax error"):
        load_profile(p)


def test_profile_from_dict_ignores_extra_tables():
    d = {
        "link": {"modulation": "ook", "symbol_rate": "2.4k"},
        "capture": {"sample_rate": 250e3},
        "burst": [{"start": 0.1}, {"start": 0.5}],
        "impairments": {"cfo": 300},
    }
    extra = frozenset({"capture", "burst", "impairments"})
    p = profile_from_dict(d, source="scenario.toml", extra_tables=extra)
    assert p.symbol_rate_hz == 2400.0 and p.source == "scenario.toml"
    with pytest.raises(ProfileError, match=r"unknown table \[capture\]"):
        profile_from_dict(d, source="scenario.toml")


def test_accepts_quantity_strings():
    # iqstat.units.parse_quantity forms are accepted for rates.
    p = profile_from_dict({"link": {"modulation": "4fsk", "symbol_rate": "9.6 kBd"}})
    assert p.symbol_rate_hz == 9600.0


def test_errors_are_iqstat_errors():
    assert issubclass(ProfileError, IqstatError)


# --------------------------------------------------------------------------- overrides


def test_override_profile(tmp_path):
    base = load_profile(write(tmp_path, GOOD))
    assert override_profile(base) is base
    faster = override_profile(base, symbol_rate_hz="9.6k", required_ber=1e-3)
    assert faster.symbol_rate_hz == 9600.0 and faster.required_ber == 1e-3
    assert faster.tone_spacing_hz == base.tone_spacing_hz and faster.payload == "pn9"
    assert faster.source.endswith("command line")
    # switching to OOK drops the file's tone spacing, but an explicit one is an error
    assert override_profile(base, modulation="ook").tone_spacing_hz is None
    with pytest.raises(ProfileError, match=r"--tone-spacing .*only meaningful for FSK"):
        override_profile(base, modulation="ook", tone_spacing_hz=1000.0)
    with pytest.raises(ProfileError, match=r"--required-ber 2"):
        override_profile(base, required_ber=2)
    with pytest.raises(ProfileError, match=r"--symbol-rate 'quick'"):
        override_profile(base, symbol_rate_hz="quick")
    with pytest.raises(ProfileError, match=r"--modulation '2fks'.*did you mean '2fsk'"):
        override_profile(base, modulation="2fks")


def test_override_without_profile():
    p = override_profile(None, modulation="4FSK", symbol_rate_hz=2400)
    assert (p.modulation, p.symbol_rate_hz, p.source) == ("4fsk", 2400.0, "command line")
    with pytest.raises(ProfileError, match=r"give --profile FILE or --modulation"):
        override_profile(None, symbol_rate_hz=2400)


# --------------------------------------------------------------------------- bit mapping


def test_hex_msb_first():
    # Format definition: each hex digit's most significant bit is sent first.
    assert "".join(map(str, hex_to_bits("2dd4"))) == "0010110111010100"
    assert "".join(map(str, hex_to_bits("0x_F0_1"))) == "111100000001"
    assert hex_to_bits("A5").dtype == np.uint8
    # Cross-check with numpy's own MSB-first unpacking of the bytes.
    np.testing.assert_array_equal(
        hex_to_bits("c0ffee42"), np.unpackbits(np.frombuffer(bytes.fromhex("c0ffee42"), np.uint8))
    )
    with pytest.raises(ProfileError, match="not hex"):
        hex_to_bits("12x4")


def test_4fsk_mapping_table():
    # Project convention: bit pairs, first bit more significant; tones low->high carry
    # 00, 01, 11, 10.
    pairs = np.array([0, 0, 0, 1, 1, 1, 1, 0], dtype=np.uint8)
    np.testing.assert_array_equal(bits_to_symbols(pairs, "4fsk"), [0, 1, 2, 3])


def test_4fsk_mapping_is_a_gray_code():
    # Gray code (common practice; any digital communications text): the words on adjacent
    # tones differ in exactly one bit, so the most likely symbol error (to a neighbouring tone)
    # costs one bit; and the map is a bijection onto all four pairs.
    words = symbols_to_bits(np.arange(4), "4fsk").reshape(4, 2)
    assert len({tuple(w) for w in words}) == 4
    for a, b in itertools.pairwise(words):
        assert int(np.sum(a != b)) == 1


@pytest.mark.parametrize("modulation", MODULATIONS)
def test_bits_symbols_round_trip(modulation):
    rng = np.random.default_rng(5)
    bits = rng.integers(0, 2, 1000).astype(np.uint8)
    sym = bits_to_symbols(bits, modulation)
    assert sym.dtype == np.int64
    assert sym.size == bits.size // (2 if modulation == "4fsk" else 1)
    np.testing.assert_array_equal(symbols_to_bits(sym, modulation), bits)
    k = 4 if modulation == "4fsk" else 2
    s = rng.integers(0, k, 300)
    np.testing.assert_array_equal(bits_to_symbols(symbols_to_bits(s, modulation), modulation), s)


def test_2fsk_and_ook_mapping():
    # Project convention: 2fsk bit 1 = upper tone (index 1); ook bit 1 = carrier on.
    np.testing.assert_array_equal(bits_to_symbols(np.array([1, 0, 1]), "2fsk"), [1, 0, 1])
    np.testing.assert_array_equal(bits_to_symbols(np.array([0, 1]), "ook"), [0, 1])


def test_mapping_errors():
    with pytest.raises(ProfileError, match="odd"):
        bits_to_symbols(np.array([1, 0, 1]), "4fsk")
    with pytest.raises(ProfileError, match="0..3"):
        symbols_to_bits(np.array([0, 4]), "4fsk")
    with pytest.raises(ProfileError, match="0 and 1"):
        bits_to_symbols(np.array([0, 2]), "2fsk")
    with pytest.raises(ProfileError, match="did you mean '2fsk'"):
        bits_to_symbols(np.array([0, 1]), "2-fsk")


# --------------------------------------------------------------------------- frame layout


def test_frame_layout_pn9(tmp_path):
    p = load_profile(write(tmp_path, GOOD))
    f = frame_layout(p, payload_phase=100)
    assert isinstance(f, FrameLayout)
    np.testing.assert_array_equal(f.preamble_bits, np.tile([1, 0], 16))
    np.testing.assert_array_equal(f.sync_bits, hex_to_bits("2dd4"))
    assert f.n_header_bits == 48 and f.header_bits.size == 48
    np.testing.assert_array_equal(f.header_bits[32:], f.sync_bits)
    np.testing.assert_array_equal(f.payload_bits, prbs_bits("pn9", 512, 100))
    assert f.payload_length == 512
    with pytest.raises(ValueError):
        f.payload_bits[0] = 1  # the layout's arrays are read-only


def test_frame_layout_hex_unknown_and_empty():
    f = frame_layout(LinkProfile(modulation="ook", payload="f0a", payload_bits=10))
    np.testing.assert_array_equal(f.payload_bits, [1, 1, 1, 1, 0, 0, 0, 0, 1, 0])
    assert f.n_header_bits == 0 and f.header_bits.shape == (0,)
    u = frame_layout(LinkProfile(modulation="2fsk", sync_word="2dd4", payload_bits=64))
    assert u.payload_bits is None and u.payload_length == 64
    v = frame_layout(LinkProfile(modulation="2fsk", payload="pn15"))
    assert v.payload_bits is None and v.payload_length is None
    assert u.to_dict()["n_sync_bits"] == 16
