"""`bandwatch view`: a live terminal view of the monitor, for commissioning.

The view runs the monitor itself on the configured source; nothing goes to
the broker. Its sink keeps the last events, and the screen is refreshed from
the measuring thread at most every REFRESH_S of wall time, so drawing never
runs per block and never slows the measurement.

The drawing is split in three: `_Live` here copies what to show out of the
running monitor, through its public views, into a `Snapshot`;
`view_render.py` turns a snapshot into text (pure functions); and
`view_terminal.py` writes the text, in place on a terminal or one plain line
per second anywhere else.
"""

import collections
import dataclasses
import logging
import math
import os
import signal
import sys
import threading
import time
from typing import Callable, Deque, Dict, List, Mapping, Optional, TextIO, Tuple

from ..config import Config
from ..deliver.base import Payload, Sink
from ..errors import BandwatchError
from ..service.monitor import Monitor
from ..service.posix_signals import stop_on_signals
from ..deliver.event_ids import EventIds
from .cli import EXIT_FAILURE, EXIT_OK, open_source_or_fail
from .view_render import EVENTS_SHOWN, BandRow, ChannelRow, EventRow, HealthRow, Snapshot
from .view_terminal import Output, Screen, modes

log = logging.getLogger("bandwatch.view")

REFRESH_S = 0.5  # screen refresh, wall time
PLAIN_REFRESH_S = 1.0  # one plain line per second
RATE_S = 3.0  # results per second are counted over about this much wall time

# ---------------------------------------------------------------- live


class ViewSink(Sink):
    """The view's sink: keeps the last events, sends nothing anywhere."""

    def __init__(self, keep: int = EVENTS_SHOWN) -> None:
        self.events: Deque[Payload] = collections.deque(maxlen=keep)

    def open(self, online: Payload, offline: Payload) -> None:
        pass

    def send(self, suffix: str, payload: Payload) -> None:
        if suffix == "event":
            self.events.append(payload)

    def close(self, offline: Payload) -> None:
        pass


class Pacer:
    """Lets a redraw through at most once per `interval` seconds of wall
    time; each call costs one clock reading."""

    def __init__(self, interval: float, clock: Callable[[], float] = time.monotonic) -> None:
        self.interval = interval
        self.clock = clock
        self._last = -math.inf

    def due(self) -> bool:
        now = self.clock()
        if now - self._last < self.interval:
            return False
        self._last = now
        return True


class _Live:
    """Copies what to show out of the running monitor, in its thread, through
    the monitor's public views; redraws at the pace of `pacer`."""

    def __init__(self, monitor: Monitor, sink: ViewSink, output: Output, pacer: Pacer,
                 clock: Callable[[], float] = time.monotonic):
        self.monitor = monitor
        self.sink = sink
        self.output = output
        self.pacer = pacer
        self.clock = clock
        self.note = ""
        # (wall time, results) at recent refreshes, for results per second.
        self._marks: Deque[Tuple[float, int]] = collections.deque()

    def tick(self) -> None:
        """At every turn of the measuring loop: redraw when due."""
        if self.pacer.due():
            self.refresh()

    def refresh(self) -> None:
        self.output.show(self.snapshot())

    def snapshot(self) -> Snapshot:
        m = self.monitor
        cfg = m.config
        src = m.source
        note = self.note or ("" if m.latest is not None else "waiting for the first result")
        return Snapshot(
            node=cfg.node,
            source=src.describe(),
            sample_rate=m.fs,
            channels=list(cfg.source.channels),
            stream_s=(src.samples + src.lost) / m.fs,
            results_per_s=self._results_rate(),
            speed_hz=m.speed_hz,
            speed_mode=m.speed_mode(),
            counters=self._counters(),
            bands=[BandRow(b.band.name, b.channel, b.value, b.unit, b.level, b.warning, b.alarm,
                           "learning baseline" if b.learning else "") for b in m.band_states()],
            channel_rows=self._channels(),
            health=[HealthRow(c.name, c.channel, c.level, c.value, c.unit)
                    for c in m.check_states() if c.level != "normal"],
            events=[_event_row(p) for p in self.sink.events],
            note=note,
        )

    def _results_rate(self) -> Optional[float]:
        """Results per second of wall time over the last RATE_S or so."""
        now = self.clock()
        marks = self._marks
        marks.append((now, self.monitor.results))
        while len(marks) > 2 and now - marks[1][0] >= RATE_S:
            marks.popleft()
        t0, n0 = marks[0]
        return (self.monitor.results - n0) / (now - t0) if now - t0 >= REFRESH_S / 2 else None

    def _counters(self) -> List[Tuple[str, int]]:
        src = self.monitor.source
        out = [("samples", src.samples), ("lost", src.lost)]
        c: Dict[str, int] = src.counters()
        if c:
            out += [("frames", c.get("frames", 0)),
                    ("corrupt", c.get("corrupt_frames", 0) + c.get("mismatched", 0) + c.get("nonfinite", 0)),
                    ("gaps", c.get("gaps", 0)),
                    ("reconnects", max(0, c.get("connects", 0) - 1)),
                    ("overflows", c.get("overflows", 0))]
        return out

    def _channels(self) -> List[ChannelRow]:
        m = self.monitor
        unit = m.config.source.unit
        latest = m.latest
        stats = m.recent_stats()
        rows = []
        for i, name in enumerate(m.config.source.channels):
            row = ChannelRow(name, unit)
            if latest is not None:
                row.dominant_hz = float(latest.dominant_hz[i])
                row.dominant_rms = float(latest.dominant_rms[i])
                row.velocity_rms = float(latest.velocity_rms[i])
            if stats is not None:
                row.rms = float(stats["rms"][i])
                row.peak = float(stats["peak"][i])
                row.crest = float(stats["crest"][i])
            rows.append(row)
        return rows


def _event_row(p: Payload) -> EventRow:
    stamp = str(p.get("time") or "")
    return EventRow(
        time=stamp[11:19] if len(stamp) >= 19 else stamp,
        stream_s=float(p.get("stream_s") or 0.0),
        name=str(p.get("name")),
        channel=p.get("channel"),
        previous=str(p.get("previous")),
        level=str(p.get("level")),
        value=p.get("value"),
        unit=str(p.get("unit") or ""),
    )


# ---------------------------------------------------------------- command


def view(config: Config, out: Optional[TextIO] = None, stop: Optional[threading.Event] = None,
         environ: Optional[Mapping[str, str]] = None) -> int:
    """Run `bandwatch view` until the source ends or `stop` is set (SIGINT,
    SIGTERM, SIGHUP set it). Returns the exit code: EXIT_OK, or EXIT_FAILURE on a failure."""
    out = sys.stdout if out is None else out
    # No log line for the signal: it would land on the screen being restored.
    with stop_on_signals(stop or threading.Event(), None,
                         (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)) as stopping:
        return _view(config, out, stopping, os.environ if environ is None else environ)


def _view(config: Config, out: TextIO, stop: threading.Event, environ: Mapping[str, str]) -> int:
    screen, colour = modes(out, environ)
    output: Output = Screen(out, stop, colour) if screen else Output(out, stop)
    source = open_source_or_fail(config)
    if source is None:
        return EXIT_FAILURE
    try:
        sink = ViewSink()
        # The view looks and never writes: event ids count from 1 in memory
        # and no capture is kept, so a service running beside it on the same
        # state directory is left alone. Learned baselines are read from
        # there, and whatever the view learns stays in memory.
        state_dir = config.mqtt.queue_dir if config.mqtt else None
        monitor = Monitor(dataclasses.replace(config, capture=None), source, sink, ids=EventIds(),
                          state_dir=state_dir, read_only=True)
        live = _Live(monitor, sink, output, Pacer(REFRESH_S if screen else PLAIN_REFRESH_S))
        monitor.add_ticker(live.tick)
        output.begin()
        try:
            monitor.run(stop)
            live.note = "source ended" if source.ended else "stopped"
            live.refresh()
        finally:
            output.end()
    except BandwatchError as exc:
        log.error("%s", exc)
        return EXIT_FAILURE
    finally:
        source.close()
    if output.broken and out is sys.stdout:
        # The reader went away: keep the interpreter's final flush quiet.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    return EXIT_OK


__all__ = ["Pacer", "ViewSink", "view"]
