"""The csv text decoder against the interface (section 2).

Expected numbers come from Python's own float() on the same text (the
standard library as reference); line rules come from the interface.
"""

from typing import List

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.acquire.block import Block
from monitor.acquire.decoders import make_decoder


def feed_in(decoder, data: bytes, chunk: int) -> List[Block]:
    out: List[Block] = []
    for at in range(0, len(data), chunk):
        out += decoder.feed(data[at : at + chunk])
    return out


def rows(out: List[Block]) -> np.ndarray:
    return np.concatenate([d.samples for d in out]) if out else np.empty((0, 3))


# Both paths: one big feed (whole-chunk parsing) and byte-sized feeds (per line).
CHUNKS = [1 << 20, 1, 7]
MANY = 40  # repeat inputs so a single feed holds more lines than the per-line path takes


@pytest.mark.parametrize("chunk", CHUNKS)
@pytest.mark.parametrize("line", [
    b"1.5,-2,3e2", b"1.5;-2;3e2", b"1.5\t-2\t3e2", b"1.5 -2 3e2", b"  1.5   -2 \t 3e2  ",
    b"1.5, -2, 3e2", b"1.5 ; -2 ;3e2", b"1.5,-2 3e2", b"+1.5,-2.,300",
])
def test_every_separator(line, chunk):
    decoder = make_decoder("csv", 3)
    out = feed_in(decoder, (line + b"\n") * MANY, chunk)
    want = [float("1.5"), float("-2"), float("3e2")]  # Python's float() as reference
    assert np.array_equal(rows(out), np.tile(want, (MANY, 1)))
    assert decoder.counters["frames"] == MANY
    assert decoder.counters["corrupt_frames"] == 0


@pytest.mark.parametrize("chunk", CHUNKS)
def test_comments_blanks_and_crlf(chunk):
    text = b"# x y z\r\n\r\n   \n\t# indented comment\n1,2,3\r\n\n4,5,6\n" * MANY
    decoder = make_decoder("csv", 3)
    out = feed_in(decoder, text, chunk)
    assert np.array_equal(rows(out), np.tile([[1, 2, 3], [4, 5, 6]], (MANY, 1)))
    assert decoder.counters["corrupt_frames"] == 0
    assert decoder.counters["frames"] == 2 * MANY
    if chunk > len(text):
        assert len(out) == 1  # comments and blanks do not split the block


@pytest.mark.parametrize("chunk", CHUNKS)
@pytest.mark.parametrize("bad", [
    b"1,2", b"1,2,3,4", b"1,,2,3", b",1,2,3", b"1,2,3,", b"1;;2 3", b",", b";;",
])
def test_wrong_field_count_is_corrupt(bad, chunk):
    decoder = make_decoder("csv", 3)
    out = feed_in(decoder, (b"1,2,3\n" + bad + b"\n") * MANY + b"7,8,9\n", chunk)
    assert np.array_equal(rows(out), np.vstack([np.tile([1, 2, 3], (MANY, 1)), [[7, 8, 9]]]))
    assert decoder.counters["corrupt_frames"] == MANY
    assert decoder.counters["corrupt_bytes"] == MANY * (len(bad) + 1)
    assert all(d.lost == 0 for d in out)  # a bad line is no gap


@pytest.mark.parametrize("chunk", CHUNKS)
@pytest.mark.parametrize("bad", [b"a,b,c", b"1,2,x", b"0x10,1,2", b"1_0,2,3", b"1..2,1,2", b"1e,2,3",
                                 b"--1,2,3", b"1,2,3 # note", b"\xff,1,2"])
def test_non_numbers_are_corrupt(bad, chunk):
    decoder = make_decoder("csv", 3)
    out = feed_in(decoder, (bad + b"\n1,2,3\n") * MANY, chunk)
    assert np.array_equal(rows(out), np.tile([1, 2, 3], (MANY, 1)))
    assert decoder.counters["corrupt_frames"] == MANY
    assert decoder.counters["nonfinite"] == 0


@pytest.mark.parametrize("chunk", CHUNKS)
@pytest.mark.parametrize("bad", [b"nan,1,2", b"1,inf,2", b"1,2,-Infinity", b"NaN 1 2", b"1e999,1,2"])
def test_nonfinite_lines_are_counted_and_skipped(bad, chunk):
    decoder = make_decoder("csv", 3)
    out = feed_in(decoder, (b"1,2,3\n" + bad + b"\n") * MANY, chunk)
    assert np.array_equal(rows(out), np.tile([1, 2, 3], (MANY, 1)))
    assert decoder.counters["nonfinite"] == MANY
    assert decoder.counters["corrupt_frames"] == 0


def test_bad_line_splits_blocks_without_a_gap():
    decoder = make_decoder("csv", 2)
    text = b"".join(b"%d,%d\n" % (k, k) for k in range(50)) + b"x,y\n" + b"".join(
        b"%d,%d\n" % (k, k) for k in range(50, 100))
    out = decoder.feed(text)
    assert [d.samples.shape[0] for d in out] == [50, 50]
    assert [d.lost for d in out] == [0, 0]
    assert np.array_equal(rows(out)[:, 0], np.arange(100))


@pytest.mark.parametrize("chunk", [1 << 20, 4096, 1000])
def test_one_megabyte_line_keeps_memory_bounded(chunk):
    decoder = make_decoder("csv", 3)
    line = b"1," * (1 << 19)  # 1 MiB without a newline
    held = []
    for at in range(0, len(line), chunk):
        assert decoder.feed(line[at : at + chunk]) == []
        held.append(decoder.buffered)
    assert max(held) <= 1025  # the longest line that may still be good, plus CR
    out = decoder.feed(b"\n4,5,6\n")
    assert np.array_equal(rows(out), [[4, 5, 6]])
    assert decoder.counters["corrupt_frames"] == 1
    assert decoder.counters["corrupt_bytes"] == len(line) + 1


@pytest.mark.parametrize("chunk", CHUNKS)
def test_line_length_limit_is_1024_bytes(chunk):
    ok = b"1,2,3".ljust(1024)
    assert len(ok) == 1024
    too_long = b"1,2,3".ljust(1025)
    decoder = make_decoder("csv", 3)
    text = (ok + b"\n" + ok + b"\r\n" + too_long + b"\n") * MANY
    out = feed_in(decoder, text, chunk)
    assert rows(out).shape == (2 * MANY, 3)
    assert decoder.counters["corrupt_frames"] == MANY


def test_partial_line_waits_for_its_newline():
    decoder = make_decoder("csv", 2)
    assert decoder.feed(b"1.2") == []
    assert decoder.feed(b"5,3") == []
    (block,) = decoder.feed(b"\r\n")
    assert np.array_equal(block.samples, [[1.25, 3.0]])
    decoder.feed(b"9,9")
    decoder.reset()
    assert decoder.buffered == 0
    assert decoder.feed(b"\n") == []  # an empty line after reset: ignored


@st.composite
def lines(draw):
    """(line, kind, values) with kind good / ignored / corrupt / nonfinite."""
    kind = draw(st.sampled_from(["good", "good", "good", "comment", "blank", "short", "word", "nonfinite"]))
    seps = st.sampled_from([",", ";", "\t", " ", "  ", ", ", " ; ", "\t "])
    if kind == "good":
        values = draw(st.lists(st.floats(allow_nan=False, allow_infinity=False) | st.integers(-10**6, 10**6),
                               min_size=3, max_size=3))
        text = repr(values[0]) + draw(seps) + repr(values[1]) + draw(seps) + repr(values[2])
        return text, kind, [float(v) for v in values]
    if kind == "comment":
        return draw(st.sampled_from(["", " ", "\t"])) + "#" + draw(st.text("abc ,;1", max_size=20)), "ignored", None
    if kind == "blank":
        return draw(st.sampled_from(["", " ", "\t\t", " \r"])), "ignored", None
    if kind == "short":
        return "1" + draw(seps) + "2", "corrupt", None
    if kind == "word":
        return "1,2," + draw(st.sampled_from(["abc", "1x", "0x1", "-", "."])), "corrupt", None
    return "1," + draw(st.sampled_from(["nan", "inf", "-inf", "1e400"])) + ",2", "nonfinite", None


@settings(max_examples=150, deadline=None)
@given(items=st.lists(lines(), max_size=80), cuts=st.lists(st.integers(1, 300), max_size=40),
       crlf=st.booleans())
def test_random_lines_in_random_chunks(items, cuts, crlf):
    end = "\r\n" if crlf else "\n"
    text = "".join(line + end for line, _, _ in items).encode()
    want = [values for _, kind, values in items if kind == "good"]
    for whole in (True, False):
        decoder = make_decoder("csv", 3)
        if whole:
            out = decoder.feed(text)
        else:
            out, at = [], 0
            for size in cuts:
                out += decoder.feed(text[at : at + size])
                at += size
            out += decoder.feed(text[at:])
        got = rows(out)
        assert got.shape == (len(want), 3)
        assert np.array_equal(got, np.array(want).reshape(-1, 3))
        c = decoder.counters
        assert c["frames"] == len(want)
        assert c["corrupt_frames"] == sum(kind == "corrupt" for _, kind, _ in items)
        assert c["nonfinite"] == sum(kind == "nonfinite" for _, kind, _ in items)
        assert decoder.buffered == 0
