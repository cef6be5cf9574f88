"""Benchmark: `iqstat describe` on a large ci16 capture (throughput and peak memory).

Run:  python tests/benchmarks/bench_describe.py [--gigabytes 2] [--dir /tmp]
Prints the whole-command time, GB/s, peak RSS of the command, and for comparison the time of a
bare ``np.fromfile`` read of the same file. The file is read once beforehand so the figures
are from the page cache. Not a test: no pass/fail, just figures.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np


def make_capture(path: Path, n_bytes: int) -> None:
    if path.exists() and path.stat().st_size == n_bytes:
        return
    rng = np.random.default_rng(7)
    block = (rng.standard_normal(1 << 22) * 800).astype("<i2")  # 8 MB of noise, repeated
    with open(path, "wb") as f:
        left = n_bytes
        while left > 0:
            b = block.tobytes()[: min(left, block.nbytes)]
            f.write(b)
            left -= len(b)
    meta = path.with_suffix(".sigmf-meta")
    meta.write_text(
        '{"global": {"core:datatype": "ci16_le", "core:version": "1.2.6", '
        '"core:sample_rate": 2400000.0}, "captures": [{"core:sample_start": 0}], '
        '"annotations": []}'
    )


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--gigabytes", type=float, default=2.0)
    ap.add_argument("--dir", default="/tmp")
    args = ap.parse_args()
    n_bytes = int(args.gigabytes * 1e9) // 4 * 4
    data = Path(args.dir) / "iqstat_bench_describe.sigmf-data"
    make_capture(data, n_bytes)
    with open(data, "rb") as f:  # warm the page cache
        while f.read(1 << 26):
            pass
    env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1")
    cmd = [
        sys.executable,
        "-m",
        "iqstat.cli",
        "describe",
        str(data.with_suffix(".sigmf-meta")),
        "--json",
    ]
    t0 = time.perf_counter()
    subprocess.run(["taskset", "-c", "0", *cmd], check=True, env=env, stdout=subprocess.DEVNULL)
    t_cmd = time.perf_counter() - t0
    # Read RSS before this process grows: a forked child inherits its parent's high-water mark.
    rss_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    t0 = time.perf_counter()
    x = np.fromfile(data, dtype="<i2")
    t_fromfile = time.perf_counter() - t0
    del x
    gb = n_bytes / 1e9
    print(f"file: {gb:.2f} GB ci16_le ({n_bytes // 4:,} samples)")
    print(f"iqstat describe (whole command, one core): {t_cmd:.2f} s = {gb / t_cmd:.2f} GB/s")
    print(f"peak RSS of the command: {rss_mb:.0f} MB")
    print(f"bare np.fromfile of the same file: {t_fromfile:.2f} s = {gb / t_fromfile:.2f} GB/s")


if __name__ == "__main__":
    main()
