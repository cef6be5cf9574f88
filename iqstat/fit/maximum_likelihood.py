"""The maximum-likelihood Es/N0 estimators: non-data-aided and data-aided.

:func:`fit_nda` and :func:`fit_nda_many` maximise the likelihood averaged over the symbol sent
(decision errors are part of the model, so it stays unbiased where hard decisions err, down
to 0 dB and below: the headline estimator); :func:`fit_da` and :func:`fit_da_many` the
likelihood with the symbols known. Both start from the decision-directed moments (above the
optimum, so the iteration never creeps to the spurious stationary point A = 0, METHODS §3),
run the batched Newton maximiser (:mod:`iqstat.fit.maximise`), and ``_ml_results`` then adds
each estimate's health: the likelihood-ratio test against noise only, the Wald interval in
log γ from the observed information (the profile-likelihood one below
``PROFILE_CI_BELOW_DB``), the one-sided upper bound when no signal is detected, the
plausibility check and the goodness-of-fit test.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import replace

import numpy as np
from scipy import special

from iqstat.errors import ParameterError
from iqstat.fit.decision_directed import _dd_fsk_many, _dd_ook_many
from iqstat.fit.goodness_of_fit import GOF_MAX_VALUES, _energy_laws_many
from iqstat.fit.inputs import (
    Grams,
    _assemble,
    _burst_label,
    _check_modulation,
    _check_output_arrays,
    _check_priors,
    _log_normalisers,
    _prepare,
    _Prepared,
)
from iqstat.fit.likelihood import _Batch, _p_on
from iqstat.fit.maximise import (
    _CHI2_1_Q90,
    _STOP_MESSAGES,
    _maximise,
    _Optimum,
    _profile_intervals_db,
    _upper_bounds_db,
)
from iqstat.fit.result import (
    N_HYPOTHESES,
    Modulation,
    NoncoherentFit,
    _build,
    _db_array,
    _failed_fit,
    _plausibility,
)

#: Symbols used by the Newton iterations before the final polish on all symbols.
_SUBSAMPLE_SYMBOLS = 20000


#: Below this Es/N0 [dB] the interval is the profile-likelihood one (the Wald one above).
PROFILE_CI_BELOW_DB = 6.0


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
    log_norm = _log_normalisers(n, m, prep) - 2.0 * n * m * np.log(s)
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
    grams : ndarray of shape (n_branches, n_branches), or a sequence, optional
        One Gram matrix for all bursts, or one entry per burst: None (identity), an
        (n_branches, n_branches) matrix, or an (n_b, n_branches, n_branches) stack whose row
        k is symbol k's own Gram matrix R_k (symbols of different lengths,
        docs/estimator.md eq. 1b); or None (orthogonal tones).
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
    gram : ndarray, complex, shape (n_branches, n_branches) or (n_symbols, n_branches, n_branches)
        Gram matrix of the unit-energy templates, R[i, j] = <t_i, t_j> (R[i, i] = 1), or one
        per symbol (row k: R_k of symbol k, docs/estimator.md eq. 1b). Omit for orthogonal
        tones (identity). Condition number above 1e6 raises ParameterError.
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

    with q_k = z_kᴴR⁻¹z_k (R_k⁻¹ and log det R_k with per-symbol matrices), r_kh = |z_k,h|
    (FSK) or |z_k| (OOK "on"; s = 0 for "off"). It is
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
                row_gram=None if prep.row_gram is None else prep.row_gram[rows],
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
        Template Gram matrix, or one per symbol (see :func:`fit_nda`).
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
