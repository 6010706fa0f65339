"""`bandwatch bench`: the pipeline it times measures the simulated machine
itself, so its levels and log lines are meaningful (README, Benchmarks).

Held against the same pipeline run on the simulator's float samples, the
int16 wire encoding's quantisation being the only difference.
"""

import dataclasses
import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from monitor.acquire.sources.memory import ArraySource
from monitor.commands.bench import (bench_config, bench_monitor, run_monitor, scaled_for_wire, synthetic_samples,
                                    wire_chunks, wire_unit)
from monitor.config import load
from monitor.service.monitor import Monitor
from rig import ListSink

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "config" / "demo.toml"


def band_values(sink):
    return np.array([[b["value"] for b in s["bands"]] for s in sink.of("summary")], dtype=float)


def test_bench_pipeline_reads_the_simulated_machine_in_its_unit():
    # The demo config with a scale of its own (as a sensor's config has): the
    # bench must still read the simulated g, not counts times that scale.
    demo = load(str(DEMO))
    config = dataclasses.replace(demo, summary_interval=1e-6,
                                 source=dataclasses.replace(demo.source, scale=(0.000244,) * 2))
    samples = synthetic_samples(config, 20.0)
    sink = ListSink()
    run_monitor(bench_monitor(scaled_for_wire(config, wire_unit(samples)), wire_chunks(samples), sink))
    reference = ListSink()
    cfg = bench_config(demo)
    source = ArraySource(dataclasses.replace(cfg.source, kind="simulator"), samples)
    source.open()
    Monitor(dataclasses.replace(cfg, summary_interval=1e-6), source, reference).run()
    got, expected = band_values(sink), band_values(reference)
    assert got.shape == expected.shape and len(got) > 10
    # int16 with full scale at 4x the largest sample: a step of max/8192, far
    # below the band values of the demo's machine (tenths of mm/s and more).
    assert np.allclose(got, expected, rtol=1e-3, atol=1e-3)
    assert not [e for e in sink.of("event") if e["name"] == "implausible"]


def test_bench_command_logs_no_nonsense_levels():
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    result = subprocess.run([sys.executable, "-m", "monitor", "bench", "-c", str(DEMO), "--seconds", "40"],
                            cwd=str(ROOT), env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                            timeout=300)
    assert result.returncode == 0, result.stderr
    assert "x real time" in result.stdout
    # The demo's 1x grows 0.1 g peak a minute from 0.02 g (config/demo.toml):
    # velocity of a 24.7 Hz tone, v = a / (2 pi f) (common practice), stays
    # below 1 g peak -> 9807 / (2 pi 24.7) / sqrt(2) = 45 mm/s RMS.
    values = [float(v) for v in re.findall(r" at ([-+.\deE]+) mm/s", result.stderr)]
    assert values, result.stderr  # the growing 1x crosses its limits within 40 s
    assert max(values) < 45.0
    assert "implausible" not in result.stderr
