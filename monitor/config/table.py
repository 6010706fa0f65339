"""Reading one TOML table with its key path and line numbers.

A `Table` knows where it sits (``band[2]``), so an error names the file,
the key, the bad value, what was expected and, where `Locator` finds the key
in the text, its line. Keys nobody asked for are errors (`finish`): a typo
must not silently fall back to a default.
"""

import math
import re
from typing import Any, Dict, List, Optional, Sequence, Tuple

from ..errors import ConfigError
from .schema import NAME_RE


def _show(value: Any) -> str:
    if isinstance(value, str):
        return repr(value)
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return "[" + ", ".join(_show(v) for v in value) + "]"
    return repr(value)


def type_name(value: Any) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, int):
        return "an integer"
    if isinstance(value, float):
        return "a number"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list):
        return "an array"
    if isinstance(value, dict):
        return "a table"
    return type(value).__name__


class Locator:
    """Find the line of a key path in the TOML text, for error messages.

    A best effort over the common layout (one key per line under [table] or
    [[array]] headers). When the key cannot be found, errors simply omit the
    line.
    """

    _header = re.compile(r"^\s*(\[\[?)\s*([A-Za-z0-9_.-]+)\s*\]\]?")
    _key = re.compile(r"^\s*([A-Za-z0-9_-]+)\s*=")

    def __init__(self, text: str) -> None:
        self.lines: Dict[Tuple[str, Optional[int], Optional[str]], int] = {}
        table, index = "", None
        counts: Dict[str, int] = {}
        for number, line in enumerate(text.splitlines(), start=1):
            m = self._header.match(line)
            if m:
                table = m.group(2)
                if m.group(1) == "[[":
                    counts[table] = counts.get(table, 0) + 1
                    index = counts[table]
                else:
                    index = None
                self.lines.setdefault((table, index, None), number)
                continue
            m = self._key.match(line)
            if m:
                self.lines.setdefault((table, index, m.group(1)), number)

    def find(self, table: str, index: Optional[int], key: Optional[str]) -> Optional[int]:
        found = self.lines.get((table, index, key))
        if found is None and key is not None:
            found = self.lines.get((table, index, None))
        return found


class Table:
    """One TOML table being read: hands out keys, remembers which were used."""

    def __init__(
        self,
        data: Dict[str, Any],
        file: str,
        locator: Locator,
        table: str,
        index: Optional[int] = None,
    ) -> None:
        self.data = data
        self.file = file
        self.locator = locator
        self.table = table
        self.index = index
        self.used: set = set()
        self.asked: set = set()  # every key a reader looked for, present or not

    def path(self, key: Optional[str]) -> str:
        base = self.table if self.index is None else f"{self.table}[{self.index}]"
        return base if key is None else f"{base}.{key}"

    def fail(self, key: Optional[str], problem: str) -> ConfigError:
        line = self.locator.find(self.table, self.index, key)
        return ConfigError(self.file, self.path(key), problem, line)

    def bad(self, key: str, value: Any, expected: str) -> ConfigError:
        return self.fail(key, f"expected {expected}, got {_show(value)}")

    def has(self, key: str) -> bool:
        self.asked.add(key)
        return key in self.data

    def raw(self, key: str) -> Any:
        self.asked.add(key)
        self.used.add(key)
        return self.data[key]

    def get_str(self, key: str, default: Optional[str] = None, choices: Sequence[str] = ()) -> str:
        if not self.has(key):
            if default is None:
                raise self.fail(key, "missing; this key is required")
            return default
        value = self.raw(key)
        if not isinstance(value, str):
            raise self.bad(key, value, "a string")
        if choices and value not in choices:
            raise self.bad(key, value, "one of " + ", ".join(repr(c) for c in choices))
        return value

    def get_name(self, key: str, default: Optional[str] = None) -> str:
        value = self.get_str(key, default)
        if not NAME_RE.match(value):
            raise self.bad(key, value, "1 to 64 characters of A-Z a-z 0-9 _ -")
        return value

    def get_bool(self, key: str, default: bool) -> bool:
        if not self.has(key):
            return default
        value = self.raw(key)
        if not isinstance(value, bool):
            raise self.bad(key, value, "true or false")
        return value

    def get_int(self, key: str, default: Optional[int], lo: int, hi: int) -> int:
        if not self.has(key):
            if default is None:
                raise self.fail(key, "missing; this key is required")
            return default
        value = self.raw(key)
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.bad(key, value, f"an integer from {lo} to {hi}")
        if not lo <= value <= hi:
            raise self.bad(key, value, f"an integer from {lo} to {hi}")
        return value

    def number(self, key: str, value: Any, expected: str) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.bad(key, value, expected)
        number = float(value)
        if not math.isfinite(number):
            raise self.bad(key, value, expected)
        return number

    def get_float(
        self,
        key: str,
        default: Optional[float],
        lo: float = -math.inf,
        hi: float = math.inf,
        lo_open: bool = False,
        expected: str = "",
    ) -> float:
        if not self.has(key):
            if default is None:
                raise self.fail(key, "missing; this key is required")
            return default
        value = self.raw(key)
        if not expected:
            low = f"> {lo:g}" if lo_open else f">= {lo:g}"
            expected = f"a number {low}" + ("" if hi == math.inf else f" and <= {hi:g}")
        number = self.number(key, value, expected)
        if number < lo or (lo_open and number == lo) or number > hi:
            raise self.bad(key, value, expected)
        return number

    def get_optional_float(self, key: str, lo_open_at: float = 0.0) -> Optional[float]:
        if not self.has(key):
            return None
        return self.get_float(key, None, lo=lo_open_at, lo_open=True)

    def get_pair(self, key: str, lo: float, hi: float, what: str) -> Tuple[float, float]:
        value = self.raw(key)
        expected = f"[low, high] with {what}"
        if not isinstance(value, list) or len(value) != 2:
            raise self.bad(key, value, expected)
        a = self.number(key, value[0], expected)
        b = self.number(key, value[1], expected)
        if not (lo <= a < b <= hi):
            raise self.bad(key, value, expected)
        return (a, b)

    def get_list(self, key: str) -> List[Any]:
        value = self.raw(key)
        if not isinstance(value, list):
            raise self.bad(key, value, "an array")
        return value

    def table_of(self, key: str) -> Optional[Dict[str, Any]]:
        if not self.has(key):
            return None
        value = self.raw(key)
        if not isinstance(value, dict):
            raise self.bad(key, value, "a table [" + key + "]")
        return value

    def finish(self) -> None:
        """Refuse every key that was not read, naming the keys this table takes."""
        for key in self.data:
            if key not in self.used:
                known = ", ".join(sorted(self.asked))
                raise self.fail(key, f"unknown key; expected one of {known}")
