"""Limits relative to a learned baseline: learning, ratios, restarts, reset.

The rule is this project's choice (README, Limits relative to a learned
baseline): the median of the band's values over the learning time, levels
at ratio times it. Expected values are worked by hand from it on an invented
scenario. The band value of the 50 Hz tone is its RMS (analytic): edges 40
and 60 Hz are 5 lines of 2 Hz from it, where the README's edge table gives
Hann well under 0.1 %, and the 0.001 noise adds less; 1 % is loose.
"""

import os
import subprocess
import sys

import numpy as np
import pytest

from monitor.judge.baseline import BaselineStore
from monitor.config import parse
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
baseline = 10.0
warning_ratio = 2.0
alarm_ratio = 4.0
hysteresis = 0.1
delay = 1.0
"""


def scenario(seconds, steps):
    """An invented machine: a 50 Hz tone at RMS 0.5 that steps at given times."""
    n = int(seconds * FS)
    t = np.arange(n) / FS
    rms = np.full(n, 0.5)
    for at, value in steps:
        rms[t >= at] = value
    noise = 0.001 * np.random.default_rng(1).normal(size=(n, 2))
    return np.column_stack([rms * np.sqrt(2) * np.sin(2 * np.pi * 50 * t), np.zeros(n)]) + noise


def run(x, state_dir=None):
    config = parse(BASE + BAND)
    sink = ListSink()
    monitor = Monitor(config, ArraySource(config.source, x), sink, state_dir=state_dir)
    monitor.run()
    return monitor, [e for e in sink.of("event") if e["kind"] == "band"]


def test_levels_at_multiples_of_the_learned_value():
    # Learned 0.5 over the first 10 s; warning at 2 x 0.5 = 1.0, alarm at 2.0.
    monitor, events = run(scenario(40.0, [(20.0, 1.5), (30.0, 2.5)]))
    assert monitor.baselines[0].value == pytest.approx(0.5, rel=0.01)
    assert [(e["level"], e["limits"]["warning"], e["limits"]["alarm"]) for e in events] == [
        ("warning", pytest.approx(1.0, rel=0.01), pytest.approx(2.0, rel=0.01)),
        ("alarm", pytest.approx(1.0, rel=0.01), pytest.approx(2.0, rel=0.01)),
    ]


def test_nothing_is_raised_while_learning():
    # A high value during learning becomes part of the median, raises nothing.
    _, events = run(scenario(12.0, [(2.0, 3.0), (4.0, 0.5)]))
    assert events == []


def test_learned_value_survives_a_restart_and_reset_relearns(tmp_path):
    state = str(tmp_path)
    first, _ = run(scenario(12.0, []), state)
    assert first.baselines[0].value == pytest.approx(0.5, rel=0.01)
    # Restarted on a machine now at 1.5: the stored 0.5 holds, so warning at once.
    second, events = run(scenario(5.0, [(0.0, 1.5)]), state)
    assert second.baselines[0].value == pytest.approx(0.5, rel=0.01)
    assert [e["level"] for e in events] == ["warning"]
    # reset-baseline forgets it: the next run learns 1.5 and raises nothing.
    config = tmp_path / "bandwatch.toml"
    config.write_text(BASE + BAND + f'\n[mqtt]\nqueue_dir = "{state}"\n')
    out = subprocess.run([sys.executable, "-m", "monitor", "reset-baseline", "-c", str(config), "tone"],
                         cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, timeout=30)
    assert out.returncode == 0, out.stderr
    assert BaselineStore(state).entries == {}
    third, events = run(scenario(12.0, [(0.0, 1.5)]), state)
    assert third.baselines[0].value == pytest.approx(1.5, rel=0.01) and events == []


def test_config_rules_for_baseline_keys():
    from monitor.errors import ConfigError

    with pytest.raises(ConfigError, match="warning_ratio: needs baseline"):
        parse(BASE + BAND.replace("baseline = 10.0\n", ""))
    with pytest.raises(ConfigError, match="baseline: needs warning_ratio or alarm_ratio"):
        parse(BASE + BAND.replace("warning_ratio = 2.0\n", "").replace("alarm_ratio = 4.0\n", ""))
    with pytest.raises(ConfigError, match="give warning or warning_ratio"):
        parse(BASE + BAND.replace("warning_ratio = 2.0", "warning_ratio = 2.0\nwarning = 1.0"))
    with pytest.raises(ConfigError, match="alarm_ratio: expected a ratio above warning_ratio"):
        parse(BASE + BAND.replace("alarm_ratio = 4.0", "alarm_ratio = 1.5"))
