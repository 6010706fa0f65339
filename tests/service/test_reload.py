"""Reloading the config while running (SIGHUP): good, bad and partial files."""

import os
import re
import signal
import subprocess
import sys
import time

import numpy as np

from monitor.config import load, parse
from monitor.errors import ConfigError
from monitor.service.monitor import Monitor
from monitor.acquire.sources.memory import ArraySource
from rig import BASE, FS, ListSink

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

BAND = """
[[band]]
name = "tone"
channel = "x"
hz = [40.0, 60.0]
quantity = "acceleration"
warning = {warning}
alarm = {alarm}
hysteresis = 0.1
delay = 0.0
"""


class HookSource(ArraySource):
    """Replays samples and calls `hook(block_number)` before each block."""

    def __init__(self, config, samples, hook):
        super().__init__(config.source, samples, block=256)
        self.hook = hook
        self.count = 0

    def _read(self, timeout):
        self.hook(self.count)
        self.count += 1
        return super()._read(timeout)


def tone(seconds, rms=1.0):
    n = int(seconds * FS)
    t = np.arange(n) / FS
    x = rms * np.sqrt(2) * np.sin(2 * np.pi * 50 * t)
    return np.column_stack([x, 0.01 * np.random.default_rng(0).normal(size=n)])


def run_with_reloads(first, reloads, seconds=20.0):
    """Run on a 1.0-RMS 50 Hz tone; at each block number in `reloads`, reload
    with that config (a ConfigError instance is raised by the loader)."""
    sink = ListSink()
    holder = {}

    def hook(number):
        if number in reloads:
            new = reloads[number]

            def loader():
                if isinstance(new, ConfigError):
                    raise new
                return new

            holder["monitor"].request_reload(loader)

    monitor = Monitor(first, HookSource(first, tone(seconds), hook), sink)
    holder["monitor"] = monitor
    monitor.run()
    return monitor, sink


def band_events(sink):
    return [(e["name"], e["previous"], e["level"], e["limits"]["warning"], e["limits"]["alarm"]) for e in sink.of("event")
            if e["kind"] == "band"]


def test_good_reload_takes_new_limits_at_the_next_result_and_keeps_the_ring():
    first = parse(BASE + BAND.format(warning=2.0, alarm=3.0))
    second = parse(BASE + BAND.format(warning=0.5, alarm=3.0))
    monitor, sink = run_with_reloads(first, {40: second})
    # Before: 1.0 RMS is under warning 2.0. After the reload at block 40 (5 s),
    # the next result sees warning 0.5: one event, carrying the new limits.
    assert band_events(sink) == [("tone", "normal", "warning", 0.5, 3.0)]
    event = sink.of("event")[0]
    hop_s = first.spectrum.hop / FS
    assert 40 * 256 / FS <= event["stream_s"] <= 41 * 256 / FS + hop_s
    # The ring was kept: results kept coming every hop, no fresh warm-up.
    assert monitor.ring_kept
    stamps = [p["stream_s"] for p in sink.of("levels")]
    assert stamps  # a levels snapshot after the reload


def test_raised_level_survives_a_reload_that_keeps_the_band():
    first = parse(BASE + BAND.format(warning=0.5, alarm=3.0))
    again = parse(BASE + BAND.format(warning=0.6, alarm=3.0))
    _, sink = run_with_reloads(first, {40: again})
    # Raised once at the start; the reload with a limit still exceeded gives no event.
    assert band_events(sink) == [("tone", "normal", "warning", 0.5, 3.0)]


def test_limits_raised_above_the_value_clear_the_level_with_one_event():
    first = parse(BASE + BAND.format(warning=0.5, alarm=0.8))
    relaxed = parse(BASE + BAND.format(warning=2.0, alarm=3.0))
    _, sink = run_with_reloads(first, {40: relaxed})
    # From alarm straight to normal: at most one event for the reload.
    assert band_events(sink) == [("tone", "normal", "alarm", 0.5, 0.8), ("tone", "alarm", "normal", 2.0, 3.0)]


def test_bad_reload_is_refused_with_a_config_fault_and_the_old_config_runs_on():
    first = parse(BASE + BAND.format(warning=2.0, alarm=3.0))
    bad = ConfigError("bandwatch.toml", "band[1].warning", "expected a number > 0, got -1", 12)
    good = parse(BASE + BAND.format(warning=0.5, alarm=3.0))
    monitor, sink = run_with_reloads(first, {20: bad, 60: good})
    health = [(e["name"], e["level"]) for e in sink.of("event") if e["kind"] == "health"]
    assert health == [("config", "fault"), ("config", "normal")]
    # The band only changed after the good reload.
    band = [e for e in sink.of("event") if e["kind"] == "band"]
    assert len(band) == 1 and band[0]["stream_s"] >= 60 * 256 / FS


def test_partial_reload_applies_what_it_can_and_names_the_rest(caplog):
    first = parse(BASE + BAND.format(warning=2.0, alarm=3.0))
    changed_source = parse(BASE.replace('channels = ["x", "y"]', 'channels = ["x", "z"]')
                           + BAND.format(warning=0.5, alarm=3.0))
    with caplog.at_level("WARNING", logger="bandwatch.pipeline"):
        monitor, sink = run_with_reloads(first, {40: changed_source})
    assert any("[source] settings changed" in r.getMessage() for r in caplog.records)
    assert monitor.config.source.channels == ("x", "y")  # kept
    assert band_events(sink) == [("tone", "normal", "warning", 0.5, 3.0)]  # applied


def test_sighup_reloads_a_running_service(tmp_path):
    with open(os.path.join(ROOT, "config", "demo.toml"), encoding="utf-8") as fh:
        text = fh.read()
    path = tmp_path / "bandwatch.toml"
    quiet = re.sub(r"warning = [0-9.]+", "warning = 900.0", text)
    quiet = re.sub(r"alarm = [0-9.]+", "alarm = 999.0", quiet)
    path.write_text(quiet)
    load(str(path))
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "run", "-c", str(path)], cwd=ROOT,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        time.sleep(3.0)
        path.write_text(quiet.replace("[spectrum]", "[spectrum]\nbogus = 1"))  # bad
        proc.send_signal(signal.SIGHUP)
        time.sleep(1.0)
        path.write_text(text)  # good, the demo's low limits
        proc.send_signal(signal.SIGHUP)
        time.sleep(4.0)
        assert proc.poll() is None
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=10)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err
    assert "reload refused" in err and "spectrum.bogus" in err
    assert "reloaded" in err
    events = [line for line in out.splitlines() if '/event"' in line]
    assert any('"name":"config","channel":null,"level":"fault"' in e for e in events)
    assert any('"name":"config","channel":null,"level":"normal"' in e for e in events)
