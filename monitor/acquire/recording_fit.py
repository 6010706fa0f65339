"""A config meets a recording: before anything starts, the recording's rate,
channel count and sample type are checked against the config, and what one
stored value means in the unit is settled.

- The rate comes from the recording. A file source that also gives
  `sample_rate` must agree; `replay`, which stands any config's source in
  for the recording, uses the recording's rate in place of the config's.
- The channel count must match `channels` (bands name those channels).
- No band, order band at its top speed, or envelope band may reach past the
  recording's Nyquist frequency (`config/rates.py`).
- What a stored value is in the unit (the scale the monitor multiplies by):
  a bandwatch recording says so itself (floats are already in its unit;
  integers carry their unit per count in the metadata), converted to the
  config's unit. A float WAV from another tool is taken in the unit, times
  `[source] scale`. An integer WAV from another tool holds raw counts: it is
  read only with a scale someone chose, `replay --scale` or `[source]
  scale` written in the file; the default 1.0 would call every count a g,
  so it is refused with the formula and a worked example.

Every misfit is a ConfigError, so the command exits 2 and nothing starts.
"""

import dataclasses
import logging
from typing import Optional, Tuple

from ..analyse.units import TO_SI
from ..config import Config, ConfigError, check_rate
from ..config.schema import SourceConfig
from .recording import RecordingError, RecordingReader, open_recording

log = logging.getLogger("bandwatch.sources")

BITS = {"uint8": 8, "int16": 16, "int24": 24, "int32": 32}
EXAMPLE_RANGE_G = 2.0  # the worked example's sensor: +-2 g full scale


def count_scale(range_: float, bits: int) -> float:
    """Unit per count of a signed `bits`-bit converter whose full scale is
    +-`range_` (in the unit): range / 2^(bits-1)."""
    return range_ / 2 ** (bits - 1)


def scale_hint(sample_type: str, unit: str, replaying: bool) -> str:
    """How to say what one count is, with a worked example for this type."""
    bits = BITS[sample_type]
    example = count_scale(EXAMPLE_RANGE_G, bits)
    if unit != "g":
        example *= TO_SI["g"] / TO_SI[unit]
    per = f"{unit} per count"
    where = "give replay --scale, or set [source] scale" if replaying else "set [source] scale"
    return (f"{where} = {per} = full-scale range / 2^(bits-1); e.g. a +-{EXAMPLE_RANGE_G:g} g sensor "
            f"recorded as {sample_type}: {EXAMPLE_RANGE_G:g} g / 2^{bits - 1} = {example:.6g} {per}"
            " (one number, or one per channel)")


def stored_scale(reader: RecordingReader, source: SourceConfig, scale: Optional[Tuple[float, ...]],
                 file: str, replaying: bool = False) -> Tuple[float, ...]:
    """What one stored value of `reader` is in `source.unit`, per channel.
    `scale` is a scale given on the command line (`replay --scale`), which
    wins over the config's. Raises ConfigError when nothing says it."""
    channels = len(source.channels)
    integer = reader.sample_type in BITS
    ours = "bandwatch_version" in reader.metadata
    per_count = reader.metadata.get("scale")
    if ours and (not integer or _scale_list(per_count, channels)):
        unit = reader.unit
        if unit not in TO_SI:
            raise ConfigError(file, "source", f"the recording {reader.path} gives unit={unit!r} in its "
                              f"metadata, not one of {', '.join(TO_SI)}")
        if scale is not None:
            raise ConfigError(file, "source.scale", f"{reader.path} is a bandwatch recording, whose "
                              "values carry their own scale; leave --scale out")
        if source.scale_given:
            log.info("%s is a bandwatch recording in %s: its own scale is used, not [source] scale",
                     reader.path, unit)
        stored = tuple(per_count) if integer else (1.0,) * channels
        return tuple(float(s) * TO_SI[unit] / TO_SI[source.unit] for s in stored)
    if scale is not None:
        return scale
    if integer and not source.scale_given:
        raise ConfigError(file, "source.scale",
                          f"the recording {reader.path} holds {reader.sample_type} counts, and nothing says "
                          f"what one count is in {source.unit} (the default 1.0 would make every count "
                          f"1 {source.unit}); " + scale_hint(reader.sample_type, source.unit, replaying))
    return source.scale


def _scale_list(value: object, channels: int) -> bool:
    return (isinstance(value, list) and len(value) == channels
            and all(isinstance(v, (int, float)) and v != 0 for v in value))


def fit(config: Config, reader: RecordingReader, scale: Optional[Tuple[float, ...]] = None,
        replacing: bool = False) -> Config:
    """`config` with its source the recording of `reader`: rate, scale and
    path filled in, after every check above. `replacing` when the config's
    source is stood in for (replay): its own kind and rate then do not count."""
    src = config.source
    file = config.path
    rate = float(reader.sample_rate)
    if reader.channels != len(src.channels):
        raise ConfigError(file, "source.channels",
                          f"lists {len(src.channels)} channel(s) ({', '.join(src.channels)}), but the "
                          f"recording {reader.path} holds {reader.channels}")
    if src.sample_rate > 0 and src.sample_rate != rate:
        if not replacing:
            raise ConfigError(file, "source.sample_rate",
                              f"is {src.sample_rate:g} Hz, but the recording {reader.path} was made at "
                              f"{reader.sample_rate} Hz; leave sample_rate out (the recording gives it) "
                              f"or set it to {reader.sample_rate}")
        log.warning("%s was recorded at %d Hz; the config's sample_rate = %g is replaced by it",
                    reader.path, reader.sample_rate, src.sample_rate)
    check_rate(config, rate)
    names = reader.channel_names
    if names is not None and names != list(src.channels):
        log.warning("%s: channels recorded as %s are read as %s", reader.path, ", ".join(names),
                    ", ".join(src.channels))
    factors = stored_scale(reader, src, scale, file, replaying=replacing)
    # The scale is settled now (scale_given): the monitor's warning about
    # counts read without one is for live streams.
    source = dataclasses.replace(src, kind="file", path=reader.path, sample_rate=rate, scale=factors, scale_given=True,
                                 realtime=src.realtime if src.kind == "file" and not replacing else False,
                                 simulator=None)
    return dataclasses.replace(config, source=source)


def fit_file_source(config: Config) -> Config:
    """A config whose source is `kind = "file"`, fitted to its recording;
    other configs unchanged. A recording that cannot be opened is a
    ConfigError on `source.path` (the file is part of the config)."""
    if config.source.kind != "file":
        return config
    try:
        with open_recording(config.source.path) as reader:
            return fit(config, reader)
    except RecordingError as exc:
        raise ConfigError(config.path, "source.path", str(exc)) from None
