"""The `bandwatch` command line, and what every subcommand shares.

Exit codes, here and nowhere else: 0 done; 2 bad usage or bad config
(nothing started); 1 failure at run time. Logs go to stderr, one line each,
with level names (set up here, the only place logging is configured); JSON
output goes to stdout.
"""

import argparse
import logging
import os
import signal
import sys
import threading
from typing import TYPE_CHECKING, Dict, List, Optional, TextIO

from .. import __version__
from ..analyse.units import quantity_unit
from ..config import Config, load
from ..errors import BandwatchError, ConfigError
from ..service.posix_signals import stop_on_signals

if TYPE_CHECKING:  # pragma: no cover
    from ..acquire.sources.base import Source

EXIT_OK, EXIT_FAILURE, EXIT_USAGE = 0, 1, 2

log = logging.getLogger("bandwatch")


def usage(command: str, message: str, err: TextIO) -> int:
    """Say on `err` what was wrong with how `command` was called; its exit code."""
    print(f"bandwatch: {command}: {message}", file=err)
    return EXIT_USAGE


def load_config(path: str, fit_recording: bool = True) -> Config:
    """The config at `path`; a file source's recording is opened and checked
    against it (rate, channels, Nyquist, scale) unless `fit_recording` is
    False. Raises ConfigError."""
    from ..acquire.recording_fit import fit_file_source

    config = load(path)
    return fit_file_source(config) if fit_recording else config


def open_source_or_fail(config: Config) -> "Optional[Source]":
    """The configured source, opened; or None once the reason is logged, and
    the command exits with EXIT_FAILURE."""
    from ..acquire.sources import open_source

    try:
        source = open_source(config.source)
        source.open()
    except BandwatchError as exc:
        log.error("cannot open the source: %s", exc)
        return None
    return source

# Commands promised by the interface whose work is not in this version yet.
_NOT_YET: Dict[str, str] = {}


LOG_LEVELS = ["debug", "info", "warning", "error"]


def _parser() -> argparse.ArgumentParser:
    # argparse itself exits with 2 on bad usage, as the interface wants.
    p = argparse.ArgumentParser(prog="bandwatch", description="Vibration band monitor for rotating machines.")
    p.add_argument("--version", action="version", version=f"bandwatch {__version__}")
    p.add_argument("--log-level", default="info", choices=LOG_LEVELS,
                   help="lowest level of log line written to stderr (default: info)")
    # The same option after the subcommand: SUPPRESS leaves the value given
    # before it (or the default) alone when it is not repeated there.
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--log-level", default=argparse.SUPPRESS, choices=LOG_LEVELS,
                        help="lowest level of log line written to stderr (default: info)")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    def with_config(name: str, text: str) -> argparse.ArgumentParser:
        cmd = sub.add_parser(name, help=text, description=text, parents=[common])
        cmd.add_argument("-c", "--config", required=True, metavar="FILE", help="the TOML config file")
        return cmd

    with_config("run", "run the monitor in the foreground until SIGTERM or SIGINT")
    with_config("check", "validate the config and print the resolved bands and spectral resolution")
    replay = with_config("replay", "run the pipeline on a recording as fast as possible")
    replay.add_argument("recording", metavar="REC", help="the WAV recording to replay (its rate, channel "
                        "count and samples replace the config's [source])")
    replay.add_argument("--plot", metavar="PNG", help="also draw band trends against their limits and the "
                        "spectrum at the worst moment into this PNG file (needs matplotlib)")
    replay.add_argument("--scale", metavar="S", help="what one stored value of a WAV from another tool is "
                        "in the unit (g per count for integers: full-scale range / 2^(bits-1)); one number, "
                        "or one per channel separated by commas; instead of [source] scale")
    record = with_config("record", "capture the configured source to a recording")
    record.add_argument("-o", "--output", required=True, metavar="REC",
                        help="the new WAV file to write (an existing file is never overwritten)")
    record.add_argument("--seconds", required=True, type=float, metavar="S",
                        help="seconds of samples to record (counted from samples, not the clock)")
    record.add_argument("--format", default="float32", choices=["float32", "int16", "int32"],
                        help="float32 (default): values in the unit, IEEE float WAV; int16 or int32: counts "
                        "as plain PCM, which every WAV reader opens, with one count's value in the metadata")
    record.add_argument("--full-scale", type=float, metavar="X", help="with int16 or int32: the largest "
                        "magnitude stored, in the unit (one count = X / 2^(bits-1)); default: the sensor's "
                        "own counts, or 1000 g for float samples")
    with_config("view", "live terminal view of band levels against limits")
    reset = with_config("reset-baseline", "forget learned baselines, so the service learns them afresh "
                        "(then: systemctl reload bandwatch)")
    reset.add_argument("bands", nargs="*", metavar="BAND", help="band names (default: every band with a baseline)")
    collect = with_config("collect", "file the events, spectra, captures and summaries of every node under "
                          "the [mqtt] prefix into a folder, for the analyst")
    collect.add_argument("-o", "--output", required=True, metavar="DIR",
                         help="the folder the messages are filed into, by node (made if missing)")
    collect.add_argument("--client-id", metavar="ID", help="MQTT client id of the persistent session "
                         "(default: fixed for this machine, prefix and folder)")
    b = with_config("bench", "measure how many times faster than real time the pipeline runs")
    b.add_argument("--seconds", type=float, default=120.0, metavar="S",
                   help="seconds of simulated signal to run through (default: 120)")
    return p


def _setup_logging(level: str) -> None:
    logging.basicConfig(
        stream=sys.stderr,
        level=getattr(logging, level.upper()),
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
    )


def main(argv: Optional[List[str]] = None) -> int:
    try:
        return _main(argv)
    except BrokenPipeError:
        # The reader went away (`bandwatch check ... | head`): not an error.
        # Point stdout at nothing so the interpreter's final flush is quiet.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return EXIT_OK


def _main(argv: Optional[List[str]]) -> int:
    args = _parser().parse_args(argv)
    _setup_logging(args.log_level)
    if args.command == "collect":  # reads only [mqtt]: runs away from any node
        from .collect import collect_command

        return collect_command(args.config, args.output, args.client_id)
    try:
        # replay stands the recording in for any source, and bench and
        # reset-baseline never open it: only the others need a file
        # source's recording, checked now.
        config = load_config(args.config, fit_recording=args.command in ("run", "check", "view", "record"))
    except ConfigError as exc:
        print(f"bandwatch: config error: {exc}", file=sys.stderr)
        return EXIT_USAGE
    if args.command == "check":
        print_check(config, sys.stdout)
        return EXIT_OK
    if args.command == "bench":
        from .bench import bench

        bench(config, sys.stdout, seconds=args.seconds)
        return EXIT_OK
    if args.command == "view":
        from .view import view

        return view(config, sys.stdout)
    if args.command == "reset-baseline":
        return _reset_baseline(config, args.bands)
    if args.command == "record":
        from .record import record_command

        return record_command(config, args.output, args.seconds, sample_type=args.format,
                              full_scale=args.full_scale)
    if args.command == "replay":
        from .replay import replay_command

        return replay_command(config, args.recording, args.plot, scale=args.scale)
    if args.command in _NOT_YET:
        print(f"bandwatch: {args.command}: {_NOT_YET[args.command]} is not available in this version",
              file=sys.stderr)
        return EXIT_USAGE
    return _run(config)


def _run(config: Config) -> int:
    from ..deliver import open_sink
    from ..service.notify import Notifier
    from ..service.monitor import Monitor
    from ..deliver.event_ids import EventIds

    monitor = None

    def on_hangup(_signum: int, _frame: object) -> None:
        # systemctl reload: re-read the file in the measuring loop.
        if monitor is not None:
            log.info("received SIGHUP, reloading %s", config.path)
            monitor.request_reload(lambda: load_config(config.path))

    signal.signal(signal.SIGHUP, on_hangup)
    source = open_source_or_fail(config)
    if source is None:
        return EXIT_FAILURE
    ids = None
    try:
        sink = open_sink(config)
        # Above every id the queue has stored: a lost id file cannot make ids repeat.
        ids = EventIds(config.mqtt.queue_dir if config.mqtt else None, floor=sink.last_event_id)
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


def _reset_baseline(config: Config, names: List[str]) -> int:
    from ..judge.baseline import BaselineStore, key

    learning = [b for b in config.bands if b.baseline is not None]
    unknown = [n for n in names if n not in {b.name for b in learning}]
    if unknown:
        return usage("reset-baseline", f"no band with a baseline named {', '.join(unknown)}; "
                     f"bands with one: {', '.join(b.name for b in learning) or 'none'}", sys.stderr)
    if not learning:
        print(f"bandwatch: reset-baseline: no band in {config.path} has a baseline; nothing to forget",
              file=sys.stderr)
        return EXIT_OK
    if config.mqtt is None:
        print("bandwatch: reset-baseline: without [mqtt] baselines are not stored (each run learns afresh)",
              file=sys.stderr)
        return EXIT_OK
    store = BaselineStore(config.mqtt.queue_dir)
    chosen = [b for b in learning if not names or b.name in names]
    keys = [key(b.name, ch) for b in chosen for ch in b.channels]
    if not any(k in store.entries for k in keys):
        # Nothing is written (no folder made) when nothing is learned yet.
        print(f"bandwatch: reset-baseline: nothing learned to forget in {store.path}", file=sys.stderr)
        return EXIT_OK
    removed = store.remove(keys)
    print(f"forgot {removed} learned baseline(s) in {store.path}; "
          "`systemctl reload bandwatch` makes the service learn them afresh")
    return EXIT_OK


def _recording_line(config: Config) -> str:
    """What `check` says of a file source's recording (already fitted)."""
    from ..acquire.recording import open_recording

    src = config.source
    with open_recording(src.path) as reader:
        kind = f"{reader.duration:.6g} s of {reader.sample_type}"
    scales = ", ".join(f"{s:.6g}" for s in sorted(set(src.scale)))
    return f"  recording {src.path}: {kind}; one stored value is {scales} {src.unit}\n"


def _limit(absolute: Optional[float], ratio: Optional[float]) -> str:
    """A limit as `check` prints it: the number, `x2.0 of learned`, or `-`."""
    if ratio is not None:
        text = f"{ratio:g}"
        return f"x{text}{'' if '.' in text or 'e' in text else '.0'} of learned"
    return "-" if absolute is None else f"{absolute:g}"


def _learned_lines(config: Config) -> List[str]:
    """The baselines a node has learned (in `queue_dir`) and the limits they
    give, or how each band will learn; read only, nothing is created."""
    from ..judge.baseline import BaselineStore, key

    learning = [b for b in config.bands if b.baseline is not None]
    if not learning:
        return []
    store = BaselineStore(config.mqtt.queue_dir if config.mqtt else None, read_only=True)
    lines = []
    for b in learning:
        unit = quantity_unit(b.quantity, config.source.unit)
        for ch in b.channels:
            value = store.get(key(b.name, ch), b.baseline or 0.0)
            if value is None:
                lines.append(f"  {b.name}/{ch}: learns its baseline over the first {b.baseline:g} s\n")
                continue
            limits = [f"{level} {ratio * value:.4g}" for level, ratio in (("warning", b.warning_ratio),
                                                                          ("alarm", b.alarm_ratio))
                      if ratio is not None]
            lines.append(f"  {b.name}/{ch}: learned {value:.4g} {unit}, so {', '.join(limits)} {unit}\n")
    return lines


def print_check(config: Config, out: TextIO) -> None:
    """The resolved config, as `bandwatch check` prints it."""
    from ..acquire.sources import available
    from ..analyse.bearings import bearing_orders
    from ..analyse.windows import Window
    from ..config import memory

    src = config.source
    spec = config.spectrum
    w = out.write
    w(f"config {config.path}: OK\n")
    w(f"node: {config.node}\n")
    rate = f"{src.sample_rate:g} Hz" if src.sample_rate > 0 else "rate from the recording"
    w(f"source: {src.kind}, {len(src.channels)} channel(s) ({', '.join(src.channels)}), {rate}, unit {src.unit}\n")
    if src.kind == "file":
        w(_recording_line(config))
    if not available(src.kind):
        w(f"  note: source kind {src.kind!r} is not available in this version; `run` will refuse it\n")
    w(f"spectrum: {spec.window} window, {spec.size} samples, overlap {spec.overlap:g}, {spec.averages} average(s)\n")
    if src.sample_rate > 0:
        fs = src.sample_rate
        window = Window(spec.window, spec.size)
        w(f"  bin width {fs / spec.size:.6g} Hz, frame {spec.size / fs:.6g} s, "
          f"result every {spec.hop / fs:.6g} s ({spec.hop} samples), each covering {spec.span / fs:.6g} s\n")
        w(f"  noise bandwidth {window.enbw_bins * fs / spec.size:.6g} Hz ({window.enbw_bins:.4g} bins), "
          f"Nyquist {fs / 2:g} Hz\n")
    sp = config.speed
    if sp.rpm is not None:
        tracked = f", tracked in {sp.search_hz[0]:g}..{sp.search_hz[1]:g} Hz" if sp.track and sp.search_hz else ""
        w(f"speed: {sp.rpm:g} rpm ({sp.rpm / 60:.6g} Hz) nominal{tracked}\n")
        if sp.track and sp.search_hz and sp.search_hz[1] > 2 * sp.search_hz[0]:
            lo, hi = sp.search_hz
            w(f"  warning: search_hz {lo:g}..{hi:g} Hz spans more than an octave ({hi / lo:.3g}:1), so it can "
              "hold 1x and a harmonic; the tracker then takes the lowest of a series, which a half-order "
              "line would fool; keep the range within an octave around 1x\n")
    else:
        w("speed: none given (order bands need [speed] rpm)\n")
    for bearing in config.bearings:
        orders = bearing_orders(bearing)
        w(f"bearing {bearing.name}: {bearing.elements} elements, d {bearing.element_diameter:g}, "
          f"D {bearing.pitch_diameter:g}, contact {bearing.contact_angle:g} deg; orders "
          + ", ".join(f"{k.upper()} {v:.4g}" for k, v in orders.items()) + "\n")
    if config.envelope is not None:
        lo, hi = config.envelope.band_hz
        w(f"envelope: carrier band {lo:g}..{hi:g} Hz, same frames and averaging as the spectrum\n")
    w(f"bands: {len(config.bands)}\n")
    if config.bands:
        rows = [("name", "channels", "edges (Hz)", "quantity", "unit", "warning", "alarm", "hyst", "delay")]
        for b in config.bands:
            lo, hi = b.edges_hz(sp.nominal_hz)
            edges = f"{lo:.6g}..{hi:.6g}"
            if b.severity is not None:
                edges += f" (ISO 10816-3 {b.severity})"
            elif b.bearing is not None:
                harmonic = f" x{b.harmonic}" if b.harmonic > 1 else ""
                edges += f" ({b.bearing} {b.defect}{harmonic})"
            elif b.orders is not None:
                edges += f" ({b.orders[0]:g}..{b.orders[1]:g}x)"
            if b.spectrum == "envelope":
                edges += " envelope"
            rows.append((
                b.name, ",".join(b.channels), edges, b.quantity, quantity_unit(b.quantity, src.unit),
                _limit(b.warning, b.warning_ratio), _limit(b.alarm, b.alarm_ratio),
                f"{b.hysteresis:g}", f"{b.delay:g} s",
            ))
        widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
        for r in rows:
            w("  " + "  ".join(cell.ljust(widths[i]) for i, cell in enumerate(r)).rstrip() + "\n")
        for line in _learned_lines(config):
            w(line)
    w(f"health: stale after {config.health.stale:g} s without samples\n")
    ev = config.evidence
    when = [label for label, on in (("with each band rise", ev.spectrum_on_rise),
                            (f"every {ev.spectrum_interval:g} s", ev.spectrum_interval > 0)) if on]
    top = "Nyquist" if ev.spectrum_top_hz is None else f"{ev.spectrum_top_hz:g} Hz"
    w(f"spectra: {' and '.join(when) or 'none'}, lines up to {top}\n")
    w(memory.summary(config))
    if config.mqtt is None:
        w("output: JSON lines on stdout (no [mqtt] section)\n")
    else:
        m = config.mqtt
        w(f"output: MQTT {m.host}:{m.port}, topics {m.prefix}/{config.node}/..., qos {m.qos}, "
          f"summary every {m.summary_interval:g} s\n")
        from ..deliver.exposure import warnings

        for text in warnings(m):
            w(f"warning: {text}\n")
