"""Exceptions raised by bandwatch.

Every error the program raises on purpose derives from one base class, so a
caller can catch them all at once::

    BandwatchError            anything bandwatch raises on purpose
    ├── ConfigError           the config file is unreadable or breaks a rule
    │                         (exit code 2, nothing started)
    ├── SourceError           the sensor source cannot be opened or read
    └── DeliveryError         the broker connection cannot be set up

Errors carry what was wrong in their message: the file, the key, the bad
value and what was expected.
"""

from typing import Optional


class BandwatchError(Exception):
    """Base class of every error bandwatch raises on purpose."""


class ConfigError(BandwatchError):
    """A config file that cannot be used, with where and why."""

    def __init__(
        self,
        file: str,
        key: str,
        problem: str,
        line: Optional[int] = None,
    ) -> None:
        self.file = file
        self.key = key
        self.problem = problem
        self.line = line
        where = file if line is None else f"{file}:{line}"
        text = f"{where}: {key}: {problem}" if key else f"{where}: {problem}"
        super().__init__(text)


class SourceError(BandwatchError):
    """The sensor source cannot be opened or read."""


class DeliveryError(BandwatchError):
    """The broker connection cannot be set up."""
