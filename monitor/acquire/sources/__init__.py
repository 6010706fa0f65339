"""Sample sources, one kind per module, loaded only when chosen.

`open_source(config)` returns an unopened `Source` for `[source] kind`.
"""

import importlib
from typing import Dict, Tuple

from ...config import SourceConfig
from ...errors import SourceError
from ..block import Block
from .base import Source

# kind -> (module, class). Kinds missing here are accepted by the config but
# cannot run yet; `open_source` says so plainly.
_KINDS: Dict[str, Tuple[str, str]] = {
    "simulator": (".simulator", "SimulatorSource"),
    "file": (".file", "FileSource"),
    "serial": (".serial_port", "SerialSource"),
    "tcp-client": (".tcp", "TcpClientSource"),
    "tcp-server": (".tcp", "TcpServerSource"),
    "udp": (".udp", "UdpSource"),
}


def available(kind: str) -> bool:
    return kind in _KINDS


def open_source(config: SourceConfig) -> Source:
    if config.kind not in _KINDS:
        raise SourceError(
            f"source kind {config.kind!r} is not available in this version; "
            f"available: {', '.join(sorted(_KINDS))}"
        )
    module, name = _KINDS[config.kind]
    cls = getattr(importlib.import_module(module, __name__), name)
    return cls(config)


__all__ = ["Block", "Source", "available", "open_source"]
