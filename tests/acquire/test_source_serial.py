"""Serial source through real pseudo-terminals, opened with pyserial.

Frames follow the README's wire format. The far end of the
line is a real pty: os.openpty() where a plain line is enough, and socat's
pty pair (killed and restarted under the same link names) to unplug and
replug the device.
"""

import logging
import os
import subprocess
import time

import numpy as np
import pytest
import serial

from conftest import need_program
from monitor.config import SourceConfig
from monitor.acquire.decoders.frame import encode_frame
from monitor.acquire.sources import open_source

RATE = 1000.0
N = 8  # samples per channel per frame
UNPLUGS = 20


def serial_config(device: str) -> SourceConfig:
    return SourceConfig(
        kind="serial", sample_rate=RATE, channels=("x", "y"), unit="g", scale=(1.0, 1.0),
        format="frame", device=device, baud=921600,
    )


def frame_samples(value: int) -> np.ndarray:
    x = np.arange(N) + value
    return np.stack([x, -x], axis=1)


def wait_until(check, seconds: float) -> bool:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if check():
            return True
        time.sleep(0.01)
    return check()


def test_frames_written_on_a_pty_arrive_decoded():
    master, slave = os.openpty()
    path = os.ttyname(slave)
    os.close(slave)
    source = open_source(serial_config(path))
    source.open()
    try:
        assert wait_until(lambda: source.counters()["connects"] == 1, 2.0)
        sent = [frame_samples(100 * k) for k in range(50)]
        # Frame format (README, The sensor wire format); int16 values come back
        # exactly, in order, as one (n, C) array per channel pair.
        os.write(master, b"".join(encode_frame(s, seq=k) for k, s in enumerate(sent)))
        got = []
        deadline = time.monotonic() + 2.0
        while sum(len(b.samples) for b in got) < 50 * N and time.monotonic() < deadline:
            block = source.read(0.1)
            if block is not None:
                got.append(block)
        assert np.array_equal(np.concatenate([b.samples for b in got]), np.concatenate(sent))
        assert all(b.lost == 0 for b in got)
        assert source.counters()["bytes"] == sum(len(encode_frame(s, seq=k)) for k, s in enumerate(sent))
        # A quiet line is not an unplug: the port stays open.
        assert source.read(0.3) is None
        assert source.counters()["disconnects"] == 0
    finally:
        started = time.monotonic()
        source.close()
        closing = time.monotonic() - started
        os.close(master)
    assert closing < 1.0


def test_the_port_is_opened_exclusively():
    master, slave = os.openpty()
    path = os.ttyname(slave)
    os.close(slave)
    source = open_source(serial_config(path))
    source.open()
    try:
        assert wait_until(lambda: source.counters()["connects"] == 1, 2.0)
        # pyserial's API documentation, `exclusive`: "A port cannot be opened
        # in exclusive access mode if it is already open in exclusive access mode."
        with pytest.raises(serial.SerialException):
            serial.Serial(path, exclusive=True)
    finally:
        source.close()
        os.close(master)


class SocatLine:
    """A socat pty pair under fixed link names: `near` for the source,
    `far` for the test. Stopping it is an unplug; starting it, a replug."""

    def __init__(self, socat: str, tmp_path) -> None:
        self.socat = socat
        self.near = str(tmp_path / "near")
        self.far = str(tmp_path / "far")
        self.log = open(tmp_path / "socat.log", "ab")
        self.proc = None

    def start(self) -> None:
        self.proc = subprocess.Popen(
            [self.socat, "-d", "-d", f"pty,raw,echo=0,link={self.near}", f"pty,raw,echo=0,link={self.far}"],
            stdout=subprocess.DEVNULL, stderr=self.log,
        )
        assert wait_until(lambda: os.path.exists(self.near) and os.path.exists(self.far), 3.0), "socat made no ptys"

    def stop(self) -> None:
        if self.proc is not None:
            self.proc.terminate()
            self.proc.wait(3.0)
            self.proc = None
        wait_until(lambda: not os.path.lexists(self.near) and not os.path.lexists(self.far), 1.0)

    def close(self) -> None:
        self.stop()
        self.log.close()


def first_block_with(source, far: serial.Serial, value: int, seconds: float):
    """Write frames carrying `value` on the far end until the source yields
    one; return that block, or None when `seconds` pass first."""
    deadline = time.monotonic() + seconds
    seq = 0
    while time.monotonic() < deadline:
        far.write(encode_frame(frame_samples(value), seq=seq))
        seq += 1
        block = source.read(0.02)
        while block is not None:
            if block.samples[0, 0] == value:
                return block
            block = source.read(0.0)
    return None


def test_unplug_and_replug_twenty_times(tmp_path, caplog):
    caplog.set_level(logging.INFO, logger="bandwatch.sources")
    line = SocatLine(need_program("socat"), tmp_path)
    # The source starts before the device exists, as after a boot with the
    # sensor unplugged: it must keep trying, not fail.
    source = open_source(serial_config(line.near))
    source.open()
    far = None
    recoveries = []
    try:
        assert wait_until(lambda: any(r.levelno == logging.WARNING for r in caplog.records), 2.0)
        line.start()
        far = serial.Serial(line.far, timeout=0.1)
        first = first_block_with(source, far, 1000, 3.0)
        assert first is not None and first.lost == 0
        for k in range(1, UNPLUGS + 1):
            far.close()
            line.stop()
            line.start()
            back = time.monotonic()
            far = serial.Serial(line.far, timeout=0.1)
            block = first_block_with(source, far, 1000 + 10 * k, 3.0)
            recoveries.append(time.monotonic() - back)
            assert block is not None, f"no data {recoveries[-1]:.2f} s after replug {k}"
            # The first block after a break carries the outage as lost samples.
            assert block.lost >= 1
        counters = source.counters()
    finally:
        if far is not None:
            far.close()
        source.close()
        line.close()
    worst = max(recoveries)
    print(f"serial replug: worst recovery {worst:.3f} s, median {sorted(recoveries)[UNPLUGS // 2]:.3f} s")
    assert worst < 1.0, f"recoveries: {[round(r, 3) for r in recoveries]}"
    assert counters["connects"] == UNPLUGS + 1
    assert counters["disconnects"] == UNPLUGS
    # One warning per outage (the absent device at start, then each unplug),
    # however many reopen attempts each took.
    warnings = [r for r in caplog.records if r.name == "bandwatch.sources" and r.levelno == logging.WARNING]
    assert len(warnings) == UNPLUGS + 1
