"""Raw samples around an alarm, kept for the analyst.

The last `seconds + after` seconds of samples (in the unit, after scale) sit
in a fixed ring allocated at start. When a band rises to warning or alarm,
the capture is named at once (the event carries the name) and written once
`after` more seconds of samples have arrived: `seconds` before the trigger
and `after` after it, as a recording (monitor.acquire.recording) in `dir`. Triggers
while a capture is pending share its file. Only the newest `keep` captures
are kept. A gap in the samples clears the ring, as it does the spectra: a
capture never joins samples across one, so it may hold less than asked.
"""

import datetime as _dt
import logging
import os
import re
from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional, Sequence

import numpy as np

from ..config import CaptureConfig
from ..acquire.recording import RecordingWriter
from ..acquire.ring import Ring

log = logging.getLogger("bandwatch.capture")

_SUFFIX = ".wav"


@dataclass
class _Pending:
    name: str
    trigger: int  # stream sample index of the trigger
    due: int  # stream sample index after which it is written
    events: List[Dict[str, Any]] = field(default_factory=list)


class Capture:
    def __init__(self, config: CaptureConfig, node: str, channels: Sequence[str], unit: str,
                 sample_rate: float) -> None:
        self.config = config
        self.node = node
        self.channels = list(channels)
        self.unit = unit
        self.fs = sample_rate
        self.before = int(round(config.seconds * sample_rate))
        self.after = int(round(config.after * sample_rate))
        self.ring = Ring(len(self.channels), self.before + self.after)
        self._end = 0  # stream index one past the newest sample in the ring
        self._pending: Optional[_Pending] = None
        self.written: List[str] = []

    def feed(self, samples: np.ndarray, end_index: int) -> None:
        """Samples (n, channels) in the unit, ending just before `end_index`."""
        start = end_index - samples.shape[0]
        if self._end and start != self._end:
            self.ring.clear()  # a gap: never join across it
        if self._pending is not None and start < self._pending.due <= end_index:
            # Split at the due point, so the capture ends exactly `after` past its trigger.
            cut = self._pending.due - start
            self._write_ring(samples[:cut], start + cut)
            self._write(self._pending)
            self._pending = None
            samples, start = samples[cut:], start + cut
        self._write_ring(samples, end_index)

    def _write_ring(self, samples: np.ndarray, end_index: int) -> None:
        cap = self.ring.capacity
        self.ring.write(samples[-cap:] if samples.shape[0] > cap else samples)
        self._end = end_index

    def trigger(self, stream_index: int, event: Dict[str, Any]) -> str:
        """A band rose at `stream_index`; returns the capture's file name."""
        if self._pending is None:
            stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
            label = re.sub(r"[^A-Za-z0-9_-]", "_", f"{event.get('name')}-{event.get('channel')}")
            name = f"{self.node}-{stamp}-event{event.get('id')}-{label}{_SUFFIX}"
            self._pending = _Pending(name, stream_index, stream_index + self.after)
        self._pending.events.append({k: event.get(k) for k in ("id", "name", "channel", "level", "stream_s")})
        return self._pending.name

    def flush(self) -> None:
        """Write a pending capture with what has arrived (on shutdown)."""
        if self._pending is not None:
            self._write(self._pending)
            self._pending = None

    def _write(self, pending: _Pending) -> None:
        first = max(pending.trigger - self.before, self._end - self.ring.count)
        n = self._end - first
        samples = self.ring.latest(n).T if n > 0 else np.zeros((0, len(self.channels)))
        path = os.path.join(self.config.dir, pending.name)
        start = _dt.datetime.now(_dt.timezone.utc) - _dt.timedelta(seconds=n / self.fs)
        extra = {"capture": {"trigger_s": round((pending.trigger - first) / self.fs, 6),
                             "first_stream_s": round(first / self.fs, 6), "events": pending.events}}
        try:
            os.makedirs(self.config.dir, exist_ok=True)
            with RecordingWriter(path, self.fs, self.channels, self.unit, start_time=start, extra=extra) as w:
                w.write(samples)
        except OSError as exc:
            log.error("cannot write the capture %s: %s", path, exc.strerror or exc)
            return
        log.info("capture written: %s (%.3g s, trigger at %.3g s)", path, n / self.fs,
                 (pending.trigger - first) / self.fs)
        self.written.append(path)
        self._prune()

    def _prune(self) -> None:
        try:
            names = sorted(
                (e for e in os.scandir(self.config.dir) if e.name.startswith(self.node + "-")
                 and e.name.endswith(_SUFFIX)),
                key=lambda e: e.stat().st_mtime_ns,
            )
        except OSError:
            return
        for entry in names[: max(0, len(names) - self.config.keep)]:
            try:
                os.remove(entry.path)
            except OSError as exc:
                log.warning("cannot remove the old capture %s: %s", entry.path, exc.strerror or exc)
