"""Closed-loop accuracy runs: `iqstat synth` recordings with known truth through `measure`.

Shared by the accuracy benchmark (tests/benchmarks/bench_accuracy.py, the full table) and its
reduced version in the test suite (tests/test_accuracy.py). Nothing here is a test by itself.
"""

from __future__ import annotations

import math
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import stats

from iqstat.bounds import crb_std_db
from iqstat.correlate import template_gram
from iqstat.formats.open import open_capture
from iqstat.measure import measure_capture
from iqstat.profile import profile_from_dict
from iqstat.synth import scenario_from_dict, write_synthetic
from iqstat.theory import predicted_ber, ser_ncfsk, tone_correlation

RS = 4800.0
FS = 250e3  # 52.083 samples per symbol: never an integer

#: The configurations of the issue: (modulation, tone spacing Hz or None, datatype, extra).
CONFIGS: dict[str, dict] = {
    "2fsk": {"modulation": "2fsk", "spacing": 4800.0, "datatype": "ci16_le"},
    "4fsk": {"modulation": "4fsk", "spacing": 4800.0, "datatype": "ci16_le"},
    "2fsk-h0.5": {"modulation": "2fsk", "spacing": 2400.0, "datatype": "ci16_le"},
    "ook": {"modulation": "ook", "spacing": None, "datatype": "ci16_le"},
    "2fsk-cu8": {"modulation": "2fsk", "spacing": 4800.0, "datatype": "cu8"},
    "2fsk-cf32": {"modulation": "2fsk", "spacing": 4800.0, "datatype": "cf32_le"},
}


def scenario_doc(config: str, ebn0_db: float, n_bursts: int, seed: int) -> dict:
    c = CONFIGS[config]
    link = {"modulation": c["modulation"], "symbol_rate": RS}
    if c["spacing"] is not None:
        link["tone_spacing"] = c["spacing"]
    return {
        "link": link,
        "frame": {
            "preamble": "aaaaaaaa",
            "sync_word": "2dd4",
            "payload": "pn9",
            "payload_bits": 512,
        },
        "requirement": {"ber": 1e-4},
        "capture": {
            "sample_rate": FS,
            "datatype": c["datatype"],
            "seed": seed,
            "lead_in_s": 0.01,
            "tail_s": 0.01,
        },
        "bursts": {
            "count": n_bursts,
            "ebn0_db": float(ebn0_db),
            "cfo_hz": {"uniform": [-3000.0, 3000.0]},
            "gap_s": {"uniform": [0.01, 0.03]},
        },
        "impairments": {"clock_offset_ppm": 20.0, "timing": "random", "phase": "random"},
    }


@dataclass(frozen=True)
class PointResult:
    """Accuracy at one (configuration, Eb/N0) point, pooled over captures."""

    config: str
    ebn0_db: float
    captures: int
    bursts_sent: int
    bursts_measured: int
    symbols_per_burst: float
    pooled_bias_db: float | None  # mean over captures of (capture Eb/N0 − truth)
    burst_bias_db: float | None  # mean of per-burst (estimate − truth) in dB
    burst_std_db: float | None  # spread of per-burst estimates
    crb_std_db: float  # Cramér–Rao bound (NDA) for that many symbols and these templates
    max_cfo_error_hz: float | None
    bit_errors: int
    bits_checked: int
    ber_theory: float
    ber_pvalue: float | None  # two-sided binomial test at theory's BER (4-FSK: symbols, SER)

    @property
    def std_over_crb(self) -> float | None:
        return None if self.burst_std_db is None else self.burst_std_db / self.crb_std_db


def _overlap(a0, a1, b0, b1) -> int:
    return min(a1, b1) - max(a0, b0)


def run_point(
    config: str,
    ebn0_db: float,
    *,
    captures: int = 2,
    n_bursts: int = 8,
    seed: int = 1,
    workdir: Path | None = None,
) -> PointResult:
    """Synthesise ``captures`` recordings of ``n_bursts`` bursts, measure, compare."""
    c = CONFIGS[config]
    mod = c["modulation"]
    errs, pooled, cfo_err, n_sym = [], [], [], []
    bit_errors = bits = measured = 0
    with tempfile.TemporaryDirectory(dir=workdir) as tmp:
        for k in range(captures):
            doc = scenario_doc(config, ebn0_db, n_bursts, seed * 1000 + k)
            sc = scenario_from_dict(doc, source=f"{config}@{ebn0_db}", name=f"acc{k}")
            out = write_synthetic(sc, Path(tmp))
            truth = _read_truth(out.truth_path)
            profile = profile_from_dict({key: doc[key] for key in ("link", "frame", "requirement")})
            report = measure_capture(open_capture(out.meta_path), profile)
            if report.summary.ebn0_db is not None:
                pooled.append(report.summary.ebn0_db - ebn0_db)
            for t in truth["bursts"]:
                best = max(
                    report.bursts,
                    default=None,
                    key=lambda b, t=t: _overlap(
                        b.start_sample, b.stop_sample, t["start_sample"], t["stop_sample"]
                    ),
                )
                if (
                    best is None
                    or best.ebn0_db is None
                    or _overlap(
                        best.start_sample, best.stop_sample, t["start_sample"], t["stop_sample"]
                    )
                    <= 0
                ):
                    continue
                measured += 1
                errs.append(best.ebn0_db - t["ebn0_db"])
                n_sym.append(best.symbols)
                cfo_err.append(abs(best.cfo_hz - t["cfo_hz"]))
            s = report.summary
            if s.bits_checked:
                bit_errors += s.bit_errors
                bits += s.bits_checked
    g = 10 ** (ebn0_db / 10)
    rho = 0.0
    if mod == "2fsk" and c["spacing"] != RS:
        rho = float(abs(tone_correlation(c["spacing"], 1 / RS)))
    p_th = float(predicted_ber(g, mod, rho_abs=rho))
    pval = None
    if bits and mod == "4fsk":
        # Bit errors of 4-FSK come in symbol errors of 1 or 2 bits (4/3 on average for
        # orthogonal tones with the Gray map: all wrong tones equally likely), so the bits
        # are not independent: test the implied symbol errors against the SER instead
        # (Proakis & Salehi 5th ed. §4.5 [from memory]: P_b = (2/3)·P_s for M = 4).
        k_sym = int(round(bit_errors * 3 / 4))
        p_ser = float(ser_ncfsk(g, 4))
        pval = float(stats.binomtest(k_sym, bits // 2, p_ser).pvalue)
    elif bits:
        pval = float(stats.binomtest(bit_errors, bits, p_th).pvalue)
    bps = 2 if mod == "4fsk" else 1
    n_mean = float(np.mean(n_sym)) if n_sym else 560.0
    gram = None
    if mod != "ook" and c["spacing"] != RS:
        m_tones = 2 if mod == "2fsk" else 4
        tones = (np.arange(m_tones) - (m_tones - 1) / 2) * c["spacing"]
        gram = template_gram(tones, FS / RS, FS)
    crb = crb_std_db(
        ebn0_db + 10 * math.log10(bps),
        mod,
        max(1, int(round(n_mean))),
        n_monte_carlo=100_000,
        gram=gram,
    )
    return PointResult(
        config=config,
        ebn0_db=ebn0_db,
        captures=captures,
        bursts_sent=captures * n_bursts,
        bursts_measured=measured,
        symbols_per_burst=n_mean,
        pooled_bias_db=float(np.mean(pooled)) if pooled else None,
        burst_bias_db=float(np.mean(errs)) if errs else None,
        burst_std_db=float(np.std(errs, ddof=1)) if len(errs) > 1 else None,
        crb_std_db=crb,
        max_cfo_error_hz=float(np.max(cfo_err)) if cfo_err else None,
        bit_errors=bit_errors,
        bits_checked=bits,
        ber_theory=p_th,
        ber_pvalue=pval,
    )


def _read_truth(path: Path) -> dict:
    import json

    return json.loads(Path(path).read_text())["truth"]


def format_row(r: PointResult) -> str:
    def f(v, fmt):
        return "—" if v is None else format(v, fmt)

    return (
        f"{r.config:10s} {r.ebn0_db:5.1f} {r.bursts_measured:3d}/{r.bursts_sent:<3d} "
        f"{r.symbols_per_burst:6.0f} {f(r.pooled_bias_db, '+7.3f')} "
        f"{f(r.burst_bias_db, '+7.3f')} {f(r.burst_std_db, '6.3f')} {r.crb_std_db:6.3f} "
        f"{f(r.std_over_crb, '5.2f')} {f(r.max_cfo_error_hz, '7.1f')} "
        f"{r.bit_errors:6d}/{r.bits_checked:<7d} {r.ber_theory:9.2e} "
        f"{f(r.ber_pvalue, '7.3f')}"
    )


HEADER = (
    "config     Eb/N0 found  sym/b  pooled  burst   std    CRB    std/  maxCFO  "
    "errors/bits     BER th.   p(BER)\n"
    "           [dB]               bias dB bias dB [dB]   [dB]   CRB   err Hz"
)
