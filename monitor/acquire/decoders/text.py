"""The text stream format ("csv"): one line per sampling instant.

A line holds C numbers. Between two numbers stands a comma or a semicolon, a
run of spaces and tabs, or one comma or semicolon with spaces or tabs around
it ("1,2,3", "1; 2; 3", "1 2\t3" are all fine; "1,,3" has an empty field and
is corrupt). Lines starting with '#' (after optional blanks) and blank lines
are ignored; a CR before the LF is accepted. A line over 1024 bytes (the line
ending not counted), with the wrong number of fields, or with a field that is
not a number counts as corrupt (`corrupt_frames`, its bytes in
`corrupt_bytes`) and is skipped; a line with NaN or an infinity counts in
`nonfinite` and is skipped. Good lines count in `frames`.

Consecutive good lines come back as one block per `feed()` call; a rejected
line splits blocks but is no gap (`lost` stays 0): text has no sequence
numbers to tell what was lost.

Large inputs are checked and parsed for the whole chunk at once with numpy;
a few lines at a time go through a plain per-line path with the same rules.
The partial last line kept between calls never exceeds 1025 bytes: a longer
line is discarded as it streams in and counted once its newline arrives.
"""

from typing import List, Optional, Tuple

import numpy as np

from ..block import Block
from . import Decoder

MAX_LINE = 1024
_MAX_TAIL = MAX_LINE + 1  # a full-length line may still end in CR
_SMALL = 32  # fewer lines than this take the per-line path

# Byte classes. Whitespace is exactly what bytes.split() splits on, minus LF.
_NUMERIC, _OTHER, _SPACE, _HARD, _NEWLINE = 0, 1, 2, 3, 4
_CLASS = np.full(256, _OTHER, dtype=np.uint8)
_CLASS[np.frombuffer(b"0123456789+-.eE", np.uint8)] = _NUMERIC
_CLASS[np.frombuffer(b" \t\r\x0b\x0c", np.uint8)] = _SPACE
_CLASS[np.frombuffer(b",;", np.uint8)] = _HARD
_CLASS[ord("\n")] = _NEWLINE
_TO_SPACE = bytes.maketrans(b",;\n", b"   ")
_HARD_TO_COMMA = bytes.maketrans(b";", b",")

# Line verdicts.
_GOOD, _IGNORED, _CORRUPT, _NONFINITE = 0, 1, 2, 3


class CsvDecoder(Decoder):
    """Decodes text lines of C numbers into blocks of consecutive good lines."""

    def __init__(self, channels: int) -> None:
        super().__init__(channels)
        self._tail = b""
        self._skipping = False  # inside an over-long line, waiting for its newline

    @property
    def buffered(self) -> int:
        return len(self._tail)

    def reset(self) -> None:
        self._tail = b""
        self._skipping = False

    def feed(self, data: bytes) -> List[Block]:
        data = bytes(data)
        if self._skipping:
            i = data.find(b"\n")
            if i < 0:
                self.counters["corrupt_bytes"] += len(data)
                return []
            self.counters["corrupt_bytes"] += i + 1
            self.counters["corrupt_frames"] += 1
            self._skipping = False
            data = data[i + 1 :]
        last = data.rfind(b"\n")
        if last < 0:
            self._keep(self._tail + data)
            return []
        chunk = self._tail + data[: last + 1] if self._tail else data[: last + 1]
        self._keep(data[last + 1 :])
        if chunk.count(b"\n") < _SMALL:
            return self._parse_lines(chunk)
        return self._parse_chunk(chunk)

    def _keep(self, tail: bytes) -> None:
        """Hold a partial line, or start discarding it once it is too long."""
        if len(tail) > _MAX_TAIL:
            self.counters["corrupt_bytes"] += len(tail)
            self._tail = b""
            self._skipping = True
        else:
            self._tail = tail

    # ------------------------------------------------------ per-line path

    def _line(self, line: bytes) -> Tuple[int, Optional[List[float]]]:
        """Verdict and values of one line (without its LF)."""
        if len(line) - line.endswith(b"\r") > MAX_LINE:
            return _CORRUPT, None
        text = line.strip(b" \t\r\x0b\x0c")
        if not text or text.startswith(b"#"):
            return _IGNORED, None
        fields: List[bytes] = []
        for part in text.translate(_HARD_TO_COMMA).split(b","):
            words = part.split()
            if not words:  # an empty field next to a comma or semicolon
                return _CORRUPT, None
            fields.extend(words)
        if len(fields) != self.channels:
            return _CORRUPT, None
        try:
            # float() also takes "1_000"; a sensor value never has one.
            values = [float(f) for f in fields if b"_" not in f]
        except ValueError:
            return _CORRUPT, None
        if len(values) != len(fields):
            return _CORRUPT, None
        if not all(v - v == 0.0 for v in values):  # NaN and infinities fail this
            return _NONFINITE, None
        return _GOOD, values

    def _parse_lines(self, chunk: bytes) -> List[Block]:
        verdicts = []
        rows: List[List[float]] = []
        lines = chunk.split(b"\n")[:-1]
        for line in lines:
            verdict, values = self._line(line)
            verdicts.append(verdict)
            if values is not None:
                rows.append(values)
        return self._collect(np.array(verdicts, dtype=np.uint8), np.array(rows, dtype=np.float64),
                             [len(line) + 1 for line in lines])

    # ---------------------------------------------------- whole-chunk path

    def _parse_chunk(self, chunk: bytes) -> List[Block]:
        b = np.frombuffer(chunk, np.uint8)
        cls = _CLASS[b]
        newlines = np.flatnonzero(cls == _NEWLINE)
        starts = np.empty_like(newlines)
        starts[0] = 0
        starts[1:] = newlines[:-1] + 1
        lengths = newlines - starts + 1  # with the LF
        field = cls <= _OTHER
        begins = field.copy()
        begins[1:] &= ~field[:-1]
        fields = np.add.reduceat(begins, starts, dtype=np.intp)
        hards = np.add.reduceat(cls == _HARD, starts, dtype=np.intp)
        others = np.add.reduceat(cls == _OTHER, starts, dtype=np.intp)

        # Without whitespace, every comma or semicolon must sit between two
        # field characters: none at either end of a line, never two in a row.
        kept = np.flatnonzero(cls != _SPACE)
        squeezed = np.concatenate(([_NEWLINE], cls[kept], [_NEWLINE]))
        hard_at = np.flatnonzero(squeezed == _HARD)
        misplaced = np.zeros(len(newlines), dtype=bool)
        if hard_at.size:
            wrong = (squeezed[hard_at - 1] > _OTHER) | (squeezed[hard_at + 1] > _OTHER)
            misplaced[np.searchsorted(newlines, kept[hard_at[wrong] - 1])] = True
        # The first non-blank byte of each line (its LF when it has none).
        first = b[kept[np.searchsorted(kept, starts)]]

        cr = b[np.maximum(newlines - 1, 0)] == ord("\r")
        too_long = lengths - 1 - (cr & (lengths > 1)) > MAX_LINE
        blank = (fields == 0) & (hards == 0)
        comment = first == ord("#")
        verdicts = np.full(len(newlines), _CORRUPT, dtype=np.uint8)
        verdicts[(blank | comment) & ~too_long] = _IGNORED
        plain = ~too_long & ~blank & ~comment & ~misplaced & (fields == self.channels)
        # Lines with letters or other bytes (NaN, "inf", junk) take the per-line rules.
        unusual = np.flatnonzero(plain & (others > 0))
        simple = plain & (others == 0)

        values = np.empty((len(newlines), self.channels), dtype=np.float64)
        parsed = self._parse_simple(b, starts, lengths, simple)
        if parsed is None:  # a malformed number: let the per-line rules find it
            unusual = np.flatnonzero(plain)
        else:
            good = np.isfinite(parsed).all(axis=1)
            rows = np.flatnonzero(simple)
            values[rows] = parsed
            verdicts[rows] = np.where(good, _GOOD, _NONFINITE)
        for k in unusual:
            s = starts[k]
            verdict, row = self._line(chunk[s : s + lengths[k] - 1])
            verdicts[k] = verdict
            if row is not None:
                values[k] = row
        return self._collect(verdicts, values[verdicts == _GOOD], lengths)

    def _parse_simple(
        self, b: np.ndarray, starts: np.ndarray, lengths: np.ndarray, simple: np.ndarray
    ) -> Optional[np.ndarray]:
        """Numbers of the lines marked `simple`, shaped (lines, C); None when a
        field made only of digits, signs, dots and exponents is still no number."""
        count = int(simple.sum())
        if count == 0:
            return np.empty((0, self.channels))
        if count == len(simple):
            text = b.tobytes()
        else:
            text = b[np.repeat(simple, lengths)].tobytes()
        try:
            numbers = np.array(text.translate(_TO_SPACE).split(), dtype=np.float64)
        except ValueError:
            return None
        return numbers.reshape(count, self.channels)

    # ------------------------------------------------------------ output

    def _collect(self, verdicts: np.ndarray, good_rows: np.ndarray, lengths) -> List[Block]:
        """Count the verdicts and cut the good rows into runs between rejected lines."""
        counters = self.counters
        good = verdicts == _GOOD
        corrupt = verdicts == _CORRUPT
        rejected = corrupt | (verdicts == _NONFINITE)
        counters["frames"] += int(good.sum())
        counters["corrupt_frames"] += int(corrupt.sum())
        counters["nonfinite"] += int((verdicts == _NONFINITE).sum())
        if corrupt.any():
            counters["corrupt_bytes"] += int(np.asarray(lengths)[corrupt].sum())
        if not good.any():
            return []
        if not rejected.any():
            return [Block(samples=good_rows)]
        # Index of the run each good line belongs to: rejected lines seen so far.
        run = np.cumsum(rejected)[good]
        cuts = np.flatnonzero(np.diff(run)) + 1
        return [Block(samples=block) for block in np.split(good_rows, cuts)]
