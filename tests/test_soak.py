"""The soak script, bench/soak.py, in a shortened form.

One hour of stream time goes through the real monitor, with band rises, gaps,
stale periods, reloads and a real mosquitto stopped and started on a loopback
port, in a subprocess. Memory, file descriptors and threads are what the
kernel reports for that process (/proc/self/status VmRSS and /proc/self/fd,
as proc(5) describes them); delivery is what the real broker confirmed. The
full day is `python bench/soak.py` (a few minutes).
"""

import importlib.util
import os
import re
import subprocess
import sys
from collections import Counter
from types import SimpleNamespace

import pytest

from conftest import need_program

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
SOAK = os.path.join(ROOT, "bench", "soak.py")
GROWTH_LIMIT_KB = 2048  # the soak's bound: 2 MB over the value after the first minute


def _load_soak():
    spec = importlib.util.spec_from_file_location("bandwatch_soak", SOAK)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _run(*args, timeout=180.0):
    return subprocess.run([sys.executable, SOAK, *args], cwd=ROOT, capture_output=True, text=True, timeout=timeout)


def _bounds(stdout):
    found = re.findall(r"^bound (\w+): (.*): (ok|BROKEN)$", stdout, re.M)
    return {name: (detail, verdict) for name, detail, verdict in found}


def test_an_hour_of_stream_holds_every_bound():
    need_program("mosquitto")
    proc = _run("--hours", "1", "--broker", "mosquitto")
    output = proc.stdout + proc.stderr
    assert proc.returncode == 0, output
    bounds = _bounds(proc.stdout)
    assert set(bounds) >= {"rss", "fds", "threads", "schedule", "delivery", "evidence"}, output
    assert all(verdict == "ok" for _, verdict in bounds.values()), output
    assert proc.stdout.rstrip().endswith("soak: ok"), output

    # The printed numbers themselves, against the bounds: resident memory
    # (VmRSS, proc(5)) grew by at most 2 MB; descriptors and threads did not grow.
    first, last = map(int, re.search(r"(\d+) kB after the first minute, (\d+) kB at the end", bounds["rss"][0]).groups())
    assert 0 < first and last - first <= GROWTH_LIMIT_KB
    for name in ("fds", "threads"):
        first, last = map(int, re.search(r"(\d+) after the first minute, (\d+) at the end", bounds[name][0]).groups())
        assert 0 < first and last <= first, (name, first, last)

    # Every event reached the broker across the outages, and there were outages.
    sent, confirmed = map(int, re.search(r"(\d+) events sent, (\d+) confirmed by the broker, 0 queued, 0 dropped",
                                         bounds["delivery"][0]).groups())
    assert sent == confirmed > 0
    # And every spectrum and capture the band rises sent.
    sent, confirmed = map(int, re.search(r"(\d+) spectra and captures sent, (\d+) confirmed, 0 queued, 0 dropped",
                                         bounds["evidence"][0]).groups())
    assert sent == confirmed > 0
    seen, scheduled = map(int, re.search(r"outages seen (\d+)/(\d+)", bounds["schedule"][0]).groups())
    assert seen == scheduled >= 4  # one per 15 minutes of stream time


def test_too_short_a_soak_is_refused_by_name():
    proc = _run("--hours", "0.01", timeout=60.0)
    assert proc.returncode == 2
    assert "--hours 0.01 is too short" in proc.stderr


def _snapshot(soak, rss_kb=60000, fds=12, threads=3):
    return soak.Snapshot(stream_s=0.0, wall_s=0.0, rss_kb=rss_kb, fds=fds, threads=threads, traced_kb=None, events=0)


def _verdicts(soak, last, events=None):
    run = SimpleNamespace(
        snapshots=[_snapshot(soak), last], broker=None, actions=[], end_s=3600.0, done=Counter(), outages_seen=0,
        sink=SimpleNamespace(events=Counter(events or {}), sent=0),
    )
    return {name: held for name, _, held in soak.check_bounds(run)}


@pytest.mark.parametrize(
    "change, broken",
    [
        ({}, None),
        ({"rss_kb": 60000 + GROWTH_LIMIT_KB}, None),  # exactly 2 MB more still holds
        ({"rss_kb": 60000 + GROWTH_LIMIT_KB + 1}, "rss"),
        ({"fds": 13}, "fds"),
        ({"threads": 4}, "threads"),
    ],
)
def test_each_bound_breaks_on_growth(change, broken):
    soak = _load_soak()
    verdicts = _verdicts(soak, _snapshot(soak, **change))
    assert [name for name, held in verdicts.items() if not held] == ([broken] if broken else [])


def test_an_unscheduled_event_breaks_the_schedule_bound():
    soak = _load_soak()
    verdicts = _verdicts(soak, _snapshot(soak), events={("overall", "warning"): 1})
    assert verdicts["schedule"] is False
