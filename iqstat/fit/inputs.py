"""Input checks, and the preparation of a batch of bursts for fitting.

Checks the correlator outputs (dtype, shape, finite values), the priors and the template Gram
matrices (Hermitian, unit diagonal, condition number at most ``MAX_GRAM_CONDITION``), each
failure a one-line ``ParameterError``. Then concatenates the bursts, scales each by its
largest component and computes the whitened energies q_k = z_kᴴR⁻¹z_k (docs/estimator.md
eq. 4) in a few numpy calls: the ``_Prepared`` batch every estimator works on.
``_assemble`` puts the per-burst results back in the caller's order, together with the early
(failed) results of the bursts too short or all zero.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from iqstat.errors import ParameterError
from iqstat.fit.result import (
    MIN_SYMBOLS,
    N_BRANCHES,
    N_HYPOTHESES,
    NoncoherentFit,
    _no_energy,
    _too_few,
)

#: Template Gram matrices worse conditioned than this cannot separate the tones.
MAX_GRAM_CONDITION = 1e6


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


Grams = np.ndarray | Sequence[np.ndarray | None] | None
