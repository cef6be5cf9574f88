"""Batched timing, mixing, correlator bank and frame search against the per-burst functions.

The per-burst functions are checked against outside references in test_sync.py and
test_correlate.py; here the batched cores must give each burst of a mixed batch what the
per-burst call gives it alone (different lengths and SNRs, a degenerate burst in the middle
that must not spoil the others). Tolerances: rounding only (the sums are summed in a
different order when rows are padded), 1e-9 relative.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from iqstat.correlate import (
    correlate_symbols,
    correlate_symbols_many,
    mix_cumulative,
    mix_cumulative_many,
)
from iqstat.errors import MeasurementError, ParameterError
from iqstat.profile import bits_to_symbols, hex_to_bits
from iqstat.sync import align_frame, align_frame_many, recover_timing, recover_timing_many
from iqstat.synth import modulate

FS = 250e3
RS = 4800.0
P0 = FS / RS
HEADER = bits_to_symbols(hex_to_bits("aaaaaaaa2dd4"), "2fsk")


def _burst(rng, n_sym, ebn0_db, ppm, cfo):
    sym = rng.integers(0, 2, n_sym)
    sym[10 : 10 + HEADER.size] = HEADER
    s = modulate(
        sym, modulation="2fsk", sample_rate_hz=FS, symbol_rate_hz=RS, tone_spacing_hz=RS,
        cfo_hz=cfo, timing_offset_samples=120 + rng.uniform(0, P0), clock_offset_ppm=ppm,
    )  # fmt: skip
    s = np.concatenate([s, np.zeros(150)])
    sigma2 = np.mean(np.abs(s[130:-150]) ** 2) * P0 / 10 ** (ebn0_db / 10)
    noise = rng.standard_normal(s.size) + 1j * rng.standard_normal(s.size)
    x = (s + math.sqrt(sigma2 / 2) * noise).astype(np.complex64)
    return x, [cfo - RS / 2, cfo + RS / 2]


def _batch():
    rng = np.random.default_rng(2024)
    spec = [(560, 12.0, 0.0, 1500.0), (300, 6.0, 40.0, -800.0), (900, 20.0, -25.0, 300.0)]
    bursts = [_burst(rng, *s) for s in spec]
    zero = (np.zeros(20000, np.complex64), [1000.0 - RS / 2, 1000.0 + RS / 2])
    short = (bursts[0][0][:500], bursts[0][1])
    # degenerate ones in the middle: all-zero, too short
    return [bursts[0], zero, bursts[1], short, bursts[2]]


def _same_timing(a, b):
    assert a.n_symbols == b.n_symbols and a.message == b.message and a.reliable == b.reliable
    assert a.t0_samples == pytest.approx(b.t0_samples, rel=1e-9, abs=1e-9)
    assert a.period_samples == pytest.approx(b.period_samples, rel=1e-9)
    for k, v in a.quality.items():
        if isinstance(v, float) and math.isfinite(v):
            assert b.quality[k] == pytest.approx(v, rel=1e-9, abs=1e-9), k
        else:
            assert (b.quality[k] == v) or (math.isnan(v) and math.isnan(b.quality[k])), k


@pytest.mark.parametrize("shared", [False, True])
def test_timing_of_a_mixed_batch_equals_each_burst_alone(shared):
    batch = _batch()
    xs, tones = [b[0] for b in batch], [b[1] for b in batch]
    cums = mix_cumulative_many(xs, FS, tones) if shared else None
    got = recover_timing_many(xs, FS, RS, tones, cumulatives=cums, errors="return")
    assert isinstance(got[1], MeasurementError) and "no energy" in str(got[1])
    assert isinstance(got[3], MeasurementError) and "fewer than" in str(got[3])
    for j in (0, 2, 4):
        _same_timing(recover_timing(xs[j], FS, RS, tones[j]), got[j])
    with pytest.raises(MeasurementError, match="no energy"):
        recover_timing_many(xs, FS, RS, tones)  # errors="raise" is the default


def test_mixing_and_bank_of_a_batch_equal_each_burst_alone():
    batch = [b for i, b in enumerate(_batch()) if i != 3]
    xs, tones = [b[0] for b in batch], [b[1] for b in batch]
    cums = mix_cumulative_many(xs, FS, tones)
    grids = [(2.3, P0 * (1 + 1e-5), int((x.size - 3) / P0) - 1) for x in xs]
    t0s, ps, ks = zip(*grids, strict=True)
    z_cum = correlate_symbols_many(xs, FS, tones, t0s, ps, ks, cumulatives=cums)
    z_tpl = correlate_symbols_many(xs, FS, tones, t0s, ps, ks)
    for j, x in enumerate(xs):
        alone = mix_cumulative(x, FS, tones[j])
        assert cums[j].shape == alone.shape
        scale = max(1.0, float(np.abs(alone).max()))
        np.testing.assert_allclose(cums[j], alone, rtol=0, atol=1e-12 * scale)
        ref = correlate_symbols(x, FS, tones[j], *grids[j], cumulative=alone)
        np.testing.assert_allclose(z_cum[j], ref, rtol=0, atol=1e-9 * max(1.0, np.abs(ref).max()))
        ref_tpl = correlate_symbols(x, FS, tones[j], *grids[j])
        np.testing.assert_allclose(z_tpl[j], ref_tpl, rtol=1e-9, atol=1e-12)


def test_running_sums_made_one_by_one_are_accepted():
    batch = [_batch()[i] for i in (0, 2)]
    xs, tones = [b[0] for b in batch], [b[1] for b in batch]
    own = [mix_cumulative(x, FS, t) for x, t in zip(xs, tones, strict=True)]
    got = recover_timing_many(xs, FS, RS, tones, cumulatives=own)
    for j in range(2):
        _same_timing(recover_timing(xs[j], FS, RS, tones[j]), got[j])


def test_frame_search_of_a_batch_equals_each_stream_alone():
    rng = np.random.default_rng(77)
    streams, softs = [], []
    for k, errs in [(400, 2), (30, 0), (250, 40), (20, 0), (600, 5)]:
        h = rng.integers(0, 2, k)
        if k > HEADER.size + 20:
            s0 = int(rng.integers(0, k - HEADER.size))
            h[s0 : s0 + HEADER.size] = HEADER
            h[s0 + rng.choice(HEADER.size, errs, replace=False)] ^= 1
        sf = rng.exponential(1.0, (k, 2))
        sf[np.arange(k), h] += 2.0
        streams.append(h)
        softs.append(sf)
    for soft in (None, softs):
        got = align_frame_many(streams, HEADER, softs=soft, n_tones=2)
        for j, h in enumerate(streams):
            one = align_frame(h, HEADER, soft=None if soft is None else soft[j], n_tones=2)
            assert got[j] == one
    assert got[0].found and not got[2].found and "shorter" in got[3].message


def test_batch_parameter_errors():
    x, tones = _batch()[0]
    with pytest.raises(ParameterError, match="tone_freqs_list"):
        recover_timing_many([x, x], FS, RS, [tones])
    with pytest.raises(ParameterError, match="tones"):
        mix_cumulative_many([x, x], FS, [tones, tones[:1]])
    with pytest.raises(ParameterError, match="errors"):
        recover_timing_many([x], FS, RS, [tones], errors="ignore")
    with pytest.raises(ParameterError, match="softs"):
        align_frame_many([np.zeros(100, int)], HEADER, softs=[])
