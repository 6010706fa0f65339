"""The interface every delivery backend implements, and the topic table."""

import time
from typing import Any, Dict, Optional, Tuple

Payload = Dict[str, Any]

# Topic suffix -> (QoS, retained). QoS None means the configured [mqtt] qos.
TOPICS: Dict[str, Tuple[Optional[int], bool]] = {
    "status": (1, True),
    "summary": (0, False),
    "event": (None, False),
    "levels": (1, True),
    "spectrum": (1, False),
    "capture": (1, False),
}


def topic(prefix: str, node: str, suffix: str) -> str:
    """`{prefix}/{node}/{suffix}`; the config has already checked both parts."""
    if suffix not in TOPICS:
        raise ValueError(f"{suffix=} is not one of {', '.join(TOPICS)}")
    return f"{prefix}/{node}/{suffix}"


class Sink:
    """Takes payloads from the pipeline and delivers them.

    The pipeline calls `open` once with the online and offline status
    payloads (the offline one is the will, where the backend has one), then
    `send` for every summary, event and levels payload, then `close` with the
    offline status. `send` must never block the measurement path for long.

    `queued` and `dropped` tell how many events wait for the broker and how
    many were lost (to the queue bound or a damaged queue file) since start;
    `held` how many of the waiting ones sit in memory because the disk refused
    them; `last_event_id` the highest event id the backend has stored, now or
    before; `evidence_queued` and `evidence_dropped` what `queued` and
    `dropped` are for events, for spectra and captures together (a backend
    without a queue keeps all of them 0).
    """

    queued = 0
    dropped = 0
    held = 0
    last_event_id = 0
    evidence_queued = 0
    evidence_dropped = 0

    def storage_fault(self) -> bool:
        """True while the backend's disk refuses writes, and once after it
        found its stored events damaged; a backend without storage: never."""
        return False

    def open(self, online: Payload, offline: Payload) -> None:
        raise NotImplementedError

    def send(self, suffix: str, payload: Payload) -> None:
        raise NotImplementedError

    def close(self, offline: Payload) -> None:
        raise NotImplementedError

    def tick(self) -> None:
        """Called at every turn of the measuring loop (at least every 0.5 s,
        samples or not), in the measuring thread; must return at once. A
        backend that draws or polls does it here; most do nothing."""

    def heartbeat(self) -> float:
        """Monotonic time of the backend's last sign of life. A backend that
        delivers in the caller's thread is alive whenever asked; one with a
        delivery thread reports when that thread last went round its loop."""
        return time.monotonic()
