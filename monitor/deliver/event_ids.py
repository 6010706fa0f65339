"""What survives a restart: the event id counter.

Event ids increase by one per node and are never reused, across restarts and
crashes. With an [mqtt] section the last id given out lives in the file
`event-id` in `queue_dir`, written before the event is published: the number
is rewritten in place at a fixed width (21 bytes, well inside one disk
sector, which storage writes whole) and synced with one fsync, so an event
costs one sync here. Without [mqtt] (JSON lines on stdout) ids count from 1
in each run.

The event queue keeps the highest id it has stored as well; it is passed in
as `floor`. At start the next id is above both, so a deleted, rolled-back or
damaged id file is repaired from the queue (with a warning) instead of
making ids repeat, and never stops the monitor from starting.
"""

import logging
import os
import re
from typing import Optional

from . import private

log = logging.getLogger("bandwatch.state")

ID_FILE = "event-id"
_NUMBER = re.compile(rb"[0-9]{1,20}\n?\Z")  # ASCII digits only, as _store writes them


class EventIds:
    """Hands out event ids; persistent when given a directory."""

    def __init__(self, directory: Optional[str] = None, floor: int = 0) -> None:
        self.directory = directory
        self.path = os.path.join(directory, ID_FILE) if directory else None
        self._fd: Optional[int] = None
        self._failing = False
        self._last = self._load(max(0, int(floor)))

    @property
    def last(self) -> int:
        return self._last

    def take(self) -> int:
        """The next id, already stored when it is returned (if the disk takes it)."""
        value = self._last + 1
        if self.path is not None:
            self._store(value)
        self._last = value
        return value

    def _load(self, floor: int) -> int:
        """The last id given out: the file's, unless the queue has seen a higher one."""
        if self.path is None:
            return 0
        stored: Optional[int] = None
        try:
            with open(self.path, "rb") as fh:
                raw = fh.read(64)
        except FileNotFoundError:
            if floor == 0:
                return 0  # a first start
            problem = "is missing"
        except OSError as exc:
            problem = f"cannot be read ({exc.strerror or exc})"
        else:
            if _NUMBER.match(raw):
                stored = int(raw)
                if stored >= floor:
                    return stored
                problem = f"holds {stored}, below id {floor} already stored in the event queue"
            else:
                problem = f"holds {raw[:40]!r}, not a number"
        value = max(floor, stored or 0)
        if floor:
            log.warning("the event id file %s %s; repaired: ids go on after %d, the highest the event queue "
                        "has stored", self.path, problem, floor)
        else:
            log.warning("the event id file %s %s, and the event queue has stored no id; ids start again "
                        "after %d, so consumers may see ids they have seen before", self.path, problem, value)
        self._store(value)
        return value

    def _store(self, value: int) -> None:
        assert self.path is not None
        try:
            fresh = self._fd is None
            if self._fd is None:
                self._fd = private.open_file(self.path, os.O_RDWR)
            line = f"{value:020d}\n".encode("ascii")
            os.pwrite(self._fd, line, 0)
            if fresh:
                os.ftruncate(self._fd, len(line))  # whatever a damaged file held beyond it
            os.fsync(self._fd)
        except OSError as exc:
            # The event still goes out; the queue keeps the highest id too,
            # so only a restart that also loses the queue could repeat ids.
            if not self._failing:
                log.error("cannot store event id %d in %s: %s; until it can, a restart takes the next id "
                          "from the event queue", value, self.path, exc.strerror or exc)
            self._failing = True
            return
        if self._failing:
            log.warning("event ids are stored in %s again", self.path)
            self._failing = False

    def close(self) -> None:
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
