"""Building the JSON payloads (README, What is published), and encoding them.

Numbers are rounded to 6 significant digits (more than any accelerometer
resolves) and non-finite values become null, so every line is valid JSON and
a replay of the same samples gives the same bytes. Long rows of numbers (a
spectrum's lines) travel as `Lines`: 4 significant digits written as short
as JSON allows, so a 3-channel spectrum of 2049 lines stays under 64 kB.
"""

import datetime
import functools
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
        shown, stand_ins = values, False
        # %g writes 1e-4 .. 1e-3 positionally (0.0001234); 1.234e-4 is a
        # byte shorter. Many lines of a vibration spectrum in g lie there:
        # each is written through a stand-in, its four digits times 1e297,
        # which %g writes as 1.234e+300, taken for e-4 below. The digits are
        # those %g rounds to (its exact decimal value, rounded half to
        # even), except within 1e-9 of a tie, which is left to %g; so is a
        # row that holds numbers of 1e300 themselves.
        size = np.abs(values)
        with np.errstate(all="ignore"):  # inf and nan are written as null below
            scaled = size * 1e7
            digits = np.rint(scaled)
            decade = (size >= 1.0001e-4) & (size < 9.999e-4) & (np.abs(scaled - digits) < 0.5 - 1e-9)
            if decade.any() and not ((size >= 9.99e299) & (size < 1.01e301)).any():
                shown, stand_ins = np.where(decade, np.copysign(digits, values) * 1e297, values), True
        # One %-format of the whole row, in C: no Python step per number.
        text = _row_format(len(values)) % tuple(shown.tolist())
        if stand_ins:
            text = text.replace("e+300", "e-04")
        if "0.000" in text:
            # The few left to %g (it drops trailing zeros, so "0.000" only
            # ever starts a number).
            text = _DECADE.sub(_exponent_form, text)
        # %g's exponent has a sign and at least two digits: e-05 -> e-5, e+04 -> e4.
        text = text.replace("e+0", "e").replace("e+", "e").replace("e-0", "e-")
        if not np.isfinite(values).all():
            text = text.replace("-inf", "null").replace("inf", "null").replace("nan", "null")
        return "[" + text + "]"


@functools.lru_cache(maxsize=8)
def _row_format(n: int) -> str:
    """The %-format of a row of n numbers (a spectrum's rows have one length)."""
    return ",".join(["%.4g"] * n)


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
