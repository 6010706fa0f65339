"""TCP sources against real sockets on loopback.

The peer in each test is a plain standard-library socket speaking the frame
format of the README (The sensor wire format). A reset is a close with SO_LINGER on and a
linger time of 0, which makes the kernel abort the connection with RST
instead of FIN (common practice); a half-open peer is one that simply stops
sending.
"""

import logging
import os
import socket
import threading
import time

import numpy as np
import pytest

from monitor.config import SourceConfig
from monitor.acquire.decoders.frame import encode_frame
from monitor.errors import SourceError
from monitor.acquire.sources import open_source
from sockets import listener, reset, wait_until

RATE = 10240.0
N = 32  # samples per channel per frame


def tcp_config(kind: str, port: int) -> SourceConfig:
    return SourceConfig(
        kind=kind, sample_rate=RATE, channels=("x", "y"), unit="g", scale=(1.0, 1.0),
        format="frame", host="127.0.0.1", port=port,
    )


def frame_samples(value: int, n: int = N) -> np.ndarray:
    x = (np.arange(n) + value) % 30000
    return np.stack([x, -x], axis=1)


def frames(value: int, count: int, seq: int = 0) -> bytes:
    return b"".join(encode_frame(frame_samples(value + k * N), seq=seq + k) for k in range(count))


def expected(value: int, count: int) -> np.ndarray:
    return np.concatenate([frame_samples(value + k * N) for k in range(count)])


def collect(source, samples: int, seconds: float = 2.0) -> list:
    """Blocks until `samples` samples per channel have arrived (or time runs out)."""
    blocks = []
    deadline = time.monotonic() + seconds
    while sum(len(b.samples) for b in blocks) < samples and time.monotonic() < deadline:
        block = source.read(0.05)
        if block is not None:
            blocks.append(block)
    return blocks


@pytest.fixture
def closing():
    """Sources to close at the end; checks that each closes within a second."""
    sources = []
    yield sources.append
    for source in sources:
        started = time.monotonic()
        source.close()
        assert time.monotonic() - started < 1.0


# ----------------------------------------------------------------- client


def test_client_receives_frames(closing):
    server = listener()
    source = open_source(tcp_config("tcp-client", server.getsockname()[1]))
    source.open()
    closing(source)
    peer, _ = server.accept()
    peer.sendall(frames(0, 40))
    blocks = collect(source, 40 * N)
    # Frame format (README, The sensor wire format): the int16 samples come back exactly.
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), expected(0, 40))
    assert [b.lost for b in blocks] == [0] * len(blocks)
    counters = source.counters()
    # The health checks read these names (link and decoder counters).
    assert set(counters) >= {
        "connects", "disconnects", "bytes", "overflows", "frames", "corrupt_frames",
        "corrupt_bytes", "gaps", "lost_samples", "mismatched", "nonfinite",
    }
    assert (counters["connects"], counters["disconnects"], counters["overflows"]) == (1, 0, 0)
    assert counters["bytes"] == len(frames(0, 40))
    assert counters["frames"] == 40
    peer.close()
    server.close()


def test_client_reconnects_after_a_peer_reset(closing):
    server = listener()
    source = open_source(tcp_config("tcp-client", server.getsockname()[1]))
    source.open()
    closing(source)
    peer, _ = server.accept()
    peer.sendall(frames(0, 10))
    assert len(collect(source, 10 * N)) > 0
    reset(peer)
    peer, _ = server.accept()  # the source dials again
    peer.sendall(frames(5000, 10))
    blocks = collect(source, 10 * N)
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), expected(5000, 10))
    # No FFT frame may span the break: the first block after it reports a gap.
    assert blocks[0].lost >= 1
    counters = source.counters()
    assert (counters["connects"], counters["disconnects"]) == (2, 1)
    peer.close()
    server.close()


def test_client_reconnects_when_the_server_restarts_on_the_same_port(closing, caplog):
    caplog.set_level(logging.DEBUG, logger="bandwatch.sources")
    server = listener()
    port = server.getsockname()[1]
    source = open_source(tcp_config("tcp-client", port))
    source.open()
    closing(source)
    peer, _ = server.accept()
    peer.sendall(frames(0, 10))
    collect(source, 10 * N)
    peer.close()
    server.close()
    # Down long enough for a few refused dials.
    assert wait_until(lambda: source.counters()["disconnects"] == 1, 2.0)
    time.sleep(0.5)
    server = listener(port)
    started = time.monotonic()
    peer, _ = server.accept()
    redial = time.monotonic() - started
    peer.sendall(frames(7000, 10))
    blocks = collect(source, 10 * N)
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), expected(7000, 10))
    assert blocks[0].lost >= 1
    print(f"tcp-client: redialled {redial:.3f} s after the server came back")
    # Backoff doubles from 0.1 s and is capped at 3 s.
    assert redial < 3.5
    # One warning for the outage, however many dials it took.
    records = [r for r in caplog.records if r.name == "bandwatch.sources"]
    assert len([r for r in records if r.levelno == logging.WARNING]) == 1
    assert len([r for r in records if "cannot connect" in r.getMessage()]) >= 2
    peer.close()
    server.close()


def keepalive_timer(local_port: int, remote_port: int):
    """(timer kind, ticks until it fires) of a loopback IPv4 connection, from
    /proc/net/tcp. proc(5): field "tr" is 2 for "another timer (e.g. delayed
    ack or keepalive)", "tm->when" is in clock ticks (USER_HZ, 100 on Linux;
    from memory)."""
    with open("/proc/net/tcp") as table:
        next(table)
        for line in table:
            fields = line.split()
            local, remote = fields[1], fields[2]
            if int(local.split(":")[1], 16) == local_port and int(remote.split(":")[1], 16) == remote_port:
                timer, when = fields[5].split(":")
                return int(timer, 16), int(when, 16)
    raise AssertionError(f"no connection {local_port} -> {remote_port} in /proc/net/tcp")


@pytest.mark.skipif(not os.path.exists("/proc/net/tcp"), reason="reads Linux's connection table /proc/net/tcp")
def test_keepalive_probes_an_idle_connection_within_seconds(closing):
    server = listener()
    client = open_source(tcp_config("tcp-client", server.getsockname()[1]))
    client.open()
    closing(client)
    peer, (_, client_port) = server.accept()
    dialled_in = open_source(tcp_config("tcp-server", 0))
    dialled_in.open()
    closing(dialled_in)
    sensor = socket.create_connection(dialled_in.address, timeout=2.0)
    assert wait_until(lambda: dialled_in.counters()["connects"] == 1, 2.0)
    time.sleep(0.2)  # let any delayed ACK (at most 0.2 s on Linux, from memory) go out
    # tcp(7), TCP_KEEPIDLE: idle seconds before the first keepalive probe.
    # Set to 5 s, the idle connection's timer fires 1..5 s from now (500
    # ticks); without keepalive there is no timer, and the kernel default
    # idle time (7200 s, from memory) would put it near 720000 ticks.
    for local, remote in ((client_port, server.getsockname()[1]), (dialled_in.address[1], sensor.getsockname()[1])):
        kind, ticks = keepalive_timer(local, remote)
        assert kind == 2
        assert 100 < ticks <= 500
    sensor.close()
    peer.close()
    server.close()


def test_client_keeps_waiting_on_a_silent_peer(closing):
    server = listener()
    source = open_source(tcp_config("tcp-client", server.getsockname()[1]))
    source.open()
    closing(source)
    peer, _ = server.accept()
    peer.sendall(frames(0, 5))
    collect(source, 5 * N)
    # The peer stops sending but keeps the connection: no block, no redial.
    assert source.read(0.5) is None
    assert source.counters()["disconnects"] == 0
    # It resumes on the same connection, so the stream continues without a break.
    peer.sendall(frames(5 * N, 5, seq=5))
    blocks = collect(source, 5 * N)
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), expected(5 * N, 5))
    assert [b.lost for b in blocks] == [0] * len(blocks)
    assert source.counters()["connects"] == 1
    peer.close()
    server.close()


def test_a_flood_is_held_back_by_tcp_flow_control_and_nothing_is_lost(closing):
    server = listener()
    source = open_source(tcp_config("tcp-client", server.getsockname()[1]))
    source.open()
    closing(source)
    peer, _ = server.accept()
    count, n = 8000, 256  # about 8 MB, more than the kernel buffers take on loopback
    data = b"".join(encode_frame(frame_samples(k, n), seq=k) for k in range(count))
    sender = threading.Thread(target=peer.sendall, args=(data,), daemon=True)
    sender.start()
    # The test reads nothing while the peer sends as fast as it can: the
    # reader fills the queue, stops reading, and the sender is held back.
    assert wait_until(lambda: source.counters()["paused"] > 0, 5.0)
    time.sleep(0.5)
    assert sender.is_alive()  # sendall still waits: TCP's window is closed
    assert source.queued <= source.queue_limit
    assert source.counters()["frames"] < count
    # Now read: everything arrives, in order, with nothing lost.
    blocks = []
    peak = 0
    deadline = time.monotonic() + 30.0
    while sum(len(b.samples) for b in blocks) < count * n and time.monotonic() < deadline:
        peak = max(peak, source.queued)
        block = source.read(0.1)
        if block is not None:
            blocks.append(block)
    sender.join(1.0)
    assert not sender.is_alive()
    assert peak <= source.queue_limit
    assert source.counters()["overflows"] == 0
    assert [b.lost for b in blocks] == [0] * len(blocks)
    got = np.concatenate([b.samples for b in blocks])
    assert np.array_equal(got, np.concatenate([frame_samples(k, n) for k in range(count)]))
    peer.close()
    server.close()


# ----------------------------------------------------------------- server


def open_server(closing):
    source = open_source(tcp_config("tcp-server", 0))
    source.open()
    closing(source)
    return source, source.address


def test_server_receives_frames(closing):
    source, address = open_server(closing)
    assert address[0] == "127.0.0.1"
    peer = socket.create_connection(address, timeout=2.0)
    peer.sendall(frames(0, 40))
    blocks = collect(source, 40 * N)
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), expected(0, 40))
    assert source.counters()["connects"] == 1
    peer.close()


def test_server_peer_that_sends_nothing_is_just_quiet(closing):
    source, address = open_server(closing)
    peer = socket.create_connection(address, timeout=2.0)
    assert wait_until(lambda: source.counters()["connects"] == 1, 2.0)
    assert source.read(0.5) is None
    counters = source.counters()
    assert (counters["connects"], counters["disconnects"], counters["bytes"]) == (1, 0, 0)
    # Still alive: when the peer finally speaks, its frames arrive.
    peer.sendall(frames(0, 3))
    assert np.array_equal(np.concatenate([b.samples for b in collect(source, 3 * N)]), expected(0, 3))
    peer.close()


def test_server_half_open_peer_is_replaced_by_a_new_connection(closing):
    source, address = open_server(closing)
    old = socket.create_connection(address, timeout=2.0)
    old.sendall(frames(0, 5))
    collect(source, 5 * N)
    # The old peer goes silent without closing, as a sensor that lost power
    # would; the rebooted sensor dials in with a new connection.
    assert source.read(0.3) is None
    new = socket.create_connection(address, timeout=2.0)
    new.sendall(frames(9000, 5))
    blocks = collect(source, 5 * N)
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), expected(9000, 5))
    assert blocks[0].lost >= 1
    counters = source.counters()
    assert (counters["connects"], counters["disconnects"]) == (2, 1)
    # The replaced connection was closed by the source: its peer reads EOF.
    old.settimeout(2.0)
    assert old.recv(1) == b""
    old.close()
    new.close()


def test_server_takes_the_sensor_back_after_a_reset(closing):
    source, address = open_server(closing)
    peer = socket.create_connection(address, timeout=2.0)
    peer.sendall(frames(0, 5))
    collect(source, 5 * N)
    reset(peer)
    assert wait_until(lambda: source.counters()["disconnects"] == 1, 2.0)
    peer = socket.create_connection(address, timeout=2.0)
    peer.sendall(frames(3000, 5))
    blocks = collect(source, 5 * N)
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), expected(3000, 5))
    assert blocks[0].lost >= 1
    peer.close()


def test_server_port_in_use_is_a_clear_error():
    taken = listener()
    port = taken.getsockname()[1]
    source = open_source(tcp_config("tcp-server", port))
    with pytest.raises(SourceError, match=f"127.0.0.1:{port}"):
        source.open()
    taken.close()


# ------------------------------------------------------ gathering reads


def _peer_for(kind, closing):
    """An open source of `kind` and the plain socket at the other end."""
    if kind == "tcp-client":
        server = listener()
        source = open_source(tcp_config(kind, server.getsockname()[1]))
        source.open()
        closing(source)
        peer, _ = server.accept()
        server.close()
        return source, peer
    source, address = open_server(closing)
    return source, socket.create_connection(address, timeout=2.0)


@pytest.mark.parametrize("kind", ["tcp-client", "tcp-server"])
def test_a_slow_stream_is_read_in_few_gathered_reads(kind, closing):
    # A choice of this project (README, Stream sources): a stream slower than
    # two full reads per gathering time is read once per COALESCE_S, not once
    # per frame. 100 frames sent one every 20 ms over 2 s: one read each
    # without gathering; here at most one per COALESCE_S, plus the first.
    from monitor.acquire.sources.stream import COALESCE_S

    source, peer = _peer_for(kind, closing)
    count = 100

    def send():
        for k in range(count):
            peer.sendall(frames(k * N, 1, seq=k))
            time.sleep(0.02)

    sender = threading.Thread(target=send, daemon=True)
    sender.start()
    blocks = collect(source, count * N, seconds=10.0)
    sender.join(5.0)
    assert np.array_equal(np.concatenate([b.samples for b in blocks]), expected(0, count))
    assert len(blocks) <= 2.0 / COALESCE_S + 3, len(blocks)
    peer.close()
