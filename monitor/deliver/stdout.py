"""Delivery to standard output, one JSON line per message, when there is no
[mqtt] section. Each line is {"topic": ..., "payload": ...}, the payload
exactly what the broker would receive on that topic."""

import sys
from typing import IO, Optional

from .payloads import encode
from .base import Payload, Sink, topic


class StdoutSink(Sink):
    def __init__(self, prefix: str, node: str, stream: Optional[IO[str]] = None) -> None:
        self.prefix = prefix
        self.node = node
        self.stream = stream if stream is not None else sys.stdout

    def _write(self, suffix: str, payload: Payload) -> None:
        line = encode({"topic": topic(self.prefix, self.node, suffix), "payload": payload})
        self.stream.write(line + "\n")
        self.stream.flush()

    def open(self, online: Payload, offline: Payload) -> None:
        self._write("status", online)

    def send(self, suffix: str, payload: Payload) -> None:
        self._write(suffix, payload)

    def close(self, offline: Payload) -> None:
        self._write("status", offline)
