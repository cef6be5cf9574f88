"""The NDA, DD and DA fits of a batch of bursts in one call, sharing checks and preparation.

:func:`fit_bursts_many` is what the measurement runs on a batch: the input checks and the
concatenation run once for the three fits, the scaling and whitened energies once for NDA
and DD; the DA fit takes the rows whose symbol is known (``known_list``, negative where
unknown) and scales them as :func:`fit_da_many` would, so each result equals the call of its
own method.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from iqstat.errors import ParameterError
from iqstat.fit.decision_directed import _dd_prepared
from iqstat.fit.inputs import (
    Grams,
    _assemble,
    _burst_label,
    _check_modulation,
    _check_priors,
    _gather,
    _Gathered,
    _scaled,
)
from iqstat.fit.maximum_likelihood import _da_prepared, _nda_prepared
from iqstat.fit.result import MIN_SYMBOLS, N_HYPOTHESES, Modulation, NoncoherentFit


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
                g.table,
                g.table_identity,
                None if g.row_gram is None else g.row_gram[rows],
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
