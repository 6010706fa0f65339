"""CRC-32 of many spans at once, against zlib.crc32 itself (the reference)."""

import zlib

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.acquire.decoders.spancrc import DIRECT_MAX, LONGEST, ONE, multiply, power8, shift, span_crcs


def test_polynomial_arithmetic_small_cases():
    # In the reflected representation bit 31 is x^0 and bit 31-k is x^k.
    x = ONE >> 1
    assert multiply(ONE, 0x12345678) == 0x12345678  # 1 * a = a
    assert multiply(x, ONE >> 7) == ONE >> 8  # x * x^7 = x^8
    assert power8(1) == ONE >> 8 and power8(3) == ONE >> 24  # below degree 32 no reduction
    # x^32 reduces to the polynomial without its top term: 0xEDB88320 reflected
    # is x^26+x^23+...+1 (the IEEE 802.3 generator, common practice).
    assert power8(4) == 0xEDB88320


@settings(max_examples=50, deadline=None)
@given(a=st.binary(max_size=600), b=st.binary(max_size=3000))
def test_shift_is_zlibs_combine_rule(a, b):
    # crc32(a + b) = crc32(a) * x^(8 len(b)) xor crc32(b): the rule of zlib's
    # crc32_combine, checked against zlib computing the whole.
    got = shift(np.array([zlib.crc32(a)], dtype=np.uint32), np.array([len(b)]))[0] ^ zlib.crc32(b)
    assert got == zlib.crc32(a + b)


def test_many_spans_match_zlib_one_by_one():
    rng = np.random.default_rng(11)
    data = rng.integers(0, 256, size=400_000, dtype=np.uint8).tobytes()
    starts = rng.integers(0, 300_000, size=3000)
    lengths = np.concatenate((
        rng.integers(0, DIRECT_MAX + 1, size=1000),  # short spans, hashed directly
        rng.integers(DIRECT_MAX + 1, 100_000, size=1990),  # long ones, by the combine rule
        [0, 1, DIRECT_MAX, DIRECT_MAX + 1, 99_999, 100_000, 7, 8, 9, 2],
    ))
    ends = np.minimum(starts + lengths, len(data))
    got = span_crcs(bytearray(data), starts, ends)
    want = [zlib.crc32(data[s:e]) for s, e in zip(starts.tolist(), ends.tolist())]
    assert got.dtype == np.uint32
    assert got.tolist() == want


def test_overlapping_spans_sharing_boundaries():
    data = bytes(range(256)) * 64
    starts = np.arange(0, 8000, 8)
    ends = starts + 5000  # every span overlaps hundreds of others
    got = span_crcs(data, starts, ends)
    assert got.tolist() == [zlib.crc32(data[s : s + 5000]) for s in starts.tolist()]


def test_longest_span_and_empty_input():
    data = np.random.default_rng(3).integers(0, 256, size=LONGEST + 10, dtype=np.uint8).tobytes()
    got = span_crcs(data, [0, 5, 9], [LONGEST - 1, LONGEST + 5, LONGEST + 10])
    assert got.tolist() == [zlib.crc32(data[0 : LONGEST - 1]), zlib.crc32(data[5 : LONGEST + 5]),
                            zlib.crc32(data[9:])]
    assert span_crcs(data, [], []).tolist() == []
