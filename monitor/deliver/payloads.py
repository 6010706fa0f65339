"""Building the JSON payloads (README, What is published), and encoding them.

Numbers are rounded to 6 significant digits (more than any accelerometer
resolves) and non-finite values become null, so every line is valid JSON and
a replay of the same samples gives the same bytes. Long rows of numbers (a
spectrum's lines) travel as `Lines`: 4 significant digits written as short
as JSON allows, so a 3-channel spectrum of 2049 lines stays under 64 kB.
"""

import datetime
import json
import math
import re
from typing import Any, Dict, List, Optional

import numpy as np

Payload = Dict[str, Any]

# The `limits` object of a health check, which has no band limits; the same
# shape as a band's, so consumers read `limits.warning` everywhere.
NO_LIMITS: Payload = {"warning": None, "alarm": None}


def utc_text(when: datetime.datetime) -> str:
    """An aware time as payloads and recordings write it: UTC, ISO 8601
    with milliseconds and Z."""
    if when.tzinfo is None:
        raise ValueError(f"{when=} has no time zone; give an aware datetime (UTC)")
    when = when.astimezone(datetime.timezone.utc)
    return when.strftime("%Y-%m-%dT%H:%M:%S.") + f"{when.microsecond // 1000:03d}Z"


def utc_now() -> str:
    """Now, as `utc_text` writes it."""
    return utc_text(datetime.datetime.now(datetime.timezone.utc))


def num(value: Optional[float]) -> Optional[float]:
    """A JSON-safe number: None for missing or non-finite, else 6 digits."""
    if value is None:
        return None
    value = float(value)
    if not math.isfinite(value):
        return None
    return float(f"{value:.6g}")


def stamp(node: str, stream_s: float, time: Optional[str] = None) -> Payload:
    """The fields every payload carries."""
    return {"node": node, "time": time or utc_now(), "stream_s": round(float(stream_s), 6)}


class Lines:
    """A row of numbers written to 4 significant digits, short: `1.234e-5`
    rather than `1.234e-05` or `0.00001234`; non-finite values as null."""

    __slots__ = ("values",)

    def __init__(self, values: np.ndarray) -> None:
        self.values = values

    def json(self) -> str:
        values = self.values
        if len(values) < _TABLE_WORTH and not _TABLES:
            return "[" + _formatted(values) + "]"  # a short row, and no table yet: nothing to look up
        # A line's text depends only on its decade and its four digits, so
        # in a decade with a table its lines are looked up instead of being
        # formatted: the digits are those %g rounds to (the exact binary
        # value, rounded half to even) wherever they are more than 1e-9 of a
        # digit from a tie; the rest (ties, the edges of a decade, zero,
        # negative, huge, tiny or non-finite values) are formatted.
        with np.errstate(all="ignore"):  # log10 of 0, negatives, nan and inf
            decade = np.floor(np.log10(values))
            known = (decade >= _TABLE_DECADES[0]) & (decade <= _TABLE_DECADES[-1])
            decade = np.where(known, decade, 0.0).astype(np.intp)
            scaled = values * _TO_DIGITS[decade - _TABLE_DECADES[0]]  # exact powers of ten
            digits = np.rint(scaled)
            looked_up = known & (scaled >= 1000.1) & (scaled < 9999.0) & (np.abs(scaled - digits) < 0.5 - 1e-9)
        if not looked_up.any():
            return "[" + _formatted(values) + "]"
        texts = np.empty(len(values), dtype=object)
        where = np.flatnonzero(looked_up)
        decades = decade[where]
        digits = digits[where].astype(np.intp) - 1000
        others = ~looked_up
        counts = np.bincount(decades - _TABLE_DECADES[0], minlength=len(_TABLE_DECADES))
        for exponent, count in zip(_TABLE_DECADES, counts.tolist()):
            if not count:
                continue
            mine = decades == exponent
            table = _TABLES.get(exponent)
            if table is None:
                if count < _TABLE_WORTH:
                    others[where[mine]] = True  # too few to be worth a table yet
                    continue
                table = _TABLES[exponent] = _decade_texts(exponent)
            texts[where[mine]] = table[digits[mine]]
        if others.all():
            return "[" + _formatted(values) + "]"
        if others.any():
            texts[others] = _formatted(values[others]).encode("ascii").split(b",")
        return "[" + b",".join(texts.tolist()).decode("ascii") + "]"


# Decades that may have a table of texts (at most 9000 x 8 bytes each):
# 1e-9 .. 1e3, where 1000 ... 9999 times the decade's 1e-3 is exact. A table
# costs about as much to make as formatting 9000 numbers, so it is made once
# a row holds this many lines of its decade (a large spectrum's noise floor).
_TABLE_DECADES = range(-9, 4)
_TO_DIGITS = np.array([float(10 ** (3 - e)) for e in _TABLE_DECADES])
_TABLE_WORTH = 2000
_TABLES: Dict[int, np.ndarray] = {}


def _decade_texts(exponent: int) -> np.ndarray:
    """The texts of 1.000 ... 9.999 times 10**exponent as `_formatted`
    writes them (ASCII bytes), indexed by the four digits less 1000: the
    digits with the point placed, the zeros after it dropped, and below
    1e-3 the exponent, written from integers (cheaper than %g)."""
    digits = np.arange(1000, 10000)
    if exponent in (-3, -2, -1, 3):  # 0.001234, 0.01234, 0.1234; 1234
        form = ("0." + "0" * (-1 - exponent) if exponent < 0 else "") + "%d"
        numbers = digits.tolist()
    else:  # 1.234e-5, 1.234, 12.34, 123.4: whole part and fraction
        places = 3 - exponent if exponent >= 0 else 3
        form = "%d.%0" + str(places) + "d"
        numbers = np.stack(np.divmod(digits, 10 ** places), axis=1).ravel().tolist()
    text = (",".join([form] * len(digits)) % tuple(numbers)) + ","
    if exponent != 3:
        for _ in range(3):  # at most three zeros end the digits
            text = text.replace("0,", ",")
        text = text.replace(".,", ",")
    if exponent < -3:
        text = text.replace(",", f"e{exponent},")
    return np.array(text[:-1].encode("ascii").split(b","))


def _formatted(values: np.ndarray) -> str:
    """The numbers' texts, comma-separated: one %-format in C."""
    text = ",".join(["%.4g"] * len(values)) % tuple(values.tolist())
    # %g writes 1e-4 .. 1e-3 positionally (0.0001234); 1.234e-4 is a byte
    # shorter. %g drops trailing zeros, so "0.000" only ever starts a number.
    if "0.000" in text:
        text = _DECADE.sub(_exponent_form, text)
    # %g's exponent has a sign and at least two digits: e-05 -> e-5, e+04 -> e4.
    text = text.replace("e+0", "e").replace("e+", "e").replace("e-0", "e-")
    if not np.isfinite(values).all():
        text = text.replace("-inf", "null").replace("inf", "null").replace("nan", "null")
    return text


_DECADE = re.compile(r"0\.000([1-9])([0-9]*)")


def _exponent_form(match: "re.Match[str]") -> str:
    """0.0001234 -> 1.234e-4, 0.0001 -> 1e-4."""
    digit, rest = match.groups()
    return f"{digit}.{rest}e-4" if rest else f"{digit}e-4"


def encode(payload: Payload) -> str:
    """Compact UTF-8 JSON; NaN and infinities are refused, never written.

    `Lines` anywhere in the payload are written by their own `json()`: each
    goes in as a placeholder string holding a NUL, which JSON escapes as
    \\u0000, so the placeholder's text cannot occur in any real string.
    """
    rows: List[Lines] = []

    def later(obj: Any) -> str:
        if isinstance(obj, Lines):
            rows.append(obj)
            return f"\x00lines{len(rows) - 1}"
        raise TypeError(f"{type(obj).__name__} is not JSON serializable")

    text = json.dumps(payload, ensure_ascii=False, separators=(",", ":"), allow_nan=False, default=later)
    if not rows:
        return text
    return _PLACEHOLDER.sub(lambda m: rows[int(m.group(1))].json(), text)


_PLACEHOLDER = re.compile(r'"\\u0000lines(\d+)"')
