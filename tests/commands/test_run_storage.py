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

import pytest

from conftest import fill, remount, small_disk
from mqtt_broker import Broker, Collector, wait_for

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
NODE = "flappy"


def flapping(tmp_path, port, queue_dir, seconds=12.0, realtime=True, queue_limit=10000):
    """An invented noise-only machine whose band sits at its warning limit
    with no hysteresis and no delay: about 18 events per second of stream.
    Health faults clear without a hold, so the `queue` all-clear comes
    within these short runs."""
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
[health]
hold = 0.0
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
        proc = start(flapping(tmp_path, broker.port, queue_dir, seconds=12.0))
        try:
            assert wait_for(lambda: len(events(sub)) >= 20, 20), "no events before the disk filled"
            # The broker stops acknowledging, so events pile up and the queue
            # must grow, on a disk that has no room left.
            broker.pause()
            filler = fill(disk)
            time.sleep(4.0)
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


def run_once(path):
    return subprocess.run([sys.executable, "-m", "monitor", "run", "-c", path], cwd=ROOT,
                          capture_output=True, text=True, timeout=60)


def by_id(sub):
    """Every distinct payload seen per id: a resend is the same bytes, a reused id is not."""
    out = {}
    for m in sub.on(f"plant/{NODE}/event"):
        out.setdefault(json.loads(m.payload)["id"], set()).add(m.payload)
    return out


def test_ids_never_repeat_after_the_id_file_is_deleted_or_rolled_back(tmp_path):
    broker = Broker(str(tmp_path / "broker"))  # away at first: the queue holds the ids
    queue_dir = str(tmp_path / "state")
    path = flapping(tmp_path, broker.port, queue_dir, seconds=4.0, realtime=False)
    assert run_once(path).returncode == 0
    held = last_id(queue_dir)
    os.remove(os.path.join(queue_dir, "event-id"))
    deleted = run_once(path)
    assert deleted.returncode == 0 and "is missing; repaired" in deleted.stderr
    assert last_id(queue_dir) > held
    with open(os.path.join(queue_dir, "event-id"), "w") as fh:
        fh.write(f"{5:020d}\n")  # rolled back, as a restored backup would
    with broker, Collector(broker, f"plant/{NODE}/event") as sub:
        rolled = run_once(path)
        assert rolled.returncode == 0 and "holds 5, below id" in rolled.stderr
        total = last_id(queue_dir)
        assert wait_for(lambda: len(by_id(sub)) >= total, 10)
    seen = by_id(sub)
    assert sorted(seen) == list(range(1, total + 1))
    assert all(len(contents) == 1 for contents in seen.values()), "an id arrived with two contents"


def test_a_damaged_id_file_is_repaired_and_measuring_starts(tmp_path):
    queue_dir = str(tmp_path / "state")
    path = flapping(tmp_path, 1, queue_dir, seconds=2.0, realtime=False)  # no broker: the queue holds all
    assert run_once(path).returncode == 0
    # "\u0663" is ARABIC-INDIC DIGIT THREE: a digit to Python's int(), not to the file's format.
    for content in (b"abc", b"-5", b"", "\u0663".encode()):
        before = last_id(queue_dir)
        with open(os.path.join(queue_dir, "event-id"), "wb") as fh:
            fh.write(content)
        again = run_once(path)
        assert again.returncode == 0, again.stderr
        assert "not a number; repaired" in again.stderr and "Traceback" not in again.stderr
        assert last_id(queue_dir) > before + 10  # measured, and went on counting


def test_a_read_only_state_directory_measures_and_delivers_with_a_queue_fault(tmp_path):
    with small_disk(str(tmp_path / "disk")) as disk:
        queue_dir = os.path.join(disk, "state")
        with Broker(str(tmp_path / "broker")) as broker, Collector(broker, f"plant/{NODE}/event") as sub:
            path = flapping(tmp_path, broker.port, queue_dir, seconds=2.0, realtime=False)
            assert run_once(path).returncode == 0
            before = last_id(queue_dir)
            remount(disk, "ro")
            try:
                ro = run_once(flapping(tmp_path, broker.port, queue_dir, seconds=4.0))
            finally:
                remount(disk, "rw")
            assert ro.returncode == 0, ro.stderr
            assert "Read-only file system" in ro.stderr
            got = wait_for(lambda: [p for p in events(sub) if p["id"] > before and p["kind"] == "band"], 10)
        assert len(got) > 20  # measured and delivered from memory
        assert [c[0] for c in queue_changes(events(sub))][:1] == ["fault"]


@pytest.mark.parametrize("damage", ["empty", "page"])
def test_a_damaged_queue_file_is_reported_as_a_queue_fault(tmp_path, damage):
    broker = Broker(str(tmp_path / "broker"))
    queue_dir = str(tmp_path / "state")
    path = flapping(tmp_path, broker.port, queue_dir, seconds=8.0, realtime=False)
    assert run_once(path).returncode == 0  # the broker is away: every event waits
    queued = last_id(queue_dir)
    db = os.path.join(queue_dir, "events.sqlite")
    with open(db, "r+b") as f:
        if damage == "empty":
            f.truncate(0)
        else:
            f.seek(4096 * (os.path.getsize(db) // 4096 // 2))
            f.write(bytes(range(256)) * 16)
    with broker, Collector(broker, f"plant/{NODE}/event") as sub:
        back = run_once(flapping(tmp_path, broker.port, queue_dir, seconds=2.0))
        assert back.returncode == 0, back.stderr
        assert "is damaged" in back.stderr
        wait_for(lambda: "normal" in [c[0] for c in queue_changes(events(sub))], 10)
    changes = queue_changes(events(sub))
    assert changes[0][0] == "fault"
    assert any(name.startswith("events.sqlite.corrupt-") for name in os.listdir(queue_dir))
    if damage == "page":
        recovered = [i for i in distinct(events(sub)) if i <= queued]
        lost = queued - len(recovered)
        assert 0 < lost < queued // 2
        assert ("normal", float(lost)) in changes, (changes, lost)
