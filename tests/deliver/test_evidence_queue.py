"""The spectrum and capture queues: their bounds in rows and bytes, reading
back on opening, a damaged file, and a full disk that refuses a write
without losing what the queue holds."""

import os

import pytest

from conftest import fill, small_disk
from monitor.deliver.evidence_queue import CAPTURES, SPECTRA, EvidenceQueue, StoreRefused
from monitor.deliver.queue import EventQueue


def payload(i: int) -> bytes:
    return ('{"id":%d}' % i).encode()


def test_a_byte_bound_drops_the_oldest_until_the_new_row_fits(tmp_path):
    with EvidenceQueue(str(tmp_path), CAPTURES, "capture", 10 ** 9, limit_bytes=1000) as q:
        for i in range(4):
            q.put("t", bytes([i]) * 300, 1)  # 4 x 300 = 1200 > 1000: the first goes
        assert (q.count, q.bytes, q.dropped) == (3, 900, 1)
        assert [r.payload[0] for r in q.peek(10)] == [1, 2, 3]
        q.put("t", b"\x09" * 700, 1)  # room for 700: two more of the oldest go
        assert (q.count, q.bytes, q.dropped) == (2, 1000, 3)
        assert [r.payload[0] for r in q.peek(10)] == [3, 9]
        # Larger than the whole bound: refused at once, counted, the rest kept.
        assert q.put("t", b"x" * 1001, 1) is None
        assert (q.count, q.bytes, q.dropped) == (2, 1000, 4)
        assert q.remove_many([q.peek(1)[0].id]) == 1
        assert (q.count, q.bytes) == (1, 700)
        assert q.remove_many([10 ** 6]) == 0  # a second confirmation is harmless
    with EvidenceQueue(str(tmp_path), CAPTURES, "capture", 10 ** 9, limit_bytes=1000) as q:
        assert (q.count, q.bytes, q.dropped) == (1, 700, 0)  # read back on opening


def test_evidence_queues_live_beside_the_event_queue_in_private_files(tmp_path):
    with EventQueue(str(tmp_path), 10), EvidenceQueue(str(tmp_path), SPECTRA, "spectrum", 2) as s:
        for i in range(3):
            s.put("t", payload(i), 1)
        assert s.count == 2 and s.dropped == 1
        assert [r.payload for r in s.peek(5)] == [payload(1), payload(2)]
        names = os.listdir(tmp_path)
        assert "events.sqlite" in names and "spectra.sqlite" in names
        assert os.stat(tmp_path / "spectra.sqlite").st_mode & 0o077 == 0  # the service's user only


def test_a_damaged_file_is_moved_aside_and_a_fresh_one_started(tmp_path, caplog):
    (tmp_path / SPECTRA).write_bytes(b"this is not a database, only bytes " * 200)
    with EvidenceQueue(str(tmp_path), SPECTRA, "spectrum", 10) as q:
        assert q.count == 0
        assert q.put("t", payload(1), 1) is not None
    assert any(n.startswith(SPECTRA + ".corrupt-") for n in os.listdir(tmp_path))
    assert "is damaged" in caplog.text


def test_a_full_disk_refuses_without_losing_what_it_holds_then_takes_writes_again(tmp_path, caplog):
    with small_disk(str(tmp_path / "disk")) as disk:
        q = EvidenceQueue(os.path.join(disk, "q"), CAPTURES, "capture", 10 ** 9, limit_bytes=10 ** 8)
        try:
            assert q.put("t", b"x" * 1000, 1) is not None
            filler = fill(disk)
            with pytest.raises(StoreRefused):  # the caller keeps it and tries again
                q.put("t", b"y" * 300_000, 1)
            assert q.dropped == 0 and q.count == 1 and q.error
            assert "wait in memory until it takes them" in caplog.text
            os.remove(filler)
            assert q.put("t", b"z" * 1000, 1) is not None
            assert q.count == 2 and q.error is None
            assert "takes writes again" in caplog.text
        finally:
            q.close()
