"""Tests of iqstat.available: Eb/N0 from power alone and its 95 % interval.

The variance model (Gamma law of the in-band noise energy, Gaussian cross term, Gamma law of
the gap noise estimate; Kay, Fundamentals of Statistical Signal Processing Vol. II, 1998, §2.2
[mem]) is checked by Monte Carlo on synthesised 2-FSK bursts with known truth, through the
same band energy the measurement uses (estimate_link_many), and the spread bounds come from
scipy.stats.chi2 (the law of a sample variance of Gaussian values).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from iqstat.available import (
    Z95,
    AvailableEbN0,
    available_ebn0,
    detection_loss_ci95,
    pool_available,
)
from iqstat.estimate import estimate_link_many
from iqstat.synth import modulate

FS, RS, DF = 250e3, 4800.0, 4800.0
N_SYM = 200
MARGIN = 400  # noise-only samples each side of the burst, as measure reads them


def _bursts(ebn0_db: float, n: int, seed: int):
    """n windows: noise + one 2-FSK burst of N_SYM symbols; returns windows, n_burst, sigma²."""
    rng = np.random.default_rng(seed)
    sym = rng.integers(0, 2, N_SYM)
    s = modulate(
        sym,
        modulation="2fsk",
        sample_rate_hz=FS,
        symbol_rate_hz=RS,
        tone_spacing_hz=DF,
        cfo_hz=700.0,
    )
    n_b = s.size
    p = float(np.mean(np.abs(s) ** 2))
    # truth convention: Eb/N0 = P·(fs/Rb)/σ²
    sigma2 = p * (FS / RS) / 10 ** (ebn0_db / 10)
    xs = []
    for _ in range(n):
        w = rng.standard_normal((n_b + 2 * MARGIN, 2)) @ np.array([1, 1j]) * math.sqrt(sigma2 / 2)
        x = w.astype(np.complex64)
        x[MARGIN : MARGIN + n_b] += (s * np.exp(2j * np.pi * rng.random())).astype(np.complex64)
        xs.append(x)
    return xs, n_b, sigma2


def _band(xs):
    est = estimate_link_many(
        xs, FS, modulation="2fsk", symbol_rate_hz=RS, tone_spacing_hz=DF, band_margin_symbols=2
    )
    return [(e.quality["band_energy"], e.quality["band_width_hz"]) for e in est]


@pytest.mark.parametrize("ebn0_db", [4.0, 12.0])
def test_spread_matches_the_model_with_known_noise(ebn0_db):
    n = 300
    xs, n_b, sigma2 = _bursts(ebn0_db, n, seed=11 + int(ebn0_db))
    n0 = sigma2 / FS
    av = [
        available_ebn0(e, bw, x.size, n_b, n0, math.inf, RS, FS)
        for (e, bw), x in zip(_band(xs), xs, strict=True)
    ]
    g = np.array([a.ebn0 for a in av])
    model_var = float(np.mean([a.std**2 for a in av]))
    truth = 10 ** (ebn0_db / 10)
    # mean within 3.3 standard errors of the truth (the band keeps all but a sliver of the
    # CPFSK spectrum, so no bias is expected at this resolution)
    assert abs(g.mean() - truth) < 3.3 * math.sqrt(model_var / n)
    # sample variance / model variance ~ chi2(n−1)/(n−1): two-sided 99.9 % bounds
    ratio = g.var(ddof=1) / model_var
    lo, hi = stats.chi2.ppf([0.0005, 0.9995], n - 1) / (n - 1)
    assert lo < ratio < hi, ratio


def test_gap_noise_error_enters_through_its_gamma_shape():
    # N0 estimated per realisation from K in-band bins of independent noise (Gamma(K) mean):
    # the model's total variance must then match the spread of the result.
    n, k = 300, 2000
    xs, n_b, sigma2 = _bursts(6.0, n, seed=5)
    n0 = sigma2 / FS
    rng = np.random.default_rng(6)
    n0_hat = n0 * rng.gamma(k, 1.0 / k, size=n)  # the law of a mean of K exponential bins
    av = [
        available_ebn0(e, bw, x.size, n_b, nh, k, RS, FS)
        for (e, bw), x, nh in zip(_band(xs), xs, n0_hat, strict=True)
    ]
    g = np.array([a.ebn0 for a in av])
    model_var = float(np.mean([a.std**2 for a in av]))
    ratio = g.var(ddof=1) / model_var
    lo, hi = stats.chi2.ppf([0.0005, 0.9995], n - 1) / (n - 1)
    assert lo < ratio < hi, ratio
    # and the N0 part is a sizeable share here, so the test would see it missing
    share = np.mean([a.n0_slope**2 * a.n0_rel_var for a in av]) / model_var
    assert share > 0.2


def test_interval_covers_the_truth_at_the_nominal_rate():
    n = 300
    xs, n_b, sigma2 = _bursts(8.0, n, seed=21)
    n0 = sigma2 / FS
    truth_db = 8.0
    cover = 0
    for (e, bw), x in zip(_band(xs), xs, strict=True):
        lo, hi = available_ebn0(e, bw, x.size, n_b, n0, math.inf, RS, FS).ebn0_db_ci95
        cover += lo <= truth_db <= hi
    # binomial(300, 0.95): 99.9 % of outcomes lie in [273, 296] (scipy.stats.binom)
    lo_n, hi_n = stats.binom.ppf([0.0005, 0.9995], n, 0.95)
    assert lo_n <= cover <= hi_n, cover


def test_nothing_above_the_noise_or_unknown_noise_gives_none():
    assert available_ebn0(1.0, 1e4, 1000, 800, 1e-4, 100.0, 4800.0, FS) is None  # E < N0·B·n
    assert available_ebn0(10.0, 1e4, 1000, 800, 0.0, 100.0, 4800.0, FS) is None
    assert available_ebn0(10.0, 1e4, 1000, 800, float("nan"), 100.0, 4800.0, FS) is None
    assert available_ebn0(10.0, 1e4, 1000, 0, 1e-6, 100.0, 4800.0, FS) is None


def test_pooling_keeps_the_shared_noise_error_whole():
    a = AvailableEbN0(ebn0=4.0, var_burst=0.04, n0_slope=-6.0, n0_rel_var=1e-3)
    many = pool_available([a] * 100)
    assert many.ebn0 == pytest.approx(4.0)
    # burst noise averages down by 100; the gap-noise part does not average at all
    assert many.var_burst == pytest.approx(0.04 / 100)
    assert many.n0_slope**2 * many.n0_rel_var == pytest.approx(36.0 * 1e-3)
    weighted = pool_available([a, AvailableEbN0(2.0, 0.01, -3.0, 1e-3)], [3.0, 1.0])
    assert weighted.ebn0 == pytest.approx(0.75 * 4.0 + 0.25 * 2.0)
    assert weighted.var_burst == pytest.approx(0.75**2 * 0.04 + 0.25**2 * 0.01)


def test_detection_loss_interval_combines_both_half_widths():
    a = AvailableEbN0(ebn0=10.0, var_burst=0.25, n0_slope=0.0, n0_rel_var=0.0)
    lo, hi = detection_loss_ci95(a, 9.8, (9.5, 10.1))
    loss = 10.0 - 9.8
    h = math.hypot(Z95 * a.std_db, 0.3)
    assert (lo, hi) == pytest.approx((loss - h, loss + h))
    assert detection_loss_ci95(None, 9.8, (9.5, 10.1)) is None
    assert detection_loss_ci95(a, None, None) is None
