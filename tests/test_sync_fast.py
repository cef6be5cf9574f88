"""The fast path of the timing stage: mixed samples, the decimated feature, the mixed bank.

References: the synthesised bursts' known timing (t0 = the modulator's timing offset, P from
its clock offset: the timing model of iqstat.synth), the full-rate timing of
:func:`recover_timing` (checked in test_sync.py), and the correlator bank's template-product
form, eq. (1) of :func:`correlate_symbols`.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from iqstat.correlate import correlate_symbols_many, mix_many
from iqstat.errors import MeasurementError, ParameterError
from iqstat.sync import STRONG_LINE_DB, recover_timing, recover_timing_mixed_many
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


def test_mixed_bank_equals_template_products():
    # eq. (1) of correlate_symbols (no running sums) as the reference; complex64 mixing
    # leaves ~1e-7 relative (float32 rounding of ~50-sample sums).
    rng = np.random.default_rng(5)
    xs, tones = [], []
    for n in (3000, 2500, 4100):
        xs.append((rng.standard_normal(n) + 1j * rng.standard_normal(n)).astype(np.complex64))
        tones.append(list(rng.uniform(-5e3, 5e3, 2)))
    grids = ([0.3, 1.7, 40.2], [52.083, 52.09, 51.9], [57, 47, 77])
    ys = mix_many(xs, FS, tones)
    got = correlate_symbols_many(xs, FS, tones, *grids, mixed=ys)
    ref = correlate_symbols_many(xs, FS, tones, *grids)
    for g, r in zip(got, ref, strict=True):
        assert g.shape == r.shape
        np.testing.assert_allclose(g, r, rtol=0, atol=1e-6 * np.abs(r).max())


def test_mixed_bank_checks_shapes():
    x = np.ones(1000, np.complex64)
    with pytest.raises(ParameterError, match="mixed"):
        correlate_symbols_many(
            [x], FS, [[0.0, 100.0]], [0.0], [P0], [10], mixed=[np.ones((1, 1000), np.complex64)]
        )


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
        (t,) = recover_timing_mixed_many(mix_many([x], FS, [tones]), FS, RS)
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
        (fast,) = recover_timing_mixed_many(mix_many([x], FS, [tones]), FS, RS)
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
    ys = mix_many([x, zero, short], FS, [tones] * 3)
    good, none, few = recover_timing_mixed_many(ys, FS, RS)
    assert isinstance(none, MeasurementError) and "no energy" in str(none)
    assert isinstance(few, MeasurementError) and "fewer than" in str(few)
    assert abs(good.t0_samples - 7.25) < 0.005 * P0
    # Under 8 samples per symbol there is nothing to decimate: the slot says so with None.
    (slow,) = recover_timing_mixed_many(mix_many([x[:4000]], FS, [tones]), FS, FS / 7.0)
    assert slow is None
