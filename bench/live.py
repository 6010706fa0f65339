"""Live cost: CPU share and peak memory of `bandwatch run` at real time.

Run from the project root:  python bench/live.py [-c bench/live.toml] [--seconds 60] [--warmup 10]

What runs, all on this machine:

  monitor     `python -m monitor run -c CONFIG` in its own process, on a copy
              of CONFIG whose [source] port and [mqtt] port and queue_dir are
              free ones of this run (the source must be a tcp-server taking
              frames), as an installed service runs: from compiled bytecode,
              with the `Environment=` settings of deploy/bandwatch.service;
  sender      this script: dials the monitor on 127.0.0.1 and sends int16
              frames of the wire format, 512 samples per channel each, paced
              at the sample rate by the clock (an invented machine: 1x, 2x,
              3x of a motor near 1480 rpm, a tone at 3.1 kHz and noise,
              repeating every 10 s without a step);
  broker      mosquitto on a loopback port when it is installed (`--broker
              none`, or `auto` without it: no [mqtt], JSON lines to a file),
              and a subscriber here that counts what arrives.

The monitor finds a notification socket in $NOTIFY_SOCKET, as under systemd,
so it says READY after its first result and sends a STATUS line (with its
count of results) with every summary. The steady window opens at the first
summary `--warmup` seconds after READY and closes at the summary that ends
`--seconds` of stream later (rounded up to whole summary intervals), so it
covers whole intervals of stream time and the results counted in it are
exact. Start-up (imports, the first connection, filling the first average)
is outside it.

Reported:
  CPU share   the monitor's utime + stime (every thread; /proc/PID/stat) over
              the window, as a share of one core's wall time;
  peak RSS    VmHWM of /proc/PID/status at the end of the window (start-up
              included: it is the most the process ever held);
  results     counted by the monitor in the window, against one per hop;
  dropped     any break in the samples the monitor saw: its `gap` health
              check (sequence jumps, blocks dropped from its queue because it
              fell behind, reconnects) from its log, and its `stale` check;
  sender      frames sent and how late the pacing ever ran (a blocked send
              means the monitor stopped reading).
"""

import argparse
import compileall
import math
import os
import re
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections import Counter
from typing import Any, Dict, List, Optional, Tuple

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(HERE)
sys.path.insert(0, ROOT)

import paho.mqtt.client as mqtt  # noqa: E402

from monitor.config import Config, load  # noqa: E402
from monitor.acquire.decoders.frame import encode_frame  # noqa: E402
from soak import Mosquitto, _free_port, find_mosquitto  # noqa: E402

FRAME_SAMPLES = 512
LOOP_S = 10  # the signal repeats after this many seconds
START_TIMEOUT_S = 60.0  # for the monitor to listen and to give its first result


# ------------------------------------------------------------------ config

UNIT = os.path.join(ROOT, "deploy", "bandwatch.service")


def unit_environment(path: str) -> Dict[str, str]:
    """The `Environment=NAME=value` settings of a systemd unit file (one
    assignment per line, unquoted, as the shipped unit writes them)."""
    env: Dict[str, str] = {}
    with open(path) as f:
        for line in f:
            line = line.strip()
            if line.startswith("Environment="):
                name, _, value = line[len("Environment="):].partition("=")
                env[name] = value
    return env


def _rewrite(text: str, source_port: int, mqtt_port: Optional[int], queue_dir: str) -> str:
    """The config text with this run's ports and queue directory; without a
    broker (`mqtt_port` None) the [mqtt] table is left out."""
    out: List[str] = []
    section = ""
    for line in text.splitlines():
        header = re.match(r"\s*\[+\s*([\w.-]+)\s*\]+", line)
        if header:
            section = header.group(1)
        key = re.match(r"\s*(\w+)\s*=", line)
        if section == "mqtt":
            if mqtt_port is None:
                continue
            if key and key.group(1) == "port":
                line = f"port = {mqtt_port}"
            elif key and key.group(1) == "queue_dir":
                continue  # written once below
            if header:
                line += f'\nqueue_dir = "{queue_dir}"'
        elif section == "source" and key and key.group(1) == "port":
            line = f"port = {source_port}"
        out.append(line)
    return "\n".join(out) + "\n"


def prepare_config(path: str, workdir: str, broker_port: Optional[int]) -> Tuple[str, Config, Optional[int]]:
    """Write this run's copy of `path`, its [mqtt] pointed at `broker_port`
    (left out when that is None); return its path, the loaded copy and the
    broker port, None when the config has no [mqtt]."""
    config = load(path)
    src = config.source
    if src.kind != "tcp-server" or src.format != "frame":
        raise SystemExit(f"{path}: [source] kind = {src.kind!r}, format = {src.format!r}; "
                         "live.py sends frames to a tcp-server source")
    mqtt_port = broker_port if config.mqtt is not None else None
    queue_dir = os.path.join(workdir, "queue")
    os.makedirs(queue_dir)
    with open(path) as f:
        text = _rewrite(f.read(), _free_port(), mqtt_port, queue_dir)
    copy = os.path.join(workdir, "live.toml")
    with open(copy, "w") as f:
        f.write(text)
    config = load(copy)
    if mqtt_port is not None and (config.mqtt is None or config.mqtt.port != mqtt_port):
        raise SystemExit(f"{path}: could not point [mqtt] at port {mqtt_port}")
    return copy, config, mqtt_port


# ------------------------------------------------------------------ sender

def loop_counts(config: Config) -> np.ndarray:
    """LOOP_S seconds of the invented machine as int16 counts, (n, channels).
    Every tone has a whole number of periods in the loop, so it repeats
    without a step."""
    src = config.source
    n = int(round(src.sample_rate * LOOP_S))
    t = np.arange(n) / src.sample_rate
    rng = np.random.default_rng(5)
    one_x = round((config.speed.rpm or 1480.0) / 60.0 * LOOP_S) / LOOP_S
    tones_g = [(one_x, 0.03), (2 * one_x, 0.012), (3 * one_x, 0.006), (3100.0, 0.15)]  # peak g
    g = np.empty((n, len(src.channels)))
    for c in range(len(src.channels)):
        gain, shift = 1.0 / (1.0 + 0.4 * c), 0.5 * math.pi * c  # other axes see less, later
        g[:, c] = rng.normal(0.0, 0.01, n)
        for order, (hz, peak) in enumerate(tones_g, start=1):
            g[:, c] += gain * peak * np.sin(2 * math.pi * hz * t + order * shift)
    return np.round(g / np.asarray(src.scale)).astype(np.int16)


class Sender(threading.Thread):
    """Sends frames over one TCP connection, paced at the sample rate."""

    def __init__(self, port: int, counts: np.ndarray, rate: float) -> None:
        super().__init__(name="sender", daemon=True)
        self.port = port
        self.counts = counts
        self.period = FRAME_SAMPLES / rate
        self.stop = threading.Event()
        self.frames = 0
        self.max_late_s = 0.0
        self.error: Optional[BaseException] = None
        self.sock: Optional[socket.socket] = None

    def connect(self, deadline: float) -> None:
        while True:
            try:
                self.sock = socket.create_connection(("127.0.0.1", self.port), timeout=1.0)
                return
            except OSError:
                if time.monotonic() > deadline:
                    raise
                time.sleep(0.05)

    def run(self) -> None:
        assert self.sock is not None
        per_loop = len(self.counts) // FRAME_SAMPLES
        start = time.monotonic()
        try:
            while not self.stop.is_set():
                late = time.monotonic() - (start + self.frames * self.period)
                if late < 0:
                    self.stop.wait(-late)
                    continue
                self.max_late_s = max(self.max_late_s, late)
                at = (self.frames % per_loop) * FRAME_SAMPLES
                self.sock.settimeout(None)
                self.sock.sendall(encode_frame(self.counts[at:at + FRAME_SAMPLES], self.frames % 2**32))
                self.frames += 1
        except OSError as exc:
            if not self.stop.is_set():
                self.error = exc
        finally:
            self.sock.close()


# -------------------------------------------------------------- monitoring

CLOCK_TICKS = os.sysconf("SC_CLK_TCK")


def cpu_seconds(pid: int) -> float:
    """utime + stime of every thread of `pid`, in seconds (proc(5), fields 14 and 15)."""
    with open(f"/proc/{pid}/stat") as f:
        fields = f.read().rsplit(")", 1)[1].split()  # the name may hold spaces and brackets
    return (int(fields[11]) + int(fields[12])) / CLOCK_TICKS


def status_kb(pid: int, key: str) -> int:
    with open(f"/proc/{pid}/status") as f:
        for line in f:
            if line.startswith(key + ":"):
                return int(line.split()[1])
    raise RuntimeError(f"/proc/{pid}/status has no {key} line")


class Notifications:
    """The datagram socket the monitor sends READY and STATUS to (sd_notify)."""

    def __init__(self, path: str) -> None:
        self.path = path
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self.sock.bind(path)

    def next(self, want: str, deadline: float, process: subprocess.Popen) -> Dict[str, str]:
        """Fields of the next datagram holding key `want`; fail if the monitor exits or time is up."""
        while True:
            left = deadline - time.monotonic()
            if process.poll() is not None:
                raise SystemExit(f"the monitor exited with code {process.returncode} (see its log above)")
            if left <= 0:
                raise SystemExit(f"no {want} from the monitor in time")
            self.sock.settimeout(min(left, 0.5))
            try:
                data = self.sock.recv(4096).decode("utf-8", "replace")
            except socket.timeout:
                continue
            fields = dict(line.split("=", 1) for line in data.splitlines() if "=" in line)
            if want in fields:
                return fields

    def close(self) -> None:
        self.sock.close()


def results_in(status: Dict[str, str]) -> int:
    match = re.search(r"(\d+) results", status.get("STATUS", ""))
    if not match:
        raise SystemExit(f"cannot read a result count from the monitor's status {status!r}")
    return int(match.group(1))


class Subscriber:
    """Counts the messages on the broker under the node's topics."""

    def __init__(self, port: int, pattern: str) -> None:
        if hasattr(mqtt, "CallbackAPIVersion"):
            self.client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2)
        else:
            self.client = mqtt.Client()
        self.topics: Counter = Counter()
        self.subscribed = threading.Event()
        self.client.on_connect = lambda client, *a: client.subscribe(pattern, qos=1)
        self.client.on_subscribe = lambda *a: self.subscribed.set()
        self.client.on_message = self._on_message
        self.client.connect("127.0.0.1", port)
        self.client.loop_start()
        if not self.subscribed.wait(10.0):
            raise SystemExit("the subscriber got no SUBACK from mosquitto")

    def _on_message(self, client: Any, userdata: Any, message: Any) -> None:
        self.topics[message.topic.rsplit("/", 1)[-1]] += 1

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def health_faults(log_text: str) -> Counter:
    """Health checks that went to fault, from the monitor's log lines."""
    return Counter(re.findall(r"health (\w+)\S* normal -> fault", log_text))


# -------------------------------------------------------------------- run

def measure(args: argparse.Namespace, workdir: str) -> int:
    program = None if args.broker == "none" else find_mosquitto()
    if args.broker == "mosquitto" and program is None:
        raise SystemExit("--broker mosquitto: mosquitto is not installed")
    broker = Mosquitto(program, workdir) if program is not None else None
    path, config, mqtt_port = prepare_config(args.config, workdir, broker.port if broker else None)
    if mqtt_port is None:
        broker = None
    src, spec = config.source, config.spectrum
    subscriber: Optional[Subscriber] = None
    if broker is not None:
        broker.start()
        subscriber = Subscriber(mqtt_port, f"{config.mqtt.prefix}/{config.node}/#")
    notify = Notifications(os.path.join(workdir, "notify"))
    log_path = os.path.join(workdir, "monitor.log")
    # The environment the shipped systemd unit gives the service.
    env = dict(os.environ, **unit_environment(UNIT), NOTIFY_SOCKET=notify.path, PYTHONPATH=ROOT)
    # As installed: pip (and a distribution's package) compiles the bytecode
    # at install time, so a service never compiles its sources at start,
    # which would add to the measured process's start-up CPU and memory.
    compileall.compile_dir(os.path.join(ROOT, "monitor"), quiet=1)
    env.pop("WATCHDOG_USEC", None)
    sender = Sender(src.port, loop_counts(config), src.sample_rate)
    with open(log_path, "w") as log, open(os.path.join(workdir, "stdout.jsonl"), "w") as out:
        started = time.monotonic()
        process = subprocess.Popen([sys.executable, "-m", "monitor", "run", "-c", path],
                                   cwd=ROOT, env=env, stdout=out, stderr=log)
    try:
        deadline = time.monotonic() + START_TIMEOUT_S
        sender.connect(deadline)
        sender.start()
        notify.next("READY", deadline, process)
        ready_s = time.monotonic() - started
        startup_cpu = cpu_seconds(process.pid)
        steady_from = time.monotonic() + args.warmup
        while True:
            first = notify.next("STATUS", steady_from + 2 * config.summary_interval + 10, process)
            if time.monotonic() >= steady_from:
                break
        wall0, cpu0, results0 = time.monotonic(), cpu_seconds(process.pid), results_in(first)
        frames0 = sender.frames
        broker_cpu0 = cpu_seconds(broker.process.pid) if broker and broker.process else 0.0
        intervals = max(1, math.ceil(args.seconds / config.summary_interval - 1e-9))
        for _ in range(intervals):
            last = notify.next("STATUS", time.monotonic() + 2 * config.summary_interval + 10, process)
        wall1, cpu1, results1 = time.monotonic(), cpu_seconds(process.pid), results_in(last)
        broker_cpu1 = cpu_seconds(broker.process.pid) if broker and broker.process else 0.0
        frames1 = sender.frames
        hwm_kb, rss_kb = status_kb(process.pid, "VmHWM"), status_kb(process.pid, "VmRSS")
    finally:
        sender.stop.set()
        sender.join(5.0)
        if process.poll() is None:
            process.send_signal(signal.SIGTERM)
            try:
                process.wait(15.0)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait()
        notify.close()
        if subscriber is not None:
            time.sleep(0.5)  # the offline status on its way
            subscriber.close()
        if broker is not None:
            broker.stop()
    with open(log_path) as f:
        log_text = f.read()
    faults = health_faults(log_text)

    stream_s = intervals * config.summary_interval
    wall = wall1 - wall0
    share = (cpu1 - cpu0) / wall
    expected = stream_s * src.sample_rate / spec.hop
    dropped = faults.get("gap", 0) > 0 or faults.get("stale", 0) > 0 or sender.error is not None
    w = sys.stdout.write
    w(f"live: {args.config}, {len(src.channels)} channels at {src.sample_rate:g} Hz as int16 frames of "
      f"{FRAME_SAMPLES} over TCP; {spec.window} {spec.size}, overlap {spec.overlap:g}, {spec.averages} averages, "
      f"{len(config.bands)} bands, tracking {'on' if config.speed.track else 'off'}, "
      + (f"MQTT to mosquitto on 127.0.0.1:{mqtt_port}\n" if mqtt_port else "no broker (JSON lines to a file)\n"))
    w(f"  start-up: first result {ready_s:.1f} s after start, {startup_cpu:.2f} s of CPU by then\n")
    w(f"  steady window: {stream_s:g} s of stream in {wall:.1f} s wall, from {args.warmup:g} s after the first result\n")
    w(f"  CPU share of one core:  {100 * share:.2f} %  ({cpu1 - cpu0:.2f} s user+system)\n")
    w(f"  peak RSS (VmHWM):       {hwm_kb / 1024:.1f} MB  (resident at the end {rss_kb / 1024:.1f} MB)\n")
    w(f"  results counted:        {results1 - results0} in the window (one per hop: {expected:g}), "
      f"{results1} in all\n")
    w(f"  frames sent:            {frames1 - frames0} in the window, {sender.frames} in all; "
      f"pacing at most {1000 * sender.max_late_s:.1f} ms late\n")
    if broker is not None:
        w(f"  broker CPU share:       {100 * (broker_cpu1 - broker_cpu0) / wall:.2f} %\n")
    if subscriber is not None:
        w("  received on the broker: " + ", ".join(f"{n} {t}" for t, n in sorted(subscriber.topics.items())) + "\n")
    w(f"  samples dropped:        {'YES' if dropped else 'none'} (gap faults {faults.get('gap', 0)}, "
      f"stale faults {faults.get('stale', 0)}"
      + (f", sender: {sender.error}" if sender.error else "") + ")\n")
    if process.returncode != 0:
        w(f"  the monitor exited with code {process.returncode}; its log:\n{log_text}")
        return 1
    return 1 if dropped else 0


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("-c", "--config", default=os.path.join("bench", "live.toml"),
                        help="config with a tcp-server frame source (default bench/live.toml)")
    parser.add_argument("--seconds", type=float, default=60.0,
                        help="steady-state stream seconds measured (default 60, whole summary intervals)")
    parser.add_argument("--warmup", type=float, default=10.0,
                        help="seconds after the first result before the window opens (default 10)")
    parser.add_argument("--broker", choices=("auto", "mosquitto", "none"), default="auto",
                        help="auto: mosquitto when installed (default); mosquitto: required; none: no [mqtt]")
    args = parser.parse_args()
    if args.seconds <= 0 or args.warmup < 0:
        parser.error(f"--seconds {args.seconds:g} must be above 0 and --warmup {args.warmup:g} at least 0")
    with tempfile.TemporaryDirectory(prefix="bandwatch-live-") as workdir:
        return measure(args, workdir)


if __name__ == "__main__":
    sys.exit(main())
