"""The store-and-forward queue of events waiting for the broker.

Events live in one SQLite file, ``events.sqlite`` in the configured
``queue_dir``, oldest first by an AUTOINCREMENT row id (ids are never reused,
so the order survives deletes and restarts). A row leaves the queue only when
the broker has confirmed it; beyond ``limit`` rows the oldest are dropped and
counted in `dropped`. Rows put with ``keep`` (the `queue` health check's own
events: the notice that events were lost) go last, so the bound never drops
the news of its own drops while other rows remain.

Durability: the database runs in WAL mode with ``synchronous=FULL``, so every
`put` fsyncs the write-ahead log before it returns. A process killed with
SIGKILL loses nothing that `put` wrote to disk (the data already sits in the
kernel's page cache; NORMAL would do for that alone); FULL additionally keeps
it across a power cut, which on a small board in a plant is the likelier
death. Events are rare (level changes), so an fsync each is cheap. Removals
ride in batches so a long backlog does not cost one fsync per row; losing a
removal to a power cut only means the event is sent again, which QoS 1
consumers de-duplicate by id anyway.

A disk that refuses a write (full, read-only, an I/O error) never loses an
event: the error is logged once with its cause, `error` says it, the event
waits in memory (at most `memory_limit`, oldest dropped and counted beyond)
and is still delivered from there, and `retry` (called by the delivery
thread) writes the held events to disk, in order, once the disk takes them.
A directory that cannot be opened at all is retried the same way, so the
monitor measures on. Only another process holding the directory is fatal.

A lock file (``events.lock``, flock) keeps a second process off the same
directory: two senders draining one queue would deliver twice and out of
order. A damaged database file is moved aside with a timestamp, the rows
SQLite can still read are carried into a fresh one, and `damage` says what
was found, so the `queue` health check reports it.

The file also keeps (table ``meta``) the highest event id ever stored, so a
lost or rolled-back id file cannot make ids repeat (`last_event_id`), and the
number of events lost since the queue last emptied, so a restart does not
forget to report them.

One connection serves every thread (the pipeline puts, the delivery thread
peeks, removes and retries); a lock serialises them.
"""

import collections
import errno
import json
import logging
import os
import sqlite3
import threading
import time
from typing import Any, Callable, Deque, Dict, Iterable, List, Mapping, NamedTuple, Optional, Set, Tuple, TypeVar

from . import private
from ..errors import DeliveryError

try:
    import fcntl
except ImportError:  # pragma: no cover - not POSIX; run without the lock
    fcntl = None  # type: ignore[assignment]

log = logging.getLogger("bandwatch.delivery")
T = TypeVar("T")

FILENAME = "events.sqlite"
LOCKNAME = "events.lock"
# Events held in memory while the disk refuses writes (a choice of this
# project: about 1 KiB each, so at most about 10 MiB).
MEMORY_EVENTS = 10_000
RETRY_S = 1.0  # how often a refusing disk is tried again
WAL_PAGES = 64  # pages in the write-ahead log before a checkpoint (SQLite's default: 1000)
_MOVED_KEPT = 1024  # held ids remembered after they reached the disk

_SCHEMA = (
    """CREATE TABLE IF NOT EXISTS events (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    topic TEXT NOT NULL,
    payload BLOB NOT NULL,
    qos INTEGER NOT NULL,
    created REAL NOT NULL,
    event_id INTEGER,
    keep INTEGER NOT NULL DEFAULT 0
)""",
    "CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value INTEGER NOT NULL)",
)
# Columns added since the first version of the file, with their definitions.
_ADDED = (("event_id", "INTEGER"), ("keep", "INTEGER NOT NULL DEFAULT 0"))


class QueuedEvent(NamedTuple):
    id: int
    topic: str
    payload: bytes
    qos: int


class _Row(NamedTuple):
    """An event on its way in, or held in memory (negative `id`)."""

    id: int
    topic: str
    payload: bytes
    qos: int
    event_id: Optional[int]
    keep: bool


class Damage(NamedTuple):
    """A damaged queue file found at open."""

    aside: str  # where the damaged file was moved
    reason: str
    held: Optional[int]  # events it held (exact, or estimated from row ids), None when unknown
    recovered: int  # events carried into the fresh file


def kept(payload: Mapping[str, Any]) -> bool:
    """Whether an event payload is one the bound must not drop: the `queue`
    health check's own, which tells consumers that events were lost."""
    return payload.get("kind") == "health" and payload.get("name") == "queue"


def event_id_of(payload: bytes) -> Optional[int]:
    """The `id` field of a stored JSON payload, if it has an integer one."""
    try:
        value = json.loads(payload).get("id")
    except (ValueError, AttributeError, UnicodeDecodeError):
        return None
    return value if isinstance(value, int) and not isinstance(value, bool) else None


def _reason(err: BaseException) -> str:
    if isinstance(err, OSError) and err.strerror:
        return f"{err.strerror} ({err.filename})" if err.filename else err.strerror
    return str(err) or type(err).__name__


class EventQueue:
    """A bounded FIFO of (topic, payload, qos) rows in ``directory/events.sqlite``.

    `dropped` counts rows thrown away by the bound (on disk or in memory) or
    lost in a damaged file since this object was opened, starting from those
    lost before it that no empty queue has followed yet (kept in the file);
    it only grows, so a caller can compare it with the last value it saw. `held` counts events
    waiting in memory because the disk refused them; `error` says why, while
    it does.
    """

    def __init__(self, directory: str, limit: int, memory_limit: Optional[int] = None) -> None:
        if limit < 1:
            raise ValueError(f"queue limit must be at least 1, got {limit}")
        self.directory = directory
        self.path = os.path.join(directory, FILENAME)
        self.limit = int(limit)
        self.memory_limit = max(1, int(memory_limit if memory_limit is not None else min(limit, MEMORY_EVENTS)))
        self._lock = threading.Lock()
        self._dropped = 0
        self._count = 0  # rows in the file, pending removals included
        self._lock_fd: Optional[int] = None
        self._db: Optional[sqlite3.Connection] = None
        self._closed = False
        self._held: Deque[_Row] = collections.deque()
        self._next_held = -1  # held ids count down, so they never meet row ids
        self._moved: Dict[int, int] = {}  # held id -> its row id once written
        self._unremoved: Set[int] = set()  # confirmed rows whose removal the disk refused
        self._retry_at = 0.0
        self.error: Optional[str] = None
        self.damage: Optional[Damage] = None
        self._last_event_id = 0
        try:
            self._open_disk()
        except DeliveryError:
            raise
        except (OSError, sqlite3.Error) as err:
            self._refused("cannot be opened", err)

    # -- opening -----------------------------------------------------------

    def _open_disk(self) -> None:
        """Directory, lock, database. OSError or sqlite3.Error: not now (the
        caller holds events in memory and retries); DeliveryError: never."""
        private.make_dirs(self.directory)
        if not os.path.isdir(self.directory):
            raise NotADirectoryError(errno.ENOTDIR, "not a directory", self.directory)
        self._take_lock()
        try:
            db = self._open_db()
            try:
                count = db.execute("SELECT COUNT(*) FROM events").fetchone()[0]
                top = db.execute("SELECT MAX(event_id) FROM events").fetchone()[0] or 0
                last = _meta(db, "last_event_id")
                lost = _meta(db, "lost")
            except BaseException:
                db.close()
                raise
        except BaseException:
            self._release_lock()
            raise
        self._db = db
        self._count = int(count)
        self._last_event_id = max(self._last_event_id, int(top), last)
        # Lost before a restart and not yet followed by an empty queue: the
        # `queue` fault is raised again with this count.
        self._dropped += lost

    def _take_lock(self) -> None:
        if fcntl is None or self._lock_fd is not None:  # pragma: no cover - not POSIX
            return
        lock_path = os.path.join(self.directory, LOCKNAME)
        fd = private.open_file(lock_path, os.O_RDWR)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as err:
            os.close(fd)
            if err.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                raise DeliveryError(
                    f"event queue directory {self.directory!r} is in use by another process"
                ) from err
            raise
        self._lock_fd = fd

    def _release_lock(self) -> None:
        if self._lock_fd is not None:
            os.close(self._lock_fd)  # closing drops the flock
            self._lock_fd = None

    def _connect(self, path: str) -> sqlite3.Connection:
        db = durable_connection(path)
        try:
            for statement in _SCHEMA:
                db.execute(statement)
            check = db.execute("PRAGMA quick_check").fetchone()[0]
            if check != "ok":
                raise sqlite3.DatabaseError(f"quick_check: {check}")
            self._upgrade(db)
            # SQLite creates its files by the umask; the log and index files
            # it makes later copy the database file's mode.
            for suffix in ("", "-wal", "-shm"):
                private.narrow(path + suffix)
        except BaseException:
            db.close()
            raise
        return db

    @staticmethod
    def _upgrade(db: sqlite3.Connection) -> None:
        """Add the columns a file from an older version lacks, filling in the
        event ids of its rows from their payloads."""
        have = {row[1] for row in db.execute("PRAGMA table_info(events)")}
        missing = [(name, kind) for name, kind in _ADDED if name not in have]
        if not missing:
            return
        db.execute("BEGIN IMMEDIATE")
        try:
            for name, kind in missing:
                db.execute(f"ALTER TABLE events ADD COLUMN {name} {kind}")
            rows = db.execute("SELECT id, payload FROM events").fetchall()
            db.executemany("UPDATE events SET event_id = ? WHERE id = ?",
                           [(event_id_of(bytes(p)), i) for i, p in rows])
            db.execute("COMMIT")
        except BaseException:
            if db.in_transaction:
                db.execute("ROLLBACK")
            raise

    def _open_db(self) -> sqlite3.Connection:
        try:
            if os.path.exists(self.path) and os.path.getsize(self.path) == 0:
                # SQLite would take an empty file for a new database, and its
                # events (or a write-ahead log beside it) would vanish unseen.
                raise sqlite3.DatabaseError("the file is empty (0 bytes)")
            return self._connect(self.path)
        except sqlite3.OperationalError:
            raise  # cannot open, read-only, full, locked: not damage
        except sqlite3.DatabaseError as err:
            return self._replace_damaged(err)

    def _replace_damaged(self, err: sqlite3.DatabaseError) -> sqlite3.Connection:
        aside = f"{self.path}.corrupt-{time.strftime('%Y%m%dT%H%M%S')}"
        os.replace(self.path, aside)
        for suffix in ("", "-wal", "-shm"):
            if suffix and os.path.exists(self.path + suffix):
                os.replace(self.path + suffix, aside + suffix)
            private.narrow(aside + suffix)
        held, exact, rows, last_event_id = _salvage(aside)
        lost = 0 if held is None else max(0, held - len(rows))
        db = self._connect(self.path)
        db.execute("BEGIN IMMEDIATE")
        try:
            db.executemany(
                "INSERT INTO events (topic, payload, qos, created, event_id, keep) VALUES (?, ?, ?, ?, ?, ?)",
                rows,
            )
            _count_lost(db, lost)  # counted in `dropped` when the caller reads it back
            db.execute("INSERT OR REPLACE INTO meta (key, value) VALUES ('last_event_id', ?)", (last_event_id,))
            db.execute("COMMIT")
        except BaseException:
            roll_back(db)
            db.close()
            raise
        self.damage = Damage(aside, str(err), held, len(rows))
        if held is None:
            count = "an unknown number of events"
        else:
            count = f"{held} event(s)" if exact else f"about {held} event(s) by the gaps in its row ids"
        log.error("event queue %s is damaged (%s); moved to %s: it held %s, %d recovered into a fresh "
                  "queue, %d lost", self.path, err, aside, count, len(rows), lost)
        return db

    # -- disk state ----------------------------------------------------------

    def _refused(self, what: str, err: BaseException) -> None:
        """The disk refused something: say so once, with the true cause."""
        reason = f"{what}: {_reason(err)}"
        if self.error is None:
            log.error("event queue %s %s; events wait in memory (at most %d) until the disk takes them",
                      self.path, reason, self.memory_limit)
        self.error = reason
        self._retry_at = time.monotonic() + RETRY_S

    def _took(self) -> None:
        """A write went through: the disk is back."""
        if self.error is not None:
            log.warning("event queue %s takes writes again (after: %s)", self.path, self.error)
            self.error = None

    # -- the queue ---------------------------------------------------------

    def _check_open(self) -> None:
        if self._closed:
            raise DeliveryError(f"event queue {self.path} is closed")

    def put(self, topic: str, payload: bytes, qos: int, event_id: Optional[int] = None,
            keep: bool = False) -> int:
        """Store one event; return its id in the queue once it is synced to
        disk, or held in memory when the disk refuses it (negative id).

        Beyond the limit the oldest rows go first and are counted in
        `dropped`; rows put with `keep` go last.
        """
        with self._lock:
            self._check_open()
            row = _Row(self._next_held, topic, bytes(payload), int(qos), event_id, bool(keep))
            self._next_held -= 1
            if event_id is not None:
                self._last_event_id = max(self._last_event_id, int(event_id))
            if self._db is not None and (not self._held or self._flush()):
                try:
                    return self._write([row])[0]
                except (OSError, sqlite3.Error) as err:
                    self._refused("refused a write", err)
            self._hold(row)
            return row.id

    def _write(self, rows: List[_Row]) -> List[int]:
        return self._with_room(lambda: self._transaction(rows))

    def _with_room(self, action: Callable[[], T]) -> T:
        """`action`, once more after a checkpoint if the disk refused it: a
        checkpoint that truncates the write-ahead log gives its space back."""
        try:
            return action()
        except (OSError, sqlite3.Error):
            assert self._db is not None
            try:
                self._db.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchall()
            except sqlite3.Error:
                pass
            return action()

    def _transaction(self, rows: List[_Row]) -> List[int]:
        """One transaction: pending removals, the rows, the bound, the highest
        event id. Raises on failure, having changed nothing."""
        db = self._db
        assert db is not None
        db.execute("BEGIN IMMEDIATE")
        try:
            removed = 0
            for row_id in self._unremoved:
                removed += db.execute("DELETE FROM events WHERE id = ?", (row_id,)).rowcount
            now = time.time()
            ids = [
                int(db.execute(
                    "INSERT INTO events (topic, payload, qos, created, event_id, keep) VALUES (?, ?, ?, ?, ?, ?)",
                    (r.topic, sqlite3.Binary(r.payload), r.qos, now, r.event_id, int(r.keep)),
                ).lastrowid)
                for r in rows
            ]
            excess = self._count - removed + len(rows) - self.limit
            dropped = 0
            if excess > 0:
                dropped = db.execute(
                    "DELETE FROM events WHERE id IN (SELECT id FROM events ORDER BY keep, id LIMIT ?)",
                    (excess,),
                ).rowcount
            db.execute("INSERT OR REPLACE INTO meta (key, value) VALUES ('last_event_id', ?)",
                       (self._last_event_id,))
            _count_lost(db, dropped)
            db.execute("COMMIT")
        except BaseException:
            roll_back(db)
            raise
        self._unremoved.clear()
        self._count += len(rows) - removed - dropped
        self._dropped += dropped
        self._took()
        return ids

    def _flush(self) -> bool:
        """Write the held events to disk, oldest first; True when none are left."""
        if not self._held:
            return True
        rows = list(self._held)
        try:
            ids = self._write(rows)
        except (OSError, sqlite3.Error) as err:
            self._refused("refused a write", err)
            return False
        self._held.clear()
        for row, row_id in zip(rows, ids):
            self._moved[row.id] = row_id
        while len(self._moved) > _MOVED_KEPT:
            del self._moved[next(iter(self._moved))]
        log.warning("event queue %s: %d event(s) held in memory are now on disk", self.path, len(rows))
        return True

    def _hold(self, row: _Row) -> None:
        self._held.append(row)
        if len(self._held) > self.memory_limit:
            victim = next((r for r in self._held if not r.keep), self._held[0])
            self._held.remove(victim)
            self._dropped += 1

    def retry(self) -> None:
        """While the disk refuses writes, try it again (at most every
        RETRY_S): open it if it never opened, write the held events and the
        pending removals, or just probe it with a write."""
        with self._lock:
            if self.error is None or self._closed or time.monotonic() < self._retry_at:
                return
            self._retry_at = time.monotonic() + RETRY_S
            if self._db is None:
                try:
                    self._open_disk()
                except (DeliveryError, OSError, sqlite3.Error) as err:
                    self._refused("cannot be opened", err)
                    return
            if self._held:
                self._flush()
                return
            try:
                self._write([])
            except (OSError, sqlite3.Error) as err:
                self._refused("refused a write", err)

    def peek(self, n: int) -> List[QueuedEvent]:
        """The oldest `n` events, oldest first (those on disk, then those held
        in memory); they stay in the queue."""
        if n <= 0:
            return []
        with self._lock:
            self._check_open()
            out: List[QueuedEvent] = []
            if self._db is not None:
                try:
                    rows = self._db.execute(
                        "SELECT id, topic, payload, qos FROM events ORDER BY id LIMIT ?",
                        (int(n) + len(self._unremoved),),
                    ).fetchall()
                except (OSError, sqlite3.Error) as err:
                    # What the disk cannot give now, it gives later; the
                    # held events need not wait for it.
                    self._refused("refused a read", err)
                    rows = []
                out = [QueuedEvent(int(r[0]), str(r[1]), bytes(r[2]), int(r[3]))
                       for r in rows if int(r[0]) not in self._unremoved][:n]
            for row in self._held:
                if len(out) >= n:
                    break
                out.append(QueuedEvent(row.id, row.topic, row.payload, row.qos))
            return out

    def remove(self, row_id: int) -> bool:
        """Forget one confirmed event; False when it was already gone."""
        return self.remove_many((row_id,)) == 1

    def remove_many(self, row_ids: Iterable[int]) -> int:
        """Forget confirmed events; returns how many were there. Rows the disk
        will not delete now are hidden and deleted with the next write."""
        with self._lock:
            self._check_open()
            on_disk: List[int] = []
            removed = 0
            held = {r.id for r in self._held}
            gone: Set[int] = set()
            for row_id in (int(i) for i in row_ids):
                if row_id in held:
                    gone.add(row_id)
                elif row_id in self._moved:
                    on_disk.append(self._moved.pop(row_id))
                elif row_id > 0:
                    on_disk.append(row_id)
            if gone:
                self._held = collections.deque(r for r in self._held if r.id not in gone)
                removed += len(gone)
            if on_disk and self._db is not None:
                removed += self._delete(on_disk)
            return removed

    def _delete(self, row_ids: List[int]) -> int:
        db = self._db
        assert db is not None

        def delete() -> int:
            db.execute("BEGIN IMMEDIATE")
            try:
                removed = sum(db.execute("DELETE FROM events WHERE id = ?", (i,)).rowcount
                              for i in set(row_ids) | self._unremoved)
                if removed >= self._count:
                    # Empty: what was lost before has been followed by all
                    # that came after it; a new count starts.
                    db.execute("UPDATE meta SET value = 0 WHERE key = 'lost'")
                db.execute("COMMIT")
            except BaseException:
                roll_back(db)
                raise
            return removed

        try:
            removed = self._with_room(delete)
        except (OSError, sqlite3.Error) as err:
            self._refused("refused a removal", err)
            fresh = [i for i in row_ids if i not in self._unremoved]
            self._unremoved.update(fresh)
            return len(fresh)
        earlier = len(self._unremoved)
        self._unremoved.clear()
        self._count -= removed
        self._took()
        return max(0, removed - earlier)

    @property
    def count(self) -> int:
        """Events waiting, on disk and in memory."""
        return self._count - len(self._unremoved) + len(self._held)

    def __len__(self) -> int:
        return self.count

    @property
    def held(self) -> int:
        """Events waiting in memory because the disk refused them."""
        return len(self._held)

    @property
    def dropped(self) -> int:
        """Events dropped by the bound, or lost in a damaged file (see the class)."""
        return self._dropped

    @property
    def last_event_id(self) -> int:
        """The highest event id this queue has stored, now or before (0: none)."""
        return self._last_event_id

    @property
    def closed(self) -> bool:
        return self._closed

    def close(self) -> None:
        """Write what memory still holds if the disk takes it, close the
        database and release the directory; safe to call twice."""
        with self._lock:
            if self._closed:
                return
            self._closed = True
            if self._held and self._db is not None:
                self._flush()
            if self._held:
                log.error("event queue %s: %d event(s) held in memory are lost at shutdown (%s)",
                          self.path, len(self._held), self.error)
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


def durable_connection(path: str) -> sqlite3.Connection:
    """A connection to the SQLite file at `path` that syncs every commit to
    disk (WAL, synchronous=FULL) and keeps its write-ahead log short."""
    # isolation_level=None: transactions are explicit, so nothing is left
    # half-committed by Python's implicit BEGIN.
    db = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
    try:
        mode = db.execute("PRAGMA journal_mode=WAL").fetchone()[0]
        if str(mode).lower() != "wal":
            raise sqlite3.OperationalError(f"journal_mode is {mode}, WAL refused")
        db.execute("PRAGMA synchronous=FULL")
        # A short write-ahead log: checkpointed every WAL_PAGES pages and
        # cut back after, so it reuses its own space rather than growing
        # to SQLite's default 4 MB, which alone can fill a small partition.
        db.execute(f"PRAGMA wal_autocheckpoint={WAL_PAGES}")
        db.execute(f"PRAGMA journal_size_limit={WAL_PAGES * 4096 * 2}")
    except BaseException:
        db.close()
        raise
    return db


def roll_back(db: sqlite3.Connection) -> None:
    """Roll back an open transaction. A full disk can end the transaction
    itself, and the error raised must be the true one, not "no transaction"."""
    if db.in_transaction:
        try:
            db.execute("ROLLBACK")
        except sqlite3.Error:
            pass


def _meta(db: sqlite3.Connection, key: str) -> int:
    row = db.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
    return int(row[0]) if row else 0


def _count_lost(db: sqlite3.Connection, n: int) -> None:
    """Add `n` to the events lost since the queue last emptied, kept in the
    file so a restart still reports them."""
    if n > 0:
        db.execute("INSERT OR IGNORE INTO meta (key, value) VALUES ('lost', 0)")
        db.execute("UPDATE meta SET value = value + ? WHERE key = 'lost'", (n,))


class _Salvage(NamedTuple):
    held: Optional[int]  # events the file held; None when nothing tells
    exact: bool  # counted, rather than estimated from the row ids
    rows: List[Tuple[Any, ...]]  # readable rows, oldest first, ready to insert
    last_event_id: int  # the highest event id it had stored, where readable


def _salvage(path: str) -> _Salvage:
    """What SQLite can still read from a damaged queue file.

    Reads forwards until the first damaged page, then backwards from the end,
    so rows on both sides of the damage come back. When SQLite cannot count
    the rows, the number is estimated from the row ids: the queue holds a
    run of consecutive ids (taken from its head, appended at its tail), so the
    ids missing between the first row read and the last id given out are the
    rows lost (give or take the few confirmed out of order at the head)."""
    try:
        db = sqlite3.connect(path, isolation_level=None)
    except sqlite3.Error:
        return _Salvage(None, False, [], 0)
    rows: Dict[int, Tuple[Any, ...]] = {}
    try:
        try:
            last_event_id = _meta(db, "last_event_id")
        except sqlite3.Error:
            last_event_id = 0
        for order in ("ASC", "DESC"):
            try:
                cursor = db.execute(f"SELECT * FROM events ORDER BY id {order}")
                names = [d[0] for d in cursor.description]
                for values in cursor:
                    row = dict(zip(names, values))
                    payload = bytes(row["payload"])
                    event_id = row.get("event_id")
                    rows[int(row["id"])] = (
                        str(row["topic"]), sqlite3.Binary(payload), int(row["qos"]), float(row["created"]),
                        event_id if event_id is not None else event_id_of(payload), int(row.get("keep") or 0),
                    )
            except (sqlite3.Error, KeyError, TypeError, ValueError):
                continue
        ordered = [rows[k] for k in sorted(rows)]
        last_event_id = max([last_event_id] + [r[4] for r in ordered if r[4] is not None])
        try:
            return _Salvage(int(db.execute("SELECT COUNT(*) FROM events").fetchone()[0]), True, ordered,
                            last_event_id)
        except sqlite3.Error:
            pass
        try:
            last = db.execute("SELECT seq FROM sqlite_sequence WHERE name = 'events'").fetchone()
        except sqlite3.Error:
            last = None
    finally:
        db.close()
    if not rows:
        return _Salvage(None, False, [], last_event_id)
    top = max(max(rows), int(last[0]) if last else 0)
    return _Salvage(top - min(rows) + 1, False, ordered, last_event_id)
