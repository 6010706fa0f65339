"""The shared rig for the measuring-path tests: a two-channel simulator
config (invented values, a choice of this project), a capture scenario, a
list-collecting sink and a run of the monitor over samples in memory."""

import numpy as np

from monitor.acquire.sources.memory import ArraySource
from monitor.deliver.base import Sink
from monitor.deliver.payloads import encode
from monitor.service.monitor import Monitor

FS = 2048.0
BASE = """
[node]
name = "rig-1"
[source]
kind = "simulator"
sample_rate = 2048.0
channels = ["x", "y"]
unit = "m/s2"
realtime = false
[spectrum]
size = 1024
overlap = 0.75
window = "hann"
averages = 3
[speed]
rpm = 1800.0
"""


class ListSink(Sink):
    """Keeps every payload; a fake passed in, nothing patched."""

    def __init__(self):
        self.messages = []

    def open(self, online, offline):
        self.messages.append(("status", online))

    def send(self, suffix, payload):
        encode(payload)  # every payload must be valid JSON
        self.messages.append((suffix, payload))

    def close(self, offline):
        self.messages.append(("status", offline))

    def of(self, suffix):
        return [p for s, p in self.messages if s == suffix]


def run(config, samples, **kw):
    """The monitor over `samples` (n, channels) to their end, into a ListSink."""
    sink = ListSink()
    monitor = Monitor(config, ArraySource(config.source, samples, **kw), sink)
    monitor.source.open()
    monitor.run()
    return monitor, sink


# A band on the 50 Hz tone of `scenario`, rising at once.
TONE_BAND = """
[[band]]
name = "tone"
channel = "x"
hz = [40.0, 60.0]
quantity = "acceleration"
warning = 1.0
alarm = 3.0
delay = 0.0
"""
# That band, and a raw capture around its rises.
CAPTURE = BASE + TONE_BAND + """[capture]
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
