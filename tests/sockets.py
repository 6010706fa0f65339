"""Loopback socket helpers for the link tests: a listening peer, a reset
(RST instead of FIN: SO_LINGER on with a linger time of 0, common practice),
and a poll with a deadline."""

import socket
import struct
import time


def wait_until(check, seconds: float) -> bool:
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if check():
            return True
        time.sleep(0.01)
    return check()


def listener(port: int = 0) -> socket.socket:
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    sock.bind(("127.0.0.1", port))
    sock.listen(1)
    sock.settimeout(5.0)
    return sock


def reset(sock: socket.socket) -> None:
    """Close with RST instead of FIN (SO_LINGER on, linger time 0)."""
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
    sock.close()
