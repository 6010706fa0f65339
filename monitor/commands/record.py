"""`bandwatch record`: capture the configured source to a WAV recording.

Blocks are scaled to the unit (`[source] scale`, per channel) and written
with `RecordingWriter` until S seconds of samples are in the file (counted
from samples, not the wall clock) or the source ends or SIGINT/SIGTERM
comes; the file is valid in every case.

A WAV file cannot hold a hole. When the source reports lost samples
(`Block.lost`), nothing is inserted: the gap is noted in the metadata chunk
as `"lost": [[index, count], ...]`, where `index` is the position in the
file of the first sample after the gap and `count` the samples missing
there. `bandwatch replay` puts the gaps back, so its stream times match the
live run's.

The notes are written into room reserved in the metadata chunk when the
file is created (the chunk's size is fixed once samples follow it), and the
chunk is rewritten in place, with the same length, as gaps come and at the
end. JSON allows the trailing spaces that fill it up.
"""

import datetime as _dt
import json
import logging
import math
import os
import sys
import threading
import time
from typing import Any, Dict, List, NamedTuple, Optional, TextIO

import numpy as np

from ..config import Config
from ..deliver.payloads import utc_text
from ..errors import BandwatchError
from ..acquire.recording import RecordingError, RecordingWriter
from ..service.posix_signals import stop_on_signals
from ..acquire.sources.base import Source
from .cli import EXIT_FAILURE, EXIT_OK, open_source_or_fail, usage

log = logging.getLogger("bandwatch.record")

READ_TIMEOUT_S = 0.2
# Room for gap notes: this many per second of recording, at least
# _MIN_NOTES, and never more than the reader accepts in a metadata chunk.
_NOTES_PER_SECOND = 2
_MIN_NOTES = 1000
_NOTE_BYTES = 26  # "[4294967295, 4294967295], "
_META_LIMIT = (1 << 20) - 4096  # RecordingReader ignores a chunk over 1 MiB
_PAD_KEY = "reserved"
# After a gap, the notes on disk are brought up to date at most this often
# (seconds of samples), so a crash loses little and a gap storm costs little.
_NOTE_SYNC_S = 1.0


class Recorded(NamedTuple):
    path: str
    samples: int  # per channel, in the file
    sample_rate: int
    lost: int  # samples the source lost, noted, not in the file
    gaps: int  # notes in the metadata
    complete: bool  # the requested seconds were reached

    @property
    def seconds(self) -> float:
        return self.samples / self.sample_rate


class _Notes:
    """The gap notes and the in-place rewrite of the metadata chunk."""

    def __init__(self, path: str, room: int) -> None:
        self.path = path
        self.notes: List[List[int]] = []
        self.room = room
        self._used = 2  # the brackets of the empty list
        self._meta: Dict[str, Any] = {}
        self._at = 0
        self._size = 0

    def locate(self, writer: RecordingWriter) -> None:
        """Take the metadata chunk's place and fields from the writer that made it."""
        self._at, self._size = writer.metadata_span
        self._meta = dict(writer.metadata)
        self._meta.pop(_PAD_KEY, None)

    def fits(self, index: int, count: int) -> bool:
        return self._used + len(json.dumps([index, count])) + 2 <= self.room

    def add(self, index: int, count: int) -> None:
        self._used += len(json.dumps([index, count])) + 2
        self.notes.append([index, count])

    def set(self, **fields: Any) -> None:
        self._meta.update(fields)

    def store(self) -> None:
        """Rewrite the chunk body, same length, padded with spaces."""
        self._meta["lost"] = self.notes
        text = json.dumps(self._meta, ensure_ascii=False).encode("utf-8")
        if len(text) > self._size:  # fits() keeps this from happening
            raise RecordingError(f"{self.path}: the gap notes outgrew the room kept for them")
        try:
            fd = os.open(self.path, os.O_WRONLY)
            try:
                os.pwrite(fd, text + b" " * (self._size - len(text)), self._at)
            finally:
                os.close(fd)
        except OSError as exc:
            raise RecordingError(f"{self.path}: cannot update the metadata: {exc.strerror or exc}") from None


def _note_room(seconds: float) -> int:
    notes = max(_MIN_NOTES, int(math.ceil(seconds * _NOTES_PER_SECOND)))
    return min(notes * _NOTE_BYTES, _META_LIMIT)


def record(
    config: Config,
    output: str,
    seconds: float,
    source: Source,
    stop: Optional[threading.Event] = None,
) -> Recorded:
    """Write `seconds` of samples from the opened `source` to a new WAV file at
    `output`. Stops early when the source ends or `stop` is set. Raises
    RecordingError when the file cannot be written and SourceError when the
    source fails; the file is closed and valid either way."""
    stop = stop or threading.Event()
    rate = source.sample_rate
    target = int(round(seconds * rate))
    scale = np.asarray(config.source.scale, dtype=float)
    room = _note_room(seconds)
    writer = RecordingWriter(
        output, rate, config.source.channels, config.source.unit,
        extra={"node": config.node, "source": config.source.kind, "lost": [], _PAD_KEY: " " * room},
    )
    notes = _Notes(output, room)
    written = lost = 0
    complete = False
    dirty = False  # notes or start time not yet on disk
    stored_at: Optional[int] = None
    try:
        writer.flush()
        notes.locate(writer)
        while not stop.is_set():
            if written >= target:
                complete = True
                break
            block = source.read(READ_TIMEOUT_S)
            if block is None:
                if source.ended:
                    break
                continue
            if written == 0:
                # When the first sample was measured: the sensor's clock if
                # it sent one, else arrival less the block's duration.
                first = (block.timestamp_us / 1e6 if block.timestamp_us is not None
                         else time.time() - block.samples.shape[0] / rate)
                notes.set(start_time=utc_text(_dt.datetime.fromtimestamp(first, _dt.timezone.utc)))
                dirty = True
            samples = block.samples[: target - written]
            if block.lost:
                if not notes.fits(written, block.lost):
                    raise RecordingError(
                        f"{output}: the source lost samples {len(notes.notes) + 1} times; the recording has "
                        f"room for {len(notes.notes)} gap notes, so it stops at {written / rate:.1f} s")
                notes.add(written, block.lost)
                lost += block.lost
                log.warning("%d samples lost before sample %d (%.3f s into the recording): noted in %s, "
                            "nothing inserted", block.lost, written, written / rate, output)
                dirty = True
            writer.write(samples * scale)
            written += samples.shape[0]
            if dirty and (stored_at is None or written - stored_at >= _NOTE_SYNC_S * rate):
                writer.flush()
                notes.store()
                stored_at, dirty = written, False
    except BaseException:
        _finish(writer, notes, quiet=True)
        raise
    _finish(writer, notes)
    return Recorded(output, written, writer.sample_rate, lost, len(notes.notes), complete)


def _finish(writer: RecordingWriter, notes: _Notes, quiet: bool = False) -> None:
    """Close the file with its final sizes and notes. `quiet` when another
    error is already on its way: this one is then only logged."""
    try:
        writer.close()
        notes.store()
    except (RecordingError, OSError) as exc:
        if not quiet:
            raise
        log.error("%s", exc)


def record_command(config: Config, output: str, seconds: float, err: Optional[TextIO] = None) -> int:
    """`bandwatch record -c FILE -o REC --seconds S`; returns the exit code."""
    err = err or sys.stderr
    if not (math.isfinite(seconds) and seconds > 0):
        return usage("record", f"{seconds=} is not a positive number of seconds", err)
    rate = config.source.sample_rate
    if rate > 0 and not float(rate).is_integer():
        return usage("record", f"{config.path}: [source] sample_rate = {rate:g} is not a whole number of Hz; "
                      "a WAV recording stores an integer rate", err)
    if rate > 0 and int(round(seconds * rate)) < 1:
        return usage("record", f"{seconds=} is less than one sample at {rate:g} Hz", err)
    if os.path.lexists(output):
        return usage("record", f"{output} already exists; give a new file name (a recording is never overwritten)", err)
    folder = os.path.dirname(os.path.abspath(output))
    if not os.path.isdir(folder):
        return usage("record", f"cannot write {output}: the folder {folder} does not exist", err)

    with stop_on_signals(threading.Event(), "the recording") as stop:
        return _record(config, output, seconds, stop, err)


def _record(config: Config, output: str, seconds: float, stop: threading.Event, err: TextIO) -> int:
    source = open_source_or_fail(config)
    if source is None:
        return EXIT_FAILURE
    try:
        if not float(source.sample_rate).is_integer():
            log.error("the source runs at %g Hz; a WAV recording needs a whole number of Hz", source.sample_rate)
            return EXIT_FAILURE
        log.info("recording %g s from the %s source (%d channel(s) at %g Hz) to %s", seconds,
                 config.source.kind, len(config.source.channels), source.sample_rate, output)
        done = record(config, output, seconds, source, stop)
    except (BandwatchError, OSError, ValueError) as exc:
        log.error("%s", exc)
        if os.path.exists(output):
            print(f"bandwatch: record: stopped by an error; what came before it is in {output}", file=err)
        return EXIT_FAILURE
    finally:
        source.close()
    if not done.complete:
        reason = "stopped" if stop.is_set() else "the source ended"
        log.info("%s after %.6g of %g s", reason, done.seconds, seconds)
    line = f"recorded {done.samples} samples per channel ({done.seconds:.6g} s at {done.sample_rate} Hz) to {output}"
    if done.gaps:
        line += f"; {done.lost} samples lost in {done.gaps} gap(s), noted in the metadata"
    print(line, file=err)
    return EXIT_OK
