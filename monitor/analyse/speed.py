"""Running speed: nominal from the config, or the 1x peak followed in a search range.

Tracking looks only inside [speed] search_hz, which the user sets around 1x,
so the estimate cannot jump to a harmonic. A peak counts only when it stands
clear of the range's floor (its line at least 4 times the median power of the
range, 6 dB) and is not on the range's edge line; otherwise the last good
speed is kept. The frequency is read between lines with the estimator of
monitor.peaks.
"""

import math
from typing import Optional

import numpy as np

from ..config import SpeedConfig
from .spectrum import Spectrum

_CLEAR_OF_FLOOR = 4.0


class SpeedTracker:
    def __init__(self, config: SpeedConfig) -> None:
        self.config = config
        self.speed_hz: Optional[float] = config.nominal_hz
        self.locked = False  # True while the last spectrum gave a usable peak

    def update(self, spectrum: Spectrum) -> Optional[float]:
        """The running speed in Hz after this spectrum (None if unknown)."""
        if not self.config.track or self.config.search_hz is None:
            return self.speed_hz
        lo_hz, hi_hz = self.config.search_hz
        lo = max(1, math.ceil(lo_hz / spectrum.bin_hz))
        hi = min(spectrum.psd.shape[1] - 2, math.floor(hi_hz / spectrum.bin_hz))
        self.locked = False
        if hi - lo < 2:
            return self.speed_hz
        # Power summed over channels, over the search range and a line beyond.
        # (np.add.reduce is what ndarray.sum calls; this runs every hop.)
        part = np.add.reduce(spectrum.psd[:, lo - 1 : hi + 2], axis=0)
        inner = part[1:-1]
        j = int(inner.argmax())
        mid = len(inner) // 2
        ranked = inner.copy()
        ranked.partition(mid)  # as np.partition, in place on a copy
        floor = float(ranked[mid])  # the median line
        if j in (0, len(inner) - 1) or float(inner[j]) < _CLEAR_OF_FLOOR * floor:
            return self.speed_hz
        # The two-line ratio (monitor.peaks) on magnitudes, for the one peak,
        # on plain floats (math.sqrt rounds as np.sqrt does; sums of power
        # are never negative): scalar arithmetic on them is cheaper.
        left, peak, right = map(math.sqrt, part[j : j + 3].tolist())
        side = 1.0 if right >= left else -1.0
        offset = float(spectrum.window.offset_from_ratio(max(left, right) / peak)) if peak > 0 else 0.0
        self.speed_hz = (lo + j + side * offset) * spectrum.bin_hz
        self.locked = True
        return self.speed_hz
