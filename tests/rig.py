"""The shared rig for the measuring-path tests: a two-channel simulator
config (invented values, a choice of this project) and a list-collecting sink."""

from monitor.deliver.base import Sink
from monitor.deliver.payloads import encode

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
