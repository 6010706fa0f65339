"""A fixed-size sample ring per channel, allocated once at start.

The buffer holds twice its capacity so that the newest `capacity` samples are
always one contiguous slice: a write that would run off the end first moves
the kept samples to the front (an amortised copy, no per-sample work).
"""

from typing import Optional

import numpy as np


class Ring:
    """The last `capacity` samples of `channels` channels."""

    def __init__(self, channels: int, capacity: int) -> None:
        if capacity < 1:
            raise ValueError(f"{capacity=} must be at least 1")
        self.channels = channels
        self.capacity = capacity
        self._buf = np.zeros((channels, 2 * capacity))
        self._end = 0
        self.count = 0

    def clear(self) -> None:
        """Drop every sample, after a gap in the stream."""
        self._end = 0
        self.count = 0

    def write(self, samples: np.ndarray, scale: Optional[np.ndarray] = None) -> None:
        """Append samples shaped (n, channels), n <= capacity, each channel
        multiplied by its `scale` when one is given, shaped (channels, 1)."""
        n = samples.shape[0]
        if n > self.capacity:
            raise ValueError(f"block of {n=} samples exceeds the ring's {self.capacity=}")
        if self._end + n > self._buf.shape[1]:
            keep = min(self.count, self.capacity - n)
            self._buf[:, :keep] = self._buf[:, self._end - keep : self._end]
            self._end = keep
        kept = self._buf[:, self._end : self._end + n]
        kept[...] = samples.T
        if scale is not None:
            # Scaled here, along each channel's row: on the (n, channels)
            # block a per-channel factor would run an inner loop of length
            # `channels`, several times slower.
            kept *= scale
        self._end += n
        self.count = min(self.count + n, self.capacity)

    def latest(self, n: int) -> np.ndarray:
        """A view of the newest `n` samples, shaped (channels, n)."""
        if n > self.count:
            raise ValueError(f"asked for {n=} samples, the ring holds {self.count}")
        return self._buf[:, self._end - n : self._end]
