"""Delivery to an MQTT broker with paho-mqtt (1.6 and 2.x).

Topics and their QoS/retain flags are the table in `base.TOPICS`:

* ``status``: the online payload, retained, on every (re)connect; the offline
  payload is the will, and is published by `close`.
* ``event``: written to the on-disk `EventQueue` first, then published from
  the queue head with the configured QoS, at most `window` in flight. A row
  leaves the queue only when paho reports its mid confirmed (PUBACK/PUBCOMP).
  After a reconnect the unconfirmed rows are sent again, in order, before
  anything newer, so events reach the broker in order at least once.
* ``levels``: retained QoS 1, not stored on disk; the latest is kept in
  memory and published again on every reconnect.
* ``summary``: QoS 0, dropped while disconnected.
* ``spectrum`` and ``capture``: QoS 1, handed to the delivery thread, which
  encodes them (a capture: reads its file into the `capture_message`
  format) and writes them to their own on-disk queues (`evidence_queue`), so
  neither the encoding nor the disk write ever holds up the measurement.
  They are published like events, from their queue heads, but only while no
  event waits: events always go first, and a large capture never sits
  between the broker and an event still to be sent.

The paho client itself (paho 1.6 and 2.x, client id, password, TLS) is set
up in `mqtt_client.py`.

Threads: paho's network thread runs the callbacks; they only note what
happened and wake the delivery thread, which does all event publishing and
queue bookkeeping. Callbacks run while paho holds its own locks, so they must
never wait for a lock that is held around a paho call; this split keeps the
two lock orders from ever meeting.

Reconnect after a broker restart re-sends whatever paho itself still holds
(a few in-flight events) as well as our own re-send from the queue: the
broker may see duplicates, never gaps. QoS 1 is "at least once" (MQTT 3.1.1
section 4.3.2): consumers de-duplicate by the event `id`.
"""

import collections
import logging
import sys
import threading
import time
from typing import Any, Deque, Dict, List, Optional, Tuple, Union

import paho.mqtt.client as mqtt

from ..config import MqttConfig
from ..errors import DeliveryError
from . import exposure
from .base import TOPICS, Payload, Sink, topic
from .capture_message import pack
from .mqtt_client import PAHO2, client_id, connack_text, new_client, rc_value, read_password
from .evidence_queue import CAPTURES, HANDOFF, HANDOFF_BYTES, SPECTRA, EvidenceQueue, StoreRefused
from .payloads import Lines, encode
from .queue import EventQueue, kept

_BEAT_S = 1.0  # the delivery thread wakes at least this often when idle
log = logging.getLogger("bandwatch.delivery")

CLOSE_TIMEOUT = 3.0  # seconds close() waits for the broker to confirm
WINDOW = 16  # events in flight at once; paho's own limit is set above this
SPECTRUM_WINDOW = 4  # spectra in flight at once
CAPTURE_WINDOW = 1  # captures in flight at once (each may be megabytes)
Store = Union[EventQueue, EvidenceQueue]


def evidence_bytes(payload: Payload) -> int:
    """What a spectrum or capture notice holds in memory, roughly: a
    spectrum's numbers, and a little for the rest."""
    lines = payload.get("channels")
    held = 0
    if isinstance(lines, dict):
        held = sum(v.values.nbytes for v in lines.values() if isinstance(v, Lines))
    return held + 2048


def _guarded(method: Any) -> Any:
    """Keep exceptions out of paho: one escaping a callback kills its loop thread."""

    def wrapper(self: "MqttSink", *args: Any, **kwargs: Any) -> None:
        try:
            method(self, *args, **kwargs)
        except Exception:  # noqa: BLE001 - logged, never re-raised into paho
            log.exception("MQTT callback %s failed", method.__name__)

    wrapper.__name__ = method.__name__
    wrapper.__doc__ = method.__doc__
    return wrapper


class MqttSink(Sink):
    """Publishes bandwatch payloads to `{prefix}/{node}/...` on the broker.

    Counters for the pipeline: `queued` (events waiting on disk), `dropped`
    (events lost to the queue bound since start; only grows), `published`
    (events confirmed by the broker), `summaries_dropped`, and `connected`;
    for spectra and captures together `evidence_queued`, `evidence_dropped`
    and `evidence_published`.
    """

    def __init__(
        self,
        cfg: MqttConfig,
        node: str,
        *,
        reconnect_min: float = 1.0,
        reconnect_max: float = 30.0,
        close_timeout: float = CLOSE_TIMEOUT,
        window: int = WINDOW,
    ) -> None:
        self.cfg = cfg
        self.node = node
        self.client_id = client_id(cfg.prefix, node)
        self.close_timeout = close_timeout
        self.window = max(1, int(window))
        self._event_qos = cfg.qos if TOPICS["event"][0] is None else TOPICS["event"][0]

        password: Optional[str] = None
        if cfg.password_file:
            password = read_password(cfg.password_file)
        for text in exposure.warnings(cfg):
            log.warning("%s", text)

        # Shared with the callbacks, all under _cond.
        self._cond = threading.Condition(threading.Lock())
        self._notes: Deque[Tuple[str, int]] = collections.deque()
        self._work = False
        self._stop = False
        self._levels: Optional[bytes] = None
        self._levels_due = False
        self._status: Optional[bytes] = None
        self._status_due = False
        self._closing: Optional[bytes] = None
        self._close_deadline = 0.0
        self._handoff: Deque[Tuple[str, str, Payload, int]] = collections.deque()  # ..., bytes
        self._handoff_bytes = 0
        self._evidence_refused = False  # the delivery thread's: retry every beat

        # Owned by the delivery thread.
        self._online = False
        self._inflight: Dict[int, Tuple[Store, int]] = {}  # mid -> (queue, row id)
        self._offline_mid: Optional[int] = None
        self._offline_sent = False
        self._closed_done = threading.Event()

        self._opened = False
        self._closed = False
        self._failing = False  # log repeated connect failures quietly
        # Network thread only: whether this connection got its CONNACK, and
        # paho's last error line (the TLS or socket error behind a drop).
        self._session = False
        self._paho_error = ""
        self.published = 0
        self.evidence_published = 0
        self.summaries_dropped = 0
        self._lost = 0  # events the queue did not take at all
        self._damage_told = False
        self._thread: Optional[threading.Thread] = None
        self._beat = time.monotonic()

        self.queue = EventQueue(cfg.queue_dir, cfg.queue_limit)
        self.spectra: Optional[EvidenceQueue] = None
        self.captures: Optional[EvidenceQueue] = None
        try:
            # Beside the event queue, under its directory lock.
            self.spectra = EvidenceQueue(cfg.queue_dir, SPECTRA, "spectrum", cfg.spectrum_queue_limit)
            self.captures = EvidenceQueue(cfg.queue_dir, CAPTURES, "capture", 10 ** 9,
                                          limit_bytes=int(cfg.capture_queue_mb * 1e6))
            self._client = self._make_client(password, reconnect_min, reconnect_max)
        except BaseException:
            self._close_queues()
            raise

    # -- setup ---------------------------------------------------------------

    def _make_client(self, password: Optional[str], reconnect_min: float, reconnect_max: float) -> Any:
        client = new_client(self.cfg, self.client_id, password, reconnect_min, reconnect_max,
                            self.window + SPECTRUM_WINDOW + CAPTURE_WINDOW + 4)
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_publish = self._on_publish
        if hasattr(client, "on_connect_fail"):
            client.on_connect_fail = self._on_connect_fail
        client.on_log = self._on_log
        return client

    def _topic(self, suffix: str) -> str:
        return topic(self.cfg.prefix, self.node, suffix)

    # -- counters ------------------------------------------------------------

    @property
    def queued(self) -> int:
        """Events waiting on disk for the broker's confirmation."""
        return self.queue.count

    @property
    def dropped(self) -> int:
        """Events lost to the queue bound or a damaged queue file since
        start; only grows."""
        return self.queue.dropped + self._lost

    @property
    def held(self) -> int:
        """Events waiting in memory because the disk refused them."""
        return self.queue.held

    @property
    def last_event_id(self) -> int:
        return self.queue.last_event_id

    def storage_fault(self) -> bool:
        if self.queue.error is not None:
            return True
        if self.queue.damage is not None and not self._damage_told:
            self._damage_told = True
            return True
        return False

    @property
    def evidence_queued(self) -> int:  # type: ignore[override]
        """Spectra and captures waiting to be stored or confirmed."""
        assert self.spectra is not None and self.captures is not None
        return self.spectra.count + self.captures.count + len(self._handoff)

    @property
    def evidence_dropped(self) -> int:  # type: ignore[override]
        """Spectra and captures lost to their queues' bounds since start; only grows."""
        assert self.spectra is not None and self.captures is not None
        return self.spectra.dropped + self.captures.dropped

    def _store_of(self, suffix: str) -> EvidenceQueue:
        store = self.spectra if suffix == "spectrum" else self.captures
        assert store is not None
        return store

    @property
    def connected(self) -> bool:
        """True while a broker session is up and the online status was sent."""
        return self._online

    # -- Sink ----------------------------------------------------------------

    def open(self, online: Payload, offline: Payload) -> None:
        if self._opened:
            raise RuntimeError("MqttSink.open called twice")
        self._opened = True
        self._status = encode(online).encode("utf-8")
        # MQTT 3.1.1 section 3.1.2.5: the will is published when the client
        # vanishes without DISCONNECT, so status turns offline on a crash.
        self._client.will_set(self._topic("status"), encode(offline), qos=1, retain=True)
        try:
            self._client.connect_async(self.cfg.host, self.cfg.port, keepalive=self.cfg.keepalive)
        except (OSError, ValueError) as err:
            self._opened = False  # close() then only closes the queue
            raise DeliveryError(f"MQTT broker {self.cfg.host}:{self.cfg.port}: {err}") from err
        self._thread = threading.Thread(target=self._run, name="bandwatch-mqtt", daemon=True)
        self._thread.start()
        log.info("MQTT: connecting to %s:%d as %s", self.cfg.host, self.cfg.port, self.client_id)
        # loop_start retries the first connection too, so a broker that is
        # down never blocks the caller.
        self._client.loop_start()

    def heartbeat(self) -> float:
        """When the delivery thread last went round its loop (-inf once it
        died); before open, now."""
        thread = self._thread
        if thread is None:
            return time.monotonic()
        return self._beat if thread.is_alive() else -float("inf")

    def send(self, suffix: str, payload: Payload) -> None:
        if self._closed:
            log.warning("MQTT: %s sent after close; dropped", suffix)
            return
        name = self._topic(suffix)  # refuses unknown suffixes
        if suffix in ("spectrum", "capture"):
            # Encoded and stored by the delivery thread: the measuring
            # thread only hands the payload over.
            size = evidence_bytes(payload)
            with self._cond:
                while self._handoff and (len(self._handoff) >= HANDOFF
                                         or self._handoff_bytes + size > HANDOFF_BYTES):
                    old = self._handoff.popleft()
                    self._handoff_bytes -= old[3]
                    self._store_of(old[0]).count_lost()
                    log.warning("MQTT: spectra and captures wait for the disk beyond their bound in memory; "
                                "the oldest %s was dropped", old[0])
                self._handoff.append((suffix, name, payload, size))
                self._handoff_bytes += size
                self._work = True
                self._cond.notify()
            return
        data = encode(payload).encode("utf-8")
        if suffix == "event":
            try:
                # A disk that refuses the write is the queue's to handle; this
                # catches only what should never happen.
                self.queue.put(name, data, self._event_qos, event_id=payload.get("id"), keep=kept(payload))
            except Exception as err:  # noqa: BLE001 - the measurement path must go on
                log.error("MQTT: event could not be queued in %s: %s", self.queue.path, err)
                self._lost += 1
                return
            self._wake()
        elif suffix == "levels":
            with self._cond:
                self._levels = data
                self._levels_due = True
                self._work = True
                self._cond.notify()
        elif suffix == "status":
            with self._cond:
                self._status = data
                self._status_due = True
                self._work = True
                self._cond.notify()
        else:  # summary: only the latest matters, never worth waiting for
            if not self._online:
                self.summaries_dropped += 1
                return
            info = self._client.publish(name, data, qos=TOPICS[suffix][0] or 0, retain=TOPICS[suffix][1])
            if info.rc != mqtt.MQTT_ERR_SUCCESS:
                self.summaries_dropped += 1

    def close(self, offline: Payload) -> None:
        if self._closed:
            return
        self._closed = True
        if not self._opened:
            self._close_queues()
            return
        with self._cond:
            self._closing = encode(offline).encode("utf-8")
            self._close_deadline = time.monotonic() + self.close_timeout
            self._work = True
            self._cond.notify()
        self._closed_done.wait(self.close_timeout + 1.0)
        with self._cond:
            self._stop = True
            self._cond.notify()
        if self._thread is not None:
            self._thread.join(timeout=5.0)
        try:
            self._client.disconnect()
        finally:
            self._client.loop_stop()
        self._online = False
        if not self._store_evidence():  # what the delivery thread had no time to store
            with self._cond:
                left, self._handoff = list(self._handoff), collections.deque()
            for item in left:
                self._store_of(item[0]).count_lost()
            log.error("MQTT: %d spectra and captures the disk refused are lost at shutdown", len(left))
        for what, store in (("event", self.queue), ("spectrum", self.spectra), ("capture", self.captures)):
            if store is not None and store.count:
                log.info("MQTT: %d %s(s) stay queued in %s for the next start", store.count, what, store.path)
        self._close_queues()
        log.info("MQTT: closed")

    def _close_queues(self) -> None:
        for store in (self.spectra, self.captures, self.queue):
            if store is not None:
                store.close()

    # -- paho callbacks (network thread) ---------------------------------------

    def _note(self, what: str, mid: int = 0) -> None:
        with self._cond:
            self._notes.append((what, mid))
            self._cond.notify()

    def _wake(self) -> None:
        with self._cond:
            self._work = True
            self._cond.notify()

    @_guarded
    def _on_connect(self, client: Any, userdata: Any, flags: Any, rc: Any, properties: Any = None) -> None:
        if rc_value(rc) != 0:
            level = logging.DEBUG if self._failing else logging.WARNING
            log.log(level, "MQTT: broker %s:%d refused the connection: %s",
                    self.cfg.host, self.cfg.port, connack_text(rc))
            self._failing = True
            return
        self._failing = False
        self._session = True
        self._paho_error = ""
        log.info("MQTT: connected to %s:%d", self.cfg.host, self.cfg.port)
        self._note("connect")

    @_guarded
    def _on_disconnect(self, client: Any, userdata: Any, *args: Any) -> None:
        # paho 1.x: (rc) or (rc, properties); 2.x: (flags, reason, properties)
        if PAHO2:
            reason = str(args[1]) if len(args) >= 2 else "unknown"
        else:
            reason = mqtt.error_string(args[0]) if args else "unknown"
        self._note("disconnect")
        accepted, self._session = self._session, False
        cause, self._paho_error = self._paho_error or reason, ""
        if self._closed:
            log.info("MQTT: disconnected")
        elif not accepted:
            # Dropped before CONNACK: a failed attempt, not a lost session.
            # TLS 1.3 lands here when the broker rejects our certificate
            # (or the lack of one) after the handshake.
            level = logging.DEBUG if self._failing else logging.WARNING
            log.log(level, "MQTT: broker %s:%d closed the connection before accepting it (%s); retrying",
                    self.cfg.host, self.cfg.port, cause)
            self._failing = True
        else:
            log.warning("MQTT: connection to %s:%d lost (%s); retrying",
                        self.cfg.host, self.cfg.port, cause)

    @_guarded
    def _on_log(self, client: Any, userdata: Any, level: int, buf: str) -> None:
        if level == mqtt.MQTT_LOG_ERR:
            self._paho_error = buf

    @_guarded
    def _on_publish(self, client: Any, userdata: Any, mid: int, *args: Any) -> None:
        self._note("published", mid)

    @_guarded
    def _on_connect_fail(self, client: Any, userdata: Any) -> None:
        # paho calls this inside its `except OSError`, so the cause (refused,
        # unresolvable, certificate rejected) is still at hand.
        err = sys.exc_info()[1]
        level = logging.DEBUG if self._failing else logging.WARNING
        log.log(level, "MQTT: cannot reach broker %s:%d (%s); retrying",
                self.cfg.host, self.cfg.port, err or "connection failed")
        self._failing = True

    # -- delivery thread ---------------------------------------------------------

    def _run(self) -> None:
        while True:
            with self._cond:
                while not (self._notes or self._work or self._stop):
                    # Wake at least every second: the beat tells the
                    # watchdog this thread is not stuck.
                    self._beat = time.monotonic()
                    timeout: Optional[float] = _BEAT_S
                    if self._closing is not None:
                        timeout = max(0.0, self._close_deadline - time.monotonic()) + 0.05
                    # A refusing disk is retried every beat.
                    if not self._cond.wait(timeout) and (self._closing is not None or self.queue.error
                                                         or self._evidence_refused):
                        break
                if self._stop:
                    return
                notes = list(self._notes)
                self._notes.clear()
                self._work = False
                # Taken now: a newer one arriving meanwhile sets the flag again.
                levels = self._levels if self._levels_due else None
                status = self._status if self._status_due else None
                self._levels_due = self._status_due = False
                closing = self._closing
            try:
                self._store_evidence()
                self._step(notes, levels, status, closing)
            except Exception:  # noqa: BLE001 - keep delivering; the queue keeps the events
                log.exception("MQTT: delivery step failed")
                time.sleep(0.5)

    def _store_evidence(self) -> bool:
        """Encode spectra and pack captures, and write them to their queues,
        oldest first; True when none is left. A disk that refuses a write
        leaves it (and those after it) waiting in memory for the next try."""
        while True:
            with self._cond:
                if not self._handoff:
                    self._evidence_refused = False
                    return True
                item = self._handoff[0]
            suffix, name, payload, size = item
            store = self._store_of(suffix)
            try:
                data = encode(payload).encode("utf-8") if suffix == "spectrum" else pack(payload)
                store.put(name, data, TOPICS[suffix][0] or 0)
            except StoreRefused:
                self._evidence_refused = True
                return False
            except OSError as err:  # the capture file went away before it was read
                log.error("MQTT: capture %s cannot be read: %s", payload.get("path"), err.strerror or err)
                store.count_lost()
            except Exception as err:  # noqa: BLE001 - keep delivering; counted, and the check says so
                log.error("MQTT: %s could not be stored in %s: %s", suffix, store.path, err)
                store.count_lost()
            with self._cond:
                if self._handoff and self._handoff[0] is item:  # not dropped meanwhile
                    self._handoff.popleft()
                    self._handoff_bytes -= size

    def _step(
        self, notes: Any, levels: Optional[bytes], status: Optional[bytes], closing: Optional[bytes]
    ) -> None:
        self.queue.retry()
        confirmed: Dict[Store, List[int]] = {}
        online = self._online
        for what, mid in notes:
            if what == "connect":
                online = True
                # Mids of the lost session mean nothing now; paho's own
                # re-sends of them are harmless duplicates.
                self._inflight.clear()
                status = self._status
                levels = self._levels
            elif what == "disconnect":
                online = self._online = False
                self._inflight.clear()
            elif what == "published":
                row = self._inflight.pop(mid, None)
                if row is not None:
                    confirmed.setdefault(row[0], []).append(row[1])
                elif mid == self._offline_mid and self._offline_mid is not None:
                    self._closed_done.set()
        for store, rows in confirmed.items():
            removed = store.remove_many(rows)
            if store is self.queue:
                self.published += removed
            else:
                self.evidence_published += removed
        # Offline, these wait for the next connect, which sends the latest.
        if online and status is not None and closing is None:
            self._client.publish(self._topic("status"), status, qos=1, retain=True)
        # Only now: summaries (sent from the caller's thread) follow the status.
        self._online = online
        if self._online and levels is not None:
            self._client.publish(self._topic("levels"), levels, qos=1, retain=True)
        if closing is None:
            self._fill()
        else:
            self._finish(closing)

    def _fill(self) -> None:
        """Publish from the queue heads: events until `window` are in flight;
        spectra and captures only while no event waits."""
        if not self._online:
            return
        if not self._fill_from(self.queue, self.window):
            return
        if self.queue.count == 0:
            assert self.spectra is not None and self.captures is not None
            if self._fill_from(self.spectra, SPECTRUM_WINDOW):
                self._fill_from(self.captures, CAPTURE_WINDOW)

    def _fill_from(self, store: Store, window: int) -> bool:
        """Publish from `store` until `window` of its rows are in flight;
        False when the client refused a publish (not connected after all)."""
        busy = {row for queue, row in self._inflight.values() if queue is store}
        room = window - len(busy)
        if room <= 0 or not store.count:
            return True
        for row in store.peek(window):
            if room <= 0:
                break
            if row.id in busy:
                continue
            info = self._client.publish(row.topic, row.payload, qos=row.qos, retain=False)
            if info.rc != mqtt.MQTT_ERR_SUCCESS:
                return False  # the reconnect re-sends
            self._inflight[info.mid] = (store, row.id)
            room -= 1
        return True

    def _finish(self, offline: bytes) -> None:
        """Closing: drain what the broker will take in time, then say offline."""
        if not self._online:
            self._closed_done.set()  # the will already turned status offline
            return
        late = time.monotonic() >= self._close_deadline
        if not late and (self.queue.count or self.evidence_queued or self._inflight):
            self._fill()
            return
        if not self._offline_sent:
            self._offline_sent = True
            info = self._client.publish(self._topic("status"), offline, qos=1, retain=True)
            if info.rc != mqtt.MQTT_ERR_SUCCESS:
                self._closed_done.set()
                return
            self._offline_mid = info.mid
        if time.monotonic() >= self._close_deadline + 0.5:
            self._closed_done.set()
