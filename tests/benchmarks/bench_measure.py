"""Benchmark: `iqstat measure` throughput, start-up time and peak memory.

Run:  python tests/benchmarks/bench_measure.py [--dir /tmp] [--big-gigabytes 2]

Synthesises (once, cached in --dir) ci16 2-FSK captures at 250 kS/s with bursts of ~560 symbols
at 4.8 kBd and noise gaps, of 10 M and 40 M samples, then times the whole `iqstat measure`
command on each (pinned to one core) and prints:
- the marginal throughput (40 M − 10 M samples) / (t40 − t10), which excludes start-up;
- the marginal time of a bare numpy pass over the same files (read in chunks + |x|²) and the
  ratio of the two;
- start-up (`iqstat --version`) time;
- peak RSS of the command, also on a --big-gigabytes capture (default 2 GB; 0 to skip).
Not a test: figures only.
"""

from __future__ import annotations

import argparse
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

SCENARIO = """
[link]
modulation = "2fsk"
symbol_rate = 4800.0
tone_spacing = 4800.0
[frame]
preamble = "aaaaaaaa"
sync_word = "2dd4"
payload = "pn9"
payload_bits = 512
[requirement]
ber = 1e-4
[capture]
sample_rate = "250k"
datatype = "ci16_le"
seed = 77
[bursts]
count = {count}
ebn0_db = {{uniform = [6.0, 20.0]}}
cfo_hz = {{uniform = [-3000.0, 3000.0]}}
gap_s = {{uniform = [{gap_lo}, {gap_hi}]}}
[impairments]
clock_offset_ppm = 20.0
"""

PROFILE = """
[link]
modulation = "2fsk"
symbol_rate = 4800.0
tone_spacing = 4800.0
[frame]
preamble = "aaaaaaaa"
sync_word = "2dd4"
payload = "pn9"
payload_bits = 512
[requirement]
ber = 1e-4
"""

ENV = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1")


def make(dirpath: Path, name: str, n_samples: float, gap_s: tuple[float, float]) -> Path:
    meta = dirpath / f"{name}.sigmf-meta"
    if meta.exists():
        return meta
    # one burst ≈ 0.117 s (560 symbols) + the mean gap
    per_burst = (560 / 4800 + 0.5 * (gap_s[0] + gap_s[1])) * 250e3
    count = max(1, int(n_samples / per_burst))
    sc = dirpath / f"{name}.toml"
    sc.write_text(SCENARIO.format(count=count, gap_lo=gap_s[0], gap_hi=gap_s[1]))
    subprocess.run(
        [sys.executable, "-m", "iqstat.cli", "synth", str(sc), "--out", str(dirpath)],
        check=True,
        env=ENV,
        stdout=subprocess.DEVNULL,
    )
    return meta


def run_measure(meta: Path, profile: Path) -> float:
    cmd = [
        "taskset",
        "-c",
        "0",
        sys.executable,
        "-m",
        "iqstat.cli",
        "measure",
        str(meta),
        "--profile",
        str(profile),
        "--json",
        os.devnull,
    ]
    t0 = time.perf_counter()
    subprocess.run(cmd, check=True, env=ENV, stdout=subprocess.DEVNULL)
    return time.perf_counter() - t0


def _timed_child(code: str) -> float:
    """Run a Python snippet pinned to core 0; it prints its own elapsed seconds."""
    out = subprocess.run(
        ["taskset", "-c", "0", sys.executable, "-c", code],
        check=True,
        env=ENV,
        capture_output=True,
        text=True,
    )
    return float(out.stdout.strip())


def bare_pass(meta: Path) -> float:
    """Chunked: memmap, convert 2 M components at a time into one buffer, |x|², sum."""
    data = meta.with_suffix(".sigmf-data")
    code = (
        "import numpy as np, sys, time\n"
        "t0 = time.perf_counter()\n"
        f"m = np.memmap({str(data)!r}, dtype='<i2', mode='r')\n"
        "s = 0.0\n"
        "buf = np.empty(1 << 21, np.float32)\n"
        "for a in range(0, m.size, 1 << 21):\n"
        "    c = m[a:a + (1 << 21)]\n"
        "    b = buf[:c.size]\n"
        "    np.copyto(b, c, casting='unsafe')\n"
        "    s += float(np.abs(b.view(np.complex64)).__pow__(2).sum())\n"
        "print(time.perf_counter() - t0)\n"
    )
    return _timed_child(code)


def naive_pass(meta: Path) -> float:
    """The plainest numpy version: read the whole file, convert, |x|² (whole-array temporaries)."""
    data = meta.with_suffix(".sigmf-data")
    code = (
        "import numpy as np, time\n"
        "t0 = time.perf_counter()\n"
        f"x = np.fromfile({str(data)!r}, dtype='<i2').astype(np.float32).view(np.complex64)\n"
        "p = float((np.abs(x) ** 2).sum())\n"
        "print(time.perf_counter() - t0)\n"
    )
    return _timed_child(code)


def warm(meta: Path) -> None:
    with open(meta.with_suffix(".sigmf-data"), "rb") as f:
        while f.read(1 << 26):
            pass


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--dir", default="/tmp/iqstat_bench_measure")
    ap.add_argument("--big-gigabytes", type=float, default=2.0)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument(
        "--gap-s",
        type=float,
        nargs=2,
        default=(0.02, 0.06),
        metavar=("LO", "HI"),
        help="noise gaps between bursts, uniform in [LO, HI] seconds (default "
        "0.02 0.06: bursts fill ~75 %% of the capture)",
    )
    args = ap.parse_args()
    gap = tuple(args.gap_s)
    tag = f"g{gap[0]:g}-{gap[1]:g}"
    d = Path(args.dir)
    d.mkdir(parents=True, exist_ok=True)
    profile = d / "link.toml"
    profile.write_text(PROFILE)
    small, large = make(d, f"m10{tag}", 10e6, gap), make(d, f"m40{tag}", 40e6, gap)
    n10 = small.with_suffix(".sigmf-data").stat().st_size // 4
    n40 = large.with_suffix(".sigmf-data").stat().st_size // 4
    for m in (small, large):
        warm(m)
    t10 = min(run_measure(small, profile) for _ in range(args.repeats))
    t40 = min(run_measure(large, profile) for _ in range(args.repeats))
    # Before any other child runs: the high-water mark of the children so far is measure's.
    rss_small = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    b10 = min(bare_pass(small) for _ in range(args.repeats))
    b40 = min(bare_pass(large) for _ in range(args.repeats))
    w10 = min(naive_pass(small) for _ in range(args.repeats))
    w40 = min(naive_pass(large) for _ in range(args.repeats))
    t0 = time.perf_counter()
    subprocess.run(
        [sys.executable, "-m", "iqstat.cli", "--version"],
        check=True,
        env=ENV,
        stdout=subprocess.DEVNULL,
    )
    t_start = time.perf_counter() - t0
    marg = (n40 - n10) / (t40 - t10)
    marg_bare = (n40 - n10) / (b40 - b10)
    duty = (560 / 4800) / (560 / 4800 + 0.5 * (gap[0] + gap[1]))
    print(
        f"captures: {n10:,} and {n40:,} samples (ci16_le, 250 kS/s, 2-FSK bursts of 560 "
        f"symbols, gaps {gap[0]:g}-{gap[1]:g} s: bursts fill ~{100 * duty:.0f} %)"
    )
    print(f"iqstat measure: {t10:.2f} s and {t40:.2f} s (one core, best of {args.repeats})")
    print(
        f"marginal throughput: {marg / 1e6:.1f} M samples/s "
        f"({marg / 250e3:.0f}x real time at 250 kS/s)"
    )
    print(
        f"bare numpy read + |x|^2: {b10:.3f} s and {b40:.3f} s -> marginal "
        f"{marg_bare / 1e6:.1f} M samples/s"
    )
    print(f"marginal time ratio measure/bare: {(t40 - t10) / (b40 - b10):.2f}")
    print(
        f"naive numpy (np.fromfile whole file, astype, |x|^2): {w10:.3f} s and {w40:.3f} s "
        f"-> marginal {(n40 - n10) / (w40 - w10) / 1e6:.1f} M samples/s; ratio measure/naive "
        f"{(t40 - t10) / (w40 - w10):.2f}"
    )
    print(f"start-up (iqstat --version): {t_start:.2f} s")
    print(f"peak RSS (10 M / 40 M runs): {rss_small:.0f} MB")
    if args.big_gigabytes > 0:
        big = make(d, f"big{tag}", args.big_gigabytes * 1e9 / 4, gap)
        warm(big)
        cmd = [
            "/usr/bin/time",
            "-f",
            "%M %e",
            "taskset",
            "-c",
            "0",
            sys.executable,
            "-m",
            "iqstat.cli",
            "measure",
            str(big),
            "--profile",
            str(profile),
            "--json",
            os.devnull,
        ]
        out = subprocess.run(cmd, env=ENV, capture_output=True, text=True, check=True)
        kb, secs = out.stderr.strip().splitlines()[-1].split()
        n_big = big.with_suffix(".sigmf-data").stat().st_size // 4
        print(
            f"big capture: {n_big:,} samples, {float(secs):.1f} s, peak RSS {int(kb) / 1024:.0f} MB"
        )


if __name__ == "__main__":
    main()
