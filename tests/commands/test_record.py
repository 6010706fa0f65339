"""`bandwatch record`, run for real in a subprocess: the file it writes is read
back with scipy.io.wavfile and the standard library's wave module (outside
references) and with our own reader; sensors are real sockets on loopback.
"""

import datetime as dt
import os
import signal
import socket
import subprocess
import sys
import time
import warnings
import wave
from pathlib import Path

import numpy as np
import pytest
import scipy.io.wavfile as wavfile

from monitor.config import parse
from monitor.acquire.decoders.frame import encode_frame
from monitor.acquire.recording import open_recording
from monitor.acquire.sources import open_source

ROOT = Path(__file__).resolve().parents[2]

SIM = """
[node]
name = "rig-3"
[source]
kind = "simulator"
sample_rate = {rate}
channels = ["x", "y"]
unit = "g"
realtime = {realtime}
sim_rpm = 1500.0
sim_harmonics = [0.03, 0.01]
sim_growth = 0.5
sim_noise = 0.005
sim_seed = 11
[spectrum]
size = 1024
"""


def env() -> dict:
    e = dict(os.environ)
    e["PYTHONPATH"] = str(ROOT) + (os.pathsep + e["PYTHONPATH"] if e.get("PYTHONPATH") else "")
    e["PYTHONUNBUFFERED"] = "1"
    for name in ("NOTIFY_SOCKET", "WATCHDOG_USEC", "WATCHDOG_PID"):
        e.pop(name, None)
    return e


def bandwatch(*args, timeout=60.0, **kw):
    return subprocess.run([sys.executable, "-m", "monitor", *map(str, args)], cwd=str(ROOT), env=env(),
                          stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, timeout=timeout, **kw)


def write_config(tmp_path, text, name="rec.toml"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def scipy_read(path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", wavfile.WavFileWarning)  # our metadata chunk is skipped
        return wavfile.read(str(path))


def read_ours(path):
    with open_recording(str(path)) as reader:
        data = np.concatenate(list(reader.blocks(65536)) or [np.empty((0, reader.channels))])
        return reader, data


def simulator_samples(config_text, count):
    """What the simulator source itself yields for this config, read directly."""
    source = open_source(parse(config_text, "sim.toml").source)
    source.open()
    blocks, have = [], 0
    while have < count:
        block = source.read(1.0)
        assert block is not None
        blocks.append(block.samples)
        have += len(block.samples)
    source.close()
    return np.concatenate(blocks)[:count]


# --------------------------------------------------------------- simulator


@pytest.fixture(scope="module")
def five_seconds(tmp_path_factory):
    tmp_path = tmp_path_factory.mktemp("rec")
    text = SIM.format(rate=4096.0, realtime="false")
    config = write_config(tmp_path, text)
    out = tmp_path / "five.wav"
    before = dt.datetime.now(dt.timezone.utc)
    result = bandwatch("record", "-c", config, "-o", out, "--seconds", "5")
    after = dt.datetime.now(dt.timezone.utc)
    assert result.returncode == 0, result.stderr
    return text, out, result, before, after


def test_recording_reads_back_in_scipy_with_rate_channels_and_length(five_seconds):
    _, out, _, _, _ = five_seconds
    rate, data = scipy_read(out)
    # Reference: scipy.io.wavfile. 5 s at 4096 Hz is 20480 samples per channel,
    # counted from samples, not the clock.
    assert rate == 4096
    assert data.dtype == np.float32
    assert data.shape == (5 * 4096, 2)


def test_recording_holds_exactly_what_the_simulator_yields(five_seconds):
    text, out, _, _, _ = five_seconds
    expected = simulator_samples(text, 5 * 4096).astype(np.float32)  # float32 WAV, scale 1 for the simulator
    _, plain = scipy_read(out)
    reader, ours = read_ours(out)
    assert np.array_equal(plain, expected)
    assert np.array_equal(ours, expected)
    assert (reader.sample_rate, reader.channels, reader.frames) == (4096, 2, 5 * 4096)


def test_recording_metadata_names_channels_unit_start_and_no_gaps(five_seconds):
    _, out, _, before, after = five_seconds
    reader, _ = read_ours(out)
    assert reader.channel_names == ["x", "y"]
    assert reader.unit == "g"
    assert reader.metadata["node"] == "rig-3"
    assert reader.metadata["source"] == "simulator"
    assert reader.metadata["lost"] == []
    # The start time is UTC wall clock taken during the run (to the millisecond, less one block).
    assert before - dt.timedelta(seconds=1) <= reader.start_time <= after


def test_record_prints_one_closing_line(five_seconds):
    _, out, result, _, _ = five_seconds
    assert result.stdout == ""
    last = result.stderr.strip().splitlines()[-1]
    assert "20480 samples" in last and "5 s" in last and str(out) in last


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_a_signal_closes_a_valid_file(tmp_path, signum):
    text = SIM.format(rate=4096.0, realtime="true")  # paced like a live sensor
    config = write_config(tmp_path, text)
    out = tmp_path / "stopped.wav"
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "record", "-c", str(config), "-o", str(out),
                             "--seconds", "600"], cwd=str(ROOT), env=env(), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    try:
        # The writer updates the header every second of samples: wait for one.
        deadline = time.monotonic() + 20.0
        while not (out.exists() and scipy_read(out)[1].shape[0] >= 4096):
            assert proc.poll() is None and time.monotonic() < deadline, "no samples on disk in time"
            time.sleep(0.1)
        proc.send_signal(signum)
        rc = proc.wait(timeout=10.0)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    stderr = proc.stderr.read()
    proc.stdout.close()
    proc.stderr.close()
    assert rc == 0, stderr
    rate, data = scipy_read(out)  # valid to its last sample: the header was rewritten on close
    reader, ours = read_ours(out)
    assert rate == 4096 and data.shape[0] == reader.frames >= 4096
    assert data.shape[0] < 600 * 4096
    assert np.array_equal(data, simulator_samples(text, data.shape[0]).astype(np.float32))
    assert f"{data.shape[0]} samples" in stderr.strip().splitlines()[-1]


# ------------------------------------------------------- other kinds, scale


def test_file_source_is_scaled_per_channel_to_the_unit(tmp_path):
    # A plain 16-bit PCM WAV written with the standard library's wave module
    # (the reference), recorded through a config with one scale per channel.
    raw = np.random.default_rng(5).integers(-30000, 30000, size=(3000, 2)).astype("<i2")
    src = tmp_path / "raw.wav"
    with wave.open(str(src), "wb") as w:
        w.setnchannels(2)
        w.setsampwidth(2)
        w.setframerate(1000)
        w.writeframes(raw.tobytes())
    config = write_config(tmp_path, f"""
[node]
name = "bench"
[source]
kind = "file"
path = "{src}"
channels = ["a", "b"]
unit = "m/s2"
scale = [0.001, -0.25]
""")
    out = tmp_path / "scaled.wav"
    result = bandwatch("record", "-c", config, "-o", out, "--seconds", "10")
    assert result.returncode == 0, result.stderr
    rate, data = scipy_read(out)
    assert rate == 1000  # the file kind's rate comes from the file
    # The source ended after 3 s: the recording ends with it.
    expected = (raw * np.array([0.001, -0.25])).astype(np.float32)
    assert np.array_equal(data, expected)
    reader, _ = read_ours(out)
    assert reader.unit == "m/s2" and reader.channel_names == ["a", "b"]
    assert "3000 samples" in result.stderr.strip().splitlines()[-1]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_lost_samples_are_noted_not_filled(tmp_path):
    # A sensor dials in over TCP and skips one frame's sequence number: the
    # receiver counts that frame's samples as lost (README, The sensor wire format).
    port = free_port()
    config = write_config(tmp_path, f"""
[node]
name = "fan-7"
[source]
kind = "tcp-server"
port = {port}
format = "frame"
sample_rate = 2048.0
channels = ["h"]
unit = "g"
scale = 0.0005
""")
    out = tmp_path / "gap.wav"
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "record", "-c", str(config), "-o", str(out),
                             "--seconds", "1"], cwd=str(ROOT), env=env(), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    n = 256
    rng = np.random.default_rng(2)
    # 10 frames less the one skipped: 2304 samples, enough for 1 s (2048) and
    # within the receiver's 2 s queue, so none is dropped for being early.
    sent = [rng.integers(-2000, 2000, size=(n, 1)) for _ in range(10)]
    try:
        deadline = time.monotonic() + 20.0
        while True:
            try:
                sensor = socket.create_connection(("127.0.0.1", port), timeout=2.0)
                break
            except OSError:
                assert proc.poll() is None and time.monotonic() < deadline, "record never listened"
                time.sleep(0.05)
        with sensor:
            for seq, samples in enumerate(sent):
                if seq == 5:
                    continue  # never sent: a gap of one frame
                sensor.sendall(encode_frame(samples, seq))
                time.sleep(0.01)
            stdout, stderr = proc.communicate(timeout=20.0)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0, stderr
    reader, data = read_ours(out)
    # Nothing was inserted: frames 0-4 and 6.. back to back, 1 s = 2048 samples.
    kept = np.concatenate(sent[:5] + sent[6:])[:2048]
    assert np.array_equal(data, (kept * 0.0005).astype(np.float32))
    # The gap: before file sample 5 * 256, one frame of 256 samples.
    assert reader.metadata["lost"] == [[5 * n, n]]
    assert "256 samples lost" in stderr and "WARNING" in stderr
    assert "1 gap" in stderr.strip().splitlines()[-1]
    # Still a plain WAV to outside readers.
    rate, plain = scipy_read(out)
    assert rate == 2048 and np.array_equal(plain, data[:, 0])  # scipy gives one channel as 1-D


# ------------------------------------------------------------ bad requests


@pytest.mark.parametrize("seconds", ["0", "-1", "nan", "inf"])
def test_seconds_must_be_positive(tmp_path, seconds):
    config = write_config(tmp_path, SIM.format(rate=4096.0, realtime="false"))
    out = tmp_path / "x.wav"
    result = bandwatch("record", "-c", config, "-o", out, "--seconds", seconds, timeout=30)
    assert result.returncode == 2
    assert "seconds" in result.stderr and "positive" in result.stderr
    assert not out.exists()


def test_an_existing_file_is_never_overwritten(tmp_path):
    config = write_config(tmp_path, SIM.format(rate=4096.0, realtime="false"))
    out = tmp_path / "keep.wav"
    out.write_bytes(b"precious")
    result = bandwatch("record", "-c", config, "-o", out, "--seconds", "1", timeout=30)
    assert result.returncode == 2
    assert str(out) in result.stderr and "exists" in result.stderr
    assert out.read_bytes() == b"precious"


def test_missing_folder_is_bad_usage(tmp_path):
    config = write_config(tmp_path, SIM.format(rate=4096.0, realtime="false"))
    out = tmp_path / "no" / "such" / "x.wav"
    result = bandwatch("record", "-c", config, "-o", out, "--seconds", "1", timeout=30)
    assert result.returncode == 2
    assert str(out.parent) in result.stderr


def test_a_rate_a_wav_cannot_hold_is_refused(tmp_path):
    config = write_config(tmp_path, SIM.format(rate=4096.5, realtime="false"))
    out = tmp_path / "x.wav"
    result = bandwatch("record", "-c", config, "-o", out, "--seconds", "1", timeout=30)
    assert result.returncode == 2
    assert "4096.5" in result.stderr and "whole number" in result.stderr
    assert not out.exists()


def test_a_broken_config_exits_2(tmp_path):
    config = write_config(tmp_path, SIM.format(rate=4096.0, realtime="false").replace("size = 1024", "size = 1000"))
    out = tmp_path / "x.wav"
    result = bandwatch("record", "-c", config, "-o", out, "--seconds", "1", timeout=30)
    assert result.returncode == 2
    assert "spectrum.size" in result.stderr
    assert not out.exists()


def test_a_source_that_cannot_open_exits_1(tmp_path):
    config = write_config(tmp_path, f"""
[node]
name = "bench"
[source]
kind = "file"
path = "{tmp_path / 'missing.wav'}"
channels = ["a"]
""")
    out = tmp_path / "x.wav"
    result = bandwatch("record", "-c", config, "-o", out, "--seconds", "1", timeout=30)
    assert result.returncode == 1
    assert "missing.wav" in result.stderr
    assert not out.exists()
