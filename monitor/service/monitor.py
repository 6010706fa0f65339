"""The monitor: source -> ring -> spectrum -> bands -> rules -> delivery.

One thread does the measuring. Blocks from the source are scaled to the
unit and fed to the ring in pieces that end exactly on frame boundaries, so
every hop gives one frame and every `averages` frames one result. Stream
time is counted from samples (lost samples included), never from the clock.
"""

import logging
import math
import threading
import time
from typing import Callable, Dict, List, Optional, Tuple

import numpy as np

from ..analyse.bands import BandBank
from ..config import memory
from ..judge.baseline import Baseline, BaselineStore
from .capture import Capture
from ..analyse.units import quantity_unit
from ..config import Config
from ..errors import ConfigError
from ..deliver.base import Sink
from ..deliver.capture_message import capture_notice
from ..analyse.envelope import EnvelopeStage
from ..judge.health import Change, Health
from .notify import Notifier
from ..deliver.payloads import Payload, utc_now
from ..acquire.ring import Ring
from ..judge.levels import BAND_LEVELS, LevelMachine
from ..acquire.block import Block
from ..acquire.sources.base import Source
from ..deliver.event_ids import EventIds
from ..deliver.spectrum_payload import SpectrumSchedule, spectrum_payload
from ..analyse.spectrum import SpectralStage, Spectrum
from ..analyse.speed import SpeedTracker
from ..analyse.stats import time_stats
from ..acquire.scaling import warn_unscaled_counts
from .reload import merge
from .reporting import Reporter
from .results import BandState, CheckState, Observer, Result

log = logging.getLogger("bandwatch.pipeline")

# Longest wait for a block before the loop turns anyway (health, reload,
# stop, tickers). Not shorter: on a small board every turn of an idle loop
# costs CPU, and TCP sources hand over a block about every 0.5 s.
READ_TIMEOUT_S = 0.5
# A helper thread (the source's reader, the sink's publisher) silent this
# long is stuck: the watchdog pings stop, and systemd restarts the service.
STALL_S = 10.0


class Monitor:
    def __init__(
        self,
        config: Config,
        source: Source,
        sink: Sink,
        ids: Optional[EventIds] = None,
        clock: Callable[[], float] = time.monotonic,
        notifier: Optional[Notifier] = None,
        stall_s: float = STALL_S,
        state_dir: Optional[str] = None,
        read_only: bool = False,
    ) -> None:
        self.config = config
        self.source = source
        self.sink = sink
        self.ids = ids or EventIds()
        self.clock = clock
        self.notifier = notifier or Notifier(environ={})
        self.stall_s = stall_s
        self.baseline_store = BaselineStore(state_dir, read_only=read_only)
        self._stalled: Optional[str] = None
        self._reload_requested = threading.Event()
        self._loader: Optional[Callable[[], Config]] = None
        self.ring_kept = True
        self.node = config.node
        self.since = utc_now()
        self.results = 0
        self.latest: Optional[Result] = None
        self.reporter = Reporter(config.node, self.ids, config.source.channels, config.source.unit, self.since)
        self._observers: List[Observer] = []
        self._tickers: List[Callable[[], None]] = []
        self._build()

    def _build(self) -> None:
        cfg = self.config
        self.fs = self.source.sample_rate
        if not self.fs > 0:
            raise ValueError(f"the {self.source.describe()} source gives sample_rate={self.fs!r}; "
                             "a monitor needs the rate before it is built")
        if cfg.source.sample_rate <= 0:  # the rate came with the recording: the budget is checked now
            memory.check(cfg, self.fs)
        self.scale = np.asarray(cfg.source.scale, dtype=float)
        self._ring_scale = self.scale.reshape(-1, 1)  # one factor per ring row
        self.capture: Optional[Capture] = None
        if cfg.capture is not None:
            self.capture = Capture(cfg.capture, cfg.node, cfg.source.channels, cfg.source.unit, self.fs)
            self.capture.on_write = self._capture_written
        self._build_stages()
        self._build_rules(None)
        self._samples = 0  # stream position, lost samples included
        self._next_summary = 0.0
        self._spectra = SpectrumSchedule()
        self._rises: List[Payload] = []  # band events that rose at this result
        self._last_sample_at = self.clock()
        self._stream_s = 0.0
        self._counts_noted = False  # whether integer samples were seen (and a missing scale warned of)

    def _build_stages(self) -> None:
        """Ring and spectral stages: sized from [spectrum], allocated once."""
        cfg = self.config
        spec = cfg.spectrum
        channels = len(cfg.source.channels)
        self.ring = Ring(channels, spec.span)
        self.stage = SpectralStage(self.fs, spec.size, spec.window, spec.averages, channels)
        self.envelope: Optional[EnvelopeStage] = None
        if cfg.envelope is not None:
            self.envelope = EnvelopeStage(self.fs, spec.size, spec.window, spec.averages, channels,
                                          cfg.envelope.band_hz)
        self._pending = spec.size  # samples until the next frame
        self._hop = spec.hop  # a property of the config: read at every frame

    def _build_rules(self, previous: Optional[Dict[Tuple[str, Optional[str]], str]]) -> None:
        """Bands, speed, level machines and health checks. `previous` maps
        (name, channel) to the level held before a reload: a band or check
        that still exists keeps it (or the highest level it still has)."""
        cfg = self.config
        lines = cfg.spectrum.size // 2 + 1
        self.bank = BandBank(cfg.bands, cfg.source.channels, cfg.source.unit, self.stage.bin_hz, lines,
                             self.stage.window)
        old_speed = getattr(self, "speed", None)
        self.speed = SpeedTracker(cfg.speed)
        if old_speed is not None and old_speed.locked and cfg.speed.track:
            self.speed.speed_hz = old_speed.speed_hz
            self.speed.measured_s = old_speed.measured_s
        self.baseline_store.reload()  # a reset-baseline takes effect here
        self.baselines = [Baseline(b, cfg.source.channels[ch], self.baseline_store) for b, ch in self.bank.pairs]
        self.band_rules = [
            LevelMachine(list(zip(("warning", "alarm"), base.limits())), b.hysteresis, b.delay)
            for (b, _), base in zip(self.bank.pairs, self.baselines)
        ]
        # Per pair, its baseline if the band learns one (None: an update
        # could never change anything), so most values skip that call.
        self._learners = [base if b.baseline is not None else None
                          for (b, _), base in zip(self.bank.pairs, self.baselines)]
        self.health = Health(cfg.health, cfg.source.channels, self.fs, cfg.spectrum.span,
                             scale=cfg.source.scale, unit=cfg.source.unit)
        if previous:
            keyed = [((b.name, self.config.source.channels[ch]), rule)
                     for (b, ch), rule in zip(self.bank.pairs, self.band_rules)]
            keyed += [((c.name, c.channel), c.rule) for c in self.health.checks]
            for key, rule in keyed:
                if key in previous:
                    rule.hold(previous[key])

    def levels(self) -> Dict[Tuple[str, Optional[str]], str]:
        """Current level of every band (per channel) and health check."""
        out = {(b.name, self.config.source.channels[ch]): rule.level
               for (b, ch), rule in zip(self.bank.pairs, self.band_rules)}
        out.update({(c.name, c.channel): c.rule.level for c in self.health.checks})
        return out

    def add_observer(self, fn: Observer) -> None:
        """Call `fn(result)` in the measuring thread after every result, once
        its levels, events and summary are out. `fn` must return quickly; it
        may read the monitor's public views (`band_states`, `check_states`,
        `speed_mode`, `recent_stats`) but change nothing."""
        self._observers.append(fn)

    def add_ticker(self, fn: Callable[[], None]) -> None:
        """Call `fn()` at every turn of the measuring loop (at least every
        READ_TIMEOUT_S, samples or not), for a display that must move while no
        result comes. Same rules as an observer."""
        self._tickers.append(fn)

    def band_states(self) -> List[BandState]:
        """Every band on every channel, in the order of `Result.bands`."""
        latest = self.latest
        channels = self.config.source.channels
        out = []
        for i, ((band, ch), rule, base) in enumerate(zip(self.bank.pairs, self.band_rules, self.baselines)):
            limits = dict(rule.limits)
            out.append(BandState(band, channels[ch], quantity_unit(band.quantity, self.config.source.unit),
                                 latest.bands[i].value if latest is not None else None, rule.level,
                                 limits.get("warning"), limits.get("alarm"), base.learning))
        return out

    def check_states(self) -> List[CheckState]:
        """Every health check, in the order of the levels payload."""
        return [CheckState(c.name, c.channel, c.rule.level, c.value, c.unit) for c in self.health.checks]

    @property
    def speed_hz(self) -> Optional[float]:
        """The running speed now (None if unknown)."""
        return self.speed.speed_hz

    def speed_mode(self) -> str:
        """"tracked" (a clear peak now), "held" (the last tracked speed, no
        clear peak now) or "nominal"."""
        if self.speed.locked:
            return "tracked"
        if self.config.speed.track and self.speed.speed_hz != self.config.speed.nominal_hz:
            return "held"
        return "nominal"

    def recent_stats(self) -> Optional[Dict[str, np.ndarray]]:
        """Time-domain statistics per channel over the samples the next
        result covers (fewer at start); None with under two samples."""
        n = min(self.ring.count, self.config.spectrum.span)
        return time_stats(self.ring.latest(n)) if n >= 2 else None

    def request_reload(self, loader: Callable[[], Config]) -> None:
        """Ask for a reload with `loader` (it reads and checks the file);
        safe from a signal handler: the measuring loop does the work."""
        self._loader = loader
        self._reload_requested.set()

    def _reload(self) -> None:
        self._reload_requested.clear()
        assert self._loader is not None
        try:
            config = self._loader()
        except ConfigError as exc:
            log.error("reload refused, still running on the last good config: %s", exc)
            self._emit_health(self.health.on_config(True, self._stream_s))
            return
        refused = self.reload(config)
        for part in refused:
            log.warning("reload: %s changed; that needs a restart and was not applied", part)
        log.info("reloaded %s (%s)", config.path, "ring kept" if self.ring_kept else "ring restarted: [spectrum] changed")
        self._emit_health(self.health.on_config(False, self._stream_s))
        if self.latest is not None:
            self.sink.send("levels", self._levels_payload(self.latest))

    def reload(self, config: Config) -> List[str]:
        """Take a new config at the next result. Returns what could not be
        taken without a restart (each a sentence); those parts keep their old
        values. The ring is kept unless [spectrum] changed; levels are kept
        for bands and checks that still exist."""
        old = self.config
        new, refused = merge(old, config)
        levels = self.levels()
        self.config = new
        if (new.spectrum, new.envelope) != (old.spectrum, old.envelope):
            self._build_stages()
            self.ring_kept = False
        else:
            self.ring_kept = True
        self._build_rules(levels)
        return refused

    # ------------------------------------------------------------------ run

    def status(self, state: str) -> Payload:
        return self.reporter.status(state, self._stream_s)

    def run(self, stop: Optional[threading.Event] = None) -> None:
        """Measure until the source ends or `stop` is set."""
        stop = stop or threading.Event()
        self.sink.open(self.status("online"), self.status("offline"))
        try:
            while not stop.is_set():
                # The loop turns at least every READ_TIMEOUT_S; a hung stage,
                # reader or publisher stops the pings and systemd steps in.
                if self._making_progress():
                    self.notifier.watchdog()
                self.sink.tick()
                for tick in self._tickers:
                    tick()
                if self._reload_requested.is_set():
                    self._reload()
                block = self.source.read(READ_TIMEOUT_S)
                if block is None:
                    if self.source.ended:
                        break
                    quiet = self.clock() - self._last_sample_at
                    if self.capture is not None and quiet >= self.config.health.stale:
                        self.capture.cut(f"no samples for {quiet:.3g} s")
                    self._emit_health(self.health.on_quiet(quiet, self._stream_s)
                                      + self._on_delivery(self._stream_s))
                    continue
                self._last_sample_at = self.clock()
                self.feed(block)
        finally:
            self.notifier.stopping()
            if self.capture is not None:
                self.capture.flush()
            self.sink.close(self.status("offline"))

    def _making_progress(self) -> bool:
        """True while the source's and the sink's threads show signs of life."""
        now = time.monotonic()
        parts = [("the source's reader", self.source.heartbeat()), ("the publisher", self.sink.heartbeat())]
        stuck = next((name for name, at in parts if now - at > self.stall_s), None)
        if stuck != self._stalled:
            if stuck:
                log.error("%s has stalled for over %g s; stopping the watchdog pings", stuck, self.stall_s)
            else:
                log.info("%s is moving again; watchdog pings resume", self._stalled)
            self._stalled = stuck
        return stuck is None

    def status_line(self, result: Result) -> str:
        """One line for systemctl status: speed and the highest band level."""
        ranks = [BAND_LEVELS.index(rule.level) for rule in self.band_rules]
        speed = "speed unknown" if result.speed_hz is None else f"{result.speed_hz * 60:.0f} rpm"
        raised = sum(1 for rank in ranks if rank > 0)
        return (f"{self.node}: {speed}, {self.results} results, "
                f"{raised} band(s) raised, worst {BAND_LEVELS[max(ranks, default=0)]}")

    # ----------------------------------------------------------------- feed

    def feed(self, block: Block) -> None:
        """Take one block of raw samples through every stage."""
        if block.lost:
            # No frame may span a gap, so the ring fills afresh; the power of
            # the frames already averaged stays, so the gap costs one frame.
            # An outage longer than a result's span restarts the average:
            # spectra from before it describe another moment of the machine.
            self._samples += block.lost
            self.ring.clear()
            if block.lost >= self.config.spectrum.span:
                self.stage.reset()
                if self.envelope is not None:
                    self.envelope.reset()
            self._pending = self.config.spectrum.size
        if block.full_scale is not None and not self._counts_noted:
            self._counts_noted = True
            if not self.config.source.scale_given:
                warn_unscaled_counts(self.config.source, block.full_scale)
        n = block.samples.shape[0]
        counters = self.source.counters()
        self._stream_s = (self._samples + n - 1) / self.fs
        self._emit_health(self.health.on_block(
            block.samples, self._samples, block.lost, self._stream_s, block.full_scale, block.timestamp_us, counters
        ))
        samples = block.samples
        start = 0
        total = samples.shape[0]
        while start < total:
            take = min(total - start, self._pending)
            self.ring.write(samples[start : start + take], self._ring_scale)
            if self.capture is not None:
                # Piece by piece, as scaled in the ring: a trigger in the
                # frame below then falls exactly at the capture's newest sample.
                self.capture.feed(self.ring.latest(take), self._samples + take)
            start += take
            self._samples += take
            self._pending -= take
            if self._pending == 0:
                self._pending = self._hop
                self._frame()

    def _frame(self) -> None:
        frame = self.ring.latest(self.config.spectrum.size)
        spectrum = self.stage.push(frame)
        envelope = self.envelope.push(frame) if self.envelope is not None else None
        if spectrum is None:
            return
        stream_s = (self._samples - 1) / self.fs
        result = self._measure(spectrum, envelope, stream_s)
        self.latest = result
        self.results += 1
        if self.results == 1:
            self.notifier.ready(self.status_line(result))
        self._rises = []
        changed = self._apply_rules(result)
        changed |= self._emit_health(self.health.on_spectrum(spectrum, stream_s), result)
        changed |= self._emit_health(self._on_delivery(stream_s), result)
        if changed or self.results == 1:
            self.sink.send("levels", self._levels_payload(result))
        if stream_s >= self._next_summary:
            self.sink.send("summary", self._summary_payload(result))
            self.notifier.status(self.status_line(result))
            interval = self.config.summary_interval
            self._next_summary = (math.floor(stream_s / interval) + 1) * interval
        rises = self._spectra.take(self.config.evidence, stream_s, self._rises)
        if rises is not None:
            rows = self.reporter.band_rows(result.bands, self.band_rules, self.baselines)
            self.sink.send("spectrum", spectrum_payload(self.node, self.config, result, rows, rises))
        for observe in self._observers:
            observe(result)

    def _capture_written(self, path: str, meta: Payload) -> None:
        self.sink.send("capture", capture_notice(self.node, self._stream_s, path, meta))

    def _on_delivery(self, t: float) -> List[Change]:
        sink = self.sink  # events, spectra and captures: one `queue` check for all that can be lost
        return self.health.on_delivery(sink.dropped + sink.evidence_dropped, sink.queued + sink.evidence_queued, t,
                                       sink.held, sink.storage_fault())

    def _measure(self, spectrum: Spectrum, envelope: Optional[Spectrum], stream_s: float) -> Result:
        # The spectrum describes its samples as a whole: the speed read from
        # it belongs to their middle, half a span before stream_s.
        centre_s = stream_s - (self.config.spectrum.span - 1) / (2 * self.fs)
        speed_hz = self.speed.update(spectrum, centre_s)
        bands = self.bank.evaluate({"raw": spectrum, "envelope": envelope}, speed_hz)
        implausible = self.health.implausible_channels()
        if implausible:
            # Values no accelerometer makes raise a health fault, not band levels.
            bands = [v._replace(value=math.nan) if ch in implausible else v
                     for v, (_, ch) in zip(bands, self.bank.pairs)]
        return Result(
            stream_s=stream_s,
            speed_hz=speed_hz,
            spectrum=spectrum,
            bands=bands,
            bank=self.bank,
            envelope=envelope,
            speed_s=self.speed.measured_s,
        )

    # ---------------------------------------------------------------- rules

    def _apply_rules(self, result: Result) -> bool:
        changed = False
        t = result.stream_s
        for rule, learner, base, value in zip(self.band_rules, self._learners, self.baselines, result.bands):
            if learner is not None and learner.update(value.value, t):
                rule.set_limits(list(zip(("warning", "alarm"), base.limits())))
            change = rule.update(value.value, t)
            if change is None:
                continue
            changed = True
            event = self.reporter.band_event(value, change, base, result.stream_s, result.speed_hz,
                                             result.dominant_hz)
            rose = BAND_LEVELS.index(change[1]) > BAND_LEVELS.index(change[0])
            if self.capture is not None and rose:
                # Raw samples around the rise, named now, written `after` s later.
                event["capture"] = self.capture.trigger(self._samples, event)
            self.sink.send("event", event)
            if rose:
                self._rises.append(event)
            log.info("%s/%s %s -> %s at %.3g %s", value.name, value.channel, change[0], change[1],
                     value.value, value.unit)
        return changed

    def _emit_health(self, changes: List[Change], result: Optional[Result] = None) -> bool:
        """Publish health level changes. Outside a result (`result` None) the
        levels snapshot follows at once; within one, the caller sends it."""
        latest = result or self.latest
        for check, change in changes:
            event = self.reporter.health_event(check, change, self._stream_s,
                                               latest.speed_hz if latest else None,
                                               latest.dominant_hz if latest else None)
            self.sink.send("event", event)
            log.warning("health %s%s %s -> %s (%.3g %s)", check.name,
                        f"/{check.channel}" if check.channel else "", change[0], change[1],
                        check.value if check.value is not None else float("nan"), check.unit)
        if changes and result is None and self.latest is not None:
            self.sink.send("levels", self._levels_payload(self.latest))
        return bool(changes)

    # ------------------------------------------------------------- payloads

    def _levels_payload(self, result: Result) -> Payload:
        return self.reporter.levels(result.bands, self.band_rules, self.baselines, self.health, self._stream_s)

    def _summary_payload(self, result: Result) -> Payload:
        # Called within the frame that made `result`: the ring still holds
        # the samples the result covers (since the last gap, if one was nearer).
        stats = time_stats(self.ring.latest(min(self.ring.count, self.config.spectrum.span)))
        return self.reporter.summary(result, stats, self.band_rules, self.baselines)
