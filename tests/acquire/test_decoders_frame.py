"""The binary frame decoder against the wire format (README, The sensor wire format).

Frames in the reference checks are assembled byte by byte with struct from the
README's table, and their CRC comes from zlib.crc32 and from a bit-by-bit CRC-32
written out in the test from the definition of the IEEE 802.3 polynomial.
"""

import struct
import zlib
from typing import List, Optional

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from monitor.acquire.block import Block
from monitor.acquire.decoders import make_decoder
from monitor.acquire.decoders.frame import MAX_FRAME, encode_frame

DTYPES = {1: "<i2", 2: "<i4", 3: "<f4"}


def crc32_bitwise(data: bytes) -> int:
    """CRC-32 of IEEE 802.3: reflected polynomial 0xEDB88320, init and final
    xor 0xFFFFFFFF (the textbook definition, written from memory)."""
    crc = 0xFFFFFFFF
    for byte in data:
        crc ^= byte
        for _ in range(8):
            crc = (crc >> 1) ^ (0xEDB88320 if crc & 1 else 0)
    return crc ^ 0xFFFFFFFF


def hand_frame(samples: np.ndarray, seq: int, stype: int = 1, flags: int = 0, timestamp: Optional[int] = None,
               version: int = 1, channels: Optional[int] = None, n: Optional[int] = None) -> bytes:
    """A frame built field by field from the README's table (not with encode_frame)."""
    rows, cols = samples.shape
    body = struct.pack("<BBBBHI", version, stype, cols if channels is None else channels, flags,
                       rows if n is None else n, seq)
    if timestamp is not None:
        body += struct.pack("<Q", timestamp)
    fmt = {1: "h", 2: "i", 3: "f"}[stype]
    values = samples.ravel().tolist()
    if stype != 3:
        values = [int(v) for v in values]
    body += struct.pack("<" + fmt * samples.size, *values)
    return b"\xa7\x4d" + body + struct.pack("<I", zlib.crc32(body))


def decode_all(data: bytes, channels: int, chunk: int = 0) -> List[Block]:
    decoder = make_decoder("frame", channels)
    if not chunk:
        return decoder.feed(data)
    out = []
    for at in range(0, len(data), chunk):
        out += decoder.feed(data[at : at + chunk])
    return out


def in_order(arrays, channels: int) -> np.ndarray:
    """These sample arrays (n, channels) one after the other, as float64: every
    sample decoded, whatever frames the decoder took together in a block."""
    return np.concatenate([np.zeros((0, channels))] + list(arrays))


def feed_in_pieces(decoder, stream: bytes, cuts: List[int]) -> List[Block]:
    """Feed `stream` cut into pieces of the sizes in `cuts`, then the rest."""
    out: List[Block] = []
    at = 0
    for size in cuts:
        out += decoder.feed(stream[at : at + size])
        at += size
    return out + decoder.feed(stream[at:])


# ------------------------------------------------------------- reference checks


def test_zlib_crc32_is_the_ieee_crc():
    # Check value of CRC-32 over ASCII "123456789" is 0xCBF43926 (the CRC
    # catalogue's check value for CRC-32/ISO-HDLC; from memory).
    assert zlib.crc32(b"123456789") == 0xCBF43926
    assert crc32_bitwise(b"123456789") == 0xCBF43926


def test_hand_assembled_frame_decodes_and_matches_encode_frame():
    samples = np.array([[1, -2, 3], [32767, -32768, 0]])
    frame = hand_frame(samples, seq=7)
    # README's frame table: 12 header bytes + 2*3*2 sample bytes + 4 CRC bytes.
    assert len(frame) == 12 + 12 + 4
    assert frame[:2] == b"\xa7\x4d"
    # CRC covers version..last sample; compare with the bitwise definition.
    assert struct.unpack("<I", frame[-4:])[0] == crc32_bitwise(frame[2:-4])
    assert encode_frame(samples, 7) == frame
    decoder = make_decoder("frame", 3)
    out = decoder.feed(frame)
    assert len(out) == 1
    assert out[0].samples.dtype == np.float64
    assert np.array_equal(out[0].samples, samples)
    assert out[0].lost == 0 and out[0].timestamp_us is None
    assert decoder.counters["frames"] == 1


def test_hand_assembled_frame_with_timestamp_and_each_type():
    stamp = 1_700_000_000_123_456  # microseconds since the epoch
    for stype, values in ((1, [[-5], [6]]), (2, [[-2_000_000_000], [2_000_000_000]]), (3, [[0.5], [-1.25e-3]])):
        samples = np.array(values)
        frame = hand_frame(samples, seq=1, stype=stype, flags=1, timestamp=stamp)
        assert encode_frame(samples, 1, sample_type=stype, timestamp_us=stamp) == frame
        (got,) = decode_all(frame, 1)
        assert got.timestamp_us == stamp
        # float32 values are compared after the float32 rounding the wire imposes.
        assert np.array_equal(got.samples, samples.astype(DTYPES[stype]))


@pytest.mark.parametrize("stype", [1, 2, 3])
@pytest.mark.parametrize("stamped", [False, True])
def test_round_trip_every_type(stype, stamped):
    rng = np.random.default_rng(stype)
    info = np.iinfo(DTYPES[stype]) if stype != 3 else None
    blocks = []
    for _ in range(5):
        if info is not None:
            blocks.append(rng.integers(info.min, info.max, size=(300, 4), endpoint=True))
        else:
            blocks.append(rng.normal(0, 100, size=(300, 4)).astype(np.float32))
    stream = b"".join(
        encode_frame(b, seq, sample_type=stype, timestamp_us=1000 * seq if stamped else None)
        for seq, b in enumerate(blocks)
    )
    out = decode_all(stream, 4, chunk=333)
    assert len(out) == len(blocks)
    for seq, (got, want) in enumerate(zip(out, blocks)):
        assert np.array_equal(got.samples, want)
        assert got.timestamp_us == (1000 * seq if stamped else None)
        assert got.lost == 0


# ------------------------------------------------------------------ property


@st.composite
def streams(draw):
    channels = draw(st.integers(1, 4))
    count = draw(st.integers(0, 8))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    start = draw(st.integers(0, 2**32 - 1))
    parts, blocks, garbage = [], [], 0
    for k in range(count):
        junk = draw(st.one_of(
            st.just(b""),
            st.binary(max_size=40),
            st.sampled_from([b"\xa7", b"\xa7\x4d", b"\xa7\x4d\x01", b"\xa7\xa7\x4d\x01\x01"]),
            # A false header in range, claiming up to the largest frame: it
            # must not hold back the good frames behind it.
            st.builds(lambda t, c, f, n, s: b"\xa7\x4d" + struct.pack("<BBBBHI", 1, t, c, f, n, s),
                      st.integers(1, 3), st.integers(1, 16), st.integers(0, 1), st.integers(1, 4096),
                      st.integers(0, 2**32 - 1)),
        ))
        stype = draw(st.sampled_from([1, 2, 3]))
        n = draw(st.integers(1, 40))
        if stype == 3:
            block = rng.normal(0, 1e3, size=(n, channels)).astype(np.float32)
        else:
            info = np.iinfo(DTYPES[stype])
            block = rng.integers(info.min, info.max, size=(n, channels), endpoint=True)
        frame = encode_frame(block, (start + k) % 2**32, sample_type=stype,
                             timestamp_us=draw(st.none() | st.integers(0, 2**64 - 1)))
        if draw(st.booleans()):
            # A cut-off copy of a frame: a false header that claims bytes it never gets.
            junk += frame[: draw(st.integers(0, len(frame) - 1))]
        parts += [junk, frame]
        garbage += len(junk)
        blocks.append(block)
    tail = draw(st.binary(max_size=20))
    parts.append(tail)
    garbage += len(tail)
    return channels, b"".join(parts), blocks, garbage


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(case=streams(), cuts=st.lists(st.integers(1, 200), max_size=60))
def test_every_intact_frame_decoded_once_in_order(case, cuts):
    channels, stream, blocks, garbage = case
    decoder = make_decoder("frame", channels)
    out = feed_in_pieces(decoder, stream, cuts)
    assert np.array_equal(in_order([b.samples for b in out], channels), in_order(blocks, channels))
    assert all(got.lost == 0 for got in out)
    c = decoder.counters
    assert c["frames"] == len(blocks)
    assert c["gaps"] == 0 and c["mismatched"] == 0 and c["nonfinite"] == 0
    # Every byte outside the good frames was either skipped or is still held.
    assert c["corrupt_bytes"] + decoder.buffered == garbage


# ---------------------------------------------------------------- corruption


def small(seq: int, value: int = 1, n: int = 2) -> bytes:
    return hand_frame(np.full((n, 1), value), seq)


def test_random_bytes_alone_give_nothing():
    junk = np.random.default_rng(5).integers(0, 256, size=100_000, dtype=np.uint8).tobytes()
    decoder = make_decoder("frame", 1)
    assert decode_all(junk, 1, chunk=1000) == []
    decoder.feed(junk)
    assert decoder.counters["frames"] == 0
    assert decoder.counters["corrupt_bytes"] + decoder.buffered == len(junk)
    assert decoder.buffered <= MAX_FRAME


def test_truncated_frame_is_counted_and_the_next_is_kept():
    whole = hand_frame(np.arange(200).reshape(100, 2), 0)
    good = hand_frame(np.ones((3, 2)), 1)
    decoder = make_decoder("frame", 2)
    out = decoder.feed(whole[:150] + good)
    assert len(out) == 1 and np.array_equal(out[0].samples, np.ones((3, 2)))
    assert decoder.counters["corrupt_frames"] == 1
    assert decoder.counters["corrupt_bytes"] == 150


@pytest.mark.parametrize("n", [0, 4097, 65535])
def test_header_with_n_out_of_range_is_rejected_at_once(n):
    header = b"\xa7\x4d" + struct.pack("<BBBBHI", 1, 1, 1, 0, n, 0)
    decoder = make_decoder("frame", 1)
    assert decoder.feed(header + b"\x00" * 8) == []
    # Rejected without waiting for n samples: nothing of it is held.
    assert decoder.counters["corrupt_frames"] == 1
    assert decoder.buffered == 0
    out = decoder.feed(small(3))
    assert len(out) == 1


def test_largest_frame_decodes_and_the_tail_stays_bounded():
    block = np.arange(16 * 4096, dtype=np.float32).reshape(4096, 16)
    frame = encode_frame(block, 9, sample_type=3, timestamp_us=5)
    assert len(frame) == MAX_FRAME
    decoder = make_decoder("frame", 16)
    assert decoder.feed(frame[:-1]) == []
    assert decoder.buffered == MAX_FRAME - 1
    (got,) = decoder.feed(frame[-1:])
    assert np.array_equal(got.samples, block)
    assert decoder.buffered == 0


def test_every_flipped_bit_drops_only_its_frame():
    first, damaged_src, last = small(0, 1), small(1, 2), small(2, 3)
    for bit in range(len(damaged_src) * 8):
        damaged = bytearray(damaged_src)
        damaged[bit // 8] ^= 1 << (bit % 8)
        decoder = make_decoder("frame", 1)
        out = decoder.feed(first + bytes(damaged) + last)
        assert [d.samples[0, 0] for d in out] == [1.0, 3.0], bit
        assert decoder.counters["corrupt_bytes"] == len(damaged), bit
        assert decoder.counters["corrupt_frames"] <= 1, bit
        # The damaged frame's sequence number never arrived: a gap of 2 samples.
        assert out[1].lost == 2 and decoder.counters["gaps"] == 1, bit


def test_flipped_bit_in_the_samples_is_a_crc_failure():
    damaged = bytearray(small(0, 1))
    damaged[14] ^= 0x10
    decoder = make_decoder("frame", 1)
    assert decoder.feed(bytes(damaged)) == []
    assert decoder.counters["corrupt_frames"] == 1


@pytest.mark.parametrize("field", ["version", "flags", "type", "channels"])
def test_header_fields_out_of_range_with_a_valid_crc(field):
    samples = np.ones((2, 1))
    bad = {
        "version": hand_frame(samples, 0, version=2),
        "flags": hand_frame(samples, 0, flags=0x02),
        "type": hand_frame(samples, 0, stype=1)[:3] + b"\x04" + hand_frame(samples, 0)[4:],
        "channels": hand_frame(samples, 0, channels=17),
    }[field]
    if field == "type":  # recompute the CRC after changing the type byte
        bad = bad[:-4] + struct.pack("<I", zlib.crc32(bad[2:-4]))
    decoder = make_decoder("frame", 1)
    out = decoder.feed(bad + small(1))
    assert len(out) == 1
    assert decoder.counters["corrupt_frames"] == 1
    assert decoder.counters["frames"] == 1


def test_sequence_jump_is_a_gap_with_lost_samples():
    decoder = make_decoder("frame", 1)
    out = decoder.feed(small(10, n=4) + small(11, n=4) + small(15, n=5))
    # Frames 10 and 11 follow on (one block); 12, 13, 14 are missing, n of the arriving frame.
    assert [(d.samples.shape[0], d.lost) for d in out] == [(8, 0), (5, 3 * 5)]
    assert decoder.counters["gaps"] == 1
    assert decoder.counters["lost_samples"] == 15
    # A jump right behind the first frame of a chunk.
    out = decoder.feed(small(16, n=5) + small(20, n=5))
    assert [(d.samples.shape[0], d.lost) for d in out] == [(5, 0), (5, 3 * 5)]


def test_wraparound_is_not_a_gap():
    decoder = make_decoder("frame", 1)
    out = decoder.feed(small(0xFFFFFFFE) + small(0xFFFFFFFF) + small(0) + small(1))
    assert [(d.samples.shape[0], d.lost) for d in out] == [(8, 0)]  # one run across the wrap
    assert decoder.counters["gaps"] == 0 and decoder.counters["frames"] == 4
    out = decoder.feed(small(0xFFFFFFFF))  # 2 -> 0xFFFFFFFF: backwards, a restart
    assert decoder.counters["gaps"] == 0 and decoder.counters["restarts"] == 1
    assert out[0].restart and out[0].lost == 1


def test_a_backward_jump_restarts_sequence_tracking():
    decoder = make_decoder("frame", 1)
    out = decoder.feed(small(500) + small(501) + small(7) + small(8) + small(10))
    # The sender started again at 7: no gap is measured from 501 to 7, and
    # 7 -> 8 -> 10 is tracked afresh (frame 9 missing: 2 samples).
    assert [(d.samples.shape[0], d.lost, d.restart) for d in out] == [(4, 0, False), (4, 1, True), (2, 2, False)]
    assert (decoder.counters["restarts"], decoder.counters["gaps"], decoder.counters["lost_samples"]) == (1, 1, 2)


def test_a_jump_beyond_max_gap_is_a_restart_not_a_billion_lost_samples():
    decoder = make_decoder("frame", 1)
    decoder.max_gap = 100  # the most samples per channel a jump may stand for
    out = decoder.feed(small(0) + small(50) + small(1_000_000_000) + small(1_000_000_001))
    # 0 -> 50 is 49 frames of 2 samples, 98 <= 100: a gap. The jump to 1e9 is not.
    assert [(d.samples.shape[0], d.lost, d.restart) for d in out] == [(2, 0, False), (2, 98, False), (4, 1, True)]
    assert decoder.counters["lost_samples"] == 98 and decoder.counters["restarts"] == 1
    decoder.max_gap = None  # no bound: the sequence is taken at its word
    out = decoder.feed(small(1_000_000_101))
    assert out[0].lost == 99 * 2 and not out[0].restart


def test_a_restart_on_a_dropped_frame_is_carried_to_the_next_one():
    decoder = make_decoder("frame", 1)
    out = decoder.feed(small(40) + hand_frame(np.ones((2, 3)), 3) + small(4))
    # The wrong-channel frame 3 restarted the sequence; frame 4 carries it.
    assert [(d.lost, d.restart) for d in out] == [(0, False), (2, True)]
    assert decoder.counters["mismatched"] == 1 and decoder.counters["restarts"] == 1


def test_reset_forgets_the_sequence_and_partial_input():
    decoder = make_decoder("frame", 1)
    decoder.feed(small(5) + small(6)[:7])
    assert decoder.buffered == 7
    decoder.reset()
    assert decoder.buffered == 0
    out = decoder.feed(small(100))
    assert out[0].lost == 0 and decoder.counters["gaps"] == 0


def test_channel_mismatch_is_counted_and_never_mixed_in():
    decoder = make_decoder("frame", 2)
    out = decoder.feed(hand_frame(np.ones((4, 2)), 0) + hand_frame(np.ones((4, 3)), 1)
                       + hand_frame(np.zeros((4, 2)), 2))
    assert len(out) == 2
    assert all(d.samples.shape == (4, 2) for d in out)
    assert decoder.counters["mismatched"] == 1
    # The dropped frame's samples are missing from the stream: marked as lost.
    assert out[1].lost == 4
    assert decoder.counters["gaps"] == 0


@pytest.mark.parametrize("bad", [float("nan"), float("inf"), float("-inf")])
def test_nonfinite_float_frames_are_dropped_whole(bad):
    block = np.zeros((3, 2), dtype=np.float32)
    block[1, 1] = bad
    decoder = make_decoder("frame", 2)
    out = decoder.feed(hand_frame(block, 0, stype=3) + hand_frame(np.ones((3, 2)), 1, stype=3))
    assert len(out) == 1 and np.array_equal(out[0].samples, np.ones((3, 2)))
    assert decoder.counters["nonfinite"] == 1
    assert out[0].lost == 3


def test_false_sync_in_garbage_does_not_swallow_the_next_frame():
    # A header in range claiming 4096 samples of 16 channels, then a good frame.
    false = b"\xa7\x4d" + struct.pack("<BBBBHI", 1, 3, 16, 1, 4096, 0)
    decoder = make_decoder("frame", 1)
    out = decoder.feed(b"noise" + false + b"x" * 3 + small(1))
    assert len(out) == 1
    assert decoder.counters["corrupt_frames"] == 1
    assert decoder.counters["corrupt_bytes"] == 5 + len(false) + 3


def test_sync_split_between_feeds_behind_two_false_headers():
    false = b"\xa7\x4d" + struct.pack("<BBBBHI", 1, 3, 16, 0, 4096, 0)
    good = small(1, 5)
    decoder = make_decoder("frame", 1)
    assert decoder.feed(false + false + good[:1]) == []  # ends with the first sync byte
    out = decoder.feed(good[1:])
    assert len(out) == 1 and out[0].samples[0, 0] == 5
    assert decoder.counters["corrupt_frames"] == 2


@pytest.mark.parametrize("chunk", [1, 2, 3, 5])
def test_small_feeds_behind_a_false_header(chunk):
    # The false header claims a frame far longer than the rest of the stream.
    false = b"\xa7\x4d" + struct.pack("<BBBBHI", 1, 3, 16, 0, 4096, 0)
    frames = b"".join(small(k, k) for k in range(20))
    decoder = make_decoder("frame", 1)
    out = []
    for at in range(0, len(false + frames), chunk):
        out += decoder.feed((false + frames)[at : at + chunk])
    assert [d.samples[0, 0] for d in out] == list(range(20))
    assert decoder.counters["corrupt_bytes"] == len(false)


# ---------------------------------------------------------- hostile input
#
# False headers that nest and overlap, headers in range with a bad CRC, sync
# floods and random bytes. The decoder is compared with `reference_decode`, a
# plain transcription of the rules (README, "Decoding"): scan for the sync;
# take a frame whose header is in range and whose CRC matches; otherwise step
# one byte past the sync; a header in range whose frame has not fully arrived
# waits, unless a complete frame with a good CRC starts after it.

NESTED = b"\xa7\x4d\x01\x03\x10\x00\x00\x10"  # in range, claims 16 ch x 4096 float32; every 8 bytes


def false_header(stype: int, channels: int, n: int, flags: int = 0) -> bytes:
    """The first 8 bytes of a header in range: repeated, each copy's sequence
    field is the next copy's start, so a sync comes every 8 bytes."""
    return b"\xa7\x4d" + struct.pack("<BBBBH", 1, stype, channels, flags, n)


def reference_decode(stream: bytes, channels: int):
    """(sample blocks, corrupt_frames, corrupt_bytes, bytes held) by the rules, one sync at a time."""

    def check(i):
        if len(stream) - i < 12:
            return "incomplete", 0
        version, stype, nch, flags, n = struct.unpack_from("<BBBBH", stream, i + 2)
        if version != 1 or stype not in DTYPES or not 1 <= nch <= 16 or flags not in (0, 1) or not 1 <= n <= 4096:
            return "bad", 0
        size = 12 + 8 * flags + n * nch * np.dtype(DTYPES[stype]).itemsize + 4
        if len(stream) - i < size:
            return "incomplete", size
        crc = struct.unpack_from("<I", stream, i + size - 4)[0]
        return ("good" if zlib.crc32(stream[i + 2 : i + size - 4]) == crc else "bad"), size

    blocks, frames, garbage, pos = [], 0, 0, 0
    while True:
        i = stream.find(b"\xa7\x4d", pos)
        if i < 0:
            keep = len(stream) - 1 if len(stream) > pos and stream[-1] == 0xA7 else len(stream)
            return blocks, frames, garbage + keep - pos, len(stream) - keep
        garbage += i - pos
        state, size = check(i)
        if state == "incomplete" and size:
            later = i + 1
            while state == "incomplete":
                j = stream.find(b"\xa7\x4d", later)
                if j < 0:
                    break
                if check(j)[0] == "good":
                    state = "bad"
                later = j + 1
        if state == "incomplete":
            return blocks, frames, garbage, len(stream) - i
        if state == "bad":
            frames, garbage, pos = frames + 1, garbage + 1, i + 1
            continue
        version, stype, nch, flags, n = struct.unpack_from("<BBBBH", stream, i + 2)
        at = i + 12 + 8 * flags
        blocks.append(np.frombuffer(stream, DTYPES[stype], n * nch, at).reshape(n, nch).astype(float))
        pos = i + size


@st.composite
def hostile_streams(draw):
    """Good frames of one channel count with hostile bytes between them."""
    channels = draw(st.integers(1, 3))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    parts = []
    for seq in range(draw(st.integers(0, 6))):
        kind = draw(st.sampled_from(["nested", "claims", "near", "flood", "random", "cut", "none"]))
        if kind == "nested":  # the largest claim, thousands of bytes of it
            junk = NESTED * draw(st.integers(1, 400))
        elif kind == "claims":  # overlapping claims short enough to complete inside the stream
            head = false_header(draw(st.integers(1, 3)), draw(st.integers(1, 16)), draw(st.integers(1, 400)),
                                draw(st.integers(0, 1)))
            junk = head * draw(st.integers(1, 600))
        elif kind == "near":  # a whole frame, header in range, CRC wrong
            frame = bytearray(encode_frame(rng.integers(-99, 99, size=(draw(st.integers(1, 50)), channels)), seq))
            frame[-1 - draw(st.integers(0, 3))] ^= 1 << draw(st.integers(0, 7))
            junk = bytes(frame) * draw(st.integers(1, 3))
        elif kind == "flood":
            junk = b"\xa7\x4d" * draw(st.integers(1, 3000)) + b"\xa7" * draw(st.integers(0, 1))
        elif kind == "random":
            junk = rng.integers(0, 256, size=draw(st.integers(1, 5000)), dtype=np.uint8).tobytes()
        elif kind == "cut":
            frame = encode_frame(rng.integers(-99, 99, size=(draw(st.integers(1, 50)), channels)), seq)
            junk = frame[: draw(st.integers(1, len(frame) - 1))]
        else:
            junk = b""
        stype = draw(st.sampled_from([1, 2, 3]))
        block = rng.integers(-1000, 1000, size=(draw(st.integers(1, 300)), channels))
        parts += [junk, encode_frame(block, seq, sample_type=stype)]
    parts.append(draw(st.sampled_from([b"", b"\xa7", b"\xa7\x4d\x01", NESTED * 3])))
    return channels, b"".join(parts)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(case=hostile_streams(), cuts=st.lists(st.integers(1, 20000), max_size=12))
def test_hostile_streams_decode_as_the_rules_say(case, cuts):
    channels, stream = case
    want, corrupt_frames, corrupt_bytes, held = reference_decode(stream, channels)
    decoder = make_decoder("frame", channels)
    got = feed_in_pieces(decoder, stream, cuts)
    assert np.array_equal(in_order([b.samples for b in got], channels), in_order(want, channels))
    c = decoder.counters
    assert (c["frames"], c["corrupt_frames"], c["corrupt_bytes"], decoder.buffered) == (
        len(want), corrupt_frames, corrupt_bytes, held)


def test_nested_false_headers_then_good_frames():
    # 64.8 KB of overlapping headers, each claiming a 262 KB frame (16 float32
    # channels of 4096 samples), then good frames: all of them come out, and
    # every false sync is counted. Fed at once, in small pieces, and whole.
    junk = NESTED * 8100
    values = [np.full((64, 2), k) for k in range(5)]
    stream = junk + b"".join(hand_frame(v, k) for k, v in enumerate(values))
    for chunk, whole in ((0, False), (1000, False), (0, True)):
        decoder = make_decoder("frame", 2)
        if chunk:
            out = []
            for at in range(0, len(stream), chunk):
                out += decoder.feed(stream[at : at + chunk])
        else:
            out = decoder.feed(stream, whole=whole)
        assert np.array_equal(in_order([d.samples for d in out], 2), in_order(values, 2))
        assert all(d.lost == 0 for d in out)
        assert decoder.counters["corrupt_frames"] == 8100
        assert decoder.counters["corrupt_bytes"] == len(junk)
        assert decoder.buffered == 0


def test_a_held_header_ending_where_the_next_chunk_starts_is_counted():
    # The false header was read in the first call; the sync of the good frame
    # behind it arrives half-way, its header in the second call.
    decoder = make_decoder("frame", 1)
    stream = NESTED + small(0, 9)
    out = decoder.feed(stream[:12]) + decoder.feed(stream[12:])
    assert [d.samples[0, 0] for d in out] == [9]
    assert (decoder.counters["corrupt_frames"], decoder.counters["corrupt_bytes"]) == (1, 8)


def test_nested_false_headers_longer_than_their_claim():
    # The false headers outlast the 262 KB they claim, so each one's claimed
    # frame completes and fails its CRC before the good frame arrives.
    claim = 12 + 16 * 4096 * 4 + 4
    junk = NESTED * (claim // 8 + 5000)
    decoder = make_decoder("frame", 1)
    out = []
    stream = junk + small(0, 7) + small(1, 8)
    for at in range(0, len(stream), 65536):
        out += decoder.feed(stream[at : at + 65536])
        assert decoder.buffered <= MAX_FRAME
    assert [d.samples[0, 0] for d in out] == [7, 8]
    assert decoder.counters["corrupt_frames"] == len(junk) // 8
    assert decoder.counters["corrupt_bytes"] == len(junk)


def test_overlapping_near_valid_headers_then_good_frames():
    # Headers in range every 8 bytes whose 18-byte frames are all complete and
    # all fail their CRC (each one's CRC field is the next header's bytes).
    junk = false_header(1, 1, 1) * 5000
    frames = [small(k, k) for k in range(3)]
    decoder = make_decoder("frame", 1)
    out = decoder.feed(junk + b"".join(frames))
    assert [d.samples[0, 0] for d in out] == [0, 1, 2]
    assert decoder.counters["corrupt_frames"] == 5000
    assert decoder.counters["corrupt_bytes"] == len(junk)


def test_random_bytes_between_good_frames():
    rng = np.random.default_rng(8)
    junks = [rng.integers(0, 256, size=20_000, dtype=np.uint8).tobytes() for _ in range(5)]
    frames = [hand_frame(rng.integers(-500, 500, size=(100, 3)), k) for k in range(5)]
    decoder = make_decoder("frame", 3)
    out = []
    stream = b"".join(j + f for j, f in zip(junks, frames))
    for at in range(0, len(stream), 4096):
        out += decoder.feed(stream[at : at + 4096])
    assert len(out) == 5
    for d, f in zip(out, frames):
        assert d.samples.tobytes() == np.frombuffer(f, "<i2", 300, 12).astype(float).tobytes()
    assert decoder.counters["corrupt_bytes"] == sum(map(len, junks))
    assert decoder.counters["corrupt_frames"] == sum(j.count(b"\xa7\x4d") for j in junks)


def test_whole_input_holds_nothing_back():
    # A datagram holds whole frames: a false header claiming more than the
    # datagram has is garbage at once, and a cut frame at the end is dropped.
    false = b"\xa7\x4d" + struct.pack("<BBBBHI", 1, 3, 16, 0, 4096, 0)
    decoder = make_decoder("frame", 1)
    out = decoder.feed(false + small(0, 5) + small(1, 6)[:-3], whole=True)
    assert [d.samples[0, 0] for d in out] == [5]
    assert decoder.truncated and decoder.buffered == 0
    assert decoder.counters["corrupt_frames"] == 2
    assert decoder.counters["corrupt_bytes"] == len(false) + len(small(1)) - 3
    out = decoder.feed(small(2, 7), whole=True)
    assert not decoder.truncated
    # Frame 1 never arrived whole: its samples are a gap before frame 2.
    assert [d.samples[0, 0] for d in out] == [7] and out[0].lost == 2


# ------------------------------------------------------------- runs of frames
#
# Frames that follow on (back to back, one shape, consecutive sequence
# numbers) come out together as one block, a choice of this project that
# saves work per frame. That must change nothing but where blocks are cut.
# `frame_by_frame` is this test's own reference: the simplest decoder of the
# layout in the README's table (and frame.py's docstring), one sync and one
# frame at a time over the whole stream, with the sequence rules of the
# README and frame.py's docstring (a jump forward is a gap of k * n samples
# unless that exceeds max_gap; that, or a jump back, is a restart; a dropped
# frame's samples are lost before the next block).

COUNTERS = ("frames", "corrupt_frames", "corrupt_bytes", "gaps", "lost_samples", "restarts", "mismatched", "nonfinite")
# The largest positive value of each integer sample type (two's complement); none for float32.
FULL_SCALE_OF = {1: float(2**15 - 1), 2: float(2**31 - 1), 3: None}


def frame_by_frame(stream: bytes, channels: int, max_gap: int):
    """(blocks, counters) of `stream`, one frame at a time. The stream must
    end with a frame whose CRC matches, so that nothing before it is left
    waiting: every sync that does not start such a frame is rejected."""
    counters = dict.fromkeys(COUNTERS, 0)
    blocks: List[Block] = []
    expected: Optional[int] = None
    carried, restart = 0, False  # for the next block: samples of dropped frames, a restart
    pos = 0
    while True:
        i = stream.find(b"\xa7\x4d", pos)
        if i < 0:
            counters["corrupt_bytes"] += len(stream) - pos
            return blocks, counters
        size = 0
        if len(stream) - i >= 12:
            version, stype, nch, flags, n, seq = struct.unpack_from("<BBBBHI", stream, i + 2)
            if version == 1 and stype in DTYPES and 1 <= nch <= 16 and flags in (0, 1) and 1 <= n <= 4096:
                size = 12 + 8 * flags + n * nch * np.dtype(DTYPES[stype]).itemsize + 4
        if (not size or i + size > len(stream)
                or zlib.crc32(stream[i + 2 : i + size - 4]) != struct.unpack_from("<I", stream, i + size - 4)[0]):
            counters["corrupt_frames"] += 1
            counters["corrupt_bytes"] += i + 1 - pos
            pos = i + 1
            continue
        counters["corrupt_bytes"] += i - pos
        pos = i + size
        lost = 0
        if expected is not None and seq != expected:
            missing = (seq - expected) % 2**32
            if missing >= 2**31 or missing * n > max_gap:
                counters["restarts"] += 1
                restart = True
            else:
                lost = missing * n
                counters["gaps"] += 1
                counters["lost_samples"] += lost
        expected = (seq + 1) % 2**32
        samples = np.frombuffer(stream, DTYPES[stype], n * nch, i + 12 + 8 * flags).reshape(n, nch).astype(float)
        if nch != channels or not np.isfinite(samples).all():
            counters["mismatched" if nch != channels else "nonfinite"] += 1
            carried += lost + n
            continue
        counters["frames"] += 1
        lost += carried
        blocks.append(Block(samples=samples, lost=max(lost, 1) if restart else lost, full_scale=FULL_SCALE_OF[stype],
                            timestamp_us=struct.unpack_from("<Q", stream, i + 12)[0] if flags else None,
                            restart=restart))
        carried, restart = 0, False


def joined(blocks: List[Block]) -> List[tuple]:
    """Consecutive blocks with nothing lost between them and one full scale,
    joined as the stream source joins them: (samples, lost, restart,
    timestamp of the first, full scale) each."""
    groups: List[list] = []
    for b in blocks:
        if groups and not b.lost and not b.restart and b.full_scale == groups[-1][4]:
            groups[-1][0].append(b.samples)
        else:
            groups.append([[b.samples], b.lost, b.restart, b.timestamp_us, b.full_scale])
    return [(np.concatenate(parts), lost, restart, stamp, scale) for parts, lost, restart, stamp, scale in groups]


@st.composite
def streams_of_runs(draw):
    """Runs of good frames of varying shapes, with sequence jumps, garbage,
    damaged, cut-off, wrong-channel and NaN frames in and between them.
    Returns (channels, pieces of the stream, the indices where a frame
    starts a piece); the stream ends with a good frame."""
    channels = draw(st.integers(1, 3))
    rng = np.random.default_rng(draw(st.integers(0, 2**32 - 1)))
    seq = draw(st.integers(0, 2**32 - 1))
    pieces: List[bytes] = []
    starts: List[int] = []  # pieces that begin with a frame's sync

    def frame(samples: np.ndarray, stype: int, stamp: Optional[int]) -> bytes:
        return hand_frame(samples, seq, stype=stype, flags=int(stamp is not None), timestamp=stamp)

    def values(stype: int, n: int, nch: int) -> np.ndarray:
        if stype == 3:
            return rng.normal(0, 1e3, size=(n, nch)).astype(np.float32)
        info = np.iinfo(DTYPES[stype])
        return rng.integers(info.min, info.max, size=(n, nch), endpoint=True)

    for _ in range(draw(st.integers(1, 6))):
        # Runs often share a size with the one before (4 bytes a sample:
        # int32 or float32), so that only one header field tells them apart.
        stype = draw(st.sampled_from([1, 2, 3]))
        n = draw(st.sampled_from([4, 4, 16]) | st.integers(1, 48))
        nch = channels if draw(st.integers(0, 5)) else draw(st.integers(1, 4))  # now and then the wrong count
        stamp = draw(st.none() | st.integers(0, 2**63))
        for _ in range(draw(st.integers(1, 10))):
            block = values(stype, n, nch)
            whim = draw(st.sampled_from(["good"] * 12 + ["flip", "cut", "nan"]))
            if whim == "nan" and stype == 3:
                block[draw(st.integers(0, n - 1)), draw(st.integers(0, nch - 1))] = draw(
                    st.sampled_from([np.nan, np.inf, -np.inf]))
            data = frame(block, stype, stamp)
            if whim == "flip":  # a bad CRC, or a damaged header or sync
                damaged = bytearray(data)
                bit = draw(st.integers(0, len(data) * 8 - 1))
                damaged[bit // 8] ^= 1 << (bit % 8)
                data = bytes(damaged)
            elif whim == "cut":
                data = data[: draw(st.integers(1, len(data) - 1))]
            starts.append(len(pieces))
            pieces.append(data)
            seq = (seq + 1) % 2**32
            if stamp is not None:
                stamp += n
        between = draw(st.sampled_from(["none"] * 4 + ["jump", "far", "back", "garbage", "sync"]))
        if between == "jump":
            seq = (seq + draw(st.integers(1, 5))) % 2**32
        elif between == "far":  # beyond max_gap
            seq = (seq + draw(st.integers(10**6, 2**31 - 1))) % 2**32
        elif between == "back":
            seq = (seq - draw(st.integers(1, 2**31))) % 2**32
        elif between == "garbage":
            pieces.append(draw(st.binary(min_size=1, max_size=60)))
        elif between == "sync":  # a false header, in range or not
            pieces.append(b"\xa7\x4d" + draw(st.binary(min_size=0, max_size=12)))
    starts.append(len(pieces))
    pieces.append(frame(values(1, draw(st.integers(1, 48)), channels), 1, None))
    return channels, pieces, starts


MAX_GAP = 1000


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(case=streams_of_runs(), whole=st.booleans(), data=st.data())
def test_runs_decode_as_frame_by_frame(case, whole, data):
    channels, pieces, starts = case
    stream = b"".join(pieces)
    want, want_counters = frame_by_frame(stream, channels, MAX_GAP)
    decoder = make_decoder("frame", channels)
    decoder.max_gap = MAX_GAP
    if whole:
        # Datagrams of whole frames: each begins where a frame begins.
        cuts = sorted(set(data.draw(st.lists(st.sampled_from(starts), max_size=8))) | {0})
        chunks = [b"".join(pieces[a:b]) for a, b in zip(cuts, cuts[1:] + [len(pieces)])]
    else:
        sizes = data.draw(st.lists(st.integers(1, 3000), max_size=20))
        ends = np.cumsum([0] + sizes).tolist()
        chunks = [stream[a:b] for a, b in zip(ends, ends[1:])] + [stream[ends[-1]:]]
    got: List[Block] = []
    for chunk in chunks:
        got += decoder.feed(chunk, whole=whole)
    assert all(b.samples.dtype == np.float64 and b.samples.shape[1] == channels for b in got)
    assert len(got) <= len(want)
    got_joined, want_joined = joined(got), joined(want)
    assert len(got_joined) == len(want_joined)
    for (samples, *rest), (want_samples, *want_rest) in zip(got_joined, want_joined):
        assert np.array_equal(samples, want_samples)
        assert rest == want_rest  # lost, restart, timestamp, full scale
    assert decoder.counters == want_counters
    assert decoder.buffered == 0


def run_of(count: int, n: int = 4, seq: int = 0, stype: int = 1, stamp: Optional[int] = None) -> List[bytes]:
    """`count` frames that follow on, one channel, values seq*100 + 0..n-1."""
    return [hand_frame(np.arange(n)[:, None] + 100 * (seq + k), seq + k, stype=stype, flags=int(stamp is not None),
                       timestamp=None if stamp is None else stamp + k * n) for k in range(count)]


def test_a_run_of_good_frames_is_one_block():
    # 0.2 s of a 3-channel 25.6 kS/s int16 stream: 10 frames of 512 samples
    # (invented values), with timestamps 20 ms apart.
    rng = np.random.default_rng(11)
    values = [rng.integers(-2**15, 2**15, size=(512, 3)) for _ in range(10)]
    stamp = 1_700_000_000_000_000
    frames = [hand_frame(v, 7 + k, flags=1, timestamp=stamp + 20_000 * k) for k, v in enumerate(values)]
    decoder = make_decoder("frame", 3)
    (block,) = decoder.feed(b"".join(frames))
    assert np.array_equal(block.samples, np.concatenate(values)) and block.samples.dtype == np.float64
    assert (block.lost, block.restart, block.timestamp_us, block.full_scale) == (0, False, stamp, 32767.0)
    assert decoder.counters["frames"] == 10 and decoder.buffered == 0
    # Cut inside the fourth frame: the three whole ones are a block, and the
    # held frame comes out with the six behind it once it is complete.
    decoder = make_decoder("frame", 3)
    stream = b"".join(frames)
    cut = 3 * len(frames[0]) + 100
    first, second = decoder.feed(stream[:cut]), decoder.feed(stream[cut:])
    assert [(b.samples.shape[0], b.timestamp_us) for b in first + second] == [(3 * 512, stamp), (7 * 512, stamp + 60_000)]
    assert np.array_equal(np.concatenate([first[0].samples, second[0].samples]), np.concatenate(values))


@pytest.mark.parametrize("breaks", [[], [33], [34], [97], [98], [1, 2, 3], [200, 201], [40, 150, 260]])
def test_long_runs_break_exactly_where_frames_stop_following_on(breaks):
    # 300 frames: the decoder reads the headers of a long run in windows
    # (32 frames, then twice as many each time); a break (a frame with a bad
    # CRC) is put at the edges of those windows.
    frames = run_of(300, n=1)
    for k in breaks:
        frames[k] = damaged_samples(frames[k])
    stream = b"".join(frames)
    decoder = make_decoder("frame", 1)
    out = decoder.feed(stream)
    want, counters = frame_by_frame(stream, 1, MAX_GAP)
    # The stretches of intact frames: the first is one block; behind a
    # damaged frame, the first intact one is a block alone, the rest one.
    stretches = [len(s) for s in "".join("x" if k in breaks else "." for k in range(300)).split("x") if s]
    sizes = stretches[:1] + [size for length in stretches[1:] for size in (1, length - 1) if size]
    assert [b.samples.shape[0] for b in out] == sizes
    assert len(joined(out)) == len(joined(want))
    for (samples, *rest), (want_samples, *want_rest) in zip(joined(out), joined(want)):
        assert np.array_equal(samples, want_samples) and rest == want_rest
    assert decoder.counters == counters


def test_each_frame_crc_is_computed_once(monkeypatch):
    # A design rule of this decoder (frame.py's docstring): each candidate's
    # CRC is checked once, a damaged frame right behind a run included.
    import monitor.acquire.decoders.frame as frame_module

    calls = []

    class CountingZlib:
        @staticmethod
        def crc32(data):
            calls.append(len(data))
            return zlib.crc32(data)

    monkeypatch.setattr(frame_module, "zlib", CountingZlib)
    frames = run_of(16)
    frames[10] = damaged_samples(frames[10])
    decoder = make_decoder("frame", 1)
    out = decoder.feed(b"".join(frames))
    assert [b.samples.shape[0] for b in out] == [40, 4, 16]
    assert len(calls) == 16


def damaged_samples(frame: bytes) -> bytes:
    """The frame with one bit of its first sample flipped: its CRC fails."""
    return frame[:12] + bytes([frame[12] ^ 0x01]) + frame[13:]


@pytest.mark.parametrize("irregular, sizes, lost, counts", [
    # frame 5 of 10 (n = 4 samples each) breaks the run:
    ("bad crc", [20, 4, 12], [0, 4, 0], {"corrupt_frames": 1, "gaps": 1}),  # its samples are lost; 6 comes alone
    ("other n", [20, 3, 16], [0, 0, 0], {}),  # sequence unbroken: no loss
    ("sequence jump", [20, 20], [0, 3 * 4], {"gaps": 1}),  # frames 5, 6, 7 missing
    ("repeated", [20, 4, 16], [0, 1, 4], {"restarts": 1, "gaps": 1}),  # back to 4: restart; then 5 -> 6 is a gap
    ("nan", [20, 16], [0, 4], {"nonfinite": 1}),
    ("no timestamp", [20, 4, 16], [0, 0, 0], {}),
])
def test_a_run_ends_at_the_first_irregular_frame(irregular, sizes, lost, counts):
    stype = 3 if irregular == "nan" else 1
    frames = run_of(10, stype=stype, stamp=0)
    if irregular == "bad crc":
        frames[5] = damaged_samples(frames[5])
    elif irregular == "other n":
        frames[5] = run_of(1, n=3, seq=5, stamp=20)[0]
    elif irregular == "sequence jump":
        frames[5:] = run_of(5, seq=8, stamp=20)
    elif irregular == "repeated":
        frames[5] = run_of(1, seq=4, stamp=20)[0]
    elif irregular == "nan":
        frames[5] = hand_frame(np.array([[1.0], [np.nan], [2.0], [3.0]]), 5, stype=3, flags=1, timestamp=20)
    elif irregular == "no timestamp":
        frames[5] = run_of(1, seq=5)[0]
    decoder = make_decoder("frame", 1)
    out = decoder.feed(b"".join(frames))
    assert [b.samples.shape[0] for b in out] == sizes
    assert [b.lost for b in out] == lost
    c = decoder.counters
    assert c["frames"] == len(frames) - (irregular in ("bad crc", "nan"))
    for name in ("corrupt_frames", "gaps", "restarts", "nonfinite"):
        assert c[name] == counts.get(name, 0), name
    if irregular == "bad crc":
        assert c["corrupt_bytes"] == len(frames[5])  # its CRC checked once, its bytes counted once


# ---------------------------------------------------------------- interface


def test_encode_frame_refuses_bad_input():
    with pytest.raises(ValueError, match="n=0"):
        encode_frame(np.zeros((0, 1)), 0)
    with pytest.raises(ValueError, match="n=4097"):
        encode_frame(np.zeros((4097, 1)), 0)
    with pytest.raises(ValueError, match="nch=17"):
        encode_frame(np.zeros((1, 17)), 0)
    with pytest.raises(ValueError, match="seq=-1"):
        encode_frame(np.zeros((1, 1)), -1)
    with pytest.raises(ValueError, match="sample_type=4"):
        encode_frame(np.zeros((1, 1)), 0, sample_type=4)
    with pytest.raises(ValueError, match="int16"):
        encode_frame(np.array([[40000]]), 0)
    with pytest.raises(ValueError, match="whole numbers"):
        encode_frame(np.array([[0.5]]), 0)


def test_make_decoder_refuses_unknown_formats_and_counts():
    with pytest.raises(ValueError, match="format='json'"):
        make_decoder("json", 1)
    with pytest.raises(ValueError, match="channels=0"):
        make_decoder("frame", 0)
    with pytest.raises(ValueError, match="channels=17"):
        make_decoder("csv", 17)
