"""The `bandwatch` command, run for real in a subprocess (README, Commands and exit codes).

Exit codes: 0 done; 2 bad usage or bad config (nothing started); 1 failure at
run time. JSON goes to stdout, logs to stderr.
"""

import json
import os
import queue
import re
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from conftest import IN_CI
from monitor import __version__

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - old Pythons only
    import tomli as tomllib

ROOT = Path(__file__).resolve().parents[2]
DEMO_PATH = ROOT / "config" / "demo.toml"
DEMO = DEMO_PATH.read_text(encoding="utf-8")

# The demo's numbers, read straight from its TOML (not through monitor.config).
DEMO_TOML = tomllib.loads(DEMO)
DEMO_RPM = float(DEMO_TOML["speed"]["rpm"])  # 1480
DEMO_FS = float(DEMO_TOML["source"]["sample_rate"])  # 5120 Hz
DEMO_SIZE = int(DEMO_TOML["spectrum"]["size"])  # 4096
DEMO_OVERLAP = float(DEMO_TOML["spectrum"]["overlap"])  # 0.5
DEMO_AVERAGES = int(DEMO_TOML["spectrum"]["averages"])  # 4

TIME_RE = re.compile(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z$")
COMMON_FIELDS = {"node", "time", "stream_s"}
SUMMARY_FIELDS = COMMON_FIELDS | {"speed_hz", "speed_s", "channels", "bands"}
SUMMARY_CHANNEL_FIELDS = {"rms", "peak", "crest", "kurtosis", "velocity_rms", "dominant_hz", "dominant_rms", "unit"}
SUMMARY_BAND_FIELDS = {"name", "channel", "value", "unit", "level", "limits"}
LIMITS_FIELDS = {"warning", "alarm"}
EVENT_FIELDS = COMMON_FIELDS | {
    "id", "kind", "name", "channel", "level", "previous", "value", "limits", "unit", "quantity",
    "speed_hz", "dominant_hz",
}
STATUS_FIELDS = COMMON_FIELDS | {"state", "version", "since"}
README = (ROOT / "README.md").read_text(encoding="utf-8")
# The band levels in rising order, and the health checks, as the README names them.
LEVEL_ORDER = re.search(r"Levels are\s+`(\w+)`, `(\w+)`, `(\w+)` for bands", README).groups()
_HEALTH = README[README.index("| key | default | check |"):]
HEALTH_CHECKS = {name for row in _HEALTH[:_HEALTH.index("\n\n")].splitlines()[2:]
                 for name in re.findall(r"`(\w+)`", row.split("|")[3])}
LEVELS_ROW_FIELDS = {"name", "channel", "level", "value", "limits"}


def bandwatch_env() -> dict:
    """The environment for the child: this checkout first on the path."""
    env = dict(os.environ)
    for name in ("NOTIFY_SOCKET", "WATCHDOG_USEC", "WATCHDOG_PID"):  # should pytest itself run under systemd
        env.pop(name, None)
    env["PYTHONPATH"] = str(ROOT) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    env["PYTHONUNBUFFERED"] = "1"
    return env


def bandwatch(*args: str, timeout: float = 60.0) -> subprocess.CompletedProcess:
    return subprocess.run(
        [sys.executable, "-m", "monitor", *args],
        cwd=str(ROOT),
        env=bandwatch_env(),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        timeout=timeout,
    )


def demo_copy(tmp_path: Path, *pairs, name: str = "demo.toml") -> Path:
    """The demo with lines changed: each `old` is a regular expression matching
    whole lines, and must match exactly one."""
    text = DEMO
    for old, new in pairs:
        text, count = re.subn(r"^" + old + r"$", new, text, flags=re.M)
        assert count == 1, f"{old!r} matches {count} lines of config/demo.toml"
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


# ---------------------------------------------------------------------------
# check


@pytest.fixture(scope="module")
def check_output():
    result = bandwatch("check", "-c", str(DEMO_PATH))
    assert result.returncode == 0, result.stderr
    return result.stdout


def _band_row(output: str, name: str) -> list:
    rows = [line.split() for line in output.splitlines() if line.split()[:1] == [name]]
    assert len(rows) == 1, f"band {name!r} is not printed once in:\n{output}"
    return rows[0]


def _edges(row: list) -> tuple:
    for cell in row:
        m = re.fullmatch(r"(\d+(?:\.\d+)?)\.\.(\d+(?:\.\d+)?)", cell)
        if m:
            return float(m.group(1)), float(m.group(2))
    raise AssertionError(f"no lo..hi edges in {row}")


def _numbers(row: list) -> list:
    out = []
    for cell in row:
        try:
            out.append(float(cell))
        except ValueError:
            pass
    return out


# Shaft frequency = rpm/60 (common practice).
SHAFT_HZ = DEMO_RPM / 60.0

DEMO_BANDS = [
    # name, edges in Hz at nominal speed, quantity, unit, warning, alarm
    ("overall", (10.0, 1000.0), "velocity", "mm/s", 2.8, 4.5),
    ("1x", (0.8 * SHAFT_HZ, 1.2 * SHAFT_HZ), "velocity", "mm/s", 2.0, 3.5),
    ("2x", (1.8 * SHAFT_HZ, 2.2 * SHAFT_HZ), "velocity", "mm/s", 1.5, 3.0),
    ("high", (1000.0, 2500.0), "acceleration", "g", 0.5, 1.0),
]


def test_check_exits_0_and_says_ok(check_output):
    assert "OK" in check_output.splitlines()[0]
    assert str(DEMO_PATH) in check_output.splitlines()[0]


@pytest.mark.parametrize("name, edges, quantity, unit, warning, alarm", DEMO_BANDS, ids=[b[0] for b in DEMO_BANDS])
def test_check_prints_each_band(check_output, name, edges, quantity, unit, warning, alarm):
    row = _band_row(check_output, name)
    # Printed to 6 significant digits: 1x is 19.7333..29.6 Hz at 1480 rpm.
    assert _edges(row) == pytest.approx(edges, rel=1e-5)
    assert quantity in row
    assert unit in row
    numbers = _numbers(row)
    assert warning in numbers and alarm in numbers


def test_check_prints_the_1x_band_edges_at_nominal_speed(check_output):
    # 0.8 and 1.2 orders of 1480 rpm / 60 = 24.667 Hz (common practice), by hand.
    lo, hi = _edges(_band_row(check_output, "1x"))
    assert lo == pytest.approx(19.7333, abs=1e-4)
    assert hi == pytest.approx(29.6, abs=1e-4)


def test_check_prints_the_spectral_resolution(check_output):
    # Line spacing fs/N, a frame N/fs seconds (common practice); a result
    # every hop = N * (1 - overlap) samples (README, What it measures).
    bin_hz = DEMO_FS / DEMO_SIZE
    frame_s = DEMO_SIZE / DEMO_FS
    hop_s = DEMO_SIZE * (1 - DEMO_OVERLAP) / DEMO_FS
    # The demo's own comments state these; they must stay true.
    m = re.search(r"^size = \d+ +# ([\d.]+) Hz lines, ([\d.]+) s frames$", DEMO, flags=re.M)
    assert m and (float(m.group(1)), float(m.group(2))) == (bin_hz, frame_s)
    m = re.search(r"^overlap = [\d.]+ +# a result every ([\d.]+) s$", DEMO, flags=re.M)
    assert m and float(m.group(1)) == hop_s
    m = re.search(r"bin width ([\d.]+) Hz", check_output)
    assert m and float(m.group(1)) == pytest.approx(bin_hz)
    m = re.search(r"frame ([\d.]+) s", check_output)
    assert m and float(m.group(1)) == pytest.approx(frame_s)
    m = re.search(r"result every ([\d.]+) s", check_output)
    assert m and float(m.group(1)) == pytest.approx(hop_s)


def test_check_warns_of_a_search_range_wider_than_an_octave(tmp_path, check_output):
    # An octave is 2:1 in frequency (common practice); 15..45 Hz holds 1x and
    # 2x of the demo's 24.7 Hz, which only the harmonic guard tells apart.
    path = demo_copy(tmp_path, (r"search_hz = .*", "search_hz = [15.0, 45.0]"))
    result = bandwatch("check", "-c", str(path), timeout=30)
    assert result.returncode == 0
    warning = [line for line in result.stdout.splitlines() if "warning: search_hz" in line]
    assert len(warning) == 1 and "15..45 Hz" in warning[0] and "3:1" in warning[0], result.stdout
    assert "warning: search_hz" not in check_output  # the demo's 20..30 Hz is within an octave


def test_check_writes_nothing_to_stderr_on_a_good_config():
    result = bandwatch("check", "-c", str(DEMO_PATH))
    assert result.returncode == 0
    assert result.stderr == ""


# ---------------------------------------------------------------------------
# a broken config: exit 2, nothing started


@pytest.mark.parametrize("command", ["check", "run"])
def test_broken_config_exits_2_naming_file_key_and_line(tmp_path, command):
    path = demo_copy(tmp_path, (r"size = .*", "size = 1000"), name="broken.toml")
    line = next(n for n, text in enumerate(path.read_text().splitlines(), 1) if text.startswith("size = 1000"))
    result = bandwatch(command, "-c", str(path), timeout=30)
    assert result.returncode == 2
    assert str(path) in result.stderr
    assert "spectrum.size" in result.stderr
    assert f"{path}:{line}" in result.stderr
    assert "1000" in result.stderr and "power of two" in result.stderr
    assert result.stdout == ""  # no status, no summary: nothing started


def test_missing_config_file_exits_2(tmp_path):
    path = tmp_path / "nowhere.toml"
    result = bandwatch("run", "-c", str(path), timeout=30)
    assert result.returncode == 2
    assert str(path) in result.stderr
    assert result.stdout == ""


# ---------------------------------------------------------------------------
# run, as fast as possible, 60 s of stream time


@pytest.fixture(scope="module")
def run_60s(tmp_path_factory):
    """Topic suffix and payload of every stdout line of a 60 s simulated run."""
    tmp_path = tmp_path_factory.mktemp("run")
    path = demo_copy(tmp_path, (r"realtime = .*", "realtime = false"), (r"sim_seconds = .*", "sim_seconds = 60.0"))
    result = bandwatch("run", "-c", str(path), timeout=120)
    assert result.returncode == 0, result.stderr
    messages = []
    for line in result.stdout.splitlines():
        obj = json.loads(line)  # every line is JSON, nothing else
        assert isinstance(obj, dict) and set(obj) == {"topic", "payload"}, line
        assert isinstance(obj["payload"], dict), line
        messages.append((obj["topic"], obj["payload"]))
    assert messages, "no output"
    return messages


def _suffix(topic: str) -> str:
    prefix = "bandwatch/demo-fan/"
    assert topic.startswith(prefix), topic
    return topic[len(prefix):]


def _of(run, suffix):
    return [p for t, p in run if _suffix(t) == suffix]


def test_run_topics(run_60s):
    suffixes = {_suffix(t) for t, _ in run_60s}
    # The demo's bands rise, and each rise sends its spectrum (README, What is published).
    assert suffixes == {"status", "summary", "event", "levels", "spectrum"}


def test_run_starts_online_and_ends_offline(run_60s):
    (first_topic, first), (last_topic, last) = run_60s[0], run_60s[-1]
    assert _suffix(first_topic) == "status" and first["state"] == "online"
    assert _suffix(last_topic) == "status" and last["state"] == "offline"
    assert len(_of(run_60s, "status")) == 2
    for status in (first, last):
        assert set(status) == STATUS_FIELDS
        assert status["version"] == __version__
        assert TIME_RE.match(status["since"]), status["since"]
    assert first["since"] == last["since"]


def test_every_payload_has_node_time_and_stream_s(run_60s):
    previous = 0.0
    for _, payload in run_60s:
        assert payload["node"] == "demo-fan"
        assert TIME_RE.match(payload["time"]), payload["time"]
        assert isinstance(payload["stream_s"], (int, float))
        assert payload["stream_s"] >= previous  # stream time only moves on
        previous = payload["stream_s"]
    assert previous == pytest.approx(60.0, abs=0.5)


def test_summaries_every_10_s_of_stream_time(run_60s):
    hop_s = DEMO_SIZE * (1 - DEMO_OVERLAP) / DEMO_FS
    times = [p["stream_s"] for p in _of(run_60s, "summary")]
    # One summary in each 10 s slot (summary_interval default), the first with
    # the first result, each later one with the first result at or after the
    # slot's start.
    slots = [int(t // 10.0) for t in times]
    assert slots == list(range(len(slots))), times
    assert len(slots) >= 6, times  # 0-10 s, ..., 50-60 s
    for k, t in enumerate(times[1:], start=1):
        assert 10.0 * k <= t < 10.0 * k + hop_s + 1e-6, times


def test_summary_fields_as_spec_section_4(run_60s):
    summaries = _of(run_60s, "summary")
    band_rows = {(name, ch) for name, chs in [("overall", "xy"), ("1x", "x"), ("2x", "x"), ("high", "xy")]
                 for ch in chs}
    for s in summaries:
        assert set(s) == SUMMARY_FIELDS
        assert isinstance(s["speed_hz"], float)
        # The demo tracks its speed: read at the middle of the result's
        # samples (README, What it measures), half a span before stream_s.
        span_s = (DEMO_SIZE + (DEMO_AVERAGES - 1) * DEMO_SIZE * (1 - DEMO_OVERLAP) - 1) / DEMO_FS
        assert s["speed_s"] == pytest.approx(s["stream_s"] - span_s / 2, abs=1e-6)
        assert set(s["channels"]) == {"x", "y"}
        for channel in s["channels"].values():
            assert set(channel) == SUMMARY_CHANNEL_FIELDS
            assert channel["unit"] == "g"
            for field in SUMMARY_CHANNEL_FIELDS - {"unit"}:
                assert isinstance(channel[field], float), (field, channel)
        assert isinstance(s["bands"], list)
        for band in s["bands"]:
            assert set(band) == SUMMARY_BAND_FIELDS
            assert band["level"] in ("normal", "warning", "alarm")
            # The demo's limits, as config/demo.toml gives them.
            limits = next(b for b in DEMO_TOML["band"] if b["name"] == band["name"])
            assert band["limits"] == {"warning": limits["warning"], "alarm": limits["alarm"]}
            assert band["unit"] == ("g" if band["name"] == "high" else "mm/s")
        assert {(b["name"], b["channel"]) for b in s["bands"]} == band_rows


def test_events_within_60_s_with_every_field(run_60s):
    events = _of(run_60s, "event")
    band_events = [e for e in events if e["kind"] == "band"]
    assert band_events, "the demo's growing imbalance should raise a level within 60 s"
    assert band_events[0]["stream_s"] <= 60.0
    held = {}
    for e in events:
        assert set(e) == EVENT_FIELDS
        assert e["kind"] in ("band", "health")
        assert e["level"] != e["previous"]
        if e["kind"] == "health":  # e.g. stale, should the machine running the test stall
            assert {e["level"], e["previous"]} == {"normal", "fault"}
            assert e["name"] in HEALTH_CHECKS
            assert e["limits"] == {"warning": None, "alarm": None}
            continue
        # Each band event against the demo's own TOML: its band, channel,
        # quantity, unit and limits as written there.
        band = next(b for b in DEMO_TOML["band"] if b["name"] == e["name"])
        assert e["channel"] in band.get("channels", [band["channel"]] if "channel" in band else ["x", "y"])
        assert e["quantity"] == band["quantity"]
        assert e["unit"] == ("g" if band["quantity"] == "acceleration" else "mm/s")
        limits = LEVEL_ORDER[1:]
        assert set(e["limits"]) == LIMITS_FIELDS
        assert [e["limits"][name] for name in limits] == [band.get(name) for name in limits]
        # Levels chain per band: each event starts where the last one ended.
        key = (e["name"], e["channel"])
        assert e["previous"] == held.get(key, "normal"), e
        held[key] = e["level"]
        # README, What is published: raised at or above the limit; lowered
        # below limit * (1 - hysteresis).
        if LEVEL_ORDER.index(e["level"]) > LEVEL_ORDER.index(e["previous"]):
            assert e["value"] >= e["limits"][e["level"]]
        else:
            assert e["value"] < e["limits"][e["previous"]] * (1 - band.get("hysteresis", 0.1))
        # The demo's speed is tracked in search_hz; 1x is its strongest line.
        low, high = DEMO_TOML["speed"]["search_hz"]
        assert low < e["speed_hz"] < high
        assert e["dominant_hz"] == pytest.approx(e["speed_hz"], abs=DEMO_FS / DEMO_SIZE)
    # Ids count up by one from 1, over every kind of event.
    assert [e["id"] for e in events] == list(range(1, len(events) + 1))


def test_a_levels_payload_follows_every_event(run_60s):
    for i, (topic, payload) in enumerate(run_60s):
        if _suffix(topic) != "event":
            continue
        # Events of one result come together, then one levels payload.
        j = i + 1
        while _suffix(run_60s[j][0]) == "event":
            j += 1
        topic_after, after = run_60s[j]
        assert _suffix(topic_after) == "levels", (payload, run_60s[j])
        assert after["stream_s"] == payload["stream_s"]
        rows = {(r["name"], r["channel"]): r for r in after["levels"]}
        assert rows[(payload["name"], payload["channel"])]["level"] == payload["level"]


def test_levels_payload_lists_every_band_and_health_check(run_60s):
    for levels in _of(run_60s, "levels"):
        assert set(levels) == COMMON_FIELDS | {"levels"}
        for row in levels["levels"]:
            assert set(row) == LEVELS_ROW_FIELDS
            assert set(row["limits"]) == LIMITS_FIELDS
            if row["name"] in HEALTH_CHECKS:  # a health check has no band limits
                assert row["limits"] == {"warning": None, "alarm": None}
            else:
                assert all(isinstance(v, float) for v in row["limits"].values()), row
        names = {r["name"] for r in levels["levels"]}
        assert {"overall", "1x", "2x", "high"} | HEALTH_CHECKS <= names


def test_speed_is_near_the_demo_rpm(run_60s):
    nominal = DEMO_RPM / 60.0  # shaft frequency = rpm/60, common practice
    band_events = [e for e in _of(run_60s, "event") if e["kind"] == "band"]
    speeds = [p["speed_hz"] for p in _of(run_60s, "summary") + band_events]
    assert speeds
    # The simulator wanders +-0.3 % around sim_rpm; on top of that allow the
    # estimate's own error, 0.04 of a bin (0.05 Hz here).
    tolerance = 0.003 * nominal + 0.04 * DEMO_FS / DEMO_SIZE
    for speed in speeds:
        assert abs(speed - nominal) <= tolerance, (speed, nominal)


# ---------------------------------------------------------------------------
# run until SIGTERM


@pytest.mark.skipif(sys.platform == "win32", reason="POSIX signals")
def test_sigterm_stops_a_live_run_cleanly():
    proc = subprocess.Popen(
        [sys.executable, "-m", "monitor", "run", "-c", str(DEMO_PATH)],
        cwd=str(ROOT),
        env=bandwatch_env(),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    lines: "queue.Queue[str]" = queue.Queue()
    seen = []

    def reader():
        for line in proc.stdout:
            lines.put(line)

    thread = threading.Thread(target=reader, daemon=True)
    thread.start()
    try:
        # Wait for the first result (the demo is paced: about 2 s of signal),
        # so the monitor is really measuring when the signal comes.
        deadline = time.monotonic() + 60.0
        while not any(json.loads(line)["topic"].endswith("/levels") for line in seen):
            remaining = deadline - time.monotonic()
            assert remaining > 0, f"no levels line in time; stdout so far: {seen}"
            try:
                seen.append(lines.get(timeout=remaining))
            except queue.Empty:
                pass
        proc.send_signal(signal.SIGTERM)
        sent = time.monotonic()
        rc = proc.wait(timeout=5.0)
        took = time.monotonic() - sent
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    thread.join(timeout=5.0)
    while not lines.empty():
        seen.append(lines.get())
    stderr = proc.stderr.read()
    proc.stdout.close()
    proc.stderr.close()
    assert rc == 0, stderr
    assert took < 5.0
    last = json.loads(seen[-1])
    assert last["topic"] == "bandwatch/demo-fan/status"
    assert last["payload"]["state"] == "offline"
    assert json.loads(seen[0])["payload"]["state"] == "online"


# ---------------------------------------------------------------------------
# usage


@pytest.mark.parametrize(
    "args",
    [
        [],
        ["--frobnicate"],
        ["check", "-c", str(DEMO_PATH), "--frobnicate"],
        ["check"],  # -c is required
        ["explode", "-c", str(DEMO_PATH)],
    ],
    ids=["no-command", "unknown-option", "unknown-option-after-command", "no-config", "unknown-command"],
)
def test_bad_usage_exits_2(args):
    result = bandwatch(*args, timeout=30)
    assert result.returncode == 2
    assert "usage" in result.stderr
    assert result.stdout == ""


def test_version():
    result = bandwatch("--version", timeout=30)
    assert result.returncode == 0
    assert result.stdout.strip() == f"bandwatch {__version__}"


def test_console_script_version():
    script = Path(sys.executable).parent / ("bandwatch.exe" if sys.platform == "win32" else "bandwatch")
    if not script.exists():
        # The README's test command installs the package, script included:
        # under CI a missing script is a failure, never a skip.
        message = f"{script} is not installed (pip install -e . makes it)"
        if IN_CI:
            pytest.fail(message)
        pytest.skip(message)
    result = subprocess.run([str(script), "--version"], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, timeout=30)
    assert result.returncode == 0
    assert result.stdout.strip() == f"bandwatch {__version__}"


def test_check_says_when_spectra_are_sent(check_output):
    # config/demo.toml: spectra with each rise, lines up to 250 Hz.
    assert "spectra: with each band rise, lines up to 250 Hz" in check_output.splitlines()


# ---------------------------------------------------------------------------
# options: global ones anywhere, help for every argument


def _finite_demo(tmp_path: Path, seconds: float = 3.0) -> Path:
    return demo_copy(tmp_path, (r"realtime = .*", "realtime = false"),
                     (r"sim_seconds = .*", f"sim_seconds = {seconds}"))


@pytest.mark.parametrize("where", ["before", "after"])
def test_log_level_works_before_and_after_the_subcommand(tmp_path, where):
    # Python's logging writes the level name in each line (our format: time LEVEL name: message).
    path = _finite_demo(tmp_path)
    plain = bandwatch("run", "-c", str(path), timeout=60)
    assert plain.returncode == 0 and " INFO " in plain.stderr, plain.stderr  # the default level is info
    option = ["--log-level", "warning"]
    args = option + ["run", "-c", str(path)] if where == "before" else ["run", "-c", str(path)] + option
    result = bandwatch(*args, timeout=60)
    assert result.returncode == 0, result.stderr
    assert " INFO " not in result.stderr


def test_log_level_after_the_subcommand_wins_over_the_one_before(tmp_path):
    path = _finite_demo(tmp_path)
    result = bandwatch("--log-level", "info", "run", "-c", str(path), "--log-level", "error", timeout=60)
    assert result.returncode == 0 and " INFO " not in result.stderr, result.stderr


def test_every_subcommand_lists_log_level_and_every_argument_has_help():
    from monitor.commands.cli import _parser

    parser = _parser()
    subparsers = next(a for a in parser._actions if isinstance(a, __import__("argparse")._SubParsersAction))
    assert set(subparsers.choices) >= {"run", "check", "replay", "record", "view", "reset-baseline", "bench"}
    for name in subparsers.choices:
        text = bandwatch(name, "--help", timeout=30).stdout
        assert "--log-level" in text, name
    for name, sub in [("", parser)] + list(subparsers.choices.items()):
        for action in sub._actions:
            if isinstance(action, __import__("argparse")._SubParsersAction):
                continue
            assert action.help, f"bandwatch {name}: {action.option_strings or action.dest} has no help text"


# ---------------------------------------------------------------------------
# a file source: check opens its recording


FILE_SOURCE = """\
[node]
name = "rig-9"
[source]
kind = "file"
path = "{path}"
channels = ["x", "y"]
unit = "g"
{scale}
[spectrum]
size = 1024
[[band]]
name = "overall"
hz = [10.0, 1000.0]
quantity = "velocity"
warning = 2.8
"""


def _pcm_wav(path: Path, rate: int, channels: int = 2, width: int = 2, seconds: float = 2.0) -> Path:
    """A silent PCM file as another tool writes it (the standard library's wave module)."""
    import wave

    with wave.open(str(path), "wb") as w:
        w.setnchannels(channels)
        w.setsampwidth(width)
        w.setframerate(rate)
        w.writeframes(b"\0" * (width * channels * int(rate * seconds)))
    return path


def _file_config(tmp_path: Path, rec: Path, scale: str = "scale = 0.0001") -> Path:
    path = tmp_path / "file.toml"
    path.write_text(FILE_SOURCE.format(path=rec, scale=scale), encoding="utf-8")
    return path


def test_check_opens_a_file_sources_recording_and_prints_its_rate(tmp_path):
    rec = _pcm_wav(tmp_path / "run.wav", 4096)
    result = bandwatch("check", "-c", str(_file_config(tmp_path, rec)), timeout=30)
    assert result.returncode == 0, result.stderr
    assert "4096 Hz" in result.stdout and "Nyquist 2048 Hz" in result.stdout  # fs / 2 (common practice)
    assert "2 s of int16" in result.stdout and "0.0001 g" in result.stdout


@pytest.mark.parametrize("command", ["check", "run"])
def test_a_missing_recording_exits_2(tmp_path, command):
    # Exit 2 (bad config, nothing started; README, Commands and exit codes):
    # systemd does not restart a service for it.
    missing = tmp_path / "gone.wav"
    result = bandwatch(command, "-c", str(_file_config(tmp_path, missing)), timeout=30)
    assert result.returncode == 2
    assert "source.path" in result.stderr and "gone.wav" in result.stderr
    assert result.stdout == ""


@pytest.mark.parametrize("command", ["check", "run"])
def test_a_band_above_the_recordings_nyquist_exits_2(tmp_path, command):
    # Recorded at 1600 Hz: Nyquist is 800 Hz (fs / 2, common practice), below the 1000 Hz edge.
    rec = _pcm_wav(tmp_path / "slow.wav", 1600)
    result = bandwatch(command, "-c", str(_file_config(tmp_path, rec)), timeout=30)
    assert result.returncode == 2
    assert "band[1].hz" in result.stderr and "800" in result.stderr
    assert result.stdout == ""


def test_a_recording_with_other_channels_exits_2(tmp_path):
    rec = _pcm_wav(tmp_path / "three.wav", 4096, channels=3)
    result = bandwatch("check", "-c", str(_file_config(tmp_path, rec)), timeout=30)
    assert result.returncode == 2
    assert "source.channels" in result.stderr and "holds 3" in result.stderr


@pytest.mark.parametrize("command", ["check", "run"])
def test_an_integer_recording_without_scale_exits_2(tmp_path, command):
    rec = _pcm_wav(tmp_path / "counts.wav", 4096)
    result = bandwatch(command, "-c", str(_file_config(tmp_path, rec, scale="")), timeout=30)
    assert result.returncode == 2
    # The README's formula, and its example: +-2 g over int16 is 2 / 2^15 g per count.
    assert "source.scale" in result.stderr and "2^(bits-1)" in result.stderr
    assert f"{2 / 2 ** 15:.6g}" in result.stderr


# ---------------------------------------------------------------------------
# check: limits from a learned baseline


RATIO_BANDS = """
[[band]]
name = "2x-learned"
channel = "x"
orders = [1.8, 2.2]
quantity = "velocity"
baseline = 600
warning_ratio = 2.0
alarm_ratio = 4.5
"""


def test_check_shows_ratio_limits_and_the_learned_values(tmp_path):
    state = tmp_path / "state"
    path = demo_copy(tmp_path)
    path.write_text(path.read_text() + RATIO_BANDS, encoding="utf-8")
    result = bandwatch("check", "-c", str(path), timeout=30)
    assert result.returncode == 0, result.stderr
    row = next(line for line in result.stdout.splitlines() if line.split()[:1] == ["2x-learned"])
    assert "x2.0 of learned" in row and "x4.5 of learned" in row
    assert "2x-learned/x: learns its baseline over the first 600 s" in result.stdout
    # A node that has learned 1.5 mm/s: limits at 2 and 4.5 times it (README,
    # Limits relative to a learned baseline): 3 and 6.75 mm/s.
    state.mkdir()
    (state / "baselines.json").write_text(json.dumps(
        {"2x-learned/x": {"value": 1.5, "seconds": 600.0, "learned_at_stream_s": 601.0}}), encoding="utf-8")
    path.write_text(path.read_text() + f'\n[mqtt]\nqueue_dir = "{state}"\n', encoding="utf-8")
    result = bandwatch("check", "-c", str(path), timeout=30)
    assert result.returncode == 0, result.stderr
    assert "2x-learned/x: learned 1.5 mm/s, so warning 3, alarm 6.75 mm/s" in result.stdout


def test_check_creates_no_state_folder(tmp_path):
    path = demo_copy(tmp_path)
    path.write_text(path.read_text() + RATIO_BANDS + '\n[mqtt]\nqueue_dir = "never"\n', encoding="utf-8")
    result = bandwatch("check", "-c", str(path), timeout=30)
    assert result.returncode == 0, result.stderr
    assert not (tmp_path / "never").exists()


def _readme_commands():
    """Every `bandwatch ... -c ...` command line the README shows, in code
    blocks and inline, as written (pipes and redirections cut off)."""
    blocks = re.findall(r"```[a-z]*\n(.*?)```", README, re.S)
    lines = [line.strip() for block in blocks for line in block.splitlines()]
    lines += [" ".join(span.split()) for span in re.findall(r"`([^`]+)`", re.sub(r"```[a-z]*\n.*?```", "", README,
                                                                                 flags=re.S))]
    commands = []
    for line in lines:
        line = re.sub(r"^sudo -u bandwatch ", "", line)
        if line.startswith("bandwatch ") and " -c " in line:
            commands.append(re.split(r"\s(?:\||2?>)", line)[0])
    return commands


@pytest.mark.parametrize("line", sorted(set(_readme_commands())))
def test_every_command_line_in_the_readme_parses(line):
    # Optional parts in [brackets] are taken as given; placeholders for
    # numbers and choices get a value, the others (FILE, REC) stay as written.
    import argparse
    import shlex

    from monitor.commands.cli import _parser

    values = {"S": "10", "X": "2", "F": "int16"}
    words = [values.get(w, w) for w in shlex.split(re.sub(r"\[([^\[\]]*?)( \.\.\.)?\]", r"\1", line))]
    assert words[0] == "bandwatch"
    try:
        args = _parser().parse_args(words[1:])
    except SystemExit as exc:  # argparse's way of refusing
        raise AssertionError(f"the README's `{line}` is refused by the parser") from exc
    assert isinstance(args, argparse.Namespace)


def test_the_readme_says_how_to_put_bandwatch_on_the_path():
    # After the two set-up commands the venv holds bandwatch; the README says
    # to activate it before the first `bandwatch` command it shows.
    first = README.index("bandwatch view -c config/demo.toml")
    assert README.index(". .venv/bin/activate") < first
    assert 0 < README.index("sh scripts/demo") < README.index(". .venv/bin/activate")


def test_a_file_source_over_the_memory_budget_at_the_recordings_rate_exits_2(tmp_path):
    # Ten minutes of capture ring at 51.2 kHz on 2 channels is 600 * 51200 * 2
    # float32 values, 245.8 MB: over a 32 MiB budget, known only once the
    # recording gives the rate.
    rec = _pcm_wav(tmp_path / "fast.wav", 51200, seconds=0.1)
    path = _file_config(tmp_path, rec)
    path.write_text(path.read_text().replace('name = "rig-9"', 'name = "rig-9"\nmemory_mb = 32')
                    + "[capture]\nseconds = 600.0\n", encoding="utf-8")
    result = bandwatch("check", "-c", str(path), timeout=30)
    assert result.returncode == 2
    assert "node.memory_mb" in result.stderr and "budget of 32 MiB" in result.stderr
