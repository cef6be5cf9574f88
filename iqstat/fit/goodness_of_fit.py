"""Goodness of fit: the branch energies against their fitted chi-square laws.

Given hypothesis h, |z_j|²/(N0/2) is noncentral chi-square with 2 degrees of freedom and
λ = 2A²|R_jh|²/N0 (docs/estimator.md eq. 6; Proakis & Salehi, Digital Communications, 5th
ed., §4.5, from memory); the marginal law of branch j is Σ_h π_h·F(y; 2, λ_hj).
:func:`branch_energy_cdf` gives these CDFs; :func:`check_energy_laws` KS-tests the
probability-integral transforms branch by branch (Stephens' approximation of the p-value,
Bonferroni over the branches); ``_ks_marginal_many`` does the marginal test for a whole batch,
evaluating the CDF only where it can change the KS statistic (:mod:`iqstat.fit.ncx2_cdf`).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from scipy import special

from iqstat.errors import ParameterError
from iqstat.fit.inputs import (
    _check_modulation,
    _check_outputs,
    _check_priors,
    _check_symbol_grams,
    _class_counts,
    _Prepared,
)
from iqstat.fit.ncx2_cdf import (
    _NCX2_LAM_MAX,
    _NCX2_LAM_MIN,
    _SMALL_NONCENTRALITY,
    _chi2_2_cdf,
    _chi2_2_cdf_rows,
    _ncx2_cdf_direct,
    _ncx2_cdf_from_pairs,
    _ncx2_cdf_pairs,
    _near_central_factors,
    _near_central_terms,
)
from iqstat.fit.result import N_BRANCHES, Modulation

#: At most this many energies enter the goodness-of-fit test (a fixed-seed subsample).
GOF_MAX_VALUES = 20000


_GOF_SEED = 20261202


def _noncentrality(amplitude: float, noise_var: float, gram: np.ndarray, modulation: str):
    """λ[h, j] = 2A²|R_j,b(h)|²·s_h/N0 for hypothesis h and branch j (eq. 6), and s_h."""
    g = amplitude * amplitude / noise_var
    if modulation == "ook":
        return np.array([[0.0], [2.0 * g]])
    return 2.0 * g * np.abs(gram.T) ** 2  # row h = tone sent, column j = branch


def branch_energy_cdf(
    energy: np.ndarray,
    *,
    amplitude: float,
    noise_var: float,
    gram: np.ndarray | None = None,
    modulation: Modulation,
    priors: Sequence[float] | None = None,
    symbols: np.ndarray | None = None,
) -> np.ndarray:
    """Fitted CDF of every branch energy |z_kj|².

    Parameters
    ----------
    energy : ndarray, shape (n_symbols, n_branches)
        Branch energies |z|² (same units as N0).
    amplitude, noise_var : float
        A and N0 of the fit (A = 0 allowed: noise only).
    gram : ndarray, shape (n_branches, n_branches) or (n_symbols, n_branches, n_branches)
        Template Gram matrix, or one per symbol (row k: symbol k's R_k); identity if omitted.
    modulation : {"2fsk", "4fsk", "ook"}
    priors : sequence of float, optional
        Hypothesis priors (FSK: per tone; OOK: (p_off, p_on)); uniform if omitted.
    symbols : ndarray of int, shape (n_symbols,), optional
        Known hypothesis per symbol: the conditional CDF instead of the marginal.

    Returns
    -------
    ndarray, shape (n_symbols, n_branches)
        F_j(|z_kj|²) in [0, 1].

    Notes
    -----
    Given hypothesis h, |z_j|² / (N0/2) is noncentral chi-square with 2 degrees of freedom and
    λ = 2A²|ρ_jh|²/N0, ρ_jh = R[j, h] (central, i.e. exponential of mean N0, when ρ = 0) [1].
    The marginal is F_j(x) = Σ_h π_h F(x; λ_hj) (docs/estimator.md eq. 6). With per-symbol
    Gram matrices each energy goes through the law of its own symbol's R_k.

    References
    ----------
    .. [1] J. G. Proakis, M. Salehi, Digital Communications, 5th ed., §4.5 (from memory).
    """
    _check_modulation(modulation)
    m = N_BRANCHES[modulation]
    x = np.asarray(energy, dtype=float)
    if modulation == "ook" and x.ndim == 1:
        x = x[:, None]
    if x.ndim != 2 or x.shape[1] != m:
        raise ParameterError(f"energy has shape {x.shape}; {modulation} needs (n_symbols, {m})")
    if not (math.isfinite(noise_var) and noise_var > 0):
        raise ParameterError(f"noise_var {noise_var!r} must be a positive finite number")
    if not (math.isfinite(amplitude) and amplitude >= 0):
        raise ParameterError(f"amplitude {amplitude!r} must be a finite number >= 0")
    table, row_gram = _check_symbol_grams(gram if modulation != "ook" else None, m, len(x))
    pi = _check_priors(priors, modulation)
    y = x / (0.5 * noise_var)
    if row_gram is None:
        lam = _noncentrality(amplitude, noise_var, table[0], modulation)
        return _energy_cdf(y, lam, pi, symbols)
    out = np.empty_like(y)
    sym = None if symbols is None else np.asarray(symbols)
    for c in range(len(table)):  # the distinct per-symbol matrices (a few)
        sel = row_gram == c
        lam = _noncentrality(amplitude, noise_var, table[c], modulation)
        out[sel] = _energy_cdf(y[sel], lam, pi, None if sym is None else sym[sel])
    return out


def _energy_cdf(y: np.ndarray, lam: np.ndarray, pi: np.ndarray, symbols) -> np.ndarray:
    """F_j(y_kj) with noncentralities lam[h, j] (eq. 6): marginal, or given ``symbols``."""
    out = np.zeros_like(y)
    for j in range(y.shape[1]):  # branches and hypotheses (≤ 4 × 4), vectorised over symbols
        if symbols is None:
            for h in range(len(pi)):
                out[:, j] += pi[h] * _chi2_2_cdf(y[:, j], lam[h, j])
        else:
            sym = np.asarray(symbols)
            for h in np.unique(sym):
                sel = sym == h
                out[sel, j] = _chi2_2_cdf(y[sel, j], lam[h, j])
    return np.clip(out, 0.0, 1.0)


def _ks_uniform(u: np.ndarray) -> tuple[float, float]:
    """Two-sided one-sample KS test of u against U(0, 1): (D, p-value).

    D is computed exactly; the p-value uses Stephens' modified statistic
    (√n + 0.12 + 0.11/√n)·D with the Kolmogorov limit law, accurate to a few per cent of p for
    n ≥ 5 [1]_, and free of the per-call overhead of scipy.stats.kstest (this runs once per
    branch per burst).

    References
    ----------
    .. [1] M. A. Stephens, "Use of the Kolmogorov–Smirnov, Cramér–von Mises and related
       statistics without extensive tables," J. R. Stat. Soc. B 32(1):115–122, 1970 [mem].
    """
    x = np.sort(u)
    n = x.size
    i = np.arange(1, n + 1)
    d = float(max(np.max(i / n - x), np.max(x - (i - 1) / n)))
    rn = math.sqrt(n)
    return d, float(special.kolmogorov((rn + 0.12 + 0.11 / rn) * d))


#: Block lengths of the successive passes of :func:`_ks_marginal_many` (then every value left).
_KS_BLOCKS = (32, 8, 2)


def _ks_marginal_many(
    y: np.ndarray, starts: np.ndarray, n: np.ndarray, lam: np.ndarray, priors: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Branchwise KS statistics and p-values of many bursts against their marginal laws.

    ``y`` (N, M): energies over N0/2, bursts concatenated (burst b at ``starts[b]``, ``n[b]``
    symbols); ``lam`` (B, H, M) noncentralities and ``priors`` (B, H). Returns D and p, each
    (B, M). The CDF of branch j, F(y) = Σ_h π_h F(y; 2, λ_hj), is nondecreasing, so D =
    max_k max((k + 1)/n − F_k, F_k − k/n) over the sorted values is found evaluating F only
    where it can matter: between two evaluated points i0 < i1, monotonicity bounds every
    deviation inside by max(i1/n − F_i0, F_i1 − (i0 + 1)/n), and an interval whose bound does
    not exceed the largest deviation found so far in its row is skipped. Passes at every 32nd,
    8th, 2nd value of the open intervals, then all values left (at 560 symbols about a
    quarter of the CDF evaluations). All rows (burst × branch) go through each pass together.
    The p-value is Stephens' (√n + 0.12 + 0.11/√n)·D with the Kolmogorov limit law, see
    :func:`_ks_uniform`. F(y; 2, λ) comes from the two-term series for λ < 1e-4, from the
    interpolation table (:func:`_ncx2_table`, absolute error < 1e-11) for λ in [4, 576], and
    from chndtr otherwise.
    """
    b_count, m = len(n), y.shape[1]
    n_max = int(n.max())
    seg = np.repeat(np.arange(b_count), n)
    pos = np.arange(len(y)) - np.repeat(starts, n)
    pad = np.full((b_count, m, n_max), np.inf)
    flat, base = pad.reshape(-1), seg * (m * n_max) + pos
    for j in range(m):  # rows (burst, branch), each sorted below; branches ≤ 4
        flat[base + j * n_max] = y[:, j]
    pad.sort(axis=2)
    n_row = np.repeat(n, m)  # values per row
    valid = np.arange(n_max) < n_row[:, None]
    ys = pad.reshape(b_count * m, n_max)[valid]  # rows concatenated, each ascending
    off = np.cumsum(n_row) - n_row
    row_of = np.repeat(np.arange(b_count * m), n_row)
    k_of = np.arange(len(ys)) - np.repeat(off, n_row)
    n_of = n_row[row_of].astype(float)
    below, above = k_of / n_of, (k_of + 1) / n_of  # the empirical CDF left and right of each
    lam_rows = lam.transpose(0, 2, 1).reshape(b_count * m, -1)  # (row, h)
    pri_rows = np.repeat(priors, m, axis=0)  # (row, h)
    # per (row, h) its regime: 0 two-term series (λ < 1e-4), 1 table, 2 chndtr; priors folded
    # into the series factors, the table's polynomials in t computed once per (row, h)
    kind = np.where(lam_rows < _SMALL_NONCENTRALITY, 0, 2)
    kind[(lam_rows >= _NCX2_LAM_MIN) & (lam_rows <= _NCX2_LAM_MAX)] = 1
    c0, c1 = _near_central_factors(np.where(kind == 0, lam_rows, 0.0))
    c0 *= pri_rows
    slots = np.full(lam_rows.shape, -1, dtype=np.intp)
    slots[kind == 1] = np.arange(int((kind == 1).sum()))
    pairs = _ncx2_cdf_pairs(lam_rows[kind == 1]) if (kind == 1).any() else None
    root_rows = np.sqrt(lam_rows)
    special_h = (kind != 0).any(axis=0)

    def cdf(sel: np.ndarray) -> np.ndarray:
        rr = row_of[sel]
        yv = ys[sel]
        p1, p2 = _near_central_terms(yv)  # the same for every hypothesis
        out = np.zeros(len(sel))
        for h in range(lam_rows.shape[1]):  # hypotheses (≤ 4), vectorised over values
            fh = c1[rr, h] * p2
            fh += p1
            fh *= c0[rr, h]  # π_h·F(y; 2, λ) by the series (exact for λ = 0)
            if special_h[h]:
                k = kind[rr, h]
                tab = np.flatnonzero(k == 1)
                if tab.size:
                    r = rr[tab]
                    f = _ncx2_cdf_from_pairs(yv[tab], root_rows[r, h], slots[r, h], pairs)
                    fh[tab] = pri_rows[r, h] * f
                big = np.flatnonzero(k == 2)
                if big.size:
                    r = rr[big]
                    fh[big] = pri_rows[r, h] * _ncx2_cdf_direct(yv[big], lam_rows[r, h])
            out += fh
        return np.clip(out, 0.0, 1.0, out=out)

    f = np.empty(len(ys))
    known = np.zeros(len(ys), dtype=bool)
    d = np.zeros(b_count * m)
    block = _KS_BLOCKS[0]
    count = (n_row + block - 1) // block  # every block-th value of each row from its first
    first = np.cumsum(count) - count
    first_pass = np.zeros(len(ys), dtype=bool)
    j_in_row = np.arange(int(count.sum())) - np.repeat(first, count)
    first_pass[np.repeat(off, count) + block * j_in_row] = True
    first_pass[off + n_row - 1] = True  # and the last value of every row
    new = np.flatnonzero(first_pass)
    for block in (*_KS_BLOCKS[1:], 1, 0):
        if new.size:
            f[new] = cdf(new)
            known[new] = True
            fn = f[new]
            dev = np.maximum(above[new] - fn, fn - below[new])
            rows_new = row_of[new]
            starts_new = np.empty(len(new), dtype=bool)
            starts_new[0] = True
            np.not_equal(rows_new[1:], rows_new[:-1], out=starts_new[1:])
            cut = np.flatnonzero(starts_new)
            here = rows_new[cut]
            d[here] = np.maximum(d[here], np.maximum.reduceat(dev, cut))
        if block == 0:
            break
        ev = np.flatnonzero(known)
        lo, hi = ev[:-1], ev[1:]
        same = row_of[lo] == row_of[hi]
        lo, hi = lo[same], hi[same]
        bound = np.maximum(below[hi] - f[lo], f[hi] - above[lo])
        keep = (bound > d[row_of[lo]]) & (hi - lo > 1)
        lo, hi = lo[keep], hi[keep]
        # every block-th index strictly inside each open interval (lo, hi)
        count = (hi - lo - 1) // block
        first = np.cumsum(count) - count
        step = np.arange(int(count.sum())) - np.repeat(first, count) + 1
        new = np.repeat(lo, count) + block * step
    rn = np.sqrt(n_row)
    p = special.kolmogorov((rn + 0.12 + 0.11 / rn) * d)
    return d.reshape(b_count, m), p.reshape(b_count, m)


def check_energy_laws(
    z: np.ndarray,
    *,
    amplitude: float,
    noise_var: float,
    gram: np.ndarray | None = None,
    modulation: Modulation,
    priors: Sequence[float] | None = None,
    symbols: np.ndarray | None = None,
    max_values: int = GOF_MAX_VALUES,
) -> tuple[float, float, int]:
    """Kolmogorov–Smirnov test of the branch energies against the fitted chi-square laws.

    Parameters
    ----------
    z : ndarray, shape (n_symbols, n_branches)
        Correlator outputs.
    amplitude, noise_var, gram, modulation, priors, symbols
        As :func:`branch_energy_cdf` (``gram`` one matrix or one per symbol).
    max_values : int
        At most this many energies are tested (a fixed-seed subsample of symbols).

    Returns
    -------
    (statistic, pvalue, n_values)
        The largest per-branch KS statistic, the Bonferroni-combined p-value and the number of
        energies tested.

    Notes
    -----
    Each energy is mapped through its fitted CDF (probability-integral transform); under the
    model the results are uniform on [0, 1]. Branch by branch, the transforms of all symbols
    are KS-tested against the uniform law (scipy.stats.kstest): within one branch the values
    are independent across symbols, whereas the branches of one symbol are dependent (the
    branch holding the signal excludes the others; non-orthogonal templates correlate the
    noise), so pooling them would void the KS null distribution. The M branch p-values are
    combined by Bonferroni, p = min(1, M·min_j p_j), which keeps the level and is sensitive to
    an impairment in a single branch (an interferer near one tone). The parameters are
    estimated from the same data, which makes the p-value approximate and conservative (too
    large): a small p-value is a reliable sign of non-AWGN impairments (impulsive noise,
    interferers, leakage from a frequency offset); a large one is no proof of AWGN. Above
    ``max_values`` energies a fixed-seed subsample of symbols is tested.

    With per-symbol Gram matrices the marginal test compares each branch's energies with the
    mixture of their laws over the symbols, F̄_j = Σ_c f_c Σ_h π_h F(y; λ_hj(R_c)), f_c the
    share of the tested symbols whose matrix is R_c (docs/estimator.md eq. 6b): the mean of
    the symbols' own CDFs, which the empirical CDF of independent, not identically
    distributed values estimates without bias; its variance, Σ_k F_k(1 − F_k)/n², is at most
    F̄(1 − F̄)/n, so the Kolmogorov law keeps the test's level (conservative).
    """
    zz = _check_outputs(z, modulation)
    n, m = zz.shape
    if max_values < m:
        raise ParameterError(f"max_values {max_values!r} must be at least {m} (one per branch)")
    idx = np.arange(n)
    n_keep = max_values // m
    if n > n_keep:
        rng = np.random.default_rng(_GOF_SEED)
        idx = np.sort(rng.choice(n, size=n_keep, replace=False))
    sub = zz[idx]
    energy = sub.real**2 + sub.imag**2
    sym = None if symbols is None else np.asarray(symbols)[idx]
    if sym is None:
        # Marginal laws: each branch's transform is a monotone function of its energy, so the
        # KS statistic can be found evaluating the CDF only where it can matter.
        _check_modulation(modulation)
        if not (math.isfinite(noise_var) and noise_var > 0):
            raise ParameterError(f"noise_var {noise_var!r} must be a positive finite number")
        if not (math.isfinite(amplitude) and amplitude >= 0):
            raise ParameterError(f"amplitude {amplitude!r} must be a finite number >= 0")
        table, row_gram = _check_symbol_grams(gram if modulation != "ook" else None, m, n)
        pi = _check_priors(priors, modulation)
        if row_gram is None:
            lam = _noncentrality(amplitude, noise_var, table[0], modulation)
        else:  # the mixture over the symbols' matrices, weighted by their shares (eq. 6b)
            share = np.bincount(row_gram[idx], minlength=len(table)) / len(idx)
            lam = np.concatenate(
                [_noncentrality(amplitude, noise_var, r, modulation) for r in table]
            )
            pi = (share[:, None] * pi[None, :]).ravel()
        y = energy / (0.5 * noise_var)
        d, p = _ks_marginal_many(
            y, np.zeros(1, dtype=np.intp), np.array([len(y)]), lam[None], pi[None]
        )
        tests = list(zip(d[0], p[0], strict=True))
    else:
        cdf = branch_energy_cdf(
            energy,
            amplitude=amplitude,
            noise_var=noise_var,
            gram=gram,
            modulation=modulation,
            priors=priors,
            symbols=sym,
        )
        tests = [_ks_uniform(cdf[:, j]) for j in range(m)]
    statistic = max(t[0] for t in tests)
    pvalue = min(1.0, m * min(t[1] for t in tests))  # Bonferroni over branches
    return statistic, pvalue, int(energy.size)


def _energy_laws_many(
    prep: _Prepared,
    *,
    modulation: str,
    amplitude: np.ndarray,
    noise_var: np.ndarray,
    priors: np.ndarray,
    symbols: np.ndarray | None,
    max_values: int,
) -> list[tuple[float, float, int]]:
    """:func:`check_energy_laws` for every burst of a preparation (scaled outputs).

    Marginal laws (``symbols`` None): all bursts through :func:`_ks_marginal_many` at once.
    Known symbols: burst by burst (not on the measurement path).
    """
    m = prep.z.shape[1]
    if symbols is None:
        n_keep = max_values // m
        n = prep.n
        rows = None
        if (n > n_keep).any():  # fixed-seed subsample of the long bursts, as check_energy_laws
            parts = []
            for s, k in zip(prep.starts, n, strict=True):
                if k > n_keep:
                    rng = np.random.default_rng(_GOF_SEED)
                    parts.append(s + np.sort(rng.choice(k, size=n_keep, replace=False)))
                else:
                    parts.append(np.arange(s, s + k))
            rows = np.concatenate(parts)
            n = np.minimum(n, n_keep)
        z = prep.z if rows is None else prep.z[rows]
        starts = np.cumsum(n) - n
        g = amplitude * amplitude / noise_var
        if modulation == "ook":
            lam = np.zeros((len(n), 2, 1))
            lam[:, 1, 0] = 2.0 * g
        elif prep.row_gram is None:
            lam = 2.0 * g[:, None, None] * np.abs(prep.grams.transpose(0, 2, 1)) ** 2  # eq. 6
        else:
            row_gram = prep.row_gram if rows is None else prep.row_gram[rows]
            lam, priors = _mixture_laws(row_gram, n, prep.table, g, priors)
        y = (z.real**2 + z.imag**2) / np.repeat(0.5 * noise_var, n)[:, None]
        d, p = _ks_marginal_many(y, starts, n, lam, priors)
        stat = d.max(axis=1)
        pval = np.minimum(1.0, m * p.min(axis=1))  # Bonferroni over branches
        return [(float(a), float(b), int(k) * m) for a, b, k in zip(stat, pval, n, strict=True)]
    ends = prep.starts + prep.n

    def gram_of(i: int, s: int, e: int):
        if modulation == "ook":
            return None
        return prep.grams[i] if prep.row_gram is None else prep.table[prep.row_gram[s:e]]

    return [
        check_energy_laws(
            prep.z[s:e],
            amplitude=float(amplitude[i]),
            noise_var=float(noise_var[i]),
            gram=gram_of(i, s, e),
            modulation=modulation,
            priors=priors[i],
            symbols=None if symbols is None else symbols[s:e],
            max_values=max_values,
        )
        for i, (s, e) in enumerate(zip(prep.starts, ends, strict=True))
    ]


def _mixture_laws(
    row_gram: np.ndarray, n: np.ndarray, table: np.ndarray, g: np.ndarray, priors: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Noncentralities (B, C·H, M) and weights (B, C·H) of the per-burst mixtures (eq. 6b).

    Burst b's symbols use the matrices ``table[row_gram]``; its C_b distinct ones, with
    shares f_bc, give the components (c, h) of weight f_bc·π_bh and noncentralities
    λ_hj = 2γ_b|R_c[j, h]|²; bursts with fewer than C = max C_b matrices get components of
    weight zero (which add exact zeros to the CDF).
    """
    counts = _class_counts(row_gram, n, len(table))  # (B, G)
    present = counts > 0
    c_max = int(present.sum(axis=1).max())
    order = np.argsort(~present, axis=1, kind="stable")[:, :c_max]  # present entries first
    share = np.take_along_axis(counts, order, axis=1) / n[:, None]  # 0 for the padding
    rt = np.abs(table.transpose(0, 2, 1)) ** 2  # (G, h, j)
    lam = 2.0 * g[:, None, None, None] * rt[order]  # (B, C, H, M)
    b, _, h, m = lam.shape
    weights = share[:, :, None] * priors[:, None, :]
    return lam.reshape(b, c_max * h, m), weights.reshape(b, c_max * h)


def faded_energy_laws(
    energy: np.ndarray,
    noise_var: float,
    components,
    gram,
    priors: np.ndarray,
    sent: np.ndarray,
    ook: bool,
    max_values: int = GOF_MAX_VALUES,
) -> tuple[float, float, int]:
    """Branchwise KS test of the energies against laws with a fading signal level.

    ``components`` is a list of (weight, d, a): with probability ``weight`` a symbol's sent
    tone has a steady part of power a and a scattered part of power d, so branch j under
    hypothesis h is (v/2)·χ'²(2, 2|R_jh|²a/v), v = N0 + |R_jh|²·d (the Rician fit: one
    component; the level mixture: d = 0 and one component per level). ``sent`` holds the
    known hypothesis per symbol or −1 (mixed over ``priors``); OOK has hypotheses off and on of
    its one branch. Returns (largest statistic, Bonferroni p-value, values tested), as
    :func:`check_energy_laws`.
    """
    e = np.asarray(energy, dtype=float)
    n, m = e.shape
    idx = np.arange(n)
    if n * m > max_values:
        rng = np.random.default_rng(_GOF_SEED)
        idx = np.sort(rng.choice(n, size=max_values // m, replace=False))
    e, sent = e[idx], np.asarray(sent)[idx]
    if ook:
        r2 = np.array([[0.0, 1.0]])  # off: noise only; on: the sent tone's law
    elif gram is None:
        r2 = np.eye(m)
    else:
        g = np.asarray(gram)
        r2 = np.abs(g if g.ndim == 2 else g.mean(axis=0)) ** 2  # per-symbol: their mean
    tests = []
    for j in range(m):
        cdf = np.zeros(len(e))
        for h in range(r2.shape[1]):
            weight = np.where(sent >= 0, (sent == h).astype(float), priors[h])
            if not weight.any():
                continue
            part = np.zeros(len(e))
            for c_weight, d, a in components:
                v = noise_var + r2[j, h] * d
                lam = np.full(len(e), 2.0 * r2[j, h] * a / v)
                part += c_weight * _chi2_2_cdf_rows(2.0 * e[:, j] / v, lam)
            cdf += weight * part
        tests.append(_ks_uniform(np.clip(cdf, 0.0, 1.0)))
    statistic = max(t[0] for t in tests)
    return statistic, min(1.0, m * min(t[1] for t in tests)), int(e.size)
