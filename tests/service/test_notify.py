"""sd_notify messages to a real AF_UNIX datagram socket standing in for systemd.

Protocol: sd_notify(3) and sd_watchdog_enabled(3), systemd manual pages.
"""

import os
import signal
import socket
import subprocess
import sys
import time

from monitor.service.notify import Notifier

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))


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
    # sd_notify(3): without $NOTIFY_SOCKET there is no one to tell. Every
    # call, the watchdog's too, must neither open a socket nor fail.
    before = set(os.listdir("/proc/self/fd"))
    n = Notifier({"WATCHDOG_USEC": "1000"}, clock=lambda: 1e9)
    assert not n.enabled
    n.ready("x")
    n.status("y")
    n.watchdog()
    n.stopping()
    assert n._sock is None
    assert set(os.listdir("/proc/self/fd")) == before


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


class StuckSource:
    """Builds a stream source whose reader thread goes round its loop for a
    while, then blocks for good, as a driver read that never returns would."""

    @staticmethod
    def make(config, run_s):
        import threading as _threading

        from monitor.acquire.sources.stream import StreamSource

        class _Stuck(StreamSource):
            kind = "stuck"
            release = _threading.Event()

            def _loop(self):
                end = time.monotonic() + run_s
                while time.monotonic() < end and not self._stop.is_set():
                    self._tick()
                    time.sleep(0.02)
                self.release.wait()  # stuck until the test lets go

            def _wake(self):
                self.release.set()

        return _Stuck(config)


def test_watchdog_pings_stop_when_the_reader_thread_is_stuck(tmp_path):
    import threading as _threading

    from monitor.config import parse
    from monitor.service.monitor import Monitor
    from rig import ListSink

    config = parse("""
[node]
name = "stuck"
[source]
kind = "tcp-server"
port = 5999
sample_rate = 1000.0
channels = ["x"]
""")
    sock = listen(tmp_path / "notify")
    notifier = Notifier({"NOTIFY_SOCKET": str(tmp_path / "notify"), "WATCHDOG_USEC": "100000"})
    source = StuckSource.make(config.source, run_s=1.0)
    source.open()
    monitor = Monitor(config, source, ListSink(), notifier=notifier, stall_s=0.5)
    stop = _threading.Event()
    runner = _threading.Thread(target=monitor.run, args=(stop,))
    started = time.monotonic()
    runner.start()
    pings = []
    while time.monotonic() - started < 3.0:
        try:
            if sock.recv(4096) == b"WATCHDOG=1":
                pings.append(time.monotonic() - started)
        except socket.timeout:
            pass
    stop.set()
    runner.join(5)
    source.close()
    # Pings while the thread went round (1 s), none once it had been silent
    # for the stall limit (0.5 s) - allow one read timeout of the loop.
    assert pings and pings[0] < 0.5
    assert max(pings) < 1.0 + 0.5 + 0.3
    assert not [p for p in pings if p > 2.0]
