"""The live benchmark, bench/live.py: its config copy, its /proc reading, and
a short run of `bandwatch run` fed over TCP with a real mosquitto.

The figures themselves (CPU share, peak memory) are the README's, not
asserted here: what is checked is that the tool measures what it says.
"""

import importlib.util
import os
import re
import subprocess
import sys

from conftest import need_program

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
LIVE = os.path.join(ROOT, "bench", "live.py")
CONFIG = os.path.join(ROOT, "bench", "live.toml")


def _load_live():
    sys.path.insert(0, os.path.dirname(LIVE))  # it imports the broker helper from bench/soak.py
    try:
        spec = importlib.util.spec_from_file_location("bandwatch_live", LIVE)
        module = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(module)
        return module
    finally:
        sys.path.remove(os.path.dirname(LIVE))


def test_config_copy_takes_the_runs_ports_and_queue_dir(tmp_path):
    live = _load_live()
    path, config, port = live.prepare_config(CONFIG, str(tmp_path), 23456)
    assert port == 23456 and config.mqtt.port == 23456
    assert config.mqtt.queue_dir == str(tmp_path / "queue")
    assert config.source.kind == "tcp-server" and config.source.port not in (5600, 0)
    # Everything else as shipped: the scenario the README describes.
    assert (config.spectrum.size, config.spectrum.overlap, config.spectrum.averages) == (8192, 0.5, 4)
    assert len(config.bands) == 3 and config.speed.track


def test_without_a_broker_the_mqtt_table_is_left_out(tmp_path):
    live = _load_live()
    _, config, port = live.prepare_config(CONFIG, str(tmp_path), None)
    assert port is None and config.mqtt is None
    assert [b.name for b in config.bands] == ["overall", "1x", "high"]


def test_cpu_seconds_agree_with_os_times():
    # /proc/PID/stat utime + stime (proc(5)) against the standard library's os.times().
    live = _load_live()
    sum(i * i for i in range(300_000))  # some CPU time to see
    times = os.times()
    measured = live.cpu_seconds(os.getpid())
    assert abs(measured - (times.user + times.system)) <= 0.05, (measured, times)


def test_a_short_live_run_keeps_every_sample_and_counts_every_result():
    need_program("mosquitto")
    proc = subprocess.run([sys.executable, LIVE, "--seconds", "10", "--warmup", "1", "--broker", "mosquitto"],
                          cwd=ROOT, capture_output=True, text=True, timeout=120)
    output = proc.stdout + proc.stderr
    assert proc.returncode == 0, output
    counted, expected = re.search(r"results counted: +(\d+) in the window \(one per hop: ([\d.]+)\)", output).groups()
    # 10 s at 25600 Hz with a hop of 4096 samples: 62.5 results, so 62 or 63 by where the window falls.
    assert float(expected) == 62.5 and int(counted) in (62, 63), output
    assert "samples dropped:        none" in output
    sent = int(re.search(r"frames sent: +(\d+) in the window", output).group(1))
    assert abs(sent - 500) <= 5, output  # 10 s of 512-sample frames at 25600 Hz, give or take the window's edges
    assert re.search(r"received on the broker: .*\b[1-9]\d* summary", output), output
    share = float(re.search(r"CPU share of one core: +([\d.]+) %", output).group(1))
    peak = float(re.search(r"peak RSS \(VmHWM\): +([\d.]+) MB", output).group(1))
    assert 0 < share < 100 and 10 < peak < 1000, output  # measured at all; the figures are the README's
