"""The one-pass capture facts against independent references.

References: scipy.signal.welch (density scaling, two-sided) for the spectrum; the Gamma law
of an L-sample mean of exponential powers (METHODS §5, scipy.stats.gamma) for the noise floor;
statistical spreads of sample means for DC and power.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from iqstat.capture import Capture
from iqstat.facts import compute_facts
from iqstat.formats.open import open_capture

FS = 250e3


def _noise(rng, n, var):
    return (rng.standard_normal(n) + 1j * rng.standard_normal(n)) * np.sqrt(var / 2)


def test_noise_floor_and_power_of_white_noise(rng):
    var = 1e-3
    x = _noise(rng, 1_000_000, var)
    f = compute_facts(Capture.from_array(x, FS))
    # mean power: sample mean of 1e6 Exp(var) values has relative std 1e-3 → ±0.02 dB at 5σ
    assert abs(f.mean_power_dbfs - 10 * np.log10(var)) < 0.03
    # floor from 3906 frame means: 10th-percentile estimator, spread well under 0.05 dB
    assert abs(f.noise_floor_dbfs - 10 * np.log10(var)) < 0.1
    assert abs(f.noise_psd_dbfs_per_hz - 10 * np.log10(var / FS)) < 0.1
    assert f.occupied_bandwidth_hz is None


def test_noise_floor_survives_bursts_filling_most_of_the_capture(rng):
    """METHODS §10: a median-over-time floor lands inside bursts that fill most of the capture."""
    var = 1e-4
    n = 1_000_000
    x = _noise(rng, n, var)
    t = np.arange(n)
    on = (t % 100_000) < 70_000  # 70 % duty cycle
    x[on] += 0.05 * np.exp(2j * np.pi * 0.02 * t[on])
    f = compute_facts(Capture.from_array(x, FS))
    assert abs(f.noise_floor_dbfs - 10 * np.log10(var)) < 0.3


def test_spectrum_agrees_with_scipy_welch(rng):
    n = 1 << 18
    t = np.arange(n)
    x = _noise(rng, n, 1e-4) + 0.02 * np.exp(2j * np.pi * (12_500 / FS) * t)
    f = compute_facts(Capture.from_array(x, FS))
    ref_f, ref_p = signal.welch(
        x,
        fs=FS,
        window="hann",
        nperseg=1024,
        noverlap=0,
        return_onesided=False,
        scaling="density",
        detrend=False,
    )
    ref_f, ref_p = np.fft.fftshift(ref_f), np.fft.fftshift(ref_p)
    np.testing.assert_allclose(f.spectrum_freq_hz, ref_f)
    # np.hanning is symmetric, scipy's 'hann' periodic: tiny difference in the window only.
    np.testing.assert_allclose(10 ** (np.array(f.spectrum_dbfs_per_hz) / 10), ref_p, rtol=0.02)
    # Invariant (as scipy's own tests use): the PSD integrates to the mean power.
    df = FS / 1024
    total = np.sum(10 ** (np.array(f.spectrum_dbfs_per_hz) / 10)) * df
    assert abs(10 * np.log10(total) - f.mean_power_dbfs) < 0.05
    assert abs(f.occupied_center_hz - 12_500) < 2 * df
    assert f.occupied_bandwidth_hz < 6 * df


def test_dc_offset_and_clipping_of_integer_data(tmp_path, rng):
    n = 200_000
    x = _noise(rng, n, 0.01) + (0.05 - 0.02j)
    x[:1000] = 1.5 + 1.5j  # 1000 clipped samples
    comps = np.empty(2 * n)
    comps[0::2], comps[1::2] = x.real, x.imag
    q = np.clip(np.rint(comps * 32768), -32768, 32767).astype("<i2")
    q.tofile(tmp_path / "c.cs16")
    f = compute_facts(open_capture(tmp_path / "c.cs16", datatype="ci16_le", sample_rate_hz=FS))
    assert f.clipped_fraction == 1000 / n
    # DC: std of the mean of n samples of variance 0.005 per component ≈ 1.6e-4
    assert abs(f.dc_offset_i - (0.05 + 1000 * (1 - 0.05) / n)) < 1e-3
    assert abs(f.dc_offset_q - (-0.02 + 1000 * (1 + 0.02) / n)) < 1e-3


def test_chunk_size_does_not_change_the_figures(rng):
    x = _noise(rng, 300_001, 1e-3)
    a = compute_facts(Capture.from_array(x, FS), chunk_samples=1 << 16)
    b = compute_facts(Capture.from_array(x, FS), chunk_samples=1 << 20)
    assert abs(a.mean_power_dbfs - b.mean_power_dbfs) < 1e-9
    assert a.peak_power_dbfs == b.peak_power_dbfs
    # float32 sums in different orders
    np.testing.assert_allclose(a.spectrum_dbfs_per_hz, b.spectrum_dbfs_per_hz, atol=1e-4)


def test_integer_and_float_recordings_give_the_same_figures(tmp_path, rng):
    """The ci16 fast path (scaled after the sums) must agree with plain float data."""
    n = 400_000
    x = _noise(rng, n, 1e-3) + 0.01 * np.exp(2j * np.pi * 0.1 * np.arange(n))
    comps = np.empty(2 * n)
    comps[0::2], comps[1::2] = x.real, x.imag
    q = np.clip(np.rint(comps * 32768), -32768, 32767).astype("<i2")
    q.tofile(tmp_path / "a.cs16")
    a = compute_facts(open_capture(tmp_path / "a.cs16", datatype="ci16_le", sample_rate_hz=FS))
    b = compute_facts(Capture.from_array((q[0::2] + 1j * q[1::2]) / 32768, FS))
    for key in (
        "mean_power_dbfs",
        "peak_power_dbfs",
        "noise_floor_dbfs",
        "noise_psd_dbfs_per_hz",
        "occupied_bandwidth_hz",
        "dc_offset_dbfs",
    ):
        assert abs(getattr(a, key) - getattr(b, key)) < 1e-3, key
    np.testing.assert_allclose(a.spectrum_dbfs_per_hz, b.spectrum_dbfs_per_hz, atol=1e-3)
    # A continuous tone is part of every frame: the time-domain floor holds noise + tone.
    assert abs(a.noise_floor_dbfs - 10 * np.log10(1e-3 + 1e-4)) < 0.1


@pytest.mark.parametrize("datatype, scale, offset", [("ci16_le", 32768, 0), ("cu8", 128, 128)])
def test_clipping_counted_in_every_chunk_that_has_it(tmp_path, rng, datatype, scale, offset):
    """Samples with a component at ≥ 99 % of full scale, counted directly on the stored
    values (definition of the count, common practice, no source) in chunks far from full
    scale and in chunks holding only one or a few clipped samples."""
    n = 100_000
    x = _noise(rng, n, 0.001)
    x[[5, 40_000, 40_001, 99_999]] = [1.2, -1.2j, 0.995 + 0j, -0.999 - 0.1j]
    comps = np.empty(2 * n)
    comps[0::2], comps[1::2] = x.real, x.imag
    lo, hi = (-scale, scale - 1) if offset == 0 else (0, 2 * scale - 1)
    q = np.clip(np.rint(comps * scale) + offset, lo, hi)
    q.astype("<i2" if datatype == "ci16_le" else "u1").tofile(tmp_path / "c.bin")
    span = hi - lo
    clipped = (q >= hi - 0.005 * span) | (q <= lo + 0.005 * span)
    expected = int(np.count_nonzero(clipped.reshape(-1, 2).any(axis=1)))
    assert expected == 4
    cap = open_capture(tmp_path / "c.bin", datatype=datatype, sample_rate_hz=FS)
    for chunk in (1 << 12, 30_001, 1 << 20):
        f = compute_facts(cap, chunk_samples=chunk)
        assert f.clipped_fraction == expected / n, chunk


@pytest.mark.parametrize("chunk", [30_001, 4096 + 7])
def test_welch_frames_never_straddle_chunks(rng, chunk):
    """Reference: the Welch average (P. D. Welch, IEEE Trans. Audio Electroacoust. AU-15,
    1967, eq. 3-5) computed directly with a float64 numpy FFT over exactly the frames of the
    1024-sample grid that lie wholly inside one chunk. A frame across a chunk boundary must be
    skipped, not assembled from samples of the wrong end of the chunk."""
    n = 200_000  # < 1024² samples: every grid frame is a candidate (stride 1)
    x = _noise(rng, n, 1e-2).astype(np.complex64)
    # A tone only in the second half of each chunk: frames wrapped from a chunk's end into its
    # start would carry it into the wrong frames and change the spectrum.
    t = np.arange(n)
    x[(t % chunk) > chunk // 2] += (
        np.complex64(0.3)
        * np.exp(2j * np.pi * 0.1 * t).astype(np.complex64)[(t % chunk) > chunk // 2]
    )
    f = compute_facts(Capture.from_array(x, FS), chunk_samples=chunk)
    w = np.hanning(1024).astype(np.float32).astype(np.float64)
    starts = np.arange(0, n - 1024 + 1, 1024)
    inside = (starts // chunk) == ((starts + 1023) // chunk)
    frames = x[starts[inside][:, None] + np.arange(1024)].astype(np.complex128) * w
    acc = np.mean(np.abs(np.fft.fft(frames, axis=1)) ** 2, axis=0)
    ref = np.fft.fftshift(acc) / (FS * np.sum(w**2))
    # float32 FFT of the facts pass against float64 here: agreement to ~1e-5 dB expected
    np.testing.assert_allclose(f.spectrum_dbfs_per_hz, 10 * np.log10(ref), atol=1e-3)


def _fsk_like(rng, n, amp, noise_var):
    """Constant-envelope phase walk (an FSK stream's envelope) plus white noise."""
    ph = np.cumsum(rng.choice([-1.0, 1.0], n) * 0.06)
    return amp * np.exp(1j * ph) + _noise(rng, n, noise_var)


def _ci16(tmp_path, x, name, limit=32767):
    """Write x as ci16; components beyond ±limit counts saturate there (a converter's limit)."""
    comps = np.empty(2 * len(x))
    comps[0::2], comps[1::2] = x.real, x.imag
    q = np.clip(np.rint(comps * 32768), -limit, limit).astype("<i2")
    q.tofile(tmp_path / name)
    return open_capture(tmp_path / name, datatype="ci16_le", sample_rate_hz=FS)


def test_clipping_below_full_scale_is_found_at_its_level(tmp_path, rng):
    # A 12-bit converter in 16-bit words saturates at ±2047 counts of 32768 (fact of the
    # trade: a converter's largest code; 20·log10(2047/32768) = −24.09 dBFS). Signal at
    # −22 dBFS per component peak with noise 20 dB down: a large share of it is clipped.
    x = _fsk_like(rng, 400_000, 0.08, 0.08**2 / 100)
    f = compute_facts(_ci16(tmp_path, x, "adc12.cs16", limit=2047))
    assert f.clip_level_dbfs == pytest.approx(20 * np.log10(2047 / 32768), abs=1e-6)
    assert f.clipped_fraction > 0.1


def test_clipped_float_recording_is_found(rng):
    x = _fsk_like(rng, 400_000, 0.5, 0.05**2)
    y = np.clip(x.real, -0.25, 0.25) + 1j * np.clip(x.imag, -0.25, 0.25)
    f = compute_facts(Capture.from_array(y.astype(np.complex64), FS))
    assert f.clip_level_dbfs == pytest.approx(20 * np.log10(0.25), abs=1e-5)
    # Samples with a component on ±0.25: |cos θ| ≥ 0.5 for some component, most of them.
    assert f.clipped_fraction > 0.5


@pytest.mark.parametrize("noise_var", [0.05**2, 0.0])
def test_unclipped_signals_are_not_called_clipped(tmp_path, rng, noise_var):
    # Noisy and noiseless constant-envelope signals, and plain noise: their largest
    # components thin out towards the top (no pile-up), in float and in ci16.
    x = _fsk_like(rng, 400_000, 0.5, noise_var)
    for f in (
        compute_facts(Capture.from_array(x.astype(np.complex64), FS)),
        compute_facts(_ci16(tmp_path, x, "clean.cs16")),
        compute_facts(Capture.from_array(_noise(rng, 400_000, 0.01), FS)),
    ):
        assert f.clip_level_dbfs is None
        assert not f.clipped_fraction


@pytest.mark.parametrize("kind", ["float", "ci16", "ci16_limited"])
@pytest.mark.parametrize("chunk", [1 << 12, 1 << 16])
def test_top_level_counts_equal_a_direct_count(tmp_path, rng, kind, chunk):
    """The chunked count of components on the largest |I|, |Q| level and in the 1 % below it
    (picked by their float32 squares) equals counting over all components at once (the
    definition; no source needed)."""
    from iqstat.facts import PILE_BAND, FactsAccumulator, iter_unscaled_chunks

    x = _fsk_like(rng, 100_000, 0.3, 0.05**2)
    if kind == "float":
        cap = Capture.from_array(x.astype(np.complex64), FS)
    else:
        cap = _ci16(tmp_path, x, f"{kind}.cs16", limit=32767 if kind == "ci16" else 9000)
    acc = FactsAccumulator(cap, chunk)
    comps = []
    for start, y, bad, raw in iter_unscaled_chunks(cap, chunk):
        acc.add(start, y, bad, raw)
        comps.append(np.abs(y.view(np.float32)))
    a = np.concatenate(comps)
    top = float(a.max())
    tol = 0.5 if kind != "float" else 1e-6 * top
    at = a >= np.float32(top - tol)
    near = (a >= np.float32(top * (1 - PILE_BAND))) & ~at
    assert acc.top == top
    assert acc.n_top == np.count_nonzero(at)
    assert acc.n_top_samples == np.count_nonzero(at.reshape(-1, 2).any(axis=1))
    assert acc.n_near == np.count_nonzero(near)
    if kind == "ci16_limited":
        assert acc.n_top > 1000  # the limit is reached often: the counts are not trivial
