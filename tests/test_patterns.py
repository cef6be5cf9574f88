"""Tests of iqstat.patterns: O.150 sequences, the phase-free checker, Clopper–Pearson intervals.

References named beside each check:
- ITU-T O.150 = ITU-T Recommendation O.150 (05/96), "General requirements for instrumentation
  for performance measurements on digital transmission equipment", clause 5.1 (2^9 - 1) and
  5.3 (2^15 - 1). Recalled from the text, not re-read here [mem].
- Golomb = S. W. Golomb, "Shift Register Sequences", 1967, ch. III (balance and run properties
  of maximal-length sequences) [mem].
- Clopper & Pearson, Biometrika 26(4):404-413, 1934; scipy.stats.binomtest as the library reference.
- scipy.signal.max_len_seq as an independent LFSR implementation.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.signal
import scipy.stats

from iqstat.errors import IqstatError, ParameterError
from iqstat.patterns import (
    PRBS_PERIOD,
    BitCheck,
    check_known,
    check_known_many,
    check_prbs,
    check_prbs_many,
    clopper_pearson,
    prbs_bits,
)

NAMES = ("pn9", "pn15")
REGISTER = {"pn9": 9, "pn15": 15}


def longest_run(bits: np.ndarray, value: int) -> int:
    """Longest run of ``value`` in a cyclic sequence (computed over two periods)."""
    x = np.concatenate([bits, bits]) == value
    if x.all():
        return bits.size
    edges = np.diff(np.concatenate([[0], x.astype(np.int8), [0]]))
    return int((np.nonzero(edges == -1)[0] - np.nonzero(edges == 1)[0]).max())


# ------------------------------------------------------------------------- the sequences


@pytest.mark.parametrize("name, period", [("pn9", 511), ("pn15", 32767)])
def test_period(name, period):
    # ITU-T O.150 clauses 5.1 / 5.3: lengths 511 and 32767 bits.
    assert PRBS_PERIOD[name] == period
    one = prbs_bits(name, period)
    two = prbs_bits(name, 2 * period)
    np.testing.assert_array_equal(two[:period], two[period:])
    # Maximal length: no shorter period (every proper divisor d of 2^n - 1 fails).
    for d in range(1, period):
        if period % d == 0:
            assert not np.array_equal(one, np.roll(one, d)), d


def test_pn9_first_32_bits():
    # METHODS §6 [computed]: all-ones start of x^9 + x^5 + 1.
    got = "".join(map(str, prbs_bits("pn9", 32)))
    assert got == "11111111100000111101111100010111"


@pytest.mark.parametrize("name, n, m", [("pn9", 9, 5), ("pn15", 15, 14)])
def test_recursion_holds_across_wraps(name, n, m):
    # ITU-T O.150: a[k] = a[k-n] xor a[k-m] holds for the generated sequence; pn15 is sent
    # inverted, so undo the inversion before checking the recursion.
    a = prbs_bits(name, 3 * PRBS_PERIOD[name] + 17, phase=123).astype(np.int64)
    inv = 1 if name == "pn15" else 0
    lhs = a[n:] ^ inv
    rhs = (a[:-n] ^ inv) ^ (a[n - m : a.size - m] ^ inv)
    np.testing.assert_array_equal(lhs, rhs)


@pytest.mark.parametrize("name, taps, inverted", [("pn9", [4], False), ("pn15", [1], True)])
def test_matches_scipy_max_len_seq(name, taps, inverted):
    # scipy.signal.max_len_seq with an all-ones seed: a[k+n] = a[k] xor a[k+t], which is our
    # a[k] = a[k-n] xor a[k-(n-t)]; phase 0 must coincide bit for bit (pn15 inverted by O.150).
    n = REGISTER[name]
    ref, _ = scipy.signal.max_len_seq(n, taps=taps)
    ours = prbs_bits(name, PRBS_PERIOD[name])
    np.testing.assert_array_equal(ours, ref.astype(np.uint8) ^ int(inverted))


@pytest.mark.parametrize("name", NAMES)
def test_balance_and_runs_of_the_m_sequence(name):
    # Golomb [mem]: an m-sequence of degree n has 2^(n-1) ones per period, its longest run of
    # ones is n and of zeros n - 1. pn9 is sent as generated; pn15 is sent inverted (O.150
    # clause 5.3 [mem]: "longest sequence of zeros 15 (inverted signal)"), so the generated
    # m-sequence is the complement of what prbs_bits returns.
    n = REGISTER[name]
    sent = prbs_bits(name, PRBS_PERIOD[name])
    generated = sent ^ 1 if name == "pn15" else sent
    assert int(generated.sum()) == 2 ** (n - 1)  # 256 / 16384
    assert longest_run(generated, 1) == n  # 9 / 15
    assert longest_run(generated, 0) == n - 1  # 8 / 14


def test_o150_sent_run_lengths():
    # ITU-T O.150 [mem]: 2^9 - 1 longest zeros 8 (non-inverted); 2^15 - 1 longest zeros 15
    # (inverted signal). Hence the sent pn15 has 16383 ones and longest run of ones 14.
    pn9 = prbs_bits("pn9", 511)
    pn15 = prbs_bits("pn15", 32767)
    assert longest_run(pn9, 0) == 8
    assert longest_run(pn15, 0) == 15
    assert longest_run(pn15, 1) == 14
    assert int(pn15.sum()) == 16383
    assert np.all(pn15[:15] == 0)  # all-ones register, inverted


@pytest.mark.parametrize("name", NAMES)
def test_phase_is_a_shift(name):
    P = PRBS_PERIOD[name]
    base = prbs_bits(name, 2 * P)
    for phase in (0, 1, 100, P - 1, P, P + 5, -3):
        np.testing.assert_array_equal(
            prbs_bits(name, 50, phase), base[(phase % P) : (phase % P) + 50]
        )
    assert prbs_bits(name, 0).shape == (0,)
    assert prbs_bits(name, 10).dtype == np.uint8


@pytest.mark.parametrize(
    "kwargs",
    [dict(name="pn7", n_bits=5), dict(name="pn9", n_bits=-1), dict(name="pn9", n_bits=2.5)],
)
def test_prbs_bits_rejects_bad_arguments(kwargs):
    with pytest.raises(ParameterError, match=r"pn7|n_bits"):
        prbs_bits(**kwargs)


# ------------------------------------------------------------------------- the checker


@pytest.mark.parametrize("name", NAMES)
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_locks_at_random_phase_clean(name, seed):
    rng = np.random.default_rng(seed)
    P = PRBS_PERIOD[name]
    phase = int(rng.integers(P))
    n = int(rng.integers(300, 3 * P))
    res = check_prbs(prbs_bits(name, n, phase), name)
    assert res.locked and not res.inverted
    assert res.phase == phase
    assert (res.bit_errors, res.bits_checked, res.ber) == (0, n, 0.0)
    assert res.ber_ci95 == pytest.approx(clopper_pearson(0, n))


@pytest.mark.parametrize("name", NAMES)
@pytest.mark.parametrize("ber", [0.01, 0.1, 0.2])
def test_error_count_exact_not_tripled(name, ber):
    # Errors injected at known positions are each counted once: the count equals the number
    # injected exactly (a self-synchronising counter would report about 3x as many).
    rng = np.random.default_rng(int(ber * 1000) + REGISTER[name])
    n = 4000
    phase = int(rng.integers(PRBS_PERIOD[name]))
    flips = rng.random(n) < ber
    bits = prbs_bits(name, n, phase) ^ flips.astype(np.uint8)
    res = check_prbs(bits, name)
    assert res.locked and res.phase == phase and not res.inverted
    assert res.bit_errors == int(flips.sum())
    assert res.ber == pytest.approx(flips.mean(), abs=0)


@pytest.mark.parametrize("name", NAMES)
def test_inverted_stream_detected(name):
    rng = np.random.default_rng(7)
    phase = int(rng.integers(PRBS_PERIOD[name]))
    flips = np.zeros(2000, dtype=np.uint8)
    flips[[3, 500, 1999]] = 1
    bits = 1 - (prbs_bits(name, 2000, phase) ^ flips)
    res = check_prbs(bits, name)
    assert res.locked and res.inverted and res.phase == phase
    assert res.bit_errors == 3
    refused = check_prbs(bits, name, allow_inverted=False)
    assert not refused.locked and "inverted" in refused.message


@pytest.mark.parametrize("name", NAMES)
@pytest.mark.parametrize("seed", range(5))
def test_random_bits_do_not_lock(name, seed):
    # Hoeffding bound: false lock below 1e-6 per stream; any lock here is a defect.
    rng = np.random.default_rng(100 + seed)
    res = check_prbs(rng.integers(0, 2, 3000), name)
    assert not res.locked
    assert (res.bit_errors, res.bits_checked, res.ber, res.ber_ci95, res.phase) == (
        0, 0, None, None, None,
    )  # fmt: skip
    assert "below the lock threshold" in res.message


@pytest.mark.parametrize("name", NAMES)
def test_wrong_pattern_does_not_lock(name):
    other = "pn15" if name == "pn9" else "pn9"
    assert not check_prbs(prbs_bits(other, 3000, 40), name).locked


def test_too_few_bits_is_reported():
    res = check_prbs(prbs_bits("pn9", 20), "pn9")
    assert not res.locked and "too few" in res.message
    assert not check_prbs(np.zeros(0, np.uint8), "pn9").locked


def test_lock_threshold_is_clearly_above_noise_at_ber_0p2():
    # At BER 0.2 the expected peak is n(1 - 2p) = 0.6 n, its spread sqrt(4 n p (1 - p)); with
    # n = 400 the peak (240 +- 16) clears the pn15 threshold sqrt(2 n ln(2H/1e-6)) = 143 by
    # six standard deviations, so every one of these seeds must lock.
    n, p = 400, 0.2
    t = math.sqrt(2 * n * math.log(2 * 2 * 32767 / 1e-6))
    assert n * (1 - 2 * p) - t > 6 * math.sqrt(4 * n * p * (1 - p))
    for seed in range(10):
        rng = np.random.default_rng(seed)
        phase = int(rng.integers(32767))
        flips = rng.random(n) < p
        res = check_prbs(prbs_bits("pn15", n, phase) ^ flips.astype(np.uint8), "pn15")
        assert res.locked and res.phase == phase and res.bit_errors == flips.sum()


def test_bit_slip_is_flagged():
    a = prbs_bits("pn9", 1500, 0)
    b = prbs_bits("pn9", 1500, 1501 + 37)  # 37 bits lost between the halves
    res = check_prbs(np.concatenate([a, b]), "pn9")
    assert res.locked and "bit slip" in res.message


def test_bad_bits_raise():
    with pytest.raises(ParameterError, match="only 0 and 1"):
        check_prbs(np.array([0, 1, 2]), "pn9")
    with pytest.raises(ParameterError, match="1-D"):
        check_prbs(np.zeros((2, 3), np.uint8), "pn9")
    with pytest.raises(ParameterError, match="pattern name"):
        check_prbs(np.zeros(10, np.uint8), "pn11")


def test_check_known():
    rng = np.random.default_rng(11)
    ref = rng.integers(0, 2, 256).astype(np.uint8)
    got = ref.copy()
    got[[0, 17, 255]] ^= 1
    res = check_known(got, ref)
    assert res.locked and res.pattern == "known" and res.phase is None and not res.inverted
    assert (res.bit_errors, res.bits_checked) == (3, 256)
    inv = check_known(1 - got, ref)
    assert inv.locked and inv.inverted and inv.bit_errors == 3
    chance = check_known(rng.integers(0, 2, 256), ref)
    assert not chance.locked and chance.ber is None
    as_is = check_known(1 - got, ref, allow_inverted=False)
    assert as_is.locked and as_is.bit_errors == 253
    short = check_known(got[:100], ref)
    assert short.bits_checked == 100 and short.bit_errors == 2 and "first 100" in short.message


def test_bitcheck_to_dict():
    res = check_prbs(prbs_bits("pn9", 600, 9), "pn9")
    d = res.to_dict()
    assert d["locked"] is True and d["phase"] == 9 and d["ber_ci95"] == list(res.ber_ci95)
    assert isinstance(res, BitCheck)


# ------------------------------------------------------------------------- Clopper–Pearson


@pytest.mark.parametrize(
    "k, n, lo, hi",
    [
        # METHODS §6 [computed], Clopper & Pearson 1934 exact interval, 95 %.
        (0, 1_000_000, 0.0, 3.688873e-6),
        (10, 1_000_000, 4.795398e-6, 1.839028e-5),
        (7, 50, 0.0581917, 0.2673960),
    ],
)
def test_clopper_pearson_reference_values(k, n, lo, hi):
    got = clopper_pearson(k, n)
    assert got[0] == pytest.approx(lo, rel=1e-6, abs=1e-12)
    assert got[1] == pytest.approx(hi, rel=1e-6)


@pytest.mark.parametrize("k, n", [(0, 1), (1, 1), (0, 10), (3, 10), (10, 10), (50, 1000)])
@pytest.mark.parametrize("confidence", [0.9, 0.95, 0.99])
def test_clopper_pearson_matches_scipy_binomtest(k, n, confidence):
    # binomtest finds the bounds by root-finding on the binomial cdf; agreement to 1e-6
    # relative is what its solver delivers (at n = 1e7 it drifts to 1e-4, see the next test).
    ref = scipy.stats.binomtest(k, n).proportion_ci(confidence_level=confidence, method="exact")
    got = clopper_pearson(k, n, confidence)
    assert got == pytest.approx((ref.low, ref.high), rel=1e-6, abs=1e-15)


@pytest.mark.parametrize("n", [1, 50, 10**4, 10**7])
@pytest.mark.parametrize("confidence", [0.9, 0.95, 0.99])
def test_clopper_pearson_closed_forms(n, confidence):
    # From the defining equations of Clopper & Pearson 1934, P(X >= k | lo) = P(X <= k | hi)
    # = alpha/2, solved in closed form where the binomial sum has one term:
    # k = 0: hi = 1 - (alpha/2)^(1/n);  k = n: lo = (alpha/2)^(1/n);
    # k = 1: lo = 1 - (1 - alpha/2)^(1/n).
    a2 = (1 - confidence) / 2
    assert clopper_pearson(0, n, confidence)[1] == pytest.approx(-math.expm1(math.log(a2) / n))
    assert clopper_pearson(n, n, confidence)[0] == pytest.approx(math.exp(math.log(a2) / n))
    assert clopper_pearson(1, n, confidence)[0] == pytest.approx(
        -math.expm1(math.log1p(-a2) / n), rel=1e-9
    )


def test_clopper_pearson_coverage_is_at_least_nominal():
    # Clopper & Pearson 1934: the exact interval covers p with probability >= the confidence
    # level for every p. Computed exactly from the binomial pmf for n = 40.
    n = 40
    intervals = np.array([clopper_pearson(k, n) for k in range(n + 1)])
    pmf_k = np.arange(n + 1)
    for p in np.linspace(0.01, 0.99, 37):
        covered = (intervals[:, 0] <= p) & (p <= intervals[:, 1])
        assert scipy.stats.binom.pmf(pmf_k, n, p)[covered].sum() >= 0.95 - 1e-12


def test_clopper_pearson_edges_and_errors():
    assert clopper_pearson(0, 0) == (0.0, 1.0)
    for bad in [dict(k=3, n=2), dict(k=-1, n=5), dict(k=1, n=5, confidence=1.0), dict(k=1.5, n=5)]:
        with pytest.raises(ParameterError):
            clopper_pearson(**bad)
    assert issubclass(ParameterError, IqstatError)


# ------------------------------------------------------------------------- batches of bursts


def _mixed_prbs_batch(name: str, seed: int):
    """Bursts of different lengths and error rates with a degenerate one in the middle.

    Returns the bit arrays and, per burst, (phase, inverted, injected flips) or None where the
    burst must not lock (empty, too short, random bits).
    """
    rng = np.random.default_rng(seed)
    P = PRBS_PERIOD[name]
    bursts, truth = [], []
    for i in range(12):
        if i == 5:
            bursts.append(np.zeros(0, np.uint8))  # degenerate: no bits
            truth.append(None)
            continue
        if i == 6:
            bursts.append(rng.integers(0, 2, 700).astype(np.uint8))  # noise, no pattern
            truth.append(None)
            continue
        if i == 7:
            bursts.append(prbs_bits(name, 12, 3))  # too few bits to lock
            truth.append(None)
            continue
        n = int(rng.integers(300, 2500))
        phase = int(rng.integers(P))
        inverted = bool(i % 4 == 3)
        flips = rng.random(n) < (0.0, 0.003, 0.05, 0.15)[i % 4]
        b = prbs_bits(name, n, phase) ^ flips.astype(np.uint8)
        bursts.append(1 - b if inverted else b)
        truth.append((phase, inverted, int(flips.sum())))
    return bursts, truth


@pytest.mark.parametrize("name", NAMES)
@pytest.mark.parametrize("allow_inverted", [True, False])
def test_check_prbs_many_equals_one_at_a_time(name, allow_inverted):
    bursts, truth = _mixed_prbs_batch(name, 21 + REGISTER[name])
    many = check_prbs_many(bursts, name, allow_inverted=allow_inverted)
    assert len(many) == len(bursts)
    for b, got, tr in zip(bursts, many, truth, strict=True):
        assert got == check_prbs(b, name, allow_inverted=allow_inverted)
        if tr is None or (tr[1] and not allow_inverted):
            assert not got.locked and got.ber is None
            continue
        # Facts of the construction: the injected phase, polarity and number of flips.
        assert got.locked and (got.phase, got.inverted, got.bit_errors) == tr
        assert got.bits_checked == b.size
        assert got.ber_ci95 == pytest.approx(clopper_pearson(tr[2], b.size))


def test_check_prbs_many_batch_order_and_slices_do_not_matter():
    # Each burst's result depends on that burst only: any subset, in any order, gives the same
    # results (the pn15 fold is processed in blocks of bursts; 40 bursts cross a block edge).
    bursts, _ = _mixed_prbs_batch("pn15", 5)
    bursts = (bursts * 4)[:40]
    full = check_prbs_many(bursts, "pn15")
    order = np.random.default_rng(2).permutation(len(bursts))
    shuffled = check_prbs_many([bursts[i] for i in order], "pn15")
    assert [full[i] for i in order] == shuffled
    assert check_prbs_many([], "pn9") == []


def test_check_known_many_equals_one_at_a_time():
    rng = np.random.default_rng(31)
    ref = rng.integers(0, 2, 400).astype(np.uint8)
    bursts, expect = [], []
    for i, (n, p) in enumerate([(400, 0.0), (250, 0.01), (0, 0.0), (399, 0.5), (600, 0.02)]):
        sent = np.concatenate([ref, rng.integers(0, 2, max(0, n - 400))])[:n].astype(np.uint8)
        flips = rng.random(n) < p
        got = sent ^ flips.astype(np.uint8)
        if i == 4:
            got = 1 - got
        bursts.append(got)
        expect.append(int(flips[:400].sum()))
    many = check_known_many(bursts, ref)
    for b, got in zip(bursts, many, strict=True):
        assert got == check_known(b, ref)
    assert [r.locked for r in many] == [True, True, False, False, True]
    assert [r.bit_errors for r in many if r.locked] == [expect[0], expect[1], expect[4]]
    assert (
        many[4].inverted and many[4].bits_checked == 400 and "first 400 of 600" in many[4].message
    )
    assert many[2].message == "no received bits to compare"
    as_is = check_known_many(bursts, ref, allow_inverted=False)
    for r, b in zip(as_is, bursts, strict=True):
        assert r == check_known(b, ref, allow_inverted=False)


def test_batch_bad_bits_name_the_burst():
    good = prbs_bits("pn9", 100)
    with pytest.raises(ParameterError, match=r"bits_list\[2\] must hold only 0 and 1, found 3"):
        check_prbs_many([good, good, np.array([0, 1, 3])], "pn9")
    with pytest.raises(ParameterError, match=r"bits_list\[1\] must be a 1-D"):
        check_known_many([good, np.zeros((2, 2), np.uint8)], good)
    with pytest.raises(ParameterError, match="list of 1-D bit arrays"):
        check_prbs_many(np.zeros((3, 100), np.uint8), "pn9")


def test_clopper_pearson_arrays_match_scipy_binomtest():
    # Vectorised call: each element equals the scalar call and scipy's exact interval
    # (Clopper & Pearson 1934 via scipy.stats.binomtest, agreement to its solver's 1e-6).
    k = np.array([0, 1, 3, 10, 0, 7, 50])
    n = np.array([0, 1, 10, 10, 1000, 50, 1000])
    lo, hi = clopper_pearson(k, n, 0.9)
    assert lo.shape == hi.shape == (7,)
    for i in range(7):
        assert (lo[i], hi[i]) == clopper_pearson(int(k[i]), int(n[i]), 0.9)
        if n[i]:
            ref = scipy.stats.binomtest(int(k[i]), int(n[i])).proportion_ci(0.9, method="exact")
            assert (lo[i], hi[i]) == pytest.approx((ref.low, ref.high), rel=1e-6, abs=1e-15)
    lo2, hi2 = clopper_pearson(np.array([[0], [5]]), np.array([10, 20]))  # broadcasting
    assert lo2.shape == (2, 2) and hi2[1, 1] == clopper_pearson(5, 20)[1]
    with pytest.raises(ParameterError, match="whole numbers"):
        clopper_pearson(np.array([1.0, 2.0]), np.array([5, 5]))
    with pytest.raises(ParameterError, match="k=6, n=5"):
        clopper_pearson(np.array([1, 6]), np.array([5, 5]))


def test_pn15_short_bursts_sectioned_equal_folded():
    # A batch of short pn15 bursts takes the sectioned FFT; adding one long burst forces the
    # single 32767-point fold. Both give the same results, and the injected truth (phase,
    # polarity, flips) is found by each.
    rng = np.random.default_rng(77)
    bursts, truth = [], []
    for i in range(9):
        n = int(rng.integers(200, 600))
        phase = int(rng.integers(32767))
        flips = rng.random(n) < 0.02 * (i % 3)
        b = prbs_bits("pn15", n, phase) ^ flips.astype(np.uint8)
        bursts.append(1 - b if i == 4 else b)
        truth.append((phase, i == 4, int(flips.sum())))
    short = check_prbs_many(bursts, "pn15")
    mixed = check_prbs_many([*bursts, prbs_bits("pn15", 9000, 5)], "pn15")
    assert mixed[:-1] == short and mixed[-1].phase == 5
    for got, tr in zip(short, truth, strict=True):
        assert got.locked and (got.phase, got.inverted, got.bit_errors) == tr
