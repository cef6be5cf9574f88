"""Throughput of burst detection on a 10 M-sample array capture (prints M samples/s).

Run: python tests/benchmarks/bench_bursts.py [CAPTURE.sigmf-meta ...]
Scenario (invented): 40 s at 250 kS/s, noise at -20 dBFS, one 2-FSK burst (4.8 kBd, 560 symbols,
12 dB Eb/N0) every 0.5 s. The reference is a bare pass over the same capture: read each chunk
and sum |x|².

With capture files as arguments (e.g. made by ``iqstat synth``), times instead the one-pass
survey (:func:`survey_capture`, as the measurement calls it for a 2-FSK link of 560 symbols at
4.8 kBd with 4.8 kHz tone spacing) and the bare pass on each file, in CPU (process) time, best
of 7, as ms per 10 M samples. Pin it to one core for stable figures:
``OMP_NUM_THREADS=1 taskset -c 1 python tests/benchmarks/bench_bursts.py FILE``.
"""

from __future__ import annotations

import sys
import time

import numpy as np

from iqstat.bursts import detect_bursts, survey_capture
from iqstat.capture import Capture
from iqstat.facts import compute_facts
from iqstat.synth import modulate

FS_HZ = 250e3
RS_HZ = 4800.0
N_SAMPLES = 10_000_000


def make_capture(seed: int = 7) -> Capture:
    rng = np.random.default_rng(seed)
    noise_var = 1e-2
    x = (rng.standard_normal(N_SAMPLES) + 1j * rng.standard_normal(N_SAMPLES)).astype(np.complex64)
    x *= np.float32(np.sqrt(noise_var / 2))
    amp = np.sqrt(10 ** (12 / 10) * noise_var * RS_HZ / FS_HZ)
    for start in range(10_000, N_SAMPLES - 40_000, 125_000):
        s = modulate(
            rng.integers(0, 2, 560),
            modulation="2fsk",
            sample_rate_hz=FS_HZ,
            symbol_rate_hz=RS_HZ,
            tone_spacing_hz=4800.0,
            cfo_hz=12e3,
            amplitude=amp,
        )
        x[start : start + s.size] += s.astype(np.complex64)
    return Capture.from_array(x, FS_HZ)


def bare_pass(capture: Capture) -> float:
    total = 0.0
    for _, chunk in capture.iter_chunks(1 << 20):
        total += float(np.sum(np.abs(chunk) ** 2))
    return total


def best_of(fn, repeat: int = 3, clock=time.perf_counter) -> float:
    times = []
    for _ in range(repeat):
        t0 = clock()
        fn()
        times.append(clock() - t0)
    return min(times)


def time_files(paths: list[str]) -> None:
    from iqstat.formats.open import open_capture

    options = dict(expected_burst_s=560 / RS_HZ, signal_bandwidth_hz=4800.0 + 2 * RS_HZ)
    for path in paths:
        cap = open_capture(path)
        per_10m = 1e3 * 1e7 / cap.n_samples
        t_bare = best_of(lambda cap=cap: bare_pass(cap), 7, time.process_time)
        t_one = best_of(lambda cap=cap: survey_capture(cap, **options), 7, time.process_time)
        _, det = survey_capture(cap, **options)
        print(
            f"{path}: survey {t_one * per_10m:6.1f} ms per 10 M samples, bare pass "
            f"{t_bare * per_10m:5.1f}, ratio {t_one / t_bare:4.2f}, {len(det.bursts)} bursts"
        )


def main() -> None:
    cap = make_capture()
    t_bare = best_of(lambda: bare_pass(cap))
    t_det = best_of(lambda: detect_bursts(cap))
    t_facts = best_of(lambda: compute_facts(cap))
    t_one = best_of(lambda: survey_capture(cap))
    det = detect_bursts(cap)
    print(f"bare pass (read + |x|^2): {N_SAMPLES / t_bare / 1e6:8.1f} M samples/s")
    print(f"detect_bursts:            {N_SAMPLES / t_det / 1e6:8.1f} M samples/s")
    print(f"ratio detect/bare:        {t_det / t_bare:8.2f}")
    print(f"compute_facts:            {N_SAMPLES / t_facts / 1e6:8.1f} M samples/s")
    print(f"survey_capture (both):    {N_SAMPLES / t_one / 1e6:8.1f} M samples/s")
    print(f"ratio survey/bare:        {t_one / t_bare:8.2f}")
    print(f"{len(det.bursts)} bursts, band {det.band_hz}, {det.message}")


if __name__ == "__main__":
    if len(sys.argv) > 1:
        time_files(sys.argv[1:])
    else:
        main()
