"""Cramér–Rao bounds against the published/computed table of METHODS §3.

Reference values: METHODS §3 table of N·var(γ̂)/γ² [computed there: DA by quadrature of the
Rician Fisher information, NDA by Monte Carlo of the score, ±0.5 %]; the closed forms
2/γ + 1 (coherent DA, derived) and the high-SNR NC-DA limit 2/γ + 1/(M − ½) (derived).
"""

from __future__ import annotations

import pytest

from iqstat.bounds import crb_esn0, crb_std_db

TABLE = {  # Es/N0 dB: (NC-DA M=2, NC-DA M=4, NC-NDA M=2, NC-NDA M=4)
    0: (5.637, 3.865, 26.46, 24.47),
    3: (2.563, 1.724, 5.502, 4.298),
    6: (1.470, 0.925, 1.900, 1.256),
    10: (0.958, 0.525, 0.974, 0.534),
    15: (0.756, 0.359, 0.757, 0.360),
}


@pytest.mark.parametrize("esn0_db", sorted(TABLE))
def test_crb_reproduces_the_methods_table(esn0_db):
    cols = [("2fsk", "da"), ("4fsk", "da"), ("2fsk", "nda"), ("4fsk", "nda")]
    for (mod, kind), ref in zip(cols, TABLE[esn0_db], strict=True):
        got = crb_esn0(esn0_db, mod, kind=kind, n_monte_carlo=200_000)
        # Monte Carlo of 2e5 symbols: ~0.5 % on J, a little more on its inverse near 0 dB.
        assert got == pytest.approx(ref, rel=0.02), (mod, kind, esn0_db, got, ref)


@pytest.mark.parametrize(("mod", "m"), [("2fsk", 2), ("4fsk", 4)])
def test_high_snr_limit(mod, m):
    g = 10 ** (25 / 10)
    assert crb_esn0(25.0, mod, kind="da") == pytest.approx(2 / g + 1 / (m - 0.5), rel=0.03)


def test_noncoherent_da_is_never_below_half_the_coherent_bound():
    # Coherent DA complex AWGN: N·CRB/γ² = 2/γ + 1 (derived). The noncoherent DA bound lies
    # between the coherent one's M-dependent limit and it: sanity of the scale.
    for es in (3.0, 10.0):
        g = 10 ** (es / 10)
        v = crb_esn0(es, "2fsk", kind="da")
        assert 0.5 * (2 / g + 1) < v < 2 * (2 / g + 1)


def test_std_in_db_scales_with_one_over_root_n():
    a = crb_std_db(10.0, "2fsk", 100)
    b = crb_std_db(10.0, "2fsk", 400)
    assert a / b == pytest.approx(2.0, rel=1e-9)
