"""Fixed-size sample rings per channel, allocated once at start.

`Ring` feeds the spectra, which read the newest frame at every hop: its
buffer holds twice its capacity so that the newest `capacity` samples are
always one contiguous slice (a write that would run off the end first moves
the kept samples to the front: an amortised copy, no per-sample work). It
stays float64: the spectra equal `scipy.signal.welch` of the float64 samples
to 1e-9, and float32 storage would round each sample to about 6e-8 of
itself. It is short (`span` samples), so the doubling costs little.

`WrapRing` holds long spans read rarely (the raw capture): exactly
`capacity` samples in a chosen dtype, writes wrapping around, reads copying.
"""

from typing import Any, Optional

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
            # Row by row: two column ranges of one 2-D buffer look
            # overlapping to numpy, which would copy the source aside first.
            for row in self._buf:
                row[:keep] = row[self._end - keep : self._end]
            self._end = keep
        kept = self._buf[:, self._end : self._end + n]
        if scale is not None:
            # Scaled while copied, in one pass, along each channel's row: on
            # the (n, channels) block a per-channel factor would run an inner
            # loop of length `channels`, several times slower.
            np.multiply(samples.T, scale, out=kept)
        else:
            kept[...] = samples.T
        self._end += n
        self.count = min(self.count + n, self.capacity)

    def latest(self, n: int) -> np.ndarray:
        """A view of the newest `n` samples, shaped (channels, n)."""
        if n > self.count:
            raise ValueError(f"asked for {n=} samples, the ring holds {self.count}")
        return self._buf[:, self._end - n : self._end]


class WrapRing:
    """The last `capacity` samples of `channels` channels, in exactly that
    much memory of `dtype`; `latest` copies them out in order."""

    def __init__(self, channels: int, capacity: int, dtype: Any = np.float32) -> None:
        if capacity < 1:
            raise ValueError(f"{capacity=} must be at least 1")
        self.channels = channels
        self.capacity = capacity
        self._buf = np.zeros((channels, capacity), dtype=dtype)
        self._end = 0  # where the next sample goes
        self.count = 0

    def clear(self) -> None:
        self._end = 0
        self.count = 0

    def write(self, samples: np.ndarray) -> None:
        """Append samples shaped (channels, n); beyond `capacity`, the newest."""
        cap = self.capacity
        n = samples.shape[1]
        if n > cap:
            samples, n = samples[:, -cap:], cap
        head = min(n, cap - self._end)
        self._buf[:, self._end : self._end + head] = samples[:, :head]
        self._buf[:, : n - head] = samples[:, head:]
        self._end = (self._end + n) % cap
        self.count = min(self.count + n, cap)

    def latest(self, n: int) -> np.ndarray:
        """A copy of the newest `n` samples, shaped (channels, n)."""
        if n > self.count:
            raise ValueError(f"asked for {n=} samples, the ring holds {self.count}")
        first = self._end - n
        if first >= 0:
            return self._buf[:, first : self._end].copy()
        return np.concatenate([self._buf[:, first:], self._buf[:, : self._end]], axis=1)
