"""What a reload may change: the config a running monitor takes on SIGHUP.

Spectrum, speed, bands, bearings, envelope and health are taken at the next
result. The node name, `[source]`, `[mqtt]` and `[capture]` are fixed for
the life of the process (they were opened or named at start): a change there
is refused by name and the old values stay.
"""

import dataclasses
from typing import List, Tuple

from ..config import Config


def merge(old: Config, new: Config) -> Tuple[Config, List[str]]:
    """The config to run with after a reload from `old` to `new`, and what
    was refused (each a sentence naming the part)."""
    refused = []
    if new.node != old.node:
        refused.append(f"node name {new.node!r} (still {old.node!r})")
    if new.source != old.source:
        refused.append("[source] settings")
    if new.mqtt != old.mqtt:
        refused.append("[mqtt] settings")
    if new.capture != old.capture:
        refused.append("[capture] settings")
    keep = {"node": old.node, "source": old.source, "mqtt": old.mqtt, "capture": old.capture,
            "summary_interval": old.summary_interval, "prefix": old.prefix}
    return dataclasses.replace(new, **keep), refused
