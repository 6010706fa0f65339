"""Stopping a command cleanly on SIGINT and SIGTERM (and others if asked)."""

import contextlib
import logging
import signal
import threading
from typing import Iterator, Optional, Sequence

log = logging.getLogger("bandwatch")


@contextlib.contextmanager
def stop_on_signals(
    stop: threading.Event,
    doing: Optional[str],
    signals: Sequence[int] = (signal.SIGINT, signal.SIGTERM),
) -> Iterator[threading.Event]:
    """Set `stop` when one of `signals` arrives, logging "received X,
    stopping `doing`" (nothing when `doing` is None); restore the previous
    handlers on the way out. Outside the main thread, where Python cannot
    install handlers, it only hands `stop` back."""
    if threading.current_thread() is not threading.main_thread():
        yield stop
        return

    def on_signal(signum: int, _frame: object) -> None:
        if doing is not None:
            log.info("received %s, stopping %s", signal.Signals(signum).name, doing)
        stop.set()

    previous = {s: signal.signal(s, on_signal) for s in signals}
    try:
        yield stop
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)
