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
    out: List[Block] = []
    at = 0
    for size in cuts:
        out += decoder.feed(stream[at : at + size])
        at += size
    out += decoder.feed(stream[at:])
    assert len(out) == len(blocks)
    for got, want in zip(out, blocks):
        assert np.array_equal(got.samples, want)
        assert got.lost == 0
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
    assert [d.lost for d in out] == [0, 0, 3 * 5]  # frames 12, 13, 14 missing, n of the arriving frame
    assert decoder.counters["gaps"] == 1
    assert decoder.counters["lost_samples"] == 15


def test_wraparound_is_not_a_gap():
    decoder = make_decoder("frame", 1)
    out = decoder.feed(small(0xFFFFFFFE) + small(0xFFFFFFFF) + small(0) + small(1))
    assert [d.lost for d in out] == [0, 0, 0, 0]
    assert decoder.counters["gaps"] == 0
    out = decoder.feed(small(0xFFFFFFFF))  # 2 -> 0xFFFFFFFF: backwards, a restart
    assert decoder.counters["gaps"] == 1 and out[0].lost == 2


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
