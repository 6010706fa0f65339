"""`bandwatch run`: the monitor in the foreground, as the service runs it.

The source, the sink (MQTT or stdout), stored event ids and sd_notify are
set up from the config; SIGHUP asks the monitor to reload the file, SIGINT
and SIGTERM stop it.
"""

import logging
import signal
import threading

from ..config import Config, load
from ..deliver import open_sink
from ..deliver.event_ids import EventIds
from ..errors import BandwatchError
from ..service.monitor import Monitor
from ..service.notify import Notifier
from ..service.posix_signals import stop_on_signals
from .cli import EXIT_FAILURE, EXIT_OK, open_source_or_fail

log = logging.getLogger("bandwatch")


def run_command(config: Config) -> int:
    """`bandwatch run -c FILE`: measure until SIGTERM or SIGINT; SIGHUP reloads.
    Returns the exit code."""
    monitor = None

    def on_hangup(_signum: int, _frame: object) -> None:
        # systemctl reload: re-read the file in the measuring loop.
        if monitor is not None:
            log.info("received SIGHUP, reloading %s", config.path)
            monitor.request_reload(lambda: load(config.path))

    signal.signal(signal.SIGHUP, on_hangup)
    source = open_source_or_fail(config)
    if source is None:
        return EXIT_FAILURE
    ids = None
    try:
        ids = EventIds(config.mqtt.queue_dir if config.mqtt else None)
        sink = open_sink(config)
        state_dir = config.mqtt.queue_dir if config.mqtt else None
        monitor = Monitor(config, source, sink, ids=ids, notifier=Notifier(), state_dir=state_dir)
        log.info("monitoring %s: %s source, %d channel(s) at %g Hz", config.node, config.source.kind,
                 len(config.source.channels), source.sample_rate)
        with stop_on_signals(threading.Event(), "the monitor") as stop:
            monitor.run(stop)
    except BandwatchError as exc:
        log.error("%s", exc)
        return EXIT_FAILURE
    finally:
        source.close()
        if ids is not None:
            ids.close()
    return EXIT_OK
