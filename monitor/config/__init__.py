"""The configuration: a TOML file read into frozen dataclasses.

`schema.py` says what a config is, `load.py` (with `table.py` and
`band_tables.py`) reads and checks one, `rates.py` holds the rules that need
the sample rate. The names below are the public surface other modules
import from `monitor.config`.
"""

from ..analyse.units import quantity_unit
from ..errors import ConfigError
from .load import load, load_mqtt, parse
from .rates import check_rate
from .schema import (
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
    EvidenceConfig,
    HealthConfig,
    MqttConfig,
    SimulatorConfig,
    SourceConfig,
    SpectrumConfig,
    SpeedConfig,
)

__all__ = [
    "FORMATS", "MAX_CHANNELS", "MAX_SAMPLE_RATE", "QUANTITIES", "QUANTITY_UNITS", "SEVERITY_ZONES",
    "SOURCE_KINDS", "UNITS", "WINDOWS",
    "BandConfig", "BearingConfig", "CaptureConfig", "Config", "ConfigError", "EnvelopeConfig", "EvidenceConfig",
    "HealthConfig", "MqttConfig", "SimulatorConfig", "SourceConfig", "SpectrumConfig", "SpeedConfig",
    "check_rate", "load", "load_mqtt", "parse", "quantity_unit",
]
