"""The text of `bandwatch view`: a `Snapshot` of what to show, and the pure
functions that turn one into screen lines (`render`) or one plain line
(`plain_line`). Pure, so a test can hand them a snapshot it made up.

Colour never carries meaning alone: the level word is always printed, and
without `colour` the lines hold no escape code at all.
"""

import math
from dataclasses import dataclass
from typing import List, Optional, Sequence, Tuple

EVENTS_SHOWN = 5

# Each band row shows numbers first: the value, both limits, and the value as
# a share of the next limit up (the one a rise would cross next; the top one
# once it is crossed). The bar is a plain proportion of the top limit (the
# alarm limit, or the warning limit where a band has only that), with no
# marks inside it: a full bar means "at or past the top limit", and the share
# column says by how much.
BAR_FILL, BAR_EMPTY, BAR_OVER = "=", " ", ">"
BAR_MIN, BAR_MAX = 8, 50

RESET = "\x1b[0m"  # ECMA-48 SGR reset, after a styled word
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
