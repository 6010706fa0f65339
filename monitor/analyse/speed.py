"""Running speed: nominal from the config, or the 1x peak followed in a search range.

Tracking looks only inside [speed] search_hz. A peak counts only when it
stands clear of the range's floor (its line at least 4 times the median power
of the range, 6 dB) and is not on the range's edge line; otherwise the last
good speed is kept. The frequency is read between lines with the estimator of
monitor.analyse.peaks.

Harmonic guard: the strongest line need not be 1x (a misaligned shaft can
show 2x above 1x). When the range spans more than an octave, a harmonic and
its fundamental can both lie in it, so the tracker takes the fundamental,
not the strongest line: while the line nearest f/2 or f/3 of the chosen peak
holds a clear peak of its own (a local maximum 10 dB above the range's
median, within 40 dB of the chosen peak), that peak is chosen instead, down
to the lowest member of the series. A range within an octave cannot hold
both, and there the guard finds nothing.
"""

import math
from typing import List, Optional, Tuple, Union

import numpy as np

from ..config import SpeedConfig
from .spectrum import Spectrum

_CLEAR_OF_FLOOR = 4.0
# A fundamental below the chosen peak must be a local maximum this far above
# the floor (10 dB: a single noise line passes it about once in a thousand)
# and within 40 dB of the peak (so rounding residue of a noise-free spectrum
# never counts). Choices of this project.
_GUARD_CLEAR_OF_FLOOR = 10.0
_GUARD_BELOW_PEAK = 1e-4
_SUBHARMONICS = (2, 3)
# Search ranges narrower than this many lines are read as plain floats: a
# Python sort and scan of a few dozen numbers costs less than numpy's calls.
# Wider ones stay with numpy. Both choose the same line.
_SHORT_RANGE = 64


class SpeedTracker:
    def __init__(self, config: SpeedConfig) -> None:
        self.config = config
        self.speed_hz: Optional[float] = config.nominal_hz
        self.locked = False  # True while the last spectrum gave a usable peak
        # Stream time the tracked speed was read at (None while nominal): a
        # spectrum describes its samples as a whole, so their middle.
        self.measured_s: Optional[float] = None
        self._range: Tuple[float, int, int, int] = (math.nan, 0, 0, 0)  # bin_hz, lines -> lo, hi

    def _lines(self, bin_hz: float, lines: int) -> Tuple[int, int]:
        """First and last line of the search range (kept while the spectrum's size stays)."""
        if self._range[:2] != (bin_hz, lines):
            assert self.config.search_hz is not None
            lo_hz, hi_hz = self.config.search_hz
            lo = max(1, math.ceil(lo_hz / bin_hz))
            hi = min(lines - 2, math.floor(hi_hz / bin_hz))
            self._range = (bin_hz, lines, lo, hi)
        return self._range[2], self._range[3]

    def update(self, spectrum: Spectrum, centre_s: Optional[float] = None) -> Optional[float]:
        """The running speed in Hz after this spectrum (None if unknown);
        `centre_s` is the stream time of the middle of its samples."""
        if not self.config.track or self.config.search_hz is None:
            return self.speed_hz
        lo, hi = self._lines(spectrum.bin_hz, spectrum.psd.shape[1])
        self.locked = False
        if hi - lo < 2:
            return self.speed_hz
        # Power summed over channels, over the search range and a line beyond.
        block = spectrum.psd[:, lo - 1 : hi + 2]
        found = _short_range(block) if hi - lo < _SHORT_RANGE else None
        if found is None:
            found = _long_range(block)
        part, j, floor = found
        inner = part[1:-1]
        if j in (0, len(inner) - 1) or float(inner[j]) < _CLEAR_OF_FLOOR * floor:
            return self.speed_hz
        j = _fundamental(part, j, lo, floor)
        # The two-line ratio (monitor.analyse.peaks) on magnitudes, for the one peak,
        # on plain floats (math.sqrt rounds as np.sqrt does; sums of power
        # are never negative): scalar arithmetic on them is cheaper.
        three = part[j : j + 3]
        left, peak, right = map(math.sqrt, three if isinstance(three, list) else three.tolist())
        side = 1.0 if right >= left else -1.0
        offset = spectrum.window.offset_at(max(left, right) / peak) if peak > 0 else 0.0
        self.speed_hz = (lo + j + side * offset) * spectrum.bin_hz
        self.measured_s = centre_s
        self.locked = True
        return self.speed_hz


Found = Tuple[Union[List[float], np.ndarray], int, float]


def _short_range(block: np.ndarray) -> Optional[Found]:
    """`_long_range` on plain floats, None if a value is NaN (where numpy's
    order and Python's differ)."""
    rows = block.tolist()
    part = rows[0]
    for row in rows[1:]:  # row by row, in order, as np.add.reduce over axis 0
        part = [a + b for a, b in zip(part, row)]
    total = sum(part)
    if total != total:
        return None
    inner = part[1:-1]
    j = inner.index(max(inner))  # the first of equal maxima, as argmax
    return part, j, sorted(inner)[len(inner) // 2]


def _long_range(block: np.ndarray) -> Found:
    """The channels' power summed line by line (lines lo - 1 .. hi + 1),
    the index of the strongest line from lo, and the range's median line
    (the upper one of an even count): what `update` decides on."""
    # np.add.reduce is what ndarray.sum calls.
    part = np.add.reduce(block, axis=0)
    inner = part[1:-1]
    mid = len(inner) // 2
    ranked = inner.copy()
    ranked.partition(mid)  # as np.partition, in place on a copy
    return part, int(inner.argmax()), float(ranked[mid])


def _fundamental(part: Union[List[float], np.ndarray], j: int, lo: int, floor: float) -> int:
    """The lowest member of the harmonic series whose member j is: `part`
    holds the lines lo - 1 .. hi + 1, j indexes lines from lo."""
    inner = part[1:-1]
    limit = _GUARD_BELOW_PEAK * float(inner[j])
    found = True
    while found:
        found = False
        for n in _SUBHARMONICS:
            target = (lo + j) / n - lo  # f/n, as an index into inner
            if target < 0:  # below the range (always, in a range within an octave)
                continue
            centre = round(target)
            # Lines within one line of f/n; never the range's edge lines.
            near = [c for c in (centre - 1, centre, centre + 1) if 0 < c < len(inner) - 1 and abs(c - target) <= 1.0]
            if not near:
                continue
            c = max(near, key=lambda i: inner[i])
            power = float(inner[c])
            if (power > part[c] and power >= part[c + 2]
                    and power > _GUARD_CLEAR_OF_FLOOR * floor and power > limit):
                j, found = c, True
                break
    return j
