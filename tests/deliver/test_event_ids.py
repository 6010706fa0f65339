"""Event ids that survive restarts and crashes."""

import os
import signal
import subprocess
import sys

import pytest

from monitor.errors import DeliveryError
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


def test_a_damaged_file_is_refused_with_its_name(tmp_path):
    (tmp_path / "event-id").write_text("garbage")
    with pytest.raises(DeliveryError, match="event-id"):
        EventIds(str(tmp_path))


def test_no_temporary_file_is_left(tmp_path):
    ids = EventIds(str(tmp_path))
    ids.take()
    assert sorted(os.listdir(tmp_path)) == ["event-id"]
    assert (tmp_path / "event-id").read_text() == f"{1:020d}\n"
