"""Limits relative to a band's learned typical value.

A band with `baseline = N` learns its typical value over the first N seconds
of stream after start (or after a reset): the median of its values, so a
passing knock does not set it. Then `warning_ratio` and `alarm_ratio` raise
levels at those multiples of it. Until it is learned, ratio limits are
absent and cannot raise a level.

Learned values are kept in `baselines.json` in the state directory (written
to a temporary file, fsynced, renamed), keyed by band and channel, with the
learning time they were made with: a restart keeps them, a changed
`baseline` learns afresh, and `bandwatch reset-baseline` removes them.
"""

import json
import logging
import os
from typing import Dict, Optional, Tuple

import numpy as np

from ..config import BandConfig
from ..deliver import private

log = logging.getLogger("bandwatch.baseline")

FILE = "baselines.json"
MAX_VALUES = 100_000  # beyond this, every other value is dropped (still a fair median)


def key(band: str, channel: str) -> str:
    return f"{band}/{channel}"


class BaselineStore:
    """The learned values on disk (or in memory without a state directory)."""

    def __init__(self, directory: Optional[str], read_only: bool = False) -> None:
        self.directory = directory
        self.path = os.path.join(directory, FILE) if directory else None
        self.read_only = read_only  # reads what is stored, keeps what it learns in memory
        self.entries: Dict[str, Dict[str, float]] = self._load()

    def _load(self) -> Dict[str, Dict[str, float]]:
        if self.path is None or not os.path.exists(self.path):
            return {}
        try:
            with open(self.path, encoding="utf-8") as fh:
                data = json.load(fh)
            if not isinstance(data, dict):
                raise ValueError("not a JSON object")
            return {k: v for k, v in data.items() if isinstance(v, dict) and "value" in v}
        except (OSError, ValueError) as exc:
            log.error("cannot read learned baselines from %s (%s); learning afresh", self.path, exc)
            return {}

    def reload(self) -> None:
        self.entries = self._load()

    def get(self, name: str, seconds: float) -> Optional[float]:
        entry = self.entries.get(name)
        if entry is None or entry.get("seconds") != seconds:
            return None
        return float(entry["value"])

    def put(self, name: str, value: float, seconds: float, stream_s: float) -> None:
        self.entries[name] = {"value": value, "seconds": seconds, "learned_at_stream_s": stream_s}
        self._save()

    def remove(self, names) -> int:
        gone = [n for n in names if n in self.entries]
        for n in gone:
            del self.entries[n]
        self._save()
        return len(gone)

    def _save(self) -> None:
        if self.path is None or self.read_only:
            return
        tmp = self.path + ".tmp"
        try:
            private.make_dirs(self.directory)  # type: ignore[arg-type]
            with os.fdopen(private.open_file(tmp, os.O_WRONLY | os.O_TRUNC), "w", encoding="utf-8") as fh:
                json.dump(self.entries, fh, indent=1, sort_keys=True)
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, self.path)
        except OSError as exc:
            log.error("cannot store learned baselines in %s: %s", self.path, exc.strerror or exc)


class Baseline:
    """Learning and the limits it gives, for one band on one channel."""

    def __init__(self, band: BandConfig, channel: str, store: BaselineStore) -> None:
        self.band = band
        self.name = key(band.name, channel)
        self.store = store
        self.value: Optional[float] = store.get(self.name, band.baseline or 0.0) if band.baseline else None
        self._start: Optional[float] = None
        self._values = np.empty(1024)
        self._count = 0

    @property
    def learning(self) -> bool:
        return self.band.baseline is not None and self.value is None

    def limits(self) -> Tuple[Optional[float], Optional[float]]:
        """(warning, alarm) now: absolute ones as given, ratio ones once learned."""
        band, value = self.band, self.value
        warning = band.warning if band.warning_ratio is None else None if value is None else band.warning_ratio * value
        alarm = band.alarm if band.alarm_ratio is None else None if value is None else band.alarm_ratio * value
        return warning, alarm

    def update(self, value: float, t: float) -> bool:
        """Feed one band value; True when learning has just finished."""
        if not self.learning or not np.isfinite(value):
            return False
        if self._start is None:
            self._start = t
        if self._count == len(self._values):
            if self._count >= MAX_VALUES:
                self._values[: self._count // 2] = self._values[: self._count : 2]
                self._count //= 2
            else:
                self._values = np.resize(self._values, 2 * len(self._values))
        self._values[self._count] = value
        self._count += 1
        assert self.band.baseline is not None
        if t - self._start < self.band.baseline:
            return False
        self.value = float(np.median(self._values[: self._count]))
        self.store.put(self.name, self.value, self.band.baseline, t)
        log.info("baseline of %s learned: %.4g", self.name, self.value)
        self._values = np.empty(0)
        return True

    def reset(self) -> None:
        self.value = None
        self._start = None
        self._values = np.empty(1024)
        self._count = 0
