"""The on-disk event queue: order, bound, reopening, surviving SIGKILL, a full or
read-only disk (a small tmpfs), and kept rows."""

import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time

import pytest

from conftest import fill, remount, small_disk
from monitor.deliver.queue import FILENAME, EventQueue, QueuedEvent, event_id_of, kept
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
        assert q._db.execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL


def test_directory_that_cannot_be_made_is_named_and_events_wait_in_memory(tmp_path, caplog):
    blocker = tmp_path / "plain-file"
    blocker.write_text("not a directory")
    target = str(blocker / "queue")
    with EventQueue(target, 10) as q:  # the monitor measures on; nothing is lost yet
        assert q.error and "not a directory" in q.error and str(blocker) in q.error
        assert target in caplog.text
        row = q.put("t", payload(1), 1)
        assert row < 0 and q.held == q.count == 1 and q.dropped == 0
        assert q.peek(5) == [QueuedEvent(row, "t", payload(1), 1)]
        assert q.remove(row) and q.count == 0


def test_second_user_of_a_directory_is_refused(tmp_path):
    with EventQueue(str(tmp_path), 10):
        with pytest.raises(DeliveryError, match="in use"):
            EventQueue(str(tmp_path), 10)
    EventQueue(str(tmp_path), 10).close()  # free again after close


def test_unreadable_database_is_moved_aside(tmp_path, caplog):
    (tmp_path / FILENAME).write_bytes(b"this is not an sqlite database" * 100)
    with EventQueue(str(tmp_path), 10) as q:
        assert q.count == 0
        assert q.damage is not None and q.damage.held is None and q.damage.recovered == 0
        q.put("t", payload(1), 1)
        assert q.count == 1
    aside = [p.name for p in tmp_path.iterdir() if ".corrupt-" in p.name]
    assert aside, "the damaged file should be kept for inspection"
    assert "an unknown number of events" in caplog.text


def test_an_empty_database_file_is_damage_not_a_fresh_queue(tmp_path, caplog):
    with EventQueue(str(tmp_path), 10) as q:
        q.put("t", payload(1), 1)
    (tmp_path / FILENAME).write_bytes(b"")  # truncated behind our back
    with EventQueue(str(tmp_path), 10) as q:
        assert q.damage is not None and "empty" in q.damage.reason
    assert "empty (0 bytes)" in caplog.text


def test_a_damaged_page_costs_only_its_rows_and_they_are_counted(tmp_path, caplog):
    with EventQueue(str(tmp_path), 10_000) as q:
        for i in range(1, 301):
            q.put("t", payload(i) + b" " * 500, 1, event_id=i)
        q.remove_many(r.id for r in q.peek(20))  # delivered: ids 21..300 wait
    with open(tmp_path / FILENAME, "r+b") as f:
        f.seek(4096 * 20)  # one page in the middle of the table
        f.write(bytes(range(256)) * 16)
    with EventQueue(str(tmp_path), 10_000) as q:
        damage = q.damage
        assert damage is not None and damage.held == 280
        assert 250 < damage.recovered < 280
        assert q.count == damage.recovered and q.dropped == 280 - damage.recovered
        got = [event_id_of(r.payload) for r in q.peek(1000)]
        assert got == sorted(got) and got[0] == 21 and got[-1] == 300  # both sides of the damage
        assert q.last_event_id == 300
    assert f"{280 - damage.recovered} lost" in caplog.text


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


def test_a_full_disk_holds_events_in_memory_and_writes_them_when_it_has_room(tmp_path, caplog):
    with small_disk(str(tmp_path / "disk")) as disk:
        with EventQueue(os.path.join(disk, "q"), 1000) as q:
            before = [q.put("t", payload(i), 1, event_id=i) for i in range(5)]
            filler = fill(disk)
            # A burst as a flapping band gives; the disk takes none of it.
            during = [q.put("t", payload(i) + b" " * 400, 1, event_id=i) for i in range(5, 400)]
            assert q.error and "full" in q.error
            assert any(row < 0 for row in during)
            assert q.count == 400 and q.dropped == 0
            # The true cause is logged once; never SQLite's "cannot rollback".
            refusals = [r for r in caplog.records if "refused a write" in r.getMessage()]
            assert len(refusals) == 1 and "full" in refusals[0].getMessage()
            assert "cannot rollback" not in caplog.text
            # Held events still go out, after those on disk, in order.
            head = q.peek(400)
            assert [event_id_of(r.payload) for r in head] == list(range(400))
            assert q.remove_many(r.id for r in head[:3]) == 3
            os.remove(filler)
            q._retry_at = 0.0  # the delivery thread's next beat
            q.retry()
            assert q.error is None and q.held == 0 and q.count == 397
            assert all(row > 0 for row in before)
        with EventQueue(os.path.join(disk, "q"), 1000) as q:  # all of it on disk now
            assert [event_id_of(r.payload) for r in q.peek(1000)] == list(range(3, 400))
            assert q.last_event_id == 399


def test_the_memory_bound_drops_the_oldest_and_counts_them(tmp_path):
    with small_disk(str(tmp_path / "disk")) as disk:
        with EventQueue(os.path.join(disk, "q"), 100, memory_limit=10) as q:
            fill(disk)
            for i in range(25):
                q.put("t", payload(i) + b" " * 2000, 1)
            assert q.held <= 10 and q.count == q.held + (q.count - q.held)
            assert q.dropped + q.count == 25


def test_a_read_only_directory_holds_events_until_it_is_writable(tmp_path):
    with small_disk(str(tmp_path / "disk")) as disk:
        remount(disk, "ro")
        q = EventQueue(os.path.join(disk, "q"), 100)
        try:
            assert q.error and "Read-only" in q.error
            rows = [q.put("t", payload(i), 1) for i in range(3)]
            assert all(r < 0 for r in rows) and q.held == 3
            remount(disk, "rw")
            q._retry_at = 0.0
            q.retry()
            assert q.error is None and q.held == 0 and q.count == 3
            assert q.remove(rows[0])  # confirmed after it moved to disk: still found
            assert [r.payload for r in q.peek(5)] == [payload(1), payload(2)]
        finally:
            q.close()


def test_removals_the_disk_refuses_are_hidden_and_done_later(tmp_path):
    with small_disk(str(tmp_path / "disk")) as disk:
        with EventQueue(os.path.join(disk, "q"), 100) as q:
            rows = [q.put("t", payload(i), 1) for i in range(4)]
            filler = fill(disk)
            assert q.remove_many(rows[:2]) == 2
            assert q.error and q.count == 2
            assert [r.payload for r in q.peek(5)] == [payload(2), payload(3)]
            os.remove(filler)
            q._retry_at = 0.0
            q.retry()
            assert q.error is None and q.count == 2
        with EventQueue(os.path.join(disk, "q"), 100) as q:
            assert [r.payload for r in q.peek(5)] == [payload(2), payload(3)]


def test_kept_rows_outlast_the_bound(tmp_path):
    with EventQueue(str(tmp_path), 5) as q:
        q.put("t", payload(0), 1)
        q.put("t", payload(1), 1, keep=True)  # the queue fault's own event
        for i in range(2, 20):
            q.put("t", payload(i), 1)
        assert [r.payload for r in q.peek(10)] == [payload(1)] + [payload(i) for i in range(16, 20)]
        assert q.dropped == 15
    assert kept({"kind": "health", "name": "queue"}) and not kept({"kind": "health", "name": "gap"})


def test_losses_are_remembered_across_a_restart_until_the_queue_empties(tmp_path):
    with EventQueue(str(tmp_path), 3) as q:
        for i in range(8):
            q.put("t", payload(i), 1)
        assert q.dropped == 5
    with EventQueue(str(tmp_path), 3) as q:
        assert q.dropped == 5  # reported again after the restart
        q.remove_many(r.id for r in q.peek(3))
    with EventQueue(str(tmp_path), 3) as q:
        assert q.dropped == 0  # the queue emptied: a new count starts
