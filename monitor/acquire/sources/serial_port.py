"""Kind "serial": a sensor on a serial port (USB CDC, UART), read with pyserial.

The port is opened exclusively, so a second program cannot steal bytes from
the stream. The reader thread asks for everything already waiting (at least
one byte, at most 64 KiB) with a short timeout, never line by line. When the
device goes away (an unplug: a read error, or silence while its path has
vanished) the port is closed and the same path is opened again with backoff;
a /dev/serial/by-id path finds the sensor again even if the kernel gives it
another ttyACM number.
"""

import os
from typing import Any

import serial

from ...config import SourceConfig
from ...errors import SourceError
from .stream import POLL_S, READ_MAX, LinkSource


class SerialSource(LinkSource):
    kind = "serial"

    def __init__(self, config: SourceConfig) -> None:
        super().__init__(config)
        self._port: Any = None  # the open port, for _wake

    def describe(self) -> str:
        return f"serial {self.config.device}"

    def _prepare(self) -> None:
        if not self.config.device:
            raise SourceError(
                f"serial source: device={self.config.device!r} is empty; expected a path such as /dev/ttyACM0"
            )

    def _connect(self) -> Any:
        # SerialException derives from OSError: a missing or busy device is
        # retried like any other failed connect.
        port = serial.Serial(
            port=self.config.device,
            baudrate=self.config.baud,
            timeout=POLL_S,
            exclusive=True,
        )
        self._port = port
        return port

    def _receive(self, handle: Any) -> bytes:
        data = handle.read(min(max(1, handle.in_waiting), READ_MAX))
        if not data and not os.path.exists(self.config.device):
            # Some drivers keep a dead descriptor quiet instead of failing it.
            raise serial.SerialException("the device path has gone")
        return bytes(data)

    def _peer(self, handle: Any) -> str:
        # The node a by-id link points to now, e.g. /dev/ttyACM1 after a replug.
        return os.path.realpath(self.config.device)

    def _hangup(self, handle: Any) -> None:
        self._port = None
        try:
            handle.close()
        except OSError:
            pass

    def _wake(self) -> None:
        port = self._port
        if port is not None:
            try:
                port.cancel_read()
            except (OSError, TypeError, AttributeError):
                pass  # closed meanwhile by the reader; it stops on its own
