"""What survives a restart: the event id counter.

Event ids increase by one per node and are never reused, across restarts and
crashes. With an [mqtt] section the last id given out lives in the file
`event-id` in `queue_dir`, written before the event is published: the number
is rewritten in place at a fixed width (21 bytes, well inside one disk
sector, which storage writes whole) and synced with one fsync, so an event
costs one sync here. Without [mqtt] (JSON lines on stdout) ids count from 1
in each run.
"""

import logging
import os
from typing import Optional

from ..errors import DeliveryError

log = logging.getLogger("bandwatch.state")

ID_FILE = "event-id"


class EventIds:
    """Hands out event ids; persistent when given a directory."""

    def __init__(self, directory: Optional[str] = None) -> None:
        self.directory = directory
        self.path = os.path.join(directory, ID_FILE) if directory else None
        self._fd: Optional[int] = None
        self._last = self._load()

    @property
    def last(self) -> int:
        return self._last

    def take(self) -> int:
        """The next id, already stored when it is returned."""
        value = self._last + 1
        if self.path is not None:
            self._store(value)
        self._last = value
        return value

    def _load(self) -> int:
        if self.path is None:
            return 0
        try:
            os.makedirs(self.directory, exist_ok=True)  # type: ignore[arg-type]
            with open(self.path, encoding="ascii") as fh:
                text = fh.read().strip()
        except FileNotFoundError:
            return 0
        except OSError as exc:
            raise DeliveryError(f"cannot read the event id file {self.path}: {exc.strerror or exc}") from None
        if not text.isdigit():
            raise DeliveryError(
                f"the event id file {self.path} holds {text[:40]!r}, not a number; "
                "restore it, or write a number above the last id consumers have seen"
            )
        return int(text)

    def _store(self, value: int) -> None:
        assert self.path is not None
        try:
            if self._fd is None:
                self._fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
            os.pwrite(self._fd, f"{value:020d}\n".encode("ascii"), 0)
            os.fsync(self._fd)
        except OSError as exc:
            # The event still goes out; the id may repeat after a crash, so say so.
            log.error("cannot store event id %d in %s: %s", value, self.path, exc.strerror or exc)

    def close(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
