"""Reduced accuracy benchmark: synthesised recordings (iqstat synth, ci16) through measure.

The full table is tests/benchmarks/bench_accuracy.py. References: the synthetic truth
(Eb/N0 = P·(fs/Rb)/σ²); the Cramér–Rao bound of NDA Es/N0 estimation (METHODS §3, computed
by iqstat.bounds and checked against the METHODS table in test_bounds.py); theory's BER at the
TRUE Eb/N0 (METHODS §1) with a two-sided binomial test. Tolerances are the issue's: pooled
bias ±0.2 dB from 4 to 20 dB and ±0.5 dB below 4 dB for orthogonal 2/4-FSK, ±0.5 dB for
h = 1/2 and for OOK from 8 dB; spread at most 1.5× the bound; carrier offset within
max(50 Hz, 1 % of the symbol rate).
"""

from __future__ import annotations

import pytest
from accuracy_lib import RS, run_point
from scipy import stats

POINTS = [
    ("2fsk", 2.0, 0.5),
    ("2fsk", 12.0, 0.2),
    ("4fsk", 6.0, 0.2),
    ("2fsk-h0.5", 8.0, 0.5),
    ("ook", 10.0, 0.5),
    ("2fsk-cu8", 16.0, 0.2),
]


@pytest.mark.parametrize(("config", "ebn0_db", "tolerance_db"), POINTS)
def test_closed_loop_accuracy(tmp_path, config, ebn0_db, tolerance_db):
    r = run_point(config, ebn0_db, captures=2, n_bursts=6, seed=7, workdir=tmp_path)
    assert r.bursts_measured == r.bursts_sent
    assert abs(r.pooled_bias_db) <= tolerance_db, r
    # The spread is consistent with the bound itself (an efficient estimator): s²/CRB² is
    # at most χ²(n−1)/(n−1) at its 99.9 % point. (The issue asks ≤ 1.5× on the full table.)
    n = r.bursts_measured
    assert r.std_over_crb <= (stats.chi2.ppf(0.999, n - 1) / (n - 1)) ** 0.5, r
    assert r.max_cfo_error_hz <= max(50.0, 0.01 * RS), r
    if r.bit_errors:
        assert r.ber_pvalue > 1e-3, r
    # Every burst's frame was found and its payload checked (6 bursts × 512 bits × 2).
    assert r.bits_checked >= 0.9 * r.bursts_sent * 512
