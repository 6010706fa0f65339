"""A source that replays samples held in memory.

For tests, benchmarks and embedding: like a loopback port, it lets the whole
pipeline run with no sensor. Not a config kind; build it in code.
"""

from typing import Dict, Optional

import numpy as np

from ...config import SourceConfig
from .base import Block, Source


class ArraySource(Source):
    """Replays `samples` (n, channels) in blocks of `block` samples.

    `gaps` maps a sample index to a count of samples lost just before it, to
    stand in for sequence gaps. The source ends after the last sample.
    """

    kind = "memory"

    def __init__(
        self,
        config: SourceConfig,
        samples: np.ndarray,
        block: int = 512,
        gaps: Optional[Dict[int, int]] = None,
    ) -> None:
        super().__init__(config)
        samples = np.asarray(samples, dtype=float)
        if samples.ndim != 2 or samples.shape[1] != self.channels:
            raise ValueError(f"samples of shape {samples.shape} do not have {self.channels} channel columns")
        self._samples = samples
        self._block = block
        self._gaps = dict(gaps or {})
        self._pos = 0

    def _open(self) -> None:
        pass

    def _read(self, timeout: float) -> Optional[Block]:
        if self._pos >= len(self._samples):
            self.ended = True
            return None
        end = min(self._pos + self._block, len(self._samples))
        # A gap starts a block of its own, so `lost` sits right before its samples.
        later = [i for i in self._gaps if self._pos < i < end]
        if later:
            end = min(later)
        lost = self._gaps.pop(self._pos, 0)
        block = Block(self._samples[self._pos : end], lost)
        self._pos = end
        return block
