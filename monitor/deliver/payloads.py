"""Building the JSON payloads (README, What is published), and encoding them.

Numbers are rounded to 6 significant digits (more than any accelerometer
resolves) and non-finite values become null, so every line is valid JSON and
a replay of the same samples gives the same bytes.
"""

import datetime
import json
import math
from typing import Any, Dict, Optional

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


def encode(payload: Payload) -> str:
    """Compact UTF-8 JSON; NaN and infinities are refused, never written."""
    return json.dumps(payload, ensure_ascii=False, separators=(",", ":"), allow_nan=False)
