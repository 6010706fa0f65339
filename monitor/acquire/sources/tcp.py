"""Kinds "tcp-client" and "tcp-server": a sensor that streams over TCP.

tcp-client dials `host:port` (a sensor or a serial-to-network bridge that
listens) and dials again with backoff whenever the connection fails.
tcp-server listens on `host:port` (loopback unless configured otherwise) for
a sensor that dials in; it serves one sensor at a time, and a new connection
replaces the current one, because a sensor that rebooted dials in again long
before its old connection would time out.

Both push back: while the measuring thread lags and the block queue is
full, the reader stops reading, and TCP flow control slows the sender, so a
burst (a gateway flushing its buffer) is measured whole, never dropped.

Both switch TCP keepalive on (with short probe intervals where the platform
lets us set them), so a peer that vanished without a word is eventually
closed by the kernel. Until then a half-open connection is simply quiet, and
the pipeline's stale check reports it: nothing here guesses from silence.
"""

import errno
import logging
import os
import select
import selectors
import socket
from typing import Any, Optional, Tuple

from ...config import SourceConfig
from ...errors import SourceError
from .stream import COALESCE_S, POLL_S, READ_MAX, LinkSource, StreamSource, bind, endpoint

log = logging.getLogger("bandwatch.sources")

CONNECT_TIMEOUT_S = 3.0
# Keepalive: first probe after 5 s of silence, then every 2 s, give up after
# 3 unanswered probes (about 11 s for a peer that vanished).
_KEEPALIVE = (("TCP_KEEPIDLE", 5), ("TCP_KEEPINTVL", 2), ("TCP_KEEPCNT", 3))


def keepalive(sock: socket.socket) -> None:
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_KEEPALIVE, 1)
    for name, value in _KEEPALIVE:
        option = getattr(socket, name, None)
        if option is None:
            continue
        try:
            sock.setsockopt(socket.IPPROTO_TCP, option, value)
        except OSError:
            pass  # the platform refuses it; plain keepalive still applies


# Bytes that end a gathering wait early: two full reads. A stream slower
# than this per COALESCE_S is read once per COALESCE_S.
GATHER_BYTES = 2 * READ_MAX


def gather(sock: Optional[socket.socket], seconds: float) -> None:
    """Wait until GATHER_BYTES are waiting on `sock`, it closes, or
    `seconds` pass. The kernel does the counting: with SO_RCVLOWAT set,
    select() reports the socket readable only once that many bytes are
    queued (or at end of stream), so a fast stream is not held to one
    kernel buffer per wait. The mark is set back to 1 for the reads."""
    if sock is None:
        return
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVLOWAT, GATHER_BYTES)
        try:
            select.select([sock], [], [], seconds)
        finally:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVLOWAT, 1)
    except (OSError, ValueError):
        pass  # closed meanwhile (close() woke it): the read that follows says so


class TcpClientSource(LinkSource):
    kind = "tcp-client"
    pushes_back = True
    coalesce_s = COALESCE_S

    def __init__(self, config: SourceConfig) -> None:
        super().__init__(config)
        self._sock: Optional[socket.socket] = None  # the live socket, for _wake

    def describe(self) -> str:
        return f"tcp-client {endpoint(self.config.host, self.config.port)}"

    def _prepare(self) -> None:
        if not self.config.host or not 0 < self.config.port < 65536:
            raise SourceError(
                f"tcp-client source: host={self.config.host!r} port={self.config.port} "
                "is not a peer to dial; expected a host name and a port 1..65535"
            )

    def _connect(self) -> Optional[socket.socket]:
        infos = socket.getaddrinfo(self.config.host, self.config.port, type=socket.SOCK_STREAM)
        error: Optional[OSError] = None
        for family, socktype, proto, _, address in infos:
            sock = socket.socket(family, socktype, proto)
            try:
                if not self._dial(sock, address):
                    sock.close()
                    return None
            except OSError as exc:
                sock.close()
                error = exc
                continue
            sock.settimeout(POLL_S)
            keepalive(sock)
            self._sock = sock
            return sock
        raise error or OSError(f"no address found for {self.config.host!r}")

    def _dial(self, sock: socket.socket, address: Any) -> bool:
        """Connect without blocking the stop flag; False if stopped meanwhile."""
        sock.setblocking(False)
        err = sock.connect_ex(address)
        if err in (errno.EINPROGRESS, errno.EWOULDBLOCK, errno.EAGAIN):
            with selectors.DefaultSelector() as selector:
                selector.register(sock, selectors.EVENT_WRITE)
                waited = 0.0
                while not selector.select(POLL_S):
                    if self._stop.is_set():
                        return False
                    waited += POLL_S
                    if waited >= CONNECT_TIMEOUT_S:
                        raise socket.timeout(f"no answer within {CONNECT_TIMEOUT_S:g} s")
            err = sock.getsockopt(socket.SOL_SOCKET, socket.SO_ERROR)
        if err:
            raise OSError(err, os.strerror(err))
        return True

    def _receive(self, handle: socket.socket) -> bytes:
        try:
            data = handle.recv(READ_MAX)
        except socket.timeout:
            return b""
        if not data:
            raise ConnectionError("the peer closed the connection")
        return data

    def _hangup(self, handle: socket.socket) -> None:
        self._sock = None
        handle.close()

    def _gather(self) -> None:
        gather(self._sock, self.coalesce_s)

    def _peer(self, handle: socket.socket) -> str:
        return endpoint(*handle.getpeername()[:2])

    def _wake(self) -> None:
        sock = self._sock
        if sock is not None:
            try:
                sock.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass  # not connected (yet, or any more): the poll ends it


class TcpServerSource(StreamSource):
    kind = "tcp-server"
    pushes_back = True
    coalesce_s = COALESCE_S

    def __init__(self, config: SourceConfig) -> None:
        super().__init__(config)
        self._listener: Optional[socket.socket] = None
        self._conn: Optional[socket.socket] = None  # the connection being read
        self.address: Optional[Tuple[str, int]] = None  # bound host and port, once open

    def describe(self) -> str:
        host, port = self.address or (self.config.host, self.config.port)
        return f"tcp-server {endpoint(host, port)}"

    def _prepare(self) -> None:
        def setup(listener: socket.socket) -> None:
            # A restarted monitor must not wait out TIME_WAIT of its last run.
            listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)

        listener = bind(self.kind, self.config.host, self.config.port, socket.SOCK_STREAM, setup)
        try:
            listener.listen(4)
            listener.setblocking(False)
        except OSError as exc:
            listener.close()
            raise SourceError(f"tcp-server source: cannot listen on "
                              f"{endpoint(self.config.host, self.config.port)}: {exc}") from exc
        self._listener = listener
        self.address = tuple(listener.getsockname()[:2])  # type: ignore[assignment]

    def _loop(self) -> None:
        assert self._listener is not None
        conn: Optional[socket.socket] = None
        with selectors.DefaultSelector() as selector:
            selector.register(self._listener, selectors.EVENT_READ)
            try:
                while not self._stop.is_set():
                    self._tick()
                    for key, _ in selector.select(POLL_S):
                        if key.fileobj is self._listener:
                            conn = self._accept(selector, conn)
                        elif key.fileobj is conn:
                            if not self._drain(conn):
                                selector.unregister(conn)
                                conn.close()
                                conn = None
            finally:
                if conn is not None:
                    conn.close()

    def _accept(self, selector: selectors.BaseSelector, conn: Optional[socket.socket]) -> Optional[socket.socket]:
        try:
            new, peer = self._listener.accept()  # type: ignore[union-attr]
        except OSError:
            return conn  # the caller gave up before we accepted
        if conn is not None:
            selector.unregister(conn)
            conn.close()
            self._link["disconnects"] += 1
            log.info("%s: a new connection from %s replaces the current one", self.describe(), endpoint(*peer[:2]))
        new.setblocking(False)
        keepalive(new)
        selector.register(new, selectors.EVENT_READ)
        self._connected(endpoint(*peer[:2]))
        return new

    def _drain(self, conn: socket.socket) -> bool:
        """Read what arrived; False once the connection is over."""
        try:
            data = conn.recv(READ_MAX)
        except (BlockingIOError, InterruptedError):
            return True
        except OSError as exc:
            self._disconnected(str(exc) or type(exc).__name__)
            return False
        if not data:
            self._disconnected("the peer closed the connection")
            return False
        self._conn = conn
        self._consume(data)
        return True

    def _gather(self) -> None:
        gather(self._conn, self.coalesce_s)

    def _release(self) -> None:
        if self._listener is not None:
            self._listener.close()
            self._listener = None
