"""Event ids that survive restarts and crashes."""

import os
import signal
import subprocess
import sys

import pytest

from monitor.deliver.event_ids import EventIds


def test_ids_continue_after_a_restart(tmp_path):
    # README, What is published: ids increase by one and survive restarts.
    ids = EventIds(str(tmp_path))
    assert [ids.take() for _ in range(3)] == [1, 2, 3]
    again = EventIds(str(tmp_path))
    assert again.take() == 4


def test_in_memory_ids_start_at_one():
    # README, What is published: on stdout ids count from 1 in each run.
    ids = EventIds()
    assert ids.take() == 1 and ids.take() == 2


def test_an_id_is_stored_before_it_is_handed_out(tmp_path):
    # A process killed right after take() returned must not reuse that id.
    code = (
        "import os, signal, sys\n"
        "from monitor.deliver.event_ids import EventIds\n"
        f"ids = EventIds({str(tmp_path)!r})\n"
        "for _ in range(50): ids.take()\n"
        "print(ids.take(), flush=True)\n"
        "os.kill(os.getpid(), signal.SIGKILL)\n"
    )
    proc = subprocess.run([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True, timeout=30)
    assert proc.returncode == -signal.SIGKILL
    assert int(proc.stdout) == 51
    assert EventIds(str(tmp_path)).take() == 52


@pytest.mark.parametrize("content", [b"abc", b"-5", b"", b"\xd9\xa3\n", b"12abc", b"1" * 30, b"\x00" * 21])
def test_a_damaged_file_is_repaired_from_the_queue_with_a_warning(tmp_path, caplog, content):
    # "\xd9\xa3" is ARABIC-INDIC DIGIT THREE in UTF-8: a digit to str.isdigit, not to us.
    (tmp_path / "event-id").write_bytes(content)
    ids = EventIds(str(tmp_path), floor=84)  # the queue still holds ids up to 84
    assert ids.take() == 85
    assert "event-id" in caplog.text and "repaired" in caplog.text
    assert (tmp_path / "event-id").read_bytes() == b"%020d\n" % 85


def test_a_damaged_file_without_a_queue_starts_again_and_says_so(tmp_path, caplog):
    (tmp_path / "event-id").write_text("abc")
    assert EventIds(str(tmp_path)).take() == 1
    assert "'abc'" in caplog.text and "seen before" in caplog.text


def test_a_deleted_or_rolled_back_file_cannot_make_ids_repeat(tmp_path, caplog):
    assert EventIds(str(tmp_path), floor=84).take() == 85
    assert "is missing" in caplog.text
    (tmp_path / "event-id").write_text(f"{10:020d}\n")  # an old backup put back
    assert EventIds(str(tmp_path), floor=85).take() == 86
    assert "holds 10, below id 85" in caplog.text


def test_a_first_start_is_quiet(tmp_path, caplog):
    assert EventIds(str(tmp_path), floor=0).take() == 1
    assert not caplog.records


def test_an_unwritable_file_is_logged_once_and_ids_go_on(tmp_path, caplog):
    (tmp_path / "event-id").mkdir()  # cannot be read or written as a file
    ids = EventIds(str(tmp_path), floor=3)
    assert [ids.take() for _ in range(3)] == [4, 5, 6]
    assert "cannot be read" in caplog.text
    assert len([r for r in caplog.records if "cannot store event id" in r.getMessage()]) == 1


def test_no_temporary_file_is_left(tmp_path):
    ids = EventIds(str(tmp_path))
    ids.take()
    assert sorted(os.listdir(tmp_path)) == ["event-id"]
    assert (tmp_path / "event-id").read_text() == f"{1:020d}\n"
