"""UDP source against real datagrams on loopback.

Frames follow the README's wire format: over UDP each datagram holds one or
more whole frames.
"""

import socket
import struct
import time
import zlib

import numpy as np
import pytest

from monitor.config import SourceConfig
from monitor.acquire.decoders.frame import encode_frame
from monitor.errors import SourceError
from monitor.acquire.sources import open_source

RATE = 1000.0
N = 16


def udp_config(port: int = 0, format: str = "frame") -> SourceConfig:
    return SourceConfig(
        kind="udp", sample_rate=RATE, channels=("x", "y"), unit="g", scale=(1.0, 1.0),
        format=format, host="127.0.0.1", port=port,
    )


def frame_samples(value: int) -> np.ndarray:
    x = np.arange(N) + value
    return np.stack([x, 2 * x], axis=1)


def collect(source, samples: int, seconds: float = 2.0) -> list:
    blocks = []
    deadline = time.monotonic() + seconds
    while sum(len(b.samples) for b in blocks) < samples and time.monotonic() < deadline:
        block = source.read(0.05)
        if block is not None:
            blocks.append(block)
    return blocks


def wait_until(check, seconds: float) -> bool:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if check():
            return True
        time.sleep(0.01)
    return check()


@pytest.fixture
def udp():
    """An open UDP source and a function that sends it one datagram."""
    source = open_source(udp_config())
    source.open()
    sender = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)

    def send(datagram: bytes) -> None:
        sender.sendto(datagram, source.address)

    yield source, send
    started = time.monotonic()
    source.close()
    assert time.monotonic() - started < 1.0
    sender.close()


def handmade_frame(samples: np.ndarray, seq: int, timestamp_us: int) -> bytes:
    """A frame built field by field from the table in the README's wire format,
    independently of the project's encoder: int16 samples, timestamp present,
    CRC-32 as zlib.crc32 computes it over version..last sample."""
    n, channels = samples.shape
    body = struct.pack("<BBBBHIQ", 1, 1, channels, 0x01, n, seq, timestamp_us)
    body += samples.astype("<i2").tobytes()  # interleaved by instant: row-major (n, C)
    return b"\xa7\x4d" + body + struct.pack("<I", zlib.crc32(body))


def test_several_frames_per_datagram(udp):
    source, send = udp
    send(b"".join(encode_frame(frame_samples(100 * k), seq=k) for k in range(3)))
    stamp = 1_700_000_000_000_000  # 2023-11-14T22:13:20Z in microseconds since the epoch
    send(handmade_frame(frame_samples(300), 3, stamp) + encode_frame(frame_samples(400), seq=4))
    blocks = collect(source, 5 * N)
    got = np.concatenate([b.samples for b in blocks])
    assert np.array_equal(got, np.concatenate([frame_samples(100 * k) for k in range(5)]))
    assert [b.lost for b in blocks] == [0] * len(blocks)
    counters = source.counters()
    assert (counters["datagrams"], counters["frames"], counters["corrupt_frames"]) == (2, 5, 0)
    # A block carries the timestamp of its first frame (offset 12 of the
    # handmade frame); the first datagram's frames had none.
    assert (blocks[0].timestamp_us, blocks[-1].timestamp_us) == (None, stamp)


def test_garbage_datagrams_are_counted_and_skipped(udp):
    source, send = udp
    garbage = b"not a frame, just noise on the port " * 4
    send(encode_frame(frame_samples(0), seq=0))
    send(garbage)
    send(encode_frame(frame_samples(100), seq=1))
    blocks = collect(source, 2 * N)
    got = np.concatenate([b.samples for b in blocks])
    assert np.array_equal(got, np.concatenate([frame_samples(0), frame_samples(100)]))
    # The garbage broke no sequence: frames 0 and 1 are consecutive.
    assert [b.lost for b in blocks] == [0] * len(blocks)
    assert source.counters()["corrupt_bytes"] == len(garbage)


def test_a_truncated_frame_is_dropped_without_harming_the_next_datagram(udp):
    source, send = udp
    whole = encode_frame(frame_samples(0), seq=0)
    cut = encode_frame(frame_samples(100), seq=1)
    send(whole + cut[: len(cut) - 10])
    assert collect(source, N)[0].samples.shape == (N, 2)
    assert wait_until(lambda: source.counters()["truncated"] == 1, 1.0)
    send(encode_frame(frame_samples(200), seq=2))
    blocks = collect(source, N, seconds=1.0)
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), frame_samples(200))
    # The truncated frame's samples are a gap of exactly one frame (its
    # sequence number never arrived whole), so no spectrum spans it.
    assert blocks[0].lost == N
    assert source.counters()["corrupt_frames"] >= 1


def test_a_lost_datagram_is_a_gap(udp):
    source, send = udp
    send(encode_frame(frame_samples(0), seq=10))
    send(encode_frame(frame_samples(100), seq=13))  # 11 and 12 never came
    blocks = collect(source, 2 * N)
    assert [b.lost for b in blocks] == [0, 2 * N]


def test_csv_lines_end_with_their_datagram():
    source = open_source(udp_config(format="csv"))
    source.open()
    sender = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    try:
        sender.sendto(b"1,2", source.address)  # no newline: the datagram ends the line
        sender.sendto(b"3,4\n5,6", source.address)
        blocks = collect(source, 3)
        assert np.array_equal(np.concatenate([b.samples for b in blocks]), [[1, 2], [3, 4], [5, 6]])
        assert source.counters()["corrupt_frames"] == 0
    finally:
        source.close()
        sender.close()


def test_a_port_in_use_is_a_clear_error():
    taken = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    taken.bind(("127.0.0.1", 0))
    port = taken.getsockname()[1]
    source = open_source(udp_config(port))
    try:
        with pytest.raises(SourceError, match=f"127.0.0.1:{port}"):
            source.open()
    finally:
        taken.close()
