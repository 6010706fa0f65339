"""The on-disk queues of spectra and captures waiting for the broker.

They live beside the event queue in `queue_dir`, one SQLite file each
(``spectra.sqlite``, ``captures.sqlite``), oldest first, written and synced
like events (`queue.durable_connection`), private to the service's user, and
covered by the event queue's directory lock. A row leaves only when the
broker has confirmed it. Each has its own bound, in rows and, for captures,
in bytes: beyond it the oldest go first, counted in `dropped`, so a flood of
evidence can never push an event out.

Where they differ from the event queue, on purpose: the delivery thread
writes them, never the measuring one, and keeps what a refusing disk will
not take (`StoreRefused`) waiting in its own bounded memory to try again; a
file that will not open is tried again at the next write; a damaged file is
moved aside and a fresh one started, without recovery.
"""

import logging
import os
import sqlite3
import threading
import time
from typing import Iterable, List, Optional, Tuple

from . import private
from .queue import QueuedEvent, durable_connection, roll_back

# Spectra and captures waiting in memory for the delivery thread to store
# them (a refusing disk keeps them here): at most this many, and this many
# bytes of spectrum lines (a choice of this project; see config/memory.py).
HANDOFF = 1000
HANDOFF_BYTES = 8 << 20

log = logging.getLogger("bandwatch.delivery")

SPECTRA = "spectra.sqlite"
CAPTURES = "captures.sqlite"

_SCHEMA = """CREATE TABLE IF NOT EXISTS messages (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    topic TEXT NOT NULL,
    payload BLOB NOT NULL,
    qos INTEGER NOT NULL,
    created REAL NOT NULL
)"""


class StoreRefused(Exception):
    """The disk refused the write (full, read-only, failing, or the file
    would not open); nothing was stored, and the caller may try again."""


class EvidenceQueue:
    """A bounded FIFO of (topic, payload, qos) rows in ``directory/filename``:
    at most `limit` rows and, when given, `limit_bytes` of payload (a payload
    larger than that on its own is dropped at once). `what` names it in
    messages. `dropped` only grows."""

    def __init__(self, directory: str, filename: str, what: str, limit: int,
                 limit_bytes: Optional[int] = None) -> None:
        if limit < 1:
            raise ValueError(f"{what} queue limit must be at least 1, got {limit}")
        if limit_bytes is not None and limit_bytes < 1:
            raise ValueError(f"{what} queue byte limit must be at least 1, got {limit_bytes}")
        self.directory = directory
        self.path = os.path.join(directory, filename)
        self.what = what
        self.limit = int(limit)
        self.limit_bytes = limit_bytes
        self._lock = threading.Lock()
        self._db: Optional[sqlite3.Connection] = None
        self._closed = False
        self._count = 0
        self._bytes = 0
        self._dropped = 0
        self.error: Optional[str] = None
        with self._lock:
            self._open()

    # -- opening -----------------------------------------------------------

    def _open(self) -> bool:
        """Open the file if it is not open; False (said once) when it cannot be."""
        if self._db is not None:
            return True
        try:
            private.make_dirs(self.directory)
            try:
                db = self._connect()
            except sqlite3.OperationalError:
                raise  # cannot open, read-only, full, locked: not damage
            except sqlite3.DatabaseError as err:
                aside = f"{self.path}.corrupt-{time.strftime('%Y%m%dT%H%M%S')}"
                for suffix in ("", "-wal", "-shm"):
                    if os.path.exists(self.path + suffix):
                        os.replace(self.path + suffix, aside + suffix)
                log.error("%s queue %s is damaged (%s); moved to %s, starting empty", self.what, self.path, err, aside)
                db = self._connect()
            count, size = db.execute("SELECT COUNT(*), COALESCE(SUM(LENGTH(payload)), 0) FROM messages").fetchone()
        except (OSError, sqlite3.Error) as err:
            self._refused("cannot be opened", err)
            return False
        self._db, self._count, self._bytes = db, int(count), int(size)
        return True

    def _connect(self) -> sqlite3.Connection:
        db = durable_connection(self.path)
        try:
            # Read once and deleted: a page cache (2 MB by default) would only hold dead blobs.
            db.execute("PRAGMA cache_size=-128")
            db.execute(_SCHEMA)
            check = db.execute("PRAGMA quick_check").fetchone()[0]
            if check != "ok":
                raise sqlite3.DatabaseError(f"quick_check: {check}")
            for suffix in ("", "-wal", "-shm"):
                private.narrow(self.path + suffix)
        except BaseException:
            db.close()
            raise
        return db

    def _refused(self, what: str, err: BaseException) -> None:
        reason = f"{what}: {getattr(err, 'strerror', None) or err}"
        if self.error is None:
            log.error("%s queue %s %s; they wait in memory until it takes them", self.what, self.path, reason)
        self.error = reason

    # -- the queue ---------------------------------------------------------

    def put(self, topic: str, payload: bytes, qos: int) -> Optional[int]:
        """Store one message, synced to disk; its row id, or None when it was
        dropped as larger than the whole bound. StoreRefused when the disk
        refused it."""
        size = len(payload)
        with self._lock:
            if self._closed:
                raise ValueError(f"{self.what} queue {self.path} is closed")
            if self.limit_bytes is not None and size > self.limit_bytes:
                log.warning("%s queue: a %d-byte %s is larger than the whole bound of %d bytes; dropped",
                            self.what, size, self.what, self.limit_bytes)
                self._dropped += 1
                return None
            if not self._open():
                raise StoreRefused(self.error)
            db = self._db
            assert db is not None
            try:
                db.execute("BEGIN IMMEDIATE")
                row = db.execute("INSERT INTO messages (topic, payload, qos, created) VALUES (?, ?, ?, ?)",
                                 (topic, sqlite3.Binary(payload), int(qos), time.time())).lastrowid
                excess, freed = self._make_room(db, size)
                db.execute("COMMIT")
            except (OSError, sqlite3.Error) as err:
                roll_back(db)
                self._refused("refused a write", err)
                raise StoreRefused(self.error) from err
            if self.error is not None:
                log.warning("%s queue %s takes writes again (after: %s)", self.what, self.path, self.error)
                self.error = None
            self._dropped += excess
            self._count += 1 - excess
            self._bytes += size - freed
        if excess:
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
            for (length,) in db.execute("SELECT LENGTH(payload) FROM messages ORDER BY id LIMIT ?", (self._count,)):
                if freed >= over and n >= excess:
                    break
                n += 1
                freed += int(length)
            excess = n
        if excess <= 0:
            return 0, 0
        oldest = "SELECT id FROM messages ORDER BY id LIMIT ?"
        freed = db.execute(f"SELECT COALESCE(SUM(LENGTH(payload)), 0) FROM messages WHERE id IN ({oldest})",
                           (excess,)).fetchone()[0]
        db.execute(f"DELETE FROM messages WHERE id IN ({oldest})", (excess,))
        return excess, int(freed)

    def peek(self, n: int) -> List[QueuedEvent]:
        """The oldest `n` messages, oldest first; they stay in the queue."""
        with self._lock:
            if n <= 0 or self._db is None or self._closed:
                return []
            try:
                rows = self._db.execute("SELECT id, topic, payload, qos FROM messages ORDER BY id LIMIT ?",
                                        (int(n),)).fetchall()
            except (OSError, sqlite3.Error) as err:
                self._refused("refused a read", err)
                return []
        return [QueuedEvent(int(r[0]), str(r[1]), bytes(r[2]), int(r[3])) for r in rows]

    def remove_many(self, row_ids: Iterable[int]) -> int:
        """Forget confirmed messages; returns how many were there. A removal
        the disk refuses is only a message sent again later."""
        ids = [int(i) for i in row_ids]
        with self._lock:
            db = self._db
            if not ids or db is None or self._closed:
                return 0
            try:
                db.execute("BEGIN IMMEDIATE")
                sizes = [db.execute("SELECT LENGTH(payload) FROM messages WHERE id = ?", (i,)).fetchone()
                         for i in set(ids)]
                removed = sum(db.execute("DELETE FROM messages WHERE id = ?", (i,)).rowcount for i in set(ids))
                db.execute("COMMIT")
            except (OSError, sqlite3.Error) as err:
                roll_back(db)
                self._refused("refused a removal", err)
                return 0
            self._count -= removed
            self._bytes -= sum(int(s[0]) for s in sizes if s is not None)
            return removed

    @property
    def count(self) -> int:
        """Messages waiting."""
        return self._count

    @property
    def bytes(self) -> int:
        """Payload bytes waiting."""
        return self._bytes

    @property
    def dropped(self) -> int:
        """Messages dropped by the bound or a refusing disk since opening."""
        return self._dropped

    def count_lost(self, n: int = 1) -> None:
        """Count messages that never reached the queue."""
        with self._lock:
            self._dropped += n

    @property
    def closed(self) -> bool:
        return self._closed

    def close(self) -> None:
        """Close the file; safe to call twice."""
        with self._lock:
            self._closed = True
            if self._db is not None:
                try:
                    self._db.close()
                finally:
                    self._db = None

    def __enter__(self) -> "EvidenceQueue":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
