"""The interface every sample source implements.

Like a transport per file behind one base class: the base owns the public
`read()` with its timeout, counting and real-time pacing; a source kind only
implements `_open`, `_read` and `_close`.
"""

import logging
import time
from typing import Dict, NamedTuple, Optional

import numpy as np

from ...config import SourceConfig

log = logging.getLogger("bandwatch.sources")


class Block(NamedTuple):
    """Consecutive samples, shaped (n, channels), in raw units (before scale).

    `lost` counts samples per channel known to be missing just before this
    block (a sequence gap); the pipeline never lets a spectrum span them.
    `full_scale` is the largest positive value of the raw integer type
    (32767 for int16), when the samples came as integers: a sample at or
    beyond it in magnitude is clipped.
    `timestamp_us` is the sensor's time of the first sample, when it sent one.
    A block with no samples carries only a loss: the source dropped a block
    that held NaN or infinite values.
    """

    samples: np.ndarray
    lost: int = 0
    full_scale: Optional[float] = None
    timestamp_us: Optional[int] = None


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

    def describe(self) -> str:
        """Kind and address, for log lines and errors."""
        return self.kind

    def counters(self) -> Dict[str, int]:
        """Blocks handed out whole (`frames`) and dropped for NaN or infinite
        samples (`nonfinite`): the corrupt share of a source that has no
        frames of its own counts in its blocks. Stream sources count their
        wire frames instead."""
        return {"frames": self.blocks - self.rejected, "nonfinite": self.rejected}

    def heartbeat(self) -> float:
        """Monotonic time of the source's last sign of life. Sources read in
        the caller's thread are alive whenever asked; a source with a
        reader thread reports when that thread last went round its loop."""
        return time.monotonic()

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
        if not np.isfinite(block.samples).all():
            block = self._reject(block)
        n = block.samples.shape[0]
        self.blocks += 1
        self.samples += n
        self.lost += block.lost
        if getattr(self.config, "realtime", False):
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
