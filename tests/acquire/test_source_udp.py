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
from sockets import wait_until

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


def test_a_datagram_of_nested_false_headers_does_not_stall_measuring(udp):
    # 64.8 KB of overlapping headers in range, a sync every 8 bytes, each
    # claiming a 262 KB frame (16 float32 channels of 4096 samples), then one
    # good frame, all in one datagram. Its samples must come out at once, not
    # after the reader has spent seconds on the false headers.
    source, send = udp
    good = encode_frame(frame_samples(7), seq=0)
    junk = b"\xa7\x4d\x01\x03\x10\x00\x00\x10" * ((64_800 - len(good)) // 8)
    send(junk + good)
    blocks = collect(source, N, seconds=1.0)
    assert blocks, "no samples within 1 s of sending"
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), frame_samples(7))
    counters = source.counters()
    assert counters["corrupt_frames"] == len(junk) // 8
    assert counters["corrupt_bytes"] == len(junk)
    assert counters["truncated"] == 0
    # Measuring goes on: the next datagrams come through in order, no gap.
    for seq in (1, 2):
        send(encode_frame(frame_samples(100 * seq), seq=seq))
    blocks = collect(source, 2 * N, seconds=1.0)
    assert np.array_equal(np.concatenate([b.samples for b in blocks]),
                          np.concatenate([frame_samples(100), frame_samples(200)]))
    assert [b.lost for b in blocks] == [0] * len(blocks)


def test_a_lost_datagram_is_a_gap(udp):
    source, send = udp
    send(encode_frame(frame_samples(0), seq=10))
    send(encode_frame(frame_samples(100), seq=13))  # 11 and 12 never came
    blocks = collect(source, 2 * N)
    assert [b.lost for b in blocks] == [0, 2 * N]


def test_a_jump_far_beyond_the_wall_clock_is_a_restart_not_a_billion_lost_samples(udp):
    source, send = udp
    started = time.monotonic()
    send(encode_frame(frame_samples(0), seq=10))
    assert collect(source, N)
    send(encode_frame(frame_samples(100), seq=1_000_000_000))  # the sender started afresh
    send(encode_frame(frame_samples(200), seq=1_000_000_001))
    blocks = collect(source, 2 * N)
    wall = time.monotonic() - started
    assert np.array_equal(np.concatenate([b.samples for b in blocks]),
                          np.concatenate([frame_samples(100), frame_samples(200)]))
    # A break (no spectrum spans it) of no more samples than the wall time
    # that passed, not (1e9 - 11) frames of 16 samples. The clock's measure
    # is rounded and at least 1 (the stream source's rule): the exchange can
    # take under one sample's time.
    assert 1 <= blocks[0].lost <= max(1, round(wall * RATE))
    assert sum(b.lost for b in blocks) == blocks[0].lost
    counters = source.counters()
    assert (counters["restarts"], counters["gaps"], counters["lost_samples"]) == (1, 0, 0)


def test_a_backward_jump_is_a_restart_and_tracking_starts_again(udp):
    source, send = udp
    started = time.monotonic()
    for seq in (500, 501):
        send(encode_frame(frame_samples(seq), seq=seq))
    assert len(collect(source, 2 * N)) >= 1
    for seq in (0, 1, 3):  # rebooted: counts from 0 again; 2 is lost
        send(encode_frame(frame_samples(seq), seq=seq))
    blocks = collect(source, 3 * N)
    wall = time.monotonic() - started
    assert np.array_equal(np.concatenate([b.samples for b in blocks]),
                          np.concatenate([frame_samples(0), frame_samples(1), frame_samples(3)]))
    assert 1 <= blocks[0].lost <= max(1, round(wall * RATE))  # as above
    # Frame 2 is missing, measured by the restarted sequence: a loss of N
    # just before frame 3's samples (sample 2N), none elsewhere after the
    # restart (frames 0 and 1 may come as one batch or two).
    starts = np.cumsum([0] + [b.samples.shape[0] for b in blocks[:-1]])
    assert {int(at): b.lost for at, b in zip(starts[1:], blocks[1:]) if b.lost} == {2 * N: N}
    assert 2 * N in starts
    counters = source.counters()
    assert (counters["restarts"], counters["gaps"], counters["lost_samples"]) == (1, 1, N)


def test_sequence_jumps_may_not_carry_stream_time_past_the_wall_clock(udp):
    # At 1000 samples/s: a jump of 1.5 s of samples right after the last
    # frame fits the 2 s allowance and counts exactly; a further jump of 3 s
    # at once would put stream time 4.5 s ahead of the wall clock, so it is a
    # restart, and what it lost is measured from the clock.
    source, send = udp
    started = time.monotonic()
    send(encode_frame(frame_samples(0), seq=0))
    assert collect(source, N)
    send(encode_frame(frame_samples(1), seq=94))  # 93 frames of 16 missing: 1.488 s
    send(encode_frame(frame_samples(2), seq=94 + 188))  # 187 more: 2.992 s
    blocks = collect(source, 2 * N)
    wall = time.monotonic() - started
    assert [len(b.samples) for b in blocks] == [N, N]
    assert blocks[0].lost == 93 * N
    # The clock's measure, rounded and at least 1 (the stream source's rule):
    # the whole exchange can take under one sample's time.
    assert 1 <= blocks[1].lost <= max(1, round(wall * RATE))
    counters = source.counters()
    assert (counters["gaps"], counters["lost_samples"], counters["restarts"]) == (1, 93 * N, 1)
    # Stream time (samples and lost samples) stays within the allowance.
    assert 3 * N + blocks[0].lost + blocks[1].lost <= (wall + 2.0) * RATE


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


def test_a_flood_drops_the_oldest_blocks_and_counts_every_sample(udp):
    # UDP cannot push back: with nothing read, the queue (2 s of samples)
    # keeps the newest blocks and reports the dropped ones as lost.
    source, send = udp
    count = 400
    for k in range(count):
        send(encode_frame(frame_samples(k), seq=k))
    assert wait_until(lambda: source.counters()["frames"] == count, 5.0)
    assert source.queued <= source.queue_limit
    assert source.counters()["overflows"] > 0 and source.counters()["paused"] == 0
    blocks = []
    block = source.read(0.0)
    while block is not None:
        blocks.append(block)
        block = source.read(0.0)
    assert sum(len(b.samples) + b.lost for b in blocks) == count * N
    assert np.array_equal(blocks[-1].samples[-1], frame_samples(count - 1)[-1])
