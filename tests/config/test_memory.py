"""The memory a config needs: `check` adds up the buffers allocated at start
and refuses a config over `[node] memory_mb`. The plan is held against the
arrays actually allocated (numpy's nbytes) and against the kernel's count of
resident memory (VmRSS in /proc/self/status, Linux proc(5))."""

import os
import subprocess
import sys

import numpy as np
import pytest

from monitor.acquire.recording import RecordingWriter
from monitor.acquire.sources import open_source
from monitor.config import parse
from monitor.config.memory import MIB, plan
from monitor.errors import ConfigError
from monitor.service.capture import Capture
from monitor.service.monitor import Monitor
from rig import ListSink

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def config(rate=25600.0, channels=3, seconds=10.0, after=5.0, extra="", source=None):
    names = ", ".join(f'"c{i}"' for i in range(channels))
    source = source or f'kind = "tcp-client"\nhost = "127.0.0.1"\nport = 4000\nsample_rate = {rate}'
    return f"""
[node]
name = "big"
{extra}
[source]
{source}
channels = [{names}]
[capture]
seconds = {seconds}
after = {after}
"""


def test_ten_minutes_each_side_of_a_trigger_is_refused_by_name():
    # 1200 s x 3 channels x 25600 Hz x 4 bytes (float32) = 368 640 000 bytes = 351.6 MiB.
    with pytest.raises(ConfigError) as info:
        parse(config(seconds=600.0, after=600.0), "big.toml")
    err = info.value
    assert err.key == "node.memory_mb" and err.line == 2
    assert "capture ring 352 MiB" in str(err) and "over the budget of 256 MiB" in str(err)


def test_sixteen_channels_at_a_megahertz_is_refused_not_an_allocation_error():
    with pytest.raises(ConfigError, match=r"capture ring 73242 MiB"):
        parse(config(rate=1_000_000.0, channels=16, seconds=600.0, after=600.0), "big.toml")


def test_a_larger_budget_takes_it_and_the_bound_is_configurable():
    parse(config(seconds=600.0, after=600.0, extra="memory_mb = 512"), "big.toml")
    with pytest.raises(ConfigError, match="memory_mb"):
        parse(config(extra="memory_mb = 16"), "big.toml")  # below the 32 MiB floor


def test_the_plan_is_what_is_allocated():
    cfg = parse(config(seconds=3.0, after=1.0, extra="memory_mb = 512"), "t.toml")
    parts = {p.name: p.bytes for p in plan(cfg)}
    capture = Capture(cfg.capture, cfg.node, cfg.source.channels, cfg.source.unit, cfg.source.sample_rate)
    assert parts["capture ring"] == capture.ring._buf.nbytes == 3 * 4 * 25600 * 4
    source = open_source(cfg.source)
    monitor = Monitor(cfg, source, ListSink())
    assert parts["sample ring"] == monitor.ring._buf.nbytes


RSS = r"""
import sys
import numpy as np
from monitor.service.capture import Capture
from monitor.config import parse
cfg = parse(sys.argv[1], "t.toml")
def rss():
    with open("/proc/self/status") as fh:
        return next(int(l.split()[1]) * 1024 for l in fh if l.startswith("VmRSS:"))
capture = Capture(cfg.capture, cfg.node, cfg.source.channels, cfg.source.unit, cfg.source.sample_rate)
block = np.ones((3, 25600))
before = rss()
for i in range(70):  # more than the ring holds: it must stop growing at its size
    capture.feed(block, (i + 1) * 25600)
print(rss() - before)
"""


def test_resident_memory_grows_by_the_planned_capture_ring_and_no_more():
    text = config(seconds=45.0, after=15.0)
    planned = {p.name: p.bytes for p in plan(parse(text, "t.toml"))}["capture ring"]
    assert planned == 60 * 3 * 25600 * 4
    out = subprocess.run([sys.executable, "-c", RSS, text], cwd=ROOT, capture_output=True, text=True, check=True)
    grown = int(out.stdout)
    assert 0.9 * planned < grown < 1.1 * planned + 2 * MIB, (grown, planned)


def test_a_file_source_is_held_to_the_budget_once_its_rate_is_known(tmp_path):
    path = str(tmp_path / "fast.wav")
    with RecordingWriter(path, 1_000_000, [f"c{i}" for i in range(16)], "g") as writer:
        writer.write(np.zeros((100, 16)))
    cfg = parse(config(channels=16, seconds=600.0, after=600.0,
                       source=f'kind = "file"\npath = "{path}"\nrealtime = false'), "t.toml")
    source = open_source(cfg.source)
    source.open()  # as `run` and `replay` do: the rate is read from the file
    try:
        with pytest.raises(ConfigError, match="capture ring 73242 MiB"):
            Monitor(cfg, source, ListSink())
    finally:
        source.close()
