"""The binary sensor frame, version 1: decoding a byte stream and encoding frames.

Layout (all integers little-endian)::

    0   2  sync 0xA7 0x4D
    2   1  version = 1
    3   1  sample type: 1 int16, 2 int32, 3 float32
    4   1  channel count C, 1..16
    5   1  flags: bit 0 = timestamp present, other bits 0
    6   2  n, samples per channel, 1..4096
    8   4  sequence number, +1 per frame, wraps at 2**32
    12  8  (flag bit 0 only) microseconds since the Unix epoch of the first sample
    ..     n*C samples, interleaved by instant
    ..  4  CRC-32 (zlib.crc32) of every byte from `version` through the last sample

Resynchronisation: a frame counts only when its header is in range and its
CRC matches. Otherwise the decoder steps one byte past the sync and scans for
the next one, so a false sync (in garbage or inside a damaged frame) never
swallows the good frame behind it. A header that is in range but whose frame
has not fully arrived is held, unless a complete frame with a good CRC already
starts inside the bytes it claims: then the held header was false (or its
frame truncated) and is dropped at once, instead of stalling the stream until
the bytes it claimed have arrived.

Sequence numbers: the first frame after creation or `reset()` sets the
expectation. A forward jump of k frames is a gap of k * n samples (n of the
arriving frame). A backward jump (the sender restarted or repeated a frame) is
also a gap; its size is unknown and reported as one frame's worth. A frame
with a good CRC that is dropped anyway (wrong channel count, NaN or infinite
float samples) still advances the sequence, and its samples are added to the
`lost` of the next delivered frame, so no spectrum spans the hole.
"""

import struct
import zlib
from typing import Dict, List, Optional, Tuple

import numpy as np

from ..block import Block, full_scale
from . import Decoder

SYNC = b"\xa7\x4d"
VERSION = 1
INT16, INT32, FLOAT32 = 1, 2, 3
FLAG_TIMESTAMP = 0x01
MAX_CHANNELS = 16
MAX_SAMPLES = 4096
HEADER_SIZE = 12  # sync through sequence number
TIMESTAMP_SIZE = 8
CRC_SIZE = 4
MAX_FRAME = HEADER_SIZE + TIMESTAMP_SIZE + MAX_CHANNELS * MAX_SAMPLES * 4 + CRC_SIZE

_HEAD = struct.Struct("<BBBBHI")  # version, type, channels, flags, n, sequence (from offset 2)
_U32 = struct.Struct("<I")
_U64 = struct.Struct("<Q")
_TYPES: Dict[int, np.dtype] = {INT16: np.dtype("<i2"), INT32: np.dtype("<i4"), FLOAT32: np.dtype("<f4")}
_SEQ_MOD = 1 << 32
_HALF = 1 << 31

# Results of checking a candidate frame.
_BAD, _GOOD, _INCOMPLETE = 0, 1, 2


def _frame_size(version: int, stype: int, nch: int, flags: int, n: int) -> int:
    """Total bytes of a frame with this header, or 0 when the header is out of range."""
    if version != VERSION or stype not in _TYPES or not 1 <= nch <= MAX_CHANNELS:
        return 0
    if flags & ~FLAG_TIMESTAMP or not 1 <= n <= MAX_SAMPLES:
        return 0
    extra = TIMESTAMP_SIZE if flags & FLAG_TIMESTAMP else 0
    return HEADER_SIZE + extra + n * nch * _TYPES[stype].itemsize + CRC_SIZE


class FrameDecoder(Decoder):
    """Decodes a stream of version 1 frames into blocks, one per good frame."""

    def __init__(self, channels: int) -> None:
        super().__init__(channels)
        self._buf = bytearray()
        self._expected: Optional[int] = None
        self._pending_lost = 0
        self._reset_lookahead()

    @property
    def buffered(self) -> int:
        return len(self._buf)

    def reset(self) -> None:
        self._buf = bytearray()
        self._expected = None
        self._pending_lost = 0
        self._reset_lookahead()

    def _reset_lookahead(self) -> None:
        # Memo of the look-ahead behind one held (incomplete) candidate, so
        # repeated small feeds never rescan the bytes already looked at.
        self._ahead_at = -1
        self._ahead_from = 0
        self._ahead_pending: List[int] = []
        self._held = 0  # size of the incomplete frame held at the start of the buffer

    def feed(self, data: bytes) -> List[Block]:
        buf = self._buf
        buf += data
        end = len(buf)
        if end < self._held and not self._ahead_pending and buf.find(SYNC, self._ahead_from) < 0:
            # Still filling the held frame and no new sync arrived: nothing to do.
            self._ahead_from = end - 1
            return []
        out: List[Block] = []
        counters = self.counters
        pos = 0
        held = 0
        with memoryview(buf) as view:
            while True:
                i = buf.find(SYNC, pos)
                if i < 0:
                    # Keep a lone first sync byte: its partner may come next.
                    keep = end - 1 if end > pos and buf[end - 1] == SYNC[0] else end
                    counters["corrupt_bytes"] += keep - pos
                    pos = keep
                    break
                counters["corrupt_bytes"] += i - pos
                pos = i
                state, size = self._check(buf, view, i, end)
                if state == _INCOMPLETE:
                    if size and self._complete_frame_after(buf, view, i, end):
                        state = _BAD
                    else:
                        held = size
                        break
                if state == _BAD:
                    counters["corrupt_frames"] += 1
                    counters["corrupt_bytes"] += 1
                    pos = i + 1
                    continue
                self._accept(buf, i, out)
                pos = i + size
        if pos:
            del buf[:pos]
        if self._ahead_at == pos:
            self._ahead_at = 0
            self._ahead_from -= pos
            self._ahead_pending = [j - pos for j in self._ahead_pending]
            self._held = held
        else:
            self._reset_lookahead()
        return out

    def _check(self, buf: bytearray, view: memoryview, i: int, end: int) -> Tuple[int, int]:
        """(state, frame size) of the candidate at `i`; size 0 when the header
        itself has not fully arrived."""
        if end - i < HEADER_SIZE:
            return _INCOMPLETE, 0
        size = _frame_size(*_HEAD.unpack_from(buf, i + 2)[:5])
        if not size:
            return _BAD, 0
        if end - i < size:
            return _INCOMPLETE, size
        crc_at = i + size - CRC_SIZE
        if zlib.crc32(view[i + 2 : crc_at]) != _U32.unpack_from(buf, crc_at)[0]:
            return _BAD, size
        return _GOOD, size

    def _complete_frame_after(self, buf: bytearray, view: memoryview, i: int, end: int) -> bool:
        """Whether a complete frame with a good CRC starts after the held candidate at `i`."""
        if self._ahead_at != i:
            self._ahead_at, self._ahead_from, self._ahead_pending = i, i + 1, []
        waiting = []
        for j in self._ahead_pending:
            state = self._check(buf, view, j, end)[0]
            if state == _GOOD:
                return True
            if state == _INCOMPLETE:
                waiting.append(j)
        j = buf.find(SYNC, self._ahead_from)
        while j >= 0:
            state = self._check(buf, view, j, end)[0]
            if state == _GOOD:
                return True
            if state == _INCOMPLETE:
                waiting.append(j)
            j = buf.find(SYNC, j + 1)
        self._ahead_from = max(end - 1, i + 1)  # a sync may straddle the end
        self._ahead_pending = waiting
        return False

    def _accept(self, buf: bytearray, i: int, out: List[Block]) -> None:
        """Take the good frame at `i`: sequence bookkeeping, then deliver or drop."""
        _version, stype, nch, flags, n, seq = _HEAD.unpack_from(buf, i + 2)
        counters = self.counters
        lost = 0
        expected = self._expected
        if expected is not None and seq != expected:
            missing = (seq - expected) % _SEQ_MOD
            lost = n if missing >= _HALF else missing * n
            counters["gaps"] += 1
            counters["lost_samples"] += lost
        self._expected = (seq + 1) % _SEQ_MOD
        if nch != self.channels:
            counters["mismatched"] += 1
            self._pending_lost += lost + n
            return
        at = i + HEADER_SIZE
        timestamp = None
        if flags & FLAG_TIMESTAMP:
            timestamp = _U64.unpack_from(buf, at)[0]
            at += TIMESTAMP_SIZE
        samples = np.frombuffer(buf, _TYPES[stype], n * nch, at).astype(np.float64).reshape(n, nch)
        if stype == FLOAT32 and not np.isfinite(samples).all():
            counters["nonfinite"] += 1
            self._pending_lost += lost + n
            return
        counters["frames"] += 1
        out.append(Block(samples=samples, lost=lost + self._pending_lost, full_scale=_FULL_SCALE.get(stype),
                         timestamp_us=timestamp))
        self._pending_lost = 0


# Largest positive value of each integer sample type: samples there are clipped.
_FULL_SCALE = {INT16: full_scale("int16"), INT32: full_scale("int32")}


def encode_frame(
    samples: np.ndarray, seq: int, sample_type: int = INT16, timestamp_us: Optional[int] = None
) -> bytes:
    """One version 1 frame holding `samples` shaped (n, C) (1-D means one channel).

    Integer sample types take whole numbers in their range; float32 takes any
    value, NaN and infinities included (for testing receivers).
    """
    data = np.asarray(samples)
    if data.ndim == 1:
        data = data[:, None]
    if data.ndim != 2:
        raise ValueError(f"samples shape {data.shape} is not (n, channels)")
    n, nch = data.shape
    if not 1 <= n <= MAX_SAMPLES:
        raise ValueError(f"{n=} samples per channel is outside 1..{MAX_SAMPLES}")
    if not 1 <= nch <= MAX_CHANNELS:
        raise ValueError(f"{nch=} channels is outside 1..{MAX_CHANNELS}")
    if sample_type not in _TYPES:
        raise ValueError(f"{sample_type=} is not 1 (int16), 2 (int32) or 3 (float32)")
    if isinstance(seq, bool) or not 0 <= seq < _SEQ_MOD:
        raise ValueError(f"{seq=} is not a sequence number in 0..2**32-1")
    dtype = _TYPES[sample_type]
    if sample_type != FLOAT32:
        info = np.iinfo(dtype)
        if data.size and (
            not np.all(np.isfinite(data))
            or np.any(data != np.round(data))
            or data.min() < info.min
            or data.max() > info.max
        ):
            raise ValueError(f"samples are not whole numbers within {dtype.name} range {info.min}..{info.max}")
    flags = 0
    stamp = b""
    if timestamp_us is not None:
        if not 0 <= timestamp_us < 1 << 64:
            raise ValueError(f"{timestamp_us=} does not fit an unsigned 64-bit field")
        flags = FLAG_TIMESTAMP
        stamp = _U64.pack(timestamp_us)
    body = _HEAD.pack(VERSION, sample_type, nch, flags, n, seq) + stamp + data.astype(dtype).tobytes()
    return SYNC + body + _U32.pack(zlib.crc32(body))
