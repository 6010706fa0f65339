"""What one raw value is in the unit: `[source] scale`, the formula behind
it, and the rules for a recording's values.

A converter's counts become the unit through scale = full-scale range /
2^(bits-1) per count (a signed converter of `bits` bits spanning +-range).
The default scale, 1.0, takes every count as one unit, which is never right
for integers, so:

- a bandwatch recording says what its values are itself (floats are already
  in its unit; integers carry their unit per count in the metadata),
  converted to the config's unit;
- a float WAV from another tool is taken in the unit, times `[source] scale`;
- an integer WAV from another tool holds raw counts: it is read only with a
  scale someone chose, `replay --scale` or a `scale` written in `[source]`,
  and otherwise refused with the formula and a worked example;
- integer frames from a live stream without `scale` are read as they come
  (the sensor is the user's), with one warning naming the formula; the
  `implausible` health check catches what that makes.
"""

import logging
from typing import Optional, Tuple

from ..analyse.units import TO_SI
from ..config import ConfigError
from ..config.schema import SourceConfig
from .block import FULL_SCALE
from .recording import RecordingReader

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
            f"in {sample_type}: {EXAMPLE_RANGE_G:g} g / 2^{bits - 1} = {example:.6g} {per}"
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


def warn_unscaled_counts(source: SourceConfig, full_scale: float) -> None:
    """Log that integer samples arrive while `[source] scale` is left out."""
    kind = next((t for t, v in FULL_SCALE.items() if v == full_scale), "integer")
    log.warning("samples arrive as %s counts but [source] scale is not set, so each count is read as "
                "1 %s; %s", kind, source.unit, scale_hint(kind, source.unit, False) if kind in BITS
                else f"set scale = {source.unit} per count = full-scale range / 2^(bits-1)")
