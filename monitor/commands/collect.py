"""`bandwatch collect -c FILE -o DIR`: the analyst's end of the broker.

It connects with the `[mqtt]` settings of FILE (host, port, TLS, client
certificate, login and password file; other sections are not read), under a
fixed client id and a persistent session (MQTT 3.1.1 section 3.1.2.4: Clean
Session 0), and subscribes at QoS 1 to `{prefix}/+/event`, `spectrum`,
`capture` and `summary`: every node under the prefix. While the collector
is away the broker keeps the QoS 1 messages of its session (events, spectra,
captures) and hands them over when it comes back; summaries are QoS 0 and
are not kept.

Each message is filed (monitor.deliver.filing) inside paho's message callback, and
paho acknowledges a QoS 1 message only after that callback returns (paho
1.6 and 2.x alike), so what the broker counts as delivered is on disk. After
a broker restart paho reconnects with backoff, and the subscriptions are
made again on every connect (a broker without persistence forgot them).
"""

import hashlib
import logging
import os
import socket
import sys
import threading
from typing import Any, Dict, List, Optional, Tuple

from ..config import MqttConfig, load_mqtt
from ..deliver.filing import Filer, Refused
from ..deliver.mqtt_client import connack_text, new_client, rc_value, read_password
from ..errors import ConfigError, DeliveryError
from ..service.posix_signals import stop_on_signals
from .cli import EXIT_FAILURE, EXIT_OK, EXIT_USAGE
from .spectrum_plot import draw_spectrum

log = logging.getLogger("bandwatch.collect")

SUFFIXES = ("event", "spectrum", "capture", "summary")
_QUIET_AFTER = 20  # refusals logged one by one; later ones at debug level


def default_client_id(prefix: str, out_dir: str) -> str:
    """Fixed for one machine, prefix and output folder, so a restarted
    collector takes up its own session; distinct for another folder."""
    key = f"{socket.gethostname()}/{prefix}/{os.path.realpath(out_dir)}"
    return "bw-collect-" + hashlib.sha1(key.encode("utf-8")).hexdigest()[:8]


class Collector:
    """Subscribes to every node under the prefix and files what arrives."""

    def __init__(self, cfg: MqttConfig, filer: Filer, client_id: str,
                 reconnect_min: float = 1.0, reconnect_max: float = 30.0) -> None:
        self.cfg = cfg
        self.filer = filer
        self.client_id = client_id
        self.subscribed = threading.Event()  # set at each SUBACK
        self._stopping = False
        self.refusals = 0
        password = read_password(cfg.password_file) if cfg.password_file else None
        # It publishes nothing: paho's usual in-flight limit of 20 is moot.
        self._client = new_client(cfg, client_id, password, reconnect_min, reconnect_max, 20, clean_session=False)
        self._client.on_connect = self._on_connect
        self._client.on_subscribe = self._on_subscribe
        self._client.on_message = self._on_message
        self._client.on_disconnect = self._on_disconnect
        self._topics: List[Tuple[str, int]] = [(f"{cfg.prefix}/+/{s}", 1) for s in SUFFIXES]

    def start(self) -> None:
        try:
            self._client.connect_async(self.cfg.host, self.cfg.port, keepalive=self.cfg.keepalive)
        except (OSError, ValueError) as err:
            raise DeliveryError(f"MQTT broker {self.cfg.host}:{self.cfg.port}: {err}") from err
        log.info("collecting %s/+/{%s} from %s:%d as %s into %s", self.cfg.prefix, ",".join(SUFFIXES),
                 self.cfg.host, self.cfg.port, self.client_id, self.filer.root)
        self._client.loop_start()  # retries the first connection too

    def stop(self) -> None:
        self._stopping = True
        self._client.disconnect()
        self._client.loop_stop()

    # -- paho callbacks (network thread); nothing may escape into paho --------

    def _on_connect(self, client: Any, userdata: Any, flags: Any, rc: Any, properties: Any = None) -> None:
        if rc_value(rc) != 0:
            log.warning("broker %s:%d refused the connection: %s; retrying", self.cfg.host, self.cfg.port,
                        connack_text(rc))
            return
        log.info("connected to %s:%d", self.cfg.host, self.cfg.port)
        client.subscribe(self._topics)

    def _on_subscribe(self, client: Any, userdata: Any, *args: Any) -> None:
        self.subscribed.set()

    def _on_disconnect(self, client: Any, userdata: Any, *args: Any) -> None:
        self.subscribed.clear()
        if not self._stopping:
                log.warning("connection to %s:%d lost; retrying", self.cfg.host, self.cfg.port)

    def _on_message(self, client: Any, userdata: Any, message: Any) -> None:
        try:
            self.take(message.topic, bytes(message.payload))
        except Exception:  # noqa: BLE001 - an exception would end paho's loop
            log.exception("filing a message on %r failed", message.topic[:200])

    def take(self, topic: str, payload: bytes) -> Optional[str]:
        """File one message; returns the path written (None: a repeat or refused)."""
        start = self.cfg.prefix + "/"
        parts = topic[len(start):].split("/") if topic.startswith(start) else []
        try:
            if len(parts) != 2:
                raise Refused("not {prefix}/{node}/{kind}")
            return self.filer.file(parts[0], parts[1], payload)
        except (Refused, OSError) as exc:
            self.filer.refused()
            self.refusals += 1
            level = logging.WARNING if self.refusals <= _QUIET_AFTER else logging.DEBUG
            log.log(level, "refused a message on %r (%d bytes): %s", topic[:200], len(payload), exc)
            if self.refusals == _QUIET_AFTER:
                log.warning("further refused messages are logged at debug level")
            return None


def collect_command(config_path: str, out_dir: str, client_id: Optional[str] = None,
                    stop: Optional[threading.Event] = None) -> int:
    """The command: run until SIGINT or SIGTERM (or `stop`)."""
    try:
        cfg = load_mqtt(config_path)
    except ConfigError as exc:
        print(f"bandwatch: config error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    try:
        filer = Filer(out_dir, draw=draw_spectrum)
    except OSError as exc:
        log.error("cannot use the output folder %s: %s", out_dir, exc.strerror or exc)
        return EXIT_USAGE
    try:
        collector = Collector(cfg, filer, client_id or default_client_id(cfg.prefix, out_dir))
        with stop_on_signals(stop or threading.Event(), "the collector") as stopping:
            collector.start()
            try:
                stopping.wait()
            finally:
                collector.stop()
    except DeliveryError as exc:
        log.error("%s", exc)
        return EXIT_FAILURE
    log.info("%s", tally(filer.counts))
    return EXIT_OK


def tally(counts: Dict[str, int]) -> str:
    """One line of what was filed: `filed: event 3, spectrum 4; repeats dropped: spectrum 1; refused 2`."""
    filed = [f"{k} {n}" for k, n in sorted(counts.items()) if " " not in k and k != "refused"]
    repeats = [f"{k.split()[0]} {n}" for k, n in sorted(counts.items()) if k.endswith(" repeated")]
    line = "filed: " + (", ".join(filed) or "nothing")
    if repeats:
        line += "; repeats dropped: " + ", ".join(repeats)
    if counts.get("refused"):
        line += f"; refused {counts['refused']}"
    return line
