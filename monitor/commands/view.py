"""`bandwatch view`: a live terminal view of the monitor, for commissioning.

The view runs the monitor itself on the configured source; nothing goes to
the broker. Its sink keeps the last events, and the screen is refreshed from
the measuring thread at most every REFRESH_S of wall time, so drawing never
runs per block and never slows the measurement.

The drawing is split in two: `snapshot` (in `_Live`) copies what to show out
of the running monitor into a `Snapshot`, and `render` / `plain_line` turn a
snapshot into text. Both text functions are pure, so a test can hand them a
snapshot it made up.

On a terminal (stdout a tty, TERM set and not "dumb") the screen is redrawn
in place with ANSI escape codes (ECMA-48 cursor home and erase, and the
VT220 cursor hide/show); colour is added unless NO_COLOR is set, and never
carries meaning alone: the level word is always printed. Anywhere else
(a pipe, a file, a dumb terminal) one plain line per second is written,
without any escape code.
"""

import collections
import dataclasses
import logging
import math
import os
import shutil
import signal
import sys
import threading
import time
from dataclasses import dataclass
from typing import Callable, Deque, Dict, List, Mapping, Optional, Sequence, TextIO, Tuple

from ..config import Config, quantity_unit
from ..deliver.base import Payload, Sink
from ..errors import BandwatchError
from ..service.monitor import Monitor
from ..service.posix_signals import stop_on_signals
from ..acquire.sources import open_source
from ..deliver.event_ids import EventIds
from ..analyse.stats import time_stats

log = logging.getLogger("bandwatch.view")

REFRESH_S = 0.5  # screen refresh, wall time
PLAIN_REFRESH_S = 1.0  # one plain line per second
EVENTS_SHOWN = 5
RATE_S = 3.0  # results per second are counted over about this much wall time

# Each band row shows numbers first: the value, both limits, and the value as
# a share of the next limit up (the one a rise would cross next; the top one
# once it is crossed). The bar is a plain proportion of the top limit (the
# alarm limit, or the warning limit where a band has only that), with no
# marks inside it: a full bar means "at or past the top limit", and the share
# column says by how much.
BAR_FILL, BAR_EMPTY, BAR_OVER = "=", " ", ">"
BAR_MIN, BAR_MAX = 8, 50

# ECMA-48 control sequences, and DECTCEM (VT220) to hide and show the cursor.
HOME = "\x1b[H"
CLEAR_EOL = "\x1b[K"
CLEAR_EOS = "\x1b[J"
CLEAR_SCREEN = "\x1b[2J"
HIDE_CURSOR = "\x1b[?25l"
SHOW_CURSOR = "\x1b[?25h"
RESET = "\x1b[0m"
# Style only on the level word: normal stays plain, warning is bold magenta,
# alarm and fault are bold reverse video (readable on any palette, and still
# distinct on a monochrome terminal).
STYLES = {"warning": "\x1b[1;35m", "alarm": "\x1b[1;7m", "fault": "\x1b[1;7m", "dim": "\x1b[2m"}


# ---------------------------------------------------------------- snapshot


@dataclass
class BandRow:
    name: str
    channel: str
    value: Optional[float]
    unit: str
    level: str
    warning: Optional[float] = None
    alarm: Optional[float] = None
    note: str = ""  # e.g. "learning baseline"


@dataclass
class ChannelRow:
    name: str
    unit: str
    dominant_hz: Optional[float] = None
    dominant_rms: Optional[float] = None
    velocity_rms: Optional[float] = None  # mm/s, 10-1000 Hz
    rms: Optional[float] = None
    peak: Optional[float] = None
    crest: Optional[float] = None


@dataclass
class HealthRow:
    name: str
    channel: Optional[str]
    level: str
    value: Optional[float]
    unit: str


@dataclass
class EventRow:
    time: str  # HH:MM:SS, UTC, from the event's `time`
    stream_s: float
    name: str
    channel: Optional[str]
    previous: str
    level: str
    value: Optional[float]
    unit: str


@dataclass
class Snapshot:
    """Everything one screen shows."""

    node: str
    source: str  # kind and address
    sample_rate: float
    channels: Sequence[str]
    stream_s: float
    results_per_s: Optional[float] = None
    speed_hz: Optional[float] = None
    speed_mode: str = "nominal"  # tracked | nominal | held
    counters: Sequence[Tuple[str, int]] = ()
    bands: Sequence[BandRow] = ()
    channel_rows: Sequence[ChannelRow] = ()
    health: Sequence[HealthRow] = ()  # only the checks not normal
    events: Sequence[EventRow] = ()  # oldest first
    note: str = ""  # "waiting for the first result", "source ended", ...


# ---------------------------------------------------------------- text


Segment = Tuple[str, Optional[str]]  # text and its style name (None: plain)


def _num(value: Optional[float]) -> str:
    """A reading with about three significant digits, '-' when unknown."""
    if value is None or not math.isfinite(value):
        return "-"
    a = abs(value)
    if a >= 100:
        return f"{value:.0f}"
    if a >= 10:
        return f"{value:.1f}"
    if a >= 1:
        return f"{value:.2f}"
    return f"{value:.3g}"


def _clip(text: str, width: int) -> str:
    return text if len(text) <= width else text[: max(0, width - 1)] + "~"


def next_limit(value: Optional[float], warning: Optional[float],
               alarm: Optional[float]) -> Tuple[Optional[str], Optional[float]]:
    """The limit a rise would cross next: the lowest limit above the value,
    or the top limit once the value has passed every one; (None, None) for
    a band without limits."""
    limits = [(n, v) for n, v in (("warning", warning), ("alarm", alarm)) if v is not None and v > 0]
    if not limits:
        return None, None
    if value is not None and math.isfinite(value):
        for name, limit in limits:
            if value < limit:
                return name, limit
    return limits[-1]


def share_of_limit(value: Optional[float], warning: Optional[float], alarm: Optional[float]) -> str:
    """'0.71 alarm': the value over its next limit, '-' when unknown."""
    name, limit = next_limit(value, warning, alarm)
    if name is None or limit is None or value is None or not math.isfinite(value):
        return "-"
    return f"{value / limit:.2f} {name}"


def bar(value: Optional[float], warning: Optional[float], alarm: Optional[float], cells: int) -> str:
    """`cells` characters in proportion to value / top limit, rounded to the
    nearest cell; the last cell shows BAR_OVER once the value is past the
    top limit. Blank without a value or without limits."""
    top = alarm if alarm is not None else warning
    if cells <= 0:
        return ""
    if top is None or top <= 0 or value is None or not math.isfinite(value) or value <= 0:
        return BAR_EMPTY * cells
    filled = min(cells, int(math.floor(value / top * cells + 0.5)))
    out = BAR_FILL * filled + BAR_EMPTY * (cells - filled)
    return out[:-1] + BAR_OVER if value > top else out


def _fit(segments: Sequence[Segment], width: int, colour: bool) -> str:
    """Join segments, cut to `width` visible characters, styles as SGR codes."""
    out: List[str] = []
    used = 0
    for text, style in segments:
        room = width - used
        if room <= 0:
            break
        text = text[:room]
        used += len(text)
        code = STYLES.get(style or "", "") if colour else ""
        out.append(code + text + RESET if code and text else text)
    return "".join(out)


def _speed(snap: Snapshot) -> str:
    if snap.speed_hz is None:
        return "speed -"
    return f"speed {snap.speed_hz * 60:.0f} rpm ({snap.speed_hz:.2f} Hz) {snap.speed_mode}"


def _header(snap: Snapshot) -> List[List[Segment]]:
    rate = "-" if snap.results_per_s is None else f"{snap.results_per_s:.1f}"
    lines: List[List[Segment]] = [
        [(f"bandwatch view  {snap.node}  {snap.source}  {snap.sample_rate:g} Hz  "
          f"channels {', '.join(snap.channels)}", None)],
        [(f"stream {snap.stream_s:.1f} s  {rate} results/s  {_speed(snap)}", None)],
        [("  ".join(f"{name} {count}" for name, count in snap.counters), None)],
    ]
    if snap.note:
        lines[1].append((f"  [{snap.note}]", "dim"))
    return lines


def _band_rows(snap: Snapshot, width: int) -> List[List[Segment]]:
    if not snap.bands:
        return [[("no bands configured", None)]]
    name_w = min(12, max([4] + [len(b.name) for b in snap.bands]))
    ch_w = min(5, max([2] + [len(b.channel) for b in snap.bands]))
    unit_w = max([4] + [len(b.unit) for b in snap.bands])
    # band ch value unit warning alarm share |bar| level; "warning" is the widest word
    fixed = name_w + 1 + ch_w + 1 + 6 + 1 + unit_w + 1 + 7 + 1 + 7 + 1 + 13 + 1 + 7
    share_w = 13 if width >= fixed else 0  # narrow: the share column goes first, the level word stays
    cells = min(BAR_MAX, width - fixed - 3)

    def columns(name: str, ch: str, value: str, unit: str, warning: str, alarm: str, share: str) -> str:
        return (f"{_clip(name, name_w):<{name_w}} {_clip(ch, ch_w):<{ch_w}} {value:>6} {unit:<{unit_w}} "
                f"{warning:>7} {alarm:>7} " + (f"{share:<{share_w}} " if share_w else ""))

    head = columns("band", "ch", "value", "", "warning", "alarm", "x next limit")
    if cells >= BAR_MIN:
        head += f"{'|x top limit':<{cells + 2}} "
    lines: List[List[Segment]] = [[(head + "level", "dim")]]
    for b in snap.bands:
        row: List[Segment] = [(columns(b.name, b.channel, _num(b.value), b.unit, _num(b.warning), _num(b.alarm),
                                       share_of_limit(b.value, b.warning, b.alarm)), None)]
        if cells >= BAR_MIN:
            row.append((f"|{bar(b.value, b.warning, b.alarm, cells)}| ", None))
        row.append((b.level, b.level))
        if b.note:
            row.append((f" ({b.note})", "dim"))
        lines.append(row)
    return lines


def _channel_rows(snap: Snapshot) -> List[List[Segment]]:
    unit = snap.channel_rows[0].unit if snap.channel_rows else ""
    ch_w = max([7] + [min(8, len(c.name)) for c in snap.channel_rows])
    cols = ("dom Hz", f"dom {unit}", "vel mm/s", f"rms {unit}", f"peak {unit}", "crest")
    lines = [
        [("channels: dom = dominant line (Hz, RMS), vel = velocity RMS 10-1000 Hz; "
          "rms, peak, crest of the latest samples", "dim")],
        [(f"{'channel':<{ch_w}}" + "".join(f"{c:>10}" for c in cols), None)],
    ]
    for c in snap.channel_rows:
        values = (c.dominant_hz, c.dominant_rms, c.velocity_rms, c.rms, c.peak, c.crest)
        lines.append([(f"{_clip(c.name, ch_w):<{ch_w}}" + "".join(f"{_num(v):>10}" for v in values), None)])
    return lines


def _who(name: str, channel: Optional[str]) -> str:
    return f"{name}/{channel}" if channel else name


def _health_and_events(snap: Snapshot) -> List[List[Segment]]:
    if snap.health:
        health: List[Segment] = [("health: ", None)]
        for i, h in enumerate(snap.health):
            health += [("; " if i else "", None), (f"{_who(h.name, h.channel)} ", None), (h.level, h.level),
                       (f" ({_num(h.value)} {h.unit})", None)]
    else:
        health = [("health: all checks normal", None)]
    lines = [health, [(f"last {EVENTS_SHOWN} events:" if snap.events else "events: none yet", "dim")]]
    for e in snap.events:
        lines.append([
            (f"{e.time}  {e.stream_s:8.1f} s  {_who(e.name, e.channel)}  {e.previous} -> ", None),
            (e.level, e.level),
            (f"  {_num(e.value)} {e.unit}", None),
        ])
    return lines


def render(snap: Snapshot, width: int, colour: bool = False) -> List[str]:
    """The screen for `snap`, each line at most `width` visible characters.
    Without `colour` the lines hold no escape code at all."""
    width = max(1, width)
    blocks = [_header(snap), _band_rows(snap, width), _channel_rows(snap), _health_and_events(snap)]
    segments: List[List[Segment]] = []
    for i, block in enumerate(blocks):
        if i:
            segments.append([])
        segments.extend(block)
    return [_fit(line, width, colour) for line in segments]


def plain_line(snap: Snapshot) -> str:
    """One compact line: stream time, speed, each band's value and level, faults."""
    parts = [f"stream {snap.stream_s:.1f} s", _speed(snap)]
    parts += [f"{_who(b.name, b.channel)} {_num(b.value)} {b.unit} {b.level}" + (f" ({b.note})" if b.note else "")
              for b in snap.bands]
    if snap.health:
        parts.append("health: " + ", ".join(f"{_who(h.name, h.channel)} {h.level}" for h in snap.health))
    if snap.note:
        parts.append(snap.note)
    return " | ".join(parts)


# ---------------------------------------------------------------- live


class ViewSink(Sink):
    """The view's sink: keeps the last events and paces the refresh. Every
    `tick` costs one clock reading; `refresh` runs at most once per
    `interval` seconds of wall time."""

    def __init__(self, interval: float = REFRESH_S, keep: int = EVENTS_SHOWN,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.interval = interval
        self.clock = clock
        self.events: Deque[Payload] = collections.deque(maxlen=keep)
        self.refresh: Optional[Callable[[], None]] = None
        self._last = -math.inf

    def open(self, online: Payload, offline: Payload) -> None:
        pass

    def send(self, suffix: str, payload: Payload) -> None:
        if suffix == "event":
            self.events.append(payload)
        self.tick()

    def close(self, offline: Payload) -> None:
        pass

    def tick(self, force: bool = False) -> None:
        """Called at every turn of the measuring loop (Sink.tick) and on each
        payload: redraws at most every `interval` seconds."""
        now = self.clock()
        if self.refresh is None or (not force and now - self._last < self.interval):
            return
        self._last = now
        self.refresh()


class _Output:
    """Writes to the view's stream; a closed pipe or a lost terminal stops the view."""

    def __init__(self, out: TextIO, stop: threading.Event) -> None:
        self.out = out
        self.stop = stop
        self.broken = False

    def write(self, text: str) -> None:
        if self.broken:
            return
        try:
            try:
                self.out.write(text)
            except UnicodeEncodeError:  # "µm" on a terminal that cannot show it
                encoding = getattr(self.out, "encoding", None) or "ascii"
                self.out.write(text.encode(encoding, "replace").decode(encoding))
            self.out.flush()
        except OSError:
            self.broken = True
            self.stop.set()

    def begin(self) -> None:
        pass

    def show(self, snap: Snapshot) -> None:
        self.write(plain_line(snap) + "\n")

    def end(self) -> None:
        pass


class _Screen(_Output):
    """In-place redraw on an ANSI terminal."""

    def __init__(self, out: TextIO, stop: threading.Event, colour: bool) -> None:
        super().__init__(out, stop)
        self.colour = colour

    def begin(self) -> None:
        self.write(HIDE_CURSOR + CLEAR_SCREEN + HOME)

    def show(self, snap: Snapshot) -> None:
        cols, rows = shutil.get_terminal_size()
        # One column spare: erasing to the end of the line from the last
        # column would erase the character just written there.
        lines = render(snap, max(20, cols - 1), self.colour)[: max(1, rows)]
        self.write(HOME + (CLEAR_EOL + "\n").join(lines) + CLEAR_EOL + CLEAR_EOS)

    def end(self) -> None:
        self.write((RESET if self.colour else "") + SHOW_CURSOR + "\n")


def _source_name(monitor: Monitor) -> str:
    src = monitor.source
    if hasattr(src, "describe"):
        return src.describe()
    if src.kind == "file":
        return f"file {monitor.config.source.path}"
    return src.kind or monitor.config.source.kind


class _Live:
    """Copies what to show out of the running monitor, in its thread."""

    def __init__(self, monitor: Monitor, sink: ViewSink, output: _Output, clock: Callable[[], float] = time.monotonic):
        self.monitor = monitor
        self.sink = sink
        self.output = output
        self.clock = clock
        self.note = ""
        # (wall time, results) at recent refreshes, for results per second.
        self._marks: Deque[Tuple[float, int]] = collections.deque()

    def refresh(self) -> None:
        self.output.show(self.snapshot())

    def snapshot(self) -> Snapshot:
        m = self.monitor
        cfg = m.config
        src = m.source
        latest = m.latest
        note = self.note or ("" if latest is not None else "waiting for the first result")
        return Snapshot(
            node=cfg.node,
            source=_source_name(m),
            sample_rate=m.fs,
            channels=list(cfg.source.channels),
            stream_s=(src.samples + src.lost) / m.fs,
            results_per_s=self._results_rate(),
            speed_hz=m.speed.speed_hz,
            speed_mode=self._speed_mode(),
            counters=self._counters(),
            bands=self._bands(),
            channel_rows=self._channels(),
            health=[HealthRow(c.name, c.channel, c.rule.level, c.value, c.unit)
                    for c in m.health.checks if c.rule.level != "normal"],
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

    def _speed_mode(self) -> str:
        m = self.monitor
        if m.speed.locked:
            return "tracked"
        if m.config.speed.track and m.speed.speed_hz != m.config.speed.nominal_hz:
            return "held"  # the last tracked speed, no clear peak now
        return "nominal"

    def _counters(self) -> List[Tuple[str, int]]:
        src = self.monitor.source
        out = [("samples", src.samples), ("lost", src.lost)]
        if hasattr(src, "counters"):
            c: Dict[str, int] = src.counters()
            out += [("frames", c.get("frames", 0)),
                    ("corrupt", c.get("corrupt_frames", 0) + c.get("mismatched", 0) + c.get("nonfinite", 0)),
                    ("gaps", c.get("gaps", 0)),
                    ("reconnects", max(0, c.get("connects", 0) - 1)),
                    ("overflows", c.get("overflows", 0))]
        return out

    def _bands(self) -> List[BandRow]:
        m = self.monitor
        latest = m.latest
        rows = []
        for i, ((band, ch), rule, base) in enumerate(zip(m.bank.pairs, m.band_rules, m.baselines)):
            value = latest.bands[i].value if latest is not None else None
            # The limits the level machine holds now (a learned baseline may set them).
            limits = dict(rule.limits)
            rows.append(BandRow(band.name, m.config.source.channels[ch], value,
                                quantity_unit(band.quantity, m.config.source.unit), rule.level,
                                limits.get("warning"), limits.get("alarm"),
                                "learning baseline" if base.learning else ""))
        return rows

    def _channels(self) -> List[ChannelRow]:
        m = self.monitor
        unit = m.config.source.unit
        latest = m.latest
        n = min(m.ring.count, m.config.spectrum.span)
        stats = time_stats(m.ring.latest(n)) if n >= 2 else None
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


def _modes(out: TextIO, environ: Mapping[str, str]) -> Tuple[bool, bool]:
    """(redraw in place, colour) for this stream and environment."""
    try:
        tty = out.isatty()
    except (AttributeError, ValueError):
        tty = False
    screen = tty and environ.get("TERM", "") not in ("", "dumb")
    # no-color.org: NO_COLOR present and not empty turns colour off.
    return screen, screen and not environ.get("NO_COLOR")


def view(config: Config, out: Optional[TextIO] = None, stop: Optional[threading.Event] = None,
         environ: Optional[Mapping[str, str]] = None) -> int:
    """Run `bandwatch view` until the source ends or `stop` is set (SIGINT,
    SIGTERM, SIGHUP set it). Returns the exit code: 0, or 1 on a failure."""
    out = sys.stdout if out is None else out
    # No log line for the signal: it would land on the screen being restored.
    with stop_on_signals(stop or threading.Event(), None,
                         (signal.SIGINT, signal.SIGTERM, signal.SIGHUP)) as stopping:
        return _view(config, out, stopping, os.environ if environ is None else environ)


def _view(config: Config, out: TextIO, stop: threading.Event, environ: Mapping[str, str]) -> int:
    screen, colour = _modes(out, environ)
    output: _Output = _Screen(out, stop, colour) if screen else _Output(out, stop)
    try:
        source = open_source(config.source)
        source.open()
    except BandwatchError as exc:
        log.error("cannot open the source: %s", exc)
        return 1
    try:
        sink = ViewSink(REFRESH_S if screen else PLAIN_REFRESH_S)
        # The view looks and never writes: event ids count from 1 in memory
        # and no capture is kept, so a service running beside it on the same
        # state directory is left alone. Learned baselines are read from
        # there, and whatever the view learns stays in memory.
        state_dir = config.mqtt.queue_dir if config.mqtt else None
        monitor = Monitor(dataclasses.replace(config, capture=None), source, sink, ids=EventIds(),
                          state_dir=state_dir, read_only=True)
        live = _Live(monitor, sink, output)
        sink.refresh = live.refresh
        output.begin()
        try:
            monitor.run(stop)
            live.note = "source ended" if source.ended else "stopped"
            sink.tick(force=True)
        finally:
            output.end()
    except BandwatchError as exc:
        log.error("%s", exc)
        return 1
    finally:
        source.close()
    if output.broken and out is sys.stdout:
        # The reader went away: keep the interpreter's final flush quiet.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    return 0


__all__ = ["BandRow", "ChannelRow", "EventRow", "HealthRow", "Snapshot", "ViewSink", "bar", "next_limit", "share_of_limit",
           "plain_line", "render", "view"]
