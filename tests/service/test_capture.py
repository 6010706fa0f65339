"""Raw capture around an alarm: the file holds exactly the samples around its trigger."""

import os

import numpy as np
import pytest
import scipy.io.wavfile

from monitor.config import parse
from monitor.service.monitor import Monitor
from monitor.acquire.recording import open_recording
from monitor.acquire.sources.memory import ArraySource
from rig import BASE, FS, ListSink

# scipy warns about our metadata chunk, which plain readers skip by design.
pytestmark = pytest.mark.filterwarnings("ignore::scipy.io.wavfile.WavFileWarning")

CONFIG = BASE + """
[[band]]
name = "tone"
channel = "x"
hz = [40.0, 60.0]
quantity = "acceleration"
warning = 1.0
alarm = 3.0
delay = 0.0
[capture]
seconds = 4.0
after = 2.0
keep = 2
dir = "{dir}"
"""


def scenario(seconds, steps):
    """An invented signal: a 50 Hz tone whose RMS steps at the given times."""
    n = int(seconds * FS)
    t = np.arange(n) / FS
    rms = np.full(n, 0.2)
    for at, value in steps:
        rms[t >= at] = value
    x = rms * np.sqrt(2) * np.sin(2 * np.pi * 50 * t)
    y = np.cos(2 * np.pi * 7 * t) + np.arange(n) * 1e-6  # a ramp makes every sample unique
    return np.column_stack([x, y])


def run(tmp_path, x):
    config = parse(CONFIG.format(dir=tmp_path / "captures"))
    sink = ListSink()
    monitor = Monitor(config, ArraySource(config.source, x, block=300), sink)
    monitor.run()
    return monitor, sink


def test_capture_holds_the_samples_around_the_trigger(tmp_path):
    x = scenario(20.0, [(10.0, 2.0)])
    monitor, sink = run(tmp_path, x)
    event = [e for e in sink.of("event") if e["kind"] == "band"][0]
    path = tmp_path / "captures" / event["capture"]
    assert path.exists()
    # Read with scipy.io.wavfile as the outside reference.
    rate, data = scipy.io.wavfile.read(path)
    assert rate == int(FS) and data.dtype == np.float32
    trigger = int(round(event["stream_s"] * FS)) + 1  # one past the result's last sample
    expected = x[trigger - int(4 * FS) : trigger + int(2 * FS)].astype(np.float32)
    assert data.shape == expected.shape
    assert np.array_equal(data, expected)
    meta = open_recording(str(path)).metadata
    assert meta["capture"]["trigger_s"] == pytest.approx(4.0)
    assert meta["capture"]["events"][0]["id"] == event["id"]


def test_only_the_newest_captures_are_kept(tmp_path):
    # Three rises, far enough apart to give three captures; keep = 2.
    x = scenario(60.0, [(10.0, 2.0), (15.0, 0.2), (30.0, 2.0), (35.0, 0.2), (50.0, 2.0), (55.0, 0.2)])
    _, sink = run(tmp_path, x)
    names = [e["capture"] for e in sink.of("event") if e.get("capture")]
    assert len(set(names)) == 3
    assert sorted(os.listdir(tmp_path / "captures")) == sorted(names[1:])


def test_a_capture_pending_at_shutdown_is_written_with_what_arrived(tmp_path):
    x = scenario(11.0, [(10.0, 2.0)])
    _, sink = run(tmp_path, x)
    event = [e for e in sink.of("event") if e["kind"] == "band"][0]
    _, data = scipy.io.wavfile.read(tmp_path / "captures" / event["capture"])
    trigger = int(round(event["stream_s"] * FS)) + 1
    assert np.array_equal(data, x[trigger - int(4 * FS) :].astype(np.float32))
