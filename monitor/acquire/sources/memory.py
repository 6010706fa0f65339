"""Sources that replay what is held in memory: samples, or wire bytes.

For tests, benchmarks and embedding: like a loopback port, they let the whole
pipeline run with no sensor. Not config kinds; build them in code.
"""

import threading
from typing import Dict, Optional, Sequence

import numpy as np

from ...config import SourceConfig
from ..block import Block
from .base import Source
from .stream import POLL_S, StreamSource


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
        block = Block(samples=self._samples[self._pos : end], lost=lost)
        self._pos = end
        return block


class BytesSource(StreamSource):
    """Wire bytes for `[source] format`, held in memory as the chunks a link
    would read, taken through the same path as every link kind: a reader
    thread feeds them to the decoder, and the blocks wait in the bounded
    queue for `read`.

    Unlike a sensor it waits for room in the queue instead of overflowing
    it, so every sample arrives: it measures the path, not a link. It ends
    once every chunk is decoded and every block read.
    """

    kind = "bytes"

    def __init__(self, config: SourceConfig, chunks: Sequence[bytes]) -> None:
        super().__init__(config)
        self._chunks = chunks
        self._done = threading.Event()

    def _loop(self) -> None:
        for chunk in self._chunks:
            while self.queued > self.queue_limit // 2:
                self._tick()
                if self._stop.wait(0.001):
                    return
            self._tick()
            self._consume(chunk)
        self._done.set()
        # The thread stays until closed: a reader gone quiet looks stalled.
        while not self._stop.wait(POLL_S):
            self._tick()

    def _read(self, timeout: float) -> Optional[Block]:
        # Checked first: waiting out `timeout` on an empty queue at the end
        # would add idle time to what the bench measures.
        if self._done.is_set() and self.queued == 0:
            self.ended = True
            return None
        return super()._read(timeout)
