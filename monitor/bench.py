"""`bandwatch bench`: how many times faster than real time this machine runs
the configured pipeline, side by side with a bare numpy FFT loop doing the
same transforms.

The samples come from the simulator (whatever the configured source), made
before timing starts, so only the pipeline is measured: ring, spectra, bands,
peaks, speed, statistics, rules and payloads, delivered to a sink that
encodes each payload and drops it.
"""

import dataclasses
import time
from typing import Dict, TextIO

import numpy as np

from .config import Config, SimulatorConfig
from .delivery.base import Payload, Sink
from .payloads import encode
from .pipeline import Monitor
from .sources.memory import ArraySource
from .sources.simulator import SimulatorSource
from .windows import Window


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


def synthetic_samples(config: Config, seconds: float) -> np.ndarray:
    """`seconds` of the simulated machine at the config's rate and channels."""
    src = config.source
    rate = src.sample_rate if src.sample_rate > 0 else 25600.0
    sim = src.simulator or SimulatorConfig(
        rpm=config.speed.rpm or 1480.0, harmonics=(0.05, 0.02, 0.01), growth=0.05, noise=0.01, seed=1, seconds=0.0
    )
    sim = dataclasses.replace(sim, seconds=seconds)
    cfg = dataclasses.replace(src, kind="simulator", sample_rate=rate, realtime=False, simulator=sim)
    source = SimulatorSource(cfg)
    source.block = int(rate)  # big blocks: generation is not what is measured
    source.open()
    parts = []
    while True:
        block = source.read(0.0)
        if block is None:
            break
        parts.append(block.samples)
    return np.vstack(parts)


def run_pipeline(config: Config, samples: np.ndarray, block: int) -> float:
    """Wall seconds the monitor takes over `samples`."""
    rate = config.source.sample_rate if config.source.sample_rate > 0 else 25600.0
    src_cfg = dataclasses.replace(config.source, sample_rate=rate, realtime=False)
    cfg = dataclasses.replace(config, source=src_cfg)
    monitor = Monitor(cfg, ArraySource(src_cfg, samples, block=block), _EncodingSink())
    start = time.perf_counter()
    monitor.run()
    return time.perf_counter() - start


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


def bench(config: Config, out: TextIO, seconds: float = 120.0, repeats: int = 3) -> Dict[str, float]:
    """Measure and print; return the numbers."""
    rate = config.source.sample_rate if config.source.sample_rate > 0 else 25600.0
    samples = synthetic_samples(config, seconds)
    block = max(1, int(rate * 0.05))
    pipeline = min(run_pipeline(config, samples, block) for _ in range(repeats))
    bare = min(run_bare_fft(config, samples) for _ in range(repeats))
    spec = config.spectrum
    frames = (samples.shape[0] - spec.size) // spec.hop + 1
    numbers = {
        "stream_seconds": seconds,
        "pipeline_seconds": pipeline,
        "bare_fft_seconds": bare,
        "realtime_factor": seconds / pipeline,
        "bare_realtime_factor": seconds / bare,
        "overhead_ratio": pipeline / bare,
    }
    w = out.write
    w(f"bench: {config.path}\n")
    w(f"  {samples.shape[1]} channel(s) at {rate:g} Hz, {seconds:g} s of simulated signal, "
      f"{spec.window} window, {spec.size} samples, hop {spec.hop}, {frames} frames per channel, "
      f"{len(config.bands)} band(s); best of {repeats}\n")
    w(f"  pipeline:      {pipeline:.3f} s  -> {numbers['realtime_factor']:.1f} x faster than real time\n")
    w(f"  bare numpy FFT: {bare:.3f} s  -> {numbers['bare_realtime_factor']:.1f} x faster than real time\n")
    w(f"  pipeline / bare FFT time: {numbers['overhead_ratio']:.2f}\n")
    return numbers
