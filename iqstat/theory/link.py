"""Link-level figures: the BER iqstat's receiver is predicted to have, the Eb/N0 a target needs.

Owns :func:`predicted_ber` (the dispatch by modulation onto the exact orthogonal, Stein and
OOK laws or the 4fsk union bound, vectorised over bursts), :func:`required_ebn0_db` (Brent's
method on log BER), :func:`margin_db` and :func:`mean_ber_over_bursts` (the bit-weighted
mean of the per-burst BERs, which Jensen's inequality makes larger than the BER at the mean).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike
from scipy import optimize

from iqstat.errors import ParameterError
from iqstat.theory.inputs import (
    MODULATIONS,
    Modulation,
    _as_ebn0,
    _as_nonneg,
    _as_rho_abs,
    _check_modulation,
    _finish,
)
from iqstat.theory.nonorthogonal_fsk import _pairwise_error_nc, _union_bound
from iqstat.theory.ook import ber_ook
from iqstat.theory.orthogonal_fsk import ber_ncfsk

__all__ = [
    "predicted_ber",
    "required_ebn0_db",
    "margin_db",
    "mean_ber_over_bursts",
    "ORTHOGONAL_RHO_ABS",
    "REQUIRED_EBN0_BRACKET_DB",
]

#: |rho| at or below this is treated as orthogonal tones by :func:`predicted_ber`.
ORTHOGONAL_RHO_ABS = 1e-6
#: Floor used when taking log BER for root finding (BER below it is treated as equal to it).
_LOG_BER_FLOOR = 1e-300
#: Bracket of :func:`required_ebn0_db`, dB.
REQUIRED_EBN0_BRACKET_DB = (-10.0, 40.0)


def predicted_ber(ebn0: ArrayLike, modulation: Modulation, rho_abs: float | ArrayLike = 0.0):
    """Theoretical BER of iqstat's noncoherent receiver for one modulation.

    Parameters
    ----------
    ebn0 : float or array_like
        Eb/N0, linear, >= 0 (for OOK the average-energy Eb). An array holds, e.g., one value per
        burst; the result has its shape.
    modulation : {"2fsk", "4fsk", "ook"}
        The link's modulation.
    rho_abs : float, array_like, or array_like of shape (..., 4, 4)
        Largest magnitude of the correlation between two tone templates over one symbol, in
        [0, 1] (``abs(tone_correlation(spacing, T))`` for the adjacent pair). FSK only; must be
        0 for OOK. One number for every Eb/N0 value, or an array that broadcasts to the shape
        of ``ebn0`` (one |ρ| per burst). For 4fsk an array whose last two axes are (4, 4) is
        a matrix of |ρ_ij| (e.g. ``abs(tone_correlation_matrix(4, spacing, T))``), which gives
        a tighter bound; a stack of them, shape (n, 4, 4) against ``ebn0`` of shape (n,),
        gives one matrix per burst.

    Returns
    -------
    float or ndarray
        P_b: a float when ``ebn0`` is a scalar and ``rho_abs`` one number or one matrix, else
        an array of the shape of ``ebn0``.

    Notes
    -----
    What is computed, exactly, per element:

    - ``2fsk``, rho_abs <= 1e-6: ½·exp(−γ_b/2) (:func:`ber_ncfsk`, exact).
    - ``2fsk``, rho_abs > 1e-6: Stein's formula (:func:`ber_ncbfsk_nonorthogonal`, exact).
    - ``4fsk``, rho_abs <= 1e-6: the orthogonal 4-FSK result (:func:`ber_ncfsk`, exact).
    - ``4fsk``, rho_abs > 1e-6: the union UPPER BOUND of :func:`ber_ncfsk_union_bound` (Gray
      labels, capped at ½) with every tone pair given correlation rho_abs, or with the given
      (4, 4) matrix. The bound is tight at high Eb/N0 and pessimistic at low Eb/N0; a scalar
      rho_abs is pessimistic again when far tones are less correlated than the adjacent pair
      (h = ½: |ρ| = 2/π, 0, 2/(3π) for tones 1, 2, 3 apart), so pass the matrix when the tone
      spacing is known. The value jumps up at rho_abs = 1e-6 by the union-bound slack (large
      below ~6 dB, vanishing at high Eb/N0). A 4fsk matrix whose off-diagonal entries are all
      <= 1e-6 gives the exact orthogonal result.
    - ``ook``: envelope detection with the optimum threshold (:func:`ber_ook`, exact).

    A batch is evaluated with one vectorised Marcum-Q quadrature for all its non-orthogonal
    elements (no loop over elements), so the per-burst call and the batched call agree.
    """
    modulation = _check_modulation(modulation)
    r_arr = _as_rho_abs(rho_abs)
    gb = _as_ebn0(ebn0)
    matrix = modulation == "4fsk" and r_arr.ndim >= 2 and r_arr.shape[-2:] == (4, 4)
    lead = r_arr.shape[:-2] if matrix else r_arr.shape
    try:
        fits = np.broadcast_shapes(lead, gb.shape) == gb.shape
    except ValueError:
        fits = False
    if not fits:
        raise ParameterError(
            f"rho_abs has shape {r_arr.shape} for {modulation} but ebn0 has shape {gb.shape}; "
            "give one number in [0, 1] or one per Eb/N0 value (a (4, 4) matrix, or a stack "
            "of them, is accepted for 4fsk only)"
        )
    if modulation == "2fsk":
        r = np.broadcast_to(r_arr, gb.shape)
        out = np.array(0.5 * np.exp(-0.5 * gb), dtype=np.float64)  # ber_ncfsk for M = 2
        leaky = r > ORTHOGONAL_RHO_ABS
        if leaky.any():
            out[leaky] = _pairwise_error_nc(gb[leaky], r[leaky])  # Stein's formula
        return _finish(out, gb, np.empty(lead))
    if modulation == "4fsk":
        eye = np.eye(4, dtype=bool)
        if matrix:
            if not np.allclose(r_arr, np.swapaxes(r_arr, -1, -2), rtol=0, atol=1e-12):
                raise ParameterError("rho_abs_matrix is not symmetric; |ρ_ij| must equal |ρ_ji|")
            leaky = np.any(r_arr[..., ~eye] > ORTHOGONAL_RHO_ABS, axis=-1)
            mats = r_arr
        else:
            leaky = r_arr > ORTHOGONAL_RHO_ABS
            mats = np.where(eye, 1.0, r_arr[..., None, None])
        leaky = np.broadcast_to(leaky, gb.shape)
        out = np.array(ber_ncfsk(gb, 4), dtype=np.float64)
        if leaky.any():
            mats = np.broadcast_to(mats, gb.shape + (4, 4))
            out[leaky] = _union_bound(gb[leaky], mats[leaky], _GRAY_4)
        return _finish(out, gb, np.empty(lead))
    if modulation == "ook":
        if (r_arr != 0.0).any():
            raise ParameterError(
                f"rho_abs={rho_abs!r} given for ook; tone correlation applies to FSK only, pass 0"
            )
        return _finish(np.asarray(ber_ook(gb), dtype=np.float64), gb, np.empty(lead))
    raise ParameterError(  # unreachable after _check_modulation; kept as the dispatch's end
        f"modulation={modulation!r} is not supported; choose one of {', '.join(MODULATIONS)}"
    )


#: Gray labels of the four 4fsk tones, lowest first (00, 01, 11, 10).
_GRAY_4 = np.array([0, 1, 3, 2])


def required_ebn0_db(
    target_ber: float, modulation: Modulation, rho_abs: float | ArrayLike = 0.0
) -> float:
    """Eb/N0 (dB) at which :func:`predicted_ber` equals a target BER.

    Parameters
    ----------
    target_ber : float
        Target bit error probability, in (0, 0.5).
    modulation : {"2fsk", "4fsk", "ook"}
        The link's modulation.
    rho_abs : float or array_like of shape (4, 4)
        Tone correlation magnitude, as in :func:`predicted_ber`.

    Returns
    -------
    float
        Required Eb/N0 in dB.

    Notes
    -----
    Brent's method on log(BER(10^(x/10))) − log(target) over x in [−10, 40] dB (BER floored at
    1e-300 so the logarithm stays finite), to 1e-10 dB.
    """
    try:
        target = float(target_ber)
    except (TypeError, ValueError):
        raise ParameterError(f"target_ber={target_ber!r} is not a number; give e.g. 1e-3") from None
    if not (0.0 < target < 0.5) or not np.isfinite(target):
        raise ParameterError(
            f"target_ber={target_ber!r} is outside (0, 0.5); give a probability such as 1e-3"
        )
    if target < _LOG_BER_FLOOR:
        raise ParameterError(
            f"target_ber={target_ber!r} is below {_LOG_BER_FLOOR:g}; such a BER cannot be resolved"
        )
    _check_modulation(modulation)
    log_target = np.log(target)

    def f(x_db: float) -> float:
        ber = float(predicted_ber(10.0 ** (x_db / 10.0), modulation, rho_abs))
        return float(np.log(max(ber, _LOG_BER_FLOOR))) - log_target

    lo, hi = REQUIRED_EBN0_BRACKET_DB
    f_lo, f_hi = f(lo), f(hi)
    if f_lo <= 0.0:
        raise ParameterError(
            f"target_ber={target_ber!r} is already met at {lo:g} dB for {modulation} "
            f"(BER {np.exp(f_lo + log_target):.3g}); give a smaller target"
        )
    if f_hi >= 0.0:
        raise ParameterError(
            f"target_ber={target_ber!r} is not reached below {hi:g} dB for {modulation} with "
            f"rho_abs={rho_abs!r}; give a larger target or less correlated tones"
        )
    return float(optimize.brentq(f, lo, hi, xtol=1e-10, rtol=4 * np.finfo(float).eps))


def margin_db(measured_ebn0_db: float | None, required_ebn0_db: float | None) -> float | None:
    """Link margin in dB: measured minus required Eb/N0; None if either is None.

    Parameters
    ----------
    measured_ebn0_db : float or None
        Measured Eb/N0, dB.
    required_ebn0_db : float or None
        Required Eb/N0, dB (from :func:`required_ebn0_db`).

    Returns
    -------
    float or None
        measured − required (positive: the link has margin).
    """
    if measured_ebn0_db is None or required_ebn0_db is None:
        return None
    return float(measured_ebn0_db) - float(required_ebn0_db)


def mean_ber_over_bursts(
    ebn0_per_burst: ArrayLike,
    weights: ArrayLike | None,
    modulation: Modulation,
    rho_abs: float | ArrayLike = 0.0,
) -> float:
    """A capture's predicted BER: the weighted mean of the per-burst predicted BERs.

    Parameters
    ----------
    ebn0_per_burst : array_like, shape (n_bursts,)
        Eb/N0 of each burst, linear, >= 0.
    weights : array_like, shape (n_bursts,), or None
        Non-negative weight per burst, normally its number of bits or symbols; None = equal.
    modulation : {"2fsk", "4fsk", "ook"}
        The link's modulation.
    rho_abs : float, array_like of shape (n_bursts,), (4, 4) or (n_bursts, 4, 4)
        Tone correlation magnitude, as in :func:`predicted_ber`: one for the capture, or one
        per burst.

    Returns
    -------
    float
        Σ w_i·BER(γ_i) / Σ w_i.

    Notes
    -----
    BER is convex in Eb/N0, so the BER at the mean Eb/N0 underestimates the error rate of a
    capture whose bursts differ in level (Jensen's inequality); the bit-weighted mean of the
    per-burst BERs is the expected fraction of bits in error.
    """
    g = _as_ebn0(ebn0_per_burst, "ebn0_per_burst")
    if g.ndim != 1 or g.size == 0:
        raise ParameterError(
            f"ebn0_per_burst has shape {g.shape}; give a non-empty 1-D array, one value per burst"
        )
    if weights is None:
        w = np.ones_like(g)
    else:
        w = _as_nonneg(weights, "weights", " (bits or symbols per burst)")
        if w.shape != g.shape:
            raise ParameterError(
                f"weights has shape {w.shape} but ebn0_per_burst has {g.shape}; give one weight "
                "per burst"
            )
        if not np.sum(w) > 0:
            raise ParameterError("weights sum to 0; at least one burst needs a positive weight")
    ber = np.asarray(predicted_ber(g, modulation, rho_abs), dtype=np.float64)
    return float(np.sum(w * ber) / np.sum(w))
