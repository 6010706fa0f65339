"""The memory a config needs, and the budget it must fit (`[node] memory_mb`).

Every large buffer is allocated at start from the config, so its size is
known before anything runs: `plan` adds them up and `check` refuses a config
over the budget with the parts named, instead of a board that swaps, an
out-of-memory kill, or an allocation error at start. The sizes are upper
bounds of what each part holds once full (the capture ring, for one, is
touched gradually as it fills); `PROGRAM_MIB` stands for the interpreter,
numpy, paho-mqtt and SQLite's page cache (about 42 MiB measured on the
development machine, rounded up).
"""

from typing import List, NamedTuple, Optional

from ..errors import ConfigError
from .schema import MEMORY_MB, Config

MIB = 1 << 20
PROGRAM_MIB = 64
EVENT_BYTES = 1024  # an event payload held in memory, with Python's overhead (generous)
_STREAM_KINDS = ("serial", "tcp-client", "tcp-server", "udp")


class Part(NamedTuple):
    name: str
    bytes: int
    how: str  # how it follows from the config, for the error message


def plan(config: Config, sample_rate: Optional[float] = None) -> List[Part]:
    """The memory of each part of `config`, at `sample_rate` (default: the
    config's; a file source's rate may only be known from the recording)."""
    from ..acquire.sources.stream import QUEUE_MAX_VALUES, QUEUE_SECONDS
    from ..deliver.evidence_queue import HANDOFF_BYTES
    from ..deliver.queue import MEMORY_EVENTS
    from ..judge.baseline import MAX_VALUES

    fs = sample_rate if sample_rate is not None else config.source.sample_rate
    ch = len(config.source.channels)
    spec = config.spectrum
    lines = spec.size // 2 + 1
    parts = [Part("program", PROGRAM_MIB * MIB, "the interpreter and libraries")]
    # The spectral ring is float64 and doubled (see ring.py).
    parts.append(Part("sample ring", ch * 2 * spec.span * 8, f"{ch} channel(s) x 2 x {spec.span} samples x 8 bytes"))
    stages = 2 if config.envelope is not None else 1
    # Per stage and channel: the averaged power lines, the frame and the
    # transform's temporaries.
    parts.append(Part("spectra", stages * ch * (spec.averages * lines * 8 + spec.size * 32),
                      f"{stages} stage(s) x {ch} channel(s), {spec.averages} average(s) of {spec.size}"))
    if fs > 0 and config.source.kind in _STREAM_KINDS:
        values = min(int(round(QUEUE_SECONDS * fs)) * ch, QUEUE_MAX_VALUES)
        parts.append(Part("source queue", values * 8, f"{QUEUE_SECONDS:g} s of samples, at most "
                          f"{QUEUE_MAX_VALUES} values, x 8 bytes"))
    if config.capture is not None and fs > 0:
        seconds = config.capture.seconds + config.capture.after
        samples = int(round(config.capture.seconds * fs)) + int(round(config.capture.after * fs))
        parts.append(Part("capture ring", ch * samples * 4,
                          f"[capture] seconds + after = {seconds:g} s x {ch} channel(s) x {fs:g} Hz x 4 bytes"))
    if config.mqtt is not None:
        held = min(config.mqtt.queue_limit, MEMORY_EVENTS)
        parts.append(Part("event queue in memory", held * EVENT_BYTES,
                          f"{held} events while the disk refuses writes x {EVENT_BYTES} bytes"))
        parts.append(Part("spectra and captures in memory", HANDOFF_BYTES,
                          "waiting for the disk, at most (deliver/mqtt.py)"))
    learning = sum(len(b.channels) for b in config.bands if b.baseline is not None)
    if learning and fs > 0:
        results = max(b.baseline or 0.0 for b in config.bands) * fs / spec.hop
        # Each learner grows its array by doubling, and halves it past MAX_VALUES.
        per = min(max(1024, 2 * int(results)), 2 * MAX_VALUES) * 8
        parts.append(Part("baselines", learning * per, f"{learning} band channel(s) learning"))
    return parts


def budget(config: Config) -> int:
    return config.memory_mb * MIB


def check(config: Config, sample_rate: Optional[float] = None, line: Optional[int] = None) -> List[Part]:
    """The plan, or ConfigError naming the parts when it is over the budget
    (`line`: where [node] or its memory_mb is, for the message)."""
    parts = plan(config, sample_rate)
    total = sum(p.bytes for p in parts)
    if total > budget(config):
        ranked = sorted(parts, key=lambda p: -p.bytes)
        detail = "; ".join(f"{p.name} {mib(p.bytes)} MiB ({p.how})" for p in ranked if p.bytes >= MIB)
        raise ConfigError(
            config.path, "node.memory_mb",
            f"this config needs about {mib(total)} MiB, over the budget of {config.memory_mb} MiB: {detail}; "
            "make the largest part smaller, or raise memory_mb if the board has the room",
            line,
        )
    return parts


def mib(n: int) -> str:
    value = n / MIB
    return f"{value:.0f}" if value >= 100 else f"{value:.3g}"


def summary(config: Config) -> str:
    """One line for `bandwatch check`: the total against the budget, by part."""
    parts = plan(config)
    total = sum(p.bytes for p in parts)
    text = (f"memory: about {mib(total)} MiB of the {config.memory_mb} MiB budget ([node] memory_mb): "
            + ", ".join(f"{p.name} {mib(p.bytes)}" for p in parts))
    if config.source.sample_rate <= 0:
        text += "; the parts that follow the sample rate are counted when the recording is opened"
    return text + "\n"
