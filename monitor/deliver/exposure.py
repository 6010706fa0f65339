"""Warnings about a password the config exposes (`check` prints them, `run`
logs them at start): a password file every user on the board can read, and
a password sent in clear to a broker on another machine. MQTT 3.1.1 section
5.4.1: the CONNECT packet carries the password as plain bytes; only TLS
underneath protects it. Neither stops the monitor: a lab setup may want both.
"""

import ipaddress
import os
import stat
from typing import List

from ..config import MqttConfig


def is_loopback(host: str) -> bool:
    """Whether `host` names this machine by itself, without asking DNS:
    localhost (and *.localhost, RFC 6761 section 6.3) or a loopback address."""
    name = host.strip("[]").rstrip(".").lower()
    if name == "localhost" or name.endswith(".localhost"):
        return True
    try:
        return ipaddress.ip_address(name).is_loopback
    except ValueError:
        return False


def warnings(cfg: MqttConfig) -> List[str]:
    out = []
    if cfg.password_file:
        try:
            mode = stat.S_IMODE(os.stat(cfg.password_file).st_mode)
        except OSError:
            mode = 0  # a missing file is an error at run time, not a warning here
        if mode & stat.S_IROTH:
            out.append(f"mqtt.password_file {cfg.password_file!r} can be read by every user (mode {mode:04o}); "
                       "make it readable by bandwatch alone: chmod 600, owned by the bandwatch user")
        if not cfg.tls and not is_loopback(cfg.host):
            out.append(f"the MQTT password goes to {cfg.host}:{cfg.port} unencrypted (tls = false) and can be "
                       "read on the way; set tls = true, or use a broker on this machine")
    return out
