"""The interface every sample source implements.

Like a transport per file behind one base class: the base owns the public
`read()` with its timeout, counting and real-time pacing; a source kind only
implements `_open`, `_read` and `_close`.
"""

import logging
import time
from typing import Dict, Optional

import numpy as np

from ...config import SourceConfig
from ..block import Block

log = logging.getLogger("bandwatch.sources")


class Source:
    """A stream of sample blocks from one sensor."""

    kind = ""

    def __init__(self, config: SourceConfig) -> None:
        self.config = config
        self.sample_rate = config.sample_rate
        self.channels = len(config.channels)
        self.ended = False  # True once a finite source has nothing more
        self.blocks = 0
        self.samples = 0
        self.lost = 0
        self.rejected = 0  # blocks dropped for NaN or infinite samples
        self._pace_start: Optional[float] = None
        self._pace_samples = 0

    def open(self) -> None:
        self._open()

    def heartbeat(self) -> float:
        """Monotonic time of the source's last sign of life. Sources read in
        the caller's thread are alive whenever asked; a source with a
        reader thread reports when that thread last went round its loop."""
        return time.monotonic()

    def counters(self) -> Dict[str, int]:
        """Cumulative counters of the link and its decoder (frames, gaps,
        connects, ...). A source without a decoder counts its blocks: handed
        out whole (`frames`) and dropped for NaN or infinite samples
        (`nonfinite`), so its corrupt share counts in blocks."""
        return {"frames": self.blocks - self.rejected, "nonfinite": self.rejected}

    def describe(self) -> str:
        """Kind and address, for log lines, errors and the view."""
        return self.kind or self.config.kind

    def close(self) -> None:
        self._close()

    def read(self, timeout: float) -> Optional[Block]:
        """The next block, or None if none came within `timeout` seconds or
        the source has ended (then `ended` is True)."""
        if self.ended:
            return None
        block = self._read(timeout)
        if block is None:
            return None
        # Integer samples (full_scale set) are finite by nature: only float
        # samples are looked at.
        if block.full_scale is None and not np.isfinite(block.samples).all():
            block = self._reject(block)
        n = block.samples.shape[0]
        self.blocks += 1
        self.samples += n
        self.lost += block.lost
        if self.config.realtime:
            self._pace(n)
        return block

    def _reject(self, block: Block) -> Block:
        """A block holding NaN or infinity, as a corrupt frame is: dropped
        whole, its samples a gap (so no spectrum is blanked by them), the
        block counted in `nonfinite`."""
        n = block.samples.shape[0]
        if not self.rejected:
            log.warning("%s: NaN or infinite samples; each block holding one is dropped (%d samples here), "
                        "counted as corrupt, and its samples as lost", self.describe(), n)
        self.rejected += 1
        return block._replace(samples=block.samples[:0], lost=block.lost + n, timestamp_us=None)

    def _pace(self, n: int) -> None:
        """Hold a block back until its last sample would have been measured."""
        now = time.monotonic()
        if self._pace_start is None:
            self._pace_start = now
        self._pace_samples += n
        due = self._pace_start + self._pace_samples / self.sample_rate
        if due > now:
            time.sleep(due - now)

    def _open(self) -> None:
        raise NotImplementedError

    def _read(self, timeout: float) -> Optional[Block]:
        raise NotImplementedError

    def _close(self) -> None:
        pass
