"""Queue, state and capture files are 0600 and their directories 0700 whatever
the umask; modes read back with os.stat (POSIX permission bits)."""

import os
import stat
import subprocess
import sys

import pytest

from monitor.acquire.recording import RecordingWriter
from monitor.deliver import private
from rig import CAPTURE, scenario

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


def mode(path):
    return stat.S_IMODE(os.stat(path).st_mode)


@pytest.fixture
def open_umask():
    old = os.umask(0)  # the widest: nothing taken off
    yield
    os.umask(old)


def test_new_directories_and_files_are_private(tmp_path, open_umask):
    target = tmp_path / "a" / "b" / "c"
    private.make_dirs(str(target))
    assert [mode(tmp_path / p) for p in ("a", "a/b", "a/b/c")] == [0o700] * 3
    private.touch(str(target / "f"))
    assert mode(target / "f") == 0o600
    shared = tmp_path / "shared"
    shared.mkdir(mode=0o755)
    private.make_dirs(str(shared))
    assert mode(shared) == 0o755


def test_an_old_wide_file_is_narrowed_when_opened(tmp_path):
    old = tmp_path / "event-id"
    old.write_text("1\n")
    os.chmod(old, 0o644)
    os.close(private.open_file(str(old), os.O_RDWR))
    assert mode(old) == 0o600


def test_everything_run_writes_is_private_under_an_open_umask(tmp_path):
    state = tmp_path / "state"
    recording = tmp_path / "in.wav"
    with RecordingWriter(str(recording), 2048, ["x", "y"], "m/s2") as writer:
        writer.write(scenario(20.0, [(10.0, 2.0)]))  # the tone rises: a capture is written
    text = CAPTURE.format(dir=state / "captures") + f"""
[[band]]
name = "learned"
channel = "y"
hz = [5.0, 10.0]
quantity = "acceleration"
baseline = 1.0
warning_ratio = 3.0
[mqtt]
host = "127.0.0.1"
port = 1
queue_dir = "{state}"
"""
    text = text.replace('kind = "simulator"', f'kind = "file"\npath = "{recording}"')
    text = text.replace("sample_rate = 2048.0\n", "")
    config = tmp_path / "c.toml"
    config.write_text(text)
    done = subprocess.run([sys.executable, "-m", "monitor", "run", "-c", str(config)], cwd=ROOT,
                          capture_output=True, text=True, timeout=60, preexec_fn=lambda: os.umask(0))
    assert done.returncode == 0, done.stderr
    files = {p.name: mode(p) for p in state.rglob("*") if p.is_file()}
    dirs = {p.name: mode(p) for p in [state, *state.rglob("*")] if p.is_dir()}
    assert {"events.sqlite", "events.lock", "event-id", "baselines.json"} <= set(files), files
    assert any(name.endswith(".wav") for name in files), files
    assert set(files.values()) == {0o600}, files
    assert set(dirs.values()) == {0o700}, dirs
