"""Kind "udp": a sensor that sends datagrams to `host:port`.

Each datagram holds one or more whole frames, and is fed to the decoder as it
came. A datagram that ends inside a frame (truncated on the way, or a sender
bug) is counted in `truncated`. Its partial frame cannot join the next
datagram's bytes into a frame: the CRC over such a mix fails (short of a 1 in
2**32 collision), and the decoder drops a held partial frame as soon as a
complete one follows it. The decoder is deliberately not reset between
datagrams: reset() also forgets the expected sequence number, and the
sequence is what reveals a lost datagram (the most common fault on UDP), or
a truncated frame, as a gap of exactly its samples.

With format "csv" the end of a datagram ends its last line, so a sensor may
send lines with or without the final newline; a line never continues in the
next datagram. Datagrams from any sender are taken; one sensor per port is
the expected setup.
"""

import logging
import socket
from typing import Optional, Tuple

from ...config import SourceConfig
from .stream import POLL_S, StreamSource, bind, endpoint

log = logging.getLogger("bandwatch.sources")

DATAGRAM_MAX = 65535
# A larger kernel buffer rides out a short stall of the reader thread; the
# kernel caps it at net.core.rmem_max.
RECEIVE_BUFFER = 1 << 20


class UdpSource(StreamSource):
    kind = "udp"

    def __init__(self, config: SourceConfig) -> None:
        super().__init__(config)
        self._sock: Optional[socket.socket] = None
        self.address: Optional[Tuple[str, int]] = None  # bound host and port, once open
        self._link["datagrams"] = 0
        self._link["truncated"] = 0
        self._text = config.format == "csv"

    def describe(self) -> str:
        host, port = self.address or (self.config.host, self.config.port)
        return f"udp {endpoint(host, port)}"

    def _prepare(self) -> None:
        def setup(sock: socket.socket) -> None:
            try:
                sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, RECEIVE_BUFFER)
            except OSError:
                pass  # keep the default buffer
            sock.settimeout(POLL_S)

        sock = bind(self.kind, self.config.host, self.config.port, socket.SOCK_DGRAM, setup)
        self._sock = sock
        self.address = tuple(sock.getsockname()[:2])  # type: ignore[assignment]

    def _loop(self) -> None:
        sock = self._sock
        assert sock is not None
        while not self._stop.is_set():
            self._tick()
            try:
                data, _ = sock.recvfrom(DATAGRAM_MAX)
            except socket.timeout:
                continue
            except OSError as exc:
                if self._stop.is_set():
                    break
                # Transient (e.g. out of buffers): say so, breathe, go on.
                log.warning("%s: receive failed (%s)", self.describe(), exc)
                self._stop.wait(POLL_S)
                continue
            self._link["datagrams"] += 1
            if self._text and not data.endswith(b"\n"):
                self._consume(data, b"\n")
            else:
                self._consume(data)
            if self._decoder.buffered:
                self._link["truncated"] += 1

    def _release(self) -> None:
        if self._sock is not None:
            self._sock.close()
            self._sock = None
