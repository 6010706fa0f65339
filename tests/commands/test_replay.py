"""`bandwatch replay`, run for real in subprocesses on real files.

Held against: the pipeline run directly on the simulator (the live path),
scipy.signal.welch with the level rule (README, What is published) applied step by step
on invented scenario recordings, scipy.io.wavfile and the standard library's
wave module for the files, and numpy for the trend history.
"""

import dataclasses
import io
import json
import os
import pty
import re
import struct
import subprocess
import sys
import warnings
import wave
from pathlib import Path

import numpy as np
import pytest
import scipy.io.wavfile as wavfile
import scipy.signal

from conftest import IN_CI
from monitor.config import parse
from monitor.deliver.base import Sink
from monitor.deliver.payloads import encode
from monitor.service.monitor import Monitor
from monitor.acquire.recording import RecordingWriter
from monitor.commands.replay import replay
from monitor.commands.replay_tally import History
from monitor.acquire.sources import open_source
from monitor.acquire.sources.memory import ArraySource

ROOT = Path(__file__).resolve().parents[2]
# The event payload's fields (README, What is published).
EVENT_FIELDS = {"node", "time", "stream_s", "id", "kind", "name", "channel", "level", "previous", "value",
                "limits", "unit", "quantity", "speed_hz", "dominant_hz"}
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), section 5.2

SIM = """
[node]
name = "rig-5"
[source]
kind = "simulator"
sample_rate = 4096.0
channels = ["x", "y"]
unit = "g"
realtime = false
sim_rpm = 1500.0
sim_harmonics = [0.03, 0.01]
sim_growth = 1.2
sim_noise = 0.005
sim_seed = 4
[spectrum]
size = 1024
overlap = 0.75
averages = 2
[speed]
rpm = 1500.0
track = true
search_hz = [20.0, 30.0]
[[band]]
name = "overall"
hz = [10.0, 1000.0]
quantity = "velocity"
warning = 2.5
alarm = 4.5
delay = 0.5
[[band]]
name = "1x"
channel = "x"
orders = [0.8, 1.2]
quantity = "velocity"
warning = 2.0
alarm = 4.0
delay = 0.5
[[band]]
name = "2x"
channel = "x"
orders = [1.8, 2.2]
quantity = "velocity"
"""

FS = 2048
STEP = """
[node]
name = "step-1"
[source]
kind = "file"
path = "unused.wav"
channels = ["x"]
unit = "m/s2"
{scale}
[spectrum]
size = 1024
overlap = 0.75
window = "hann"
averages = 3
[[band]]
name = "tone"
hz = [40.0, 60.0]
quantity = "acceleration"
warning = 1.0
alarm = 3.0
hysteresis = 0.2
delay = 1.0
{extra}
"""


def env() -> dict:
    e = dict(os.environ)
    e["PYTHONPATH"] = str(ROOT) + (os.pathsep + e["PYTHONPATH"] if e.get("PYTHONPATH") else "")
    e["PYTHONUNBUFFERED"] = "1"
    for name in ("NOTIFY_SOCKET", "WATCHDOG_USEC", "WATCHDOG_PID"):
        e.pop(name, None)
    return e


def bandwatch(*args, timeout=120.0):
    return subprocess.run([sys.executable, "-m", "monitor", *map(str, args)], cwd=str(ROOT), env=env(),
                          stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, timeout=timeout)


def write(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def events_of(stdout):
    out = []
    for line in stdout.splitlines():
        payload = json.loads(line)  # every line is one JSON object, nothing else
        assert set(payload) == EVENT_FIELDS, line
        out.append(payload)
    return out


def without_time(payloads):
    return [{k: v for k, v in p.items() if k != "time"} for p in payloads]


def table_rows(stderr):
    """{(band, channel): row cells} from the table on stderr."""
    lines = stderr.splitlines()
    start = next(i for i, line in enumerate(lines) if line.split()[:2] == ["band", "channel"])
    rows = {}
    for line in lines[start + 1:]:
        if line.startswith("health events"):
            break
        cells = line.split()
        rows[(cells[0], cells[1])] = cells
    return rows


class ListSink(Sink):
    """Keeps every payload; a fake passed in, nothing patched."""

    def __init__(self):
        self.messages = []

    def open(self, online, offline):
        pass

    def send(self, suffix, payload):
        encode(payload)
        self.messages.append((suffix, payload))

    def close(self, offline):
        pass

    def events(self):
        return [p for s, p in self.messages if s == "event"]


def need_matplotlib():
    """The plot extra is part of the test extra: missing it fails under CI."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        message = "matplotlib is not installed; pip install -e '.[test]' brings it"
        if IN_CI:
            pytest.fail(message)
        pytest.skip(message)


# ------------------------------------------------------ simulator, recorded


@pytest.fixture(scope="module")
def sim(tmp_path_factory):
    tmp_path = tmp_path_factory.mktemp("sim")
    config = write(tmp_path, "sim.toml", SIM)
    rec = tmp_path / "sim.wav"
    made = bandwatch("record", "-c", config, "-o", rec, "--seconds", "5")
    assert made.returncode == 0, made.stderr
    first = bandwatch("replay", "-c", config, rec)
    assert first.returncode == 0, first.stderr
    return config, rec, first


def live_events(samples=None):
    """The pipeline run in-process, as `bandwatch run` runs it: on the
    simulator source itself (stopped after the 5 s the recording holds), or
    on given samples."""
    config = parse(SIM, "sim.toml")
    sink = ListSink()
    if samples is None:
        five = dataclasses.replace(config.source.simulator, seconds=5.0)
        source = open_source(dataclasses.replace(config.source, simulator=five))
    else:
        source = ArraySource(config.source, samples)
    source.open()
    Monitor(config, source, sink).run()
    return sink.events()


def test_replay_gives_the_events_of_the_pipeline_run_on_the_simulator(sim):
    _, _, first = sim
    replayed = events_of(first.stdout)
    live = live_events()
    assert len(replayed) >= 4, "the scenario should raise warning and alarm levels within 5 s"
    # The same events at the same stream times, counted from samples; values
    # agree to the float32 precision of the recording (6 significant digits
    # printed, so within a few units of the 6th).
    key = ("id", "kind", "name", "channel", "level", "previous", "stream_s", "limits", "unit", "quantity")
    assert [tuple(e[k] for k in key) for e in replayed] == [tuple(e[k] for k in key) for e in live]
    for r, e in zip(replayed, live):
        for field in ("value", "speed_hz", "dominant_hz"):
            assert r[field] == pytest.approx(e[field], rel=2e-5), (field, r, e)


def test_replay_gives_the_band_values_of_every_result_of_the_live_run(sim):
    _, rec, _ = sim
    config = parse(SIM, "sim.toml")
    five = dataclasses.replace(config.source.simulator, seconds=5.0)
    source = open_source(dataclasses.replace(config.source, simulator=five))
    source.open()
    monitor = Monitor(config, source, ListSink())
    rows = []
    monitor.add_observer(lambda result: rows.append((result.stream_s, [b.value for b in result.bands])))
    monitor.run()
    assert len(rows) == monitor.results
    rep = replay(config, str(rec), io.StringIO(), keep_history=True)
    t, values = rep.history.arrays()
    assert rep.tally.results == monitor.results == len(t)
    assert list(t) == [row[0] for row in rows]  # stream times from samples, exactly
    live = np.array([row[1] for row in rows])
    # The file holds float32: band values agree to its precision.
    np.testing.assert_allclose(values, live, rtol=1e-5)
    np.testing.assert_allclose(rep.tally.max, live.max(axis=0), rtol=1e-5)


def test_replay_equals_the_pipeline_on_the_recorded_samples_field_for_field(sim):
    _, rec, first = sim
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", wavfile.WavFileWarning)
        _, samples = wavfile.read(str(rec))  # reference reader: scipy
    live = live_events(samples.astype(np.float64))
    assert without_time(events_of(first.stdout)) == without_time(live)


def test_replay_twice_prints_the_same_bytes_but_for_time(sim):
    config, rec, first = sim
    second = bandwatch("replay", "-c", config, rec)
    assert second.returncode == 0, second.stderr
    strip = re.compile(r'"time":"[^"]*",')
    assert first.stdout and strip.sub("", first.stdout) == strip.sub("", second.stdout)
    assert table_rows(first.stderr) == table_rows(second.stderr)


def test_only_events_go_to_stdout(sim):
    _, _, first = sim
    for payload in events_of(first.stdout):
        assert payload["node"] == "rig-5" and payload["kind"] in ("band", "health")
    assert "replay of" in first.stderr and "health events: 0" in first.stderr


def test_no_progress_bar_when_stderr_is_a_pipe(sim):
    _, _, first = sim
    assert "\r" not in first.stderr and "replay [" not in first.stderr


def test_progress_bar_on_a_terminal_is_drawn_and_cleared(sim):
    config, rec, _ = sim
    # stderr on a real pseudo-terminal; stdout stays a pipe.
    master, slave = pty.openpty()
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "replay", "-c", str(config), str(rec)],
                            cwd=str(ROOT), env=env(), stdout=subprocess.PIPE, stderr=slave)
    os.close(slave)
    chunks = []
    while True:
        try:
            data = os.read(master, 65536)
        except OSError:  # EIO: the child closed its end (Linux)
            break
        if not data:
            break
        chunks.append(data)
    os.close(master)
    stdout = proc.stdout.read().decode()
    proc.stdout.close()
    assert proc.wait(timeout=60) == 0
    screen = b"".join(chunks).decode()
    assert "replay [" in screen and "%" in screen
    # Drawn with the carriage return last, so a log line starts at column 0
    # over it; blanked (spaces, carriage return) before the table.
    assert re.search(r"replay \[[#.]+\] +\d+%[^\n]*\r", screen)
    assert re.search(r"\r +\rreplay of ", screen) or re.search(r"\n +\rreplay of ", screen), screen
    assert screen.index("replay of") > screen.rindex("replay [")
    assert len(events_of(stdout)) >= 4


# --------------------------------------------- invented scenario, by welch


def step_signal(seconds=40.0, seed=0):
    """An invented scenario: a 50 Hz tone of RMS 0.5 stepping to 2 at 10 s,
    to 4 at 20 s and down to 0.2 at 30 s, with a little noise."""
    n = int(seconds * FS)
    t = np.arange(n) / FS
    rms = np.select([t < 10, t < 20, t < 30], [0.5, 2.0, 4.0], 0.2)
    noise = np.random.default_rng(seed).normal(0, 0.01, n)
    return (rms * np.sqrt(2) * np.sin(2 * np.pi * 50 * t + 0.3) + noise)[:, None]


def welch_results(x, size=1024, hop=256, averages=3, lo=40.0, hi=60.0):
    """Stream time and band value of every result, by scipy.signal.welch on
    the samples each result covers (same window, segment, overlap,
    detrend="constant"); edges 40 and 60 Hz fall between 2 Hz lines' centres
    at 40 and 60 exactly, so lines 21..29 count whole and 20 and 30 half
    (the edge rule: a line counts with the share of its interval in the band)."""
    span = size + (averages - 1) * hop
    times, values = [], []
    for end in range(span, len(x) + 1, hop):
        f, psd = scipy.signal.welch(x[end - span:end, 0], FS, window="hann", nperseg=size, noverlap=size - hop,
                                    detrend="constant")
        weight = np.clip((np.minimum(f + f[1] / 2, hi) - np.maximum(f - f[1] / 2, lo)) / f[1], 0, 1)
        values.append(np.sqrt(np.sum(psd * weight) * f[1]))
        times.append((end - 1) / FS)
    return np.array(times), np.array(values)


def expected_events(times, values, limits=(1.0, 3.0), hysteresis=0.2, delay=1.0):
    """The level rule (README, What is published), applied step by step: raised after
    `delay` s at or above a limit, lowered after `delay` s below
    limit * (1 - hysteresis)."""
    level, out = 0, []
    above = [None, None]
    below = [None, None]
    for t, v in zip(times, values):
        for i, limit in enumerate(limits):
            above[i] = (t if above[i] is None else above[i]) if v >= limit else None
            below[i] = (t if below[i] is None else below[i]) if v < limit * (1 - hysteresis) else None
        new = level
        for i in (1, 0):
            if i + 1 > level and above[i] is not None and t - above[i] >= delay - 1e-9:
                new = i + 1
                break
        if new == level:
            while new > 0 and below[new - 1] is not None and t - below[new - 1] >= delay - 1e-9:
                new -= 1
        if new != level:
            out.append((round(t, 6), ("normal", "warning", "alarm")[new]))
            level = new
    return out


@pytest.fixture(scope="module")
def step(tmp_path_factory):
    tmp_path = tmp_path_factory.mktemp("step")
    x = step_signal()
    rec = tmp_path / "step.wav"
    with RecordingWriter(str(rec), FS, ["x"], "m/s2") as writer:
        writer.write(x)
    x32 = x.astype(np.float32).astype(np.float64)  # what the file holds
    config = write(tmp_path, "step.toml", STEP.format(scale="", extra=""))
    result = bandwatch("replay", "-c", config, rec)
    assert result.returncode == 0, result.stderr
    return x32, config, rec, result


def test_scenario_events_come_at_the_expected_stream_times(step):
    x, _, _, result = step
    times, values = welch_results(x)
    expected = expected_events(times, values)
    got = [(e["stream_s"], e["level"]) for e in events_of(result.stdout) if e["kind"] == "band"]
    assert got == expected
    assert [level for _, level in got] == ["warning", "alarm", "warning", "normal"]


def test_table_has_the_maximum_and_time_above_each_limit(step):
    x, _, _, result = step
    times, values = welch_results(x)
    hop_s = 256 / FS
    row = table_rows(result.stderr)[("tone", "x")]
    name, channel, unit, warning, alarm, peak, peak_at, above_warning, above_alarm, events = row
    assert (unit, warning, alarm) == ("m/s2", "1", "3")
    assert float(peak) == pytest.approx(values.max(), rel=1e-5)
    assert float(peak_at) == pytest.approx(times[values.argmax()], abs=1e-3)
    # Time above a limit: hop durations of the results at or above it.
    assert float(above_warning) == pytest.approx(hop_s * np.count_nonzero(values >= 1.0), abs=1e-3)
    assert float(above_alarm) == pytest.approx(hop_s * np.count_nonzero(values >= 3.0), abs=1e-3)
    assert 9.0 < float(above_alarm) < 11.0  # about the 10 s at RMS 4
    assert int(events) == 4
    assert f"{len(times)} results" in result.stderr


def test_a_replay_leaves_the_node_state_alone(tmp_path, step):
    _, _, rec, _ = step
    store = tmp_path / "state"
    store.mkdir()
    (store / "event-id").write_text("41\n")
    node_state = f'[mqtt]\nqueue_dir = "{store}"\n[capture]\ndir = "{store / "captures"}"\n'
    config = write(tmp_path, "ids.toml", STEP.format(scale="", extra=node_state))
    result = bandwatch("replay", "-c", config, rec)
    assert result.returncode == 0, result.stderr
    # Exactly the event fields (no capture name), ids from 1.
    assert [e["id"] for e in events_of(result.stdout)] == [1, 2, 3, 4]
    assert (store / "event-id").read_text() == "41\n"
    assert sorted(p.name for p in store.iterdir()) == ["event-id"]  # no captures, nothing else written


def test_plot_is_a_png(tmp_path, step):
    need_matplotlib()
    _, config, rec, _ = step
    png = tmp_path / "trend.png"
    result = bandwatch("replay", "-c", config, rec, "--plot", png)
    assert result.returncode == 0, result.stderr
    data = png.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    # The first chunk is IHDR: width and height, big-endian (PNG specification, 11.2.2).
    length, kind, width, height = struct.unpack(">I4sII", data[8:24])
    assert kind == b"IHDR" and width >= 600 and height >= 400
    assert len(events_of(result.stdout)) == 4  # the plot changes nothing on stdout


def test_plot_without_matplotlib_says_how_to_get_it(tmp_path, step):
    _, config, rec, _ = step
    png = tmp_path / "never.png"
    # A None entry in sys.modules makes `import matplotlib` raise ImportError
    # (the import system's documented behaviour), as on a machine without it.
    code = ("import sys; sys.modules['matplotlib'] = None\n"
            "from monitor.commands.cli import main\n"
            f"sys.exit(main(['replay', '-c', {str(config)!r}, {str(rec)!r}, '--plot', {str(png)!r}]))\n")
    result = subprocess.run([sys.executable, "-c", code], cwd=str(ROOT), env=env(), stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, timeout=60)
    assert result.returncode == 2
    assert "pip install 'bandwatch[plot]'" in result.stderr
    assert result.stdout == "" and not png.exists()


# ---------------------------------------------------- other recordings


def test_noted_gaps_are_put_back_as_in_the_live_run(tmp_path):
    x = step_signal(20.0, seed=3)
    gap_at, lost = 5 * FS + 100, 3000
    rec = tmp_path / "gap.wav"
    with RecordingWriter(str(rec), FS, ["x"], "m/s2", extra={"lost": [[gap_at, lost]]}) as writer:
        writer.write(x)
    config = parse(STEP.format(scale="", extra=""), "step.toml")
    out = io.StringIO()
    rep = replay(config, str(rec), out, keep_history=True)
    t, _ = rep.history.arrays()
    span, hop = 1024 + 2 * 256, 256
    # No result spans the gap, and stream time counts the lost samples (spec
    # section 4): results before it end by the gap, the first after it needs
    # a whole span of new samples.
    before = t[t < gap_at / FS]
    after = t[t > gap_at / FS]
    assert before[-1] <= (gap_at - 1) / FS
    assert after[0] == pytest.approx((gap_at + lost + span - 1) / FS, abs=1e-9)
    assert len(t) == (1 + (gap_at - span) // hop) + (1 + (len(x) - gap_at - span) // hop)
    assert after[-1] == pytest.approx((len(x) + lost - 1) / FS - ((len(x) - gap_at - span) % hop) / FS, abs=1e-9)
    # The live path on the same samples and gap gives the same band events.
    live = dataclasses.replace(config, source=dataclasses.replace(config.source, sample_rate=float(FS)))
    sink = ListSink()
    source = ArraySource(live.source, x.astype(np.float32).astype(np.float64), gaps={gap_at: lost})
    source.open()
    Monitor(live, source, sink).run()
    replayed = [json.loads(line) for line in out.getvalue().splitlines()]
    band = lambda events: [(e["stream_s"], e["name"], e["level"], e["value"]) for e in events if e["kind"] == "band"]  # noqa: E731
    assert band(replayed) and band(replayed) == band(sink.events())
    # The gap health check sees the break, as it would live.
    gaps = [e for e in replayed if e["name"] == "gap"]
    assert gaps[0]["level"] == "fault" and (gap_at + lost) / FS <= gaps[0]["stream_s"] < (gap_at + lost + hop) / FS
    assert rep.gaps == 1 and rep.lost == lost


def test_plain_integer_wav_takes_the_config_scale_and_full_scale(tmp_path):
    # A 16-bit PCM file from another tool, written with the standard
    # library's wave module: the config's scale turns counts into m/s2.
    x = step_signal(20.0)[:, 0] * 4000.0  # counts; the tone is 2000..16000 counts RMS
    counts = np.clip(np.round(x), -32768, 32767)
    counts[int(15 * FS):int(16 * FS)] = np.clip(counts[int(15 * FS):int(16 * FS)] * 4, -32767, 32767)  # clipped
    rec = tmp_path / "pcm.wav"
    with wave.open(str(rec), "wb") as w:
        w.setnchannels(1)
        w.setsampwidth(2)
        w.setframerate(FS)
        w.writeframes(counts.astype("<i2").tobytes())
    config = write(tmp_path, "pcm.toml", STEP.format(scale="scale = 0.00025", extra=""))
    result = bandwatch("replay", "-c", config, rec)
    assert result.returncode == 0, result.stderr
    times, values = welch_results(counts[:, None] * 0.00025)
    row = table_rows(result.stderr)[("tone", "x")]
    assert float(row[5]) == pytest.approx(values.max(), rel=1e-5)
    # Samples at the 16-bit full scale, 32767, count as clipped (common practice).
    health = [e for e in events_of(result.stdout) if e["kind"] == "health"]
    assert ("clipping", "x", "fault") in {(e["name"], e["channel"], e["level"]) for e in health}
    assert "clipping/x" in result.stderr


def test_a_recording_in_another_unit_is_converted(tmp_path):
    # 9.80665 m/s2 is 1 g exactly (standard gravity, CGPM 1901, ISO 80000-3).
    n = 10 * FS
    t = np.arange(n) / FS
    x = (9.80665 * np.sqrt(2) * np.sin(2 * np.pi * 50 * t))[:, None]
    rec = tmp_path / "si.wav"
    with RecordingWriter(str(rec), FS, ["x"], "m/s2") as writer:
        writer.write(x)
    config = write(tmp_path, "g.toml", STEP.format(scale="", extra="").replace('unit = "m/s2"', 'unit = "g"'))
    result = bandwatch("replay", "-c", config, rec)
    assert result.returncode == 0, result.stderr
    row = table_rows(result.stderr)[("tone", "x")]
    assert row[2] == "g"
    assert float(row[5]) == pytest.approx(1.0, rel=1e-5)


# ------------------------------------------------------------ bad requests


def test_channel_count_must_match(tmp_path, step):
    _, _, rec, _ = step
    config = write(tmp_path, "two.toml", STEP.format(scale="", extra="").replace('channels = ["x"]',
                                                                              'channels = ["x", "y"]'))
    result = bandwatch("replay", "-c", config, rec, timeout=30)
    assert result.returncode == 2
    assert "source.channels" in result.stderr and "holds 1" in result.stderr and str(config) in result.stderr
    assert result.stdout == ""


def test_sample_rate_must_match(tmp_path, sim):
    _, rec, _ = sim
    config = write(tmp_path, "rate.toml", SIM.replace("sample_rate = 4096.0", "sample_rate = 5120.0"))
    result = bandwatch("replay", "-c", config, rec, timeout=30)
    assert result.returncode == 2
    assert "source.sample_rate" in result.stderr and "4096" in result.stderr
    assert result.stdout == ""


def test_a_band_above_the_recordings_nyquist_is_refused(tmp_path, step):
    _, _, rec, _ = step
    config = write(tmp_path, "high.toml", STEP.format(scale="", extra="").replace("hz = [40.0, 60.0]",
                                                                               "hz = [40.0, 1500.0]"))
    result = bandwatch("replay", "-c", config, rec, timeout=30)
    assert result.returncode == 2
    # Nyquist is half the sample rate (common practice): 2048 / 2 = 1024 Hz.
    assert "band[1].hz" in result.stderr and "1024" in result.stderr


def test_a_missing_recording_is_bad_usage(tmp_path, step):
    _, config, _, _ = step
    result = bandwatch("replay", "-c", config, tmp_path / "none.wav", timeout=30)
    assert result.returncode == 2
    assert "none.wav" in result.stderr
    assert result.stdout == ""


# ------------------------------------------------------------ the history


def test_history_stays_bounded_and_keeps_every_peak():
    rng = np.random.default_rng(8)
    values = rng.random((250_000, 3))
    values[123_457, 1] = 7.0  # one short excursion, far above the rest
    history = History(3, rows=1000)
    for i, row in enumerate(values):
        history.add(i * 0.01, row)
    t, v = history.arrays()
    assert len(t) <= 1000 and v.shape == (len(t), 3)
    assert np.all(np.diff(t) > 0) and t[0] == 0.0
    # Rows merge by taking the larger value: every column's maximum survives
    # (numpy's max over all the input is the reference), the excursion too.
    assert np.array_equal(v.max(axis=0), values.max(axis=0))
    row = int(np.argmax(v[:, 1]))
    assert t[row] <= 123_457 * 0.01 < (t[row + 1] if row + 1 < len(t) else np.inf)
    # Each row stands for the same number of results: the last power of two
    # that brings 250000 under 1000 rows is 256 (250000 / 256 = 977).
    assert history.stride == 256 and len(t) == int(np.ceil(250_000 / 256))
