"""Input checks, and the preparation of a batch of bursts for fitting.

Checks the correlator outputs (dtype, shape, finite values), the priors and the template Gram
matrices (Hermitian, unit diagonal, condition number at most ``MAX_GRAM_CONDITION``), each
failure a one-line ``ParameterError``; a burst's matrix may be one per symbol (an
(n_b, M, M) stack, reduced to its distinct matrices and an index per symbol). Then
concatenates the bursts, scales each by its largest component and computes the whitened
energies q_k = z_kᴴR_k⁻¹z_k (docs/estimator.md eq. 4) in a few numpy calls: the ``_Prepared``
batch every estimator works on.
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


def _output_array(z, modulation: str, where: str = "") -> np.ndarray:
    """One burst's z as complex128 (n_symbols, n_branches), dtype and shape checked (values
    not); ``where`` prefixes the messages (which burst of a batch)."""
    m = N_BRANCHES[modulation]
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
    return arr.astype(np.complex128, copy=False)


def _check_outputs(z: np.ndarray, modulation: str) -> np.ndarray:
    """z as complex128 (n_symbols, n_branches); raises ParameterError on bad shape or values."""
    arr = _output_array(z, modulation)
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
    return [_output_array(z, modulation, _burst_label(i, len(zs))) for i, z in enumerate(zs)]


def _stack_label(i: int, count: int, k: int) -> str:
    return f"{_burst_label(i, count)}symbol {k}: "


def _dedupe_rows(stack: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Distinct matrices of a finite (N, m, m) stack and the index of each row among them.

    Exact equality (the stacks are built from a few matrices): a pass per distinct matrix,
    comparing part by part (columns, not a reduction along the short axis), while there are
    few, then ``np.unique`` on what is left.
    """
    m = stack.shape[1]
    flat = stack.reshape(len(stack), m * m)
    parts = np.ascontiguousarray(flat).view(np.float64)  # (N, 2m²): real and imaginary parts
    inverse = np.full(len(flat), -1, dtype=np.intp)
    uniques: list[np.ndarray] = []
    open_rows = np.ones(len(flat), dtype=bool)
    first = 0
    while len(uniques) < _DEDUPE_PASSES:
        ref = flat[first]
        same = open_rows.copy()
        for c, v in enumerate(parts[first]):
            same &= parts[:, c] == v
        inverse[same] = len(uniques)
        uniques.append(ref.copy())
        open_rows &= ~same
        left = np.flatnonzero(open_rows[first:])
        if not left.size:
            break
        first += int(left[0])
    left = np.flatnonzero(open_rows)
    if left.size:
        rest, inv = np.unique(flat[left], axis=0, return_inverse=True)
        inverse[left] = len(uniques) + inv.ravel()
        uniques.extend(rest)
    return np.array(uniques).reshape(-1, m, m), inverse


#: Distinct matrices found by repeated comparison before :func:`_dedupe_rows` sorts instead.
_DEDUPE_PASSES = 8


@dataclass(frozen=True)
class _GramSet:
    """Checked Gram matrices of a batch.

    ``grams`` (count, m, m) and ``identity`` (count,) hold one matrix per burst. Where some
    burst has a per-symbol stack of more than one distinct matrix, ``table`` (G, m, m) holds
    the per-burst matrices followed by the distinct matrices of the stacks, ``table_identity``
    (G,) their identity flags and ``rows[b]`` (n_b,) the table entry of each symbol of burst
    b; otherwise these are None (a stack of equal matrices is that matrix).
    """

    grams: np.ndarray
    identity: np.ndarray
    table: np.ndarray | None = None
    table_identity: np.ndarray | None = None
    rows: list | None = None


def _check_grams(grams, m: int, count: int, n_symbols: Sequence[int] | None = None) -> _GramSet:
    """Gram matrices as complex arrays with their identity flags (see :class:`_GramSet`).

    ``grams`` is None, one (m, m) array for all bursts, or a sequence with one entry per
    burst: None (identity), an (m, m) array, or an (n_b, m, m) stack with one matrix per
    symbol (``n_symbols[b]`` = n_b). The checks run on the per-burst matrices and on the
    distinct matrices of the stacks together (eigenvalues with one ``eigvalsh`` call).
    """
    if grams is None:
        eye = np.broadcast_to(np.eye(m, dtype=complex), (count, m, m))
        return _GramSet(eye, np.ones(count, bool))
    if isinstance(grams, np.ndarray) and grams.ndim == 2:
        one = _check_grams([grams], m, 1)
        shared = np.broadcast_to(one.grams[0], (count, m, m))
        return _GramSet(shared, np.full(count, one.identity[0]))
    if len(grams) != count:
        raise ParameterError(
            f"grams has {len(grams)} entries for {count} bursts; pass one per burst, one shared "
            f"matrix, or None"
        )
    stack = np.empty((count, m, m), dtype=complex)
    per_symbol: dict[int, np.ndarray] = {}
    for i, g in enumerate(grams):
        if g is None:
            stack[i] = np.eye(m)
            continue
        r = np.asarray(g)
        n_b = None if n_symbols is None else int(n_symbols[i])
        if r.dtype.kind in "biufc" and r.ndim == 3 and r.shape[1:] == (m, m) and n_b is not None:
            if r.shape[0] != n_b:
                raise ParameterError(
                    f"{_burst_label(i, count)}gram stack has {r.shape[0]} matrices for {n_b} "
                    f"symbols; pass one ({m}, {m}) matrix per row of z, or one for the burst"
                )
            per_symbol[i] = np.asarray(r, dtype=complex)
            stack[i] = np.eye(m) if n_b == 0 else per_symbol[i][0]
            continue
        if r.dtype.kind not in "biufc" or r.shape != (m, m):
            what = f" or an (n_symbols, {m}, {m}) stack, one per symbol" if n_b is not None else ""
            raise ParameterError(
                f"{_burst_label(i, count)}gram has shape {r.shape} and dtype {r.dtype}; pass a "
                f"({m}, {m}) complex Hermitian matrix of template correlations{what} (identity "
                f"for orthogonal tones)"
            )
        stack[i] = r
    where = [_burst_label(i, count) for i in range(count)]
    uniques = np.zeros((0, m, m), dtype=complex)
    inverse = np.zeros(0, dtype=np.intp)
    if per_symbol:
        keys = list(per_symbol)
        sizes = np.array([len(per_symbol[i]) for i in keys])
        rows = np.concatenate([per_symbol[i] for i in keys])
        owners = np.repeat(np.array(keys, dtype=np.intp), sizes)  # burst of each row
        finite = np.isfinite(rows).all(axis=(1, 2))
        if not finite.all():
            j = int(np.argmin(finite))
            b = int(owners[j])
            k = j - int(np.sum(sizes[: keys.index(b)]))
            raise ParameterError(
                f"{_stack_label(b, count, k)}gram contains NaN or inf; pass finite template "
                f"correlations"
            )
        uniques, inverse = _dedupe_rows(rows)
        _, first = np.unique(inverse, return_index=True)  # first row using each matrix
        offset = dict(zip(keys, (np.cumsum(sizes) - sizes).tolist(), strict=True))
        for j in first:
            b = int(owners[j])
            where.append(_stack_label(b, count, int(j) - offset[b]))
    checked = np.concatenate([stack, uniques])
    finite = np.isfinite(checked).all(axis=(1, 2))
    if not finite.all():
        i = int(np.argmin(finite))
        raise ParameterError(
            f"{where[i]}gram contains NaN or inf; pass finite template correlations"
        )
    herm = np.max(np.abs(checked - checked.conj().transpose(0, 2, 1)), axis=(1, 2)) > 1e-8
    if herm.any():
        i = int(np.argmax(herm))
        raise ParameterError(
            f"{where[i]}gram is not Hermitian (R[i, j] must equal conj(R[j, i])); "
            "rebuild it from the templates"
        )
    diag = np.real(np.diagonal(checked, axis1=1, axis2=2))
    off = np.max(np.abs(diag - 1.0), axis=1) > 1e-6
    if off.any():
        i = int(np.argmax(off))
        raise ParameterError(
            f"{where[i]}gram diagonal is {np.round(diag[i], 6).tolist()} but unit-energy "
            f"templates give 1; normalise the templates"
        )
    eig = np.linalg.eigvalsh(checked)
    with np.errstate(divide="ignore", invalid="ignore"):
        cond = np.where(eig[:, 0] > 0, eig[:, -1] / eig[:, 0], math.inf)
    bad = cond > MAX_GRAM_CONDITION
    if bad.any():
        i = int(np.argmax(bad))
        raise ParameterError(
            f"{where[i]}gram has condition number {cond[i]:.3g} (> "
            f"{MAX_GRAM_CONDITION:.0e}): the tones are too close to separate; check the tone "
            f"spacing or the symbol length"
        )
    identity_all = np.max(np.abs(checked - np.eye(m)), axis=(1, 2)) < 1e-12
    identity = identity_all[:count].copy()
    if not per_symbol:
        return _GramSet(stack, identity)
    classes = {}  # burst -> table entries (count + distinct matrix) of its symbols
    mixed = False
    start = 0
    for i in per_symbol:
        n_b = len(per_symbol[i])
        inv = inverse[start : start + n_b]
        start += n_b
        if n_b and (inv == inv[0]).all():  # one matrix: the burst's own, as if passed alone
            stack[i] = uniques[inv[0]]
            identity[i] = identity_all[count + inv[0]]
        elif n_b:
            classes[i] = count + inv
            mixed = True
    if not mixed:
        return _GramSet(stack, identity)
    table = np.concatenate([stack, uniques])
    table_identity = np.concatenate([identity, identity_all[count:]])
    rows = [
        classes[i] if i in classes else np.full(int(n_symbols[i]), i, dtype=np.intp)
        for i in range(count)
    ]
    return _GramSet(stack, identity, table, table_identity, rows)


def _check_gram(gram: np.ndarray | None, m: int) -> tuple[np.ndarray, bool]:
    """The Gram matrix as complex (m, m) and whether it is the identity."""
    if gram is None:
        return np.eye(m, dtype=complex), True
    r = _check_grams([gram], m, 1)
    return r.grams[0], bool(r.identity[0])


def _check_symbol_grams(
    gram: np.ndarray | None, m: int, n: int
) -> tuple[np.ndarray, np.ndarray | None]:
    """A burst's gram argument as distinct matrices (G, m, m) and each symbol's index (n,).

    ``gram`` is None, one (m, m) matrix (G = 1, index None) or an (n, m, m) per-symbol stack.
    """
    if gram is None:
        return np.eye(m, dtype=complex)[None], None
    r = _check_grams([gram], m, 1, [n])
    if r.table is None:
        return r.grams[:1], None
    return r.table[1:], r.rows[0] - 1


def _class_counts(row_gram: np.ndarray, n: np.ndarray, n_table: int) -> np.ndarray:
    """Symbols of each burst (rows concatenated, n[b] each) per table entry: (B, n_table)."""
    burst = np.repeat(np.arange(len(n)), n)
    counts = np.bincount(burst * n_table + row_gram, minlength=len(n) * n_table)
    return counts.reshape(len(n), n_table)


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
    # per-symbol Gram matrices (None: one per burst, ``grams``): distinct matrices (G, M, M),
    # their identity flags (G,) and the entry of every row (N,)
    table: np.ndarray | None = None
    table_identity: np.ndarray | None = None
    row_gram: np.ndarray | None = None

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
    table: np.ndarray | None = None  # as _Prepared
    table_identity: np.ndarray | None = None
    row_gram: np.ndarray | None = None  # (N,) table entry of each row of z


def _gather(zs, grams, modulation: str) -> _Gathered:
    """Checks of all bursts (dtype, shape, Gram matrices, finite values) and concatenation."""
    arrs = _check_output_arrays(zs, modulation)
    count = len(arrs)
    m = N_BRANCHES[modulation]
    if modulation == "ook":
        _ook_grams(grams, count)
        grams = None
    n_all = np.array([len(a) for a in arrs], dtype=np.intp)
    gs = _check_grams(grams, m, count, n_all)
    keep = np.flatnonzero(n_all >= MIN_SYMBOLS)
    n = n_all[keep]
    z = np.concatenate([arrs[i] for i in keep]) if keep.size else np.zeros((0, m), complex)
    _check_finite(z, np.cumsum(n) - n, keep, count)
    row_gram = None
    if gs.rows is not None:
        row_gram = np.concatenate([gs.rows[i] for i in keep] + [np.zeros(0, np.intp)])
    return _Gathered(
        z, n, keep, gs.grams, gs.identity, n_all, count, gs.table, gs.table_identity, row_gram
    )


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
    keep, n, z, row_gram = g.keep, g.n, g.z, g.row_gram
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
        if row_gram is not None:
            row_gram = row_gram[rows]
    flat = flat / np.repeat(scale, n)[:, None]
    z = flat.view(np.complex128)
    grams_k, identity = g.grams[keep], g.identity[keep]
    sq = flat * flat
    energy = sq[:, 0::2] + sq[:, 1::2]  # |z_j|²
    q = energy[:, 0].copy()
    for j in range(1, m):  # columns, not a reduction along the short axis (10x slower)
        q += energy[:, j]
    if row_gram is not None:
        # each symbol's own Gram matrix R_k (eq. 4 per symbol): the same expansion with the
        # entries of R_k⁻¹ taken per row from the distinct matrices
        rinv = np.linalg.inv(g.table)
        rinv[g.table_identity] = np.eye(m)
        rinv_rows = rinv[:, np.triu_indices(m)[0], np.triu_indices(m)[1]][row_gram]
        qw = np.zeros(len(z))
        t = 0
        for i in range(m):
            for j in range(i, m):
                if i == j:
                    qw += rinv_rows[:, t].real * energy[:, i]
                else:
                    qw += 2.0 * (rinv_rows[:, t] * (z[:, i].conj() * z[:, j])).real
                t += 1
        q = np.where(g.table_identity[row_gram], q, np.maximum(qw, 0.0))
    elif not identity.all():
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
    return _Prepared(
        z, q, starts, n, scale, grams_k, identity, keep, early, g.table, g.table_identity, row_gram
    )


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


def _log_normalisers(n: np.ndarray, m: int, prep: _Prepared) -> np.ndarray:
    """−N·M·log π − Σ_k log det R_k per burst: the constants left out of ℓ."""
    if prep.row_gram is None:
        logdet = np.linalg.slogdet(prep.grams)[1]
        return -n * m * math.log(math.pi) - n * logdet
    logdet = np.linalg.slogdet(prep.table)[1]
    counts = _class_counts(prep.row_gram, n, len(prep.table))
    return -n * m * math.log(math.pi) - counts @ logdet


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
        row_gram=None if prep.row_gram is None else prep.row_gram[rows],
    )


#: The ``grams`` argument of the batch fits: None (orthogonal tones), one (M, M) matrix for all
#: bursts, or one entry per burst: None, an (M, M) matrix, or an (n_b, M, M) stack holding
#: symbol k's own Gram matrix R_k in row k.
Grams = np.ndarray | Sequence[np.ndarray | None] | None
