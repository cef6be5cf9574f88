"""The result of an Es/N0 fit, and the vocabulary it is stated in.

Owns :class:`NoncoherentFit` (frozen, with ``to_dict()``), the per-modulation constants
(correlator branches, hypotheses and bits per symbol), the limits every estimator applies
(``MIN_SYMBOLS``, ``MAX_PLAUSIBLE_ESN0_DB``), and ``_build``, which turns an estimate, its
variance or profile interval and its goodness of fit into a result: Es/N0 and Eb/N0 in dB
(Eb/N0 = Es/N0 − 10·log10(bits per symbol)) and the 95 % Wald interval in log γ mapped to dB
(z = 1.959964, the normal 97.5 % quantile); plus the failed results (too few symbols, no
energy) and the plausibility check.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Literal

import numpy as np

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


_Z975 = 1.959963984540054  # scipy.stats.norm.ppf(0.975)


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


def _db_array(x: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where((x > 0) & np.isfinite(x), 10.0 * np.log10(np.where(x > 0, x, 1.0)), np.nan)
