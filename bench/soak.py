"""Soak: a day of stream time through the real monitor, as fast as the CPU goes.

Run from the project root:  python bench/soak.py [--hours 24] [--broker auto]

An invented two-channel machine at 5120 Hz (1x at about 1480 rpm, 2x, 3x
and noise) streams through `Monitor` with the full wiring: bands, rules,
health checks, raw capture on alarm, reloads, and an MQTT sink with its
on-disk event queue and event-id file. Stream time comes from samples, so
24 hours pass in minutes. The first minute runs each disturbance once; then
every 15 minutes of stream time:

  1:00-5:00    the 1x band rises past warning, then past alarm, then falls back
  6:00         a sequence gap (Block.lost), so no spectrum spans it
  7:00         5 s without samples, on a clock that the source moves on
               (the `stale` check reads that clock, never sleeps)
  8:00-11:40   the broker is stopped and started again (mosquitto on a
               loopback port); a second band rise, 8:20-10:20, falls inside
               the outage, so its events wait on disk and go out afterwards
  13:20        a reload, in turn: other limits and [spectrum] averages, a
               file with an error (refused: a `config` fault), the original

After the first minute and every hour the broker is allowed to catch up and
the process is measured: resident memory (VmRSS in /proc/self/status), open
file descriptors (/proc/self/fd), threads (threading.active_count) and, with
--tracemalloc, the bytes Python has allocated. The soak fails (exit 1) when
by the end

  - resident memory (or traced memory) grew by more than 2 MB (2048 kB)
    over its value after the first minute,
  - there are more file descriptors or threads than after the first minute,
  - a scheduled disturbance did not raise its event, or an unscheduled
    event appeared,
  - with a broker: an event sent was not confirmed by it, stayed queued or
    was dropped.

Without mosquitto (`--broker none`, or `auto` when it is not installed) the
monitor delivers to a sink that encodes every payload and drops it, and the
broker outages are skipped. Exit codes: 0 every bound held, 1 one broke,
2 bad arguments.
"""

import argparse
import gc
import logging
import math
import os
import random
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
import tracemalloc
from collections import Counter
from typing import Any, Callable, Dict, List, NamedTuple, Optional, Tuple

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from monitor.config import Config, parse  # noqa: E402
from monitor.deliver.base import Payload, Sink  # noqa: E402
from monitor.deliver.payloads import encode  # noqa: E402
from monitor.service.monitor import Monitor  # noqa: E402
from monitor.acquire.block import Block  # noqa: E402
from monitor.acquire.sources.base import Source  # noqa: E402
from monitor.deliver.event_ids import EventIds  # noqa: E402

RATE = 5120.0
BLOCK = 512  # samples per channel per read: 0.1 s
LOOP = 2 ** 19  # samples in the repeating signal: 102.4 s
ORDER1_LINE = 2526  # 1x = 2526 * RATE / LOOP = 24.668 Hz, 1480.1 rpm; whole periods per loop
HARMONICS_G = (0.02, 0.008, 0.004)  # peak acceleration at 1x, 2x, 3x
NOISE_G = 0.005  # RMS
STANDARD_GRAVITY = 9.80665  # m/s^2 per g (ISO 80000-3)

WARMUP_S = 60.0
CYCLE_S = 900.0
CHECKPOINT_S = 3600.0
GROWTH_LIMIT_KB = 2048  # "2 MB"
SETTLE_S = 30.0  # stream seconds an action needs before its event must be seen
WAIT_S = 15.0  # wall seconds to wait for the broker connection or an empty queue

# 1x band limits (mm/s RMS) and the level of each rise.
WARNING_MM_S, ALARM_MM_S = 2.0, 4.0
RISE_MM_S = {"warning": 3.0, "alarm": 5.0}

CONFIG = """\
# The soak's machine: invented, an electric-motor-driven fan at 1480 rpm.
# [source] only sets rate and channels; the soak feeds its own samples.
[node]
name = "soak"

[source]
kind = "simulator"
sample_rate = 5120.0
channels = ["x", "y"]
unit = "g"
realtime = false

[spectrum]
size = 4096
overlap = 0.5
window = "hann"
averages = {averages}

[speed]
rpm = 1480.0
track = true
search_hz = [20.0, 30.0]

[[band]]
name = "overall"
hz = [10.0, 1000.0]
quantity = "velocity"
warning = 8.0
alarm = 12.0

[[band]]
name = "1x"
channel = "x"
orders = [0.8, 1.2]
quantity = "velocity"
warning = {warning_1x}
alarm = {alarm_1x}
delay = 2.0

[[band]]
name = "2x"
channel = "x"
orders = [1.8, 2.2]
quantity = "velocity"
warning = {warning_2x}
alarm = 3.0

[[band]]
name = "high"
hz = [1000.0, {high_top}]
quantity = "acceleration"
warning = 0.5
alarm = 1.0

[capture]
seconds = 2.0
after = 1.0
keep = 5
dir = "{capture_dir}"
"""

MQTT = """
[mqtt]
host = "127.0.0.1"
port = {port}
prefix = "soak"
queue_dir = "{queue_dir}"
"""

# Reload variants, taken in turn. "broken" puts a band edge above Nyquist.
VARIANTS: Dict[str, Dict[str, Any]] = {
    "original": dict(averages=4, warning_1x=WARNING_MM_S, alarm_1x=ALARM_MM_S, warning_2x=1.5, high_top=2500.0),
    "other": dict(averages=3, warning_1x=WARNING_MM_S, alarm_1x=ALARM_MM_S, warning_2x=1.8, high_top=2400.0),
    "broken": dict(averages=4, warning_1x=WARNING_MM_S, alarm_1x=ALARM_MM_S, warning_2x=1.5, high_top=3000.0),
}
RELOAD_TURN = ("other", "broken", "original")


# ------------------------------------------------------------------ schedule

class Action(NamedTuple):
    at: float  # stream seconds
    kind: str  # rise, gap, stale, broker-down, broker-up, reload
    arg: Any = None


def _one_cycle(start: float, turn: int) -> List[Action]:
    return [
        Action(start + 60, "rise", "warning"), Action(start + 180, "rise", "alarm"), Action(start + 300, "rise", None),
        Action(start + 360, "gap", 2048),
        Action(start + 420, "stale", 5.0),
        Action(start + 480, "broker-down"),
        Action(start + 500, "rise", "warning"), Action(start + 560, "rise", "alarm"), Action(start + 620, "rise", None),
        Action(start + 700, "broker-up"),
        Action(start + 800, "reload", RELOAD_TURN[turn % len(RELOAD_TURN)]),
    ]


def schedule(end_s: float) -> List[Action]:
    """Every action before `end_s`, in time order: the first minute runs
    each kind once, so what is measured after it is growth, not first use."""
    actions = [
        Action(5, "gap", 2048), Action(12, "stale", 3.0),
        Action(15, "rise", "warning"), Action(20, "broker-down"), Action(22, "rise", "alarm"),
        Action(28, "broker-up"), Action(30, "rise", None),
        Action(40, "reload", "other"), Action(45, "reload", "broken"), Action(50, "reload", "original"),
    ]
    turn = 0
    start = WARMUP_S
    while start < end_s:
        actions += _one_cycle(start, turn)
        turn += 1
        start += CYCLE_S
    return [a for a in actions if a.at < end_s]


# -------------------------------------------------------------------- signal

def _peak_g(velocity_mm_s: float) -> float:
    """Peak acceleration (g) of a 1x sine with this RMS velocity (mm/s)."""
    f1 = ORDER1_LINE * RATE / LOOP
    return velocity_mm_s / 1000.0 * math.sqrt(2.0) * 2.0 * math.pi * f1 / STANDARD_GRAVITY


def _loop_signals(channels: int) -> Tuple[np.ndarray, np.ndarray]:
    """The repeating machine signal, and the unit 1x tone a rise adds to it.
    Every tone has a whole number of periods in LOOP samples, so the loop
    joins without a step."""
    n = np.arange(LOOP)
    rng = np.random.default_rng(1)
    base = rng.normal(0.0, NOISE_G, size=(LOOP, channels))
    one = np.empty((LOOP, channels))
    for c in range(channels):
        gain, shift = 1.0 / (1.0 + 0.4 * c), 0.5 * math.pi * c  # a second sensor at right angles
        for order, peak in enumerate(HARMONICS_G, start=1):
            base[:, c] += gain * peak * np.sin(2 * math.pi * order * ORDER1_LINE * n / LOOP + order * shift)
        one[:, c] = gain * np.sin(2 * math.pi * ORDER1_LINE * n / LOOP + shift)
    return base, one


def _loop_slice(x: np.ndarray, start: int, n: int) -> np.ndarray:
    start %= LOOP
    if start + n <= LOOP:
        return x[start:start + n]
    return np.concatenate([x[start:], x[:start + n - LOOP]])


class StreamClock:
    """The monitor's clock in the soak: moved on by the source, by each
    block's duration and by each empty read's timeout, so a stale period
    costs no wall time."""

    def __init__(self) -> None:
        self.now = 0.0

    def __call__(self) -> float:
        return self.now


class SoakSource(Source):
    """Plays the loop signal for `end_s` stream seconds and carries out the
    schedule: rises, gaps and stale periods itself, the rest through
    `on_action(action)`. `on_time(stream_s)` is called before every block."""

    kind = "soak"

    def __init__(self, config: Config, end_s: float, actions: List[Action], clock: StreamClock,
                 on_action: Callable[[Action], None], on_time: Callable[[float], None]) -> None:
        super().__init__(config.source)
        self._base, self._one = _loop_signals(self.channels)
        self._end = int(round(end_s * self.sample_rate))
        self._actions = list(actions)
        self._next = 0
        self._clock = clock
        self._on_action = on_action
        self._on_time = on_time
        self._pos = 0  # stream sample index, lost samples included
        self._extra_g = 0.0  # added 1x peak during a rise
        self._silent_reads = 0
        self._lost = 0

    @property
    def stream_s(self) -> float:
        return self._pos / self.sample_rate

    def _open(self) -> None:
        pass

    def _read(self, timeout: float) -> Optional[Block]:
        if self._silent_reads:
            self._silent_reads -= 1
            self._clock.now += timeout
            return None
        while self._next < len(self._actions) and self._actions[self._next].at <= self.stream_s:
            action = self._actions[self._next]
            self._next += 1
            self._do(action, timeout)
        if self._silent_reads:
            return self._read(timeout)
        self._on_time(self.stream_s)
        if self._pos >= self._end:
            self.ended = True
            return None
        n = min(BLOCK, self._end - self._pos)
        samples = _loop_slice(self._base, self._pos, n) + self._extra_g * _loop_slice(self._one, self._pos, n)
        lost, self._lost = self._lost, 0
        self._pos += n
        self._clock.now += n / self.sample_rate
        return Block(samples=samples, lost=lost)

    def _do(self, action: Action, timeout: float) -> None:
        if action.kind == "rise":
            self._extra_g = 0.0 if action.arg is None else _peak_g(RISE_MM_S[action.arg]) - HARMONICS_G[0]
        elif action.kind == "gap":
            self._lost += action.arg
            self._pos += action.arg
            self._clock.now += action.arg / self.sample_rate
        elif action.kind == "stale":
            self._silent_reads = int(math.ceil(action.arg / timeout))
        self._on_action(action)


# --------------------------------------------------------------------- sinks

class DroppingSink(Sink):
    """Encodes every payload, as a real sink would, and drops it."""

    def open(self, online: Payload, offline: Payload) -> None:
        encode(online)

    def send(self, suffix: str, payload: Payload) -> None:
        encode(payload)

    def close(self, offline: Payload) -> None:
        encode(offline)


class CountingSink(Sink):
    """Passes everything to `inner` and counts events by (name, level)."""

    def __init__(self, inner: Sink) -> None:
        self.inner = inner
        self.events: Counter = Counter()
        self.sent = 0
        self.evidence_sent = 0  # spectra and captures

    queued = property(lambda self: self.inner.queued)  # type: ignore[assignment]
    dropped = property(lambda self: self.inner.dropped)  # type: ignore[assignment]
    held = property(lambda self: self.inner.held)  # type: ignore[assignment]
    evidence_queued = property(lambda self: self.inner.evidence_queued)  # type: ignore[assignment]
    evidence_dropped = property(lambda self: self.inner.evidence_dropped)  # type: ignore[assignment]

    def storage_fault(self) -> bool:
        return self.inner.storage_fault()

    def __getattr__(self, name: str) -> Any:
        return getattr(self.inner, name)  # heartbeat, connected, published

    def open(self, online: Payload, offline: Payload) -> None:
        self.inner.open(online, offline)

    def send(self, suffix: str, payload: Payload) -> None:
        if suffix == "event":
            self.sent += 1
            self.events[(payload["name"], payload["level"])] += 1
        elif suffix in ("spectrum", "capture"):
            self.evidence_sent += 1
        self.inner.send(suffix, payload)

    def close(self, offline: Payload) -> None:
        self.inner.close(offline)


# -------------------------------------------------------------------- broker

def _free_port() -> int:
    """A loopback port below the kernel's ephemeral range, so the broker can
    have it back after an outage (outgoing connections draw from that range)."""
    try:
        with open("/proc/sys/net/ipv4/ip_local_port_range") as f:
            low = int(f.read().split()[0])
    except (OSError, ValueError, IndexError):
        low = 32768
    for _ in range(200):
        port = random.randrange(10000, max(10001, low))
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            try:
                s.bind(("127.0.0.1", port))
            except OSError:
                continue
            return port
    raise RuntimeError("no free loopback port between 10000 and the ephemeral range")


def _wait(condition: Callable[[], bool], timeout: float) -> bool:
    deadline = time.monotonic() + timeout
    while not condition():
        if time.monotonic() >= deadline:
            return False
        time.sleep(0.01)
    return True


class Mosquitto:
    """mosquitto on a loopback port, stopped and started on the same port."""

    def __init__(self, program: str, directory: str) -> None:
        self.program = program
        self.port = _free_port()
        self.conf = os.path.join(directory, "mosquitto.conf")
        self.log_path = os.path.join(directory, "mosquitto.log")
        self.process: Optional[subprocess.Popen] = None
        lines = [f"listener {self.port} 127.0.0.1", "allow_anonymous true", "persistence false",
                 "log_dest stderr", "log_type error", "log_type warning"]
        if os.geteuid() == 0:
            lines.append("user root")  # else mosquitto drops to a user that cannot read the directory
        with open(self.conf, "w") as f:
            f.write("\n".join(lines) + "\n")

    def _listening(self) -> bool:
        if self.process is None or self.process.poll() is not None:
            raise RuntimeError(f"mosquitto exited; see {self.log_path}")
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
            s.settimeout(0.2)
            return s.connect_ex(("127.0.0.1", self.port)) == 0

    def start(self) -> None:
        with open(self.log_path, "ab") as out:
            self.process = subprocess.Popen([self.program, "-c", self.conf], stdout=out, stderr=subprocess.STDOUT)
        if not _wait(self._listening, 10.0):
            self.stop()
            raise RuntimeError(f"mosquitto did not listen on 127.0.0.1:{self.port}; see {self.log_path}")

    def stop(self) -> None:
        process, self.process = self.process, None
        if process is None or process.poll() is not None:
            return
        process.send_signal(signal.SIGTERM)
        try:
            process.wait(timeout=5.0)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=5.0)


def find_mosquitto() -> Optional[str]:
    return shutil.which("mosquitto") or shutil.which("mosquitto", path="/usr/sbin:/sbin")


# --------------------------------------------------------------- measurement

class Snapshot(NamedTuple):
    stream_s: float
    wall_s: float
    rss_kb: int
    fds: int
    threads: int
    traced_kb: Optional[int]
    events: int


def vmrss_kb() -> int:
    """Resident memory in kB: the VmRSS line of /proc/self/status (proc(5))."""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
    raise RuntimeError("/proc/self/status has no VmRSS line")


def open_fds() -> int:
    return len(os.listdir("/proc/self/fd"))


class Soak:
    """Wires the monitor, the source, the sink and the broker, and keeps
    what the checks need."""

    def __init__(self, hours: float, broker: Optional[Mosquitto], workdir: str, out: Any) -> None:
        self.end_s = hours * 3600.0
        self.broker = broker
        self.out = out
        self.dirs = {name: os.path.join(workdir, name) for name in ("queue", "capture")}
        for path in self.dirs.values():
            os.makedirs(path, exist_ok=True)
        self.config = self.config_for("original")
        self.actions = schedule(self.end_s)
        self.done: Counter = Counter()  # actions carried out, by kind (and reload variant)
        self.outages_seen = 0
        self.snapshots: List[Snapshot] = []
        self._next_checkpoint = WARMUP_S
        self._started = time.monotonic()
        self.clock = StreamClock()
        self.source = SoakSource(self.config, self.end_s, self.actions, self.clock, self._on_action, self._on_time)
        if broker is not None:
            from monitor.deliver.mqtt import MqttSink

            assert self.config.mqtt is not None
            # Short reconnect delays: outages last seconds of wall time here.
            inner: Sink = MqttSink(self.config.mqtt, self.config.node, reconnect_min=0.2, reconnect_max=1.0)
            ids = EventIds(self.config.mqtt.queue_dir)
        else:
            inner, ids = DroppingSink(), EventIds()
        self.sink = CountingSink(inner)
        self.monitor = Monitor(self.config, self.source, self.sink, ids=ids, clock=self.clock)

    def config_for(self, variant: str) -> Config:
        text = CONFIG.format(capture_dir=self.dirs["capture"], **VARIANTS[variant])
        if self.broker is not None:
            text += MQTT.format(port=self.broker.port, queue_dir=self.dirs["queue"])
        return parse(text, f"soak-{variant}.toml")

    def run(self) -> float:
        self.source.open()
        try:
            self.monitor.run()
        finally:
            self.source.close()
        return time.monotonic() - self._started

    # -- called from the source, in the measuring thread

    def _on_action(self, action: Action) -> None:
        self.done[action.kind] += 1
        if action.arg is not None:
            self.done[f"{action.kind}-{action.arg}"] += 1
        if action.kind == "reload":
            self.request_reload(action.arg)
        elif action.kind == "broker-down" and self.broker is not None:
            self._wait_delivered()
            self.broker.stop()
            if _wait(lambda: not self.sink.connected, WAIT_S):
                self.outages_seen += 1
        elif action.kind == "broker-up" and self.broker is not None:
            self.broker.start()

    def request_reload(self, variant: str) -> None:
        """The reload hook: what SIGHUP does in `bandwatch run`, with a
        config read from text instead of the file."""
        self.monitor.request_reload(lambda: self.config_for(variant))

    def _on_time(self, stream_s: float) -> None:
        if stream_s >= self.end_s and self.broker is not None and self.broker.process is None:
            self.broker.start()  # the stream ended inside an outage: end it, so the backlog can go out
        if stream_s >= self._next_checkpoint or stream_s >= self.end_s:
            self._checkpoint(stream_s)
            self._next_checkpoint = (math.floor(stream_s / CHECKPOINT_S) + 1) * CHECKPOINT_S

    def _wait_delivered(self) -> bool:
        """With a broker: wait until it is connected and has confirmed every
        event, spectrum and capture."""
        if self.broker is None:
            return True
        return _wait(lambda: self.sink.connected and self.sink.queued == 0 and self.sink.evidence_queued == 0,
                     WAIT_S)

    def _checkpoint(self, stream_s: float) -> None:
        self._wait_delivered()
        gc.collect()
        traced = tracemalloc.get_traced_memory()[0] // 1024 if tracemalloc.is_tracing() else None
        snap = Snapshot(stream_s, time.monotonic() - self._started, vmrss_kb(), open_fds(),
                        threading.active_count(), traced, self.sink.sent)
        self.snapshots.append(snap)
        traced_text = "" if traced is None else f"  traced {traced} kB"
        self.out.write(f"  {stream_s / 3600:6.2f} h of stream after {snap.wall_s:7.1f} s: rss {snap.rss_kb} kB  "
                       f"fds {snap.fds}  threads {snap.threads}{traced_text}  events {snap.events}\n")
        self.out.flush()


# -------------------------------------------------------------------- checks

def _due(soak: Soak, kind: str, arg: Any = None) -> int:
    """Scheduled actions of `kind` with time left to show their effect."""
    return sum(1 for a in soak.actions
               if a.kind == kind and (arg is None or a.arg == arg) and a.at + SETTLE_S <= soak.end_s)


def check_bounds(soak: Soak) -> List[Tuple[str, str, bool]]:
    """(name, detail, held) for every bound."""
    first, last = soak.snapshots[0], soak.snapshots[-1]
    bounds = []
    grew = last.rss_kb - first.rss_kb
    bounds.append(("rss", f"{first.rss_kb} kB after the first minute, {last.rss_kb} kB at the end, "
                          f"{grew:+d} kB (limit +{GROWTH_LIMIT_KB} kB)", grew <= GROWTH_LIMIT_KB))
    if first.traced_kb is not None and last.traced_kb is not None:
        grew = last.traced_kb - first.traced_kb
        bounds.append(("traced", f"{first.traced_kb} kB after the first minute, {last.traced_kb} kB at the end, "
                                 f"{grew:+d} kB (limit +{GROWTH_LIMIT_KB} kB)", grew <= GROWTH_LIMIT_KB))
    bounds.append(("fds", f"{first.fds} after the first minute, {last.fds} at the end (limit: no growth)",
                   last.fds <= first.fds))
    bounds.append(("threads", f"{first.threads} after the first minute, {last.threads} at the end "
                              "(limit: no growth)", last.threads <= first.threads))

    events = soak.sink.events
    expected = {
        ("1x", "alarm"): _due(soak, "rise", "alarm"),
        ("gap", "fault"): _due(soak, "gap"),
        ("stale", "fault"): _due(soak, "stale"),
        ("config", "fault"): _due(soak, "reload", "broken"),
    }
    parts, held = [], True
    for key, want in expected.items():
        seen = events.get(key, 0)
        parts.append(f"{key[0]} {key[1]} {seen}/{want}")
        held &= seen == want
    unexpected = sorted(f"{name} {level}" for (name, level) in events if name not in {k[0] for k in expected})
    if unexpected:
        parts.append("unscheduled: " + ", ".join(unexpected))
        held = False
    if soak.broker is not None:
        down = soak.done["broker-down"]
        parts.append(f"outages seen {soak.outages_seen}/{down}")
        held &= soak.outages_seen == down
    bounds.append(("schedule", "events seen/scheduled: " + "; ".join(parts), held))

    if soak.broker is not None:
        inner = soak.sink.inner
        confirmed = getattr(inner, "published", 0)
        bounds.append(("delivery", f"{soak.sink.sent} events sent, {confirmed} confirmed by the broker, "
                                   f"{inner.queued} queued, {inner.dropped} dropped",
                       confirmed == soak.sink.sent and inner.queued == 0 and inner.dropped == 0))
        evidence = getattr(inner, "evidence_published", 0)
        bounds.append(("evidence", f"{soak.sink.evidence_sent} spectra and captures sent, {evidence} confirmed, "
                                   f"{inner.evidence_queued} queued, {inner.evidence_dropped} dropped",
                       evidence == soak.sink.evidence_sent and inner.evidence_queued == 0
                       and inner.evidence_dropped == 0))
    return bounds


# ---------------------------------------------------------------------- main

def _positive_hours(text: str) -> float:
    try:
        hours = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"--hours {text!r} is not a number") from None
    if not math.isfinite(hours) or hours * 3600.0 < 2 * WARMUP_S:
        raise argparse.ArgumentTypeError(
            f"--hours {text} is too short: the bounds compare the end with the first minute, "
            f"so at least {2 * WARMUP_S / 3600:.3g} h (2 minutes) are needed")
    return hours


class _ExpectedRefusals(logging.Filter):
    """Drops the log lines of the broken file's refusals: the soak asks for
    them, and counts them in the schedule bound."""

    def filter(self, record: logging.LogRecord) -> bool:
        return "soak-broken.toml" not in record.getMessage()


def main(argv: Optional[List[str]] = None) -> int:
    parser = argparse.ArgumentParser(description="Replay hours of stream time through the monitor and check "
                                                 "that memory, file descriptors and threads stay flat.")
    parser.add_argument("--hours", type=_positive_hours, default=24.0, help="stream hours (default 24)")
    parser.add_argument("--broker", choices=("auto", "mosquitto", "none"), default="auto",
                        help="auto: mosquitto when installed (default); mosquitto: required; none: no broker")
    parser.add_argument("--tracemalloc", action="store_true",
                        help="also trace Python allocations, bounded like resident memory (about 4 times slower)")
    parser.add_argument("--log-level", choices=("debug", "info", "warning", "error"), default="error",
                        help="bandwatch log lines on stderr (default error: the soak raises many warnings)")
    args = parser.parse_args(argv)
    logging.basicConfig(stream=sys.stderr, level=args.log_level.upper(),
                        format="%(levelname)s %(name)s: %(message)s")
    for handler in logging.getLogger().handlers:
        handler.addFilter(_ExpectedRefusals())
    out = sys.stdout

    program = find_mosquitto() if args.broker != "none" else None
    if args.broker == "mosquitto" and program is None:
        parser.error("--broker mosquitto: mosquitto is not installed (Debian: apt-get install mosquitto)")

    with tempfile.TemporaryDirectory(prefix="bandwatch-soak-") as workdir:
        broker = Mosquitto(program, workdir) if program else None
        if args.tracemalloc:
            tracemalloc.start()
        try:
            if broker is not None:
                broker.start()
            soak = Soak(args.hours, broker, workdir, out)
            where = (f"mosquitto on 127.0.0.1:{broker.port}, stopped and started on schedule" if broker
                     else "none (mosquitto not installed or --broker none): payloads encoded and dropped, "
                          "no outages")
            out.write(f"soak: {args.hours:g} h of stream time, {len(soak.config.source.channels)} channels "
                      f"at {RATE:g} Hz, {len(soak.config.bands)} bands, {len(soak.actions)} scheduled actions\n"
                      f"broker: {where}\n")
            out.flush()
            wall = soak.run()
        finally:
            if broker is not None:
                broker.stop()
            tracemalloc.stop()

    done = soak.done
    out.write(f"soak: {args.hours:g} h of stream in {wall:.1f} s of wall time, "
              f"{soak.end_s / wall:.0f} x real time\n")
    outages = f"{done['broker-down']} broker outages" if soak.broker is not None else "no broker outages (no broker)"
    out.write(f"done: {done['rise-alarm']} band rises, {done['gap']} gaps, {done['stale']} stale periods, "
              f"{outages}, {done['reload']} reloads ({done['reload-broken']} of a broken file)\n")
    broken = False
    for name, detail, held in check_bounds(soak):
        out.write(f"bound {name}: {detail}: {'ok' if held else 'BROKEN'}\n")
        broken |= not held
    out.write("soak: BROKEN\n" if broken else "soak: ok\n")
    return 1 if broken else 0


if __name__ == "__main__":
    sys.exit(main())
