"""Level state machines: when a value's level is raised and when it clears.

A level is raised when the value has stayed at or above its limit for
`delay` seconds, and lowered when it has stayed below limit * (1 - hysteresis)
for `hold` seconds (bands: hold = delay). Time is stream time, counted from samples, never the
wall clock. A value that cannot be measured (None or NaN) changes nothing and
restarts every timer, since "stayed above" is then unknown.
"""

import math
from typing import List, Optional, Sequence, Tuple

BAND_LEVELS = ("normal", "warning", "alarm")
HEALTH_LEVELS = ("normal", "fault")

# Stream times are sample counts divided by the rate; allow for rounding.
_EPS = 1e-9
_NEG_INF = -math.inf


class LevelMachine:
    """Levels above `normal`, each with its limit, ascending.

    `limits` pairs a level name with its limit, e.g.
    [("warning", 2.8), ("alarm", 4.5)]; a level whose limit is None is left out.
    """

    def __init__(
        self,
        limits: Sequence[Tuple[str, Optional[float]]],
        hysteresis: float,
        delay: float,
        hold: Optional[float] = None,
    ) -> None:
        self.hysteresis = hysteresis
        self.delay = delay
        self.hold_s = delay if hold is None else hold
        self.index = 0  # 0 = normal, i = self.limits[i - 1]
        self.set_limits(limits)

    def set_limits(self, limits: Sequence[Tuple[str, Optional[float]]]) -> None:
        """New limits (a learned baseline, a reload); the level is kept as
        far as it still exists, and timers start afresh."""
        level = self.level if hasattr(self, "limits") else "normal"
        self.limits: List[Tuple[str, float]] = [(n, float(v)) for n, v in limits if v is not None]
        self._above: List[Optional[float]] = [None] * len(self.limits)
        self._below: List[Optional[float]] = [None] * len(self.limits)
        self._rising = False  # an "above" timer may be running (False: none is)
        self._floor = min((v for _, v in self.limits), default=math.inf)
        self.index = 0
        if level != "normal":
            self.hold(level)

    def hold(self, level: str) -> None:
        """Start at `level` (after a reload), or at the highest level below
        it that this machine still has; timers start afresh."""
        names = ["normal"] + [n for n, _ in self.limits]
        order = list(BAND_LEVELS) if level in BAND_LEVELS else list(HEALTH_LEVELS)
        rank = order.index(level) if level in order else 0
        self.index = max((i for i, n in enumerate(names) if n in order and order.index(n) <= rank), default=0)

    @property
    def level(self) -> str:
        return "normal" if self.index == 0 else self.limits[self.index - 1][0]

    def update(self, value: Optional[float], t: float) -> Optional[Tuple[str, str]]:
        """Feed one value at stream time `t`; return (previous, new) on a change."""
        if self.index == 0 and value is not None and _NEG_INF < value < self._floor:
            # The common case, kept cheap: nothing raised, nothing rising.
            # The "below" timers only matter once a level is raised, and a
            # raise happens with the value above every lower limit's clear point.
            if self._rising:
                self._above = [None] * len(self.limits)
                self._rising = False
            return None
        if value is None or not math.isfinite(value):
            self._above = [None] * len(self.limits)
            self._below = [None] * len(self.limits)
            self._rising = False
            return None
        self._rising = True
        for i, (_, limit) in enumerate(self.limits):
            if value >= limit:
                self._above[i] = t if self._above[i] is None else self._above[i]
            else:
                self._above[i] = None
            if value < limit * (1.0 - self.hysteresis):
                self._below[i] = t if self._below[i] is None else self._below[i]
            else:
                self._below[i] = None

        new = self.index
        for i in range(len(self.limits) - 1, self.index - 1, -1):
            since = self._above[i]
            if since is not None and t - since >= self.delay - _EPS:
                new = i + 1
                break
        if new == self.index:
            while new > 0:
                since = self._below[new - 1]
                if since is None or t - since < self.hold_s - _EPS:
                    break
                new -= 1
        if new == self.index:
            return None
        previous = self.level
        self.index = new
        return previous, self.level
