"""Decoders: bytes from a sensor stream -> blocks of raw samples.

`make_decoder(format, channels)` returns a `Decoder` for `[source] format`
("frame" or "csv"). A decoder is fed whatever bytes arrived and returns the
sample blocks it could complete; it keeps a bounded tail of partial input
between calls, resynchronises on garbage and counts what it had to throw away.

The binary frame format lives in `frame.py`, the text format in `text.py`.
"""

from typing import Dict, List

from ...config.schema import FORMATS
from ..block import Block


class Decoder:
    """Base of every decoder: the counters and the interface.

    Counters (cumulative since creation):
      frames           good frames (CSV: good lines)
      corrupt_frames   frames or lines rejected (bad CRC, bad header, wrong field count, too long)
      corrupt_bytes    bytes skipped while resynchronising
      gaps             sequence jumps
      lost_samples     samples per channel lost in those jumps
      mismatched       frames whose channel count differs from the config
      nonfinite        frames or lines rejected for NaN or infinite samples
    """

    def __init__(self, channels: int) -> None:
        self.channels = channels
        self.counters: Dict[str, int] = dict.fromkeys(
            ("frames", "corrupt_frames", "corrupt_bytes", "gaps", "lost_samples", "mismatched", "nonfinite"), 0
        )

    def feed(self, data: bytes) -> List[Block]:
        """The blocks `data` completes: one per frame (or run of CSV lines),
        raw values before scale, `lost` set after a sequence gap."""
        raise NotImplementedError

    def reset(self) -> None:
        """Forget partial input and the expected sequence number (after a
        reconnect or an unplug)."""
        raise NotImplementedError

    @property
    def buffered(self) -> int:
        """Bytes of partial input held until more arrives (bounded per format)."""
        return 0




def make_decoder(format: str, channels: int) -> Decoder:
    """A fresh decoder for `format` ("frame" or "csv") and `channels` channels."""
    if isinstance(channels, bool) or not isinstance(channels, int) or not 1 <= channels <= 16:
        raise ValueError(f"{channels=} is not a channel count between 1 and 16")
    if format == "frame":
        from .frame import FrameDecoder

        return FrameDecoder(channels)
    if format == "csv":
        from .text import CsvDecoder

        return CsvDecoder(channels)
    raise ValueError(f"{format=} is not a known stream format; expected one of {', '.join(FORMATS)}")
