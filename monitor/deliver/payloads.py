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
        items = list(map("{:.4g}".format, values.tolist()))
        # %g writes 1e-4 .. 1e-3 positionally (0.0001234); 1.234e-4 is a
        # byte shorter. Only values near that decade can be written so, and
        # the text decides: each of those is looked at, no other.
        near = np.abs(values)
        for i in np.flatnonzero((near >= 9.99e-5) & (near < 1.001e-3)).tolist():
            item = items[i]
            if item[:5] == "0.000":
                items[i] = f"{item[5]}.{item[6:]}e-4" if len(item) > 6 else f"{item[5]}e-4"
            elif item[:6] == "-0.000":
                items[i] = f"-{item[6]}.{item[7:]}e-4" if len(item) > 7 else f"-{item[6]}e-4"
        # %g's exponent has a sign and at least two digits: e-05 -> e-5, e+04 -> e4.
        text = ",".join(items).replace("e+0", "e").replace("e+", "e").replace("e-0", "e-")
        if not np.isfinite(values).all():
            text = text.replace("-inf", "null").replace("inf", "null").replace("nan", "null")
        return "[" + text + "]"


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
