"""What a replay keeps and the table it prints.

`Tally` counts, per band and channel over every result, the maximum and its
stream time, the time at or above warning and alarm (the hop durations of
the results at or above the limit, summed). `History` keeps the band values
for the trend plot in bounded memory: one row per result up to
HISTORY_ROWS rows; beyond that, neighbouring rows are merged two into one,
keeping the larger value of each (a limit crossing is never smoothed away).
`Worst` is the result the plot shows the spectrum of.
"""

import dataclasses
import math
from typing import Dict, List, NamedTuple, Optional, TextIO, Tuple

import numpy as np

from ..config import Config
from ..service.results import Result

HISTORY_ROWS = 100_000


class Tally:
    """Per band and channel, over every result: maximum and its stream time,
    time at or above warning and alarm, events."""

    def __init__(self, rows: List[Tuple[str, str, str, Optional[float], Optional[float]]], hop_s: float) -> None:
        self.rows = rows  # (band, channel, unit, warning, alarm), in result order
        self.hop_s = hop_s
        n = len(rows)
        self.warning = np.array([np.nan if r[3] is None else r[3] for r in rows], dtype=float)
        self.alarm = np.array([np.nan if r[4] is None else r[4] for r in rows], dtype=float)
        self.max = np.full(n, -np.inf)
        self.max_at = np.full(n, np.nan)
        self.above_warning = np.zeros(n)
        self.above_alarm = np.zeros(n)
        self.results = 0

    def add(self, stream_s: float, values: np.ndarray) -> None:
        self.results += 1
        higher = np.isfinite(values) & (values > self.max)
        self.max[higher] = values[higher]
        self.max_at[higher] = stream_s
        # A comparison with NaN (no limit) is False: nothing is added.
        self.above_warning += self.hop_s * (values >= self.warning)
        self.above_alarm += self.hop_s * (values >= self.alarm)


class History:
    """Band values per result for the trend plot, in bounded memory: arrays
    grown by doubling up to `rows`, then merged two rows into one (the larger
    value kept) each time they fill, and later results pooled alike."""

    def __init__(self, columns: int, rows: int = HISTORY_ROWS) -> None:
        self.limit = max(2, rows - rows % 2)
        self.t = np.empty(min(1024, self.limit))
        self.v = np.empty((len(self.t), columns))
        self.n = 0
        self.stride = 1  # results per row
        self._pool_t = 0.0
        self._pool_v = np.full(columns, np.nan)
        self._pooled = 0

    def add(self, stream_s: float, values: np.ndarray) -> None:
        if self._pooled == 0:
            self._pool_t = stream_s
            self._pool_v[:] = values
        else:
            np.fmax(self._pool_v, values, out=self._pool_v)
        self._pooled += 1
        if self._pooled == self.stride:
            self._append(self._pool_t, self._pool_v)
            self._pooled = 0

    def _append(self, t: float, v: np.ndarray) -> None:
        if self.n == len(self.t):
            size = min(2 * len(self.t), self.limit)
            self.t = np.resize(self.t, size)
            self.v = np.resize(self.v, (size, self.v.shape[1]))
        self.t[self.n] = t
        self.v[self.n] = v
        self.n += 1
        if self.n == self.limit:
            # Full: every two rows become one, and each later row pools twice as many results.
            half = self.n // 2
            self.t[:half] = self.t[0 : self.n : 2]
            np.fmax(self.v[0 : self.n : 2], self.v[1 : self.n : 2], out=self.v[:half])
            self.n = half
            self.stride *= 2

    def arrays(self) -> Tuple[np.ndarray, np.ndarray]:
        """Stream times and values, (rows,) and (rows, columns), the partly
        pooled last row included."""
        if self._pooled:
            return np.append(self.t[: self.n], self._pool_t), np.vstack([self.v[: self.n], self._pool_v])
        return self.t[: self.n].copy(), self.v[: self.n].copy()


class Worst(NamedTuple):
    """The result with the highest band value relative to its warning limit
    (alarm where a band has only that), or the highest value when no band
    has a limit."""

    score: float
    relative: bool
    pair: int
    result: Result


def score(values: np.ndarray, reference: np.ndarray) -> Tuple[float, int]:
    with np.errstate(invalid="ignore", divide="ignore"):
        ratios = np.where(np.isfinite(reference), values / reference, np.nan)
    if np.isfinite(ratios).any():
        i = int(np.nanargmax(ratios))
        return float(ratios[i]), i
    if np.isfinite(values).any():
        i = int(np.nanargmax(values))
        return float(values[i]), i
    return -math.inf, 0


@dataclasses.dataclass
class Replayed:
    """What a replay measured, for the table and the plot."""

    recording: str
    config: Config
    sample_rate: float
    frames: int  # in the file
    played: int  # file samples taken through the pipeline
    lost: int  # samples put back from the gap notes
    gaps: int
    tally: Tally
    events: Dict[Tuple[str, str, Optional[str]], int]
    history: Optional[History]
    worst: Optional[Worst]
    stopped: bool

    @property
    def seconds(self) -> float:
        return self.frames / self.sample_rate


# ----------------------------------------------------------------- table


def _cell(value: Optional[float], fmt: str) -> str:
    return "-" if value is None or not math.isfinite(value) else format(value, fmt)


def write_table(rep: Replayed, err: TextIO) -> None:
    """The per band and channel table, and the health events counted."""
    t = rep.tally
    fs = rep.sample_rate
    head = (f"replay of {rep.recording}: {rep.seconds:.6g} s at {fs:g} Hz, "
            f"{len(rep.config.source.channels)} channel(s), {t.results} results, one every {t.hop_s:.6g} s")
    if rep.gaps:
        head += f"; {rep.lost} lost samples put back in {rep.gaps} gap(s)"
    err.write(head + "\n")
    if rep.stopped:
        err.write(f"stopped after {rep.played / fs:.6g} of {rep.seconds:.6g} s\n")
    if t.results == 0:
        span = rep.config.spectrum.span / fs
        err.write(f"no result: one needs {span:.6g} s of samples without a gap\n")
    table = [("band", "channel", "unit", "warning", "alarm", "max", "max at s",
              "above warning s", "above alarm s", "events")]
    for i, (name, channel, unit, warning, alarm) in enumerate(t.rows):
        table.append((
            name, channel, unit, _cell(warning, "g"), _cell(alarm, "g"),
            _cell(t.max[i], ".6g"), _cell(t.max_at[i], ".3f"),
            _cell(t.above_warning[i] if warning is not None else None, ".3f"),
            _cell(t.above_alarm[i] if alarm is not None else None, ".3f"),
            str(rep.events.get(("band", name, channel), 0)),
        ))
    widths = [max(len(row[k]) for row in table) for k in range(len(table[0]))]
    for row in table:
        err.write("  ".join(cell.ljust(widths[k]) for k, cell in enumerate(row)).rstrip() + "\n")
    health = sorted((k, n) for k, n in rep.events.items() if k[0] == "health")
    total = sum(n for _, n in health)
    detail = ", ".join(f"{name}{'/' + channel if channel else ''} {n}" for (_, name, channel), n in health)
    err.write(f"health events: {total}" + (f" ({detail})" if detail else "") + "\n")
    err.flush()
