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
starts after it, inside the bytes it claims: a real frame does not hold
another whole frame with a matching CRC in its samples (short of a false
header there and a 1 in 2**32 accident), so the held header was false or its
frame cut short. It is dropped at once instead of stalling the stream until
the bytes it claimed have arrived. Fed with `whole=True` (a UDP datagram, which
holds whole frames) nothing is held: what is left at the end is dropped.

Runs: a sensor sends frames back to back, and one read holds many. Behind a
good frame with nothing skipped before it (the first of a chunk, or one
right behind the frame taken last), the frames that follow on from it
(complete, with the same header but for a sequence number one higher each)
are taken with it as one Block: their headers are compared at once with
numpy, through strided views of the buffer, each one's CRC is checked, and
their samples are copied and converted once. The Block carries the first
frame's timestamp. Nothing is lost between the frames of a run, so a gap, a
restart, or another sample type, channel count, timestamp flag or n always
starts a new Block. The first frame that does not follow on, or a float32
frame holding NaN or infinity, ends the run and is taken or rejected on its
own, as above. A good frame behind skipped bytes is taken alone: on hostile
input it mostly is alone, and looking behind it would cost time there; a run
that resumes after a damaged frame is found from its second frame on.

Cost on hostile input: bytes are scanned for syncs once, each header is read
once, bar those a run's check reads ahead (in windows that double: at most
twice as many as the frames it takes, plus 32), and each candidate's CRC is
checked once, when its last byte arrives; the CRCs of overlapping candidates
share one pass over their bytes (spancrc.py). Many syncs at once are handled
with numpy, a few with plain code. So time stays in proportion to the bytes
fed, however the false headers nest (bench/acquisition.py measures it).

Sequence numbers: the first frame after creation or `reset()` sets the
expectation. A forward jump of k frames is a gap of k * n samples (n of the
arriving frame), unless k * n exceeds `max_gap`. Such a jump, or a backward
one (the sender restarted, or repeated a frame), is a restart: tracking
starts again from that frame, `restarts` counts it, and its Block carries
`restart` (and `lost` of at least 1), since the sequence says nothing about
how much is missing; the stream source measures that from the clock. A frame
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
from .spancrc import span_crcs

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

# Header bytes 2-3 (version, type) -> bytes per sample, 0 when out of range;
# bytes 4-5 (channels, flags) -> channels, 0 when out of range. For reading
# many headers at once.
_WIDTH_BY_VERSION_TYPE = np.zeros(1 << 16, dtype=np.uint8)
for _type, _dtype in _TYPES.items():
    _WIDTH_BY_VERSION_TYPE[VERSION | _type << 8] = _dtype.itemsize
_CHANNELS_BY_FIELD = np.zeros(1 << 16, dtype=np.uint8)
for _flags in (0, FLAG_TIMESTAMP):
    _CHANNELS_BY_FIELD[np.arange(1, MAX_CHANNELS + 1) | _flags << 8] = np.arange(1, MAX_CHANNELS + 1)
# Syncs are read one by one while they are sparse (as in frames with garbage
# here and there); once _SMALL of them come closer than _SPARSE bytes apart on
# average, the rest of the chunk is read with numpy.
_SMALL = 16
_SPARSE = 256
_LONG = 4096  # syncs in a longer run of garbage are counted with numpy (bytes.count slows on many)
# Headers read at once when a run of frames starts (a TCP read of 0.2 s of a
# 25.6 kS/s stream in 512-sample frames holds 10).
_RUN_WINDOW = 32
_EMPTY = np.zeros(0, dtype=np.int64)
_NOWHERE = 1 << 62  # an end no buffer reaches


def _frame_size(version: int, stype: int, nch: int, flags: int, n: int) -> int:
    """Total bytes of a frame with this header, or 0 when the header is out of range."""
    if version != VERSION or stype not in _TYPES or not 1 <= nch <= MAX_CHANNELS:
        return 0
    if flags & ~FLAG_TIMESTAMP or not 1 <= n <= MAX_SAMPLES:
        return 0
    extra = TIMESTAMP_SIZE if flags & FLAG_TIMESTAMP else 0
    return HEADER_SIZE + extra + n * nch * _TYPES[stype].itemsize + CRC_SIZE


def _crc_matches(buf: bytearray, view: memoryview, start: int, stop: int) -> bool:
    """Whether the frame in buf[start:stop] carries the CRC of its bytes."""
    crc_at = stop - CRC_SIZE
    return zlib.crc32(view[start + 2 : crc_at]) == _U32.unpack_from(buf, crc_at)[0]


def _count_syncs(buf: bytearray, start: int, stop: int) -> int:
    """How many syncs lie wholly in buf[start:stop]."""
    if stop - start < _LONG:
        return buf.count(SYNC, start, stop)
    region = np.frombuffer(buf, np.uint8, stop - start, start)
    return int(np.count_nonzero((region[:-1] == SYNC[0]) & (region[1:] == SYNC[1])))


def _headers(buf: bytearray, start: int, stop: int) -> Tuple[np.ndarray, np.ndarray]:
    """Offsets and frame ends of the syncs starting in [start, stop) whose
    header is in range, all read at once (each header has fully arrived)."""
    length = stop - start
    region = np.frombuffer(buf, np.uint8, length + 2, start)
    first = np.flatnonzero(region[:length] == SYNC[0])
    first = first[(region[first + 1] == SYNC[1]) & (region[first + 2] == VERSION)]  # cheap first cut
    del region
    # The first 8 header bytes at each of those (an overlapping view of
    # the buffer as 8-byte integers, one per offset), split into four 16-bit
    # fields: sync, version and type, channels and flags, n.
    head = np.ndarray((length,), dtype="<u8", buffer=buf, offset=start, strides=(1,))[first]
    _sync, version_type, channels_flags, n = head.view("<u2").reshape(-1, 4).T
    per_instant = _WIDTH_BY_VERSION_TYPE[version_type] * _CHANNELS_BY_FIELD[channels_flags].astype(np.int32)
    ok = (per_instant > 0) & (n - np.uint16(1) < MAX_SAMPLES)  # n - 1 wraps for n = 0
    at = first[ok] + start
    size = HEADER_SIZE + CRC_SIZE + TIMESTAMP_SIZE * (channels_flags[ok] >> 8) + n[ok].astype(np.int32) * per_instant[ok]
    return at, at + size


class FrameDecoder(Decoder):
    """Decodes a stream of version 1 frames into blocks, one per run of good
    frames that follow on (a lone good frame is a run of one)."""

    def __init__(self, channels: int) -> None:
        super().__init__(channels)
        self._buf = bytearray()
        self._expected: Optional[int] = None
        self._pending_lost = 0
        self._pending_restart = False
        self._forget()

    @property
    def buffered(self) -> int:
        return len(self._buf)

    def reset(self) -> None:
        self._buf = bytearray()
        self._expected = None
        self._pending_lost = 0
        self._pending_restart = False
        self._forget()

    def _forget(self) -> None:
        # What is known about the buffer, so no byte is looked at twice:
        # every sync that starts before `_seen` has had its header read, and
        # the candidates with a header in range whose frame has not fully
        # arrived are listed by offset (ascending) and end.
        self._seen = 0
        self._open_at = _EMPTY
        self._open_end = _EMPTY
        self._next_end = _NOWHERE  # the first end of an open candidate
        # A complete frame whose CRC `_run` found wrong, in this call: the
        # scan rejects it without checking it again.
        self._failed = -1

    def feed(self, data: bytes, whole: bool = False) -> List[Block]:
        buf = self._buf
        buf += data
        end = len(buf)
        self.truncated = False
        scan_to = end - HEADER_SIZE + 1  # a sync before this has its whole header
        open_at, open_end = self._open_at, self._open_end
        if (not whole and end < self._next_end and len(open_at) and open_at[0] == 0
                and buf.find(SYNC, self._seen, scan_to + 1) < 0):
            # Still filling the frame held at the start, no new header: nothing to do.
            self._seen = max(self._seen, scan_to)
            return []
        out: List[Block] = []
        self._failed = -1
        pos = 0  # everything before has been taken or skipped
        with memoryview(buf) as view:
            # A held candidate gets its one CRC check when its last byte is here.
            if end >= self._next_end:
                done = open_end <= end
                pos = self._take(buf, view, self._verify(buf, view, open_at[done], open_end[done]), pos, out, True)
                open_at, open_end = open_at[~done], open_end[~done]
            start = max(self._seen, pos)
            if scan_to > start:
                new_at, new_end, pos = self._scan(buf, view, start, scan_to, pos, out)
                if len(new_at):
                    open_at = np.concatenate((open_at, new_at))  # offsets stay ascending
                    open_end = np.concatenate((open_end, new_end))
            self._seen = max(self._seen, scan_to)
        # Hold from the first candidate still arriving: a header in range,
        # a header not yet whole, or a lone first sync byte at the very end.
        k = int(np.searchsorted(open_at, pos)) if len(open_at) else 0
        hold = int(open_at[k]) if k < len(open_at) else end
        partial = buf.find(SYNC, max(pos, self._seen), hold)
        if partial >= 0:
            hold = partial
        elif hold == end > pos and buf[end - 1] == SYNC[0]:
            hold = end - 1
        if whole:
            self.truncated = hold < end
            hold = end
        self._skip(buf, pos, hold)
        if hold:
            del buf[:hold]
            self._seen = max(self._seen - hold, 0)
            if len(open_at):
                k = int(np.searchsorted(open_at, hold))
                open_at, open_end = open_at[k:] - hold, open_end[k:] - hold
        self._open_at, self._open_end = open_at, open_end
        self._next_end = int(open_end.min()) if len(open_end) else _NOWHERE
        return out

    def _scan(self, buf: bytearray, view: memoryview, start: int, stop: int, pos: int,
              out: List[Block]) -> Tuple[np.ndarray, np.ndarray, int]:
        """Read the headers of the syncs starting in [start, stop) and take
        each complete frame with a good CRC (skipping its body). Returns the
        offsets and ends of the candidates in range but not yet complete, and
        where taking and skipping got to."""
        end = len(buf)
        found_at: List[int] = []
        found_end: List[int] = []
        i = buf.find(SYNC, start, stop + 1)
        window, count = i, 0
        passed = 0  # syncs looked at since max(pos, start), none of them taken
        while i >= 0:
            count += 1
            if count > _SMALL:
                if i - window < _SMALL * _SPARSE:
                    break  # dense syncs: the rest is read with numpy below
                window, count = i, 1
            head = _HEAD.unpack_from(buf, i + 2)
            size = _frame_size(*head[:5])
            if size and i + size > end:
                found_at.append(i)
                found_end.append(i + size)
            elif size and i != self._failed and _crc_matches(buf, view, i, i + size):
                if i > pos:
                    # Syncs before `start` were read in an earlier call (one may end at `start`).
                    self._skip(buf, pos, i, passed + (_count_syncs(buf, pos, start + 1) if pos < start else 0))
                pos = self._accept(buf, view, i, size, head, out, i == pos)
                passed = 0
                i = buf.find(SYNC, pos, stop + 1)  # past the frame's body
                continue
            passed += 1
            i = buf.find(SYNC, i + 2, stop + 1)
        at = np.array(found_at, dtype=np.int64)
        ends = np.array(found_end, dtype=np.int64)
        if i >= 0:
            more_at, more_end = _headers(buf, i, stop)
            now = more_end <= end
            # These frames' CRCs were all checked at once: taken one by one, no run.
            pos = self._take(buf, view, self._verify(buf, view, more_at[now], more_end[now]), pos, out, False)
            at = np.concatenate((at, more_at[~now]))
            ends = np.concatenate((ends, more_end[~now]))
        return at, ends, pos

    def _take(self, buf: bytearray, view: memoryview, good: List[Tuple[int, int]], pos: int,
              out: List[Block], runs: bool) -> int:
        """Take these good frames (offset, end; ascending) that start at or
        after `pos`, and skip what lies before each: syncs with a header out
        of range or a bad CRC, and held headers whose claimed bytes hold the
        good frame. With `runs`, a frame with nothing skipped before it is
        taken with the frames that continue it. Returns where the last frame
        taken ends."""
        for at, stop in good:
            if at < pos:
                continue  # starts inside a frame just taken
            if at > pos:
                self._skip(buf, pos, at)
            pos = self._accept(buf, view, at, stop - at, _HEAD.unpack_from(buf, at + 2), out, runs and at == pos)
        return pos

    def _skip(self, buf: bytearray, start: int, stop: int, syncs: Optional[int] = None) -> None:
        """Count buf[start:stop] as garbage: its bytes, and each sync in it as
        a rejected frame (`syncs` of them, when already known)."""
        if stop > start:
            self.counters["corrupt_bytes"] += stop - start
            self.counters["corrupt_frames"] += _count_syncs(buf, start, stop) if syncs is None else syncs

    @staticmethod
    def _verify(buf: bytearray, view: memoryview, at: np.ndarray, stop: np.ndarray) -> List[Tuple[int, int]]:
        """Offsets and ends of the complete candidates (ascending) whose CRC matches."""
        if len(at) < _SMALL:
            return [(i, e) for i, e in zip(at.tolist(), stop.tolist()) if _crc_matches(buf, view, i, e)]
        crc_at = stop - CRC_SIZE
        stored = np.ndarray((len(buf) - 3,), dtype="<u4", buffer=buf, strides=(1,))[crc_at]
        good = span_crcs(view, at + 2, crc_at) == stored
        return list(zip(at[good].tolist(), stop[good].tolist()))

    def _accept(self, buf: bytearray, view: memoryview, i: int, size: int, head: Tuple[int, ...], out: List[Block],
                run: bool) -> int:
        """Take the good frame at `i` (`size` bytes, `head` its header as
        _HEAD reads it), with `run` the frames that continue it too (`_run`):
        sequence bookkeeping, then deliver or drop. Returns where what was
        taken ends."""
        _version, stype, nch, flags, n, seq = head
        counters = self.counters
        lost = 0
        expected = self._expected
        if expected is not None and seq != expected:
            missing = (seq - expected) % _SEQ_MOD
            if missing >= _HALF or (self.max_gap is not None and missing * n > self.max_gap):
                # Backwards, or further ahead than could have been lost: the
                # sender started afresh and the sequence says nothing about
                # what is missing. Tracking starts again from this frame.
                counters["restarts"] += 1
                self._pending_restart = True
            else:
                lost = missing * n
                counters["gaps"] += 1
                counters["lost_samples"] += lost
        self._expected = (seq + 1) % _SEQ_MOD
        if nch != self.channels:
            counters["mismatched"] += 1
            self._pending_lost += lost + n
            return i + size
        at = i + HEADER_SIZE
        timestamp = None
        if flags & FLAG_TIMESTAMP:
            timestamp = _U64.unpack_from(buf, at)[0]
            at += TIMESTAMP_SIZE
        frames = 1
        if run:
            frames += self._run(buf, view, i, size, seq)
        dtype = _TYPES[stype]
        if frames == 1:
            data = np.frombuffer(buf, dtype, n * nch, at)
        else:  # one row per frame, through a strided view of the buffer
            data = np.ndarray((frames, n * nch), dtype, buf, at, (size, dtype.itemsize))
        if stype == FLOAT32 and not np.isfinite(data).all():
            # The run ends before the first frame with NaN or infinity; that
            # frame is dropped, the frames after it are left to the scan.
            frames = int(np.isfinite(data).all(axis=1).argmin()) if frames > 1 else 0
            if not frames:
                counters["nonfinite"] += 1
                self._pending_lost += lost + n
                return i + size
            data = data[:frames]
        if frames > 1:
            self._expected = (seq + frames) % _SEQ_MOD
        counters["frames"] += frames
        lost += self._pending_lost
        restart = self._pending_restart
        # The one copy out of the buffer, and the one conversion.
        samples = data.astype(np.float64).reshape(-1, nch)
        out.append(Block(samples=samples, lost=max(lost, 1) if restart else lost, full_scale=_FULL_SCALE.get(stype),
                         timestamp_us=timestamp, restart=restart))
        self._pending_lost = 0
        self._pending_restart = False
        return i + frames * size

    def _run(self, buf: bytearray, view: memoryview, i: int, size: int, seq: int) -> int:
        """How many frames right behind the good frame at `i` (`size` bytes,
        sequence number `seq`) continue it: complete, back to back, with the
        same first 8 header bytes (sync, version, type, channels, flags, n),
        the next sequence numbers and a good CRC. Frame by frame they would
        be taken one after the other with nothing lost between; here they
        are checked at once."""
        count = (len(buf) - i) // size - 1  # room for this many complete frames behind it
        nxt = i + size
        # The next frame alone in plain code first: behind a lone good frame
        # (garbage, another shape, a damaged frame, the end of the chunk)
        # numpy would cost more than it saves.
        if (count < 1 or _U64.unpack_from(buf, nxt) != _U64.unpack_from(buf, i)
                or _U32.unpack_from(buf, nxt + 8)[0] != (seq + 1) % _SEQ_MOD):
            return 0
        if not _crc_matches(buf, view, nxt, nxt + size):
            self._failed = nxt  # the scan, which goes on there, rejects it
            return 0
        head = np.uint64(_U64.unpack_from(buf, i)[0])
        taken = 1  # frames behind the one at `i` that continue it
        window = _RUN_WINDOW
        while taken < count:
            # The next headers at once, through strided views of the buffer.
            # The window doubles while the run goes on, so the work stays in
            # proportion to the frames taken however often runs break.
            m = min(window, count - taken)
            at = nxt + taken * size
            heads = np.ndarray((m,), "<u8", buf, at, (size,))
            seqs = np.ndarray((m,), "<u4", buf, at + 8, (size,))
            ok = (heads == head) & (seqs - np.uint32(seq) == np.arange(taken + 1, taken + 1 + m, dtype=np.uint32))
            regular = m if ok.all() else int(ok.argmin())
            for k in range(regular):
                start = at + k * size
                if not _crc_matches(buf, view, start, start + size):
                    self._failed = start
                    return taken + k
            taken += regular
            if regular < m:
                break
            window *= 2
        return taken


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
