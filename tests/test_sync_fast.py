"""The fast path of the timing stage: block-rate mixing, the decimated feature, the bank.

References: the synthesised bursts' known timing (t0 = the modulator's timing offset, P from
its clock offset: the timing model of iqstat.synth), the full-rate timing of
:func:`recover_timing` (checked in test_sync.py), and the correlator bank's template-product
form, eq. (1) of :func:`correlate_symbols`.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from iqstat.correlate import (
    block_samples_for,
    correlate_symbols_many,
    mix_blocks_many,
    template_gram,
)
from iqstat.errors import MeasurementError, ParameterError
from iqstat.sync import (
    STRONG_LINE_DB,
    recover_timing,
    recover_timing_many,
    time_and_correlate_many,
)
from iqstat.synth import modulate

FS = 250e3
RS = 4800.0
P0 = FS / RS


def _burst(rng, n_sym, esn0_db, *, ppm=0.0, t_off=None, modulation="2fsk", cfo=700.0):
    m = 4 if modulation == "4fsk" else 2
    sym = rng.integers(0, m, n_sym)
    t_off = rng.uniform(0, P0) if t_off is None else t_off
    s = modulate(
        sym, modulation=modulation, sample_rate_hz=FS, symbol_rate_hz=RS, tone_spacing_hz=RS,
        cfo_hz=cfo, timing_offset_samples=t_off, clock_offset_ppm=ppm,
    )  # fmt: skip
    sigma2 = P0 / 10 ** (esn0_db / 10)  # unit-amplitude tones: Es = P0 per symbol
    noise = rng.standard_normal(s.size) + 1j * rng.standard_normal(s.size)
    x = (s + math.sqrt(sigma2 / 2) * noise).astype(np.complex64)
    offs = (np.arange(m) - (m - 1) / 2) * RS
    return x, list(cfo + offs), t_off, P0 / (1 + ppm * 1e-6)


@pytest.mark.parametrize(
    ("modulation", "ppm", "n_sym"),
    [("2fsk", 0.0, 600), ("2fsk", 20.0, 3000), ("2fsk", -20.0, 3000), ("4fsk", 0.0, 600)],
)
def test_decimated_timing_finds_the_true_grid(modulation, ppm, n_sym):
    # Es/N0 20 dB: the line is far above STRONG_LINE_DB, where this path is final. The
    # tolerance, 0.5 % of a symbol at the burst centre, is ~5x the spread of the estimate
    # over seeds (measured: ~0.05 samples); the clock offset within 3 ppm on 3000 symbols
    # (its standard error there is ~1 ppm).
    rng = np.random.default_rng(11)
    for _ in range(4):
        x, tones, t_off, period = _burst(rng, n_sym, 20.0, ppm=ppm, modulation=modulation)
        (t,), _ = time_and_correlate_many([x], FS, RS, [tones])
        assert t.quality["line_snr_db"] >= STRONG_LINE_DB
        k = t.n_symbols // 2
        true_k = t_off + round((t.t0_samples + k * t.period_samples - t_off) / period) * period
        assert abs(t.t0_samples + k * t.period_samples - true_k) < 0.005 * P0
        if n_sym >= 3000:
            assert t.clock_offset_ppm == pytest.approx(ppm, abs=3.0)


def test_decimated_timing_agrees_with_the_full_rate_feature():
    # Same bursts through recover_timing (full-rate feature + matched-energy check): the two
    # grids agree to well within the estimates' own spread (0.2 % of a symbol).
    rng = np.random.default_rng(12)
    for _ in range(6):
        x, tones, _, _ = _burst(rng, 560, 16.0)
        full = recover_timing(x, FS, RS, tones)
        (fast,), _ = time_and_correlate_many([x], FS, RS, [tones])
        k = full.n_symbols // 2
        a = full.t0_samples + k * full.period_samples
        b = fast.t0_samples + round((a - fast.t0_samples) / fast.period_samples) * (
            fast.period_samples
        )
        assert abs(a - b) < 0.002 * P0


def test_decimated_timing_reports_bad_bursts_in_their_slots():
    rng = np.random.default_rng(13)
    x, tones, t_off, period = _burst(rng, 600, 20.0, t_off=7.25)
    zero = np.zeros_like(x)
    short = x[:800]
    (good, none, few), zs = time_and_correlate_many([x, zero, short], FS, RS, [tones] * 3)
    assert isinstance(none, MeasurementError) and "no energy" in str(none)
    assert isinstance(few, MeasurementError) and "fewer than" in str(few)
    assert abs(good.t0_samples - 7.25) < 0.005 * P0
    assert zs[0].shape == (good.n_symbols, 2) and zs[1] is None and zs[2] is None


# ------------------------------------------------------------- block-rate mixing (fused path)


@pytest.mark.parametrize("block", [1, 3, 4, 7])
@pytest.mark.parametrize("dtype", [np.complex64, np.complex128])
def test_block_bank_equals_template_products(block, dtype):
    # eq. (1) of correlate_symbols (templates times samples) is the reference; the block form
    # adds complex64 rounding of the block products (~1e-7 relative) for complex64 samples.
    rng = np.random.default_rng(21)
    xs, tones = [], []
    for n in (3000, 2500, 4100):
        xs.append((rng.standard_normal(n) + 1j * rng.standard_normal(n)).astype(dtype))
        tones.append(list(rng.uniform(-5e3, 5e3, 2)))
    grids = ([0.3, 1.7, 40.2], [52.083, 52.09, 51.9], [57, 47, 77])
    blocks = mix_blocks_many(xs, FS, tones, block)
    got = correlate_symbols_many(xs, FS, tones, *grids, blocks=blocks)
    ref = correlate_symbols_many(xs, FS, tones, *grids)
    for g, r in zip(got, ref, strict=True):
        assert g.shape == r.shape
        np.testing.assert_allclose(g, r, rtol=0, atol=1e-6 * np.abs(r).max())


def test_block_sums_are_the_running_sums_at_block_starts():
    # Definition: sums[b, i, q] = Σ_{n < qL} x[n]·e^{−j2πf_i n/fs} (direct float64 reference).
    rng = np.random.default_rng(22)
    x = rng.standard_normal(1001) + 1j * rng.standard_normal(1001)
    f = [-2400.0, 2400.0]
    blocks = mix_blocks_many([x], FS, [f], 4)
    n = np.arange(x.size)
    ref = np.cumsum(x * np.exp(-2j * np.pi * np.outer(f, n) / FS), axis=1)[:, 3::4]
    assert blocks.n_blocks[0] == 250 and blocks.block_samples == 4
    np.testing.assert_allclose(blocks.sums[0, :, 1:], ref, rtol=0, atol=1e-11 * np.abs(ref).max())
    assert block_samples_for(P0) == 4  # 13 blocks per symbol at 52.08 samples per symbol


def test_fused_batch_equals_each_burst_alone():
    # Mixed batch: lengths, SNRs, clock offsets and tones differ; an all-zero and a too-short
    # burst sit in the middle and must not change the others. Same numbers to rounding.
    rng = np.random.default_rng(23)
    xs, tones = [], []
    for n_sym, esn0, ppm in ((560, 20.0, 0.0), (300, 8.0, 20.0), (900, 14.0, -20.0)):
        x, f, _, _ = _burst(rng, n_sym, esn0, ppm=ppm, cfo=rng.uniform(-3e3, 3e3))
        xs.append(x)
        tones.append(f)
    xs[2:2] = [np.zeros(20000, np.complex64), xs[0][:700]]
    tones[2:2] = [tones[0], tones[0]]
    times, zs = time_and_correlate_many(xs, FS, RS, tones)
    assert isinstance(times[2], MeasurementError) and "no energy" in str(times[2])
    assert isinstance(times[3], MeasurementError) and "fewer than" in str(times[3])
    assert zs[2] is None and zs[3] is None
    for j in (0, 1, 4):
        (t1,), (z1,) = time_and_correlate_many([xs[j]], FS, RS, [tones[j]])
        t = times[j]
        assert t.n_symbols == t1.n_symbols and t.message == t1.message
        assert t.t0_samples == pytest.approx(t1.t0_samples, rel=1e-9, abs=1e-9)
        assert t.period_samples == pytest.approx(t1.period_samples, rel=1e-12)
        # The floor's float32 transform may round one feature value differently in a padded
        # row: the line SNR then moves by ~1e-7 dB, nothing else does.
        assert t.quality["line_snr_db"] == pytest.approx(t1.quality["line_snr_db"], abs=1e-5)
        np.testing.assert_allclose(zs[j], z1, rtol=0, atol=1e-9 * np.abs(z1).max())
        # The bank is the one of the grid found (template-product reference, 1e-6).
        ref = correlate_symbols_many(
            [xs[j]], FS, [tones[j]], [t.t0_samples], [t.period_samples], [t.n_symbols]
        )[0]
        np.testing.assert_allclose(zs[j], ref, rtol=0, atol=1e-6 * np.abs(ref).max())


@pytest.mark.parametrize(("modulation", "ppm"), [("2fsk", 0.0), ("2fsk", 20.0), ("4fsk", 0.0)])
def test_fused_timing_finds_the_true_grid(modulation, ppm):
    # Truth: the modulator's timing offset and clock (iqstat.synth). Tolerance as in
    # test_decimated_timing_finds_the_true_grid: 0.5 % of a symbol, ~5x the measured spread.
    rng = np.random.default_rng(24)
    for _ in range(3):
        x, tones, t_off, period = _burst(rng, 2000, 20.0, ppm=ppm, modulation=modulation)
        (t,), (z,) = time_and_correlate_many([x], FS, RS, [tones])
        k = t.n_symbols // 2
        true_k = t_off + round((t.t0_samples + k * t.period_samples - t_off) / period) * period
        assert abs(t.t0_samples + k * t.period_samples - true_k) < 0.005 * P0
        assert z.shape == (t.n_symbols, len(tones))


def test_block_path_parameter_errors():
    x = np.ones(4000, np.complex64)
    with pytest.raises(ParameterError, match="block_samples"):
        mix_blocks_many([x], FS, [[0.0, 100.0]], 0)
    with pytest.raises(ParameterError, match="tone_freqs_list"):
        time_and_correlate_many([x, x], FS, RS, [[0.0, 100.0]])
    blocks = mix_blocks_many([x], FS, [[0.0, 100.0]], 4)
    with pytest.raises(ParameterError, match="other tones"):
        correlate_symbols_many([x], FS, [[0.0, 200.0]], [0.0], [P0], [10], blocks=blocks)
    # Under 8 samples per symbol nothing is decimated: every slot None, no bank.
    assert time_and_correlate_many([x], FS, FS / 7.0, [[0.0, 100.0]]) == ([None], [None])


def test_gram_ignores_the_carrier_offset():
    # Dirichlet kernel sin(NΔω/2)/(N·sin(Δω/2)) of the tone difference (Proakis & Salehi,
    # Digital Communications, 5th ed., §4.5 [mem]; METHODS.md §1): no carrier dependence.
    dw = 2 * np.pi * 2400.0 / FS
    for cfo in (0.0, 1234.5, -2999.0):
        r = template_gram([cfo - 1200.0, cfo + 1200.0], 52, FS)
        assert r[0, 1].real == pytest.approx(
            math.sin(52 * dw / 2) / (52 * math.sin(dw / 2)), abs=1e-12
        )
    r[0, 0] = 7.0  # a copy: the kept matrix is not changed by the caller
    assert template_gram([-1200.0, 1200.0], 52, FS)[0, 0] == pytest.approx(1.0)


def test_full_rate_check_from_the_decimated_grid():
    # recover_timing_many(coarse=...) skips the full-rate feature and starts the matched-
    # energy check from the decimated grid. Reference: the true grid of the synthesised burst
    # (Es/N0 10 dB, line below STRONG_LINE_DB); tolerance 2 % of a symbol, the finest
    # steps of the check being 0.1-5 % of a symbol [design of recover_timing, step 3].
    rng = np.random.default_rng(26)
    for _ in range(3):
        x, tones, t_off, period = _burst(rng, 560, 10.0, ppm=20.0)
        (fast,), _ = time_and_correlate_many([x], FS, RS, [tones])
        (t,) = recover_timing_many([x], FS, RS, [tones], coarse=[fast])
        assert t.quality["line_snr_db"] == fast.quality["line_snr_db"]
        assert t.method.startswith("decimated feature") and "matched-energy" in t.method
        k = t.n_symbols // 2
        true_k = t_off + round((t.t0_samples + k * t.period_samples - t_off) / period) * period
        assert abs(t.t0_samples + k * t.period_samples - true_k) < 0.02 * P0
        # A None slot is timed from its full-rate feature: the plain call's result.
        (plain,) = recover_timing_many([x], FS, RS, [tones])
        (same,) = recover_timing_many([x], FS, RS, [tones], coarse=[None])
        assert same == plain
    with pytest.raises(ParameterError, match="coarse"):
        recover_timing_many([x], FS, RS, [tones], coarse=[fast, fast])
