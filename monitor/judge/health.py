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
| blind    | source  | seconds of samples received since the last result        | `blind`, or from the span |
| implausible | channel | samples at or beyond `implausible` g in the last `window` | 1            |
| queue    | node    | events lost (queue bound, damaged file) or held in memory (disk refusing writes) | 1 |
| config   | node    | 1 while the last reload was refused, else 0              | 1                 |

Every check raises its fault as soon as the value reaches the limit (nyquist
after 2 s), and clears it only once the value has stayed below
limit * (1 - hysteresis) for `hold` seconds of stream time, so a value that
hovers at its limit gives one fault, not a storm.

Counts come from the source's cumulative counters (`counters()`, where the
source has them), differenced over a sliding window of stream time.

`implausible` judges the samples after `scale`, in g whatever the unit: a
sample that large comes from a missing or wrong scale (counts read as g),
never from a vibration accelerometer, so while it stands the monitor
reports the channel's band values as unknown instead of raising levels.
"""

import collections
import math
from dataclasses import dataclass
from typing import Deque, Dict, List, Optional, Sequence, Tuple

import numpy as np

from ..analyse.units import TO_SI
from ..config import HealthConfig
from .levels import LevelMachine
from ..analyse.spectrum import Spectrum

# Counter snapshots are taken at most this often (stream seconds), which
# bounds the window's memory whatever the block size.
_SNAPSHOT_S = 0.1
# Without a configured `blind`, the check allows twice what a result needs
# from a standing start, and never less than this (seconds).
BLIND_MIN_S = 5.0
# Timestamps must span this much stream time before the rate is judged, so
# that arrival jitter of single frames does not count.
_RATE_BASELINE_S = 5.0
NYQUIST_TOP_SHARE = 0.1  # the top 10 % of the band below Nyquist
# The source counters the window differences (`counters()`; a missing one
# counts 0), in the order they follow the breaks in a snapshot's values.
_SOURCE_KEYS = ("corrupt_frames", "mismatched", "nonfinite", "frames")


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

    def __init__(self, config: HealthConfig, channels: Sequence[str], sample_rate: float, span: int = 0,
                 scale: Optional[Sequence[float]] = None, unit: str = "g") -> None:
        """`span`: samples one result covers, for the default `blind` limit.
        `scale` and `unit` are the source's: what a raw sample is, for the
        `implausible` check (default: raw samples already in g)."""
        self.config = config
        self.channels = list(channels)
        self.fs = sample_rate

        def check(name: str, channel: Optional[str], unit: str, limit: float, delay: float = 0.0) -> Check:
            rule = LevelMachine([("fault", limit)], config.hysteresis, delay, config.hold)
            return Check(name, channel, unit, rule)

        self.stale = check("stale", None, "s", config.stale)
        self.gap = check("gap", None, "count", 1.0)
        self.corrupt = check("corrupt", None, "share", config.corrupt)
        self.rate = check("rate", None, "share", config.rate)
        self.clipping = [check("clipping", c, "share", config.clipping) for c in self.channels]
        self.flatline = [check("flatline", c, "s", config.flatline) for c in self.channels]
        # Nyquist strip: a delay before the fault too, since the share of a
        # noisy spectrum wavers from one result to the next.
        self.nyquist = [check("nyquist", c, "share", config.nyquist, 2.0) for c in self.channels]
        self.implausible = [check("implausible", c, "count", 1.0) for c in self.channels]
        # The bound in raw values per channel (the check is fed raw blocks).
        per_raw = np.abs(np.asarray(scale if scale is not None else [1.0] * len(self.channels), dtype=float))
        self._implausible_raw = config.implausible * TO_SI["g"] / TO_SI[unit] / per_raw
        self._implausible_low = float(self._implausible_raw.min())
        # Samples arrive but give no result (gaps closer than a frame, say).
        blind = config.blind if config.blind is not None else max(BLIND_MIN_S, 2.0 * span / sample_rate)
        self.blind = check("blind", None, "s", blind)
        self.queue = check("queue", None, "count", 1.0)
        self.config_check = check("config", None, "count", 1.0)
        self.checks: List[Check] = (
            [self.stale, self.gap, self.corrupt]
            + self.clipping
            + self.flatline
            + [self.rate]
            + self.nyquist
            + self.implausible
            + [self.blind, self.queue, self.config_check]
        )
        self._unmeasured = 0  # samples received since the last result
        self._dropped_seen = 0  # the sink's loss total when last seen
        self._lost = 0  # events lost since the queue fault was raised
        self._delivery_quiet: Optional[Tuple[int, int, int, bool]] = None  # on_delivery's skip
        self._refused = 0.0  # the config check's value, fed on with every block
        # Totals for what sources do not count themselves: samples, breaks,
        # and per channel the clipped and the implausible samples.
        self._samples = 0
        self._breaks = 0
        self._clipped = [0] * len(self.channels)
        self._beyond = [0] * len(self.channels)
        # Counter snapshots over the window, oldest first: (stream time, the
        # breaks, the _SOURCE_KEYS, the samples, the clipped and the
        # implausible per channel). The first stands for "before any
        # sample", so a fresh monitor judges all it has seen.
        zeros = (0,) * (2 + len(_SOURCE_KEYS) + 2 * len(self.channels))
        self._snapshots: Deque[Tuple[float, Tuple[float, ...]]] = collections.deque([(-math.inf, zeros)])
        self._flat_since: List[Optional[float]] = [None] * len(self.channels)
        self._last_row: Optional[List[float]] = None
        self._rate_origin: Optional[Tuple[int, int]] = None  # (timestamp_us, stream sample index)
        self._top_line: Optional[int] = None
        # The psd's lines summed for the nyquist share, set with _top_line.
        self._top_lines: Tuple[slice, slice] = (slice(None), slice(None))
        self._lower_lines: Tuple[slice, slice] = (slice(None), slice(None))

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
        # Fed on so that a fault can clear once its hold time has passed.
        self._update(self.config_check, self._refused, t, out)
        self._unmeasured += raw.shape[0]
        self._update(self.blind, self._unmeasured / self.fs, t, out)
        implausible = self._count_block(raw, lost, full_scale)
        get = counters.get if counters else {}.get
        totals = (self._breaks, *[get(key, 0) for key in _SOURCE_KEYS], self._samples, *self._clipped,
                  *self._beyond)
        # A break or an implausible sample is judged at once: the band
        # values of this block's results depend on it.
        self._windowed(t, totals, lost > 0 or implausible, out)
        self._flatline(raw, lost, t, out)
        self._rate(start_index, lost, timestamp_us, t, out)
        return out

    def on_spectrum(self, spectrum: Spectrum, t: float) -> List[Change]:
        """A result's spectrum."""
        out: List[Change] = []
        self._unmeasured = 0
        self._update(self.blind, 0.0, t, out)
        psd = spectrum.psd
        if self._top_line is None:
            lines = psd.shape[1]
            # First line of the top 10 % of the band below Nyquist.
            self._top_line = int(np.ceil((1.0 - NYQUIST_TOP_SHARE) * (lines - 1)))
            self._top_lines = (slice(None), slice(self._top_line, None))
            self._lower_lines = (slice(None), slice(1, self._top_line))  # above DC
        # np.add.reduce is what ndarray.sum calls, without its wrapper: every
        # hop. The few per-channel sums are added as plain floats.
        top = np.add.reduce(psd[self._top_lines], axis=1).tolist()
        lower = np.add.reduce(psd[self._lower_lines], axis=1).tolist()
        for check, top_i, lower_i in zip(self.nyquist, top, lower):
            total_i = lower_i + top_i
            self._update(check, top_i / total_i if total_i > 0 else None, t, out)
        return out

    def on_delivery(self, dropped: int, queued: int, t: float, held: int = 0,
                    refused: bool = False) -> List[Change]:
        """The sink's loss total (only grows), the events waiting (on disk and
        in memory), those held in memory because the disk refused them, and
        whether the disk refuses writes now.

        The fault is raised by the first loss, held event or refused write;
        its value is the events lost since it was raised plus those held. It
        clears once the disk takes writes and holds nothing, and, when events
        were lost, once the queue has emptied too; the event that clears it
        carries in `value` how many were lost meanwhile, so the count reaches
        consumers with the all-clear."""
        out: List[Change] = []
        check = self.queue
        seen = (dropped, queued, held, refused)
        if seen == self._delivery_quiet and check.rule.index == 0:
            return out  # as the last call, which changed nothing: nothing can change
        self._lost += dropped - self._dropped_seen
        self._dropped_seen = dropped
        at_risk = refused or held > 0
        if check.rule.level == "normal":
            bad = at_risk or self._lost > 0
        else:
            bad = at_risk or (self._lost > 0 and queued > 0)
        check.value = float(self._lost + held)
        change = check.rule.update(1.0 if bad else 0.0, t)
        if change:
            out.append((check, change))
            if not bad:
                self._lost = 0  # reported with the all-clear; a new count starts
        # Normal with nothing wrong: the same values again find nothing wrong
        # and leave the level machine as it is (no timer runs below its limit).
        self._delivery_quiet = seen if not bad and check.rule.index == 0 else None
        return out

    def on_config(self, refused: bool, t: float) -> List[Change]:
        """The outcome of a reload: refused (a bad file) or taken."""
        out: List[Change] = []
        self._refused = 1.0 if refused else 0.0
        self._update(self.config_check, self._refused, t, out)
        return out

    # ------------------------------------------------------------ details

    def _count_block(self, raw: np.ndarray, lost: int, full_scale: Optional[float]) -> bool:
        """Add this block to the running totals; True when it holds an implausible sample."""
        self._samples += raw.shape[0]
        # Every break in the samples, whatever caused it: a sequence jump, a
        # dropped block when the pipeline fell behind, a reconnect.
        self._breaks += 1 if lost > 0 else 0
        implausible = False
        if raw.size:
            # Cheap tests first: most blocks have no sample near full scale
            # and none near the implausible bound. The ufuncs' own reduce,
            # without the wrapper of ndarray.max and min.
            top = np.maximum.reduce(raw, axis=None)
            bottom = np.minimum.reduce(raw, axis=None)
            if full_scale is not None and (top >= full_scale or bottom <= -full_scale):
                clipped = np.count_nonzero(np.abs(raw) >= full_scale, axis=0)
                self._clipped = [a + b for a, b in zip(self._clipped, clipped.tolist())]
            if top >= self._implausible_low or bottom <= -self._implausible_low:
                beyond = np.count_nonzero(np.abs(raw) >= self._implausible_raw, axis=0)
                self._beyond = [a + b for a, b in zip(self._beyond, beyond.tolist())]
                implausible = bool(beyond.any())
        return implausible

    def _windowed(self, t: float, totals: Tuple[float, ...], urgent: bool, out: List[Change]) -> None:
        """`totals`: the values of a snapshot now (see _snapshots)."""
        snaps = self._snapshots
        if t - snaps[-1][0] >= _SNAPSHOT_S:
            snaps.append((t, totals))
        elif not urgent:
            return  # judged with the next snapshot, at most _SNAPSHOT_S later
        while len(snaps) > 1 and snaps[1][0] <= t - self.config.window:
            snaps.popleft()
        breaks, corrupt, mismatched, nonfinite, frames, samples, *rest = [
            float(now - then) for now, then in zip(totals, snaps[0][1])]
        update = self._update
        update(self.gap, breaks, t, out)
        rejected = corrupt + mismatched + nonfinite
        seen = frames + rejected
        update(self.corrupt, rejected / seen if seen > 0 else 0.0, t, out)
        channels = len(self.channels)
        for check, clipped in zip(self.clipping, rest[:channels]):
            update(check, clipped / samples if samples > 0 else 0.0, t, out)
        for check, beyond in zip(self.implausible, rest[channels:]):
            update(check, beyond, t, out)

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

    def implausible_channels(self) -> List[int]:
        """Indices of the channels whose `implausible` check is in fault
        (its one level above normal): asked at every result."""
        return [i for i, check in enumerate(self.implausible) if check.rule.index]

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
