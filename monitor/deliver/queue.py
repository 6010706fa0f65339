"""The on-disk store-and-forward queues of messages waiting for the broker.

Events live in one SQLite file, ``events.sqlite`` in the configured
``queue_dir``, oldest first by an AUTOINCREMENT row id (ids are never reused,
so the order survives deletes and restarts). A row leaves the queue only when
the broker has confirmed it; beyond ``limit`` rows the oldest are dropped and
counted in `dropped`. Spectra and captures wait the same way in files of
their own (``spectra.sqlite``, ``captures.sqlite``: `DurableQueue`), each with
its own bound (captures by bytes), so a backlog of large evidence can never
push an event out, nor hold an event's write behind its own.

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
from typing import Iterable, List, NamedTuple, Optional, Tuple

from ..errors import DeliveryError

try:
    import fcntl
except ImportError:  # pragma: no cover - not POSIX; run without the lock
    fcntl = None  # type: ignore[assignment]

log = logging.getLogger("bandwatch.delivery")

FILENAME = "events.sqlite"
SPECTRA = "spectra.sqlite"
CAPTURES = "captures.sqlite"
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


class DurableQueue:
    """A bounded FIFO of (topic, payload, qos) rows in ``directory/filename``.

    The bound is `limit` rows and, when given, `limit_bytes` of payload; the
    oldest rows go first, and a payload larger than `limit_bytes` on its own
    is refused. `dropped` counts rows thrown away by the bound since this
    object was opened; it only grows, so a caller can compare it with the
    last value it saw. `what` names the queue in messages.

    With `lock` the directory is taken with a lock file, so one process at a
    time owns it; the event queue does, and the others live beside it.
    """

    def __init__(self, directory: str, limit: int, filename: str = FILENAME, what: str = "event",
                 limit_bytes: Optional[int] = None, lock: bool = True) -> None:
        if limit < 1:
            raise ValueError(f"queue limit must be at least 1, got {limit}")
        if limit_bytes is not None and limit_bytes < 1:
            raise ValueError(f"queue byte limit must be at least 1, got {limit_bytes}")
        self.directory = directory
        self.path = os.path.join(directory, filename)
        self.what = what
        self.limit = int(limit)
        self.limit_bytes = limit_bytes
        self._lock = threading.Lock()
        self._dropped = 0
        self._lock_fd: Optional[int] = None
        self._db: Optional[sqlite3.Connection] = None
        try:
            os.makedirs(directory, exist_ok=True)
        except OSError as err:
            raise DeliveryError(
                f"{what} queue directory {directory!r} cannot be created: {err.strerror or err}"
            ) from err
        if not os.path.isdir(directory):
            raise DeliveryError(f"{what} queue directory {directory!r} is not a directory")
        if lock:
            self._take_lock()
        try:
            self._db = self._open_db()
        except BaseException:
            self._release_lock()
            raise
        self._count, self._bytes = self._db.execute(
            "SELECT COUNT(*), COALESCE(SUM(LENGTH(payload)), 0) FROM events").fetchone()

    # -- opening -----------------------------------------------------------

    def _take_lock(self) -> None:
        if fcntl is None:  # pragma: no cover
            return
        lock_path = os.path.join(self.directory, LOCKNAME)
        try:
            fd = os.open(lock_path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as err:
            raise DeliveryError(
                f"{self.what} queue directory {self.directory!r} is not writable: {err.strerror or err}"
            ) from err
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as err:
            os.close(fd)
            if err.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                raise DeliveryError(
                    f"{self.what} queue directory {self.directory!r} is in use by another process"
                ) from err
            raise DeliveryError(
                f"{self.what} queue directory {self.directory!r}: cannot lock {lock_path}: {err}"
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
            if self.what != "event":
                # Spectra and captures are read once and deleted: a page
                # cache (2 MB by default) would only hold dead blobs.
                db.execute("PRAGMA cache_size=-128")
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
                raise DeliveryError(f"{self.what} queue {self.path}: {err}") from err
            aside = f"{self.path}.corrupt-{time.strftime('%Y%m%dT%H%M%S')}"
            log.error("%s queue %s is unreadable (%s); moved to %s, starting empty", self.what, self.path, err, aside)
            try:
                os.replace(self.path, aside)
                for suffix in ("-wal", "-shm"):
                    if os.path.exists(self.path + suffix):
                        os.replace(self.path + suffix, aside + suffix)
                return self._connect()
            except (OSError, sqlite3.DatabaseError) as err2:
                raise DeliveryError(f"{self.what} queue {self.path} cannot be opened: {err2}") from err2
        except OSError as err:  # pragma: no cover - sqlite reports most as DatabaseError
            raise DeliveryError(f"{self.what} queue {self.path} cannot be opened: {err}") from err

    # -- the queue ---------------------------------------------------------

    def _conn(self) -> sqlite3.Connection:
        if self._db is None:
            raise DeliveryError(f"{self.what} queue {self.path} is closed")
        return self._db

    def put(self, topic: str, payload: bytes, qos: int) -> Optional[int]:
        """Store one row; return its row id once it is committed to disk.

        Beyond the bound the oldest rows go first and are counted in
        `dropped`; a payload over `limit_bytes` by itself is dropped at once
        (counted, None returned).
        """
        size = len(payload)
        if self.limit_bytes is not None and size > self.limit_bytes:
            log.warning("%s queue: a %d-byte %s is larger than the whole bound of %d bytes; dropped",
                        self.what, size, self.what, self.limit_bytes)
            self.count_lost()
            return None
        with self._lock:
            db = self._conn()
            db.execute("BEGIN IMMEDIATE")
            try:
                row = db.execute(
                    "INSERT INTO events (topic, payload, qos, created) VALUES (?, ?, ?, ?)",
                    (topic, sqlite3.Binary(payload), int(qos), time.time()),
                ).lastrowid
                excess, freed = self._make_room(db, size)
                db.execute("COMMIT")
            except BaseException:
                db.execute("ROLLBACK")
                raise
            self._dropped += excess
            self._count += 1 - excess
            self._bytes += size - freed
        if excess and self.what != "event":  # events: the pipeline's `queue` check says so
            log.warning("%s queue full: dropped the %d oldest %s(s)", self.what, excess, self.what)
        return int(row)

    def _make_room(self, db: sqlite3.Connection, size: int) -> Tuple[int, int]:
        """Delete the oldest rows beyond the bound, the new row (already
        inserted, the newest) counted; returns (rows, bytes) deleted."""
        excess = max(0, self._count + 1 - self.limit)
        if self.limit_bytes is not None and self._bytes + size > self.limit_bytes:
            # Walk from the oldest until what stays fits; the new row always stays.
            over = self._bytes + size - self.limit_bytes
            n, freed = 0, 0
            for (length,) in db.execute("SELECT LENGTH(payload) FROM events ORDER BY id LIMIT ?",
                                        (self._count,)):
                if freed >= over and n >= excess:
                    break
                n += 1
                freed += int(length)
            excess = n
        if excess <= 0:
            return 0, 0
        ids = "SELECT id FROM events ORDER BY id LIMIT ?"
        freed = db.execute(f"SELECT COALESCE(SUM(LENGTH(payload)), 0) FROM events WHERE id IN ({ids})",
                           (excess,)).fetchone()[0]
        db.execute(f"DELETE FROM events WHERE id IN ({ids})", (excess,))
        return excess, int(freed)

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
            if self._count == 0:
                self._bytes = 0
            elif self.limit_bytes is not None:
                self._bytes = db.execute("SELECT COALESCE(SUM(LENGTH(payload)), 0) FROM events").fetchone()[0]
            return removed

    @property
    def count(self) -> int:
        """Rows waiting."""
        return self._count

    @property
    def bytes(self) -> int:
        """Payload bytes waiting (kept exactly where there is a byte bound)."""
        return self._bytes

    def __len__(self) -> int:
        return self._count

    @property
    def dropped(self) -> int:
        """Rows dropped by the bound (or lost to a failed write) since opening."""
        return self._dropped

    def count_lost(self, n: int = 1) -> None:
        """Count rows that never made it into the queue (a failed write)."""
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

    def __enter__(self) -> "DurableQueue":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class EventQueue(DurableQueue):
    """The events: ``events.sqlite``, bounded by rows, holding the directory's lock."""

    def __init__(self, directory: str, limit: int) -> None:
        super().__init__(directory, limit)
