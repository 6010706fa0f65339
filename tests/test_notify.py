"""sd_notify messages to a real AF_UNIX datagram socket standing in for systemd.

Protocol: sd_notify(3) and sd_watchdog_enabled(3), systemd manual pages.
"""

import os
import signal
import socket
import subprocess
import sys
import time

from monitor.notify import Notifier

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def listen(path):
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    sock.bind(str(path))
    sock.settimeout(0.2)
    return sock


def drain(sock, until, deadline_s=30.0):
    """Collect datagrams until one contains `until`, or the deadline passes."""
    got = []
    end = time.monotonic() + deadline_s
    while time.monotonic() < end:
        try:
            got.append(sock.recv(4096).decode())
        except socket.timeout:
            continue
        if until in got[-1]:
            break
    return got


def test_notifier_sends_to_path_and_abstract_sockets(tmp_path):
    sock = listen(tmp_path / "notify")
    n = Notifier({"NOTIFY_SOCKET": str(tmp_path / "notify")})
    n.ready("starting")
    assert sock.recv(4096) == b"READY=1\nSTATUS=starting"
    abstract = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    name = f"bandwatch-test-{os.getpid()}"
    abstract.bind("\0" + name)
    Notifier({"NOTIFY_SOCKET": "@" + name}).stopping()
    assert abstract.recv(4096) == b"STOPPING=1"


def test_watchdog_pings_at_half_the_interval(tmp_path):
    sock = listen(tmp_path / "notify")
    now = [0.0]
    n = Notifier({"NOTIFY_SOCKET": str(tmp_path / "notify"), "WATCHDOG_USEC": "2000000"}, clock=lambda: now[0])
    pings = 0
    for step in range(40):  # 4 s in 0.1 s steps: a ping every 1 s
        now[0] = step * 0.1
        n.watchdog()
    while True:
        try:
            assert sock.recv(4096) == b"WATCHDOG=1"
            pings += 1
        except socket.timeout:
            break
    assert pings == 4


def test_watchdog_for_another_pid_is_ignored():
    n = Notifier({"NOTIFY_SOCKET": "/nonexistent", "WATCHDOG_USEC": "1000", "WATCHDOG_PID": "1"})
    assert n.watchdog_s is None


def test_without_systemd_nothing_is_sent():
    n = Notifier({})
    assert not n.enabled
    n.ready("x")  # must not raise


def test_run_reports_ready_watchdog_status_and_stopping(tmp_path):
    config = tmp_path / "demo.toml"
    with open(os.path.join(ROOT, "config", "demo.toml"), encoding="utf-8") as fh:
        config.write_text(fh.read())
    sock = listen(tmp_path / "notify")
    env = dict(os.environ, NOTIFY_SOCKET=str(tmp_path / "notify"), WATCHDOG_USEC="400000")
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "run", "-c", str(config)], cwd=ROOT, env=env,
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    try:
        got = drain(sock, "READY=1")
        assert any(m.startswith("READY=1") for m in got)
        time.sleep(0.5)
        proc.send_signal(signal.SIGHUP)  # not yet a reload: it must not end the run
        got += drain(sock, "WATCHDOG=1", 5.0)
        assert proc.poll() is None
        proc.send_signal(signal.SIGTERM)
        got += drain(sock, "STOPPING=1", 10.0)
        assert proc.wait(timeout=5) == 0
    finally:
        if proc.poll() is None:
            proc.kill()
    assert "WATCHDOG=1" in got
    assert "STOPPING=1" in got
    assert any("STATUS=demo-fan:" in m for m in got)
