"""The batched fits equal the per-burst fits, burst by burst, on a batch of mixed bursts.

The per-burst functions are thin wrappers over the batched cores, so this checks that a burst's
result does not depend on the other bursts of its batch: different lengths, Es/N0 from noise
only to 20 dB (boundary, upper bound, profile interval, Wald interval), a burst too short and
an all-zero one in the middle, per-burst Gram matrices. Reference: the per-burst call itself
(the existing accuracy tests in test_fit.py tie that to outside references). Tolerance 1e-9
relative: the sums of a burst are the same floating-point operations in both calls, up to the
block cuts of np.add.reduceat (rounding ~1e-16 per term).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from iqstat.errors import ParameterError
from iqstat.fit import (
    fit_bursts_many,
    fit_da,
    fit_da_many,
    fit_dd,
    fit_dd_many,
    fit_nda,
    fit_nda_many,
)

GRAM_HALF = np.array([[1.0, 2j / math.pi], [-2j / math.pi, 1.0]])  # h = 1/2, |ρ| = 2/π


def _draw(rng, n, m, esn0_db, gram=None, scale=1.0):
    a = math.sqrt(10 ** (esn0_db / 10)) if esn0_db is not None else 0.0
    sym = rng.integers(0, m, n)
    w = (rng.standard_normal((n, m)) + 1j * rng.standard_normal((n, m))) * math.sqrt(0.5)
    r = np.eye(m) if gram is None else gram
    z = a * np.exp(2j * np.pi * rng.random(n))[:, None] * r[:, sym].T + w @ np.linalg.cholesky(r).T
    return z * scale, sym


def _draw_ook(rng, n, esn0_db):
    a = math.sqrt(10 ** (esn0_db / 10) / 0.5)
    sym = (rng.random(n) < 0.5).astype(int)
    w = (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * math.sqrt(0.5)
    return (a * sym * np.exp(2j * np.pi * rng.random(n)) + w)[:, None], sym


def _mixed_fsk(m):
    rng = np.random.default_rng(4100 + m)
    plan = [(560, 8.0), (300, 1.0), (900, None), (10, 5.0), (700, 20.0), (0, 0.0), (450, 3.0)]
    plan.append((800, None))
    zs, syms, grams = [], [], []
    for k, (n, es) in enumerate(plan):
        gram = GRAM_HALF if (m == 2 and k % 2) else None
        if es == 0.0:  # all zero: no signal and no noise
            z, s = np.zeros((64, m), complex), np.zeros(64, int)
        else:
            z, s = _draw(rng, max(n, 1), m, es, gram, scale=10.0 ** (k - 3))
            z, s = z[:n] if n else z, s[:n] if n else s
        zs.append(z)
        syms.append(s)
        grams.append(gram)
    return zs, syms, grams


def _same(a, b):
    """Every field of two fits equal to 1e-9 relative (strings, flags, counts exactly)."""
    da, db = a.to_dict(), b.to_dict()
    assert da.keys() == db.keys()
    for key in da:
        x, y = da[key], db[key]
        if isinstance(x, float) and isinstance(y, float):
            assert x == pytest.approx(y, rel=1e-9, abs=1e-12), key
        elif isinstance(x, list) and isinstance(y, list):
            assert x == pytest.approx(y, rel=1e-9, abs=1e-12), key
        else:
            assert x == y, key


@pytest.mark.parametrize("m, modulation", [(2, "2fsk"), (4, "4fsk")])
def test_batched_fits_equal_per_burst_fits(m, modulation):
    zs, syms, grams = _mixed_fsk(m)
    nda = fit_nda_many(zs, grams, modulation=modulation)
    dd = fit_dd_many(zs, grams, modulation=modulation)
    da = fit_da_many(zs, syms, grams, modulation=modulation)
    assert len(nda) == len(dd) == len(da) == len(zs)
    for z, s, g, f_nda, f_dd, f_da in zip(zs, syms, grams, nda, dd, da, strict=True):
        _same(f_nda, fit_nda(z, g, modulation=modulation))
        _same(f_dd, fit_dd(z, g, modulation=modulation))
        _same(f_da, fit_da(z, s, g, modulation=modulation))
    # the batch exercises every branch of the result: check they are there
    methods = {f.ci_method for f in nda}
    assert {"profile-likelihood", "wald-log-observed-info", "none"} <= methods
    assert any(f.esn0_db_upper95 is not None for f in nda)  # the noise-only burst
    assert "at least 20 are needed" in nda[3].message
    assert "zero in every symbol" in nda[5].message
    # the degenerate bursts did not spoil the others
    assert nda[0].converged and nda[4].converged and nda[6].converged


def test_batched_ook_fits_equal_per_burst_fits():
    rng = np.random.default_rng(4200)
    drawn = [_draw_ook(rng, n, es) for n, es in [(600, 9.0), (400, 2.0), (800, 15.0)]]
    zs, syms = [d[0] for d in drawn], [d[1] for d in drawn]
    zs = [*zs[:2], np.zeros((30, 1), complex), zs[2]]
    syms = [*syms[:2], np.zeros(30, int), syms[2]]  # no "on" symbol: DA cannot fit it
    for free in (False, True):
        fits = fit_nda_many(zs, modulation="ook", estimate_p_on=free)
        for z, f in zip(zs, fits, strict=True):
            _same(f, fit_nda(z, modulation="ook", estimate_p_on=free))
    for z, s, f in zip(zs, syms, fit_da_many(zs, syms, modulation="ook"), strict=True):
        _same(f, fit_da(z, s, modulation="ook"))
    for z, f in zip(zs, fit_dd_many(zs, modulation="ook"), strict=True):
        _same(f, fit_dd(z, modulation="ook"))


def test_shared_gram_and_empty_batch():
    zs, _, _ = _mixed_fsk(2)
    shared = fit_nda_many(zs, GRAM_HALF, modulation="2fsk", gof=False)
    each = fit_nda_many(zs, [GRAM_HALF] * len(zs), modulation="2fsk", gof=False)
    for a, b in zip(shared, each, strict=True):
        _same(a, b)
    assert fit_nda_many([], modulation="2fsk") == []


def test_bad_burst_in_a_batch_is_named():
    zs, syms, _ = _mixed_fsk(2)
    zs[2] = zs[2].copy()
    zs[2][5, 0] = np.nan
    with pytest.raises(ParameterError, match="burst 2: z contains 1 non-finite"):
        fit_nda_many(zs, modulation="2fsk")
    with pytest.raises(ParameterError, match="burst 1: gram is not Hermitian"):
        fit_dd_many(zs[:2], [None, [[1, 0.5], [0.2, 1]]], modulation="2fsk")
    with pytest.raises(ParameterError, match="symbols_list has 2 entries"):
        fit_da_many(zs[:3], syms[:2], modulation="2fsk")
    with pytest.raises(ParameterError, match="list of"):
        fit_nda_many(np.ones((50, 2)), modulation="2fsk")


def _known_lists(syms, rng):
    """Known symbols per burst (−1 unknown): none, all, a random part, too few to fit."""
    out = []
    for k, s in enumerate(syms):
        kind = k % 4
        if kind == 0:
            out.append(None)
        elif kind == 1:
            out.append(np.asarray(s).copy())
        elif kind == 2:
            part = np.asarray(s).copy()
            part[rng.random(len(part)) < 0.6] = -1
            out.append(part)
        else:
            few = np.full(len(s), -1)
            few[:19] = np.asarray(s)[:19]
            out.append(few)
    return out


@pytest.mark.parametrize("m, modulation", [(2, "2fsk"), (4, "4fsk"), (1, "ook")])
def test_fit_bursts_many_equals_the_three_calls(m, modulation):
    """One preparation for NDA (with GOF), DD and DA (known rows only) gives the same fits as
    the three separate calls; DA only where >= 20 symbols are known (else None)."""
    rng = np.random.default_rng(4300 + m)
    if modulation == "ook":
        drawn = [_draw_ook(rng, n, es) for n, es in [(600, 9.0), (400, 2.0), (800, 15.0)]]
        zs, syms = [d[0] for d in drawn], [d[1] for d in drawn]
        zs = [*zs[:2], np.zeros((30, 1), complex), zs[2], zs[0][:10]]
        syms = [*syms[:2], np.zeros(30, int), syms[2], syms[0][:10]]
        grams = None
    else:
        zs, syms, grams = _mixed_fsk(m)
    known = _known_lists(syms, rng)
    if modulation == "ook":  # no "on" symbol; an all-zero burst; all known
        known[1], known[2], known[3] = np.zeros(len(syms[1]), int), syms[2], syms[3]
    got = fit_bursts_many(zs, grams, modulation=modulation, known_list=known)
    nda = fit_nda_many(zs, grams, modulation=modulation)
    dd = fit_dd_many(zs, grams, modulation=modulation, gof=False)
    assert len(got) == len(zs)
    n_da = 0
    for i, (f_nda, f_dd, f_da) in enumerate(got):
        _same(f_nda, nda[i])
        _same(f_dd, dd[i])
        g = None if grams is None else grams[i]
        k = known[i]
        if k is None or (k >= 0).sum() < 20:
            assert f_da is None
        else:
            n_da += 1
            sel = k >= 0
            _same(f_da, fit_da(zs[i][sel], k[sel], g, modulation=modulation, gof=False))
    assert n_da >= 2
    if modulation == "ook":
        assert "no 'on' symbol" in got[1][2].message
        assert "zero in every symbol" in got[2][2].message and got[3][2].converged
    # without known symbols: no DA anywhere
    assert all(t[2] is None for t in fit_bursts_many(zs, grams, modulation=modulation))


def test_fit_bursts_many_bad_known():
    zs, syms, _ = _mixed_fsk(2)
    with pytest.raises(ParameterError, match="known_list has 2 entries"):
        fit_bursts_many(zs[:3], modulation="2fsk", known_list=[None, None])
    bad = [None, np.full(len(zs[1]), 2)]
    with pytest.raises(ParameterError, match="burst 1: known symbols go up to 2"):
        fit_bursts_many(zs[:2], modulation="2fsk", known_list=bad)
    with pytest.raises(ParameterError, match="burst 0: known has shape"):
        fit_bursts_many(zs[:2], modulation="2fsk", known_list=[np.zeros(3, int), None])
    with pytest.raises(ParameterError, match="min_known 5"):
        fit_bursts_many(zs[:2], modulation="2fsk", min_known=5)
