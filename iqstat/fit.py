"""Noncoherent Es/N0 estimation from the outputs of a quadrature correlator bank.

The input is one complex correlator output per symbol and branch, ``z[k, i]`` (shape
``(n_symbols, n_branches)``), each branch correlating with a unit-energy template of tone ``i``
(one branch for OOK). With the tone sent unknown, its phase unknown and uniform, and white
Gaussian noise, the outputs follow (docs/estimator.md derives all of this)::

    z = A·e^{jθ}·r_i + n,    r_i = column i of the template Gram matrix R,    n ~ CN(0, N0·R)

and, averaged over θ, ``p(z | i) ∝ N0^{-M} exp(-zᴴR⁻¹z / N0) · exp(-A²/N0) · I0(2A|z_i| / N0)``.

Three estimators of ``Es/N0`` are offered:

* :func:`fit_nda` — non-data-aided maximum likelihood on the mixture over the symbol sent. Decision
  errors are part of the model, so it stays unbiased where hard decisions err (down to 0 dB
  and below). This is the headline estimator.
* :func:`fit_da` — data-aided maximum likelihood with the symbols known (preamble, sync word,
  or a pattern the checker has locked to).
* :func:`fit_dd` — decision-directed moments (largest branch = signal). Biased high at low
  Es/N0; kept only to show how much the naive estimate is off.

Each returns a frozen :class:`NoncoherentFit` that carries its own health: convergence, a
message, the symbol count, a 95 % interval, and a goodness-of-fit test of the branch energies
against the fitted noncentral/central chi-square laws.

The module is a pure array core: no I/O, nothing computed at import time.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Sequence
from dataclasses import dataclass, fields, replace
from typing import Literal

import numpy as np
from scipy import optimize, special

from iqstat.errors import ParameterError

Modulation = Literal["2fsk", "4fsk", "ook"]
FitMethod = Literal["nda-ml", "da-ml", "dd-moment"]

#: Correlator branches per modulation (OOK: one envelope branch at the carrier).
N_BRANCHES: dict[str, int] = {"2fsk": 2, "4fsk": 4, "ook": 1}
#: Hypotheses per symbol (OOK: 0 = off, 1 = on).
N_HYPOTHESES: dict[str, int] = {"2fsk": 2, "4fsk": 4, "ook": 2}
#: Bits carried by one symbol.
BITS_PER_SYMBOL: dict[str, int] = {"2fsk": 1, "4fsk": 2, "ook": 1}

#: Fewer symbols than this and no estimate is attempted.
MIN_SYMBOLS = 20
#: An Es/N0 above this (dB) is not plausible for a correlator output: flagged.
MAX_PLAUSIBLE_ESN0_DB = 60.0
#: Template Gram matrices worse conditioned than this cannot separate the tones.
MAX_GRAM_CONDITION = 1e6
#: At most this many energies enter the goodness-of-fit test (a fixed-seed subsample).
GOF_MAX_VALUES = 20000
#: Symbols used by the Newton iterations before the final polish on all symbols.
_SUBSAMPLE_SYMBOLS = 20000

_GOF_SEED = 20261202
_Z975 = 1.959963984540054  # scipy.stats.norm.ppf(0.975)
# chi2(1).ppf(0.90): 2·Δℓ for a one-sided 95 % bound, and the 5 % critical value of the
# likelihood-ratio test of A = 0, a parameter on the boundary (50:50 mixture of chi2_0 and
# chi2_1; Self & Liang, J. Amer. Statist. Assoc. 82(398):605-610, 1987).
_CHI2_1_Q90 = 2.705543454095404
_CHI2_1_Q95 = 3.841458820694124  # chi2(1).ppf(0.95): the two-sided 95 % profile interval
_LOG_GAMMA_FLOOR = math.log(1e-4)  # γ below this (−40 dB) is taken as the boundary A = 0
_NEWTON_TOL = 1e-9  # Newton decrement (log-likelihood units) at which we stop
_MAX_NEWTON = 100


# --------------------------------------------------------------------------------------------
# Special functions
# --------------------------------------------------------------------------------------------


def _log_i0(x: np.ndarray, i0e_x: np.ndarray | None = None) -> np.ndarray:
    """log I0(x) without overflow: log(i0e(x)) + |x|, Maclaurin series below |x| = 1e-2.

    ``i0e_x`` may pass i0e(x) if already computed. METHODS §8: log I0(1) =
    0.23591435850717865, log I0(700) = 695.80569999844345.
    """
    x = np.asarray(x, dtype=float)
    out = np.log(special.i0e(x) if i0e_x is None else i0e_x) + np.abs(x)
    small = np.abs(x) < 1e-2
    if np.any(small):
        x2 = x[small] ** 2
        out[small] = x2 / 4.0 - x2**2 / 64.0 + x2**3 / 576.0  # log I0 Maclaurin series
    return out


#: Piecewise-polynomial log i0e and I1/I0 (see :func:`_bessel_terms`): intervals, degree, and
#: the constants c of the map v = u/(u + c) and b of the smooth part S.
_BESSEL_INTERVALS = 4096
_BESSEL_DEGREE = 4
_BESSEL_C = 8.0
_BESSEL_B = 1.0


#: Above this u the table is built from the asymptotic series instead of scipy.special.
_BESSEL_SERIES_FROM = 200.0


def _bessel_asymptotic(x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """e^{−x}·√(2πx)·I0(x) and 1 − I1(x)/I0(x) from the asymptotic series (A&S 9.7.1), x ≥ 200.

    30 terms: they shrink by a factor (2k + 1)²/(8(k + 1)x) < 1/10 up to k = 30 at x ≥ 200,
    so the remainder is below 1e-16 of the sum. 1 − ρ is Σ_k (t0_k − t1_k) / Σ_k t0_k with the
    difference taken term by term: 1 − i1e/i0e would lose ~1e-16/(1 − ρ) of itself.
    """
    t0 = np.ones_like(x)
    t1 = np.ones_like(x)
    s0 = np.ones_like(x)
    diff = np.zeros_like(x)
    for k in range(1, 30):  # series terms, each vectorised over x
        t0 = t0 * (-(0 - (2 * k - 1) ** 2) / (k * 8.0)) / x
        t1 = t1 * (-(4 - (2 * k - 1) ** 2) / (k * 8.0)) / x
        s0 += t0
        diff += t0 - t1
    return s0, diff / s0


@functools.lru_cache(maxsize=1)
def _bessel_table() -> tuple[np.ndarray, ...]:
    """Monomial coefficients (lowest first, each an array over the intervals) of S in the
    interval's local variable x = (w + 1)/2 ∈ [0, 1).

    Built on first use (not at import) from scipy.special: on each interval, dS/dw is
    interpolated at the Chebyshev points of degree d − 1 (from i1e/i0e, so the ratio is as
    accurate as scipy's) and integrated, the constant fixed by S at the interval's centre;
    the polynomial in w ∈ [−1, 1] is then rewritten in x (w = 2x − 1, binomial expansion).
    """
    k_count, d, c, b = _BESSEL_INTERVALS, _BESSEL_DEGREE, _BESSEL_C, _BESSEL_B
    nodes = np.cos(np.pi * (np.arange(d) + 0.5) / d)  # Chebyshev points of the first kind
    w = np.concatenate([nodes, [0.0]])
    v = (np.arange(k_count)[:, None] + 0.5 + 0.5 * w) / k_count  # (K, d + 1)
    u = c * v / (1.0 - v)
    far = u > _BESSEL_SERIES_FROM
    omr = 1.0 - special.i1e(u) / special.i0e(u)  # 1 − ρ
    s_all = np.log(special.i0e(u)) + 0.5 * np.log(2.0 * math.pi * (u + b))
    # far out, 1 − i1e/i0e from scipy is off by ~1e-10 of itself: the asymptotic series there
    series0, omr[far] = _bessel_asymptotic(u[far])
    s_all[far] = np.log(series0) + 0.5 * np.log1p(b / u[far])
    ds_du = 0.5 / (u + b) - omr
    ds_dw = ds_du * c / (1.0 - v) ** 2 / (2.0 * k_count)  # du/dv = c/(1 − v)², dv/dw = 1/(2K)
    # interpolation at the nodes and the change to monomials are linear in the values: their
    # (d, d) matrix, column j from the unit vector e_j, applies to all intervals in one product
    to_monomials = np.stack(
        [
            np.polynomial.chebyshev.cheb2poly(np.polynomial.chebyshev.chebfit(nodes, e, d - 1))
            for e in np.eye(d)  # d unit vectors, once
        ],
        axis=1,
    )
    table = np.empty((d + 1, k_count))
    table[1:] = (to_monomials @ ds_dw[:, :d].T) / np.arange(1, d + 1)[:, None]  # ∫ D(w) dw
    table[0] = s_all[:, -1]  # S at the interval's centre w = 0
    # coefficient of x^i in (2x − 1)^j: C(j, i)·2^i·(−1)^(j − i)
    to_x = np.array(
        [[math.comb(j, i) * 2.0**i * (-1.0) ** (j - i) for j in range(d + 1)] for i in range(d + 1)]
    )
    return tuple(np.ascontiguousarray(row) for row in to_x @ table)


def _bessel_terms(u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """log i0e(u) and 1 − I1(u)/I0(u) for u ≥ 0 (any shape), without scipy's ~25 ns per value.

    Notes
    -----
    S(u) = log i0e(u) + ½·log(2π(u + b)) is smooth on [0, ∞) and tends to 0 as u → ∞
    (i0e(u)·√(2πu) → 1, Abramowitz & Stegun 9.7.1). It is a polynomial of degree 4 in the
    local variable x ∈ [0, 1) of 4096 equal intervals of v = u/(u + c) ∈ [0, 1) (5 gathers
    and 14 Horner passes per value; degree 7 on 256 intervals, as accurate, costs ~25 % more),
    evaluated by Horner together with its derivative, which gives the ratio:
    I1/I0 = d log I0/du = 1 + S'(u) − 1/(2(u + b)) (A&S 9.6.27: I0' = I1). Checked against
    scipy.special over [1e-6, 1e6] (tests/test_fit.py): log i0e to 2e-15 of max(1, log I0),
    1 − ρ to about 3e-13 relative (scipy's own error there), ρ to 3e-13 relative above
    u = 0.1 (absolute 1e-12 below).
    """
    table = _bessel_table()
    k_count, c, b = _BESSEL_INTERVALS, _BESSEL_C, _BESSEL_B
    rk = u + c
    np.divide(c * k_count, rk, out=rk)  # K·(1 − v) = K·c/(u + c)  (u = inf: the last interval)
    vk = np.subtract(k_count, rk)  # K·v (K a power of 2: the same bits as K·(1 − c/(u + c)))
    idx = vk.astype(np.intp)
    np.minimum(idx, k_count - 1, out=idx)
    w = np.subtract(vk, idx, out=vk)  # x, the position inside the interval
    tmp = np.empty_like(w)
    p = table[-1][idx]
    dp = p.copy()  # the first Horner step of the derivative from 0: 0·w + p = p
    p *= w
    p += table[-2][idx]
    for coef in table[-3::-1]:  # Horner for S and dS/dx together (d + 1 coefficients)
        dp *= w
        dp += p
        p *= w
        p += coef[idx]
    ub = u + b
    np.multiply(ub, 2.0 * math.pi, out=tmp)
    np.log(tmp, out=tmp)
    tmp *= 0.5
    p -= tmp  # log i0e
    # 1 − ρ = 1/(2(u + b)) − dS/du, dS/du = dS/dx · K·(1 − v)²/c = dS/dx · (K(1 − v))²/(cK)
    rk *= rk
    dp *= rk
    dp *= 1.0 / (c * k_count)
    omr = np.divide(0.5, ub, out=ub)
    omr -= dp
    return p, omr


# --------------------------------------------------------------------------------------------
# Result
# --------------------------------------------------------------------------------------------


def _finite_or_none(v: float | None) -> float | None:
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


@dataclass(frozen=True)
class NoncoherentFit:
    """An Es/N0 estimate from correlator outputs, with its health.

    Attributes
    ----------
    method : str
        ``"nda-ml"``, ``"da-ml"`` or ``"dd-moment"``.
    modulation : str
        ``"2fsk"``, ``"4fsk"`` or ``"ook"``.
    esn0, esn0_db : float or None
        Es/N0, linear and dB. OOK: average energy per symbol, ``p_on·A²/N0``.
    esn0_db_ci95 : (float, float) or None
        95 % interval of Es/N0 in dB (see ``ci_method``).
    esn0_db_upper95 : float or None
        One-sided 95 % upper bound (dB) when no signal was detected, else None.
    ebn0_db, ebn0_db_ci95 : float, (float, float) or None
        The same per bit: Es/N0 − 10·log10(bits per symbol).
    amplitude : float or None
        A = √E of the matched branch ("on" amplitude for OOK).
    noise_var : float or None
        N0 = E|n|² at the correlator output.
    priors : tuple of float
        Hypothesis priors used (FSK: one per tone; OOK: (p_off, p_on)).
    n_symbols : int
        Symbols the estimate uses.
    converged : bool
        True when the optimiser converged to an interior, plausible estimate with the signal
        significantly present.
    message : str
        What happened, in one line.
    iterations : int
        Optimiser iterations (Newton steps; hard-decision rounds for DD OOK; 0 for DD FSK).
    log_likelihood : float or None
        Log density of z at the estimate (nats, all constants included); None for DD.
    detection_statistic : float or None
        2·(ℓ̂ − ℓ₀), the likelihood ratio against "noise only"; None for DD.
    ci_method : str
        How the interval was made (``"profile-likelihood"`` below 6 dB,
        ``"wald-log-observed-info"``, or ``"none"``).
    gof_statistic, gof_pvalue : float or None
        Kolmogorov–Smirnov statistic and p-value of the probability-integral transforms.
    gof_test : str
        ``"ks-pit-branchwise"`` (see :func:`check_energy_laws`), ``"none"`` if not run.
    gof_n_values : int
        Energies that entered the test.
    """

    method: str
    modulation: str
    esn0: float | None
    esn0_db: float | None
    esn0_db_ci95: tuple[float, float] | None
    esn0_db_upper95: float | None
    ebn0_db: float | None
    ebn0_db_ci95: tuple[float, float] | None
    amplitude: float | None
    noise_var: float | None
    priors: tuple[float, ...]
    n_symbols: int
    converged: bool
    message: str
    iterations: int
    log_likelihood: float | None
    detection_statistic: float | None
    ci_method: str
    gof_statistic: float | None
    gof_pvalue: float | None
    gof_test: str
    gof_n_values: int

    def to_dict(self) -> dict:
        """JSON-safe dictionary: floats or None (never NaN), lists for tuples."""
        out = {}
        for key, value in {f.name: getattr(self, f.name) for f in fields(self)}.items():
            if isinstance(value, (tuple, list)):
                items = [_finite_or_none(v) for v in value]
                out[key] = None if any(v is None for v in items) else items
            elif isinstance(value, bool) or value is None or isinstance(value, str):
                out[key] = value
            elif isinstance(value, (int, np.integer)):
                out[key] = int(value)
            else:
                out[key] = _finite_or_none(value)
        return out


# --------------------------------------------------------------------------------------------
# Input checks
# --------------------------------------------------------------------------------------------


def _check_modulation(modulation: str) -> str:
    if modulation not in N_BRANCHES:
        raise ParameterError(
            f"modulation {modulation!r} is not known; choose one of {', '.join(N_BRANCHES)}"
        )
    return modulation


def _check_outputs(z: np.ndarray, modulation: str) -> np.ndarray:
    """z as complex128 (n_symbols, n_branches); raises ParameterError on bad shape or values."""
    m = N_BRANCHES[modulation]
    try:
        arr = np.asarray(z)
    except Exception as exc:  # pragma: no cover - numpy raises many types here
        raise ParameterError(
            f"z could not be read as an array ({exc}); pass a numpy array"
        ) from None
    if arr.dtype.kind not in "biufc":
        raise ParameterError(
            f"z has dtype {arr.dtype}; pass complex correlator outputs of shape (n_symbols, {m})"
        )
    if modulation == "ook" and arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[1] != m:
        raise ParameterError(
            f"z has shape {arr.shape} but {modulation} needs (n_symbols, {m}): one column per "
            f"correlator branch"
        )
    arr = arr.astype(np.complex128, copy=False)
    bad = ~np.isfinite(arr)
    if np.any(bad):
        raise ParameterError(
            f"z contains {int(bad.sum())} non-finite values (NaN or inf) in "
            f"{int(bad.any(axis=1).sum())} symbols; drop those symbols before fitting"
        )
    return arr


def _check_priors(priors: Sequence[float] | None, modulation: str) -> np.ndarray:
    h = N_HYPOTHESES[modulation]
    if priors is None:
        return np.full(h, 1.0 / h)
    p = np.asarray(priors, dtype=float).ravel()
    what = "(p_off, p_on)" if modulation == "ook" else f"one probability per tone ({h})"
    if p.shape != (h,) or not np.all(np.isfinite(p)) or np.any(p <= 0) or np.any(p >= 1):
        raise ParameterError(
            f"priors {list(np.round(p, 6))} are not valid for {modulation}; give {what}, each "
            f"strictly between 0 and 1"
        )
    if abs(p.sum() - 1.0) > 1e-6:
        raise ParameterError(f"priors {p.tolist()} sum to {p.sum():.6g}; they must sum to 1")
    return p / p.sum()


def _failed_fit(method: str, modulation: str, n: int, priors, message: str) -> NoncoherentFit:
    """A fit that could not be made: no estimate, the reason in ``message``."""
    return _build(
        method=method,
        modulation=modulation,
        n_symbols=n,
        esn0=None,
        log_gamma_var=None,
        amplitude=None,
        noise_var=None,
        priors=priors,
        converged=False,
        message=message,
        iterations=0,
        log_likelihood=None,
        detection_statistic=None,
        upper95_db=None,
        gof=None,
    )


def _no_energy(method: str, modulation: str, n: int, priors: np.ndarray) -> NoncoherentFit:
    return _failed_fit(
        method,
        modulation,
        n,
        priors,
        "z is zero in every symbol and branch: no signal and no noise to measure",
    )


# --------------------------------------------------------------------------------------------
# Batches of bursts: checks and preparation in a few numpy calls
# --------------------------------------------------------------------------------------------


def _burst_label(i: int, count: int) -> str:
    return f"burst {i}: " if count > 1 else ""


def _check_output_arrays(zs: Sequence[np.ndarray], modulation: str) -> list[np.ndarray]:
    """Every z as complex128 (n_b, M) (dtype and shape per burst, values checked together)."""
    m = N_BRANCHES[modulation]
    if isinstance(zs, np.ndarray) or not isinstance(zs, Sequence):
        raise ParameterError(
            f"zs is a {type(zs).__name__}; pass a list of (n_symbols, {m}) arrays, one per burst"
        )
    out = []
    for i, z in enumerate(zs):
        where = _burst_label(i, len(zs))
        try:
            arr = np.asarray(z)
        except Exception as exc:  # pragma: no cover - numpy raises many types here
            raise ParameterError(
                f"{where}z could not be read as an array ({exc}); pass a numpy array"
            ) from None
        if arr.dtype.kind not in "biufc":
            raise ParameterError(
                f"{where}z has dtype {arr.dtype}; pass complex correlator outputs of shape "
                f"(n_symbols, {m})"
            )
        if modulation == "ook" and arr.ndim == 1:
            arr = arr[:, None]
        if arr.ndim != 2 or arr.shape[1] != m:
            raise ParameterError(
                f"{where}z has shape {arr.shape} but {modulation} needs (n_symbols, {m}): one "
                f"column per correlator branch"
            )
        out.append(arr.astype(np.complex128, copy=False))
    return out


def _check_grams(grams, m: int, count: int) -> tuple[np.ndarray, np.ndarray]:
    """Gram matrices as complex (B, m, m) and whether each is the identity.

    ``grams`` is None, one (m, m) array for all bursts, or a sequence with one array (or None)
    per burst. The checks run on the stack (eigenvalues with one ``eigvalsh`` call).
    """
    if grams is None:
        return np.broadcast_to(np.eye(m, dtype=complex), (count, m, m)), np.ones(count, bool)
    if isinstance(grams, np.ndarray) and grams.ndim == 2:
        r, identity = _check_grams([grams], m, 1)
        return np.broadcast_to(r[0], (count, m, m)), np.full(count, identity[0])
    if len(grams) != count:
        raise ParameterError(
            f"grams has {len(grams)} entries for {count} bursts; pass one per burst, one shared "
            f"matrix, or None"
        )
    stack = np.empty((count, m, m), dtype=complex)
    for i, g in enumerate(grams):
        if g is None:
            stack[i] = np.eye(m)
            continue
        r = np.asarray(g)
        if r.dtype.kind not in "biufc" or r.shape != (m, m):
            raise ParameterError(
                f"{_burst_label(i, count)}gram has shape {r.shape} and dtype {r.dtype}; pass a "
                f"({m}, {m}) complex Hermitian matrix of template correlations (identity for "
                f"orthogonal tones)"
            )
        stack[i] = r
    where = _burst_label
    finite = np.isfinite(stack).all(axis=(1, 2))
    if not finite.all():
        i = int(np.argmin(finite))
        raise ParameterError(
            f"{where(i, count)}gram contains NaN or inf; pass finite template correlations"
        )
    herm = np.max(np.abs(stack - stack.conj().transpose(0, 2, 1)), axis=(1, 2)) > 1e-8
    if herm.any():
        i = int(np.argmax(herm))
        raise ParameterError(
            f"{where(i, count)}gram is not Hermitian (R[i, j] must equal conj(R[j, i])); "
            "rebuild it from the templates"
        )
    diag = np.real(np.diagonal(stack, axis1=1, axis2=2))
    off = np.max(np.abs(diag - 1.0), axis=1) > 1e-6
    if off.any():
        i = int(np.argmax(off))
        raise ParameterError(
            f"{where(i, count)}gram diagonal is {np.round(diag[i], 6).tolist()} but unit-energy "
            f"templates give 1; normalise the templates"
        )
    eig = np.linalg.eigvalsh(stack)
    with np.errstate(divide="ignore", invalid="ignore"):
        cond = np.where(eig[:, 0] > 0, eig[:, -1] / eig[:, 0], math.inf)
    bad = cond > MAX_GRAM_CONDITION
    if bad.any():
        i = int(np.argmax(bad))
        raise ParameterError(
            f"{where(i, count)}gram has condition number {cond[i]:.3g} (> "
            f"{MAX_GRAM_CONDITION:.0e}): the tones are too close to separate; check the tone "
            f"spacing or the symbol length"
        )
    identity = np.max(np.abs(stack - np.eye(m)), axis=(1, 2)) < 1e-12
    return stack, identity


def _check_gram(gram: np.ndarray | None, m: int) -> tuple[np.ndarray, bool]:
    """The Gram matrix as complex (m, m) and whether it is the identity."""
    if gram is None:
        return np.eye(m, dtype=complex), True
    r, identity = _check_grams([gram], m, 1)
    return r[0], bool(identity[0])


def _ook_grams(grams, count: int) -> None:
    items = [grams] if grams is None or isinstance(grams, np.ndarray) else list(grams)
    for i, g in enumerate(items):
        if g is not None and not np.allclose(np.asarray(g), 1.0):
            raise ParameterError(
                f"{_burst_label(i, len(items))}gram {np.asarray(g).tolist()} given for ook; ook "
                f"has one branch, so omit gram (or pass [[1]])"
            )
    return None


@dataclass(frozen=True)
class _Prepared:
    """The bursts that can be fitted, concatenated: scaled outputs, whitened energies.

    ``index`` maps them back to the caller's list; ``early`` holds the results of the others
    (too few symbols, all zero).
    """

    z: np.ndarray  # (N, M) complex, each burst divided by its own scale
    q: np.ndarray  # (N,) whitened energies zᴴR⁻¹z
    starts: np.ndarray  # (B,)
    n: np.ndarray  # (B,)
    scale: np.ndarray  # (B,)
    grams: np.ndarray  # (B, M, M)
    identity: np.ndarray  # (B,)
    index: np.ndarray  # (B,) position in the caller's list
    early: dict

    def segment_sums(self, v: np.ndarray) -> np.ndarray:
        return np.add.reduceat(v, self.starts, axis=0)


@dataclass(frozen=True)
class _Gathered:
    """Checked bursts, concatenated as given (before scaling): the part of the preparation
    that does not depend on which symbols a fit uses."""

    z: np.ndarray  # (N, M) complex128, the bursts of ``keep`` concatenated
    n: np.ndarray  # (B,) symbols of each kept burst
    keep: np.ndarray  # (B,) position in the caller's list
    grams: np.ndarray  # (count, M, M) of all bursts
    identity: np.ndarray  # (count,)
    n_all: np.ndarray  # (count,)
    count: int


def _gather(zs, grams, modulation: str) -> _Gathered:
    """Checks of all bursts (dtype, shape, Gram matrices, finite values) and concatenation."""
    arrs = _check_output_arrays(zs, modulation)
    count = len(arrs)
    m = N_BRANCHES[modulation]
    if modulation == "ook":
        _ook_grams(grams, count)
        grams = None
    r_all, id_all = _check_grams(grams, m, count)
    n_all = np.array([len(a) for a in arrs], dtype=np.intp)
    keep = np.flatnonzero(n_all >= MIN_SYMBOLS)
    n = n_all[keep]
    z = np.concatenate([arrs[i] for i in keep]) if keep.size else np.zeros((0, m), complex)
    _check_finite(z, np.cumsum(n) - n, keep, count)
    return _Gathered(z, n, keep, r_all, id_all, n_all, count)


def _prepare(zs, grams, modulation: str, method: str, priors: np.ndarray) -> _Prepared:
    """Checks of all bursts, then scaling and whitened energies in a few numpy calls."""
    return _scaled(_gather(zs, grams, modulation), modulation, method, priors)


def _scaled(g: _Gathered, modulation: str, method: str, priors: np.ndarray) -> _Prepared:
    """Scaling per burst and whitened energies of gathered bursts; too short / all-zero bursts
    get their early (failed) results."""
    m = N_BRANCHES[modulation]
    early = {}
    for i in np.flatnonzero(g.n_all < MIN_SYMBOLS):
        early[int(i)] = _too_few(method, modulation, int(g.n_all[i]), priors)
    keep, n, z = g.keep, g.n, g.z
    starts = np.cumsum(n) - n
    flat = z.view(np.float64).reshape(len(z), 2 * m)  # (re, im) columns
    if keep.size:
        scale = np.max(np.maximum.reduceat(np.abs(flat), starts, axis=0), axis=1)
    else:
        scale = np.zeros(0)
    zero = scale == 0.0
    if zero.any():
        for i in keep[zero]:
            early[int(i)] = _no_energy(method, modulation, int(g.n_all[i]), priors)
        rows = np.repeat(~zero, n)
        flat, keep, n, scale = flat[rows], keep[~zero], n[~zero], scale[~zero]
        starts = np.cumsum(n) - n
    flat = flat / np.repeat(scale, n)[:, None]
    z = flat.view(np.complex128)
    grams_k, identity = g.grams[keep], g.identity[keep]
    sq = flat * flat
    energy = sq[:, 0::2] + sq[:, 1::2]  # |z_j|²
    q = energy[:, 0].copy()
    for j in range(1, m):  # columns, not a reduction along the short axis (10x slower)
        q += energy[:, j]
    if not identity.all():
        # q_k = z_kᴴ R⁻¹ z_k with the Gram matrix of each symbol's burst (eq. 4), expanded
        # over the entries of the Hermitian R⁻¹: Σ_i c_ii|z_i|² + 2·Σ_{i<j} Re(c_ij·z̄_i·z_j)
        rinv = np.linalg.inv(grams_k)
        rinv[identity] = np.eye(m)
        qw = np.zeros(len(z))
        for i in range(m):  # M ≤ 4 branches: at most 10 terms, each vectorised over symbols
            qw += np.repeat(rinv[:, i, i].real, n) * energy[:, i]
            for j in range(i + 1, m):
                qw += 2.0 * (np.repeat(rinv[:, i, j], n) * (z[:, i].conj() * z[:, j])).real
        q = np.where(np.repeat(identity, n), q, np.maximum(qw, 0.0))
    return _Prepared(z, q, starts, n, scale, grams_k, identity, keep, early)


def _check_finite(z, starts, keep, count) -> None:
    bad = ~np.isfinite(z)
    if np.any(bad):
        row = int(np.flatnonzero(bad.any(axis=1))[0])
        b = int(np.searchsorted(starts, row, side="right") - 1)
        ends = np.r_[starts[1:], len(z)]
        part = bad[starts[b] : ends[b]]
        raise ParameterError(
            f"{_burst_label(int(keep[b]), count)}z contains {int(part.sum())} non-finite values "
            f"(NaN or inf) in {int(part.any(axis=1).sum())} symbols; drop those symbols before "
            f"fitting"
        )


def _log_normalisers(n: np.ndarray, m: int, grams: np.ndarray) -> np.ndarray:
    """−N·M·log π − N·log det R per burst: the constants left out of ℓ."""
    logdet = np.linalg.slogdet(grams)[1]
    return -n * m * math.log(math.pi) - n * logdet


def _assemble(count: int, prep: _Prepared, fits: list[NoncoherentFit]) -> list[NoncoherentFit]:
    out: list = [None] * count
    for i, f in prep.early.items():
        out[i] = f
    for i, f in zip(prep.index, fits, strict=True):
        out[int(i)] = f
    return out


# --------------------------------------------------------------------------------------------
# The likelihood and its maximisation, for a batch of bursts at once
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Batch:
    """The log-likelihoods of B bursts, ℓ_b = Σ_k [−M·log N0 − q_k/N0] + Σ_rows (signal term).

    The rows of all bursts are concatenated (burst b owns rows ``starts[b]:starts[b] +
    rows[b]``, never empty), so that one numpy call evaluates every burst and
    ``np.add.reduceat`` splits the sums. Two kinds of signal term:

    ``"tones"``: each row (a column of ``r``, stored hypothesis-major so that the sums over
    hypotheses run across contiguous rows) is one symbol with the signal on one of H
    hypotheses, log Σ_h π_h·Λ(r_hk), Λ(r) = exp(−A²/N0)·I0(2A·r/N0) (NDA FSK: H = M; DA:
    H = 1, one row per symbol that carries signal). ``"on-off"``: OOK NDA,
    log[(1 − p) + p·Λ(r_k)] per symbol.
    """

    kind: Literal["tones", "on-off"]
    r: np.ndarray  # (H, rows) envelopes |z| of the branch each hypothesis is matched to
    starts: np.ndarray  # (B,) first row of each burst
    rows: np.ndarray  # (B,) rows of each burst (≥ 1)
    log_prior: np.ndarray  # (H,) for "tones"
    q_sum: np.ndarray  # (B,) Σ_k q_k, the whitened energies
    n: np.ndarray  # (B,) symbols of each burst
    n_dims: int  # M, complex dimensions of z
    p_on: np.ndarray  # (B,) "on-off" with p_on fixed
    p_on_free: bool  # "on-off" with p_on a third parameter, logit(p_on)

    @property
    def size(self) -> int:
        return len(self.rows)

    @property
    def n_params(self) -> int:
        return 3 if self.p_on_free else 2

    def take(self, idx: np.ndarray) -> _Batch:
        """The bursts ``idx`` (increasing) as a batch of their own."""
        if len(idx) == self.size:
            return self
        rows = self.rows[idx]
        starts = np.cumsum(rows) - rows
        elem = np.repeat(self.starts[idx] - starts, rows) + np.arange(int(rows.sum()))
        return replace(
            self,
            r=self.r.take(elem, axis=1),  # C order (r[:, elem] would be F order: strided rows)
            starts=starts,
            rows=rows,
            q_sum=self.q_sum[idx],
            n=self.n[idx],
            p_on=self.p_on[idx],
        )


_BLOCK_VALUES = 32768  # envelopes per block: keeps the temporaries in cache (2-3x faster)


def _row_sums(batch: _Batch, u: np.ndarray, g: np.ndarray, p: np.ndarray, derivatives: bool):
    """Per-row terms of the signal part of ℓ and of the posterior moments, shape (K, rows).

    ``u`` = 2A·r/N0 (H, rows), ``g`` = A²/N0 and ``p`` = p_on per row. Rows: "tones" [log Σ_h
    π_h Λ, E_w ψ, Var_w ψ, E_w κ]; "on-off" [log(1 − p + pΛ), w, wψ, wκ, v, vψ, vψ²] with w the
    posterior of "on" and v = w(1 − w).
    """
    log_i0e_u, omr = _bessel_terms(u)
    lik = log_i0e_u
    lik += u
    lik -= g  # log Λ = −A²/N0 + log I0(u)  (eq. 3)
    if batch.kind == "on-off":
        lik = lik[0] + np.log(p)
        lse = np.logaddexp(np.log1p(-p), lik)  # log[(1 − p) + p·Λ]
        if not derivatives:
            return lse[None, :]
        w = np.exp(lik - lse)
        psi = u[0] * (1.0 - omr[0])
        kappa = u[0] * u[0] * omr[0] * (2.0 - omr[0])  # u²(1 − ρ²)
        v = w * (1.0 - w)
        vpsi = v * psi
        return np.stack([lse, w, w * psi, w * kappa, v, vpsi, vpsi * psi])
    if lik.shape[0] == 1:  # one hypothesis per row (DA): the posterior weight is 1
        if not derivatives:
            return lik
        u0, o0 = u[0], omr[0]
        out = np.empty((4, u0.size))
        out[0] = lik[0]
        np.subtract(1.0, o0, out=out[1])
        out[1] *= u0  # ψ = u·(1 − (1 − ρ))
        out[2] = 0.0
        np.multiply(u0, u0, out=out[3])
        out[3] *= o0
        np.subtract(2.0, o0, out=o0)
        out[3] *= o0  # κ = u²(1 − ρ)(1 + ρ)
        return out
    lik += batch.log_prior[:, None]
    if lik.shape[0] == 2:
        return _two_hypotheses(lik, u, omr, derivatives)
    top = lik.max(axis=0)
    e = np.exp(lik - top)
    tot = e.sum(axis=0)
    lse = top + np.log(tot)
    if not derivatives:
        return lse[None, :]
    e /= tot  # posterior weights w
    psi = 1.0 - omr
    psi *= u  # ψ = u·I1/I0
    wpsi = e * psi
    e_psi = wpsi.sum(axis=0)
    wpsi *= psi
    u *= u
    omr *= 2.0 - omr
    u *= omr  # κ = u²(1 − ρ²) = u²·(1 − ρ)·(1 + ρ)
    u *= e
    return np.stack([lse, e_psi, wpsi.sum(axis=0) - e_psi * e_psi, u.sum(axis=0)])


def _two_hypotheses(lik: np.ndarray, u: np.ndarray, omr: np.ndarray, derivatives: bool):
    """:func:`_row_sums` of 2-FSK NDA rows: the same four sums with one exp per symbol.

    With d = ℓ_0 − ℓ_1 and t = e^{−|d|}: log Σ = max(ℓ_0, ℓ_1) + log1p(t), the posterior of
    the likelier hypothesis 1/(1 + t), and over the two hypotheses E_w ψ = ψ_1 + w_0(ψ_0 − ψ_1),
    Var_w ψ = w_0·w_1·(ψ_0 − ψ_1)², E_w κ = κ_1 + w_0(κ_0 − κ_1).
    """
    out = np.empty((4 if derivatives else 1, lik.shape[1]))
    np.maximum(lik[0], lik[1], out=out[0])
    t = np.minimum(lik[0], lik[1])
    t -= out[0]  # −|d|: rounding is symmetric, so min − max is −|ℓ_0 − ℓ_1| to the bit
    np.exp(t, out=t)
    out[0] += np.log1p(t)
    if not derivatives:
        return out
    w0 = t
    w0 += 1.0
    np.divide(1.0, w0, out=w0)  # posterior of the likelier hypothesis
    w0 = np.where(lik[0] >= lik[1], w0, 1.0 - w0)
    psi = 1.0 - omr
    psi *= u  # ψ = u·I1/I0
    u *= u
    omr *= 2.0 - omr
    u *= omr  # κ = u²(1 − ρ²) = u²·(1 − ρ)·(1 + ρ)
    dpsi = psi[0] - psi[1]
    np.multiply(w0, dpsi, out=out[1])
    out[1] += psi[1]
    np.multiply(dpsi, dpsi, out=out[2])
    out[2] *= w0
    out[2] *= 1.0 - w0
    np.subtract(u[0], u[1], out=out[3])
    out[3] *= w0
    out[3] += u[1]
    return out


def _signal_sums(batch: _Batch, a_over: np.ndarray, g: np.ndarray, p: np.ndarray, derivatives):
    """Per-burst sums of :func:`_row_sums`, shape (B, K), in blocks of ~32 k envelopes.

    ``a_over`` = 2A/N0, ``g`` = A²/N0, ``p`` = p_on, one per burst. Each block's rows are cut
    at the burst starts inside it; one ``np.add.reduceat`` sums the pieces.
    """
    h, total = batch.r.shape
    k = (7 if batch.kind == "on-off" else 4) if derivatives else 1
    acc = np.zeros((batch.size, k))
    step = max(1, _BLOCK_VALUES // h)
    ends = batch.starts + batch.rows
    for i in range(0, total, step):  # blocks of thousands of symbols, not one per symbol
        j = min(i + step, total)
        b0 = int(np.searchsorted(ends, i, side="right"))  # first burst in the block
        b1 = int(np.searchsorted(batch.starts, j, side="left"))  # one past the last
        cuts = np.maximum(batch.starts[b0:b1], i) - i
        rows = np.minimum(ends[b0:b1], j) - i - cuts  # rows of each burst inside the block
        u = np.repeat(a_over[b0:b1], rows) * batch.r[:, i:j]
        gg = np.repeat(g[b0:b1], rows)
        pp = np.repeat(p[b0:b1], rows) if batch.kind == "on-off" else None
        acc[b0:b1] += np.add.reduceat(_row_sums(batch, u, gg, pp, derivatives), cuts, axis=1).T
    return acc


def _p_on(batch: _Batch, x: np.ndarray) -> np.ndarray:
    return special.expit(x[:, 2]) if batch.p_on_free else batch.p_on


def _evaluate(batch: _Batch, x: np.ndarray, derivatives: bool):
    """ℓ(x) per burst and, if asked, its gradient and Hessian in x = (log A, log N0[, logit p]).

    ``x`` has shape (B, P). With γ = A²/N0, u = 2A·r/N0, ρ = I1(u)/I0(u), ψ = uρ,
    κ = u²(1 − ρ²) (docs/estimator.md §4): ∂logΛ/∂logA = ψ − 2γ, ∂logΛ/∂logN0 = γ − ψ, since
    dψ/du = u(1 − ρ²), and the Hessian of a log-mixture is E_w[∂²] + Cov_w[∂] over the
    posterior weights w. Returns ll (B,), grad (B, P), hess (B, P, P).
    """
    alpha, beta = x[:, 0], x[:, 1]
    a, n0 = np.exp(alpha), np.exp(beta)
    g = a * a / n0
    p = _p_on(batch, x) if batch.kind == "on-off" else None
    acc = _signal_sums(batch, 2.0 * a / n0, g, p, derivatives)
    n, m, q_sum = batch.n, batch.n_dims, batch.q_sum
    ll = -n * m * beta - q_sum / n0 + acc[:, 0]  # Σ[−M·log N0 − q/N0] + signal part
    if not derivatives:
        return ll, None, None
    hess = np.empty((batch.size, batch.n_params, batch.n_params))
    if batch.kind == "tones":
        s_psi, var_psi, k_sum = acc[:, 1], acc[:, 2], acc[:, 3]
        gr = g * batch.rows
        grad = np.stack([s_psi - 2.0 * gr, -n * m + q_sum / n0 + gr - s_psi], axis=1)
        hess[:, 0, 0] = k_sum - 4.0 * gr + var_psi
        hess[:, 0, 1] = hess[:, 1, 0] = 2.0 * gr - k_sum - var_psi
        hess[:, 1, 1] = k_sum - gr + var_psi - q_sum / n0
        return ll, grad, hess
    sw, swp, swk, sv, svp, svpp = (acc[:, i] for i in range(1, 7))
    # d0 = ψ − 2γ, d1 = γ − ψ on "on"; Cov_w over the on/off indicator is v·d·dᵀ
    grad = [swp - 2.0 * g * sw, -n * m + q_sum / n0 + g * sw - swp]
    hess[:, 0, 0] = swk - 4.0 * g * sw + (svpp - 4.0 * g * svp + 4.0 * g * g * sv)
    hess[:, 0, 1] = hess[:, 1, 0] = 2.0 * g * sw - swk + (-svpp + 3.0 * g * svp - 2.0 * g * g * sv)
    hess[:, 1, 1] = swk - g * sw + (svpp - 2.0 * g * svp + g * g * sv) - q_sum / n0
    if batch.p_on_free:
        grad.append(sw - n * p)  # ∂log π_h/∂logit p = s_h − p
        hess[:, 0, 2] = hess[:, 2, 0] = svp - 2.0 * g * sv
        hess[:, 1, 2] = hess[:, 2, 1] = g * sv - svp
        hess[:, 2, 2] = sv - n * p * (1.0 - p)
    return ll, np.stack(grad, axis=1), hess


def _newton_steps(grad: np.ndarray, hess: np.ndarray) -> np.ndarray:
    """Ascent steps (B, P): Newton where −H is positive definite, else eigenvalue-modified."""
    if hess.shape[1] == 2:  # two parameters: the 2 x 2 case in closed form
        return _newton_steps_2(grad, hess)
    return _newton_steps_eigh(grad, hess)


def _newton_steps_eigh(grad: np.ndarray, hess: np.ndarray) -> np.ndarray:
    lam, vec = np.linalg.eigh(-hess)
    floor = 1e-8 * np.maximum(1.0, np.max(np.abs(lam), axis=1))
    lam = np.maximum(np.abs(lam), floor[:, None])
    step = np.einsum("bij,bj->bi", vec, np.einsum("bji,bj->bi", vec, grad) / lam)
    big = np.max(np.abs(step), axis=1)
    # never move A or N0 by more than e² in one step
    return step * np.where(big > 2.0, 2.0 / np.maximum(big, 2.0), 1.0)[:, None]


def _newton_steps_2(grad: np.ndarray, hess: np.ndarray) -> np.ndarray:
    """:func:`_newton_steps` for P = 2 without LAPACK: −H = [[a, b], [b, c]] has eigenvalues
    (a + c)/2 ± √(((a − c)/2)² + b²); where both exceed the floor the step is Cramer's
    (−H)⁻¹g, the other bursts (rare: indefinite or nearly singular) go through eigh."""
    h00, h01, h11 = hess[:, 0, 0], hess[:, 0, 1], hess[:, 1, 1]
    half = 0.5 * (h11 - h00)  # (a − c)/2
    root = np.sqrt(half * half + h01 * h01)
    mean = -0.5 * (h00 + h11)  # (a + c)/2
    lo = mean - root
    # where lo > 0 the larger |eigenvalue| is mean + root: the floor 1e-8·max(1, |λ|)
    ok = lo > 1e-8 * np.maximum(1.0, mean + root)
    det = h00 * h11 - h01 * h01  # = det(−H)
    ok &= det > 0.0
    g0, g1 = grad[:, 0], grad[:, 1]
    step = np.empty_like(grad)
    np.multiply(h01, g1, out=step[:, 0])
    step[:, 0] -= h11 * g0  # c·g0 − b·g1 with a = −h00, b = −h01, c = −h11
    np.multiply(h01, g0, out=step[:, 1])
    step[:, 1] -= h00 * g1  # a·g1 − b·g0
    step /= det[:, None]
    big = np.max(np.abs(step), axis=1)
    # never move A or N0 by more than e² in one step
    step *= np.where(big > 2.0, 2.0 / np.maximum(big, 2.0), 1.0)[:, None]
    if not ok.all():
        odd = np.flatnonzero(~ok)
        step[odd] = _newton_steps_eigh(grad[odd], hess[odd])
    return step


#: Stop codes of :func:`_maximise`.
_CONVERGED, _LINE_SEARCH, _BOUNDARY, _NO_CONVERGENCE = 0, 1, 2, 3
_STOP_MESSAGES = {
    _CONVERGED: "converged",
    _LINE_SEARCH: "line search failed to increase the likelihood",
    _BOUNDARY: "the likelihood is largest at A = 0 (no signal)",
    _NO_CONVERGENCE: f"no convergence in {_MAX_NEWTON} Newton iterations",
}


@dataclass(frozen=True)
class _Optimum:
    """Newton results per burst: arrays with a leading burst axis."""

    x: np.ndarray
    ll: np.ndarray
    grad: np.ndarray
    hess: np.ndarray
    iterations: np.ndarray
    converged: np.ndarray
    stop: np.ndarray  # one of the stop codes

    @property
    def boundary(self) -> np.ndarray:
        return self.stop == _BOUNDARY


def _log_gamma(x: np.ndarray) -> np.ndarray:
    """log(A²/N0) from x = (log A, log N0, ...) per burst."""
    return 2.0 * x[:, 0] - x[:, 1]


def _maximise(batch: _Batch, x0: np.ndarray, tol: float = _NEWTON_TOL) -> _Optimum:
    """Damped Newton ascent with backtracking for all bursts at once; stops at A → 0.

    Bursts iterate together; one that has stopped keeps its values, the others go on until
    all have stopped or the iteration cap is reached. The line search halves the step of each
    burst whose likelihood did not rise enough and re-evaluates only those.
    """
    b = batch.size
    x = np.array(x0, dtype=float)
    ll, grad, hess = _evaluate(batch, x, True)
    iterations = np.full(b, _MAX_NEWTON)
    stop = np.full(b, _NO_CONVERGENCE)
    converged = np.zeros(b, dtype=bool)
    active = np.arange(b)
    for it in range(_MAX_NEWTON):
        step = _newton_steps(grad[active], hess[active])
        decrement = np.sum(grad[active] * step, axis=1)
        done = decrement < tol
        iterations[active[done]] = it
        stop[active[done]] = _CONVERGED
        converged[active[done]] = True
        active, step, decrement = active[~done], step[~done], decrement[~done]
        t = np.ones(len(active))
        pending = np.arange(len(active))  # positions in `active` still searching
        while pending.size:
            idx = active[pending]
            x_new = x[idx] + t[pending, None] * step[pending]
            ll_new, g_new, h_new = _evaluate(batch.take(idx), x_new, True)
            ok = np.isfinite(ll_new) & (ll_new >= ll[idx] + 1e-4 * t[pending] * decrement[pending])
            acc = idx[ok]
            x[acc], ll[acc], grad[acc], hess[acc] = x_new[ok], ll_new[ok], g_new[ok], h_new[ok]
            pending = pending[~ok]
            t[pending] *= 0.5
            failed = t[pending] < 1e-8
            gone = active[pending[failed]]
            iterations[gone] = it
            stop[gone] = _LINE_SEARCH
            converged[gone] = decrement[pending[failed]] < 1e-6
            pending = pending[~failed]
        still = stop[active] == _NO_CONVERGENCE
        active = active[still]
        at_zero = _log_gamma(x[active]) < _LOG_GAMMA_FLOOR
        iterations[active[at_zero]] = it + 1
        stop[active[at_zero]] = _BOUNDARY
        active = active[~at_zero]
        if not active.size:
            break
    return _Optimum(x, ll, grad, hess, iterations, converged, stop)


#: Below this Es/N0 [dB] the interval is the profile-likelihood one (the Wald one above).
PROFILE_CI_BELOW_DB = 6.0


def _profile(batch: _Batch, log_gamma_on: np.ndarray, beta0: np.ndarray):
    """max over log N0 of ℓ with γ_on = A²/N0 held fixed (p_on fixed), per burst.

    Returns (ℓ_p, log N0, dℓ_p/dlog γ, dlog N0/dlog γ) at the profile point: by the envelope
    theorem the slope of ℓ_p is ∂ℓ/∂log γ there, and the implicit-function theorem gives the
    path of the profiled log N0 (a warm start for the next point).
    """
    lg = np.asarray(log_gamma_on, dtype=float)
    beta = np.array(beta0, dtype=float)

    def at(bsel: _Batch, lgs: np.ndarray, b: np.ndarray):
        x = np.stack([(lgs + b) / 2.0, b], axis=1)  # log A = (log γ + log N0)/2
        ll, g, h = _evaluate(bsel, x, True)
        # chain rule to (log γ, log N0)
        d_b = 0.5 * g[:, 0] + g[:, 1]
        h_bb = 0.25 * h[:, 0, 0] + h[:, 0, 1] + h[:, 1, 1]
        h_gb = 0.25 * h[:, 0, 0] + 0.5 * h[:, 0, 1]
        return ll, d_b, h_bb, 0.5 * g[:, 0], h_gb

    ll, g, h, slope, h_gb = at(batch, lg, beta)
    active = np.arange(batch.size)
    for _ in range(50):
        gs, hs = g[active], h[active]
        step = np.where(hs < 0, -gs / np.where(hs < 0, hs, -1.0), np.copysign(0.5, gs))
        step = np.clip(step, -2.0, 2.0)
        keep = np.abs(step * gs) >= _NEWTON_TOL
        active, step = active[keep], step[keep]
        if not active.size:
            break
        t = np.ones(len(active))
        pending = np.arange(len(active))
        moved = np.zeros(len(active), dtype=bool)
        while pending.size:
            idx = active[pending]
            b_new = beta[idx] + t[pending] * step[pending]
            out = at(batch.take(idx), lg[idx], b_new)
            ok = out[0] >= ll[idx]
            acc = idx[ok]
            beta[acc] = b_new[ok]
            ll[acc], g[acc], h[acc], slope[acc], h_gb[acc] = (o[ok] for o in out)
            moved[pending[ok]] = True
            pending = pending[~ok]
            t[pending] *= 0.5
            pending = pending[t[pending] > 1e-8]
        active = active[moved]
    dbeta = np.where(h < 0, -h_gb / np.where(h < 0, h, -1.0), 0.0)
    return ll, beta, slope, dbeta


def _profile_roots(
    batch: _Batch,
    target: np.ndarray,
    inner: np.ndarray,
    inner_beta: np.ndarray,
    inner_dbeta: np.ndarray,
    sign: float,
    step: np.ndarray,
    growth: float,
    max_steps: int,
    xtol: float,
) -> np.ndarray:
    """log γ where the profile log-likelihood falls to ``target``, outward from ``inner``.

    ℓ_p(inner) > target is given. Safeguarded Newton on ℓ_p(log γ) − target with its exact
    slope (see :func:`_profile`): a Newton step is taken when it stays inside the bracket
    found so far, else the bracket is bisected, or, before an outer point is found, the trial
    moves out by ``step`` (times ``growth`` each time). NaN where no outer point lies within
    ``max_steps`` such moves (the end cannot be bracketed) or the search does not settle.
    """
    k = batch.size
    lo_in = inner.astype(float).copy()
    out = np.full(k, math.nan)
    step = step.astype(float).copy()
    reach = lo_in + sign * step
    n_moves = np.ones(k, dtype=int)
    trial = reach.copy()
    beta = inner_beta + inner_dbeta * (trial - lo_in)
    root = np.full(k, math.nan)
    active = np.arange(k)
    for _ in range(60):
        if not active.size:
            break
        ll, b_hat, slope, dbeta = _profile(batch.take(active), trial[active], beta[active])
        f = ll - target[active]
        c = trial[active]
        inside = f > 0
        lo_in[active[inside]] = c[inside]
        out[active[~inside]] = c[~inside]
        with np.errstate(divide="ignore", invalid="ignore"):
            newton = c - f / slope
        good_slope = sign * slope < 0
        newton_step = np.abs(newton - c)
        have_out = np.isfinite(out[active])
        lo, hi = np.minimum(lo_in[active], out[active]), np.maximum(lo_in[active], out[active])
        in_bracket = np.where(have_out, (newton > lo) & (newton < hi), sign * (newton - c) > 0)
        in_bracket &= good_slope & np.isfinite(newton)
        width = np.where(have_out, np.abs(out[active] - lo_in[active]), math.inf)
        done = (in_bracket & (newton_step < xtol)) | (width < xtol)
        root[active[done]] = np.where(in_bracket[done], newton[done], c[done])
        # next trial
        nxt = np.where(in_bracket, newton, 0.5 * (lo_in[active] + out[active]))
        # before an outer point is known, a trial never goes beyond the next outward move
        beyond = sign * (newton - reach[active]) > 0
        grow = ~have_out & (~in_bracket | beyond)
        sel = active[grow]
        step[sel] *= growth
        reach[sel] += sign * step[sel]
        n_moves[sel] += 1
        nxt[grow] = np.where(
            in_bracket[grow] & ~(sign * (newton[grow] - reach[sel]) > 0), newton[grow], reach[sel]
        )
        beta[active] = b_hat + dbeta * (nxt - c)
        trial[active] = nxt
        lost = n_moves[active] > max_steps
        active = active[~done & ~lost]
    return root


# --------------------------------------------------------------------------------------------
# Decision-directed moments (also the starting point of the ML fits)
# --------------------------------------------------------------------------------------------


def ook_decision_threshold(amplitude: float, noise_var: float, p_on: float = 0.5) -> float:
    """Envelope threshold |z| that minimises the OOK error probability of the fitted model.

    Parameters
    ----------
    amplitude : float
        A, the "on" amplitude at the correlator output (same units as |z|).
    noise_var : float
        N0 = E|n|² at the correlator output.
    p_on : float
        Prior probability of "on", 0 < p_on < 1.

    Returns
    -------
    float
        r_t: decide "on" where |z| > r_t. 0 when "on" always wins.

    Notes
    -----
    The weighted likelihoods cross where p·e^{−A²/N0}·I0(2A·r/N0) = 1 − p (eq. 1). Solved in
    the log domain, log I0(u) = A²/N0 + log((1−p)/p), u = 2A·r/N0, with Brent's method. With
    σ² = N0/2 per dimension this is b = r/σ of [1] (optimum b: 10 dB → 3.55271, METHODS §1).

    References
    ----------
    .. [1] A. Annamalai, V. K. Bhargava, IEEE Trans. Commun. 47(9):1293, 1999.
    """
    a = float(amplitude)
    n0 = float(noise_var)
    p = float(p_on)
    if not (math.isfinite(a) and a > 0):
        raise ParameterError(f"amplitude {amplitude!r} must be a positive finite number")
    if not (math.isfinite(n0) and n0 > 0):
        raise ParameterError(f"noise_var {noise_var!r} must be a positive finite number")
    if not (0.0 < p < 1.0):
        raise ParameterError(f"p_on {p_on!r} must lie strictly between 0 and 1")
    c = a * a / n0 + math.log((1.0 - p) / p)  # eq. 1 in the log domain
    if c <= 0.0:
        return 0.0

    def f(u: float) -> float:
        return float(_log_i0(np.array([u]))[0]) - c

    hi = c + 0.5 * math.log(2.0 * math.pi * (c + 1.0)) + 2.0  # log I0(u) > u − ½log(2πu) − …
    while f(hi) < 0.0:
        hi *= 2.0
    u = optimize.brentq(f, 0.0, hi, xtol=1e-14, rtol=1e-14)
    return u * n0 / (2.0 * a)


def _dd_fsk(z: np.ndarray, q: np.ndarray) -> tuple[float, float, np.ndarray]:
    """DD moments: (A², N0, decisions). E|z_î|² = A² + N0, E[q] = M·N0 + A² (correct decisions)."""
    m = z.shape[1]
    energy = z.real**2 + z.imag**2
    sym = np.argmax(energy, axis=1)
    m1 = float(np.mean(energy[np.arange(len(sym)), sym]))
    n0 = (float(np.mean(q)) - m1) / (m - 1)
    return m1 - n0, n0, sym


def _dd_ook(z: np.ndarray, max_rounds: int = 50) -> tuple[float, float, float, np.ndarray, int]:
    """Hard-decision rounds: split energies at the model's optimum threshold, re-estimate.

    Returns (A², N0, p_on, decisions, rounds); A² is NaN when the split degenerates.
    """
    x = z[:, 0].real ** 2 + z[:, 0].imag ** 2
    thr = float(np.mean(x))
    on = x > thr
    a2 = n0 = p = math.nan
    for k in range(1, max_rounds + 1):
        if on.all() or not on.any():
            return math.nan, math.nan, math.nan, on.astype(int), k
        n0 = float(np.mean(x[~on]))
        a2 = float(np.mean(x[on])) - n0
        p = float(np.mean(on))
        if not a2 > 0:
            return math.nan, n0, p, on.astype(int), k
        thr = ook_decision_threshold(math.sqrt(a2), n0, p) ** 2
        new_on = x > thr
        if np.array_equal(new_on, on):
            return a2, n0, p, on.astype(int), k
        on = new_on
    return a2, n0, p, on.astype(int), max_rounds


# --------------------------------------------------------------------------------------------
# Energy laws and the goodness-of-fit test
# --------------------------------------------------------------------------------------------


def _noncentrality(amplitude: float, noise_var: float, gram: np.ndarray, modulation: str):
    """λ[h, j] = 2A²|R_j,b(h)|²·s_h/N0 for hypothesis h and branch j (eq. 6), and s_h."""
    g = amplitude * amplitude / noise_var
    if modulation == "ook":
        return np.array([[0.0], [2.0 * g]])
    return 2.0 * g * np.abs(gram.T) ** 2  # row h = tone sent, column j = branch


#: Below this noncentrality the chi-square CDF is taken from two terms of its Poisson series.
_SMALL_NONCENTRALITY = 1e-4


def _chi2_2_cdf(y: np.ndarray, lam: float) -> np.ndarray:
    """CDF of the (non)central chi-square with 2 degrees of freedom at y.

    F(y; 2, λ) = Σ_j e^{−λ/2}(λ/2)^j/j!·P(j + 1, y/2), P the regularised lower incomplete
    gamma function (the Poisson mixture of central laws, Johnson, Kotz & Balakrishnan,
    Continuous Univariate Distributions vol. 2, 2nd ed., §29.4 [mem]). For λ below 1e-4 (the
    cross branches of orthogonal tones) two terms are kept: the terms decrease, so the
    remainder is below (λ/2)²/2 < 1.3e-9 (λ = 0 is exact); chndtr costs 3× as much there.
    """
    x = 0.5 * y
    if lam <= 0.0:
        return -np.expm1(-x)
    if lam < _SMALL_NONCENTRALITY:
        p1 = -np.expm1(-x)  # P(1, x)
        p2 = p1 - x * np.exp(-x)  # P(2, x) = P(1, x) − x·e^{−x}
        return math.exp(-0.5 * lam) * (p1 + (0.5 * lam) * p2)
    # The ufunc under scipy.stats.ncx2.cdf, without the distribution wrapper's overhead.
    return special.chndtr(y, 2.0, lam)


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
    gram : ndarray, shape (n_branches, n_branches), optional
        Template Gram matrix; identity if omitted.
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
    The marginal is F_j(x) = Σ_h π_h F(x; λ_hj) (docs/estimator.md eq. 6).

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
    r, _ = _check_gram(gram if modulation != "ook" else None, m)
    pi = _check_priors(priors, modulation)
    lam = _noncentrality(amplitude, noise_var, r, modulation)
    y = x / (0.5 * noise_var)
    out = np.zeros_like(y)
    for j in range(m):  # loop over branches and hypotheses (≤ 4 × 4), vectorised over symbols
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


#: The GOF's table of F(y; 2, λ) (see :func:`_ncx2_table`): edges of its intervals in a = √λ,
#: its window in t = √y − √λ, cells and polynomial degrees (max. error 3e-12, tests/test_fit.py).
_NCX2_A_EDGES = (24.0, 20.0, 17.0, 14.5, 12.0, 10.0, 9.0, 8.0, 7.0, 6.0, 5.0, 4.0, 3.0, 2.5, 2.0)
_NCX2_T_LO, _NCX2_T_HI, _NCX2_T_CELLS = -8.5, 7.5, 32
_NCX2_A_DEGREE, _NCX2_T_DEGREE = 12, 9
_NCX2_LAM_MIN, _NCX2_LAM_MAX = _NCX2_A_EDGES[-1] ** 2, _NCX2_A_EDGES[0] ** 2
_SQRT_72 = math.sqrt(72.0)


def _ncx2_cdf_by_quadrature(a: np.ndarray, t: np.ndarray) -> np.ndarray:
    """F(y; 2, λ) at every a = √λ (shape (A,)) and b = a + t (t shape (T,)): shape (A, T).

    F = 1 − Q1(a, |b|) = ∫_0^|b| r·e^{−(r² + a²)/2}·I0(a·r) dr, the Rice distribution function
    (Marcum's definition of Q1, e.g. Proakis & Salehi, Digital Communications, 5th ed., §2.3
    [mem]), is accumulated over the gaps between the sorted |b| of each a from F(0) = 0, with
    3-point Gauss–Legendre on each gap (Abramowitz & Stegun 25.4.29) and e^{−(r − a)²/2}·
    i0e(a·r) written as one exponential (log i0e from :func:`_bessel_terms`). Gaps are short
    (< 0.1 where the density is not negligible): 2.5e-13 from chndtr on the table's nodes.
    """
    out = np.empty((len(a), len(t)))
    rows = max(1, _BLOCK_VALUES // (3 * len(t)))
    for i in range(0, len(a), rows):  # ~6 blocks of rows: ~32 k nodes each, kept in cache
        out[i : i + rows] = _rice_cdf_rows(a[i : i + rows], t)
    return out


def _rice_cdf_rows(a: np.ndarray, t: np.ndarray) -> np.ndarray:
    """:func:`_ncx2_cdf_by_quadrature` of a few rows a at once."""
    b = np.abs(a[:, None] + t)
    order = np.argsort(b, axis=1)
    hi = np.take_along_axis(b, order, axis=1)
    lo = np.concatenate([np.zeros((len(a), 1)), hi[:, :-1]], axis=1)
    half = 0.5 * (hi - lo)
    xg, wg = np.polynomial.legendre.leggauss(3)
    r = (0.5 * (hi + lo))[..., None] + half[..., None] * xg
    log_i0e, _ = _bessel_terms(a[:, None, None] * r)
    q = r - a[:, None, None]
    dens = r * np.exp(log_i0e - 0.5 * q * q)
    f_sorted = np.cumsum(half * (dens @ wg), axis=1)
    out = np.empty_like(f_sorted)
    np.put_along_axis(out, order, f_sorted, axis=1)
    return out


@functools.lru_cache(maxsize=1)
def _ncx2_table() -> tuple[np.ndarray, np.ndarray]:
    """Interpolation table of F(y; 2, λ) = 1 − Q1(a, b), a = √λ, b = √y, over (u = 1/a, t = b − a).

    Returns the interval edges in u (ascending) and the coefficients, shape (intervals,
    A_DEGREE + 1, T_CELLS·(T_DEGREE + 1)): Chebyshev in the local u of the interval, and for
    every t cell monomial in its local t (lowest first). Built on first use (not at import)
    from F at the tensor Chebyshev points of the first kind of every interval × cell (58 240
    values by :func:`_ncx2_cdf_by_quadrature`, ~15 ms). For fixed t the law tends to a smooth
    limit as a → ∞ (F → Φ(t)), so it is smooth in u; in t it is a smoothed step of unit width.
    Cells reaching below b = 0 (small a) see F's even continuation in b, smooth too.
    """
    a_edges = np.asarray(_NCX2_A_EDGES)
    u_edges = 1.0 / a_edges  # ascending
    d, k, n_t = _NCX2_A_DEGREE, _NCX2_T_DEGREE, _NCX2_T_CELLS
    xu = np.cos(np.pi * (np.arange(d + 1) + 0.5) / (d + 1))  # Chebyshev points, first kind
    xt = np.cos(np.pi * (np.arange(k + 1) + 0.5) / (k + 1))
    lo, hi = u_edges[:-1, None], u_edges[1:, None]
    a = 1.0 / (0.5 * (lo + hi) + 0.5 * (hi - lo) * xu)  # (intervals, d + 1)
    t_edges = np.linspace(_NCX2_T_LO, _NCX2_T_HI, n_t + 1)
    tl, th = t_edges[:-1, None], t_edges[1:, None]
    t = 0.5 * (tl + th) + 0.5 * (th - tl) * xt  # (cells, k + 1)
    f = _ncx2_cdf_by_quadrature(a.ravel(), t.ravel()).reshape(a.shape + t.shape)
    cheb = np.polynomial.chebyshev
    to_u = np.linalg.inv(cheb.chebvander(xu, d))  # node values -> Chebyshev coefficients
    to_cheb_t = np.linalg.inv(cheb.chebvander(xt, k))
    to_power = np.zeros((k + 1, k + 1))  # column j: T_j in the monomial basis
    for j in range(k + 1):
        to_power[: j + 1, j] = cheb.cheb2poly(np.eye(j + 1)[j])
    to_t = to_power @ to_cheb_t  # node values -> monomial coefficients in the local t
    coef = np.einsum("dj,ijcl,pl->idcp", to_u, f, to_t, optimize=True)
    return u_edges, np.ascontiguousarray(coef.reshape(len(u_edges) - 1, d + 1, n_t * (k + 1)))


def _ncx2_cdf_pairs(lam: np.ndarray) -> np.ndarray:
    """Per noncentrality (shape (P,), each in the table's range) its polynomials in t.

    Returns shape (P·T_CELLS, T_DEGREE + 1): row p·T_CELLS + c holds the monomial
    coefficients (lowest first) of F in the local t of cell c at λ_p, i.e. the table's
    Chebyshev series in u summed once per noncentrality (a loop over the ≤ 14 intervals).
    """
    u_edges, coef = _ncx2_table()
    u = 1.0 / np.sqrt(lam)
    i = np.clip(np.searchsorted(u_edges, u, side="right") - 1, 0, len(u_edges) - 2)
    v = (2.0 * u - u_edges[i] - u_edges[i + 1]) / (u_edges[i + 1] - u_edges[i])
    tu = np.polynomial.chebyshev.chebvander(v, _NCX2_A_DEGREE)  # (P, A_DEGREE + 1)
    out = np.empty((len(lam), coef.shape[2]))
    for j in np.unique(i):  # table intervals present (≤ 14), vectorised over noncentralities
        sel = i == j
        out[sel] = tu[sel] @ coef[j]
    return out.reshape(len(lam) * _NCX2_T_CELLS, _NCX2_T_DEGREE + 1)


def _ncx2_cdf_from_pairs(
    y: np.ndarray, root_lam: np.ndarray, slot: np.ndarray, pairs: np.ndarray
) -> np.ndarray:
    """F(y; 2, λ) from :func:`_ncx2_cdf_pairs` rows: value i uses noncentrality ``slot[i]``.

    Absolute error below 1e-11 against scipy.special.chndtr for λ in [4, 576] and all y ≥ 0
    (tests/test_fit.py). Below the table's window F is 0 (Rayleigh-tail bound, see
    :func:`_chi2_2_cdf_rows`, < 2.3e-16); above it (t > 7.5) F is 1: for b > a, Q1(a, b) ≤
    e^{−(b − a)²/2} < 6.7e-13 (the Chernoff-type bound of M. K. Simon, M.-S. Alouini, Digital
    Communication over Fading Channels, 2nd ed., Wiley 2005, §4.2.3 [mem]).
    """
    gap = root_lam - np.sqrt(y)  # −t
    s = (-gap - _NCX2_T_LO) * (_NCX2_T_CELLS / (_NCX2_T_HI - _NCX2_T_LO))
    cell = s.astype(np.intp)
    np.clip(cell, 0, _NCX2_T_CELLS - 1, out=cell)
    w = 2.0 * (s - cell) - 1.0  # local t in [−1, 1]
    c = pairs.take(slot * _NCX2_T_CELLS + cell, axis=0)  # (n, T_DEGREE + 1)
    f = c[:, -1].copy()
    for j in range(_NCX2_T_DEGREE - 1, -1, -1):  # Horner (10 coefficients)
        f *= w
        f += c[:, j]
    np.putmask(f, gap >= _SQRT_72, 0.0)  # (√λ − √y)² ≥ 72, as in _chi2_2_cdf_rows
    np.putmask(f, gap < -_NCX2_T_HI, 1.0)
    return f


def _near_central_terms(y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """P(1, y/2) and P(2, y/2), the regularised lower incomplete gamma functions.

    P(1, x) = 1 − e^{−x}; P(2, x) = P(1, x) − x·e^{−x} with e^{−x} = 1 − P(1, x).
    """
    x = 0.5 * y
    p1 = -np.expm1(-x)
    return p1, p1 - x * (1.0 - p1)


def _near_central_factors(lam: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(e^{−λ/2}, λ/2) of the two-term series F ≈ e^{−λ/2}·(P(1, x) + (λ/2)·P(2, x)).

    Used for λ < 1e-4 (see :func:`_chi2_2_cdf`); λ = 0 gives (1, 0), i.e. F = P(1, x) exactly.
    """
    half = 0.5 * lam
    return np.exp(-half), half


def _ncx2_cdf_direct(y: np.ndarray, lam: np.ndarray) -> np.ndarray:
    """F(y; 2, λ) by scipy.special.chndtr (λ ≥ 1e-4), 0 far below the law's bulk.

    Far below the noncentral law's bulk F is below 2.3e-16 and taken as 0: with z = s + n,
    |z|² ≤ y needs |n| ≥ √λ − √y (per-dimension unit variance here), and P(|n| ≥ c) =
    e^{−c²/2} (Rayleigh tail), so F(y; 2, λ) ≤ e^{−(√λ − √y)²/2} < e^{−36}.
    """
    out = np.zeros_like(y)
    gap = np.sqrt(lam) - np.sqrt(y)
    near = (gap < 0.0) | (gap * gap < 72.0)
    out[near] = special.chndtr(y[near], 2.0, lam[near])
    return out


def _chi2_2_cdf_rows(
    y: np.ndarray,
    lam: np.ndarray,
    slot: np.ndarray | None = None,
    pairs: np.ndarray | None = None,
) -> np.ndarray:
    """:func:`_chi2_2_cdf` with one noncentrality per value (the same three regimes).

    With ``slot`` and ``pairs`` (from :func:`_ncx2_cdf_pairs`), values whose ``slot`` is ≥ 0
    are taken from the table instead of chndtr (absolute error < 1e-11).
    """
    out = np.empty_like(y)
    small = lam < _SMALL_NONCENTRALITY  # λ = 0 included: factors (1, 0)
    if small.any():
        p1, p2 = _near_central_terms(y[small])
        c0, c1 = _near_central_factors(lam[small])
        out[small] = c0 * (p1 + c1 * p2)
    big = ~small
    if slot is not None:
        tab = slot >= 0
        if tab.any():
            out[tab] = _ncx2_cdf_from_pairs(y[tab], np.sqrt(lam[tab]), slot[tab], pairs)
            big &= ~tab
    if big.any():
        out[big] = _ncx2_cdf_direct(y[big], lam[big])
    return out


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
        As :func:`branch_energy_cdf`.
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
        r, _ = _check_gram(gram if modulation != "ook" else None, m)
        pi = _check_priors(priors, modulation)
        lam = _noncentrality(amplitude, noise_var, r, modulation)
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


def _take_prepared(prep: _Prepared, idx: np.ndarray) -> _Prepared:
    """The bursts ``idx`` (increasing) of a preparation."""
    if len(idx) == len(prep.n):
        return prep
    n = prep.n[idx]
    rows = np.repeat(prep.starts[idx] - (np.cumsum(n) - n), n) + np.arange(int(n.sum()))
    return replace(
        prep,
        z=prep.z[rows],
        q=prep.q[rows],
        starts=np.cumsum(n) - n,
        n=n,
        scale=prep.scale[idx],
        grams=prep.grams[idx],
        identity=prep.identity[idx],
        index=prep.index[idx],
    )


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
        else:
            lam = 2.0 * g[:, None, None] * np.abs(prep.grams.transpose(0, 2, 1)) ** 2  # eq. 6
        y = (z.real**2 + z.imag**2) / np.repeat(0.5 * noise_var, n)[:, None]
        d, p = _ks_marginal_many(y, starts, n, lam, priors)
        stat = d.max(axis=1)
        pval = np.minimum(1.0, m * p.min(axis=1))  # Bonferroni over branches
        return [(float(a), float(b), int(k) * m) for a, b, k in zip(stat, pval, n, strict=True)]
    ends = prep.starts + prep.n
    return [
        check_energy_laws(
            prep.z[s:e],
            amplitude=float(amplitude[i]),
            noise_var=float(noise_var[i]),
            gram=None if modulation == "ook" else prep.grams[i],
            modulation=modulation,
            priors=priors[i],
            symbols=None if symbols is None else symbols[s:e],
            max_values=max_values,
        )
        for i, (s, e) in enumerate(zip(prep.starts, ends, strict=True))
    ]


# --------------------------------------------------------------------------------------------
# Assembling a result
# --------------------------------------------------------------------------------------------


def _db(x: float) -> float:
    return 10.0 * math.log10(x) if x > 0 and math.isfinite(x) else math.nan


def _build(
    *,
    method: str,
    modulation: str,
    n_symbols: int,
    esn0: float | None,
    log_gamma_var: float | None,
    amplitude: float | None,
    noise_var: float | None,
    priors: np.ndarray,
    converged: bool,
    message: str,
    iterations: int,
    log_likelihood: float | None,
    detection_statistic: float | None,
    upper95_db: float | None,
    gof: tuple[float, float, int] | None,
    profile_ci_db: tuple[float, float] | None = None,
) -> NoncoherentFit:
    esn0 = _finite_or_none(esn0)
    esn0_db = _finite_or_none(_db(esn0)) if esn0 is not None else None
    ci = None
    ci_method = "none"
    if esn0_db is not None and profile_ci_db is not None:
        ci, ci_method = profile_ci_db, "profile-likelihood"
    elif esn0_db is not None and log_gamma_var is not None and log_gamma_var > 0:
        half = _Z975 * math.sqrt(log_gamma_var) * 10.0 / math.log(10.0)  # dB per neper
        ci, ci_method = (esn0_db - half, esn0_db + half), "wald-log-observed-info"
    shift = 10.0 * math.log10(BITS_PER_SYMBOL[modulation])
    return NoncoherentFit(
        method=method,
        modulation=modulation,
        esn0=esn0,
        esn0_db=esn0_db,
        esn0_db_ci95=ci,
        esn0_db_upper95=_finite_or_none(upper95_db),
        ebn0_db=None if esn0_db is None else esn0_db - shift,
        ebn0_db_ci95=None if ci is None else (ci[0] - shift, ci[1] - shift),
        amplitude=_finite_or_none(amplitude),
        noise_var=_finite_or_none(noise_var),
        priors=tuple(float(p) for p in priors),
        n_symbols=int(n_symbols),
        converged=bool(converged),
        message=message,
        iterations=int(iterations),
        log_likelihood=_finite_or_none(log_likelihood),
        detection_statistic=_finite_or_none(detection_statistic),
        ci_method=ci_method,
        gof_statistic=None if gof is None else _finite_or_none(gof[0]),
        gof_pvalue=None if gof is None else _finite_or_none(gof[1]),
        gof_test="ks-pit-branchwise" if gof is not None else "none",
        gof_n_values=0 if gof is None else int(gof[2]),
    )


def _too_few(method: str, modulation: str, n: int, priors: np.ndarray) -> NoncoherentFit:
    return _failed_fit(
        method,
        modulation,
        n,
        priors,
        f"{n} symbols given; at least {MIN_SYMBOLS} are needed for an Es/N0 estimate",
    )


def _plausibility(esn0_db: float) -> str | None:
    if not math.isfinite(esn0_db):
        return "the estimate is not finite"
    if esn0_db > MAX_PLAUSIBLE_ESN0_DB:
        return (
            f"Es/N0 {esn0_db:.1f} dB exceeds {MAX_PLAUSIBLE_ESN0_DB:.0f} dB: implausible for "
            f"correlator outputs (noise-free or clipped data?)"
        )
    return None


def _ml_results(
    *,
    method: str,
    modulation: str,
    prep: _Prepared,
    batch: _Batch,
    opt: _Optimum,
    energy_weight: np.ndarray,
    priors_fixed: np.ndarray,
    symbols: np.ndarray | None,
    run_gof: bool,
) -> list[NoncoherentFit]:
    """Health checks, interval, detection test and GOF around the ML optima of a batch."""
    n, m = batch.n, batch.n_dims
    x = opt.x
    a, n0 = np.exp(x[:, 0]), np.exp(x[:, 1])
    p_on = _p_on(batch, x)
    if batch.p_on_free:
        priors = np.stack([1.0 - p_on, p_on], axis=1)
        energy_weight = p_on
    else:
        priors = np.broadcast_to(priors_fixed, (batch.size, priors_fixed.shape[-1]))
    ll_hat = opt.ll
    # noise only: N0 = mean(q)/M, ℓ0 = −N·M·(log N0 + 1) (the priors sum to one)
    ll_null = -n * m * (np.log(batch.q_sum / n / m) + 1.0)
    boundary = opt.boundary
    lr = np.where(boundary, 0.0, np.maximum(0.0, 2.0 * (ll_hat - ll_null)))
    esn0 = energy_weight * a * a / n0
    converged = opt.converged.copy()
    messages = [_STOP_MESSAGES[int(s)] for s in opt.stop]
    var_log_gamma = np.full(batch.size, math.nan)
    sel = np.flatnonzero(converged)
    if sel.size:
        info = -opt.hess[sel]
        c = np.zeros((sel.size, batch.n_params))
        c[:, 0], c[:, 1] = 2.0, -1.0  # log γ = log w + 2·log A − log N0
        if batch.p_on_free:
            c[:, 2] = 1.0 - p_on[sel]
        pd = np.linalg.eigvalsh(info)[:, 0] > 0
        if pd.any():
            sol = np.linalg.solve(info[pd], c[pd][:, :, None])[:, :, 0]
            var_log_gamma[sel[pd]] = np.sum(c[pd] * sol, axis=1)
        for i in sel[~pd]:
            converged[i] = False
            messages[i] = "observed information is not positive definite"
    weak = converged & (lr < _CHI2_1_Q90)
    converged &= ~weak
    for i in np.flatnonzero(weak):
        messages[i] = (
            f"no signal detected: likelihood ratio {lr[i]:.2f} against noise only is below "
            f"{_CHI2_1_Q90:.2f} (5 % test)"
        )
    upper = np.full(batch.size, math.nan)
    need = ~converged & (boundary | (lr < _CHI2_1_Q90)) & (not batch.p_on_free)
    if need.any():
        idx = np.flatnonzero(need)
        upper[idx] = _upper_bounds_db(
            batch.take(idx), np.maximum(ll_hat, ll_null)[idx], x[idx], energy_weight[idx]
        )
        for i in idx[np.isfinite(upper[idx])]:
            messages[i] += f"; Es/N0 below {upper[i]:.1f} dB (one-sided 95 %)"
    esn0_db = _db_array(esn0)
    for i in np.flatnonzero(~boundary):
        bad = _plausibility(float(esn0_db[i]))
        if bad is not None:
            converged[i], messages[i] = False, bad
    for i in np.flatnonzero(converged):
        messages[i] = f"converged in {int(opt.iterations[i])} Newton iterations"
    ci = np.full((batch.size, 2), math.nan)
    need = converged & (esn0_db < PROFILE_CI_BELOW_DB) & (not batch.p_on_free)
    if need.any():
        idx = np.flatnonzero(need)
        ci[idx] = _profile_intervals_db(
            batch.take(idx),
            ll_hat[idx],
            x[idx],
            opt.hess[idx],
            var_log_gamma[idx],
            energy_weight[idx],
        )
    gofs: list = [None] * batch.size
    if run_gof:  # at the boundary this tests the noise-only model (A = 0)
        gofs = _energy_laws_many(
            prep,
            modulation=modulation,
            amplitude=np.where(boundary, 0.0, a),
            noise_var=n0,
            priors=priors,
            symbols=symbols,
            max_values=GOF_MAX_VALUES,
        )
    # undo the scaling of z: A·s, N0·s², log-density − 2·N·M·log s (Jacobian of z/s)
    s = prep.scale
    log_norm = _log_normalisers(n, m, prep.grams) - 2.0 * n * m * np.log(s)
    return [
        _build(
            method=method,
            modulation=modulation,
            n_symbols=int(n[i]),
            esn0=None if boundary[i] else float(esn0[i]),
            log_gamma_var=float(var_log_gamma[i]) if converged[i] and not boundary[i] else None,
            amplitude=float(a[i] * s[i]),
            noise_var=float(n0[i] * s[i] ** 2),
            priors=priors[i],
            converged=bool(converged[i]),
            message=messages[i],
            iterations=int(opt.iterations[i]),
            log_likelihood=float(ll_hat[i] + log_norm[i]),
            detection_statistic=float(lr[i]),
            upper95_db=float(upper[i]),
            gof=gofs[i],
            profile_ci_db=(float(ci[i, 0]), float(ci[i, 1])) if np.isfinite(ci[i]).all() else None,
        )
        for i in range(batch.size)
    ]


def _db_array(x: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where((x > 0) & np.isfinite(x), 10.0 * np.log10(np.where(x > 0, x, 1.0)), np.nan)


def _profile_intervals_db(
    batch: _Batch,
    ll_hat: np.ndarray,
    x: np.ndarray,
    hess: np.ndarray,
    var_log_gamma: np.ndarray,
    energy_weight: np.ndarray,
) -> np.ndarray:
    """95 % profile-likelihood intervals of Es/N0 [dB]: 2·(ℓ̂ − ℓ_p(γ)) = χ²₁(0.95) = 3.841.

    Near 0 dB the likelihood in log γ is skewed (a weak signal and a small rise of N0 look
    alike), so the Wald interval under-covers; the profile interval follows the actual
    shape. Each end is found outward from the optimum, starting at the Wald end (see
    :func:`_profile_roots`, to 1e-4 in log γ, 4e-4 dB). NaN where an end cannot be
    bracketed (the Wald interval is then used). Shape (B, 2).
    """
    lg_hat = _log_gamma(x)  # log γ_on = 2·log A − log N0
    target = ll_hat - 0.5 * _CHI2_1_Q95
    # path of the profiled log N0 at the optimum (implicit-function theorem)
    h_bb = 0.25 * hess[:, 0, 0] + hess[:, 0, 1] + hess[:, 1, 1]
    h_gb = 0.25 * hess[:, 0, 0] + 0.5 * hess[:, 0, 1]
    dbeta = np.where(h_bb < 0, -h_gb / np.where(h_bb < 0, h_bb, -1.0), 0.0)
    step = np.maximum(_Z975 * np.sqrt(var_log_gamma), 1e-3)
    ends = [
        _profile_roots(batch, target, lg_hat, x[:, 1], dbeta, sign, step, 1.5, 8, 1e-4)
        for sign in (-1.0, 1.0)
    ]
    shift = _db_array(energy_weight)
    return np.stack([10.0 / math.log(10.0) * e + shift for e in ends], axis=1)


def _upper_bounds_db(
    batch: _Batch, ll_max: np.ndarray, x: np.ndarray, energy_weight: np.ndarray
) -> np.ndarray:
    """One-sided 95 % upper bounds on Es/N0 (dB) by profile likelihood: 2·(ℓmax − ℓp) = 2.706.

    Searched upward from max(γ̂, 1e-4) in steps of 0.5 in log γ (at most 40); NaN if not
    bracketed there.
    """
    lo = np.maximum(_log_gamma(x), math.log(1e-4))
    target = ll_max - 0.5 * _CHI2_1_Q90
    ll, beta, _, dbeta = _profile(batch, lo, x[:, 1])
    out = np.where(ll < target, lo, math.nan)
    idx = np.flatnonzero(~(ll < target))
    if idx.size:
        out[idx] = _profile_roots(
            batch.take(idx),
            target[idx],
            lo[idx],
            beta[idx],
            dbeta[idx],
            1.0,
            np.full(idx.size, 0.5),
            1.0,
            40,
            1e-4,
        )
    return _db_array(energy_weight * np.exp(out))


# --------------------------------------------------------------------------------------------
# Public estimators: batched cores and the per-burst forms over them
# --------------------------------------------------------------------------------------------

Grams = np.ndarray | Sequence[np.ndarray | None] | None


def _dd_fsk_many(prep: _Prepared) -> tuple[np.ndarray, np.ndarray]:
    """DD moments per burst (A², N0): E|z_î|² = A² + N0, E[q] = M·N0 + A² (correct decisions)."""
    m = prep.z.shape[1]
    zr, zi = prep.z.real, prep.z.imag
    top = zr[:, 0] * zr[:, 0]
    top += zi[:, 0] * zi[:, 0]  # |z_0|²
    for j in range(1, m):  # max over M ≤ 4 columns (a reduction along the short axis: 7x slower)
        e = zr[:, j] * zr[:, j]
        e += zi[:, j] * zi[:, j]
        np.maximum(top, e, out=top)
    m1 = prep.segment_sums(top) / prep.n
    n0 = (prep.segment_sums(prep.q) / prep.n - m1) / (m - 1)
    return m1 - n0, n0


def _dd_ook_many(prep: _Prepared) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """:func:`_dd_ook` per burst: (A², N0, p_on, rounds)."""
    ends = prep.starts + prep.n
    out = [_dd_ook(prep.z[s:e]) for s, e in zip(prep.starts, ends, strict=True)]
    a2, n0, p, rounds = (np.array([o[k] for o in out], dtype=float) for k in (0, 1, 2, 4))
    return a2, n0, p, rounds.astype(int)


def _subsampled(batch: _Batch, idx: np.ndarray, n_keep: int, q: np.ndarray) -> _Batch:
    """Every k-th symbol of the bursts ``idx`` (NDA, rows are symbols), k = n // n_keep."""
    elems, rows, qs = [], [], []
    for b in idx:  # only bursts of more than 2·n_keep symbols: a handful at most
        s, n = int(batch.starts[b]), int(batch.n[b])
        e = np.arange(s, s + n, max(1, n // n_keep))
        elems.append(e)
        rows.append(len(e))
        qs.append(float(q[e].sum()))
    rows = np.array(rows)
    return replace(
        batch,
        r=batch.r.take(np.concatenate(elems), axis=1),  # C order, as _Batch.take
        starts=np.cumsum(rows) - rows,
        rows=rows,
        q_sum=np.array(qs),
        n=rows.copy(),
        p_on=batch.p_on[idx],
    )


def fit_nda_many(
    zs: Sequence[np.ndarray],
    grams: Grams = None,
    *,
    modulation: Modulation,
    priors: Sequence[float] | None = None,
    estimate_p_on: bool = False,
    gof: bool = True,
) -> list[NoncoherentFit]:
    """:func:`fit_nda` for a batch of bursts in one pass: one result per burst.

    Parameters
    ----------
    zs : sequence of ndarray, complex, shape (n_b, n_branches)
        Correlator outputs of each burst (any number of symbols each).
    grams : ndarray of shape (n_branches, n_branches), or a sequence of them, optional
        One Gram matrix for all bursts, one per burst (None entries: identity), or None.
    modulation, priors, estimate_p_on, gof
        As :func:`fit_nda`, shared by all bursts.

    Returns
    -------
    list of NoncoherentFit
        In the order of ``zs``; each equals ``fit_nda`` on that burst alone.

    Notes
    -----
    The rows of all bursts are concatenated and every likelihood evaluation, Newton step,
    interval search and goodness-of-fit test runs for all bursts in a fixed number of numpy
    calls (per-burst parameters, sums split with ``np.add.reduceat``); a burst that has
    stopped keeps its values. A burst that cannot be fitted (too few symbols, all zero) gets
    its failed result without affecting the others.
    """
    _check_modulation(modulation)
    pi = _check_priors(priors, modulation)
    if estimate_p_on and modulation != "ook":
        raise ParameterError(
            f"estimate_p_on=True applies to ook only, not {modulation}; drop the option"
        )
    prep = _prepare(zs, grams, modulation, "nda-ml", pi)
    return _nda_prepared(prep, len(zs), modulation, pi, estimate_p_on, gof)


def _nda_prepared(
    prep: _Prepared, count_all: int, modulation: str, pi: np.ndarray, estimate_p_on: bool, gof: bool
) -> list[NoncoherentFit]:
    """The NDA fits of a preparation (``count_all`` bursts in the caller's list)."""
    if not prep.index.size:
        return _assemble(count_all, prep, [])
    z, q, n = prep.z, prep.q, prep.n
    m = z.shape[1]
    count = len(n)
    q_sum = prep.segment_sums(q)
    env = np.ascontiguousarray(np.abs(z).T)
    # starting point: decision-directed moments (biased high: above the ML optimum)
    if modulation == "ook":
        batch = _Batch(
            "on-off",
            env,
            prep.starts,
            n,
            np.zeros(1),
            q_sum,
            n,
            m,
            np.full(count, pi[1]),
            estimate_p_on,
        )
        a2, n0, p_dd, _ = _dd_ook_many(prep)
        bad = ~((a2 > 0) & (n0 > 0))
        n0 = np.where(bad, 0.5 * q_sum / n, n0)
        a2 = np.where(bad, q_sum / n / pi[1], a2)
        p_dd = np.where(bad, pi[1], p_dd)
        x0 = [0.5 * np.log(a2), np.log(n0)]
        if estimate_p_on:
            x0.append(special.logit(np.clip(p_dd, 0.05, 0.95)))
        energy_weight = np.full(count, pi[1])
    else:
        batch = _Batch(
            "tones",
            env,
            prep.starts,
            n,
            np.log(pi),
            q_sum,
            n,
            m,
            np.full(count, math.nan),
            False,
        )
        a2, n0 = _dd_fsk_many(prep)
        bad = ~((a2 > 0) & (n0 > 0))
        n0 = np.where(bad, q_sum / n / (m + 1), n0)
        a2 = np.where(bad, n0, a2)
        x0 = [0.5 * np.log(a2), np.log(n0)]
        energy_weight = np.ones(count)
    x0 = np.stack(x0, axis=1)
    extra = np.zeros(count, dtype=int)
    big = np.flatnonzero(n > 2 * _SUBSAMPLE_SYMBOLS)
    if big.size:
        pre = _maximise(_subsampled(batch, big, _SUBSAMPLE_SYMBOLS, q), x0[big], tol=1e-3)
        extra[big] = pre.iterations
        x0[big[pre.converged]] = pre.x[pre.converged]
    opt = _maximise(batch, x0)
    opt = replace(opt, iterations=opt.iterations + extra)
    fits = _ml_results(
        method="nda-ml",
        modulation=modulation,
        prep=prep,
        batch=batch,
        opt=opt,
        energy_weight=energy_weight,
        priors_fixed=pi,
        symbols=None,
        run_gof=gof,
    )
    return _assemble(count_all, prep, fits)


def fit_nda(
    z: np.ndarray,
    gram: np.ndarray | None = None,
    *,
    modulation: Modulation,
    priors: Sequence[float] | None = None,
    estimate_p_on: bool = False,
    gof: bool = True,
) -> NoncoherentFit:
    """Non-data-aided maximum-likelihood Es/N0 from noncoherent correlator outputs.

    Parameters
    ----------
    z : ndarray, complex, shape (n_symbols, n_branches)
        Correlator outputs, one column per tone (lowest first); OOK: one column (or 1-D).
    gram : ndarray, complex, shape (n_branches, n_branches), optional
        Gram matrix of the unit-energy templates, R[i, j] = <t_i, t_j> (R[i, i] = 1). Omit for
        orthogonal tones (identity). Condition number above 1e6 raises ParameterError.
    modulation : {"2fsk", "4fsk", "ook"}
    priors : sequence of float, optional
        FSK: probability of each tone (uniform if omitted). OOK: (p_off, p_on), default
        (0.5, 0.5).
    estimate_p_on : bool
        OOK only: estimate p_on jointly (third parameter, logit p_on) instead of fixing it.
    gof : bool
        Run the goodness-of-fit test (:func:`check_energy_laws`); False skips it (Monte Carlo).

    Returns
    -------
    NoncoherentFit
        ``method="nda-ml"``. ``esn0`` is A²/N0 (FSK) or p_on·A²/N0 (OOK, average energy).

    Notes
    -----
    Per symbol, marginalised over the hypothesis h sent (docs/estimator.md eq. 3):

        ℓ_k = −M·log(πN0) − log det R − q_k/N0 + log Σ_h π_h·[e^{−A²/N0}·I0(2A·r_kh/N0)]^{s_h}

    with q_k = z_kᴴR⁻¹z_k, r_kh = |z_k,h| (FSK) or |z_k| (OOK "on"; s = 0 for "off"). It is
    maximised over (log A, log N0[, logit p_on]) by damped Newton iterations with the analytic
    gradient and Hessian, in the log domain (log I0 = log i0e + x), started from the
    decision-directed moments — above the optimum, so the iteration never creeps to the
    spurious stationary point A = 0 (METHODS §3). Beyond 20000 symbols the iterations run on an
    evenly strided subsample and finish with Newton steps on all symbols.

    The 95 % interval is Wald's in log γ with the observed information (the negative Hessian
    at the optimum, delta method to log γ), mapped to dB. A likelihood-ratio test against
    "noise only" (5 %, boundary-corrected critical value 2.706) decides whether a signal is
    present; if not, ``converged`` is False and the message gives a one-sided 95 % upper bound
    from the profile likelihood (also in ``esn0_db_upper95``).

    References
    ----------
    .. [1] J. G. Proakis, M. Salehi, Digital Communications, 5th ed., §4.5 (from memory).
    .. [2] A. Hassan, M. A. Ingram, "SNR estimation for noncoherent M-FSK", IEEE Trans. Commun.
       59(10):2786-2795, 2011.
    .. [3] D. R. Pauluzzi, N. C. Beaulieu, IEEE Trans. Commun. 48(10):1681-1691, 2000.
    """
    return fit_nda_many(
        [z], [gram], modulation=modulation, priors=priors, estimate_p_on=estimate_p_on, gof=gof
    )[0]


def _check_symbol_arrays(symbols_list, prep_n: np.ndarray, zs, modulation: str) -> list:
    h = N_HYPOTHESES[modulation]
    if len(symbols_list) != len(zs):
        raise ParameterError(
            f"symbols_list has {len(symbols_list)} entries for {len(zs)} bursts; pass one "
            f"array of symbol indices per burst"
        )
    out = []
    for i, (sym, n) in enumerate(zip(symbols_list, prep_n, strict=True)):
        where = _burst_label(i, len(zs))
        sym = np.asarray(sym)
        if sym.shape != (n,) or sym.dtype.kind not in "biu":
            raise ParameterError(
                f"{where}symbols has shape {sym.shape} and dtype {sym.dtype}; pass {n} integer "
                f"symbol indices, one per row of z"
            )
        if n and (sym.min() < 0 or sym.max() >= h):
            raise ParameterError(
                f"{where}symbols range from {sym.min()} to {sym.max()}; {modulation} symbols "
                f"are 0..{h - 1}"
                + (" (0 = off, 1 = on)" if modulation == "ook" else " (tone index, lowest = 0)")
            )
        out.append(sym.astype(np.intp))
    return out


def fit_da_many(
    zs: Sequence[np.ndarray],
    symbols_list: Sequence[np.ndarray],
    grams: Grams = None,
    *,
    modulation: Modulation,
    gof: bool = True,
) -> list[NoncoherentFit]:
    """:func:`fit_da` for a batch of bursts in one pass: one result per burst.

    Parameters
    ----------
    zs : sequence of ndarray, complex, shape (n_b, n_branches)
    symbols_list : sequence of ndarray of int, shape (n_b,)
        The known symbols of each burst.
    grams : as :func:`fit_nda_many`
    modulation, gof : as :func:`fit_da`

    Returns
    -------
    list of NoncoherentFit
        In the order of ``zs``; each equals ``fit_da`` on that burst alone.
    """
    _check_modulation(modulation)
    arrs = _check_output_arrays(zs, modulation)
    syms = _check_symbol_arrays(symbols_list, [len(a) for a in arrs], zs, modulation)
    pi = _check_priors(None, modulation)
    prep = _prepare(arrs, grams, modulation, "da-ml", pi)
    if not prep.index.size:
        return _assemble(len(zs), prep, [])
    sym = np.concatenate([syms[i] for i in prep.index])
    return _da_prepared(prep, sym, len(zs), modulation, pi, gof)


def _da_prepared(
    prep: _Prepared, sym: np.ndarray, count_all: int, modulation: str, pi: np.ndarray, gof: bool
) -> list[NoncoherentFit]:
    """The DA fits of a preparation (at least one burst); ``sym`` the known symbols of its
    bursts, concatenated."""
    z, q, n = prep.z, prep.q, prep.n
    m = z.shape[1]
    count = len(n)
    q_sum = prep.segment_sums(q)
    mag = np.abs(z)
    if modulation == "ook":
        on = sym == 1
        n_on = prep.segment_sums(on.astype(np.intp))
        failed = n_on == 0
        for b in np.flatnonzero(failed):
            prep.early[int(prep.index[b])] = _failed_fit(
                "da-ml",
                modulation,
                int(n[b]),
                pi,
                "no 'on' symbol among the known symbols: the amplitude is not observable",
            )
        if failed.any():  # leave those bursts out
            keep = np.flatnonzero(~failed)
            rows = np.repeat(~failed, n)
            prep = replace(
                prep,
                z=z[rows],
                q=q[rows],
                starts=np.cumsum(n[keep]) - n[keep],
                n=n[keep],
                scale=prep.scale[keep],
                grams=prep.grams[keep],
                identity=prep.identity[keep],
                index=prep.index[keep],
            )
            if not keep.size:
                return _assemble(count_all, prep, [])
            sym, on, z, q, n, n_on, q_sum = (
                sym[rows],
                on[rows],
                prep.z,
                prep.q,
                prep.n,
                n_on[keep],
                q_sum[keep],
            )
            mag, count = mag[rows], len(keep)
        frac = n_on / n
        priors = np.stack([1.0 - frac, frac], axis=1)
        x_on = prep.segment_sums(np.where(on, q, 0.0))
        some_off = n_on < n
        with np.errstate(divide="ignore", invalid="ignore"):
            n0 = np.where(some_off, (q_sum - x_on) / (n - n_on), 0.5 * q_sum / n)
            a2 = np.where(some_off, x_on / n_on - n0, 0.5 * q_sum / n)
        r = mag[on, 0][None, :]  # the Rician term only where the carrier was on
        rows = n_on
        energy_weight = frac
    else:
        matched = mag[np.arange(len(sym)), sym]
        m1 = prep.segment_sums(matched**2) / n
        n0 = (q_sum / n - m1) / (m - 1)
        a2 = m1 - n0
        r = matched[None, :]
        rows = n
        priors = pi
        energy_weight = np.ones(count)
    n0 = np.where(n0 > 0, n0, q_sum / n / (m + 1))
    a2 = np.where(a2 > 0, a2, n0)
    batch = _Batch(
        "tones",
        r,
        np.cumsum(rows) - rows,
        rows,
        np.zeros(1),
        q_sum,
        n,
        m,
        np.full(count, math.nan),
        False,
    )
    opt = _maximise(batch, np.stack([0.5 * np.log(a2), np.log(n0)], axis=1))
    fits = _ml_results(
        method="da-ml",
        modulation=modulation,
        prep=prep,
        batch=batch,
        opt=opt,
        energy_weight=energy_weight,
        priors_fixed=priors,
        symbols=sym,
        run_gof=gof,
    )
    return _assemble(count_all, prep, fits)


def fit_da(
    z: np.ndarray,
    symbols: np.ndarray,
    gram: np.ndarray | None = None,
    *,
    modulation: Modulation,
    gof: bool = True,
) -> NoncoherentFit:
    """Data-aided maximum-likelihood Es/N0 with the symbols known.

    Parameters
    ----------
    z : ndarray, complex, shape (n_symbols, n_branches)
        Correlator outputs.
    symbols : ndarray of int, shape (n_symbols,)
        Tone index sent (FSK, lowest tone = 0) or 0/1 off/on (OOK).
    gram : ndarray, optional
        Template Gram matrix (see :func:`fit_nda`).
    modulation : {"2fsk", "4fsk", "ook"}
    gof : bool
        Run the goodness-of-fit test (conditional on the known symbols).

    Returns
    -------
    NoncoherentFit
        ``method="da-ml"``. OOK: ``esn0`` = (fraction of "on" symbols)·A²/N0.

    Notes
    -----
    ℓ_k = −M·log(πN0) − log det R − q_k/N0 + s_k·[−A²/N0 + log I0(2A·|z_k,i_k|/N0)]: a Rician
    envelope on the branch sent plus the whitened noise energy of the rest (docs/estimator.md
    eq. 5). Maximised like :func:`fit_nda` (Newton on log A, log N0, from the known-symbol
    moments); Wald interval in log γ from the observed information. At high Es/N0 its
    normalised variance tends to 2/γ + 1/(M − ½) (METHODS §3, derived).
    """
    return fit_da_many([z], [symbols], [gram], modulation=modulation, gof=gof)[0]


def fit_dd_many(
    zs: Sequence[np.ndarray],
    grams: Grams = None,
    *,
    modulation: Modulation,
    gof: bool = True,
) -> list[NoncoherentFit]:
    """:func:`fit_dd` for a batch of bursts in one pass: one result per burst.

    Parameters
    ----------
    zs, grams : as :func:`fit_nda_many`
    modulation, gof : as :func:`fit_dd`

    Returns
    -------
    list of NoncoherentFit
        In the order of ``zs``; each equals ``fit_dd`` on that burst alone.
    """
    _check_modulation(modulation)
    pi = _check_priors(None, modulation)
    prep = _prepare(zs, grams, modulation, "dd-moment", pi)
    return _dd_prepared(prep, len(zs), modulation, pi, gof)


def _dd_prepared(
    prep: _Prepared, count_all: int, modulation: str, pi: np.ndarray, gof: bool
) -> list[NoncoherentFit]:
    """The DD fits of a preparation (``count_all`` bursts in the caller's list)."""
    if not prep.index.size:
        return _assemble(count_all, prep, [])
    count = len(prep.n)
    if modulation == "ook":
        a2, n0, p, rounds = _dd_ook_many(prep)
        weight = p
        ok = (a2 > 0) & (n0 > 0)
        priors = np.where(ok[:, None], np.stack([1.0 - p, p], axis=1), pi)
    else:
        a2, n0 = _dd_fsk_many(prep)
        weight = np.ones(count)
        rounds = np.zeros(count, dtype=int)
        priors = np.broadcast_to(pi, (count, len(pi)))
        ok = (a2 > 0) & (n0 > 0)
    with np.errstate(invalid="ignore"):
        esn0 = weight * a2 / n0
        a = np.sqrt(np.where(ok, a2, 0.0))
    esn0_db = _db_array(esn0)
    gofs: list = [None] * count
    if gof and ok.any():
        idx = np.flatnonzero(ok)
        sub = _take_prepared(prep, idx)
        for i, g in zip(
            idx,
            _energy_laws_many(
                sub,
                modulation=modulation,
                amplitude=a[idx],
                noise_var=n0[idx],
                priors=priors[idx],
                symbols=None,
                max_values=GOF_MAX_VALUES,
            ),
            strict=True,
        ):
            gofs[i] = g
    s = prep.scale
    fits = []
    for i in range(count):
        if not ok[i]:
            fits.append(
                _build(
                    method="dd-moment",
                    modulation=modulation,
                    n_symbols=int(prep.n[i]),
                    esn0=None,
                    log_gamma_var=None,
                    amplitude=None,
                    noise_var=float(n0[i] * s[i] ** 2) if n0[i] > 0 else None,
                    priors=priors[i],
                    converged=False,
                    message="decision-directed split found no signal (non-positive signal energy)",
                    iterations=int(rounds[i]),
                    log_likelihood=None,
                    detection_statistic=None,
                    upper95_db=None,
                    gof=None,
                )
            )
            continue
        bad = _plausibility(float(esn0_db[i]))
        fits.append(
            _build(
                method="dd-moment",
                modulation=modulation,
                n_symbols=int(prep.n[i]),
                esn0=float(esn0[i]),
                log_gamma_var=None,
                amplitude=float(a[i] * s[i]),
                noise_var=float(n0[i] * s[i] ** 2),
                priors=priors[i],
                converged=bad is None,
                message=bad or "decision-directed moments (biased high below about 8 dB Es/N0)",
                iterations=int(rounds[i]),
                log_likelihood=None,
                detection_statistic=None,
                upper95_db=None,
                gof=gofs[i],
            )
        )
    return _assemble(count_all, prep, fits)


def fit_dd(
    z: np.ndarray,
    gram: np.ndarray | None = None,
    *,
    modulation: Modulation,
    gof: bool = True,
) -> NoncoherentFit:
    """Decision-directed moment estimate of Es/N0 — for comparison only, never a headline.

    Parameters
    ----------
    z : ndarray, complex, shape (n_symbols, n_branches)
    gram : ndarray, optional
        Template Gram matrix (see :func:`fit_nda`).
    modulation : {"2fsk", "4fsk", "ook"}
    gof : bool
        Run the goodness-of-fit test with the DD parameters.

    Returns
    -------
    NoncoherentFit
        ``method="dd-moment"``; no likelihood, no interval.

    Notes
    -----
    FSK: the largest branch is taken as the one sent; with E|z_î|² = A² + N0 and
    E[zᴴR⁻¹z] = M·N0 + A², N0 = (mean q − mean |z_î|²)/(M − 1), A² = mean |z_î|² − N0 (for
    orthogonal tones N0 is the mean energy of the other branches). OOK: energies are split at
    the model's optimum threshold and the two means re-estimated until the split is stable.
    Decision errors make it biased high below about 8 dB: with no signal at all it returns
    3.01 dB (M = 2) and 3.54 dB (M = 4) (METHODS §3).
    """
    return fit_dd_many([z], [gram], modulation=modulation, gof=gof)[0]


def fit_bursts_many(
    zs: Sequence[np.ndarray],
    grams: Grams = None,
    *,
    modulation: Modulation,
    known_list: Sequence[np.ndarray | None] | None = None,
    gof: bool = True,
    min_known: int = MIN_SYMBOLS,
) -> list[tuple[NoncoherentFit, NoncoherentFit, NoncoherentFit | None]]:
    """The NDA, DD and DA fits of a batch of bursts, with the checks and preparation done once.

    Parameters
    ----------
    zs, grams : as :func:`fit_nda_many`
    modulation : {"2fsk", "4fsk", "ook"}
    known_list : sequence of (ndarray of int, shape (n_b,), or None), optional
        Per burst, the known symbol of every row of z (tone index, or 0/1 off/on for OOK),
        negative where the symbol is not known; None (or no list): nothing known.
    gof : bool
        Run the goodness-of-fit test on the NDA fit (the DD and DA fits never run it).
    min_known : int
        The DA fit is made where at least this many symbols are known (default
        :data:`MIN_SYMBOLS`, below which no fit is attempted anyway).

    Returns
    -------
    list of (NoncoherentFit, NoncoherentFit, NoncoherentFit or None)
        Per burst, in the order of ``zs``: ``fit_nda(z, gram, gof=gof)``, ``fit_dd(z, gram,
        gof=False)`` and, where at least ``min_known`` symbols are known, ``fit_da(z[k >= 0],
        k[k >= 0], gram, gof=False)`` (else None); each equal to that call (and to the
        ``*_many`` calls on the batch).

    Notes
    -----
    The input checks (dtypes, shapes, Gram matrices with their eigenvalues, finite values)
    and the concatenation run once for the three fits, the scaling and whitened energies once
    for NDA and DD; the DA fit takes the known rows of the concatenation and scales them as
    :func:`fit_da_many` would (the maximum over the known rows), so its result is the same.
    """
    _check_modulation(modulation)
    if not (isinstance(min_known, (int, np.integer)) and min_known >= MIN_SYMBOLS):
        raise ParameterError(
            f"min_known {min_known!r} must be an integer >= {MIN_SYMBOLS} (fewer symbols give "
            f"no estimate)"
        )
    pi = _check_priors(None, modulation)
    g = _gather(zs, grams, modulation)
    count = g.count
    if known_list is not None and len(known_list) != count:
        raise ParameterError(
            f"known_list has {len(known_list)} entries for {count} bursts; pass one array (or "
            f"None) per burst"
        )
    prep = _scaled(g, modulation, "nda-ml", pi)
    nda = _nda_prepared(prep, count, modulation, pi, False, gof)
    early_dd = {i: replace(f, method="dd-moment") for i, f in prep.early.items()}
    dd = _dd_prepared(replace(prep, early=early_dd), count, modulation, pi, False)
    da: list = [None] * count
    if known_list is not None and g.keep.size:
        kk = np.concatenate(
            [
                _known_rows(known_list, int(b), int(k), count, modulation)
                for b, k in zip(g.keep, g.n, strict=True)
            ]
        )
        on_known = kk >= 0
        n_known = np.add.reduceat(on_known.astype(np.intp), np.cumsum(g.n) - g.n)
        aided = np.flatnonzero(n_known >= min_known)  # positions in g.keep
        if aided.size:
            rows = on_known & np.repeat(n_known >= min_known, g.n)
            n_sub = n_known[aided]
            callers = g.keep[aided]
            sub = _Gathered(
                g.z[rows],
                n_sub,
                np.arange(aided.size),
                g.grams[callers],
                g.identity[callers],
                n_sub,
                int(aided.size),
            )
            prep_da = _scaled(sub, modulation, "da-ml", pi)
            sym = kk[rows]
            if prep_da.index.size < aided.size:  # all-zero bursts were left out
                sym = sym[np.repeat(np.isin(np.arange(aided.size), prep_da.index), n_sub)]
            if prep_da.index.size:
                fits = _da_prepared(prep_da, sym, int(aided.size), modulation, pi, False)
            else:
                fits = _assemble(int(aided.size), prep_da, [])
            for b, f in zip(callers, fits, strict=True):
                da[int(b)] = f
    return list(zip(nda, dd, da, strict=True))


def _known_rows(known_list, b: int, n: int, count: int, modulation: str) -> np.ndarray:
    """The known symbols of burst b as intp (n,), −1 where unknown; checked."""
    k = known_list[b]
    if k is None:
        return np.full(n, -1, dtype=np.intp)
    k = np.asarray(k)
    h = N_HYPOTHESES[modulation]
    where = _burst_label(b, count)
    if k.shape != (n,) or k.dtype.kind not in "biu":
        raise ParameterError(
            f"{where}known has shape {k.shape} and dtype {k.dtype}; pass {n} integer symbol "
            f"indices, one per row of z (negative where unknown)"
        )
    if n and k.max() >= h:
        raise ParameterError(
            f"{where}known symbols go up to {k.max()}; {modulation} symbols are 0..{h - 1} "
            f"(negative for unknown)"
        )
    return k.astype(np.intp, copy=False)


# --------------------------------------------------------------------------------------------
# Decisions
# --------------------------------------------------------------------------------------------


def _fit_parameters(fit: NoncoherentFit) -> tuple[float, float]:
    if fit.amplitude is None or fit.noise_var is None or not fit.amplitude > 0:
        raise ParameterError(
            f"the {fit.method} fit has no amplitude/noise estimate ({fit.message}); decisions need "
            f"a fit with a signal"
        )
    return fit.amplitude, fit.noise_var


def symbol_posteriors(
    z: np.ndarray,
    fit: NoncoherentFit,
    gram: np.ndarray | None = None,
    *,
    modulation: Modulation,
) -> np.ndarray:
    """Posterior probability of each hypothesis per symbol under the fitted model.

    Parameters
    ----------
    z : ndarray, shape (n_symbols, n_branches)
    fit : NoncoherentFit
        Supplies A, N0 and the priors.
    gram : ndarray, optional
        Unused by the posterior itself (R⁻¹r_i = e_i removes it), accepted for symmetry.
    modulation : {"2fsk", "4fsk", "ook"}

    Returns
    -------
    ndarray, shape (n_symbols, n_hypotheses)
        Rows sum to 1. OOK columns: (off, on).

    Notes
    -----
    w_kh = softmax_h(log π_h + s_h·[−A²/N0 + log I0(2A·r_kh/N0)]) (docs/estimator.md eq. 3).
    """
    _check_modulation(modulation)
    zz = _check_outputs(z, modulation)
    if modulation != "ook":
        _check_gram(gram, zz.shape[1])
    a, n0 = _fit_parameters(fit)
    pi = _check_priors(fit.priors, modulation)
    log_lam = _log_i0((2.0 * a / n0) * np.abs(zz)) - (a / n0) * a  # log Λ, eq. 3
    if modulation == "ook":
        log_lam = np.concatenate([np.zeros_like(log_lam), log_lam], axis=1)  # off: Λ = 1
    return special.softmax(log_lam + np.log(pi), axis=1)


def decide_symbols(
    z: np.ndarray,
    fit: NoncoherentFit,
    gram: np.ndarray | None = None,
    *,
    modulation: Modulation,
) -> np.ndarray:
    """Hard symbol decisions.

    Parameters
    ----------
    z : ndarray, shape (n_symbols, n_branches)
    fit : NoncoherentFit
        Needed for OOK (threshold) and for non-uniform FSK priors.
    gram : ndarray, optional
        Accepted for symmetry; the noncoherent ML decision does not depend on it.
    modulation : {"2fsk", "4fsk", "ook"}

    Returns
    -------
    ndarray of int, shape (n_symbols,)
        FSK: tone index (largest |z_i|; MAP through the posteriors when the priors are not
        uniform). OOK: 1 where |z| exceeds :func:`ook_decision_threshold` of the fit.
    """
    _check_modulation(modulation)
    zz = _check_outputs(z, modulation)
    if modulation == "ook":
        a, n0 = _fit_parameters(fit)
        p_on = fit.priors[1] if len(fit.priors) == 2 else 0.5
        thr = ook_decision_threshold(a, n0, p_on)
        return (np.abs(zz[:, 0]) > thr).astype(np.intp)
    _check_gram(gram, zz.shape[1])
    pri = np.asarray(fit.priors, dtype=float)
    if pri.shape == (zz.shape[1],) and np.ptp(pri) > 1e-12:
        return np.argmax(symbol_posteriors(zz, fit, gram, modulation=modulation), axis=1)
    return np.argmax(np.abs(zz), axis=1).astype(np.intp)
