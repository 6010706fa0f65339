"""The on-disk event queue: order, bound, reopening, and surviving SIGKILL."""

import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time

import pytest

from monitor.deliver.queue import FILENAME, EventQueue, QueuedEvent
from monitor.errors import DeliveryError

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def payload(i: int) -> bytes:
    return ('{"id":%d}' % i).encode()


def test_fifo_order_peek_and_remove(tmp_path):
    with EventQueue(str(tmp_path / "q"), 100) as q:
        ids = [q.put("p/n/event", payload(i), 1) for i in range(5)]
        assert ids == sorted(ids) and len(set(ids)) == 5
        assert q.count == len(q) == 5
        head = q.peek(3)
        assert [r.payload for r in head] == [payload(0), payload(1), payload(2)]
        assert head[0] == QueuedEvent(ids[0], "p/n/event", payload(0), 1)
        assert q.count == 5  # peek leaves rows in place
        assert q.remove(ids[0]) is True
        assert q.remove(ids[0]) is False  # a second confirmation is harmless
        assert [r.id for r in q.peek(10)] == ids[1:]
        assert q.remove_many(ids[1:3]) == 2
        assert [r.payload for r in q.peek(10)] == [payload(3), payload(4)]
        assert q.count == 2
        assert q.peek(0) == []


def test_bound_drops_oldest_and_counts_exactly(tmp_path):
    with EventQueue(str(tmp_path), 3) as q:
        for i in range(8):
            q.put("t", payload(i), 1)
        assert q.dropped == 5
        assert q.count == 3
        assert [r.payload for r in q.peek(10)] == [payload(5), payload(6), payload(7)]


def test_reopen_keeps_rows_order_and_new_ids_follow(tmp_path):
    directory = str(tmp_path / "deep" / "er")  # created when missing
    q = EventQueue(directory, 10)
    first = [q.put("t", payload(i), 1) for i in range(4)]
    q.remove(first[-1])  # the newest id is gone, and must not come back
    q.close()
    q.close()  # idempotent
    assert os.path.exists(os.path.join(directory, FILENAME))
    with EventQueue(directory, 10) as q:
        assert q.count == 3
        assert q.dropped == 0
        new = q.put("t", payload(9), 2)
        assert new > first[-1]  # AUTOINCREMENT: ids never reused
        rows = q.peek(10)
        assert [r.payload for r in rows] == [payload(0), payload(1), payload(2), payload(9)]
        assert rows[-1].qos == 2


def test_wal_and_full_sync(tmp_path):
    with EventQueue(str(tmp_path), 10) as q:
        q.put("t", payload(1), 1)
        # SQLite docs, "Write-Ahead Logging": the mode is stored in the file.
        db = sqlite3.connect(q.path)
        try:
            assert db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        finally:
            db.close()
        assert q._conn().execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL


def test_directory_that_cannot_be_made_names_it(tmp_path):
    blocker = tmp_path / "plain-file"
    blocker.write_text("not a directory")
    target = str(blocker / "queue")
    with pytest.raises(DeliveryError) as err:
        EventQueue(target, 10)
    assert target in str(err.value)


def test_second_user_of_a_directory_is_refused(tmp_path):
    with EventQueue(str(tmp_path), 10):
        with pytest.raises(DeliveryError, match="in use"):
            EventQueue(str(tmp_path), 10)
    EventQueue(str(tmp_path), 10).close()  # free again after close


def test_unreadable_database_is_moved_aside(tmp_path):
    (tmp_path / FILENAME).write_bytes(b"this is not an sqlite database" * 100)
    with EventQueue(str(tmp_path), 10) as q:
        assert q.count == 0
        q.put("t", payload(1), 1)
        assert q.count == 1
    aside = [p.name for p in tmp_path.iterdir() if ".corrupt-" in p.name]
    assert aside, "the damaged file should be kept for inspection"


def test_closed_queue_refuses_with_delivery_error(tmp_path):
    q = EventQueue(str(tmp_path), 10)
    q.close()
    with pytest.raises(DeliveryError, match="closed"):
        q.put("t", payload(1), 1)


def test_two_threads_put_and_remove(tmp_path):
    with EventQueue(str(tmp_path), 10_000) as q:
        stop = threading.Event()
        removed = []

        def drain():
            while not stop.is_set() or q.count:
                rows = q.peek(5)
                if rows:
                    q.remove_many(r.id for r in rows)
                    removed.extend(rows)
                else:
                    time.sleep(0.001)

        t = threading.Thread(target=drain)
        t.start()
        for i in range(300):
            q.put("t", payload(i), 1)
        stop.set()
        t.join(10)
        assert not t.is_alive()
        assert [r.payload for r in removed] == [payload(i) for i in range(300)]
        assert q.count == 0


WRITER = r"""
import sys
from monitor.deliver.queue import EventQueue
q = EventQueue(sys.argv[1], 1_000_000)
i = 0
while True:
    q.put("t", b'{"id":%d}' % i, 1)
    print(i, flush=True)  # printed only after put() has committed
    i += 1
"""


def test_sigkill_during_writes_leaves_a_consistent_queue(tmp_path):
    directory = str(tmp_path / "q")
    env = dict(os.environ, PYTHONPATH=ROOT + os.pathsep + os.environ.get("PYTHONPATH", ""))
    child = subprocess.Popen(
        [sys.executable, "-c", WRITER, directory], stdout=subprocess.PIPE, env=env, text=True
    )
    reported = -1
    try:
        deadline = time.monotonic() + 20
        while reported < 150 and time.monotonic() < deadline:
            line = child.stdout.readline()
            if not line:
                break
            reported = int(line)
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait(10)
        child.stdout.close()
    assert reported >= 150, "the writer did not get going"

    db = sqlite3.connect(os.path.join(directory, FILENAME))
    try:
        assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    finally:
        db.close()
    with EventQueue(directory, 1_000_000) as q:
        rows = q.peek(100_000)
        ids = [int(r.payload[6:-1]) for r in rows]
        # Every put that returned is there (and maybe one more that had
        # committed but not yet printed), contiguous from 0, in order.
        assert ids == list(range(len(ids)))
        assert len(ids) - 1 >= reported
        assert q.count == len(ids)
        q.put("t", payload(-1), 1)  # and it keeps working
