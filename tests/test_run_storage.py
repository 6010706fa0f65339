"""`bandwatch run` against a real mosquitto while its storage misbehaves: a
disk that fills up (a 2 MB tmpfs), a queue bound that overflows, state files
deleted, rolled back or damaged. Nothing may be lost unseen, ids may never
repeat, and measuring must go on.

MQTT 3.1.1 (OASIS 2014) section 4.3.2: QoS 1 is at least once, so the
delivered ids are de-duplicated before they are compared.
"""

import json
import os
import signal
import subprocess
import sys
import time

from conftest import fill, small_disk
from mqtt_broker import Broker, Collector, wait_for

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
NODE = "flappy"


def flapping(tmp_path, port, queue_dir, seconds=12.0, realtime=True, queue_limit=10000):
    """An invented noise-only machine whose band sits at its warning limit
    with no hysteresis and no delay: about 18 events per second of stream."""
    text = f"""
[node]
name = "{NODE}"
[source]
kind = "simulator"
sample_rate = 5120.0
channels = ["x"]
unit = "g"
realtime = {str(realtime).lower()}
sim_rpm = 1480.0
sim_harmonics = [0.0]
sim_noise = 0.05
sim_seed = 3
sim_seconds = {seconds}
[spectrum]
size = 256
overlap = 0.5
averages = 1
[[band]]
name = "noise"
hz = [100.0, 2000.0]
quantity = "acceleration"
warning = 0.043
hysteresis = 0.0
delay = 0.0
[mqtt]
host = "127.0.0.1"
port = {port}
prefix = "plant"
keepalive = 5
queue_dir = "{queue_dir}"
queue_limit = {queue_limit}
"""
    path = tmp_path / "flapping.toml"
    path.write_text(text)
    return str(path)


def start(path):
    return subprocess.Popen([sys.executable, "-m", "monitor", "run", "-c", path], cwd=ROOT,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def events(sub):
    return [json.loads(m.payload) for m in sub.on(f"plant/{NODE}/event")]


def distinct(payloads):
    """Payloads by id, first arrival kept (consumers de-duplicate by (node, id))."""
    out = {}
    for p in payloads:
        out.setdefault(p["id"], p)
    return out


def queue_changes(payloads):
    return [(p["level"], p["value"]) for p in payloads if p["kind"] == "health" and p["name"] == "queue"]


def last_id(queue_dir):
    with open(os.path.join(queue_dir, "event-id"), encoding="ascii") as fh:
        return int(fh.read())


def test_a_disk_full_for_seconds_loses_no_event_and_raises_the_queue_fault(tmp_path):
    with small_disk(str(tmp_path / "disk")) as disk, Broker(str(tmp_path / "broker")) as broker, \
            Collector(broker, f"plant/{NODE}/#") as sub:
        queue_dir = os.path.join(disk, "state")
        proc = start(flapping(tmp_path, broker.port, queue_dir, seconds=16.0))
        try:
            assert wait_for(lambda: len(events(sub)) >= 20, 20), "no events before the disk filled"
            # The broker stops acknowledging, so events pile up and the queue
            # must grow, on a disk that has no room left.
            broker.pause()
            filler = fill(disk)
            time.sleep(5.0)
            os.remove(filler)
            broker.resume()
            _, err = proc.communicate(timeout=60)
        finally:
            broker.resume()
            if proc.poll() is None:
                proc.kill()
                proc.communicate()
        assert proc.returncode == 0, err
        sent = last_id(queue_dir)
        got = wait_for(lambda: distinct(events(sub)) if len(distinct(events(sub))) >= sent else None, 10)
        assert got and sorted(got) == list(range(1, sent + 1)), f"{len(distinct(events(sub)))} of {sent} delivered"
        print(f"full disk: {len(got)} of {sent} events delivered")
        changes = queue_changes(got[i] for i in sorted(got))
        assert changes[0][0] == "fault" and changes[-1] == ("normal", 0.0), changes  # raised, nothing lost
        assert "refused a write: database or disk is full" in err and "cannot rollback" not in err
        levels = [json.loads(m.payload) for m in sub.on(f"plant/{NODE}/levels")]
        assert any(row["name"] == "queue" and row["level"] == "fault" for p in levels for row in p["levels"])


def test_the_loss_notice_outlasts_the_queue_bound_and_carries_the_count(tmp_path):
    broker = Broker(str(tmp_path / "broker"))  # not running: every event waits in a queue of 50
    queue_dir = str(tmp_path / "state")
    path = flapping(tmp_path, broker.port, queue_dir, seconds=10.0, realtime=False, queue_limit=50)
    away = subprocess.run([sys.executable, "-m", "monitor", "run", "-c", path], cwd=ROOT,
                          capture_output=True, text=True, timeout=60)
    assert away.returncode == 0, away.stderr
    sent = last_id(queue_dir)
    assert sent > 100
    with broker, Collector(broker, f"plant/{NODE}/event") as sub:
        # The same machine a little longer, with the broker back.
        back = subprocess.run([sys.executable, "-m", "monitor", "run", "-c",
                               flapping(tmp_path, broker.port, queue_dir, seconds=3.0, queue_limit=50)],
                              cwd=ROOT, capture_output=True, text=True, timeout=60)
        assert back.returncode == 0, back.stderr
        total = last_id(queue_dir)
        wait_for(lambda: ("normal" in [c[0] for c in queue_changes(events(sub))]), 10)
    got = distinct(events(sub))
    changes = queue_changes(got[i] for i in sorted(got))
    first_run = [got[i] for i in sorted(got) if i <= sent]
    # The fault raised while the broker was away survived the bound...
    assert [p["level"] for p in first_run if p["kind"] == "health" and p["name"] == "queue"] == ["fault"]
    # ...and the all-clear says exactly how many events were lost.
    lost = total - len(got)
    print(f"queue bound: {len(got)} of {total} delivered; queue changes {changes}")
    assert lost > 0 and changes[-1] == ("normal", float(lost)), (changes, lost)
