"""Relative paths in a config file are taken from the file's own folder.

A config names files and folders: the recording of a file source, the event
queue, capture folder, password, CA, certificate and key files. Read
relative to the working directory, the same file would mean different things
from a shell in another folder and from systemd (whose working directory is
`/`); read relative to the config's folder, a config and the files beside it
can be moved together. Absolute paths and empty values are kept as written.
A serial `device` is a device name (or a pyserial URL), used as given.
"""

import dataclasses
import os
from typing import Any, Dict

from .schema import Config

# Per section, the keys that name a file or folder.
PATH_KEYS = {
    "source": ("path",),
    "mqtt": ("queue_dir", "password_file", "ca_file", "cert_file", "key_file"),
    "capture": ("dir",),
}


def resolve_section(table: Any, section: str, folder: str) -> Any:
    """One section's dataclass with its relative path keys joined to `folder`."""
    folder = os.path.abspath(folder)
    joined = {k: os.path.join(folder, getattr(table, k)) for k in PATH_KEYS[section]
              if getattr(table, k) and not os.path.isabs(getattr(table, k))}
    return dataclasses.replace(table, **joined) if joined else table


def resolve_paths(config: Config, folder: str) -> Config:
    """`config` with every relative path key joined to `folder` (made absolute)."""
    changes: Dict[str, Any] = {}
    for section in PATH_KEYS:
        table = getattr(config, section)
        if table is not None:
            resolved = resolve_section(table, section, folder)
            if resolved is not table:
                changes[section] = resolved
    return dataclasses.replace(config, **changes) if changes else config
