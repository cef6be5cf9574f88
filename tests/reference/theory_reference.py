"""Recompute the reference values used by tests/test_theory.py, independently of iqstat.

Run from the repository root::

    python tests/reference/theory_reference.py

It writes tests/reference/theory_reference.json. Everything is computed with mpmath at 40
significant digits from the published formulas (it imports nothing from iqstat), so the tests
compare iqstat's float64 code against an independent evaluation:

- noncoherent orthogonal M-FSK SER: the alternating sum, Proakis & Salehi, Digital
  Communications 5th ed. §4.5-3 [from memory], evaluated exactly in multiprecision (no
  cancellation problem at this precision; M = 1024 uses 400 digits);
- BER of orthogonal M-FSK: 2^{k-1}/(2^k-1)·SER (same source);
- non-orthogonal noncoherent BFSK: Stein, IEEE Trans. Inf. Theory IT-10:43-51, 1964,
  P_b = Q1(a,b) − ½·exp(−(a²+b²)/2)·I0(ab) (this direct form, not the rewritten one iqstat uses);
- noncoherent OOK with the optimum threshold: Annamalai & Bhargava, IEEE Trans. Commun.
  47(9):1293, 1999, P_b = ½[e^{−b²/2} + 1 − Q1(a,b)], a² = 4·Eb/N0, e^{−a²/2}·I0(ab) = 1;
- Marcum Q_1(a,b) as the Poisson mixture of regularised upper incomplete gammas (the series
  definition of the noncentral chi-square survival function);
- log I0 from mpmath.besseli;
- the 4-FSK union bound over pairwise Stein probabilities with Gray labels [derived].

Tag of every value: [computed].
"""

from __future__ import annotations

import json
from pathlib import Path

import mpmath as mp

mp.mp.dps = 40
OUT = Path(__file__).with_name("theory_reference.json")


def undb(x_db):
    return mp.mpf(10) ** (mp.mpf(x_db) / 10)


def marcum_q1(a, b):
    """Q1(a,b) = Σ_j e^{−a²/2}(a²/2)^j/j! · Γ(j+1, b²/2)/Γ(j+1)."""
    a, b = mp.mpf(a), mp.mpf(b)
    lam = a * a / 2
    x = b * b / 2
    if lam == 0:
        return mp.exp(-x)
    j_max = int(lam + 40 * mp.sqrt(lam + 1) + 60)
    log_lam = mp.log(lam)
    terms = (
        mp.exp(-lam + j * log_lam - mp.loggamma(j + 1))
        * mp.gammainc(j + 1, x, mp.inf, regularized=True)
        for j in range(j_max)
    )
    return mp.fsum(terms)


def rice_tail_quad(a, b, upper=True):
    """Q1(a,b) (upper) or 1 − Q1(a,b) (lower) by quadrature of the Rician pdf; for large a."""
    a, b = mp.mpf(a), mp.mpf(b)

    def pdf(x):
        return x * mp.exp(-((x - a) ** 2) / 2 - a * x) * mp.besseli(0, a * x)

    if upper:
        return mp.quad(pdf, [b, b + 2, b + 6, b + 15, b + 60])
    return mp.quad(pdf, [max(b - 60, 0), b - 15, b - 6, b - 2, b])


def marcum_q1_complement(a, b):
    """1 − Q1(a,b) as the Poisson mixture of regularised lower incomplete gammas."""
    a, b = mp.mpf(a), mp.mpf(b)
    lam = a * a / 2
    x = b * b / 2
    if lam == 0:
        return -mp.expm1(-x)
    j_max = int(lam + 40 * mp.sqrt(lam + 1) + 60)
    log_lam = mp.log(lam)
    terms = (
        mp.exp(-lam + j * log_lam - mp.loggamma(j + 1)) * mp.gammainc(j + 1, 0, x, regularized=True)
        for j in range(j_max)
    )
    return mp.fsum(terms)


def ser_ncfsk(ebn0, m):
    k = mp.log(m, 2)
    gs = k * mp.mpf(ebn0)
    return mp.fsum(
        (-1) ** (n + 1) * mp.binomial(m - 1, n) / (n + 1) * mp.exp(-n * gs / (n + 1))
        for n in range(1, m)
    )


def ber_ncfsk(ebn0, m):
    k = int(round(mp.log(m, 2)))
    return mp.mpf(2) ** (k - 1) / (mp.mpf(2) ** k - 1) * ser_ncfsk(ebn0, m)


def ber_stein(ebn0, rho_abs):
    g = mp.mpf(ebn0)
    r = mp.mpf(rho_abs)
    root = mp.sqrt(1 - r * r)
    a = mp.sqrt(g / 2 * (1 - root))
    b = mp.sqrt(g / 2 * (1 + root))
    return marcum_q1(a, b) - mp.exp(-(a * a + b * b) / 2) * mp.besseli(0, a * b) / 2


def ook_threshold(ebn0):
    a = mp.sqrt(4 * mp.mpf(ebn0))
    if a == 0:
        return mp.sqrt(2)
    return mp.findroot(lambda b: mp.log(mp.besseli(0, a * b)) - a * a / 2, mp.sqrt(2 + a * a / 4))


def ber_ook(ebn0):
    a = mp.sqrt(4 * mp.mpf(ebn0))
    b = ook_threshold(ebn0)
    return (mp.exp(-b * b / 2) + marcum_q1_complement(a, b)) / 2


def ber_4fsk_union_h_half(ebn0):
    """Union bound, Gray labels 00,01,11,10 on tones 0..3, |ρ_ij| = |sinc((i−j)/2)|."""
    labels = [0, 1, 3, 2]
    k, m = 2, 4
    total = mp.mpf(0)
    for i in range(m):
        for j in range(m):
            if i == j:
                continue
            d = bin(labels[i] ^ labels[j]).count("1")
            x = mp.mpf(i - j) / 2
            rho = abs(mp.sin(mp.pi * x) / (mp.pi * x))
            total += d * ber_stein(k * mp.mpf(ebn0), rho)
    return total / (m * k)


def required_db(ber_fn, target, guess_db):
    lt = mp.log(target)
    return mp.findroot(
        lambda x: mp.log(ber_fn(undb(x))) - lt, (guess_db - 0.5, guess_db + 0.5), solver="anderson"
    )


def s(x):
    """Serialise an mpf with 20 significant digits (as a string, then float by the reader)."""
    return mp.nstr(x, 20)


def main() -> None:
    dbs = [0, 4, 8, 10, 12]
    ref: dict = {
        "_note": "[computed] by tests/reference/theory_reference.py with mpmath, 40 digits"
    }
    ref["ber_table"] = {
        "nc_bfsk": {str(d): s(ber_ncfsk(undb(d), 2)) for d in dbs},
        "nc_4fsk": {str(d): s(ber_ncfsk(undb(d), 4)) for d in dbs},
        "nc_ook_optimum": {str(d): s(ber_ook(undb(d))) for d in dbs},
    }
    ref["ser_4fsk_8db"] = s(ser_ncfsk(undb(8), 4))
    ref["ook_threshold"] = {str(d): s(ook_threshold(undb(d))) for d in (6, 10, 14)}
    targets = {"1e-3": mp.mpf("1e-3"), "1e-4": mp.mpf("1e-4"), "1e-5": mp.mpf("1e-5")}
    guesses = {
        "nc_bfsk": (lambda g: ber_ncfsk(g, 2), {"1e-3": 10.9, "1e-4": 12.3, "1e-5": 13.4}),
        "nc_4fsk": (lambda g: ber_ncfsk(g, 4), {"1e-3": 8.4, "1e-4": 9.6, "1e-5": 10.6}),
        "nc_bfsk_rho_2_over_pi": (
            lambda g: ber_stein(g, 2 / mp.pi),
            {"1e-3": 14.3, "1e-4": 15.8, "1e-5": 17.1},
        ),
        "nc_ook_optimum": (ber_ook, {"1e-3": 10.5, "1e-4": 12.0, "1e-5": 13.1}),
    }
    ref["required_ebn0_db"] = {
        name: {t: s(required_db(fn, targets[t], g[t])) for t in targets}
        for name, (fn, g) in guesses.items()
    }
    ref["marcum_q1"] = [
        {"a": a, "b": b, "q": s(marcum_q1(a, b))} for a, b in ((1, 2), (2, 1), (5, 8), (10, 16))
    ]
    # large a, where scipy's ncx2 stops converging (a² ~ 1e10 and beyond): float inputs so the
    # test can pass the very same doubles
    large = []
    for a, d in ((10000.001, 3.0), (2e5, 4.0), (5e4, -6.0), (3e7, 0.25)):
        b = a + d
        large.append(
            {
                "a": a,
                "b": b,
                "q": s(rice_tail_quad(a, b, True)),
                "q_complement": s(rice_tail_quad(a, b, False)),
            }
        )
    ref["marcum_q1_large"] = large
    # tails far below where scipy's ncx2 is reliable (its cdf returns 0 below ~1e-80)
    deep = (
        (49.95, 17.9),
        (30.0, 5.0),
        (20.0, 0.5),
        (5.0, 40.0),
        (1.0, 30.0),
        (0.001, 0.001),
        (16.944871794871794, 0.8118644067796611),
        (1e-4, 3.0),
        (3e-9, 2.0),
    )
    ref["marcum_q1_deep"] = [
        {"a": a, "b": b, "q": s(marcum_q1(a, b)), "q_complement": s(marcum_q1_complement(a, b))}
        for a, b in deep
    ]
    ref["log_i0"] = [
        {"x": x, "value": s(mp.log(mp.besseli(0, mp.mpf(x))))}
        for x in ("0.001", "0.0099", "0.0101", "0.02", "0.3", "1", "1.99", "2.01", "50", "700")
    ]
    ref["stein"] = [
        {"ebn0_db": d, "rho_abs": r, "ber": s(ber_stein(undb(d), mp.mpf(r)))}
        for d, r in (
            (8, "0.3"),
            (10, "0.6366197723675813431"),
            (14, "0.6366197723675813431"),
            (12, "0.9"),
        )
    ]
    ref["union_4fsk_h_half"] = {str(d): s(ber_4fsk_union_h_half(undb(d))) for d in (10, 14)}
    ser_large = []
    for m, d, dps in ((64, 4, 60), (64, 0, 60), (128, 4, 80), (1024, 4, 400), (1024, 10, 400)):
        with mp.workdps(dps):
            ser_large.append({"m": m, "ebn0_db": d, "ser": s(ser_ncfsk(undb(d), m))})
    ref["ser_large_m"] = ser_large
    OUT.write_text(json.dumps(ref, indent=1) + "\n")
    print(f"wrote {OUT}")
    print(json.dumps(ref, indent=1))


if __name__ == "__main__":
    main()
