"""Telling systemd how the service is doing (sd_notify), standard library only.

systemd passes the address of a datagram socket in $NOTIFY_SOCKET (a path,
or an abstract name starting with "@"), and the watchdog interval in
$WATCHDOG_USEC. Outside systemd both are absent and every call does nothing.
"""

import logging
import os
import socket
import time
from typing import Callable, Mapping, Optional

log = logging.getLogger("bandwatch.notify")


class Notifier:
    def __init__(
        self,
        environ: Optional[Mapping[str, str]] = None,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        env = os.environ if environ is None else environ
        self.clock = clock
        self.address: Optional[str] = env.get("NOTIFY_SOCKET") or None
        if self.address and self.address.startswith("@"):
            self.address = "\0" + self.address[1:]
        self.watchdog_s: Optional[float] = None
        usec = env.get("WATCHDOG_USEC", "")
        pid = env.get("WATCHDOG_PID", "")
        if usec.isdigit() and int(usec) > 0 and (not pid or pid == str(os.getpid())):
            # Ping at half the interval, as sd_watchdog_enabled(3) advises.
            self.watchdog_s = int(usec) / 2e6
        self._sock: Optional[socket.socket] = None
        self._last_ping = -float("inf")
        self._warned = False

    @property
    def enabled(self) -> bool:
        return self.address is not None

    def send(self, *fields: str) -> None:
        """Send "KEY=value" fields in one datagram."""
        if self.address is None:
            return
        try:
            if self._sock is None:
                self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
            self._sock.sendto("\n".join(fields).encode("utf-8"), self.address)
        except OSError as exc:
            if not self._warned:
                log.warning("cannot notify systemd at %r: %s", self.address, exc)
                self._warned = True

    def ready(self, status: str) -> None:
        self.send("READY=1", f"STATUS={status}")

    def status(self, text: str) -> None:
        self.send(f"STATUS={text}")

    def stopping(self) -> None:
        self.send("STOPPING=1")

    def watchdog(self) -> None:
        """Ping the watchdog if half its interval has passed since the last ping."""
        if self.watchdog_s is None:
            return
        now = self.clock()
        if now - self._last_ping >= self.watchdog_s:
            self._last_ping = now
            self.send("WATCHDOG=1")

    def close(self) -> None:
        if self._sock is not None:
            self._sock.close()
            self._sock = None
