"""A config meets a recording: before anything starts, the recording's rate,
channel count and sample type are checked against the config, and what one
stored value means in the unit is settled.

- The rate comes from the recording. A file source that also gives
  `sample_rate` must agree; `replay`, which stands any config's source in
  for the recording, uses the recording's rate in place of the config's.
- The channel count must match `channels` (bands name those channels).
- No band, order band at its top speed, or envelope band may reach past the
  recording's Nyquist frequency (`config/rates.py`); a file source's config
  must fit `[node] memory_mb` at the recording's rate (`config/memory.py`).
- What a stored value is in the unit (the scale the monitor multiplies by),
  by the rules in `scaling.py`.

Every misfit is a ConfigError, so the command exits 2 and nothing starts.
"""

import dataclasses
import logging
from typing import Optional, Tuple

from ..config import Config, ConfigError, check_rate, memory
from .recording import RecordingError, RecordingReader, open_recording
from .scaling import stored_scale

log = logging.getLogger("bandwatch.sources")

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
            fitted = fit(config, reader)
    except RecordingError as exc:
        raise ConfigError(config.path, "source.path", str(exc)) from None
    # The memory budget needs the rate, which only the recording gives.
    memory.check(fitted)
    return fitted
