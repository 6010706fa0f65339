"""What a loaded config is: frozen dataclasses, and the names and limits a
config may use. `load.py` builds these from a TOML file and checks every
rule; everything else reads them. Imports nothing from the package.
"""

import re
from dataclasses import dataclass
from typing import Optional, Tuple

NAME_RE = re.compile(r"^[A-Za-z0-9_-]{1,64}\Z")  # \Z: "$" would pass a final newline
SOURCE_KINDS = ("serial", "tcp-client", "tcp-server", "udp", "file", "simulator")
FORMATS = ("frame", "csv")
UNITS = ("g", "m/s2")
WINDOWS = ("hann", "hamming", "blackman-harris", "flattop", "rectangular")
QUANTITIES = ("acceleration", "velocity", "displacement")
# The unit each quantity other than acceleration is reported in
# (acceleration keeps the source's unit; see analyse/units.py).
QUANTITY_UNITS = {"velocity": "mm/s", "displacement": "um"}
MAX_CHANNELS = 16
# ISO 10816-3:2009 Annex A (carried into ISO 20816-3:2022) zone boundaries of
# broadband RMS velocity, mm/s: warning at B/C, alarm at C/D. Written from
# memory of the standard.
SEVERITY_ZONES = {
    "group1-rigid": (4.5, 7.1),
    "group1-flexible": (7.1, 11.0),
    "group2-rigid": (2.8, 4.5),
    "group2-flexible": (4.5, 7.1),
}
MAX_SAMPLE_RATE = 1_000_000.0
MEMORY_MB = 256  # default [node] memory_mb: a 512 MB board, with room for the system and a broker

@dataclass(frozen=True)
class SimulatorConfig:
    """The invented machine the simulator source plays (see config/demo.toml)."""

    rpm: float
    harmonics: Tuple[float, ...]  # peak acceleration at 1x, 2x, ... in the unit
    growth: float  # rise of the 1x peak per minute of stream time, in the unit
    noise: float  # RMS of broadband noise, in the unit
    seed: int
    seconds: float  # stream seconds before the simulated run ends; 0 = never


@dataclass(frozen=True)
class SourceConfig:
    kind: str
    sample_rate: float
    channels: Tuple[str, ...]
    unit: str
    scale: Tuple[float, ...]  # one per channel
    format: str = "frame"
    device: str = ""
    baud: int = 115200
    host: str = "127.0.0.1"
    port: int = 0
    path: str = ""
    realtime: bool = False
    simulator: Optional[SimulatorConfig] = None
    # Whether `scale` was written in the file: integer recordings are only
    # read with a scale someone chose (the default 1.0 is counts as units).
    scale_given: bool = False

    @property
    def nyquist(self) -> float:
        return self.sample_rate / 2.0


@dataclass(frozen=True)
class SpectrumConfig:
    size: int = 4096
    overlap: float = 0.5
    window: str = "hann"
    averages: int = 4

    @property
    def hop(self) -> int:
        """Samples between results: size * (1 - overlap), rounded to a sample."""
        return self.size - int(round(self.size * self.overlap))

    @property
    def span(self) -> int:
        """Samples one result covers: `averages` frames, `hop` apart."""
        return self.size + (self.averages - 1) * self.hop


@dataclass(frozen=True)
class SpeedConfig:
    rpm: Optional[float] = None
    track: bool = False
    search_hz: Optional[Tuple[float, float]] = None

    @property
    def nominal_hz(self) -> Optional[float]:
        return None if self.rpm is None else self.rpm / 60.0


@dataclass(frozen=True)
class BandConfig:
    name: str
    channels: Tuple[str, ...]
    quantity: str
    hz: Optional[Tuple[float, float]] = None
    orders: Optional[Tuple[float, float]] = None
    warning: Optional[float] = None
    alarm: Optional[float] = None
    hysteresis: float = 0.1
    delay: float = 3.0
    spectrum: str = "raw"  # or "envelope"
    # Set when the edges come from a bearing's defect frequency (then
    # `orders` holds the resolved edges).
    bearing: Optional[str] = None
    defect: Optional[str] = None
    harmonic: int = 1
    # Limits relative to a learned typical value: `baseline` seconds of
    # learning, then warning/alarm at these multiples of it.
    baseline: Optional[float] = None
    warning_ratio: Optional[float] = None
    alarm_ratio: Optional[float] = None
    severity: Optional[str] = None  # an ISO 10816-3 preset, see SEVERITY_ZONES

    def edges_hz(self, speed_hz: Optional[float]) -> Tuple[float, float]:
        """Band edges in Hz, following the running speed for order bands."""
        if self.hz is not None:
            return self.hz
        assert self.orders is not None and speed_hz is not None
        return (self.orders[0] * speed_hz, self.orders[1] * speed_hz)


@dataclass(frozen=True)
class BearingConfig:
    name: str
    elements: int
    element_diameter: float
    pitch_diameter: float
    contact_angle: float = 0.0  # degrees



@dataclass(frozen=True)
class EnvelopeConfig:
    band_hz: Tuple[float, float]


@dataclass(frozen=True)
class HealthConfig:
    stale: float = 2.0  # s without samples
    window: float = 10.0  # s of stream over which counts are taken
    corrupt: float = 0.01  # share of frames rejected
    clipping: float = 0.001  # share of samples at full scale
    flatline: float = 5.0  # s without any change on a channel
    rate: float = 0.01  # relative disagreement of timestamps with sample_rate
    nyquist: float = 0.2  # share of power in the top 10 % below Nyquist
    # g: no vibration accelerometer measures this much (README, [health]);
    # a sample this large comes from a missing or wrong scale.
    implausible: float = 1000.0
    hysteresis: float = 0.2  # a fault clears below limit * (1 - hysteresis)
    hold: float = 10.0  # s below that before a fault clears
    blind: Optional[float] = None  # s of samples without a result; None: from [spectrum]


@dataclass(frozen=True)
class MqttConfig:
    host: str = "localhost"
    port: int = 1883
    prefix: str = "bandwatch"
    qos: int = 1
    summary_interval: float = 10.0
    keepalive: int = 30
    username: str = ""
    password_file: str = ""
    tls: bool = False
    ca_file: str = ""
    cert_file: str = ""  # client certificate (PEM), for brokers that ask for one
    key_file: str = ""
    queue_dir: str = "/var/lib/bandwatch"
    queue_limit: int = 10000
    spectrum_queue_limit: int = 500  # spectra kept on disk while the broker is away
    capture_queue_mb: float = 100.0  # captures kept on disk while the broker is away, MB


@dataclass(frozen=True)
class CaptureConfig:
    """Raw samples around an alarm, written as recordings."""

    seconds: float = 10.0  # kept before the trigger
    after: float = 5.0  # written after it
    keep: int = 20  # newest files kept; older ones are deleted
    dir: str = "/var/lib/bandwatch/captures"


@dataclass(frozen=True)
class EvidenceConfig:
    """Spectra sent for the analyst (monitor.deliver.spectrum_payload)."""

    spectrum_on_rise: bool = True  # with every rise of a band level
    spectrum_interval: float = 0.0  # stream seconds between spectra; 0: none
    spectrum_top_hz: Optional[float] = None  # highest line sent; None: Nyquist


@dataclass(frozen=True)
class Config:
    path: str
    node: str
    source: SourceConfig
    spectrum: SpectrumConfig
    speed: SpeedConfig
    bands: Tuple[BandConfig, ...]
    health: HealthConfig
    mqtt: Optional[MqttConfig]
    envelope: Optional[EnvelopeConfig] = None
    bearings: Tuple[BearingConfig, ...] = ()
    capture: Optional[CaptureConfig] = None
    evidence: EvidenceConfig = EvidenceConfig()
    # Used when there is no [mqtt] section: stdout still gets summaries.
    summary_interval: float = 10.0
    prefix: str = "bandwatch"
    memory_mb: int = MEMORY_MB  # the budget `check` holds the buffers to (config.memory)
