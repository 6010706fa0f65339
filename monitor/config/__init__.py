"""The configuration: a TOML file read into frozen dataclasses.

`load(path)` and `parse(text)` live in `load.py`; the names below are the
public surface other modules import from `monitor.config`.
"""

from ..errors import ConfigError
from .load import (
    FORMATS,
    MAX_CHANNELS,
    MAX_SAMPLE_RATE,
    QUANTITIES,
    QUANTITY_UNITS,
    SEVERITY_ZONES,
    SOURCE_KINDS,
    UNITS,
    WINDOWS,
    BandConfig,
    BearingConfig,
    CaptureConfig,
    Config,
    EnvelopeConfig,
    HealthConfig,
    MqttConfig,
    SimulatorConfig,
    SourceConfig,
    SpectrumConfig,
    SpeedConfig,
    load,
    parse,
    quantity_unit,
)

__all__ = [
    "FORMATS", "MAX_CHANNELS", "MAX_SAMPLE_RATE", "QUANTITIES", "QUANTITY_UNITS", "SEVERITY_ZONES",
    "SOURCE_KINDS", "UNITS", "WINDOWS",
    "BandConfig", "BearingConfig", "CaptureConfig", "Config", "ConfigError", "EnvelopeConfig",
    "HealthConfig", "MqttConfig", "SimulatorConfig", "SourceConfig", "SpectrumConfig", "SpeedConfig",
    "load", "parse", "quantity_unit",
]
