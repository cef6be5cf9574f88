"""Benchmark: where the time of `iqstat measure` goes, stage by stage (CPU time per burst).

Run:  python tests/benchmarks/bench_stages.py [CAPTURE] [--profile LINK.toml]

Default capture: the dense 10 M-sample one bench_measure.py synthesises (run that first), with
its link profile. Times measure_capture once to warm up, then again with every stage function
of the iqstat.measure package (the ``_stage_*`` functions, the survey pass, the reads, the
profile check, the summary) wrapped to accumulate process time, and then the JSON and terminal
reports. A function is wrapped in every submodule that looks it up by name at call time (the
reads, for one, in both iqstat.measure.pipeline and iqstat.measure.rates), each call counted
once. Prints milliseconds per burst per stage and the total. Not a test: figures only.
"""

from __future__ import annotations

import argparse
import collections
import importlib
import io
import os
import pkgutil
import time

from rich.console import Console

import iqstat.measure as M
from iqstat.formats.open import open_capture
from iqstat.profile import load_profile
from iqstat.report.measurement import render_report, report_json_pieces

DEFAULT_DIR = "/tmp/iqstat_bench_measure"


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("capture", nargs="?", default=f"{DEFAULT_DIR}/m10g0.02-0.06.sigmf-meta")
    ap.add_argument("--profile", default=f"{DEFAULT_DIR}/link.toml")
    args = ap.parse_args()
    cap = open_capture(args.capture)
    prof = load_profile(args.profile)
    M.measure_capture(cap, prof)  # warm-up: imports, first-touch allocations, page cache

    spent: collections.Counter = collections.Counter()
    modules = [
        importlib.import_module(f"{M.__name__}.{info.name}")
        for info in pkgutil.iter_modules(M.__path__)
    ]
    names = sorted({n for mod in modules for n in vars(mod) if n.startswith("_stage_")})
    names += ["survey_capture", "_read_bursts", "_check_profile_rates", "summarise"]
    for name in names:
        found = [vars(mod)[name] for mod in modules if name in vars(mod)]
        if not found:
            raise SystemExit(f"bench_stages: no submodule of {M.__name__} holds {name}")
        f = found[0]
        homes = [mod for mod in modules if vars(mod).get(name) is f]

        def timed(*a, _f=f, _name=name, **k):
            t = time.process_time()
            try:
                return _f(*a, **k)
            finally:
                spent[_name] += time.process_time() - t

        for mod in homes:
            setattr(mod, name, timed)
    t = time.process_time()
    report = M.measure_capture(cap, prof)
    total = time.process_time() - t
    t = time.process_time()
    for _ in report_json_pieces(report):
        pass
    t_json = time.process_time() - t
    t = time.process_time()
    render_report(report, Console(file=io.StringIO(), width=120))
    t_term = time.process_time() - t
    nb = max(1, len(report.bursts))
    print(
        f"{os.path.basename(args.capture)}: {cap.n_samples:,} samples, {len(report.bursts)} "
        f"bursts; measure_capture {total:.3f} s CPU = {cap.n_samples / total / 1e6:.1f} M "
        f"samples/s, {1e3 * total / nb:.2f} ms per burst"
    )
    print(f"{'stage':24s} {'s':>7s} {'ms/burst':>9s}")
    for name, v in spent.most_common():
        print(f"{name:24s} {v:7.3f} {1e3 * v / nb:9.3f}")
    rest = total - sum(spent.values())
    print(f"{'(glue)':24s} {rest:7.3f} {1e3 * rest / nb:9.3f}")
    print(f"{'JSON report':24s} {t_json:7.3f} {1e3 * t_json / nb:9.3f}")
    print(f"{'terminal report':24s} {t_term:7.3f} {1e3 * t_term / nb:9.3f}")


if __name__ == "__main__":
    main()
