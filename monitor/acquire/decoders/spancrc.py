"""CRC-32 (as zlib.crc32 computes it) of many spans of one buffer at once.

The frame decoder must check the CRC of every candidate frame, and hostile
input can make thousands of candidates overlap (a false header every few
bytes, each claiming a quarter megabyte). Checking each span on its own would
read the same bytes thousands of times. Here every byte is read once:

* zlib runs along the buffer once, giving the running CRC Z(p) of the bytes
  from the first span boundary up to every span boundary p;
* the CRC of a span [a, b) follows from two of those values, the rule of
  zlib's crc32_combine: Z(b) = Z(a) * x^(8 (b - a)) xor crc32(buf[a:b]),
  all over GF(2) modulo the CRC-32 polynomial (zlib's reflected bit order).

Multiplying by x^(8 L) is linear in the CRC, so it is four table look-ups
per factor; L is split into three 7-bit digits, each with its own tables.
Short spans are cheaper to hash directly and take zlib.crc32 as it is.
"""

import zlib
from typing import List, Optional

import numpy as np

POLY = 0xEDB88320  # the IEEE 802.3 polynomial, reflected (zlib's representation)
ONE = 1 << 31  # x^0 in the reflected representation
_DIGIT_BITS = 7
_DIGITS = 3
LONGEST = 1 << (_DIGIT_BITS * _DIGITS)  # spans up to this long use the combine rule
DIRECT_MAX = 2048  # spans up to this long are hashed directly (cheaper than two boundary calls)

_tables: Optional[np.ndarray] = None


def multiply(a: int, b: int) -> int:
    """a * b modulo the CRC-32 polynomial, reflected (zlib's multmodp)."""
    product = 0
    mask = ONE
    while mask and a:
        if a & mask:
            product ^= b
            a ^= mask
        mask >>= 1
        b = (b >> 1) ^ POLY if b & 1 else b >> 1
    return product


def power8(n: int) -> int:
    """x^(8 n) modulo the polynomial: what a CRC is multiplied by when n bytes follow."""
    result, base = ONE, ONE >> 8  # x^0 and x^8
    while n:
        if n & 1:
            result = multiply(base, result)
        base = multiply(base, base)
        n >>= 1
    return result


def _shift_tables() -> np.ndarray:
    """Flat uint32 tables: for digit j, value d and byte q of a CRC c, the
    256 products (v << 8q) * x^(8 d 128^j), so that c * x^(8 d 128^j) is the
    xor of four look-ups."""
    global _tables
    if _tables is not None:
        return _tables
    radix = 1 << _DIGIT_BITS
    factors = []
    for j in range(_DIGITS):
        step = power8(radix**j)
        factor = ONE
        for _ in range(radix):
            factors.append(factor)
            factor = multiply(step, factor)
    # images[:, t] = factor * (1 << t): bit t stands for x^(31 - t), so the
    # image of bit t - 1 is the image of bit t times x.
    images = np.empty((len(factors), 32), dtype=np.uint32)
    b = np.array(factors, dtype=np.uint32)
    for t in range(31, -1, -1):
        images[:, t] = b
        b = (b >> 1) ^ (np.uint32(POLY) * (b & 1))
    tables = np.zeros((len(factors), 4, 256), dtype=np.uint32)
    for q in range(4):
        for i in range(8):
            tables[:, q, 1 << i : 2 << i] = tables[:, q, : 1 << i] ^ images[:, 8 * q + i, None]
    _tables = tables.ravel()
    return _tables


def shift(crcs: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """Each CRC times x^(8 L) for its L in `lengths` (0 <= L < LONGEST)."""
    tables = _shift_tables()
    c = crcs.astype(np.uint32)
    lengths = lengths.astype(np.int64)
    for j in range(_DIGITS):
        digit = (lengths >> (_DIGIT_BITS * j)) & ((1 << _DIGIT_BITS) - 1)
        base = (digit + (j << _DIGIT_BITS)) * 1024
        c = (tables[base + (c & 0xFF)] ^ tables[base + 256 + ((c >> 8) & 0xFF)]
             ^ tables[base + 512 + ((c >> 16) & 0xFF)] ^ tables[base + 768 + (c >> 24)])
    return c


def span_crcs(buf, starts: np.ndarray, ends: np.ndarray) -> np.ndarray:
    """zlib.crc32(buf[s:e]) for every pair, as uint32; `buf` is any bytes-like
    object and 0 <= s <= e <= len(buf)."""
    starts = np.asarray(starts, dtype=np.int64)
    ends = np.asarray(ends, dtype=np.int64)
    out = np.empty(len(starts), dtype=np.uint32)
    if not len(starts):
        return out
    lengths = ends - starts
    direct = (lengths <= DIRECT_MAX) | (lengths >= LONGEST)
    crc32 = zlib.crc32
    with memoryview(buf) as view:
        few = np.flatnonzero(direct)
        if len(few):
            out[few] = [crc32(view[s:e]) for s, e in zip(starts[few].tolist(), ends[few].tolist())]
        many = np.flatnonzero(~direct)
        if len(many):
            a, b = starts[many], ends[many]
            bounds = np.unique(np.concatenate((a, b)))
            running: List[int] = []
            z = 0
            at = int(bounds[0])
            for p in bounds.tolist():
                z = crc32(view[at:p], z)
                running.append(z)
                at = p
            table = np.array(running, dtype=np.uint32)
            za = table[np.searchsorted(bounds, a)]
            zb = table[np.searchsorted(bounds, b)]
            out[many] = zb ^ shift(za, b - a)
    return out
