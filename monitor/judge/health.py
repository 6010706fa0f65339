"""Health checks: is the measurement itself to be trusted?

Each check measures one value and runs it through the same level machine as
the bands, with the levels `normal` and `fault` (README, What is published):

| check    | scope   | value                                                    | fault at or above |
| -------- | ------- | -------------------------------------------------------- | ----------------- |
| stale    | source  | seconds without samples (wall clock)                     | `stale`           |
| gap      | source  | breaks in the samples (sequence jumps, dropped blocks, reconnects) in the last `window` s | 1 |
| corrupt  | source  | share of frames (or lines) rejected in the last `window` | `corrupt`         |
| clipping | channel | share of samples at the integer type's full scale, last `window` | `clipping` |
| flatline | channel | seconds of stream in which the channel did not change    | `flatline`        |
| rate     | source  | relative disagreement of frame timestamps with sample_rate | `rate`          |
| nyquist  | channel | share of the power in the top 10 % below Nyquist         | `nyquist`           |
| queue    | node    | events dropped by the queue bound since it last emptied  | 1                 |
| config   | node    | 1 while the last reload was refused, else 0              | 1                 |

Counts come from the source's cumulative counters (`counters()`, where the
source has them), differenced over a sliding window of stream time.
"""

import collections
import math
from dataclasses import dataclass
from typing import Deque, Dict, List, Optional, Sequence, Tuple

import numpy as np

from ..config import HealthConfig
from .levels import LevelMachine
from ..analyse.spectrum import Spectrum

# Counter snapshots are taken at most this often (stream seconds), which
# bounds the window's memory whatever the block size.
_SNAPSHOT_S = 0.1
# Timestamps must span this much stream time before the rate is judged, so
# that arrival jitter of single frames does not count.
_RATE_BASELINE_S = 5.0
NYQUIST_TOP_SHARE = 0.1  # the top 10 % of the band below Nyquist


@dataclass
class Check:
    name: str
    channel: Optional[str]
    unit: str
    rule: LevelMachine
    value: Optional[float] = None


Change = Tuple[Check, Tuple[str, str]]


class Health:
    """Every health check of one monitor, fed by the pipeline."""

    def __init__(self, config: HealthConfig, channels: Sequence[str], sample_rate: float) -> None:
        self.config = config
        self.channels = list(channels)
        self.fs = sample_rate

        def check(name: str, channel: Optional[str], unit: str, limit: float, hysteresis: float = 0.0,
                  delay: float = 0.0) -> Check:
            return Check(name, channel, unit, LevelMachine([("fault", limit)], hysteresis, delay))

        self.stale = check("stale", None, "s", config.stale)
        self.gap = check("gap", None, "count", 1.0)
        self.corrupt = check("corrupt", None, "share", config.corrupt)
        self.rate = check("rate", None, "share", config.rate)
        self.clipping = [check("clipping", c, "share", config.clipping) for c in self.channels]
        self.flatline = [check("flatline", c, "s", config.flatline) for c in self.channels]
        # Nyquist strip: a little hysteresis and delay, since the share of a noisy
        # spectrum wavers around any limit.
        self.nyquist = [check("nyquist", c, "share", config.nyquist, 0.2, 2.0) for c in self.channels]
        self.queue = check("queue", None, "count", 1.0)
        self.config_check = check("config", None, "count", 1.0)
        self.checks: List[Check] = (
            [self.stale, self.gap, self.corrupt]
            + self.clipping
            + self.flatline
            + [self.rate]
            + self.nyquist
            + [self.queue, self.config_check]
        )
        self._dropped_base = 0
        # Counter snapshots over the window, oldest first; the first stands
        # for "before any sample", so a fresh monitor judges all it has seen.
        self._snapshots: Deque[Tuple[float, Dict[str, float]]] = collections.deque([(-math.inf, {})])
        self._flat_since: List[Optional[float]] = [None] * len(self.channels)
        self._last_row: Optional[List[float]] = None
        self._rate_origin: Optional[Tuple[int, int]] = None  # (timestamp_us, stream sample index)
        self._top_line: Optional[int] = None
        # Totals for what sources do not count themselves.
        self._own: Dict[str, int] = {"samples": 0, "breaks": 0}
        self._own.update({f"clipped{i}": 0 for i in range(len(self.channels))})

    @staticmethod
    def _update(check: Check, value: Optional[float], t: float, out: List[Change]) -> None:
        check.value = value
        change = check.rule.update(value, t)
        if change:
            out.append((check, change))

    # ------------------------------------------------------------- inputs

    def on_quiet(self, seconds: float, t: float) -> List[Change]:
        """Seconds since the last sample arrived (wall clock)."""
        out: List[Change] = []
        self._update(self.stale, seconds, t, out)
        return out

    def on_block(
        self,
        raw: np.ndarray,
        start_index: int,
        lost: int,
        t: float,
        full_scale: Optional[float],
        timestamp_us: Optional[int],
        counters: Optional[Dict[str, int]],
    ) -> List[Change]:
        """One block of raw samples whose first sample has stream index
        `start_index`; `t` is the stream time of its last sample."""
        out: List[Change] = []
        self._update(self.stale, 0.0, t, out)
        totals: Dict[str, float] = dict(counters or {})
        self._count_block(raw, lost, full_scale, totals)
        self._windowed(t, totals, lost > 0, out)
        self._flatline(raw, lost, t, out)
        self._rate(start_index, lost, timestamp_us, t, out)
        return out

    def on_spectrum(self, spectrum: Spectrum, t: float) -> List[Change]:
        out: List[Change] = []
        if self._top_line is None:
            lines = spectrum.psd.shape[1]
            # First line of the top 10 % of the band below Nyquist.
            self._top_line = int(np.ceil((1.0 - NYQUIST_TOP_SHARE) * (lines - 1)))
        # np.add.reduce is what ndarray.sum calls, without its wrapper: every hop.
        top = np.add.reduce(spectrum.psd[:, self._top_line :], axis=1)
        total = np.add.reduce(spectrum.psd[:, 1 : self._top_line], axis=1) + top
        for check, top_i, total_i in zip(self.nyquist, top.tolist(), total.tolist()):
            self._update(check, top_i / total_i if total_i > 0 else None, t, out)
        return out

    def on_delivery(self, dropped: int, queued: int, t: float) -> List[Change]:
        """The sink's drop total (only grows) and its queue length now. The
        fault stands from the first drop until the queue has emptied."""
        out: List[Change] = []
        if queued == 0:
            self._dropped_base = dropped
        self._update(self.queue, float(dropped - self._dropped_base), t, out)
        return out

    def on_config(self, refused: bool, t: float) -> List[Change]:
        """The outcome of a reload: refused (a bad file) or taken."""
        out: List[Change] = []
        self._update(self.config_check, 1.0 if refused else 0.0, t, out)
        return out

    # ------------------------------------------------------------ details

    def _count_block(self, raw: np.ndarray, lost: int, full_scale: Optional[float],
                     totals: Dict[str, float]) -> None:
        own = self._own
        own["samples"] += raw.shape[0]
        # Every break in the samples, whatever caused it: a sequence jump, a
        # dropped block when the pipeline fell behind, a reconnect.
        own["breaks"] += 1 if lost > 0 else 0
        # Cheap test first: most blocks have no sample near full scale.
        if full_scale is not None and raw.size and (raw.max() >= full_scale or raw.min() <= -full_scale):
            clipped = np.count_nonzero(np.abs(raw) >= full_scale, axis=0)
            for i, n in enumerate(clipped):
                own[f"clipped{i}"] += int(n)
        totals.update(own)

    def _windowed(self, t: float, totals: Dict[str, float], gap: bool, out: List[Change]) -> None:
        snaps = self._snapshots
        if t - snaps[-1][0] >= _SNAPSHOT_S:
            snaps.append((t, totals))
        elif not gap:
            return  # judged with the next snapshot, at most _SNAPSHOT_S later
        while len(snaps) > 1 and snaps[1][0] <= t - self.config.window:
            snaps.popleft()
        _, old = snaps[0]

        def delta(key: str) -> float:
            return float(totals.get(key, 0) - old.get(key, 0))

        self._update(self.gap, delta("breaks"), t, out)
        rejected = delta("corrupt_frames") + delta("mismatched") + delta("nonfinite")
        seen = delta("frames") + rejected
        self._update(self.corrupt, rejected / seen if seen > 0 else 0.0, t, out)
        samples = delta("samples")
        for i, check in enumerate(self.clipping):
            self._update(check, delta(f"clipped{i}") / samples if samples > 0 else 0.0, t, out)

    def _flatline(self, raw: np.ndarray, lost: int, t: float, out: List[Change]) -> None:
        n = raw.shape[0]
        if n == 0:
            return
        block_start = t - (n - 1) / self.fs
        # The few rows compared, as plain floats: per channel the work is then
        # a comparison or two, cheaper than numpy calls on short rows.
        tail = raw[-1].tolist()
        before_tail = raw[-2].tolist() if n > 1 else None
        head = raw[0].tolist()
        previous = None if lost else self._last_row
        for i, check in enumerate(self.flatline):
            # Index of the channel's last change in this block (-1: none), the
            # first sample compared with the previous block's last. A moving
            # channel almost always changes at its last sample: check that first.
            if before_tail is not None and tail[i] != before_tail[i]:
                last = n - 1
            else:
                last = _last_change(raw[:, i])
                if last < 0 and (previous is None or head[i] != previous[i]):
                    last = 0
            if last >= 0:
                self._flat_since[i] = block_start + last / self.fs
            elif self._flat_since[i] is None:
                self._flat_since[i] = block_start
            self._update(check, t - self._flat_since[i], t, out)
        self._last_row = tail

    def _rate(self, index: int, lost: int, timestamp_us: Optional[int], t: float, out: List[Change]) -> None:
        if timestamp_us is None:
            return
        if lost or self._rate_origin is None:
            self._rate_origin = (timestamp_us, index)
            return
        t0, i0 = self._rate_origin
        elapsed = (timestamp_us - t0) / 1e6
        if (index - i0) / self.fs < _RATE_BASELINE_S or elapsed <= 0:
            return
        measured = (index - i0) / elapsed
        self._update(self.rate, abs(measured / self.fs - 1.0), t, out)

    def rows(self) -> List[Dict[str, object]]:
        """name, channel, level and value of every check, for `levels`."""
        return [
            {"name": c.name, "channel": c.channel, "level": c.rule.level,
             "value": None if c.value is None or not math.isfinite(c.value) else c.value}
            for c in self.checks
        ]


def _last_change(column: np.ndarray) -> int:
    """Index of the last sample of `column` that differs from the one
    before it, or -1 if it never changes."""
    changed = column[1:] != column[:-1]
    if not changed.any():
        return -1
    return len(column) - 1 - int(np.argmax(changed[::-1]))
