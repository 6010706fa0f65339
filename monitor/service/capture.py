"""Raw samples around an alarm, kept for the analyst.

The last `seconds + after` seconds of samples (in the unit, after scale) sit
in a fixed ring allocated at start, as float32: recordings store float32, so
nothing is lost by it, and it halves the ring. When a band rises to warning
or alarm, the capture is named at once (the event carries the name) and
written once `after` more seconds of samples have arrived: `seconds` before
the trigger and `after` after it, as a recording (monitor.acquire.recording) in
`dir`. Triggers while a capture is pending share its file. Only the newest
`keep` captures are kept.

A capture never joins samples across a gap (as the spectra do not): a gap
while one is pending writes it at once with what arrived before the gap, and
so does a source that has sent nothing for a while (`cut`, called by the
pipeline), so a link drop cannot hold a capture back or fill it with samples
from long after its trigger. The metadata says why a capture was cut short.
"""

import datetime as _dt
import logging
import os
import re
from dataclasses import dataclass, field
from typing import Any, Callable, Dict, List, Optional, Sequence

import numpy as np

from ..acquire.recording import RecordingWriter
from ..acquire.ring import WrapRing
from ..config import CaptureConfig
from ..deliver import private

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
        self.ring = WrapRing(len(self.channels), self.before + self.after)
        self._end = 0  # stream index one past the newest sample in the ring
        self._pending: Optional[_Pending] = None
        self.written: List[str] = []
        # Told (path, the file's capture metadata) after each file is written.
        self.on_write: Optional[Callable[[str, Dict[str, Any]], None]] = None

    def feed(self, samples: np.ndarray, end_index: int) -> None:
        """Samples shaped (channels, n) in the unit, ending just before `end_index`."""
        start = end_index - samples.shape[1]
        if self._end and start != self._end:
            self.cut("a gap in the samples")
            self.ring.clear()  # never join across it
        pending = self._pending
        if pending is not None and start < pending.due <= end_index:
            # Split at the due point, so the capture ends exactly `after` past its trigger.
            split = pending.due - start
            self._keep(samples[:, :split], pending.due)
            self._pending = None
            self._write(pending, None)
            samples = samples[:, split:]
        self._keep(samples, end_index)

    def _keep(self, samples: np.ndarray, end_index: int) -> None:
        self.ring.write(samples)
        self._end = end_index

    def trigger(self, stream_index: int, event: Dict[str, Any]) -> str:
        """A band rose at `stream_index` (the end of the samples fed so far);
        returns the capture's file name."""
        if self._pending is None:
            stamp = _dt.datetime.now(_dt.timezone.utc).strftime("%Y%m%dT%H%M%SZ")
            label = re.sub(r"[^A-Za-z0-9_-]", "_", f"{event.get('name')}-{event.get('channel')}")
            name = f"{self.node}-{stamp}-event{event.get('id')}-{label}{_SUFFIX}"
            self._pending = _Pending(name, stream_index, stream_index + self.after)
        pending = self._pending
        pending.events.append({k: event.get(k) for k in ("id", "name", "channel", "level", "stream_s")})
        if pending.due <= self._end:  # after = 0: nothing more to wait for
            self._pending = None
            self._write(pending, None)
        return pending.name

    def cut(self, reason: str) -> None:
        """Write a pending capture now with what has arrived: the samples it
        waits for will not come in time (a gap, a silent source, shutdown)."""
        if self._pending is not None:
            pending, self._pending = self._pending, None
            self._write(pending, reason)

    def flush(self) -> None:
        """Write a pending capture with what has arrived (on shutdown)."""
        self.cut("shutdown")

    def _write(self, pending: _Pending, cut: Optional[str]) -> None:
        first = max(pending.trigger - self.before, self._end - self.ring.count)
        n = self._end - first
        samples = self.ring.latest(n).T if n > 0 else np.zeros((0, len(self.channels)))
        path = os.path.join(self.config.dir, pending.name)
        start = _dt.datetime.now(_dt.timezone.utc) - _dt.timedelta(seconds=n / self.fs)
        extra = {"capture": {"trigger_s": round((pending.trigger - first) / self.fs, 6),
                             "after_s": round((self._end - pending.trigger) / self.fs, 6),
                             "first_stream_s": round(first / self.fs, 6), "cut": cut,
                             "events": pending.events}}
        try:
            private.make_dirs(self.config.dir)
            private.touch(path)  # 0600 before a sample is in it
            with RecordingWriter(path, self.fs, self.channels, self.unit, start_time=start, extra=extra) as w:
                w.write(samples)
        except OSError as exc:
            log.error("cannot write the capture %s: %s", path, exc.strerror or exc)
            return
        log.info("capture written: %s (%.3g s, trigger at %.3g s%s)", path, n / self.fs,
                 (pending.trigger - first) / self.fs, f"; cut short by {cut}" if cut else "")
        self.written.append(path)
        self._prune()
        if self.on_write is not None:
            self.on_write(path, {**extra["capture"], "seconds": round(n / self.fs, 6)})

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
