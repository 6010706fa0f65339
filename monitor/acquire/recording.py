"""Recordings: WAV files written and read a block at a time.

bandwatch writes RIFF/WAVE files any audio or analysis tool opens::

    RIFF <size> WAVE
      fmt   format tag 3 (IEEE float), 32 bits, C channels, integer rate
      fact  sample frames per channel (required for non-PCM formats)
      bwmd  UTF-8 JSON: channel names, unit, start time (UTC), version
      data  float32 samples, interleaved by instant, already in the unit

Plain readers skip the `bwmd` chunk. The writer streams: blocks are appended
and the RIFF, fact and data sizes are rewritten every `sync_seconds` of
samples and on close. A process that dies mid-recording leaves a file plain
readers open up to the last size update; `RecordingReader` reads one of ours
to its last whole sample frame on disk. A WAV file holds at most 4 GiB.

The reader also takes WAV files from other tools: PCM 8/16/24/32-bit, IEEE
float 32/64-bit, plain or WAVE_FORMAT_EXTENSIBLE. It never loads the whole
file: `read(frames)` returns the next block.
"""

import datetime as _dt
import json
import math
import os
import struct
from typing import Any, Dict, Iterator, List, Optional, Sequence

import numpy as np

from .. import __version__
from ..deliver.payloads import utc_now, utc_text
from ..errors import SourceError

META_ID = b"bwmd"
_FLOAT = 3
_PCM = 1
_EXTENSIBLE = 0xFFFE
# The GUID of WAVE_FORMAT_EXTENSIBLE sub-formats after its first two bytes
# (the plain format tag): 00000000-0000-0010-8000-00aa00389b71.
_GUID_TAIL = b"\x00\x00\x00\x00\x10\x00\x80\x00\x00\xaa\x00\x38\x9b\x71"
_CHUNK = struct.Struct("<4sI")
_MAX_RIFF = 0xFFFFFFFF
_MAX_META = 1 << 20
_TAG_NAMES = {0x0002: "ADPCM", 0x0006: "A-law", 0x0007: "mu-law", 0x0055: "MPEG Layer 3", 0x0011: "IMA ADPCM"}
READABLE = "PCM 8/16/24/32-bit, IEEE float 32/64-bit, plain or WAVE_FORMAT_EXTENSIBLE"


class RecordingError(SourceError):
    """A recording that cannot be written or read, naming the file and the problem."""


def _parse_utc(text: Any) -> Optional[_dt.datetime]:
    """The time in a `start_time` written by `utc_text` (a naive one taken as UTC)."""
    if not isinstance(text, str):
        return None
    try:
        # fromisoformat before Python 3.11 does not take the Z suffix.
        when = _dt.datetime.fromisoformat(text[:-1] + "+00:00" if text.endswith("Z") else text)
    except ValueError:
        return None
    return when if when.tzinfo is not None else when.replace(tzinfo=_dt.timezone.utc)


# --------------------------------------------------------------------- writing


class RecordingWriter:
    """Streams blocks of samples, shaped (n, C) and already in `unit`, to a WAV file."""

    def __init__(
        self,
        path: str,
        sample_rate: float,
        channels: Sequence[str],
        unit: str,
        start_time: Optional[_dt.datetime] = None,
        extra: Optional[Dict[str, Any]] = None,
        sync_seconds: float = 1.0,
    ) -> None:
        if not (sample_rate > 0 and float(sample_rate).is_integer() and sample_rate < 2**32):
            raise ValueError(f"{sample_rate=} is not a whole number of Hz; a WAV file stores an integer rate")
        if not channels or len(channels) > 0xFFFF:
            raise ValueError(f"channels={list(channels)!r}: give 1 or more channel names")
        if sample_rate * 4 * len(channels) > 0xFFFFFFFF:
            raise ValueError(f"{sample_rate=} with {len(channels)} channels exceeds the WAV byte rate field")
        if not sync_seconds > 0:
            raise ValueError(f"{sync_seconds=} must be positive")
        self.path = str(path)
        self.sample_rate = int(sample_rate)
        self.channels = len(channels)
        self.frames = 0
        self._align = 4 * self.channels
        self._sync_frames = max(1, int(math.ceil(sync_seconds * self.sample_rate)))
        self._synced = 0
        meta: Dict[str, Any] = dict(extra or {})
        meta.update(
            channels=list(channels),
            unit=unit,
            start_time=utc_text(start_time) if start_time is not None else utc_now(),
            bandwatch_version=__version__,
        )
        self.metadata = meta
        header = self._header(json.dumps(meta, ensure_ascii=False).encode("utf-8"))
        try:
            self._file = open(self.path, "wb")
            self._file.write(header)
        except OSError as exc:
            raise RecordingError(f"{self.path}: cannot write the recording: {exc.strerror or exc}") from None
        self._data_at = len(header)
        self._update_sizes()

    def _header(self, meta: bytes) -> bytes:
        c = self.channels
        fmt = struct.pack("<HHIIHHH", _FLOAT, c, self.sample_rate, self.sample_rate * self._align,
                          self._align, 32, 0)
        parts = [b"RIFF", b"\0\0\0\0", b"WAVE", _CHUNK.pack(b"fmt ", len(fmt)), fmt]
        self._fact_at = sum(map(len, parts)) + 8
        parts += [_CHUNK.pack(b"fact", 4), b"\0\0\0\0"]
        # Where the metadata's body lies, for a caller that rewrites it in
        # place with the same length (`bandwatch record`'s gap notes).
        self.metadata_span = (sum(map(len, parts)) + 8, len(meta))
        parts += [_CHUNK.pack(META_ID, len(meta)), meta]
        if len(meta) % 2:
            parts.append(b"\0")  # chunks start at even offsets
        self._data_size_at = sum(map(len, parts)) + 4
        parts.append(_CHUNK.pack(b"data", 0))
        return b"".join(parts)

    def write(self, samples: np.ndarray) -> None:
        data = np.asarray(samples)
        if data.ndim == 1 and self.channels == 1:
            data = data[:, None]
        if data.ndim != 2 or data.shape[1] != self.channels:
            raise ValueError(f"samples shape {data.shape} does not match {self.channels} channel(s)")
        n = data.shape[0]
        if self._data_at + (self.frames + n) * self._align - 8 > _MAX_RIFF:
            raise RecordingError(f"{self.path}: a WAV file holds at most 4 GiB; this block would exceed it "
                                 f"after {self.frames / self.sample_rate:.0f} s")
        try:
            self._file.write(np.ascontiguousarray(data, dtype="<f4").tobytes())
        except OSError as exc:
            raise RecordingError(f"{self.path}: cannot write the recording: {exc.strerror or exc}") from None
        self.frames += n
        if self.frames - self._synced >= self._sync_frames:
            self.flush()

    def flush(self) -> None:
        """Rewrite the sizes in the header and hand everything to the OS."""
        self._update_sizes()
        self._file.flush()

    def _update_sizes(self) -> None:
        data = self.frames * self._align
        f = self._file
        for at, value in ((4, self._data_at + data - 8), (self._fact_at, self.frames),
                          (self._data_size_at, data)):
            f.seek(at)
            f.write(struct.pack("<I", value))
        f.seek(0, os.SEEK_END)
        self._synced = self.frames

    def close(self) -> None:
        if self._file.closed:
            return
        try:
            self.flush()
        finally:
            self._file.close()

    def __enter__(self) -> "RecordingWriter":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


# --------------------------------------------------------------------- reading


class RecordingReader:
    """Reads a WAV file a block at a time.

    Attributes: `sample_rate` (int Hz), `channels`, `sample_type` ("uint8",
    "int16", "int24", "int32", "float32" or "float64"), `frames` (per
    channel), and from a bandwatch recording `channel_names`, `unit`,
    `start_time` (aware UTC datetime) and the whole `metadata` dict (None and
    {} for other files).

    `read(frames)` returns raw values as stored: integers for PCM (8-bit
    offset binary shifted to signed, 24-bit widened to int32), floats for
    float files; bandwatch recordings hold values already in their unit.
    """

    def __init__(self, path: str) -> None:
        self.path = str(path)
        try:
            self._file = open(self.path, "rb", buffering=0)
        except OSError as exc:
            raise RecordingError(f"{self.path}: cannot open the recording: {exc.strerror or exc}") from None
        try:
            self._parse()
        except BaseException:
            self._file.close()
            raise
        self.position = 0

    def _fail(self, problem: str) -> RecordingError:
        return RecordingError(f"{self.path}: {problem}")

    def _read_at(self, at: int, size: int) -> bytes:
        self._file.seek(at)
        return self._file.read(size)

    def _parse(self) -> None:
        size = os.fstat(self._file.fileno()).st_size
        head = self._read_at(0, 12)
        if len(head) < 12 or head[:4] != b"RIFF" or head[8:12] != b"WAVE":
            if len(head) < 12 and b"RIFF".startswith(head[:4]):
                raise self._fail(f"truncated header: the file has only {len(head)} bytes")
            if head[:4] in (b"RF64", b"RIFX"):
                raise self._fail(f"{head[:4].decode()} WAV files are not supported; readable: {READABLE}")
            raise self._fail(f"not a WAV file (starts with {head[:12]!r}, expected RIFF....WAVE)")
        self.metadata: Dict[str, Any] = {}
        fmt = None
        at = 12
        while True:
            if at + 8 > size:
                what = "fmt and data chunks" if fmt is None else "data chunk"
                raise self._fail(f"truncated header: the file ends at byte {size} before its {what}")
            cid, csize = _CHUNK.unpack(self._read_at(at, 8))
            body = at + 8
            if cid == b"fmt ":
                fmt = self._read_at(body, min(csize, 64))
                if csize < 16 or len(fmt) < 16:
                    raise self._fail(f"truncated header: fmt chunk of {len(fmt)} bytes, expected at least 16")
            elif cid == META_ID:
                self._read_meta(body, csize)
            elif cid == b"data":
                if fmt is None:
                    raise self._fail("data chunk before any fmt chunk")
                break
            at = body + csize + (csize & 1)
        self._read_format(fmt)
        self._data_at = body
        available = size - body
        declared = csize
        ours = "bandwatch_version" in self.metadata
        if declared > available or (ours and declared < available and not self._chunk_at(body + declared, size)):
            # A bandwatch recording ends with its data: what is on disk counts,
            # even when the sizes were last updated before a crash.
            declared = available
        self.frames = declared // self._align

    def _chunk_at(self, at: int, size: int) -> bool:
        """Whether bytes at `at` look like another chunk header (id of printable ASCII, size that fits)."""
        if at + 8 > size:
            return False
        cid, csize = _CHUNK.unpack(self._read_at(at, 8))
        return all(32 <= ch < 127 for ch in cid) and at + 8 + csize <= size

    def _read_meta(self, at: int, size: int) -> None:
        if size > _MAX_META:
            return
        try:
            meta = json.loads(self._read_at(at, size).decode("utf-8"))
        except (UnicodeDecodeError, ValueError):
            raise self._fail(f"the {META_ID.decode()} chunk is not UTF-8 JSON") from None
        if isinstance(meta, dict):
            self.metadata = meta

    def _read_format(self, fmt: bytes) -> None:
        tag, channels, rate, _byte_rate, align, bits = struct.unpack_from("<HHIIHH", fmt)
        if tag == _EXTENSIBLE:
            if len(fmt) < 40:
                raise self._fail(f"truncated header: extensible fmt chunk of {len(fmt)} bytes, expected 40")
            guid = fmt[24:40]
            if guid[2:] != _GUID_TAIL:
                raise self._fail(f"unsupported WAVE_FORMAT_EXTENSIBLE sub-format {guid.hex()}; readable: {READABLE}")
            tag = struct.unpack_from("<H", guid)[0]
        if tag == _PCM and bits in (8, 16, 24, 32):
            self.sample_type = "uint8" if bits == 8 else f"int{bits}"
        elif tag == _FLOAT and bits in (32, 64):
            self.sample_type = f"float{bits}"
        elif tag in (_PCM, _FLOAT):
            raise self._fail(f"unsupported sample size: {bits}-bit {'PCM' if tag == _PCM else 'float'}; "
                             f"readable: {READABLE}")
        else:
            name = _TAG_NAMES.get(tag, "unknown")
            raise self._fail(f"unsupported WAV format tag 0x{tag:04X} ({name}); readable: {READABLE}")
        if channels == 0:
            raise self._fail("the fmt chunk gives 0 channels")
        if rate == 0:
            raise self._fail("the fmt chunk gives a sample rate of 0 Hz")
        if align != channels * bits // 8:
            raise self._fail(f"inconsistent fmt chunk: block align {align} for {channels} channel(s) of {bits} bits")
        self.channels = channels
        self.sample_rate = rate
        self._align = align
        self._dtype = {"uint8": "u1", "int16": "<i2", "int24": "u1", "int32": "<i4",
                       "float32": "<f4", "float64": "<f8"}[self.sample_type]

    # -------------------------------------------------------------- metadata

    @property
    def channel_names(self) -> Optional[List[str]]:
        names = self.metadata.get("channels")
        return list(names) if isinstance(names, list) else None

    @property
    def unit(self) -> Optional[str]:
        unit = self.metadata.get("unit")
        return unit if isinstance(unit, str) else None

    @property
    def start_time(self) -> Optional[_dt.datetime]:
        return _parse_utc(self.metadata.get("start_time"))

    @property
    def duration(self) -> float:
        return self.frames / self.sample_rate

    # ------------------------------------------------------------------ data

    def seek(self, frame: int) -> None:
        if not 0 <= frame <= self.frames:
            raise ValueError(f"{frame=} is outside 0..{self.frames}")
        self.position = frame

    def read(self, frames: int) -> np.ndarray:
        """The next up to `frames` sample frames, shaped (n, channels); n is 0 at the end."""
        if frames < 0:
            raise ValueError(f"{frames=} is negative")
        n = max(0, min(frames, self.frames - self.position))
        raw = np.empty(n * self._align, dtype=np.uint8)
        self._file.seek(self._data_at + self.position * self._align)
        got = 0
        with memoryview(raw) as view:
            while got < raw.size:
                step = self._file.readinto(view[got:])
                if not step:
                    break
                got += step
        n = got // self._align  # the file shrank under us: stop at what is there
        self.position += n
        return self._widen(raw[: n * self._align]).reshape(n, self.channels)

    def _widen(self, raw: np.ndarray) -> np.ndarray:
        if self.sample_type == "uint8":
            return raw.astype(np.int16) - 128
        if self.sample_type == "int24":
            b = raw.reshape(-1, 3).astype(np.uint32)
            # Put the 3 bytes at the top of 32 bits, then shift back to sign-extend.
            top = (b[:, 0] << 8) | (b[:, 1] << 16) | (b[:, 2] << 24)
            return top.view(np.int32) >> 8
        return raw.view(self._dtype)

    def blocks(self, frames: int) -> Iterator[np.ndarray]:
        """Blocks of `frames` sample frames (the last one shorter) until the end."""
        if frames < 1:
            raise ValueError(f"{frames=} must be at least 1")
        while True:
            block = self.read(frames)
            if block.shape[0] == 0:
                return
            yield block

    def close(self) -> None:
        self._file.close()

    def __enter__(self) -> "RecordingReader":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


def open_recording(path: str) -> RecordingReader:
    """Open a WAV recording for block-wise reading (raises RecordingError)."""
    return RecordingReader(path)
