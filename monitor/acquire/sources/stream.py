"""Byte-stream sources: a reader thread turns bytes into Blocks.

Every kind that receives bytes from a sensor (serial, tcp-client, tcp-server,
udp) shares this machinery:

* A dedicated reader thread reads large chunks, feeds them to the decoder for
  `[source] format` and hands complete Blocks to the measuring thread through
  a bounded queue. `read(timeout)` only ever waits on that queue, and takes
  at once the queued blocks that continue the first without a break (up to
  0.25 s of samples), as one Block: the per-block work (wake-up, health,
  ring writes) is done per batch, not per frame. TCP readers wait
  up to COALESCE_S after a read that emptied the socket (less once two full
  reads of bytes wait), so each read takes many frames.

* The queue holds about two seconds of samples (capped in memory for fast,
  wide streams). When it is full, a link that can push back (TCP) stops
  reading until there is room: the kernel's buffers fill and TCP flow control
  slows the sender, so a burst is read late but whole (`paused` counts the
  stops). A link that cannot push back (serial, UDP) drops the oldest block
  instead: its samples are added to the `lost` of the block that follows it,
  and `overflows` counts it. Either way a peer that floods the link, or a
  measuring thread that falls behind, never costs memory, and stream time
  still counts every sample.

* Link kinds reconnect after a failure with exponential backoff (0.1 s,
  doubling, at most 3 s) and log once per outage, not once per attempt.

Breaks in the link. After any reconnect (a replug, a new TCP connection) the
decoder is reset, and the first Block after it carries in `lost` the number of
samples per channel the outage would have held: the time from the arrival of
the last block before the break to the arrival of the first block after it,
less that block's own duration, times the sample rate, rounded, and at least
1. Block keeps its two fields; a non-zero `lost` is already what tells the
pipeline that no FFT frame may span this point, and counting the outage in
samples keeps stream time in step with real time across it. The arrival clock
is used rather than frame timestamps because a sensor that rebooted may have
restarted its clock.

Sequence jumps. A jump forward in the frame sequence counts as its samples
lost only while stream time stays within JUMP_SLACK_S of the wall clock: the
decoder is told, before each chunk, how many samples the time since the last
block (and any earlier time not filled by samples) can account for. A jump
beyond that, or backwards, means the sender started afresh (a reboot, a
second sender, a counter bug); it is a restart (`restarts`), treated like a
reconnect: the lost samples come from the arrival clock as above. So stream
time never runs ahead of the wall time that passed by more than
JUMP_SLACK_S (which allows for senders that batch their frames), however
far the sequence jumps.

Counters: `counters()` returns the link's own (connects, disconnects, bytes,
overflows, paused) merged with the decoder's (frames, corrupt_frames, corrupt_bytes,
gaps, lost_samples, restarts, mismatched, nonfinite), for health checks.
"""

import collections
import logging
import socket
import threading
import time
from typing import Any, Callable, Deque, Dict, List, Optional

import numpy as np

from ...config import SourceConfig
from ..block import Block
from ..decoders import make_decoder
from ...errors import SourceError
from .base import Source

log = logging.getLogger("bandwatch.sources")

QUEUE_SECONDS = 2.0
# Upper bound on queued values (samples x channels): 32 MiB of float64, so a
# fast, wide stream cannot take the memory of a small board.
QUEUE_MAX_VALUES = 1 << 22
# A batch joins at most this share of the queue (0.25 s of samples): enough
# to wake once per several frames, and its copy stays small.
BATCH_SHARE = 8
BACKOFF_START_S = 0.1
BACKOFF_MAX_S = 3.0
# Longest any blocking call in a reader thread waits before it looks at the
# stop flag again; keeps close() well within its one second.
POLL_S = 0.1
JOIN_S = 1.0
READ_MAX = 65536
# How far a sequence jump may carry stream time ahead of the wall clock
# before it counts as a restart of the sender.
JUMP_SLACK_S = 2.0

# After a read that emptied a TCP socket, the reader lets bytes gather in
# the kernel's buffer before it reads again: until two full reads of bytes
# wait (the kernel wakes it: SO_RCVLOWAT, tcp.py), or this long has passed. So a slow stream
# costs one read, decode and hand-off per 0.5 s instead of one per frame,
# for at most this much more delay (a band's level changes only after
# `delay`, 3 s unless set), and a fast one is read as fast as it comes. On
# a small board each wake-up of a Python thread costs far more than the
# bytes it handles: gathering for 0.2 s cost the monitor about a fifth more
# CPU than 0.5 s (bench/live.py). A read that fills READ_MAX reads again at
# once. (Serial and UDP read at once: a tty's buffer is small, and each
# datagram is its own read.)
COALESCE_S = 0.5

LINK_COUNTERS = ("connects", "disconnects", "bytes", "overflows", "paused")


def endpoint(host: str, port: int) -> str:
    """host:port as people write it, with brackets around an IPv6 address."""
    return f"[{host}]:{port}" if ":" in host else f"{host}:{port}"


def bind(kind: str, host: str, port: int, socktype: int,
         setup: Callable[[socket.socket], None]) -> socket.socket:
    """A socket of `socktype` bound to host:port, after `setup` (options,
    listen) ran on it; a SourceError naming the kind and address otherwise."""
    try:
        family, socktype, proto, _, address = socket.getaddrinfo(
            host, port, type=socktype, flags=socket.AI_PASSIVE
        )[0]
        sock = socket.socket(family, socktype, proto)
    except OSError as exc:
        raise SourceError(f"{kind} source: cannot bind {endpoint(host, port)}: {exc}") from exc
    try:
        setup(sock)
        sock.bind(address)
    except OSError as exc:
        sock.close()
        raise SourceError(f"{kind} source: cannot bind {endpoint(host, port)}: {exc}") from exc
    return sock


class StreamSource(Source):
    """Base of byte-stream kinds. A kind implements `_loop` (run in the
    reader thread until `self._stop` is set), and may override `_prepare`
    (before the thread starts; raise SourceError for a fault that retrying
    cannot mend), `_wake` (unblock the thread) and `_release` (after it).
    A kind whose link has flow control sets `pushes_back`: its reader waits
    for room in the queue instead of dropping the oldest block."""

    pushes_back = False
    coalesce_s = 0.0  # wait after a short read (COALESCE_S for TCP)

    def __init__(self, config: SourceConfig) -> None:
        super().__init__(config)
        self._decoder = make_decoder(config.format, self.channels)
        self._link: Dict[str, int] = dict.fromkeys(LINK_COUNTERS, 0)
        limit = int(round(QUEUE_SECONDS * config.sample_rate))
        self.queue_limit = max(1, min(limit, QUEUE_MAX_VALUES // max(1, self.channels)))
        self.batch_limit = max(1, self.queue_limit // BATCH_SHARE)
        self._queue: Deque[Block] = collections.deque()
        self._queued = 0  # samples per channel now in the queue
        self._dropped = 0  # samples dropped just before the queue's head
        self._ready = threading.Condition()
        self._stop = threading.Event()
        self._thread: Optional[threading.Thread] = None
        self._beat = time.monotonic()
        self._failure: Optional[BaseException] = None
        # Break bookkeeping, touched by the reader thread only.
        self._break = False
        self._last_arrival: Optional[float] = None
        self._carry = 0  # lost samples not yet attached to a block
        # Wall time (in samples) since the last break that neither samples
        # nor counted gaps have filled: what a sequence jump may stand for.
        self._room = 0.0
        self._outage_since: Optional[float] = None
        self._tries = 0  # connect attempts in the current outage

    # ------------------------------------------------------------ interface

    @property
    def queued(self) -> int:
        """Samples per channel waiting in the queue now."""
        with self._ready:
            return self._queued

    def heartbeat(self) -> float:
        """When the reader thread last went round its loop (-inf once it died)."""
        thread = self._thread
        if thread is None or not thread.is_alive():
            return -float("inf")
        return self._beat

    def _tick(self) -> None:
        self._beat = time.monotonic()

    def counters(self) -> Dict[str, int]:
        out = dict(self._link)
        out.update(self._decoder.counters)
        return out

    def _open(self) -> None:
        if self._thread is not None:
            raise SourceError(f"{self.describe()}: already open")
        self._stop.clear()
        self._failure = None
        self._prepare()
        self._thread = threading.Thread(target=self._run, name=f"bandwatch-{self.kind}", daemon=True)
        self._thread.start()

    def _close(self) -> None:
        thread = self._thread
        if thread is None:
            return
        self._stop.set()
        self._wake()
        with self._ready:
            self._ready.notify_all()  # a reader waiting for room
        thread.join(JOIN_S)
        if thread.is_alive():
            log.warning("%s: reader thread did not stop within %g s", self.describe(), JOIN_S)
        self._thread = None
        self._release()

    def _read(self, timeout: float) -> Optional[Block]:
        deadline = time.monotonic() + max(0.0, timeout)
        with self._ready:
            while not self._queue:
                if self._failure is not None:
                    raise SourceError(f"{self.describe()}: reader stopped: {self._failure!r}") from self._failure
                left = deadline - time.monotonic()
                if left <= 0:
                    return None
                self._ready.wait(left)
            block = self._take()
            if self.pushes_back:
                self._ready.notify_all()  # room for a reader that waits
            if self._dropped:
                # The dropped blocks came just before this one.
                block = block._replace(lost=block.lost + self._dropped)
                self._dropped = 0
        return block

    def _take(self) -> Block:
        """The queue's head joined with the blocks behind it that continue it
        without a break (under the lock): the measuring thread then wakes,
        checks health and writes the ring once per batch, not once per frame.
        A block with `lost` starts a new batch, and so does one of another
        full scale or whose timestamps come or go, so the batch's first
        timestamp and full scale hold for all of it. Only integer samples
        are joined: a NaN or infinity in float samples drops its block whole
        (Source.read), and a batch would widen that drop."""
        queue = self._queue
        head = queue.popleft()
        parts = [head.samples]
        n = head.samples.shape[0]
        if head.full_scale is not None:
            stamped = head.timestamp_us is not None
            while queue:
                nxt = queue[0]
                if nxt.lost or nxt.full_scale != head.full_scale or (nxt.timestamp_us is not None) != stamped:
                    break
                if n + nxt.samples.shape[0] > self.batch_limit:
                    break  # the copy a batch makes stays small
                parts.append(queue.popleft().samples)
                n += nxt.samples.shape[0]
        self._queued -= n
        if len(parts) > 1:
            head = head._replace(samples=np.concatenate(parts))
        return head

    # ------------------------------------------------------- kind hooks

    def _prepare(self) -> None:
        pass

    def _loop(self) -> None:
        raise NotImplementedError

    def _wake(self) -> None:
        pass

    def _release(self) -> None:
        pass

    # ------------------------------------------- reader-thread helpers

    def _run(self) -> None:
        try:
            self._loop()
        except BaseException as exc:  # a bug, not a link fault: say so and stop
            log.exception("%s: reader thread failed", self.describe())
            with self._ready:
                self._failure = exc
                self._ready.notify_all()

    def _consume(self, data: bytes, whole: bool = False) -> None:
        """Decode a chunk of bytes (`whole`: one that ends every frame or
        line in it, a datagram) and queue what it completes."""
        self._link["bytes"] += len(data)
        if self._last_arrival is not None:
            wall = (time.monotonic() - self._last_arrival) * self.sample_rate
            self._decoder.max_gap = int(self._room + wall + JUMP_SLACK_S * self.sample_rate)
        self._emit_decoded(self._decoder.feed(data, whole))
        if self.coalesce_s and len(data) < READ_MAX:
            self._gather()

    def _gather(self) -> None:
        """Let bytes gather after a short read: `coalesce_s`. A kind that
        can see its socket ends the wait early once enough bytes wait (TCP)."""
        self._stop.wait(self.coalesce_s)

    def _connected(self, peer: str) -> None:
        """A new link is up: count it, end the outage, start decoding afresh."""
        self._link["connects"] += 1
        self._decoder.reset()
        self._break = self._last_arrival is not None
        if self._outage_since is not None:
            down = time.monotonic() - self._outage_since
            tries = f", {self._tries} tries" if self._tries > 1 else ""
            log.info("%s: link up (%s) after %.1f s down%s", self.describe(), peer, down, tries)
        else:
            log.info("%s: link up (%s)", self.describe(), peer)
        self._outage_since = None
        self._tries = 0

    def _disconnected(self, reason: str) -> None:
        self._link["disconnects"] += 1
        self._failed(f"link lost ({reason})")

    def _failed(self, what: str) -> None:
        """One failed connect or a lost link: logged once per outage."""
        if self._outage_since is None:
            self._outage_since = time.monotonic()
            log.warning("%s: %s; waiting for it to come back", self.describe(), what)
        else:
            log.debug("%s: %s", self.describe(), what)

    def _emit_decoded(self, decoded: List[Block]) -> None:
        """Join consecutive decoded pieces into as few blocks as possible,
        starting a new block wherever a piece follows a gap. A block's
        timestamp is that of its first piece."""
        parts: List[np.ndarray] = []
        lost = 0
        stamp: Optional[int] = None
        full_scale: Optional[float] = None
        for piece in decoded:
            # A new block at a gap, and where the sample type changes (so a
            # block has one full scale for the clipping check).
            if parts and (piece.lost or piece.full_scale != full_scale):
                self._emit(parts, lost, stamp, full_scale)
                parts, lost = [], 0
            if not parts:
                stamp = piece.timestamp_us
                full_scale = piece.full_scale
            if piece.restart and self._last_arrival is not None:
                # The sender started afresh: what is missing is unknown, so
                # it is measured like an outage, from the arrival clock.
                self._break = True
            else:
                lost += piece.lost
            if piece.samples.shape[0]:
                parts.append(piece.samples)
        if parts:
            self._emit(parts, lost, stamp, full_scale)
        else:
            self._carry += lost

    def _emit(self, parts: List[np.ndarray], lost: int, stamp: Optional[int],
              full_scale: Optional[float] = None) -> None:
        samples = parts[0] if len(parts) == 1 else np.concatenate(parts)
        samples = np.asarray(samples, dtype=np.float64)
        now = time.monotonic()
        lost += self._carry
        self._carry = 0
        if self._last_arrival is not None:
            held = (now - self._last_arrival) * self.sample_rate - samples.shape[0]
            if self._break:
                lost += max(1, int(round(held)))
                self._room = 0.0
            else:
                self._room += max(0.0, held) - lost
        self._break = False
        self._last_arrival = now
        self._put(Block(samples=samples, lost=lost, full_scale=full_scale, timestamp_us=stamp))

    def _put(self, block: Block) -> None:
        size = block.samples.shape[0]
        with self._ready:
            if self.pushes_back and self._queue and self._queued + size > self.queue_limit:
                # Not reading is what pushes back: the kernel's receive
                # buffer fills and TCP closes the sender's window.
                self._link["paused"] += 1
                while self._queue and self._queued + size > self.queue_limit and not self._stop.is_set():
                    self._tick()
                    self._ready.wait(POLL_S)
            self._queue.append(block)
            self._queued += size
            while not self.pushes_back and self._queued > self.queue_limit and len(self._queue) > 1:
                old = self._queue.popleft()
                size = old.samples.shape[0]
                self._queued -= size
                self._dropped += size + old.lost
                self._link["overflows"] += 1
            self._ready.notify()

    def _backoff(self, delay: float) -> float:
        """Wait `delay` (or until stopped) and return the next delay."""
        self._tick()
        self._stop.wait(delay)
        self._tick()
        return min(delay * 2.0, BACKOFF_MAX_S)


class LinkSource(StreamSource):
    """A link that is dialled: open it, read until it fails, open it again.

    A kind implements `_connect` (return an open handle, None if stopped
    meanwhile, or raise OSError), `_receive` (bytes read within POLL_S, b""
    if none; raise OSError when the link is gone) and `_hangup`.
    """

    def _loop(self) -> None:
        delay = BACKOFF_START_S
        while not self._stop.is_set():
            self._tick()
            self._tries += 1
            try:
                handle = self._connect()
            except OSError as exc:
                self._failed(f"cannot connect ({exc})")
                delay = self._backoff(delay)
                continue
            if handle is None:
                continue
            self._connected(self._peer(handle))
            received = 0
            reason = ""
            try:
                while not self._stop.is_set():
                    self._tick()
                    data = self._receive(handle)
                    if data:
                        received += len(data)
                        self._consume(data)
            except OSError as exc:
                reason = str(exc) or type(exc).__name__
            finally:
                self._hangup(handle)
            if self._stop.is_set():
                break
            self._disconnected(reason)
            if received:
                # The link worked: a fresh outage starts the backoff afresh.
                delay = BACKOFF_START_S
            delay = self._backoff(delay)

    def _connect(self) -> Any:
        raise NotImplementedError

    def _receive(self, handle: Any) -> bytes:
        raise NotImplementedError

    def _hangup(self, handle: Any) -> None:
        raise NotImplementedError

    def _peer(self, handle: Any) -> str:
        return self.describe()
