"""Replay a WAV recording as a source, one block of about 0.1 s at a time.

The file is read a block at a time, so its size does not matter. Values come
out raw as stored: integers for PCM files (the config's `scale` turns them
into the unit), floats for float files (bandwatch recordings already hold the
unit, so `scale` is normally 1). `realtime = true` pacing is done by the base
class; otherwise the file plays as fast as it can be read.
"""

import logging
from typing import Optional

import numpy as np

from ...config import SourceConfig
from ...errors import SourceError
from ..recording import RecordingReader, open_recording
from ..block import Block, full_scale
from .base import Source

log = logging.getLogger("bandwatch.sources")

BLOCK_SECONDS = 0.1


class FileSource(Source):
    kind = "file"

    def __init__(self, config: SourceConfig) -> None:
        super().__init__(config)
        self._reader: Optional[RecordingReader] = None
        # The header is read now, so the sample rate is known before anything
        # is built on this source; a missing or unfit file fails here.
        with open_recording(config.path) as reader:
            self._check(reader)
            self.sample_rate = float(reader.sample_rate)
            self.block = max(1, int(round(reader.sample_rate * BLOCK_SECONDS)))
            self._full_scale = full_scale(reader.sample_type)

    def _open(self) -> None:
        self._reader = open_recording(self.config.path)
        self.ended = False

    def describe(self) -> str:
        return f"file {self.config.path}"

    def _check(self, reader: RecordingReader) -> None:
        cfg = self.config
        if cfg.sample_rate and cfg.sample_rate != reader.sample_rate:
            raise SourceError(
                f"{cfg.path}: recorded at {reader.sample_rate} Hz, but [source] sample_rate = "
                f"{cfg.sample_rate:g}; set it to {reader.sample_rate} or to 0 (from the recording)"
            )
        if reader.channels != len(cfg.channels):
            raise SourceError(
                f"{cfg.path}: holds {reader.channels} channel(s), but [source] channels lists "
                f"{len(cfg.channels)} ({', '.join(cfg.channels)})"
            )
        names = reader.channel_names
        if names is not None and names != list(cfg.channels):
            log.warning("%s: channels recorded as %s are read as %s", cfg.path, ", ".join(names),
                        ", ".join(cfg.channels))
        if reader.unit is not None and reader.unit != cfg.unit:
            log.warning("%s: recorded in %s but [source] unit = %s; scale %s turns one into the other",
                        cfg.path, reader.unit, cfg.unit, ", ".join(f"{s:g}" for s in cfg.scale))

    def _read(self, timeout: float) -> Optional[Block]:
        if self._reader is None:
            raise SourceError(f"{self.config.path}: the file source was read before it was opened")
        samples = self._reader.read(self.block)
        if samples.shape[0] == 0:
            self.ended = True
            return None
        return Block(samples=samples.astype(np.float64), full_scale=self._full_scale)

    def _close(self) -> None:
        if self._reader is not None:
            self._reader.close()
            self._reader = None
