"""Delivery during a broker outage: publishing never blocks the measuring path.

Run from the project root:  python bench/delivery.py [--minutes 10] [--queue-limit 500]

The claim measured: with the broker unreachable for the whole run (3 channels
at 25.6 kS/s, an invented machine), the pipeline keeps its real-time factor
and the on-disk event queue stays within `queue_limit`.

One run does, on the same wire-format bytes (int16 frames, decoded inside the
timed run, as `bandwatch bench` does):

  baseline   the pipeline delivering to a sink that encodes each payload and
             drops it (no disk, no network);
  broker up  (when mosquitto is installed) the real MQTT sink with a broker
             on loopback: what every event costs in normal operation;
  outage     the real MQTT sink pointed at a closed loopback port while it
             keeps trying to connect;
  drain      (when mosquitto is installed) a broker started on that port and
             a new sink on the same queue directory: the kept events go out,
             in order, and the queue empties.

With the real sink each event is made durable on the measuring thread before
`send` returns, broker or not: a row in the on-disk queue (one fsync) and the
persistent event id (a file written, fsynced and renamed, then its directory
fsynced), as `bandwatch run` does. The report shows the time spent in each.

The config is built here: besides an ordinary overall-velocity band, one band
per channel over pure noise (5-6 kHz) with its warning limit at the median of
its own values, no delay and almost no hysteresis, so levels flip thousands
of times and the queue bound is exercised. Real machines raise far fewer
events; this is a stress test of delivery, not an example config.

The queue directory defaults to a fresh temporary directory; pass
--queue-dir to measure on the storage the monitor will use (an SD card
fsyncs much more slowly than a server disk). Generating the samples briefly
needs about 1.1 GB of memory for a 10-minute run (measured); the runs then
hold only the frames (about 92 MB).
"""

import argparse
import dataclasses
import json
import logging
import os
import random
import shutil
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections import Counter
from typing import Any, Dict, List, Optional, Tuple

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

import paho.mqtt.client as mqtt  # noqa: E402

from monitor.commands.bench import (  # noqa: E402
    bench_config, bench_monitor, run_monitor, run_pipeline, synthetic_samples, wire_chunks,
)
from monitor.config import Config, parse  # noqa: E402
from monitor.deliver.base import Payload, Sink  # noqa: E402
from monitor.deliver.mqtt import MqttSink  # noqa: E402
from monitor.deliver.event_ids import EventIds  # noqa: E402

RATE = 25600.0
CHANNELS = ("x", "y", "z")
NOISE_HZ = (5000.0, 6000.0)
CALIBRATION_S = 30.0

CONFIG = """\
[node]
name = "bench-node"

[source]
kind = "udp"
port = 5600
format = "frame"
sample_rate = {rate}
channels = {channels}
unit = "g"

[spectrum]
size = 4096
overlap = 0.5
window = "hann"
averages = 4

[speed]
rpm = 1480.0

[[band]]
name = "overall"
hz = [10.0, 1000.0]
quantity = "velocity"
warning = 2.8
alarm = 4.5
{noise_bands}
[mqtt]
host = "127.0.0.1"
port = {port}
prefix = "bench"
queue_dir = "{queue_dir}"
queue_limit = {queue_limit}
"""

NOISE_BAND = """
[[band]]
name = "noise-{ch}"
channel = "{ch}"
hz = [{lo}, {hi}]
quantity = "acceleration"
warning = {warning}
hysteresis = 0.001
delay = 0.0
"""


# ---------------------------------------------------------------- helpers


def closed_port() -> int:
    """A loopback port nobody listens on, below the ephemeral range so the
    broker started later can have it."""
    rng = random.Random()
    for _ in range(200):
        port = rng.randrange(10000, 32000)
        with socket.socket() as s:
            try:
                s.bind(("127.0.0.1", port))
            except OSError:
                continue
            return port
    raise RuntimeError("no free loopback port found")


def make_config(port: int, queue_dir: str, queue_limit: int, warnings: Dict[str, float]) -> Config:
    bands = "".join(NOISE_BAND.format(ch=ch, lo=NOISE_HZ[0], hi=NOISE_HZ[1], warning=repr(warnings.get(ch, 1.0)))
                    for ch in CHANNELS)
    text = CONFIG.format(rate=RATE, channels=json.dumps(list(CHANNELS)), noise_bands=bands, port=port,
                         queue_dir=queue_dir, queue_limit=queue_limit)
    return parse(text, "<bench/delivery.py>")


class _Collecting(Sink):
    """Keeps summaries; used to find the noise bands' medians."""

    def __init__(self) -> None:
        self.summaries: List[Payload] = []

    def open(self, online: Payload, offline: Payload) -> None:
        pass

    def send(self, suffix: str, payload: Payload) -> None:
        if suffix == "summary":
            self.summaries.append(payload)

    def close(self, offline: Payload) -> None:
        pass


def calibrate(config: Config, chunks: List[bytes]) -> Dict[str, float]:
    """The median of each noise band's value over the first chunks, with a
    summary after every result."""
    sink = _Collecting()
    run_monitor(bench_monitor(dataclasses.replace(config, summary_interval=1e-6), chunks, sink))
    values: Dict[str, List[float]] = {ch: [] for ch in CHANNELS}
    for summary in sink.summaries:
        for band in summary["bands"]:
            if band["name"].startswith("noise-") and band["value"] is not None:
                values[band["channel"]].append(band["value"])
    return {ch: float(np.median(v)) for ch, v in values.items()}


class TimedMqttSink(MqttSink):
    """The real MQTT sink, with the time each `send` takes written down."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.send_seconds = 0.0
        self.longest_send = 0.0
        self.longest_event_send = 0.0
        self.largest_queue = 0
        self.kinds: Counter = Counter()
        self.close_seconds = 0.0

    def send(self, suffix: str, payload: Payload) -> None:
        start = time.perf_counter()
        super().send(suffix, payload)
        took = time.perf_counter() - start
        self.send_seconds += took
        self.longest_send = max(self.longest_send, took)
        if suffix == "event":
            self.longest_event_send = max(self.longest_event_send, took)
            self.kinds[f"{payload['kind']} {payload['name'].split('-')[0]} -> {payload['level']}"] += 1
            self.largest_queue = max(self.largest_queue, self.queued)

    def close(self, offline: Payload) -> None:
        # Closing waits (boundedly) for paho's thread; that is shutdown, not
        # the measuring path, so it is timed apart.
        start = time.perf_counter()
        super().close(offline)
        self.close_seconds = time.perf_counter() - start


class TimedEventIds(EventIds):
    """The persistent event id counter, with the time each `take` takes."""

    def __init__(self, directory: str) -> None:
        super().__init__(directory)
        self.seconds = 0.0

    def take(self) -> int:
        start = time.perf_counter()
        value = super().take()
        self.seconds += time.perf_counter() - start
        return value


def reset_peak_memory() -> None:
    """Reset the kernel's resident high-water mark (Linux 4.0+), if allowed."""
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
    except OSError:
        pass


def peak_memory_mb() -> float:
    """Peak resident memory since the last reset (VmHWM), in MB."""
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    import resource  # not on every platform

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def queue_bytes(queue_dir: str) -> int:
    total = 0
    for name in ("events.sqlite", "events.sqlite-wal", "events.sqlite-shm"):
        path = os.path.join(queue_dir, name)
        if os.path.exists(path):
            total += os.path.getsize(path)
    return total


# ------------------------------------------------------------------ runs


def run_real_sink(config: Config, chunks: List[bytes]) -> Tuple[float, TimedMqttSink, TimedEventIds, float]:
    """Wall seconds of the pipeline with the real MQTT sink (its close not
    counted); the sink; the event ids; peak resident MB during the run."""
    cfg = bench_config(config)
    assert cfg.mqtt is not None
    ids = TimedEventIds(cfg.mqtt.queue_dir)  # stored with fsyncs per id, as `bandwatch run` does
    sink = TimedMqttSink(cfg.mqtt, cfg.node)
    monitor = bench_monitor(cfg, chunks, sink, ids=ids)
    reset_peak_memory()
    seconds = run_monitor(monitor) - sink.close_seconds
    return seconds, sink, ids, peak_memory_mb()


class Mosquitto:
    """A throw-away mosquitto on a loopback port."""

    def __init__(self, program: str, port: int, workdir: str) -> None:
        self.port = port
        conf = os.path.join(workdir, f"mosquitto-{port}.conf")
        with open(conf, "w") as f:
            f.write(f"listener {port} 127.0.0.1\nallow_anonymous true\npersistence false\n")
            if os.geteuid() == 0:
                f.write("user root\n")  # mosquitto would drop to a user that cannot read workdir
        self.log_path = os.path.join(workdir, f"mosquitto-{port}.log")
        log = open(self.log_path, "wb")
        self.process = subprocess.Popen([program, "-c", conf], stdout=log, stderr=subprocess.STDOUT)
        log.close()
        deadline = time.monotonic() + 10
        while True:
            with socket.socket() as s:
                if s.connect_ex(("127.0.0.1", port)) == 0:
                    return
            if time.monotonic() > deadline or self.process.poll() is not None:
                self.stop()
                with open(self.log_path, errors="replace") as f:
                    raise RuntimeError(f"mosquitto did not start on port {port}:\n{f.read()}")
            time.sleep(0.05)

    def stop(self) -> None:
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(5)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(5)


def mosquitto_program() -> Optional[str]:
    return shutil.which("mosquitto") or shutil.which("mosquitto", path="/usr/sbin:/sbin")


def _paho_client() -> Any:
    if hasattr(mqtt, "CallbackAPIVersion"):
        return mqtt.Client(mqtt.CallbackAPIVersion.VERSION2)
    return mqtt.Client()


def drain(program: str, config: Config, workdir: str, last_id: int) -> str:
    """Start mosquitto on the sink's port; a new sink on the same queue sends
    what was kept. Returns a line to print."""
    m = config.mqtt
    assert m is not None
    broker = Mosquitto(program, m.port, workdir)
    try:
        got: List[int] = []
        subscribed = threading.Event()
        lock = threading.Lock()
        sub = _paho_client()

        def on_message(client: Any, userdata: Any, msg: Any) -> None:
            with lock:
                got.append(json.loads(msg.payload)["id"])

        sub.on_message = on_message
        sub.on_connect = lambda client, *a: client.subscribe(f"{m.prefix}/{config.node}/event", qos=1)
        sub.on_subscribe = lambda *a: subscribed.set()
        sub.connect("127.0.0.1", m.port)
        sub.loop_start()
        if not subscribed.wait(5):
            return "drain: the subscriber got no SUBACK"

        sink = MqttSink(m, config.node, reconnect_min=0.2, reconnect_max=1.0)
        kept = sink.queued
        status = {"node": config.node, "state": "online", "version": "bench", "since": ""}
        start = time.perf_counter()
        sink.open(status, dict(status, state="offline"))
        deadline = time.monotonic() + 120
        while sink.queued and time.monotonic() < deadline:
            time.sleep(0.01)
        drained = time.perf_counter() - start
        while time.monotonic() < deadline:
            with lock:
                if len(set(got)) >= kept:
                    break
            time.sleep(0.01)
        sink.close(dict(status, state="offline"))
        sub.disconnect()
        sub.loop_stop()
        with lock:
            seen = list(dict.fromkeys(got))  # first arrivals; QoS 1 may repeat
        expected = list(range(last_id - kept + 1, last_id + 1))
        verdict = "in order, none missing" if seen == expected else "NOT as expected"
        return (f"drain: {kept} kept events sent in {drained:.2f} s after the broker came up; received ids "
                f"{seen[0] if seen else '-'}..{seen[-1] if seen else '-'} ({len(seen)} distinct, "
                f"{len(got) - len(seen)} repeats): {verdict}; queue now {sink.queued}")
    finally:
        broker.stop()


# ------------------------------------------------------------------ main


def report(name: str, seconds: float, stream_s: float, base_rtf: float, sink: TimedMqttSink, ids: TimedEventIds,
           mem: float, limit: int, queue_dir: str) -> bool:
    """Print one real-sink run; True when its queue stayed within the limit."""
    rtf = stream_s / seconds
    events = sum(sink.kinds.values())
    last_id = ids.last
    within = sink.queued <= limit and sink.largest_queue <= limit
    print(f"  {name:29s}{seconds:7.2f} s  {rtf:7.1f} x real time  peak resident {mem:.0f} MB")
    print(f"    real-time factor / baseline: {rtf / base_rtf:.3f}")
    print(f"    events: {events} ({events / stream_s:.1f} per stream second), ids 1..{last_id}")
    for kind, n in sorted(sink.kinds.items()):
        print(f"      {n:6d}  {kind}")
    print(f"    time in send(): {sink.send_seconds:.2f} s in all ({sink.send_seconds / max(events, 1) * 1e3:.2f} ms "
          f"per event), longest {sink.longest_send * 1e3:.1f} ms; storing event ids: {ids.seconds:.2f} s "
          f"({ids.seconds / max(events, 1) * 1e3:.2f} ms per event)")
    print(f"    queue at the end: {sink.queued} (largest seen {sink.largest_queue}; limit {limit}: "
          f"{'within' if within else 'OVER'}); dropped {sink.dropped}; "
          f"{queue_bytes(queue_dir) / 1024:.0f} KiB on disk; published {sink.published}")
    print(f"    summaries dropped while disconnected: {sink.summaries_dropped}; close took {sink.close_seconds:.2f} s")
    return within


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--minutes", type=float, default=10.0, help="stream minutes (default 10)")
    parser.add_argument("--queue-limit", type=int, default=500, help="queue_limit (default 500)")
    parser.add_argument("--queue-dir", default="",
                        help="an empty directory for the queues, on the storage to measure (default: temporary)")
    args = parser.parse_args()
    if args.minutes <= 0:
        parser.error(f"--minutes must be > 0, got {args.minutes}")
    if args.queue_limit < 1:
        parser.error(f"--queue-limit must be at least 1, got {args.queue_limit}")
    if args.queue_dir and os.path.isdir(args.queue_dir) and os.listdir(args.queue_dir):
        parser.error(f"--queue-dir {args.queue_dir!r} is not empty")
    # The script's own log format; the library only logs.
    logging.basicConfig(level=logging.WARNING, format="    log: %(levelname)s %(name)s: %(message)s")

    workdir = tempfile.mkdtemp(prefix="bandwatch-delivery-")
    queue_root = args.queue_dir or workdir
    try:
        seconds = args.minutes * 60.0
        closed = closed_port()
        outage_dir = os.path.join(queue_root, "outage")
        print(f"delivery bench: {len(CHANNELS)} channels at {RATE:g} S/s, {seconds:g} s of stream, "
              f"queue_limit {args.queue_limit}; queues under {queue_root}")
        t0 = time.perf_counter()
        config = make_config(closed, outage_dir, args.queue_limit, {})
        samples = synthetic_samples(config, seconds)
        chunks = wire_chunks(samples)
        # The frames carry counts; scale them back to g as a sensor's config would.
        scale = (4.0 * float(np.max(np.abs(samples))) / 32767.0,) * len(CHANNELS)
        del samples
        wire_mb = sum(map(len, chunks)) / 1e6

        def with_scale(cfg: Config) -> Config:
            return dataclasses.replace(cfg, source=dataclasses.replace(cfg.source, scale=scale))

        config = with_scale(config)
        calib_chunks = chunks[: max(1, int(len(chunks) * min(1.0, CALIBRATION_S / seconds)))]
        warnings = calibrate(config, calib_chunks)
        config = with_scale(make_config(closed, outage_dir, args.queue_limit, warnings))
        print(f"  {wire_mb:.1f} MB of int16 frames, held in memory, made in {time.perf_counter() - t0:.1f} s; "
              "noise band warning limits (their medians): " + ", ".join(f"{ch} {v:.4g} g" for ch, v in warnings.items()))

        reset_peak_memory()
        base_s = run_pipeline(config, chunks)
        base_mem = peak_memory_mb()
        base_rtf = seconds / base_s
        print(f"  {'baseline (encode and drop)':29s}{base_s:7.2f} s  {base_rtf:7.1f} x real time  "
              f"peak resident {base_mem:.0f} MB")

        ok = True
        program = mosquitto_program()
        if program is not None:
            # The same sink with the broker up: what every event costs anyway.
            up_port = closed_port()
            up_dir = os.path.join(queue_root, "connected")
            up_cfg = with_scale(make_config(up_port, up_dir, args.queue_limit, warnings))
            broker = Mosquitto(program, up_port, workdir)
            try:
                up_s, up_sink, up_ids, up_mem = run_real_sink(up_cfg, chunks)
            finally:
                broker.stop()
            report("MQTT sink, broker up", up_s, seconds, base_rtf, up_sink, up_ids, up_mem,
                   args.queue_limit, up_dir)

        print(f"  broker 127.0.0.1:{closed}: nothing listens there for the whole run")
        out_s, sink, ids, out_mem = run_real_sink(config, chunks)
        ok &= report("MQTT sink, broker unreachable", out_s, seconds, base_rtf, sink, ids, out_mem,
                     args.queue_limit, outage_dir)
        if program is None:
            print("  drain: not shown (mosquitto is not installed)")
        else:
            line = drain(program, config, workdir, ids.last)
            ok &= "in order, none missing" in line
            print("  " + line)
        return 0 if ok else 1
    finally:
        shutil.rmtree(workdir, ignore_errors=True)


if __name__ == "__main__":
    sys.exit(main())
