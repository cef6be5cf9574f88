"""Benchmark: `iqstat measure` across the captures field work brings, against synthetic truth.

Run:  python tests/benchmarks/bench_robustness.py [--bursts 10] [CASE ...]

The cases (tests/robustness_lib.py): other sample and symbol rates (5 to 1 700 samples per
symbol, fractional), a carrier far off the centre, a receiver DC offset and I/Q imbalance, a
strong carrier beside the band and one inside it (cancelled), a narrowband interferer inside
it (flagged), a receiver gain step (levelled), Rician fading, GFSK and raised-cosine OOK
(whose detection loss is real: the correlators are rectangular), clipping, long bursts with a
clock offset. Prints per case: bursts found of sent, the capture's Eb/N0 against the truth, the
Eb/N0 from power, the measured BER and the flags; then PASS/FAIL for what each case should
give (tests/test_robustness.py checks the same at 10 bursts). Figures only.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from robustness_lib import CASES, run_case  # noqa: E402


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("cases", nargs="*", help=f"some of: {', '.join(CASES)}")
    ap.add_argument("--bursts", type=int, default=10)
    ap.add_argument("--seed", type=int, default=7)
    args = ap.parse_args()
    names = args.cases or list(CASES)
    head = ("case", "found", "Eb/N0", "truth", "power", "BER")
    print("{:15s} {:>6s} {:>6s} {:>6s} {:>6s} {:>8s}  flags".format(*head))
    verdicts = []
    t_all = time.perf_counter()
    for name in names:
        r = run_case(name, args.bursts, args.seed)
        s = r.report.summary

        def f(v):
            return f"{'—':>6s}" if v is None else f"{v:6.2f}"

        ber = "—" if s.measured_ber is None else f"{s.measured_ber:.1e}"
        print(
            f"{name:15s} {s.bursts:3d}/{r.sent:<2d} {f(s.ebn0_db)} {r.truth_db:6.2f} "
            f"{f(s.available_ebn0_db)} {ber:>8s}  {', '.join(s.flags)}"
        )
        verdicts.append((*r.verdict, name))
    print(f"{len(names)} cases in {time.perf_counter() - t_all:.0f} s")
    for ok, what, name in verdicts:
        print(f"{'PASS' if ok else 'FAIL'}  {name}: {what}")


if __name__ == "__main__":
    main()
