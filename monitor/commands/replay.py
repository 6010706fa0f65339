"""`bandwatch replay`: the whole pipeline on a recording, as fast as the CPU allows.

The config's spectrum, speed, bands, rules and health apply; only the source
is swapped for the recording (kind "file", never paced). What goes where:

- stdout: every event, one JSON payload per line, field for field what the
  live run publishes on the event topic. Nothing else.
- stderr: logs, a progress bar when stderr is a terminal (at most ten
  updates a second, cleared at the end), and at the end a table per band
  and channel: limits, maximum and the stream time it came, time at or above
  warning and alarm (the hop durations of the results at or above the limit,
  summed), and the number of events; then the health events counted.
- `--plot PNG` (matplotlib, the `plot` extra): band trends against their
  limits, and the spectrum at the worst moment with the band edges marked.

Two replays of the same recording print the same bytes but for the wall-clock
`time` field: event ids count from 1 in memory (a replay never takes ids from
the live node's store), and the monitor's clock follows stream time, so the
`stale` check, which measures silence on the wall clock, never fires on a
file that is simply being read.

A replay leaves the node's state alone: no event ids taken from its store,
no captures written (`[capture]` is ignored, so events carry no `capture`
field), and bands with a `baseline` learn it from the recording itself, in
memory, as a node would that starts with the recording.

Gaps noted in a bandwatch recording (`"lost"` in its metadata, see
`record.py`) are put back as the losses they were, so a replay's stream
times and results match the live run's.

What is kept and the table are in `replay_tally.py`: the trend history for
the plot stays bounded however long the recording is, and the table's
numbers are exact whatever the length.
"""

import collections
import dataclasses
import logging
import math
import os
import sys
import threading
import time
from typing import Any, Dict, List, Optional, TextIO, Tuple

import numpy as np

from ..analyse.units import TO_SI, quantity_unit
from ..config import Config, check_rate
from ..deliver.base import Payload, Sink
from ..errors import BandwatchError, ConfigError
from ..deliver.payloads import encode
from ..service.monitor import Monitor, Result
from ..acquire.recording import RecordingError, RecordingReader, open_recording
from ..service.posix_signals import stop_on_signals
from ..acquire.sources import open_source
from ..acquire.block import Block
from ..acquire.sources.base import Source
from ..deliver.event_ids import EventIds
from .cli import EXIT_FAILURE, EXIT_OK, usage
from .replay_tally import History, Replayed, Tally, Worst, score as score_of, write_table

log = logging.getLogger("bandwatch.replay")

PROGRESS_INTERVAL_S = 0.1
PLOT_HINT = "pip install 'bandwatch[plot]'"


# ------------------------------------------------------------------ source


def _gap_notes(reader: RecordingReader) -> Dict[int, int]:
    """{file index of the first sample after a gap: samples lost there}."""
    raw = reader.metadata.get("lost", [])
    expected = "a list of [sample index, lost count] pairs, indices rising within the file"
    if not isinstance(raw, list):
        raise RecordingError(f"{reader.path}: metadata lost={raw!r} is not {expected}")
    notes: Dict[int, int] = {}
    last = 0
    for note in raw:
        ok = (isinstance(note, list) and len(note) == 2 and all(type(v) is int for v in note)
              and last <= note[0] <= reader.frames and note[1] > 0)
        if not ok:
            raise RecordingError(f"{reader.path}: metadata lost note {note!r} is not part of {expected}")
        last = note[0]
        notes[last] = notes.get(last, 0) + note[1]
    return notes


class _ReplaySource(Source):
    """The recording as a source: the file source's blocks, cut so that no
    block is longer than one hop (the blocks every replay has fed the
    health checks with), with the noted gaps put back as `Block.lost`."""

    kind = "file"

    def __init__(self, inner: Source, gaps: Dict[int, int], max_block: int) -> None:
        super().__init__(inner.config)
        self.inner = inner
        self.gaps = dict(gaps)
        self._gap_at = collections.deque(sorted(gaps))  # indices still ahead, first first
        self.max_block = max(1, max_block)
        self.position = 0  # samples of the file handed out
        self.sample_rate = inner.sample_rate
        self._pending: Optional[Block] = None

    def _open(self) -> None:
        self.inner.open()

    def _close(self) -> None:
        self.inner.close()

    def _read(self, timeout: float) -> Optional[Block]:
        if self._pending is None or not len(self._pending.samples):
            self._pending = self.inner.read(timeout)
            if self._pending is None:
                self.ended = self.inner.ended
                return None
        pending = self._pending
        n = min(len(pending.samples), self.max_block)
        lost = 0
        if self._gap_at and self._gap_at[0] == self.position:
            lost = self.gaps.pop(self._gap_at.popleft())
        if self._gap_at and self._gap_at[0] < self.position + n:
            n = self._gap_at[0] - self.position  # a gap starts a block of its own
        self._pending = pending._replace(samples=pending.samples[n:])
        self.position += n
        return pending._replace(samples=pending.samples[:n], lost=lost)


class _EventSink(Sink):
    """Writes event payloads to `out`, one JSON line each; counts them."""

    def __init__(self, out: TextIO, stop: threading.Event) -> None:
        self.out = out
        self.stop = stop
        self.counts: Dict[Tuple[str, str, Optional[str]], int] = {}
        self.closed = False

    def open(self, online: Payload, offline: Payload) -> None:
        pass

    def close(self, offline: Payload) -> None:
        pass

    def send(self, suffix: str, payload: Payload) -> None:
        if suffix != "event":
            return
        key = (payload["kind"], payload["name"], payload["channel"])
        self.counts[key] = self.counts.get(key, 0) + 1
        if self.closed:
            return
        try:
            self.out.write(encode(payload) + "\n")
            self.out.flush()
        except BrokenPipeError:
            # The reader went away (`| head`): stop instead of failing at exit.
            self.closed = True
            self.stop.set()
            try:
                os.dup2(os.open(os.devnull, os.O_WRONLY), self.out.fileno())
            except (OSError, AttributeError, ValueError):
                pass


# -------------------------------------------------------------- the run


def replay_config(config: Config, reader: RecordingReader) -> Config:
    """The config with its source replaced by the recording. Raises
    ConfigError when the config does not fit the recording."""
    src = config.source
    rate = float(reader.sample_rate)
    if reader.channels != len(src.channels):
        raise ConfigError(config.path, "source.channels",
                          f"lists {len(src.channels)} channel(s) ({', '.join(src.channels)}), but the "
                          f"recording {reader.path} holds {reader.channels}")
    if src.sample_rate > 0 and src.sample_rate != rate:
        raise ConfigError(config.path, "source.sample_rate",
                          f"is {src.sample_rate:g} Hz, but the recording {reader.path} was made at "
                          f"{reader.sample_rate} Hz; set it to {reader.sample_rate} (or use kind = \"file\")")
    if src.sample_rate <= 0:
        check_rate(config, rate)
    ours = "bandwatch_version" in reader.metadata
    scale = src.scale
    if ours:
        unit = reader.unit
        if unit not in TO_SI:
            raise RecordingError(f"{reader.path}: metadata unit={unit!r} is not one of {', '.join(TO_SI)}")
        # Values are already in the recorded unit; convert if the config differs.
        scale = (TO_SI[unit] / TO_SI[src.unit],) * len(src.channels)
    source = dataclasses.replace(src, kind="file", path=reader.path, realtime=False, sample_rate=rate,
                                 scale=scale, simulator=None)
    # A replay writes no captures: the recording already holds every sample.
    return dataclasses.replace(config, source=source, capture=None)


def replay(
    config: Config,
    recording: str,
    out: TextIO,
    stop: Optional[threading.Event] = None,
    keep_history: bool = False,
    progress: Optional["Progress"] = None,
) -> Replayed:
    """Run the pipeline on `recording`, events to `out`. Raises ConfigError
    or RecordingError when the two do not fit (nothing started), and
    BandwatchError on a failure while reading."""
    stop = stop or threading.Event()
    with open_recording(recording) as reader:
        cfg = replay_config(config, reader)
        gaps = _gap_notes(reader)
        frames = reader.frames
    spec = cfg.spectrum
    source = _ReplaySource(open_source(cfg.source), gaps, spec.hop)
    source.open()
    try:
        fs = source.sample_rate
        sink = _EventSink(out, stop)
        # The monitor's clock follows stream time: silence is never measured
        # on the wall clock while a file is read.
        monitor = Monitor(cfg, source, sink, ids=EventIds(),
                          clock=lambda: (source.samples + source.lost) / fs)
        rows = [(b.band.name, b.channel, b.unit, b.band.warning, b.band.alarm) for b in monitor.band_states()]
        tally = Tally(rows, spec.hop / fs)
        history = History(len(rows)) if keep_history else None
        reference = np.where(np.isfinite(tally.warning), tally.warning, tally.alarm)
        worst: List[Optional[Worst]] = [None]

        def observe(result: Result) -> None:
            values = np.array([b.value for b in result.bands], dtype=float)
            tally.add(result.stream_s, values)
            if history is not None:
                history.add(result.stream_s, values)
                rank, pair = score_of(values, reference)
                if worst[0] is None or rank > worst[0].score:
                    worst[0] = Worst(rank, bool(np.isfinite(reference).any()), pair, result)
            if progress is not None:
                progress.update(source.position / fs)

        monitor.add_observer(observe)
        monitor.run(stop)
    finally:
        source.close()
    if progress is not None:
        progress.clear()
    return Replayed(recording, cfg, fs, frames, source.position, source.lost, len(gaps) - len(source.gaps),
                    tally, sink.counts, history, worst[0], source.position < frames)


# -------------------------------------------------------------- progress


class Progress:
    """A one-line bar on a terminal, redrawn at most every `interval` s."""

    WIDTH = 30

    def __init__(self, stream: TextIO, total_s: float, interval: float = PROGRESS_INTERVAL_S) -> None:
        self.stream = stream
        self.total_s = total_s
        self.interval = interval
        self.started = time.monotonic()
        self._next = 0.0
        self._shown = 0

    def update(self, done_s: float) -> None:
        now = time.monotonic()
        if now < self._next:
            return
        self._next = now + self.interval
        share = min(1.0, done_s / self.total_s) if self.total_s > 0 else 1.0
        fill = int(round(share * self.WIDTH))
        elapsed = now - self.started
        speed = f"  {done_s / elapsed:.0f}x real time" if elapsed > 0 and done_s > 0 else ""
        text = (f"replay [{'#' * fill}{'.' * (self.WIDTH - fill)}] {share * 100:3.0f}%  "
                f"{done_s:.0f}/{self.total_s:.0f} s{speed}")
        # Carriage return last: a log line written meanwhile starts at column 0.
        self.stream.write(text.ljust(self._shown) + "\r")
        self.stream.flush()
        self._shown = len(text)

    def clear(self) -> None:
        if self._shown:
            self.stream.write(" " * self._shown + "\r")
            self.stream.flush()
            self._shown = 0


# ------------------------------------------------------------------ plot


def plot_available() -> bool:
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        return False
    return True


def draw_plot(rep: Replayed, path: str) -> None:
    """Band trends against their limits, one panel per band, and the
    spectrum at the worst moment with every band of its channel marked."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    assert rep.history is not None
    t, values = rep.history.arrays()
    cfg = rep.config
    tally = rep.tally
    bands = []  # (band config, [pair indices])
    for band in cfg.bands:
        pairs = [i for i, row in enumerate(tally.rows) if row[0] == band.name]
        bands.append((band, pairs))
    fig = Figure(figsize=(10, 2.0 * len(bands) + 3.6))
    FigureCanvasAgg(fig)
    axes = fig.subplots(len(bands) + 1, 1, squeeze=False)[:, 0]
    worst = rep.worst
    for k, (ax, (band, pairs)) in enumerate(zip(axes, bands)):
        if k:
            ax.sharex(axes[0])
        for i in pairs:
            ax.plot(t, values[:, i], lw=0.9, label=tally.rows[i][1])
        for limit, colour, label in ((band.warning, "tab:orange", "warning"), (band.alarm, "tab:red", "alarm")):
            if limit is not None:
                ax.axhline(limit, color=colour, ls="--", lw=1.0, label=f"{label} {limit:g}")
        if worst is not None:
            ax.axvline(worst.result.stream_s, color="0.5", ls=":", lw=1.0)
        unit = quantity_unit(band.quantity, cfg.source.unit)
        ax.set_title(f"{band.name}: {band.quantity}", loc="left", fontsize=9)
        ax.set_ylabel(unit)
        ax.set_ylim(bottom=0)
        ax.grid(True, alpha=0.3)
        ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=7, frameon=False)
    if bands:
        axes[len(bands) - 1].set_xlabel("stream time (s); dotted: the worst moment")
    _draw_spectrum(axes[-1], rep)
    fig.tight_layout()
    fig.savefig(path, dpi=100)


def _draw_spectrum(ax: Any, rep: Replayed) -> None:
    worst = rep.worst
    if worst is None:
        ax.text(0.5, 0.5, "no result: the recording is shorter than one result", ha="center",
                transform=ax.transAxes)
        ax.set_axis_off()
        return
    result = worst.result
    band_value = result.bands[worst.pair]
    band = rep.config.bands[[b.name for b in rep.config.bands].index(band_value.name)]
    kind = band.spectrum
    spectrum = result.envelope if kind == "envelope" and result.envelope is not None else result.spectrum
    ch = list(rep.config.source.channels).index(band_value.channel)
    amplitude = spectrum.rms_amplitude[ch][1:]
    freqs = spectrum.freqs[1:]  # DC has no place on a log frequency axis
    floor = amplitude[amplitude > 0].min() if (amplitude > 0).any() else 1e-12
    # Log-log: 1x near the bottom and a band at kHz are both readable.
    ax.loglog(freqs, np.maximum(amplitude, floor), lw=0.8, color="k")
    names = {b.name: b for b in rep.config.bands}
    shown = 0
    for k, value in enumerate(result.bands):
        if value.channel != band_value.channel or names[value.name].spectrum != kind:
            continue
        lo, hi = value.edges_hz
        chosen = k == worst.pair
        ax.axvspan(max(lo, freqs[0]), hi, color=f"C{k % 10}", alpha=0.35 if chosen else 0.12, lw=0)
        # Labels at the band's middle on the log axis, staggered so nested bands stay readable.
        ax.text(math.sqrt(max(lo, freqs[0]) * hi), 0.95 - 0.1 * (shown % 4), value.name,
                transform=ax.get_xaxis_transform(), ha="center", va="top", fontsize=7,
                fontweight="bold" if chosen else "normal")
        shown += 1
    ax.set_xlim(freqs[0], freqs[-1])
    relative = (f", {worst.score:.3g} x its {'warning' if band.warning is not None else 'alarm'} limit"
                if worst.relative and (band.warning is not None or band.alarm is not None) else "")
    what = "envelope spectrum" if kind == "envelope" else "spectrum"
    ax.set_title(f"{what} of {band_value.channel} at {result.stream_s:.1f} s, the worst moment: "
                 f"{band_value.name} {band_value.value:.3g} {band_value.unit}{relative}", loc="left",
                 fontsize=9)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel(f"RMS per line ({rep.config.source.unit})")
    ax.grid(True, which="both", alpha=0.2)


# --------------------------------------------------------------- command


def replay_command(config: Config, recording: str, plot: Optional[str] = None,
                   out: Optional[TextIO] = None, err: Optional[TextIO] = None) -> int:
    """`bandwatch replay -c FILE REC [--plot PNG]`; returns the exit code."""
    out = out or sys.stdout
    err = err or sys.stderr
    if plot is not None:
        if not plot_available():
            return usage("replay", f"--plot needs matplotlib, which is not installed: {PLOT_HINT}", err)
        folder = os.path.dirname(os.path.abspath(plot))
        if not os.path.isdir(folder):
            return usage("replay", f"cannot write {plot}: the folder {folder} does not exist", err)
    progress = None
    if err.isatty():
        try:
            with open_recording(recording) as reader:
                progress = Progress(err, reader.duration)
        except RecordingError:
            pass  # replay() reports it below
    with stop_on_signals(threading.Event(), "the replay") as stop:
        try:
            rep = replay(config, recording, out, stop, keep_history=plot is not None, progress=progress)
        except (ConfigError, RecordingError) as exc:
            if progress is not None:
                progress.clear()
            return usage("replay", str(exc), err)
        except BandwatchError as exc:
            if progress is not None:
                progress.clear()
            log.error("%s", exc)
            return EXIT_FAILURE
    write_table(rep, err)
    if plot is not None:
        try:
            draw_plot(rep, plot)
        except (OSError, ValueError) as exc:
            log.error("cannot write the plot %s: %s", plot, exc)
            return EXIT_FAILURE
        err.write(f"plot: {plot}\n")
    return EXIT_OK
