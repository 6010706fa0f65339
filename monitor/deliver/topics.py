"""The rules a topic prefix must meet so the broker takes every message under it.

From MQTT 3.1.1 (OASIS 2014): topic names are UTF-8 strings without U+0000,
and SHOULD NOT hold the control characters U+0001-U+001F and U+007F-U+009F or
Unicode noncharacters (section 1.5.3; mosquitto refuses the connection over
them); `+` and `#` are wildcards, for filters only (section 4.7.1); a topic
starting with `$` belongs to the server, like `$SYS/...`, and `$share/...`
is a shared subscription, so a client's publish there is acknowledged and
dropped (section 4.7.2); every level between two `/` counts (section 4.7.1.1),
so an empty one is a different topic from what was meant. Brokers also cap
the number of levels (mosquitto: 200, from memory). The limits below are this
project's, well inside those: room for `{node}/{suffix}` after the prefix.
"""

from typing import Optional

MAX_LEVELS = 64
MAX_BYTES = 256
RULE = (f"a topic prefix of 1 to {MAX_LEVELS} non-empty levels separated by /, at most {MAX_BYTES} bytes "
        "of UTF-8, not starting with $, without +, # or control characters")


def _bad_character(cp: int) -> bool:
    return (cp <= 0x1F or 0x7F <= cp <= 0x9F  # controls, NUL included
            or 0xD800 <= cp <= 0xDFFF  # surrogates: not UTF-8 at all
            or 0xFDD0 <= cp <= 0xFDEF or cp & 0xFFFE == 0xFFFE)  # noncharacters


def prefix_problem(prefix: str) -> Optional[str]:
    """What makes `prefix` one the broker refuses or misfiles, or None."""
    if not prefix:
        return "is empty"
    if prefix.startswith("$"):
        return "starts with $: such topics belong to the broker ($SYS, $share), which drops publishes there"
    for i, ch in enumerate(prefix):
        if ch in "+#":
            return f"holds the wildcard {ch} (at character {i + 1})"
        if _bad_character(ord(ch)):
            return f"holds U+{ord(ch):04X}, a control character or noncharacter (at character {i + 1})"
    levels = prefix.split("/")
    if "" in levels:
        return "has an empty level (a leading, trailing or doubled /)"
    if len(levels) > MAX_LEVELS:
        return f"has {len(levels)} levels, over {MAX_LEVELS}"
    size = len(prefix.encode("utf-8"))
    if size > MAX_BYTES:
        return f"is {size} bytes of UTF-8, over {MAX_BYTES}"
    return None
