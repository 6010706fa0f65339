"""The on-disk store-and-forward queue of events waiting for the broker.

Events live in one SQLite file, ``events.sqlite`` in the configured
``queue_dir``, oldest first by an AUTOINCREMENT row id (ids are never reused,
so the order survives deletes and restarts). A row leaves the queue only when
the broker has confirmed it; beyond ``limit`` rows the oldest are dropped and
counted in `dropped`.

Durability: the database runs in WAL mode with ``synchronous=FULL``, so every
`put` fsyncs the write-ahead log before it returns. A process killed with
SIGKILL loses nothing that `put` returned for (the data already sits in the
kernel's page cache; NORMAL would do for that alone); FULL additionally keeps
it across a power cut, which on a small board in a plant is the likelier
death. Events are rare (level changes), so an fsync each is cheap. Removals
ride in batches so a long backlog does not cost one fsync per row; losing a
removal to a power cut only means the event is sent again, which QoS 1
consumers de-duplicate by id anyway.

A lock file (``events.lock``, flock) keeps a second process off the same
directory: two senders draining one queue would deliver twice and out of
order. A database file that SQLite cannot read is moved aside with a
timestamp and a fresh one started, so a damaged file cannot stop the monitor.

One connection serves every thread (the pipeline puts, the delivery thread
peeks and removes); a lock serialises them.
"""

import errno
import logging
import os
import sqlite3
import threading
import time
from typing import Iterable, List, NamedTuple, Optional

from ..errors import DeliveryError

try:
    import fcntl
except ImportError:  # pragma: no cover - not POSIX; run without the lock
    fcntl = None  # type: ignore[assignment]

log = logging.getLogger("bandwatch.delivery")

FILENAME = "events.sqlite"
LOCKNAME = "events.lock"

_SCHEMA = """
CREATE TABLE IF NOT EXISTS events (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    topic TEXT NOT NULL,
    payload BLOB NOT NULL,
    qos INTEGER NOT NULL,
    created REAL NOT NULL
)
"""


class QueuedEvent(NamedTuple):
    id: int
    topic: str
    payload: bytes
    qos: int


class EventQueue:
    """A bounded FIFO of (topic, payload, qos) rows in ``directory/events.sqlite``.

    `dropped` counts rows thrown away by the bound since this object was
    opened; it only grows, so a caller can compare it with the last value it
    saw.
    """

    def __init__(self, directory: str, limit: int) -> None:
        if limit < 1:
            raise ValueError(f"queue limit must be at least 1, got {limit}")
        self.directory = directory
        self.path = os.path.join(directory, FILENAME)
        self.limit = int(limit)
        self._lock = threading.Lock()
        self._dropped = 0
        self._lock_fd: Optional[int] = None
        self._db: Optional[sqlite3.Connection] = None
        try:
            os.makedirs(directory, exist_ok=True)
        except OSError as err:
            raise DeliveryError(
                f"event queue directory {directory!r} cannot be created: {err.strerror or err}"
            ) from err
        if not os.path.isdir(directory):
            raise DeliveryError(f"event queue directory {directory!r} is not a directory")
        self._take_lock()
        try:
            self._db = self._open_db()
        except BaseException:
            self._release_lock()
            raise
        self._count = self._db.execute("SELECT COUNT(*) FROM events").fetchone()[0]

    # -- opening -----------------------------------------------------------

    def _take_lock(self) -> None:
        if fcntl is None:  # pragma: no cover
            return
        lock_path = os.path.join(self.directory, LOCKNAME)
        try:
            fd = os.open(lock_path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as err:
            raise DeliveryError(
                f"event queue directory {self.directory!r} is not writable: {err.strerror or err}"
            ) from err
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as err:
            os.close(fd)
            if err.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                raise DeliveryError(
                    f"event queue directory {self.directory!r} is in use by another process"
                ) from err
            raise DeliveryError(
                f"event queue directory {self.directory!r}: cannot lock {lock_path}: {err}"
            ) from err
        self._lock_fd = fd

    def _release_lock(self) -> None:
        if self._lock_fd is not None:
            os.close(self._lock_fd)  # closing drops the flock
            self._lock_fd = None

    def _connect(self) -> sqlite3.Connection:
        # isolation_level=None: transactions are explicit, so nothing is left
        # half-committed by Python's implicit BEGIN.
        db = sqlite3.connect(self.path, isolation_level=None, check_same_thread=False)
        try:
            mode = db.execute("PRAGMA journal_mode=WAL").fetchone()[0]
            if str(mode).lower() != "wal":
                raise sqlite3.OperationalError(f"journal_mode is {mode}, WAL refused")
            db.execute("PRAGMA synchronous=FULL")
            db.execute(_SCHEMA)
            db.execute("PRAGMA quick_check").fetchone()
        except BaseException:
            db.close()
            raise
        return db

    def _open_db(self) -> sqlite3.Connection:
        try:
            return self._connect()
        except sqlite3.DatabaseError as err:
            if not os.path.exists(self.path):
                raise DeliveryError(f"event queue {self.path}: {err}") from err
            aside = f"{self.path}.corrupt-{time.strftime('%Y%m%dT%H%M%S')}"
            log.error("event queue %s is unreadable (%s); moved to %s, starting empty", self.path, err, aside)
            try:
                os.replace(self.path, aside)
                for suffix in ("-wal", "-shm"):
                    if os.path.exists(self.path + suffix):
                        os.replace(self.path + suffix, aside + suffix)
                return self._connect()
            except (OSError, sqlite3.DatabaseError) as err2:
                raise DeliveryError(f"event queue {self.path} cannot be opened: {err2}") from err2
        except OSError as err:  # pragma: no cover - sqlite reports most as DatabaseError
            raise DeliveryError(f"event queue {self.path} cannot be opened: {err}") from err

    # -- the queue ---------------------------------------------------------

    def _conn(self) -> sqlite3.Connection:
        if self._db is None:
            raise DeliveryError(f"event queue {self.path} is closed")
        return self._db

    def put(self, topic: str, payload: bytes, qos: int) -> int:
        """Store one event; return its row id once it is committed to disk.

        Beyond the limit the oldest rows go first and are counted in `dropped`.
        """
        with self._lock:
            db = self._conn()
            db.execute("BEGIN IMMEDIATE")
            try:
                row = db.execute(
                    "INSERT INTO events (topic, payload, qos, created) VALUES (?, ?, ?, ?)",
                    (topic, sqlite3.Binary(payload), int(qos), time.time()),
                ).lastrowid
                excess = self._count + 1 - self.limit
                if excess > 0:
                    db.execute(
                        "DELETE FROM events WHERE id IN (SELECT id FROM events ORDER BY id LIMIT ?)",
                        (excess,),
                    )
                db.execute("COMMIT")
            except BaseException:
                db.execute("ROLLBACK")
                raise
            if excess > 0:
                self._dropped += excess
                self._count = self.limit
            else:
                self._count += 1
            return int(row)

    def peek(self, n: int) -> List[QueuedEvent]:
        """The oldest `n` events, oldest first; they stay in the queue."""
        if n <= 0:
            return []
        with self._lock:
            rows = self._conn().execute(
                "SELECT id, topic, payload, qos FROM events ORDER BY id LIMIT ?", (int(n),)
            ).fetchall()
        return [QueuedEvent(int(r[0]), str(r[1]), bytes(r[2]), int(r[3])) for r in rows]

    def remove(self, row_id: int) -> bool:
        """Forget one confirmed event; False when it was already gone."""
        return self.remove_many((row_id,)) == 1

    def remove_many(self, row_ids: Iterable[int]) -> int:
        """Forget confirmed events in one transaction; returns how many were there."""
        ids = [int(i) for i in row_ids]
        if not ids:
            return 0
        with self._lock:
            db = self._conn()
            db.execute("BEGIN IMMEDIATE")
            try:
                removed = 0
                for row_id in ids:
                    removed += db.execute("DELETE FROM events WHERE id = ?", (row_id,)).rowcount
                db.execute("COMMIT")
            except BaseException:
                db.execute("ROLLBACK")
                raise
            self._count -= removed
            return removed

    @property
    def count(self) -> int:
        """Events waiting."""
        return self._count

    def __len__(self) -> int:
        return self._count

    @property
    def dropped(self) -> int:
        """Events dropped by the bound (or lost to a failed write) since opening."""
        return self._dropped

    def count_lost(self, n: int = 1) -> None:
        """Count events that never made it into the queue (a failed write)."""
        with self._lock:
            self._dropped += n

    @property
    def closed(self) -> bool:
        return self._db is None

    def close(self) -> None:
        """Close the database and release the directory; safe to call twice."""
        with self._lock:
            if self._db is not None:
                try:
                    self._db.close()
                finally:
                    self._db = None
            self._release_lock()

    def __enter__(self) -> "EventQueue":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
