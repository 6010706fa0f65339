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


def resolve_paths(config: Config, folder: str) -> Config:
    """`config` with every relative path key joined to `folder` (made absolute)."""
    folder = os.path.abspath(folder)
    changes: Dict[str, Any] = {}
    for section, keys in PATH_KEYS.items():
        table = getattr(config, section)
        if table is None:
            continue
        joined = {k: os.path.join(folder, getattr(table, k)) for k in keys
                  if getattr(table, k) and not os.path.isabs(getattr(table, k))}
        if joined:
            changes[section] = dataclasses.replace(table, **joined)
    return dataclasses.replace(config, **changes) if changes else config
