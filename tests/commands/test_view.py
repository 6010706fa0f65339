"""`bandwatch view`: the pure renderer on made-up snapshots, then the real
command, piped and on a real pseudo-terminal (README, Live view)."""

import fcntl
import math
import os
import re
import select
import signal
import socket
import struct
import subprocess
import sys
import termios
import time
from pathlib import Path

import pytest

from monitor.commands.view import Pacer, ViewSink
from monitor.commands.view_render import (
    BandRow,
    ChannelRow,
    EventRow,
    HealthRow,
    Snapshot,
    bar,
    next_limit,
    plain_line,
    render,
    share_of_limit,
)

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - old Pythons only
    import tomli as tomllib

ROOT = Path(__file__).resolve().parents[2]
DEMO = (ROOT / "config" / "demo.toml").read_text(encoding="utf-8")
DEMO_TOML = tomllib.loads(DEMO)

# ECMA-48 control sequences: CSI H (cursor position, home), CSI K (erase in
# line), CSI J (erase in display); CSI ? 25 l / h is DECTCEM, the VT220 cursor
# hide / show (from memory); CSI ... m is SGR (colour).
ESC = "\x1b"
HOME, CLEAR_EOL, CLEAR_EOS = "\x1b[H", "\x1b[K", "\x1b[J"
HIDE_CURSOR, SHOW_CURSOR = "\x1b[?25l", "\x1b[?25h"
CSI_RE = re.compile(r"\x1b\[[0-9;?]*[A-Za-z]")
LEVEL_WORDS = ("normal", "warning", "alarm")


def visible(text: str) -> str:
    return CSI_RE.sub("", text)


# ---------------------------------------------------------------------------
# the bar and the share column, worked by hand from the README's rule (a
# choice of this project): the bar is value / top limit (alarm, or warning
# without alarm) in cells rounded to the nearest cell, the last cell '>' past
# the top limit; the share is the value over the next limit up.


def test_bar_with_both_limits():
    # Limits 2.8 / 4.5 mm/s (ISO 10816-3 group 2, rigid: B/C and C/D, from
    # memory). value 2.0: 2.0 / 4.5 * 42 = 18.67 -> 19 cells filled.
    assert bar(2.0, 2.8, 4.5, 42) == "=" * 19 + " " * 23


def test_bar_past_the_top_limit_is_full_and_says_so():
    assert bar(7.0, 2.8, 4.5, 42) == "=" * 41 + ">"
    # Exactly at the limit: full, not past it.
    assert bar(4.5, 2.8, 4.5, 10) == "=" * 10


def test_bar_with_warning_only():
    # 1.0 / 2.0 * 32 = 16 cells
    assert bar(1.0, 2.0, None, 32) == "=" * 16 + " " * 16


def test_bar_without_a_value_or_limits_is_blank_and_has_no_marks():
    assert bar(None, None, 1.0, 20) == " " * 20
    assert bar(3.0, None, None, 20) == " " * 20
    # No letters anywhere in a bar: it is a plain proportion.
    assert set(bar(3.0, 2.8, 4.5, 30)) <= {"=", " ", ">"}


def test_share_of_the_next_limit():
    assert share_of_limit(2.0, 2.8, 4.5) == "0.71 warning"  # 2.0 / 2.8 = 0.714
    assert share_of_limit(3.2, 2.8, 4.5) == "0.71 alarm"  # past warning: 3.2 / 4.5 = 0.711
    assert share_of_limit(9.0, 2.8, 4.5) == "2.00 alarm"  # past both: the top limit
    assert share_of_limit(0.01, 0.05, None) == "0.20 warning"
    assert share_of_limit(None, 2.8, 4.5) == "-"
    assert share_of_limit(1.0, None, None) == "-"
    assert next_limit(3.0, None, 4.5) == ("alarm", 4.5)


# ---------------------------------------------------------------------------
# the screen from a hand-made snapshot


def snapshot(**changes) -> Snapshot:
    snap = Snapshot(
        node="pump-2",
        source="tcp-client 192.0.2.7:5600",
        sample_rate=10240.0,
        channels=["x", "y"],
        stream_s=312.44,
        results_per_s=5.0,
        speed_hz=49.3,
        speed_mode="tracked",
        counters=[("samples", 3199488), ("lost", 0), ("frames", 12498), ("corrupt", 2), ("gaps", 0),
                  ("reconnects", 1), ("overflows", 0)],
        bands=[
            BandRow("overall", "x", 3.2, "mm/s", "warning", 2.8, 4.5),
            BandRow("overall", "y", 1.1, "mm/s", "normal", 2.8, 4.5),
            BandRow("1x", "x", 5.0, "mm/s", "alarm", 2.0, 3.5),
            BandRow("bearing-outer-race-drive-end", "y", 0.02, "g", "normal", 0.05, None),
        ],
        channel_rows=[
            ChannelRow("x", "g", 49.31, 0.071, 3.2, 0.09, 0.31, 3.4),
            ChannelRow("y", "g", 98.6, 0.02, 1.1, 0.03, 0.1, 3.3),
        ],
        health=[HealthRow("corrupt", None, "fault", 0.02, "share")],
        events=[
            EventRow("10:41:07", 301.2, "overall", "x", "normal", "warning", 2.9, "mm/s"),
            EventRow("10:41:09", 303.6, "1x", "x", "warning", "alarm", 3.6, "mm/s"),
            EventRow("10:41:10", 304.0, "corrupt", None, "normal", "fault", 0.02, "share"),
        ],
    )
    for key, value in changes.items():
        setattr(snap, key, value)
    return snap


def band_line(lines, name, channel):
    found = [ln for ln in lines if re.match(rf"{re.escape(name)}\s+{re.escape(channel)}\s", ln)]
    assert len(found) == 1, lines
    return found[0]


def test_render_shows_everything_asked_for():
    lines = render(snapshot(), 100)
    text = "\n".join(lines)
    for word in ("pump-2", "tcp-client 192.0.2.7:5600", "10240 Hz", "x, y", "312.4 s", "5.0 results/s",
                 "2958 rpm", "49.30 Hz", "tracked", "samples 3199488", "lost 0", "frames 12498", "corrupt 2",
                 "gaps 0", "reconnects 1", "overflows 0"):
        assert word in text, word
    # 49.3 Hz is 2958 rpm: rpm = Hz * 60 (common practice).
    assert "3.20 mm/s" in band_line(lines, "overall", "x")
    assert band_line(lines, "overall", "x").endswith("warning")
    assert band_line(lines, "1x", "x").endswith("alarm")
    assert re.search(r"^x\s+49\.3\s+0\.071\s+3\.20\s+0\.09\s+0\.31\s+3\.40$", text, re.M)
    assert re.search(r"health: corrupt fault \(0\.02 share\)", text)
    assert re.search(r"10:41:09\s+303\.6 s\s+1x/x\s+warning -> alarm\s+3\.60 mm/s", text)


def test_band_rows_show_value_limits_share_and_a_plain_bar():
    lines = render(snapshot(), 100)
    for prefix, channel, value, warning, alarm, share in (
            ("overall", "x", 3.2, 2.8, 4.5, "0.71 alarm"), ("1x", "x", 5.0, 2.0, 3.5, "1.43 alarm"),
            ("bearing-out", "y", 0.02, 0.05, None, "0.40 warning")):
        line = next(ln for ln in lines if ln.startswith(prefix) and re.search(rf"\s{channel}\s", ln))
        assert share in line, line
        cells = line[line.index("|") + 1 : line.rindex("|")]
        n = len(cells)
        assert n >= 8
        # The README's rule, worked here independently of the module.
        top = alarm if alarm is not None else warning
        filled = min(n, math.floor(value / top * n + 0.5))
        expected = "=" * filled + " " * (n - filled)
        if value > top:
            expected = expected[:-1] + ">"
        assert cells == expected, (line, expected)


def test_render_at_80_columns_keeps_numbers_bar_and_level_words():
    for colour in (False, True):
        lines = render(snapshot(), 80, colour=colour)
        assert all(len(visible(ln)) <= 80 for ln in lines), [ln for ln in lines if len(visible(ln)) > 80]
        plain = [visible(ln) for ln in lines]
        row = band_line(plain, "overall", "x")
        assert row.endswith("warning") and "|" in row
        assert re.search(r"3\.20 mm/s\s+2\.80\s+4\.50\s+0\.71 alarm", row), row
        long_row = next(ln for ln in plain if ln.startswith("bearing-out"))
        assert long_row.endswith("normal") and "bearing-outer-race-drive-end" not in long_row


def test_render_fits_width_60_and_keeps_the_level_words():
    for colour in (False, True):
        lines = render(snapshot(), 60, colour=colour)
        assert all(len(visible(ln)) <= 60 for ln in lines), [ln for ln in lines if len(visible(ln)) > 60]
        plain = [visible(ln) for ln in lines]
        # Too narrow for the bar: the numbers stay, the row ends with its level word.
        assert band_line(plain, "overall", "x").endswith("warning")
        row = next(ln for ln in plain if ln.startswith("bearing-out"))
        assert row.endswith("normal") and "bearing-outer-race-drive-end" not in row
    # Narrower than a band row: cut, never wrapped.
    assert all(len(ln) <= 25 for ln in render(snapshot(), 25))


def test_plain_mode_has_no_escape_codes():
    snap = snapshot()
    assert not any(ESC in ln for ln in render(snap, 100, colour=False))
    line = plain_line(snap)
    assert ESC not in line and "\n" not in line
    assert "overall/x 3.20 mm/s warning" in line
    assert "1x/x 5.00 mm/s alarm" in line
    assert "health: corrupt fault" in line


def test_colour_never_carries_meaning_alone():
    snap = snapshot()
    coloured = render(snap, 100, colour=True)
    assert any("\x1b[" in ln and "m" in ln for ln in coloured)
    # Taking every SGR code away leaves exactly the plain screen.
    assert [visible(ln) for ln in coloured] == render(snap, 100, colour=False)


def test_waiting_snapshot_renders():
    snap = snapshot(bands=[BandRow("overall", "x", None, "mm/s", "normal", 2.8, 4.5)],
                    channel_rows=[ChannelRow("x", "g")], health=[], events=[], results_per_s=None,
                    speed_hz=None, note="waiting for the first result")
    text = "\n".join(render(snap, 80))
    assert "waiting for the first result" in text
    assert re.search(r"^overall\s+x\s+- mm/s\s+2\.80\s+4\.50\s+-\s+\| +\|\s+normal$", text, re.M)
    assert "health: all checks normal" in text and "events: none yet" in text
    assert plain_line(snap).startswith("stream 312.4 s | speed - | overall/x - mm/s normal")


def test_refresh_runs_at_most_every_interval():
    """A loop turn per block costs a clock reading; the redraw runs at most
    every 0.5 s of (here, fake) wall time."""
    now = [0.0]
    calls = []
    pacer = Pacer(0.5, clock=lambda: now[0])
    for _ in range(1000):  # 1000 blocks, 10 ms apart: 10 s
        if pacer.due():
            calls.append(now[0])
        now[0] += 0.01
    assert len(calls) == 20
    assert all(b - a >= 0.5 - 1e-9 for a, b in zip(calls, calls[1:]))


def test_sink_keeps_the_last_events():
    sink = ViewSink()
    for i in range(7):
        sink.send("event", {"id": i})
    sink.send("levels", {"id": 99})
    assert [p["id"] for p in sink.events] == [2, 3, 4, 5, 6]  # the last 5


# ---------------------------------------------------------------------------
# the real command


def child_env(**extra) -> dict:
    env = dict(os.environ)
    for name in ("NOTIFY_SOCKET", "WATCHDOG_USEC", "WATCHDOG_PID", "NO_COLOR", "COLUMNS", "LINES"):
        env.pop(name, None)
    env["PYTHONPATH"] = str(ROOT) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    env["PYTHONUNBUFFERED"] = "1"
    env.update(extra)
    return env


def demo_copy(tmp_path: Path, **source) -> Path:
    text = DEMO
    for key, value in source.items():
        text, count = re.subn(rf"^{key} = .*$", f"{key} = {value}", text, flags=re.M)
        assert count == 1, key
    path = tmp_path / "demo.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_view_piped_writes_plain_lines_and_shows_the_fault_growing(tmp_path):
    config = demo_copy(tmp_path, realtime="false", sim_seconds="30.0")
    result = subprocess.run([sys.executable, "-m", "monitor", "view", "-c", str(config)], cwd=str(ROOT),
                            env=child_env(TERM="xterm"), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, timeout=60)
    assert result.returncode == 0, result.stderr
    assert ESC not in result.stdout
    lines = result.stdout.splitlines()
    assert lines and all(ln.startswith("stream ") for ln in lines), lines
    last = lines[-1]
    assert last.startswith("stream 30.0 s")
    assert "source ended" in last
    rows = dict(re.findall(r"(\S+/\S+) \S+ \S+ (normal|warning|alarm)", last))
    names = {b["name"] for b in DEMO_TOML["band"]}
    assert {key.split("/")[0] for key in rows} == names
    # The demo's 1x grows by sim_growth g peak per minute. The last result
    # averages frames centred about 29 s: peak a = h1 + growth * 29 / 60 g.
    # As velocity at f = rpm / 60 (common practice): v = a * g_n / (2 pi f)
    # (analytic), RMS = peak / sqrt(2); g_n = 9.80665 m/s2 (ISO 80000-3).
    src = DEMO_TOML["source"]
    a = src["sim_harmonics"][0] + src["sim_growth"] * 29.0 / 60.0
    f = DEMO_TOML["speed"]["rpm"] / 60.0
    expected = a * 9.80665 / (2 * math.pi * f) / math.sqrt(2) * 1000.0  # mm/s, about 3.06
    one_x = next(b for b in DEMO_TOML["band"] if b["name"] == "1x")
    assert one_x["warning"] < expected < one_x["alarm"]
    value = float(re.search(r"1x/x (\S+) mm/s", last).group(1))
    assert value == pytest.approx(expected, rel=0.03)
    assert rows["1x/x"] == "warning"  # raised: it crossed warning near 15 s, long before the end


def test_view_piped_ends_on_sigterm_with_exit_0(tmp_path):
    config = demo_copy(tmp_path)  # realtime, runs until stopped
    proc = subprocess.Popen([sys.executable, "-m", "monitor", "view", "-c", str(config)], cwd=str(ROOT),
                            env=child_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        first = proc.stdout.readline()  # the first plain line, written at once
        assert first.startswith("stream "), first
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=20)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0, err
    assert ESC not in first + out
    assert out.splitlines()[-1].endswith("stopped")


class PtyRun:
    """`bandwatch view` with stdout on a real pseudo-terminal of 100 x 40;
    logs go to a file so the screen holds only what the view drew."""

    def __init__(self, config: Path, tmp_path: Path, **env) -> None:
        master, slave = os.openpty()
        fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 40, 100, 0, 0))
        self.master = master
        self.log = open(tmp_path / "stderr.txt", "w+")
        self.proc = subprocess.Popen([sys.executable, "-m", "monitor", "view", "-c", str(config)],
                                     cwd=str(ROOT), env=child_env(**env), stdin=slave, stdout=slave,
                                     stderr=self.log)
        os.close(slave)
        self.data = b""

    def read(self, timeout: float) -> bool:
        """Read what is there within `timeout`; False at end of output."""
        ready, _, _ = select.select([self.master], [], [], timeout)
        if not ready:
            return True
        try:
            chunk = os.read(self.master, 65536)
        except OSError:  # EIO: every writer of the terminal is gone (Linux)
            return False
        self.data += chunk
        return bool(chunk)

    def read_until(self, done, seconds: float) -> None:
        deadline = time.monotonic() + seconds
        while time.monotonic() < deadline and not done():
            if not self.read(0.1):
                break

    def finish(self, seconds: float = 20.0) -> int:
        deadline = time.monotonic() + seconds
        while time.monotonic() < deadline and self.read(0.2):
            pass
        return self.proc.wait(timeout=max(1.0, deadline - time.monotonic()))

    @property
    def text(self) -> str:
        return self.data.decode("utf-8", errors="replace")

    def last_frame(self) -> str:
        """The last frame drawn whole: from cursor home to erase-below."""
        whole = [part for part in self.text.split(HOME) if CLEAR_EOS in part]
        return visible(whole[-1].split(CLEAR_EOS)[0]).replace("\r\n", "\n") if whole else ""

    def close(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait()
        os.close(self.master)
        self.log.close()


def test_view_on_a_terminal_redraws_in_place_and_restores_it_on_sigint(tmp_path):
    config = demo_copy(tmp_path)  # realtime: paced like a live sensor
    run = PtyRun(config, tmp_path, TERM="xterm")
    try:
        # About 3 s: the first result needs 2 s of signal, then a redraw.
        run.read_until(lambda: run.text.count(CLEAR_EOS) >= 3 and "results/s" in run.last_frame()
                       and "waiting" not in run.last_frame(), 15.0)
        frame = run.last_frame()
        assert run.proc.poll() is None, run.text
        run.proc.send_signal(signal.SIGINT)
        code = run.finish()
        text = run.text
    finally:
        run.close()
    assert code == 0, (tmp_path / "stderr.txt").read_text()
    assert text.startswith(HIDE_CURSOR)
    assert text.count(HOME) >= 3  # redrawn in place, not scrolled
    assert CLEAR_EOL in text and CLEAR_EOS in text
    assert re.search(r"\x1b\[[0-9;]*m", text)  # colour on an xterm without NO_COLOR
    for band in DEMO_TOML["band"]:
        assert re.search(rf"^{re.escape(band['name'])}\s+x\s+[0-9.]+ \S+\s+[0-9.]+\s+[0-9.]+\s+[0-9.]+ "
                         r"(warning|alarm)\s+\|[= >]+\|\s+(normal|warning|alarm)$",
                         frame, re.M), frame
    assert "demo-fan" in frame and "results/s" in frame and "waiting" not in frame
    # Every line fits the 100 columns, with one to spare.
    assert all(len(ln) <= 99 for ln in frame.split("\n"))
    # The end: the cursor shown again, then a newline (the terminal's ONLCR
    # output mode turns "\n" into "\r\n", POSIX termios).
    assert text.rstrip("\r\n").endswith(SHOW_CURSOR) and text.endswith("\r\n")
    assert "stopped" in run.last_frame()


def test_view_on_a_terminal_ends_with_a_finite_source(tmp_path):
    config = demo_copy(tmp_path, realtime="false", sim_seconds="30.0")
    run = PtyRun(config, tmp_path, TERM="xterm", NO_COLOR="1")
    try:
        code = run.finish()
        text = run.text
    finally:
        run.close()
    assert code == 0, (tmp_path / "stderr.txt").read_text()
    assert HOME in text and text.rstrip("\r\n").endswith(SHOW_CURSOR)
    # NO_COLOR (no-color.org): in-place redraw stays, colour goes.
    assert not re.search(r"\x1b\[[0-9;]*m", text)
    frame = run.last_frame()
    assert "source ended" in frame
    assert re.search(r"^1x\s+x\s+\S+ mm/s\s.*\|[= >]+\|\s+warning$", frame, re.M), frame


def test_view_on_a_dumb_terminal_writes_plain_lines(tmp_path):
    config = demo_copy(tmp_path, realtime="false", sim_seconds="5.0")
    run = PtyRun(config, tmp_path, TERM="dumb")
    try:
        code = run.finish()
        text = run.text
    finally:
        run.close()
    assert code == 0, (tmp_path / "stderr.txt").read_text()
    assert ESC not in text
    assert text.splitlines()[-1].startswith("stream 5.0 s")


def test_view_never_touches_the_broker_or_the_state_directory(tmp_path):
    """With [mqtt], the view still publishes nothing and writes nothing to
    queue_dir; it reads the baselines a service learned there."""
    from monitor.judge.baseline import BaselineStore

    state = tmp_path / "state"
    # A "broker": a real listening socket on loopback that must see no connection.
    broker = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    broker.bind(("127.0.0.1", 0))
    broker.listen(4)
    broker.setblocking(False)
    text = demo_copy(tmp_path, realtime="false", sim_seconds="30.0").read_text(encoding="utf-8")
    # 1x learns its typical value over 4 s; warning at 1.5x, alarm at 2x of it.
    text, count = re.subn(r"^warning = 2\.0\nalarm = 3\.5$", "baseline = 4.0\nwarning_ratio = 1.5\nalarm_ratio = 2.0",
                          text, flags=re.M)
    assert count == 1
    port = broker.getsockname()[1]
    config = tmp_path / "mqtt.toml"
    config.write_text(text + f'\n[mqtt]\nhost = "127.0.0.1"\nport = {port}\nqueue_dir = "{state}"\n',
                      encoding="utf-8")

    def view_last_line():
        result = subprocess.run([sys.executable, "-m", "monitor", "view", "-c", str(config)], cwd=str(ROOT),
                                env=child_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                timeout=60)
        assert result.returncode == 0, result.stderr
        lines = result.stdout.splitlines()
        return lines[0], lines[-1]

    try:
        # Nothing learned yet: the view learns in memory (about 1.1 mm/s in the
        # first seconds, by the physics of the piped test above), so alarm at
        # about 2.2 mm/s is crossed long before 30 s.
        first, last = view_last_line()
        assert "1x/x - mm/s normal (learning baseline)" in first
        assert re.search(r"1x/x \S+ mm/s alarm \|", last), last
        assert not state.exists() or list(state.iterdir()) == []
        # A service learned 10 mm/s: limits at 15 and 20 mm/s, far above 3 mm/s.
        BaselineStore(str(state)).put("1x/x", 10.0, 4.0, 4.0)
        before = {p.name: p.read_bytes() for p in state.iterdir()}
        first, last = view_last_line()
        assert "learning" not in first.split("1x/x")[1].split("|")[0]
        assert re.search(r"1x/x \S+ mm/s normal \|", last), last
        assert {p.name: p.read_bytes() for p in state.iterdir()} == before
        with pytest.raises(BlockingIOError):
            broker.accept()
    finally:
        broker.close()
