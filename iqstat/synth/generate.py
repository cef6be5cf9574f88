"""Synthetic captures with known truth: plan the bursts, generate chunk by chunk, write.

:func:`synthesize` returns samples and truth in memory (tests); :func:`write_synthetic` writes
a SigMF recording plus a separate truth file ``NAME.truth.json`` (the recording itself carries
no truth: no Eb/N0, bits or offsets in its metadata).

Memory: the burst schedule (bits, symbols, parameters) is planned up front; samples are then
generated in chunks of :data:`CHUNK_SAMPLES` (noise of the chunk, the parts of the bursts that
fall in it, interferer, receiver impairments) and written chunk by chunk, so peak memory is a
few chunks (~100 MB) plus the burst waveforms, whatever the capture length. Burst waveforms are
kept between the planning pass and the chunk pass while they total at most
:data:`BURST_CACHE_SAMPLES`; beyond that they are regenerated (deterministically).

Random streams (numpy ``SeedSequence(seed, spawn_key=...)``): (0,) the plan; (1, c) the noise of
chunk c; (2, b) the fading of burst b; (3, c) the narrowband interferer of chunk c, (4,) its
filter warm-up; (5,) the interferer phase. The output is a function of the scenario, the seed
and CHUNK_SAMPLES only.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import tempfile
from collections.abc import Iterator
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np

from iqstat.errors import CaptureError, ParameterError
from iqstat.formats.sigmf_writer import WrittenRecording, recording_paths, write_recording
from iqstat.patterns import PRBS_PERIOD
from iqstat.profile import bits_to_symbols, frame_layout
from iqstat.synth.impairments import (
    NarrowbandInterferer,
    ToneInterferer,
    apply_iq_imbalance,
    clip_components,
    iq_imbalance_coefficients,
    rician_gain,
)
from iqstat.synth.scenario import Scenario, ValueSpec, load_scenario
from iqstat.waveform import modulate, symbol_period_samples

CHUNK_SAMPLES = 1 << 20
BURST_CACHE_SAMPLES = 1 << 22
#: Most samples one burst may hold: each is made whole in memory (about 85 bytes a sample at
#: the peak: 2.1 GB for 25 M samples, so some 2.8 GB here, 134 s at 250 kS/s); a 2 000 s
#: continuous burst was killed for memory.
MAX_BURST_SAMPLES = 1 << 25
TRUTH_FORMAT = "iqstat-synth-truth"
TRUTH_VERSION = 1
TRUTH_EXT = ".truth.json"

CONVENTION = (
    "Eb/N0 = P * (fs / bit_rate) / noise_var, with P = mean |s|^2 of the burst (carrier offset, "
    "phase, fractional timing, clock offset and fading included) over its samples "
    "[start_sample, stop_sample), noise_var = E|noise|^2 per complex sample (full scale), "
    "bit_rate = symbol_rate * (1 + clock_offset_ppm * 1e-6) * bits_per_symbol (the burst's own "
    "rate); for OOK Eb is the average energy per bit (off symbols included). Es/N0 = Eb/N0 * "
    "bits_per_symbol. Interferer, IQ imbalance, DC offset, clipping and quantisation are applied "
    "after and are not part of P. Times are in samples of the capture; symbol 0 of a burst "
    "starts at timing_offset_samples; passing the burst's symbols and parameters to "
    "iqstat.synth.modulate(..., timing_offset_samples=t) reproduces it (without fading) on the "
    "capture's sample grid from sample 0."
)


@dataclass(frozen=True)
class BurstTruth:
    """What was sent in one burst, in the capture's units (full scale, samples)."""

    index: int
    start_sample: int
    stop_sample: int
    timing_offset_samples: float
    symbol_period_samples: float
    n_symbols: int
    cfo_hz: float
    phase_rad: float
    clock_offset_ppm: float
    ebn0_db: float
    esn0_db: float
    signal_power: float
    amplitude: float
    amplitude_db: float
    rician_k_db: float | None
    doppler_hz: float | None
    payload_phase: int
    bits: str
    symbols: str

    def to_dict(self) -> dict:
        return asdict(self)

    def symbols_array(self) -> np.ndarray:
        return np.frombuffer(self.symbols.encode("ascii"), dtype=np.uint8).astype(np.int64) - 48

    def bits_array(self) -> np.ndarray:
        return np.frombuffer(self.bits.encode("ascii"), dtype=np.uint8) - 48


@dataclass(frozen=True)
class Truth:
    """The truth of a synthetic capture (see :data:`CONVENTION`)."""

    seed: int
    sample_rate_hz: float
    n_samples: int
    datatype: str
    noise_var: float
    gain: float
    modulation: str
    symbol_rate_hz: float
    tone_spacing_hz: float | None
    bits_per_symbol: int
    interferer: dict | None
    dc_offset: tuple[float, float]
    iq_gain_db: float
    iq_phase_deg: float
    clip_dbfs: float | None
    bursts: tuple[BurstTruth, ...]
    n_clipped: int = 0

    def to_dict(self) -> dict:
        d = asdict(self)
        d["bursts"] = [b.to_dict() for b in self.bursts]
        return d


@dataclass(frozen=True, eq=False)
class Synthesis:
    """Samples (complex128, before quantisation) and truth, from :func:`synthesize`."""

    samples: np.ndarray
    truth: Truth
    scenario: Scenario


@dataclass(frozen=True)
class SynthOutput:
    meta_path: Path
    data_path: Path
    truth_path: Path
    n_samples: int
    n_clipped: int

    def to_dict(self) -> dict:
        return {k: str(v) if isinstance(v, Path) else v for k, v in asdict(self).items()}


def _stream(seed: int, *key: int) -> np.random.Generator:
    return np.random.default_rng(np.random.SeedSequence(seed, spawn_key=key))


def _draw(spec: ValueSpec, b: int, rng: np.random.Generator) -> float:
    if spec.constant is not None:
        return spec.constant
    if spec.values is not None:
        return spec.values[b]
    lo, hi = spec.uniform
    return float(rng.uniform(lo, hi))


@dataclass
class _BurstPlan:
    index: int
    t0: float
    period: float
    symbols: np.ndarray  # sent symbols
    bits: np.ndarray
    cfo_hz: float
    phase_rad: float
    ppm: float
    ebn0_db: float
    payload_phase: int
    pad: int
    start: int = 0
    stop: int = 0
    base: int = 0
    length: int = 0
    p_unit: float = 1.0
    peak_unit: float = 1.0
    amplitude: float = 0.0


class _Generator:
    """Plans a scenario and produces its samples chunk by chunk."""

    def __init__(self, sc: Scenario, seed: int):
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
            raise ParameterError(f"seed {seed!r} must be a whole number >= 0")
        self.sc, self.seed = sc, int(seed)
        prof = sc.profile
        self.fs = sc.sample_rate_hz
        self.k = prof.bits_per_symbol
        rng = _stream(self.seed, 0)
        ook_rc = prof.modulation == "ook" and sc.ook_shape == "raised-cosine"
        self.bursts: list[_BurstPlan] = []
        cursor = None
        for b in range(sc.n_bursts):
            ebn0 = _draw(sc.ebn0_db, b, rng)
            cfo = _draw(sc.cfo_hz, b, rng)
            gap = _draw(sc.gap_s, b, rng)
            ppm = _draw(sc.clock_offset_ppm, b, rng)
            frac = float(rng.uniform(0, 1)) if sc.timing == "random" else sc.timing
            phase = float(rng.uniform(-np.pi, np.pi)) if sc.phase == "random" else sc.phase
            kind = prof.payload_kind
            if sc.payload_phase == "random":
                pphase = int(rng.integers(0, PRBS_PERIOD[kind])) if kind in PRBS_PERIOD else 0
            else:
                pphase = int(sc.payload_phase[b])
            layout = frame_layout(prof, payload_phase=pphase)
            bits = np.concatenate([layout.header_bits, layout.payload_bits]).astype(np.uint8)
            symbols = bits_to_symbols(bits, prof.modulation)
            period = symbol_period_samples(self.fs, prof.symbol_rate_hz, ppm)
            pad = int(math.ceil(sc.ook_rolloff * period / 2)) + 1 if ook_rc else 0
            if cursor is None:
                cursor = max(int(round(sc.lead_in_s * self.fs)), pad + 1)
            t0 = cursor + frac
            bp = _BurstPlan(b, t0, period, symbols, bits, cfo, phase, ppm, ebn0, pphase, pad)
            bp.start = int(math.ceil(t0 - 1e-9))
            bp.stop = int(math.ceil(t0 + symbols.size * period - 1e-9))
            bp.base = int(math.floor(t0)) - pad
            if bp.stop - bp.start > MAX_BURST_SAMPLES:
                raise ParameterError(
                    f"burst {b} would hold {bp.stop - bp.start:,} samples; iqstat synth makes "
                    f"each burst whole in memory and takes at most {MAX_BURST_SAMPLES:,} "
                    "(give fewer payload_bits per burst, or more bursts)"
                )
            tail = int(math.ceil(period)) + pad if ook_rc else 0
            self.bursts.append(bp)
            cursor = bp.stop + tail + int(round(gap * self.fs))
            last_end = bp.stop + tail
        self.n_samples = last_end + int(round(sc.tail_s * self.fs))
        self.ook_rc = ook_rc

        # planning pass over the unit-amplitude waveforms: realised power and peak
        self.cache: dict[int, np.ndarray] = {}
        cached = 0
        for bp in self.bursts:
            w = self._unit_waveform(bp)
            bp.length = w.size
            inner = w[bp.start - bp.base : bp.stop - bp.base]
            bp.p_unit = float(np.mean(np.abs(inner) ** 2))
            bp.peak_unit = float(np.max(np.abs(w)))
            if bp.p_unit <= 0:
                raise ParameterError(
                    f"burst {bp.index} sends no energy (all-zero OOK bits); change the frame"
                )
            if cached + w.size <= BURST_CACHE_SAMPLES:
                self.cache[bp.index] = w
                cached += w.size

        # levels in units where noise_var = 1, then one gain to full scale
        for bp in self.bursts:
            p = 10 ** (bp.ebn0_db / 10) * self.k / bp.period  # Eb/N0 = P·(T'/k)/σ²
            bp.amplitude = math.sqrt(p / bp.p_unit)
        itf = sc.interferer
        i_pow = 10 ** (itf.inr_db / 10) if itf else 0.0
        k1, k2 = iq_imbalance_coefficients(sc.iq_gain_db, sc.iq_phase_deg)
        if sc.noise_dbfs is not None:
            gain = math.sqrt(10 ** (sc.noise_dbfs / 10))
        else:
            z = math.sqrt(2 * math.log(2 * max(self.n_samples, 2)))  # ~ max of 2N N(0,1)
            sig_peak = max(bp.amplitude * bp.peak_unit for bp in self.bursts)
            tone = math.sqrt(i_pow) if itf and itf.kind == "tone" else 0.0
            nb = i_pow if itf and itf.kind == "narrowband" else 0.0
            est = (sig_peak + tone + z * math.sqrt((1 + nb) / 2)) * (abs(k1) + abs(k2))
            room = 10 ** (sc.peak_dbfs / 20) - max(abs(v) for v in sc.dc_offset)
            if room <= 0:
                raise ParameterError(
                    f"dc_offset {sc.dc_offset} leaves no room below peak_dbfs {sc.peak_dbfs}"
                )
            gain = room / est
        self.gain = gain
        self.noise_var = gain**2
        for bp in self.bursts:
            bp.amplitude *= gain
        self.itf_power = i_pow * self.noise_var
        self.clip_level = None if sc.clip_dbfs is None else 10 ** (sc.clip_dbfs / 20)
        self.n_clipped = 0

    def _unit_waveform(self, bp: _BurstPlan) -> np.ndarray:
        sc, prof = self.sc, self.sc.profile
        syms = np.concatenate([bp.symbols, [0]]) if self.ook_rc else bp.symbols
        w = modulate(
            syms, modulation=prof.modulation, sample_rate_hz=self.fs,
            symbol_rate_hz=prof.symbol_rate_hz, tone_spacing_hz=prof.tone_spacing_hz,
            bt=sc.bt, ook_shape=sc.ook_shape, ook_rolloff=sc.ook_rolloff, cfo_hz=bp.cfo_hz,
            phase_rad=bp.phase_rad, timing_offset_samples=bp.t0 - bp.base,
            clock_offset_ppm=bp.ppm,
        )  # fmt: skip
        if sc.rician_k_db is not None:
            w = w * rician_gain(
                w.size, sample_rate_hz=self.fs, k_factor=10 ** (sc.rician_k_db / 10),
                doppler_hz=sc.doppler_hz, rng=_stream(self.seed, 2, bp.index),
                t0_samples=bp.t0 - bp.base,
            )  # fmt: skip
        return w

    @staticmethod
    def _end(bp: _BurstPlan) -> int:
        return bp.base + bp.length

    def chunks(self, chunk_samples: int = CHUNK_SAMPLES) -> Iterator[tuple[int, np.ndarray]]:
        """Yield ``(start, samples)`` in order; complex128 full-scale, before quantisation."""
        sc = self.sc
        itf = sc.interferer
        tone = nb = None
        if itf and itf.kind == "tone":
            ph = float(_stream(self.seed, 5).uniform(-np.pi, np.pi))
            tone = ToneInterferer(
                offset_hz=itf.offset_hz, power=self.itf_power, phase_rad=ph, sample_rate_hz=self.fs
            )
        elif itf:
            nb = NarrowbandInterferer(
                offset_hz=itf.offset_hz, bandwidth_hz=itf.bandwidth_hz, power=self.itf_power,
                sample_rate_hz=self.fs, warmup_rng=_stream(self.seed, 4),
            )  # fmt: skip
        sd = math.sqrt(self.noise_var / 2)
        self.n_clipped = 0
        first = 0
        for c, a in enumerate(range(0, self.n_samples, chunk_samples)):
            b = min(self.n_samples, a + chunk_samples)
            rng = _stream(self.seed, 1, c)
            x = sd * (rng.standard_normal(b - a) + 1j * rng.standard_normal(b - a))  # AWGN
            while (
                first < len(self.bursts)
                and self.bursts[first].base + self.bursts[first].length <= a
            ):
                self.cache.pop(self.bursts[first].index, None)
                first += 1
            for bp in self.bursts[first:]:
                if bp.base >= b:
                    break
                w = self.cache.get(bp.index)
                if w is None:
                    w = self._unit_waveform(bp)
                    self.cache[bp.index] = w
                lo, hi = max(a, bp.base), min(b, bp.base + w.size)
                x[lo - a : hi - a] += bp.amplitude * w[lo - bp.base : hi - bp.base]
            if tone is not None:
                x += tone.chunk(a, b - a)
            if nb is not None:
                x += nb.chunk(a, b - a, _stream(self.seed, 3, c))
            x = apply_iq_imbalance(x, sc.iq_gain_db, sc.iq_phase_deg)
            if sc.dc_offset != (0.0, 0.0):
                x = x + complex(*sc.dc_offset)
            if self.clip_level is not None:
                x, n = clip_components(x, self.clip_level)
                self.n_clipped += n
            yield a, x

    def truth(self, datatype_clipped: int = 0) -> Truth:
        sc, prof = self.sc, self.sc.profile
        bursts = []
        for bp in self.bursts:
            p = bp.amplitude**2 * bp.p_unit
            ebn0 = p * (bp.period / self.k) / self.noise_var
            bursts.append(
                BurstTruth(
                    index=bp.index,
                    start_sample=bp.start,
                    stop_sample=bp.stop,
                    timing_offset_samples=bp.t0,
                    symbol_period_samples=bp.period,
                    n_symbols=int(bp.symbols.size),
                    cfo_hz=bp.cfo_hz,
                    phase_rad=bp.phase_rad,
                    clock_offset_ppm=bp.ppm,
                    ebn0_db=10 * math.log10(ebn0),
                    esn0_db=10 * math.log10(ebn0 * self.k),
                    signal_power=p,
                    amplitude=bp.amplitude,
                    amplitude_db=20 * math.log10(bp.amplitude),
                    rician_k_db=sc.rician_k_db,
                    doppler_hz=sc.doppler_hz,
                    payload_phase=bp.payload_phase,
                    bits="".join("01"[v] for v in bp.bits),
                    symbols="".join(str(int(v)) for v in bp.symbols),
                )  # fmt: skip
            )
        itf = None
        if sc.interferer:
            itf = asdict(sc.interferer) | {"power": self.itf_power}
        return Truth(
            seed=self.seed, sample_rate_hz=self.fs, n_samples=self.n_samples,
            datatype=sc.datatype, noise_var=self.noise_var, gain=self.gain,
            modulation=prof.modulation, symbol_rate_hz=prof.symbol_rate_hz,
            tone_spacing_hz=prof.tone_spacing_hz, bits_per_symbol=self.k, interferer=itf,
            dc_offset=sc.dc_offset, iq_gain_db=sc.iq_gain_db, iq_phase_deg=sc.iq_phase_deg,
            clip_dbfs=sc.clip_dbfs, bursts=tuple(bursts),
            n_clipped=self.n_clipped + datatype_clipped,
        )  # fmt: skip


def _resolve_seed(sc: Scenario, seed: int | None) -> int:
    if seed is None:
        if sc.seed is None:
            raise ParameterError(
                f"no seed for scenario {sc.source}: give --seed N or [capture] seed = N"
            )
        return sc.seed
    return seed


def synthesize(scenario: Scenario, seed: int | None = None) -> Synthesis:
    """Generate a scenario's samples and truth in memory.

    Parameters
    ----------
    scenario : Scenario
        From :func:`~iqstat.synth.scenario.load_scenario` or ``scenario_from_dict``.
    seed : int, optional
        Seed of all random streams; None uses the scenario's ``[capture] seed``.

    Returns
    -------
    Synthesis
        ``samples`` (complex128, shape (truth.n_samples,), full scale, not quantised; the
        quantisation of the recording's datatype is not applied) and ``truth``.
    """
    gen = _Generator(scenario, _resolve_seed(scenario, seed))
    out = np.empty(gen.n_samples, dtype=np.complex128)
    for a, x in gen.chunks():
        out[a : a + x.size] = x
    return Synthesis(out, gen.truth(), scenario)


def truth_document(truth: Truth, scenario: Scenario) -> dict:
    """The JSON truth document: format, version, convention, scenario, seed and truth."""
    return {
        "format": TRUTH_FORMAT,
        "version": TRUTH_VERSION,
        "convention": CONVENTION,
        "scenario": {
            "file": Path(scenario.source).name,  # the name only: no machine-specific path
            "name": scenario.name,
            "document": scenario.document,
        },
        "seed": truth.seed,
        "truth": truth.to_dict(),
    }


def _write_json_atomic(path: Path, doc: dict) -> None:
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(doc, fh, indent=1, allow_nan=False)
            fh.write("\n")
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def write_synthetic(
    scenario: Scenario | str | os.PathLike,
    out_dir: str | os.PathLike,
    seed: int | None = None,
    overwrite: bool = False,
) -> SynthOutput:
    """Write ``OUT/NAME.sigmf-meta``, ``OUT/NAME.sigmf-data`` and ``OUT/NAME.truth.json``.

    Parameters
    ----------
    scenario : Scenario or path
        A scenario or its TOML file (NAME is the file's stem).
    out_dir : path
        Output directory (created if missing).
    seed : int, optional
        None uses the scenario's own ``[capture] seed``.
    overwrite : bool
        Replace existing files of the same name.

    Returns
    -------
    SynthOutput
        Paths, sample count and the clipped-component count (scenario clipping plus datatype
        saturation).
    """
    sc = scenario if isinstance(scenario, Scenario) else load_scenario(scenario)
    seed = _resolve_seed(sc, seed)
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as e:
        raise CaptureError(f"cannot create output directory {out}: {e.strerror}") from None
    meta_path, _ = recording_paths(out / sc.name)
    truth_path = out / f"{sc.name}{TRUTH_EXT}"
    if truth_path.exists() and not overwrite:
        raise CaptureError(
            f"{truth_path} already exists; choose another output directory or pass "
            "overwrite=True (--overwrite)"
        )
    gen = _Generator(sc, seed)
    written: WrittenRecording = write_recording(
        out / sc.name, (x.astype(np.complex128, copy=False) for _, x in gen.chunks()),
        datatype=sc.datatype, sample_rate_hz=sc.sample_rate_hz,
        frequency_hz=sc.center_frequency_hz, datetime_utc=sc.datetime_utc,
        description=sc.description, author=sc.author, overwrite=overwrite,
    )  # fmt: skip
    truth = gen.truth(datatype_clipped=written.n_clipped)
    _write_json_atomic(truth_path, truth_document(truth, sc))
    return SynthOutput(written.meta_path, written.data_path, truth_path, written.n_samples,
                       truth.n_clipped)  # fmt: skip
