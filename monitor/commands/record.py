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

`--format int16|int32` stores counts instead of float32 values, as plain
PCM that every WAV reader opens; the metadata's `scale` says what a count
is (`count_step`), and `replay` reads them back in the unit.

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

from ..acquire.block import Block
from ..acquire.recording import WRITE_TYPES
from ..analyse.units import TO_SI
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
    scale: Optional[List[float]] = None  # unit per count, for integer formats
    clipped: int = 0  # values beyond an integer format's range

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


def count_step(config: Config, block: Block, bits: int, full_scale: Optional[float] = None) -> np.ndarray:
    """What one stored count of a `bits`-bit recording is in the unit, per
    channel, chosen from the first block: full-scale range / 2^(bits-1)
    with `full_scale` when given; else the source's own counts, kept
    exactly, when it sends integers that fit; else its whole integer range;
    else (floats) the `implausible` bound, which no real sample reaches."""
    scale = np.asarray(config.source.scale, dtype=float)
    top = 2.0 ** (bits - 1)
    if full_scale is not None:
        return np.full(len(scale), full_scale / top)
    if block.full_scale is not None and block.full_scale < top:
        return scale
    if block.full_scale is not None:
        return (block.full_scale + 1.0) * np.abs(scale) / top
    bound = config.health.implausible * TO_SI["g"] / TO_SI[config.source.unit]
    return np.full(len(scale), bound / top)


def record(
    config: Config,
    output: str,
    seconds: float,
    source: Source,
    stop: Optional[threading.Event] = None,
    sample_type: str = "float32",
    full_scale: Optional[float] = None,
) -> Recorded:
    """Write `seconds` of samples from the opened `source` to a new WAV file at
    `output`, as `sample_type` (`full_scale`, in the unit, for the integer
    types: see `count_step`). Stops early when the source ends or `stop` is
    set. Raises RecordingError when the file cannot be written and
    SourceError when the source fails; the file is closed and valid either way."""
    stop = stop or threading.Event()
    rate = source.sample_rate
    target = int(round(seconds * rate))
    scale = np.asarray(config.source.scale, dtype=float)
    room = _note_room(seconds)
    writer = RecordingWriter(
        output, rate, config.source.channels, config.source.unit,
        extra={"node": config.node, "source": config.source.kind, "lost": [], _PAD_KEY: " " * room},
        sample_type=sample_type,
    )
    integer = WRITE_TYPES[sample_type][2] == 1
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
                if integer:
                    step = count_step(config, block, WRITE_TYPES[sample_type][1], full_scale)
                    writer.set_scale(step)
                    notes.set(scale=writer.metadata["scale"])
                    log.info("%s counts: one is %s %s", sample_type,
                             ", ".join(f"{v:.6g}" for v in step), config.source.unit)
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
    scale = writer.metadata.get("scale") if integer else None
    return Recorded(output, written, writer.sample_rate, lost, len(notes.notes), complete, scale, writer.clipped)


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


def record_command(config: Config, output: str, seconds: float, err: Optional[TextIO] = None,
                   sample_type: str = "float32", full_scale: Optional[float] = None) -> int:
    """`bandwatch record -c FILE -o REC --seconds S [--format F] [--full-scale X]`; returns the exit code."""
    err = err or sys.stderr
    if not (math.isfinite(seconds) and seconds > 0):
        return usage("record", f"{seconds=} is not a positive number of seconds", err)
    if full_scale is not None:
        if sample_type == "float32":
            return usage("record", "--full-scale applies to --format int16 or int32; float32 stores the "
                         "values themselves", err)
        if not (math.isfinite(full_scale) and full_scale > 0):
            return usage("record", f"--full-scale {full_scale:g} is not a positive number (in "
                         f"{config.source.unit})", err)
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
        return _record(config, output, seconds, stop, err, sample_type, full_scale)


def _record(config: Config, output: str, seconds: float, stop: threading.Event, err: TextIO,
            sample_type: str, full_scale: Optional[float]) -> int:
    source = open_source_or_fail(config)
    if source is None:
        return EXIT_FAILURE
    try:
        if not float(source.sample_rate).is_integer():
            log.error("the source runs at %g Hz; a WAV recording needs a whole number of Hz", source.sample_rate)
            return EXIT_FAILURE
        log.info("recording %g s from the %s source (%d channel(s) at %g Hz) to %s", seconds,
                 config.source.kind, len(config.source.channels), source.sample_rate, output)
        done = record(config, output, seconds, source, stop, sample_type, full_scale)
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
    if done.scale is not None:
        steps = ", ".join(f"{v:.6g}" for v in done.scale)
        line += f"; {sample_type} counts of {steps} {config.source.unit} each (the metadata's scale)"
    if done.clipped:
        line += (f"; {done.clipped} values beyond the {sample_type} range were stored at its limit "
                 "(give a larger --full-scale)")
    if done.gaps:
        line += f"; {done.lost} samples lost in {done.gaps} gap(s), noted in the metadata"
    print(line, file=err)
    return EXIT_OK
