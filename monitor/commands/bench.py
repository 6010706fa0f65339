"""`bandwatch bench`: how many times faster than real time this machine runs
the configured pipeline, measured side by side in one run with

- a bare numpy loop doing the same transforms (mean removal, window, rfft,
  squared magnitude, per frame);
- scipy.signal.welch called once per result on the samples that result
  covers, which is what recomputing each result from scratch would cost
  (only when scipy is installed: it is a test tool, not a dependency);
- the memory the pipeline allocates, over a short and a four times longer
  run, to show it does not grow per frame.

The samples come from the simulator at the config's rate and channels
(whatever the configured source), are encoded as int16 frames of the wire
format before timing starts, and are decoded inside the timed run by the
stream path every link kind uses (a reader thread, the frame decoder, the
bounded block queue; `BytesSource` holds the bytes in place of a link): the
pipeline measured is decode, ring, spectra, bands, peaks, speed, rules and
payloads, delivered to a sink that encodes each payload and drops it.
"""

import dataclasses
import time
import tracemalloc
from typing import Any, Dict, List, Optional, TextIO

import numpy as np

from ..config import Config, SimulatorConfig
from ..acquire.decoders.frame import encode_frame
from ..deliver.base import Payload, Sink
from ..deliver.payloads import encode
from ..service.monitor import Monitor
from ..acquire.sources.memory import BytesSource
from ..acquire.sources.simulator import SimulatorSource
from ..analyse.windows import Window

DEFAULT_RATE = 25600.0  # for a file source, whose rate the recording gives
FRAME_SAMPLES = 1024  # samples per channel per wire frame (40 ms at 25.6 kHz)
CHUNK_BYTES = 65536  # bytes handed to the decoder at a time, as a reader thread would


class _EncodingSink(Sink):
    """Encodes every payload, as a real sink would, then drops it."""

    def __init__(self) -> None:
        self.count = 0

    def open(self, online: Payload, offline: Payload) -> None:
        encode(online)

    def send(self, suffix: str, payload: Payload) -> None:
        encode(payload)
        self.count += 1

    def close(self, offline: Payload) -> None:
        encode(offline)


def _rate(config: Config) -> float:
    return config.source.sample_rate if config.source.sample_rate > 0 else DEFAULT_RATE


def synthetic_samples(config: Config, seconds: float) -> np.ndarray:
    """`seconds` of the simulated machine at the config's rate and channels."""
    src = config.source
    sim = src.simulator or SimulatorConfig(
        rpm=config.speed.rpm or 1480.0, harmonics=(0.05, 0.02, 0.01), growth=0.05, noise=0.01, seed=1, seconds=0.0
    )
    sim = dataclasses.replace(sim, seconds=seconds)
    cfg = dataclasses.replace(src, kind="simulator", sample_rate=_rate(config), realtime=False, simulator=sim)
    source = SimulatorSource(cfg)
    source.block = int(_rate(config))  # big blocks: generation is not what is measured
    source.open()
    parts = []
    while True:
        block = source.read(0.0)
        if block is None:
            break
        parts.append(block.samples)
    return np.vstack(parts)


def wire_chunks(samples: np.ndarray) -> List[bytes]:
    """The samples as int16 frames (full scale at 4x the largest value),
    cut into reads of CHUNK_BYTES."""
    scale = 32767.0 / (4.0 * max(float(np.max(np.abs(samples))), 1e-12))
    counts = np.round(samples * scale).astype(np.int16)
    stream = b"".join(
        encode_frame(counts[i : i + FRAME_SAMPLES], seq, sample_type=1)
        for seq, i in enumerate(range(0, len(counts), FRAME_SAMPLES))
    )
    return [stream[i : i + CHUNK_BYTES] for i in range(0, len(stream), CHUNK_BYTES)]


def bench_config(config: Config) -> Config:
    """The config with its source turned into the frame stream `wire_chunks` makes."""
    src = dataclasses.replace(config.source, sample_rate=_rate(config), realtime=False, format="frame")
    return dataclasses.replace(config, source=src)


def bench_monitor(config: Config, chunks: List[bytes], sink: Sink, **monitor_args: Any) -> Monitor:
    """A monitor on `chunks` through the stream path of the link kinds:
    reader thread, frame decoder, bounded queue. Its source is opened by
    `run_monitor`."""
    cfg = bench_config(config)
    return Monitor(cfg, BytesSource(cfg.source, chunks), sink, **monitor_args)


def run_monitor(monitor: Monitor) -> float:
    """Wall seconds `monitor` takes to run its source to the end."""
    monitor.source.open()
    try:
        start = time.perf_counter()
        monitor.run()
        return time.perf_counter() - start
    finally:
        monitor.source.close()


def run_pipeline(config: Config, chunks: List[bytes]) -> float:
    """Wall seconds the monitor takes to decode and process `chunks`."""
    return run_monitor(bench_monitor(config, chunks, _EncodingSink()))


def run_bare_fft(config: Config, samples: np.ndarray) -> float:
    """Wall seconds of a plain loop: mean removal, window, rfft, |X|^2, per frame."""
    spec = config.spectrum
    window = Window(spec.window, spec.size).samples
    x = np.ascontiguousarray(samples.T)
    start = time.perf_counter()
    for end in range(spec.size, x.shape[1] + 1, spec.hop):
        frame = x[:, end - spec.size : end]
        frame = (frame - frame.mean(axis=1, keepdims=True)) * window
        spectrum = np.fft.rfft(frame, axis=1)
        np.abs(spectrum) ** 2
    return time.perf_counter() - start


def run_welch(config: Config, samples: np.ndarray) -> Optional[float]:
    """Wall seconds of scipy.signal.welch once per result, or None without scipy."""
    try:
        from scipy.signal import welch
    except ImportError:
        return None
    spec = config.spectrum
    fs = _rate(config)
    x = np.ascontiguousarray(samples.T)
    window = Window(spec.window, spec.size).samples
    start = time.perf_counter()
    for end in range(spec.span, x.shape[1] + 1, spec.hop):
        welch(x[:, end - spec.span : end], fs, window=window, nperseg=spec.size,
              noverlap=spec.size - spec.hop, detrend="constant")
    return time.perf_counter() - start


def pipeline_memory(config: Config, samples: np.ndarray) -> int:
    """Peak bytes the pipeline allocates (tracemalloc) over `samples`."""
    monitor = bench_monitor(config, wire_chunks(samples), _EncodingSink())
    tracemalloc.start()
    try:
        run_monitor(monitor)
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def bench(config: Config, out: TextIO, seconds: float = 120.0, repeats: int = 3) -> Dict[str, float]:
    """Measure, print and return the numbers."""
    rate = _rate(config)
    samples = synthetic_samples(config, seconds)
    chunks = wire_chunks(samples)
    pipeline = min(run_pipeline(config, chunks) for _ in range(repeats))
    bare = min(run_bare_fft(config, samples) for _ in range(repeats))
    welch_times = [run_welch(config, samples) for _ in range(repeats)]
    welch = None if welch_times[0] is None else min(t for t in welch_times if t is not None)
    short = max(config.spectrum.span / rate * 4, seconds / 8)
    mem_short = pipeline_memory(config, samples[: int(short * rate)])
    mem_long = pipeline_memory(config, samples[: int(4 * short * rate)])
    spec = config.spectrum
    numbers: Dict[str, float] = {
        "stream_seconds": seconds,
        "pipeline_seconds": pipeline,
        "bare_fft_seconds": bare,
        "realtime_factor": seconds / pipeline,
        "bare_speed_share": bare / pipeline,
        "memory_short_bytes": mem_short,
        "memory_long_bytes": mem_long,
    }
    if welch is not None:
        numbers["welch_seconds"] = welch
        numbers["welch_speedup"] = welch / pipeline
    w = out.write
    w(f"bench: {config.path}\n")
    w(f"  {samples.shape[1]} channel(s) at {rate:g} Hz, {seconds:g} s of simulated signal as int16 frames "
      f"({sum(map(len, chunks)) / 1e6:.1f} MB), {spec.window} window, {spec.size} samples, hop {spec.hop}, "
      f"{spec.averages} averages, {len(config.bands)} band(s); best of {repeats}\n")
    w(f"  pipeline (decode to payloads): {pipeline:8.3f} s   {seconds / pipeline:8.1f} x real time\n")
    w(f"  bare numpy FFT loop:           {bare:8.3f} s   {seconds / bare:8.1f} x real time\n")
    if welch is not None:
        w(f"  scipy.signal.welch per result: {welch:8.3f} s   {seconds / welch:8.1f} x real time\n")
    else:
        w("  scipy.signal.welch per result: not measured (scipy is not installed)\n")
    w(f"  pipeline speed / bare FFT speed: {bare / pipeline:.2f}\n")
    if welch is not None:
        w(f"  pipeline speed / welch speed:    {welch / pipeline:.2f}\n")
    w(f"  peak memory allocated: {mem_short / 1024:.0f} KiB over {short:g} s, "
      f"{mem_long / 1024:.0f} KiB over {4 * short:g} s\n")
    return numbers
