"""Load a bandwatch TOML config and check every rule before anything starts.

The file is parsed with tomllib (tomli before Python 3.11). Each section is
read by a `_Table` that knows its key path, so an error can name the file, the
key (``band[2].hz``), the bad value, what was expected and, where the key can
be found in the text, its line. Keys nobody asked for are errors: a typo must
not silently fall back to a default.
"""

import math
import re
import sys
from dataclasses import dataclass
from typing import Any, Dict, List, Optional, Sequence, Tuple

from .bearings import DEFECTS, defect_orders
from .errors import ConfigError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on old Pythons only
    import tomli as tomllib

NAME_RE = re.compile(r"^[A-Za-z0-9_-]{1,64}\Z")  # \Z: "$" would pass a final newline
SOURCE_KINDS = ("serial", "tcp-client", "tcp-server", "udp", "file", "simulator")
FORMATS = ("frame", "csv")
UNITS = ("g", "m/s2")
WINDOWS = ("hann", "hamming", "blackman-harris", "flattop", "rectangular")
QUANTITIES = ("acceleration", "velocity", "displacement")
QUANTITY_UNITS = {"velocity": "mm/s", "displacement": "um"}
MAX_CHANNELS = 16
# ISO 10816-3:2009 Annex A (carried into ISO 20816-3:2022) zone boundaries of
# broadband RMS velocity, mm/s: warning at B/C, alarm at C/D. Written from
# memory of the standard (the shared check values say so too).
SEVERITY_ZONES = {
    "group1-rigid": (4.5, 7.1),
    "group1-flexible": (7.1, 11.0),
    "group2-rigid": (2.8, 4.5),
    "group2-flexible": (4.5, 7.1),
}
MAX_SAMPLE_RATE = 1_000_000.0

# Which [source] keys each kind takes, beyond kind, sample_rate, channels, unit.
_KIND_KEYS = {
    "serial": {"format", "scale", "device", "baud"},
    "tcp-client": {"format", "scale", "host", "port"},
    "tcp-server": {"format", "scale", "host", "port"},
    "udp": {"format", "scale", "host", "port"},
    "file": {"scale", "path", "realtime"},
    "simulator": {
        "realtime",
        "sim_rpm",
        "sim_harmonics",
        "sim_growth",
        "sim_noise",
        "sim_seed",
        "sim_seconds",
    },
}


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

    def orders(self) -> Dict[str, float]:
        return defect_orders(self.elements, self.element_diameter, self.pitch_diameter, self.contact_angle)


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
    """Spectra sent for the analyst (monitor.spectrum_payload)."""

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


def quantity_unit(quantity: str, source_unit: str) -> str:
    """The unit a band of this quantity is reported in."""
    return QUANTITY_UNITS.get(quantity, source_unit)


# ---------------------------------------------------------------------------
# Reading tables with key paths and line numbers


def _show(value: Any) -> str:
    if isinstance(value, str):
        return repr(value)
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, dict):
        return "a table"
    if isinstance(value, list):
        return "[" + ", ".join(_show(v) for v in value) + "]"
    return repr(value)


def _type_name(value: Any) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, int):
        return "an integer"
    if isinstance(value, float):
        return "a number"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list):
        return "an array"
    if isinstance(value, dict):
        return "a table"
    return type(value).__name__


class _Locator:
    """Find the line of a key path in the TOML text, for error messages.

    A best effort over the common layout (one key per line under [table] or
    [[array]] headers). When the key cannot be found, errors simply omit the
    line.
    """

    _header = re.compile(r"^\s*(\[\[?)\s*([A-Za-z0-9_.-]+)\s*\]\]?")
    _key = re.compile(r"^\s*([A-Za-z0-9_-]+)\s*=")

    def __init__(self, text: str) -> None:
        self.lines: Dict[Tuple[str, Optional[int], Optional[str]], int] = {}
        table, index = "", None
        counts: Dict[str, int] = {}
        for number, line in enumerate(text.splitlines(), start=1):
            m = self._header.match(line)
            if m:
                table = m.group(2)
                if m.group(1) == "[[":
                    counts[table] = counts.get(table, 0) + 1
                    index = counts[table]
                else:
                    index = None
                self.lines.setdefault((table, index, None), number)
                continue
            m = self._key.match(line)
            if m:
                self.lines.setdefault((table, index, m.group(1)), number)

    def find(self, table: str, index: Optional[int], key: Optional[str]) -> Optional[int]:
        found = self.lines.get((table, index, key))
        if found is None and key is not None:
            found = self.lines.get((table, index, None))
        return found


class _Table:
    """One TOML table being read: hands out keys, remembers which were used."""

    def __init__(
        self,
        data: Dict[str, Any],
        file: str,
        locator: _Locator,
        table: str,
        index: Optional[int] = None,
    ) -> None:
        self.data = data
        self.file = file
        self.locator = locator
        self.table = table
        self.index = index
        self.used: set = set()
        self.asked: set = set()  # every key a reader looked for, present or not

    def path(self, key: Optional[str]) -> str:
        base = self.table if self.index is None else f"{self.table}[{self.index}]"
        return base if key is None else f"{base}.{key}"

    def fail(self, key: Optional[str], problem: str) -> ConfigError:
        line = self.locator.find(self.table, self.index, key)
        return ConfigError(self.file, self.path(key), problem, line)

    def bad(self, key: str, value: Any, expected: str) -> ConfigError:
        return self.fail(key, f"expected {expected}, got {_show(value)}")

    def has(self, key: str) -> bool:
        self.asked.add(key)
        return key in self.data

    def raw(self, key: str) -> Any:
        self.asked.add(key)
        self.used.add(key)
        return self.data[key]

    def get_str(self, key: str, default: Optional[str] = None, choices: Sequence[str] = ()) -> str:
        if not self.has(key):
            if default is None:
                raise self.fail(key, "missing; this key is required")
            return default
        value = self.raw(key)
        if not isinstance(value, str):
            raise self.bad(key, value, "a string")
        if choices and value not in choices:
            raise self.bad(key, value, "one of " + ", ".join(repr(c) for c in choices))
        return value

    def get_name(self, key: str, default: Optional[str] = None) -> str:
        value = self.get_str(key, default)
        if not NAME_RE.match(value):
            raise self.bad(key, value, "1 to 64 characters of A-Z a-z 0-9 _ -")
        return value

    def get_bool(self, key: str, default: bool) -> bool:
        if not self.has(key):
            return default
        value = self.raw(key)
        if not isinstance(value, bool):
            raise self.bad(key, value, "true or false")
        return value

    def get_int(self, key: str, default: Optional[int], lo: int, hi: int) -> int:
        if not self.has(key):
            if default is None:
                raise self.fail(key, "missing; this key is required")
            return default
        value = self.raw(key)
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.bad(key, value, f"an integer from {lo} to {hi}")
        if not lo <= value <= hi:
            raise self.bad(key, value, f"an integer from {lo} to {hi}")
        return value

    def _number(self, key: str, value: Any, expected: str) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.bad(key, value, expected)
        number = float(value)
        if not math.isfinite(number):
            raise self.bad(key, value, expected)
        return number

    def get_float(
        self,
        key: str,
        default: Optional[float],
        lo: float = -math.inf,
        hi: float = math.inf,
        lo_open: bool = False,
        expected: str = "",
    ) -> float:
        if not self.has(key):
            if default is None:
                raise self.fail(key, "missing; this key is required")
            return default
        value = self.raw(key)
        if not expected:
            low = f"> {lo:g}" if lo_open else f">= {lo:g}"
            expected = f"a number {low}" + ("" if hi == math.inf else f" and <= {hi:g}")
        number = self._number(key, value, expected)
        if number < lo or (lo_open and number == lo) or number > hi:
            raise self.bad(key, value, expected)
        return number

    def get_optional_float(self, key: str, lo_open_at: float = 0.0) -> Optional[float]:
        if not self.has(key):
            return None
        return self.get_float(key, None, lo=lo_open_at, lo_open=True)

    def get_pair(self, key: str, lo: float, hi: float, what: str) -> Tuple[float, float]:
        value = self.raw(key)
        expected = f"[low, high] with {what}"
        if not isinstance(value, list) or len(value) != 2:
            raise self.bad(key, value, expected)
        a = self._number(key, value[0], expected)
        b = self._number(key, value[1], expected)
        if not (lo <= a < b <= hi):
            raise self.bad(key, value, expected)
        return (a, b)

    def get_list(self, key: str) -> List[Any]:
        value = self.raw(key)
        if not isinstance(value, list):
            raise self.bad(key, value, "an array")
        return value

    def table_of(self, key: str) -> Optional[Dict[str, Any]]:
        if not self.has(key):
            return None
        value = self.raw(key)
        if not isinstance(value, dict):
            raise self.bad(key, value, "a table [" + key + "]")
        return value

    def finish(self) -> None:
        """Refuse every key that was not read, naming the keys this table takes."""
        for key in self.data:
            if key not in self.used:
                known = ", ".join(sorted(self.asked))
                raise self.fail(key, f"unknown key; expected one of {known}")


# ---------------------------------------------------------------------------
# Sections


def _read_node(t: _Table) -> str:
    name = t.get_name("name")
    t.finish()
    return name


def _read_simulator(t: _Table, speed_rpm: Optional[float]) -> SimulatorConfig:
    rpm = t.get_float("sim_rpm", speed_rpm if speed_rpm is not None else 1480.0, lo=0.0, lo_open=True)
    harmonics: Tuple[float, ...] = (0.02, 0.008, 0.004)
    if t.has("sim_harmonics"):
        values = t.get_list("sim_harmonics")
        expected = "an array of 1 to 32 numbers >= 0 (peak at 1x, 2x, ...)"
        if not 1 <= len(values) <= 32:
            raise t.bad("sim_harmonics", values, expected)
        harmonics = tuple(t._number("sim_harmonics", v, expected) for v in values)
        if min(harmonics) < 0:
            raise t.bad("sim_harmonics", values, expected)
    return SimulatorConfig(
        rpm=rpm,
        harmonics=harmonics,
        growth=t.get_float("sim_growth", 0.0, lo=0.0),
        noise=t.get_float("sim_noise", 0.005, lo=0.0),
        seed=t.get_int("sim_seed", 0, 0, 2**32 - 1),
        seconds=t.get_float("sim_seconds", 0.0, lo=0.0),
    )


def _read_source(t: _Table, speed_rpm: Optional[float]) -> SourceConfig:
    kind = t.get_str("kind", None, SOURCE_KINDS)
    allowed = _KIND_KEYS[kind] | {"kind", "sample_rate", "channels", "unit"}
    for key in t.data:
        if key not in allowed and any(key in keys for keys in _KIND_KEYS.values()):
            raise t.fail(key, f"does not apply to kind = {kind!r}")

    if kind == "file":
        sample_rate = t.get_float("sample_rate", 0.0, lo=0.0, hi=MAX_SAMPLE_RATE)
    else:
        sample_rate = t.get_float("sample_rate", None, lo=0.0, hi=MAX_SAMPLE_RATE, lo_open=True)

    if not t.has("channels"):
        raise t.fail("channels", "missing; this key is required")
    channels = t.get_list("channels")
    expected = f"an array of 1 to {MAX_CHANNELS} distinct names of A-Z a-z 0-9 _ -"
    if not 1 <= len(channels) <= MAX_CHANNELS or len(set(map(str, channels))) != len(channels):
        raise t.bad("channels", channels, expected)
    for name in channels:
        if not isinstance(name, str) or not NAME_RE.match(name):
            raise t.bad("channels", channels, expected)

    unit = t.get_str("unit", "g", UNITS)
    scale: Tuple[float, ...] = (1.0,) * len(channels)
    if t.has("scale"):
        value = t.raw("scale")
        expected = f"a non-zero number, or an array of {len(channels)} (one per channel)"
        if isinstance(value, list):
            if len(value) != len(channels):
                raise t.bad("scale", value, expected)
            scale = tuple(t._number("scale", v, expected) for v in value)
        else:
            scale = (t._number("scale", value, expected),) * len(channels)
        if any(s == 0 for s in scale):
            raise t.bad("scale", value, expected)

    out: Dict[str, Any] = dict(
        kind=kind, sample_rate=sample_rate, channels=tuple(channels), unit=unit, scale=scale
    )
    if kind in ("serial", "tcp-client", "tcp-server", "udp"):
        out["format"] = t.get_str("format", "frame", FORMATS)
    if kind == "serial":
        out["device"] = t.get_str("device")
        if not out["device"]:
            raise t.bad("device", "", "a serial device path such as /dev/ttyACM0")
        out["baud"] = t.get_int("baud", 115200, 50, 12_000_000)
    if kind in ("tcp-client", "tcp-server", "udp"):
        default_host = None if kind == "tcp-client" else "127.0.0.1"
        out["host"] = t.get_str("host", default_host)
        if not out["host"]:
            raise t.bad("host", "", "a host name or address")
        out["port"] = t.get_int("port", None, 1, 65535)
    if kind == "file":
        out["path"] = t.get_str("path")
        if not out["path"]:
            raise t.bad("path", "", "the path of a WAV recording")
    if kind in ("file", "simulator"):
        out["realtime"] = t.get_bool("realtime", kind == "simulator")
    if kind == "simulator":
        out["simulator"] = _read_simulator(t, speed_rpm)
    t.finish()
    return SourceConfig(**out)


def _read_spectrum(t: _Table) -> SpectrumConfig:
    size = t.get_int("size", 4096, 256, 65536)
    if size & (size - 1):
        raise t.bad("size", size, "a power of two from 256 to 65536")
    spec = SpectrumConfig(
        size=size,
        overlap=t.get_float("overlap", 0.5, lo=0.0, hi=0.9),
        window=t.get_str("window", "hann", WINDOWS),
        averages=t.get_int("averages", 4, 1, 64),
    )
    t.finish()
    return spec


def _read_speed(t: _Table, nyquist: float) -> SpeedConfig:
    rpm = t.get_optional_float("rpm")
    track = t.get_bool("track", False)
    search = None
    if t.has("search_hz"):
        search = t.get_pair("search_hz", 0.0, nyquist, f"0 <= low < high <= {nyquist:g} (Nyquist)")
        if search[0] <= 0:
            raise t.bad("search_hz", list(search), f"[low, high] with 0 < low < high <= {nyquist:g}")
    if track and search is None:
        raise t.fail("search_hz", "missing; required when track = true")
    if track and rpm is None:
        raise t.fail("rpm", "missing; required when track = true (the speed used until a peak is found)")
    if track and rpm is not None and search is not None and not search[0] <= rpm / 60.0 <= search[1]:
        raise t.bad("rpm", rpm, f"a speed inside search_hz ({search[0]:g}..{search[1]:g} Hz = "
                    f"{search[0] * 60:g}..{search[1] * 60:g} rpm)")
    t.finish()
    return SpeedConfig(rpm=rpm, track=track, search_hz=search)


def _read_bearing(t: _Table) -> BearingConfig:
    bearing = BearingConfig(
        name=t.get_name("name"),
        elements=t.get_int("elements", None, 1, 200),
        element_diameter=t.get_float("element_diameter", None, lo=0.0, lo_open=True),
        pitch_diameter=t.get_float("pitch_diameter", None, lo=0.0, lo_open=True),
        contact_angle=t.get_float("contact_angle", 0.0, lo=0.0, hi=60.0),
    )
    if not bearing.element_diameter < bearing.pitch_diameter:
        raise t.bad("pitch_diameter", bearing.pitch_diameter,
                    f"a pitch diameter above element_diameter ({bearing.element_diameter:g})")
    t.finish()
    return bearing


def _order_limit(t: _Table, key: str, value: Any, orders: Tuple[float, float], source: SourceConfig,
                 speed: SpeedConfig) -> None:
    """Refuse order edges whose top, at the highest speed possible, passes Nyquist."""
    assert speed.rpm is not None
    top_hz = speed.search_hz[1] if speed.track and speed.search_hz else speed.rpm / 60.0
    nyquist = source.nyquist
    if nyquist > 0 and orders[1] * top_hz > nyquist:
        raise t.bad(key, value, f"a high edge at most {nyquist / top_hz:g} orders: "
                    f"{orders[1]:g} x {top_hz:g} Hz is above the Nyquist frequency {nyquist:g} Hz")


# Limit keys of the first release. Refused rather than read as aliases, so a
# file says exactly one thing and the user learns the new word once.
RENAMED_BAND_KEYS = {"alert": "warning", "danger": "alarm",
                     "alert_ratio": "warning_ratio", "danger_ratio": "alarm_ratio"}


def _read_band(t: _Table, source: SourceConfig, speed: SpeedConfig,
               bearings: Dict[str, BearingConfig]) -> BandConfig:
    for old, new in RENAMED_BAND_KEYS.items():
        if t.has(old):
            raise t.fail(old, f"renamed; use {new}")
    name = t.get_name("name")
    if t.has("channel") and t.has("channels"):
        raise t.fail("channels", "give channel or channels, not both")
    if t.has("channel"):
        channel = t.get_str("channel")
        if channel not in source.channels:
            raise t.bad("channel", channel, "one of the source channels " + ", ".join(source.channels))
        channels: Tuple[str, ...] = (channel,)
    elif t.has("channels"):
        values = t.get_list("channels")
        expected = "a non-empty array of distinct source channels (" + ", ".join(source.channels) + ")"
        if not values or len(set(map(str, values))) != len(values) or any(v not in source.channels for v in values):
            raise t.bad("channels", values, expected)
        channels = tuple(values)
    else:
        channels = source.channels

    nyquist = source.nyquist
    hz = orders = None
    bearing = defect = None
    harmonic = 1
    severity = None
    if t.has("severity"):
        severity = t.get_str("severity", None, tuple(SEVERITY_ZONES))
        for key in ("hz", "orders", "bearing", "quantity", "warning", "alarm", "spectrum"):
            if t.has(key):
                raise t.fail(key, f"severity = {severity!r} sets the edges, quantity and limits; "
                                  f"leave {key} out, or drop severity and give them all")
        # ISO 10816-3: 10-1000 Hz above 600 r/min, 2-1000 Hz for 120-600 r/min.
        low = 2.0 if speed.rpm is not None and speed.rpm <= 600 else 10.0
        hz = (low, min(1000.0, nyquist) if nyquist > 0 else 1000.0)
    given = [k for k in ("hz", "orders", "bearing") if t.has(k)]
    if len(given) > 1:
        raise t.fail(given[1], "give one of hz, orders or bearing, not " + " and ".join(given))
    if severity is not None:
        pass  # the preset set the edges above
    elif t.has("bearing"):
        bearing = t.get_str("bearing")
        if bearing not in bearings:
            raise t.bad("bearing", bearing, "the name of a [[bearing]] table"
                        + (" (" + ", ".join(bearings) + ")" if bearings else "; there is none"))
        defect = t.get_str("defect", None, DEFECTS)
        harmonic = t.get_int("harmonic", 1, 1, 50)
        width = t.get_float("width", 0.05, lo=0.0, lo_open=True, hi=0.5)
        if speed.rpm is None:
            raise t.fail("bearing", "needs [speed] rpm to turn defect orders into Hz")
        centre = bearings[bearing].orders()[defect] * harmonic
        orders = (centre * (1.0 - width), centre * (1.0 + width))
        _order_limit(t, "harmonic" if t.has("harmonic") else "defect", harmonic if t.has("harmonic") else defect,
                     orders, source, speed)
    elif t.has("hz"):
        if nyquist > 0:
            hz = t.get_pair("hz", 0.0, nyquist, f"0 <= low < high <= {nyquist:g} (Nyquist)")
        else:  # a recording's rate is only known when it is opened
            hz = t.get_pair("hz", 0.0, math.inf, "0 <= low < high")
    elif t.has("orders"):
        orders = t.get_pair("orders", 0.0, math.inf, "0 <= low < high (multiples of running speed)")
        if speed.rpm is None:
            raise t.fail("orders", "needs [speed] rpm to turn orders into Hz")
        _order_limit(t, "orders", list(orders), orders, source, speed)
    else:
        raise t.fail("hz", "missing; give hz = [low, high], orders = [low, high] or bearing = NAME")

    spectrum = t.get_str("spectrum", "raw", ("raw", "envelope"))
    quantity = "velocity" if severity else t.get_str("quantity", None, QUANTITIES)
    if spectrum == "envelope" and quantity != "acceleration":
        raise t.bad("quantity", quantity, "'acceleration' on an envelope spectrum")
    warning = t.get_optional_float("warning")
    alarm = t.get_optional_float("alarm")
    if severity is not None:
        warning, alarm = SEVERITY_ZONES[severity]
    if warning is not None and alarm is not None and not warning < alarm:
        raise t.bad("alarm", alarm, f"a limit above warning ({warning:g})")
    baseline = t.get_optional_float("baseline")
    if baseline is not None and baseline > 7 * 86400:
        raise t.bad("baseline", baseline, "seconds of learning, > 0 and at most 604800 (a week)")
    warning_ratio = t.get_optional_float("warning_ratio")
    alarm_ratio = t.get_optional_float("alarm_ratio")
    for level, ratio, absolute in (("warning", warning_ratio, warning), ("alarm", alarm_ratio, alarm)):
        if ratio is not None and absolute is not None:
            raise t.fail(f"{level}_ratio", f"give {level} or {level}_ratio, not both")
        if ratio is not None and baseline is None:
            raise t.fail(f"{level}_ratio", "needs baseline = SECONDS to learn the value it multiplies")
    if baseline is not None and warning_ratio is None and alarm_ratio is None:
        raise t.fail("baseline", "needs warning_ratio or alarm_ratio, the multiples that raise levels")
    if warning_ratio is not None and alarm_ratio is not None and not warning_ratio < alarm_ratio:
        raise t.bad("alarm_ratio", alarm_ratio, f"a ratio above warning_ratio ({warning_ratio:g})")
    band = BandConfig(
        name=name,
        channels=channels,
        quantity=quantity,
        hz=hz,
        orders=orders,
        warning=warning,
        alarm=alarm,
        hysteresis=t.get_float("hysteresis", 0.1, lo=0.0, hi=0.99),
        delay=t.get_float("delay", 3.0, lo=0.0, hi=86400.0),
        spectrum=spectrum,
        bearing=bearing,
        defect=defect,
        harmonic=harmonic,
        baseline=baseline,
        warning_ratio=warning_ratio,
        alarm_ratio=alarm_ratio,
        severity=severity,
    )
    t.finish()
    return band


def _read_capture(t: _Table) -> CaptureConfig:
    capture = CaptureConfig(
        seconds=t.get_float("seconds", 10.0, lo=0.0, lo_open=True, hi=600.0),
        after=t.get_float("after", 5.0, lo=0.0, hi=600.0),
        keep=t.get_int("keep", 20, 1, 10000),
        dir=t.get_str("dir", "/var/lib/bandwatch/captures"),
    )
    if not capture.dir:
        raise t.bad("dir", "", "a directory for capture recordings")
    t.finish()
    return capture


def _read_envelope(t: _Table, nyquist: float) -> EnvelopeConfig:
    if not t.has("band_hz"):
        raise t.fail("band_hz", "missing; the carrier band [low, high] to demodulate")
    top = nyquist if nyquist > 0 else math.inf
    band = t.get_pair("band_hz", 0.0, top, f"0 < low < high <= {top:g} (Nyquist)")
    if band[0] <= 0:
        raise t.bad("band_hz", list(band), f"[low, high] with 0 < low < high <= {top:g} (Nyquist)")
    t.finish()
    return EnvelopeConfig(band_hz=band)


def _read_health(t: _Table) -> HealthConfig:
    if t.has("alias"):
        raise t.fail("alias", "renamed; use nyquist (the share of power in the top 10 % below Nyquist)")
    health = HealthConfig(
        stale=t.get_float("stale", 2.0, lo=0.0, lo_open=True, hi=3600.0),
        window=t.get_float("window", 10.0, lo=0.0, lo_open=True, hi=3600.0),
        corrupt=t.get_float("corrupt", 0.01, lo=0.0, lo_open=True, hi=1.0),
        clipping=t.get_float("clipping", 0.001, lo=0.0, lo_open=True, hi=1.0),
        flatline=t.get_float("flatline", 5.0, lo=0.0, lo_open=True, hi=86400.0),
        rate=t.get_float("rate", 0.01, lo=0.0, lo_open=True, hi=1.0),
        nyquist=t.get_float("nyquist", 0.2, lo=0.0, lo_open=True, hi=1.0),
    )
    t.finish()
    return health


_TOPIC_FORBIDDEN = re.compile(r"[+#\x00]")


def _read_mqtt(t: _Table) -> MqttConfig:
    prefix = t.get_str("prefix", "bandwatch")
    expected = "a topic prefix without +, # or NUL, not starting or ending with /, at most 1024 bytes"
    if (
        not prefix
        or _TOPIC_FORBIDDEN.search(prefix)
        or prefix.startswith("/")
        or prefix.endswith("/")
        or "//" in prefix
        or len(prefix.encode("utf-8")) > 1024
    ):
        raise t.bad("prefix", prefix, expected)
    cfg = MqttConfig(
        host=t.get_str("host", "localhost"),
        port=t.get_int("port", 1883, 1, 65535),
        prefix=prefix,
        qos=t.get_int("qos", 1, 0, 2),
        summary_interval=t.get_float("summary_interval", 10.0, lo=0.0, lo_open=True, hi=86400.0),
        keepalive=t.get_int("keepalive", 30, 5, 65535),
        username=t.get_str("username", ""),
        password_file=t.get_str("password_file", ""),
        tls=t.get_bool("tls", False),
        ca_file=t.get_str("ca_file", ""),
        cert_file=t.get_str("cert_file", ""),
        key_file=t.get_str("key_file", ""),
        queue_dir=t.get_str("queue_dir", "/var/lib/bandwatch"),
        queue_limit=t.get_int("queue_limit", 10000, 1, 10_000_000),
        spectrum_queue_limit=t.get_int("spectrum_queue_limit", 500, 1, 1_000_000),
        capture_queue_mb=t.get_float("capture_queue_mb", 100.0, lo=0.0, lo_open=True, hi=1_000_000.0),
    )
    if not cfg.host:
        raise t.bad("host", "", "a broker host name or address")
    if cfg.password_file and not cfg.username:
        raise t.bad("password_file", cfg.password_file, "no password_file while username is empty")
    if cfg.ca_file and not cfg.tls:
        raise t.bad("ca_file", cfg.ca_file, "no ca_file while tls = false")
    if (cfg.cert_file or cfg.key_file) and not cfg.tls:
        key = "cert_file" if cfg.cert_file else "key_file"
        raise t.bad(key, getattr(cfg, key), f"no {key} while tls = false")
    if cfg.key_file and not cfg.cert_file:
        raise t.bad("key_file", cfg.key_file, "a key_file only beside a cert_file")
    if not cfg.queue_dir:
        raise t.bad("queue_dir", "", "a directory for the on-disk event queue")
    t.finish()
    return cfg


def _read_evidence(t: _Table, nyquist: float) -> EvidenceConfig:
    interval = t.get_float("spectrum_interval", 0.0, lo=0.0, hi=604800.0,
                           expected="0 (none) or seconds from 1 to 604800")
    if 0.0 < interval < 1.0:
        raise t.bad("spectrum_interval", interval, "0 (none) or seconds from 1 to 604800")
    top = None
    if t.has("spectrum_top_hz"):
        hi = nyquist if nyquist > 0 else math.inf
        top = t.get_float("spectrum_top_hz", None, lo=0.0, lo_open=True, hi=hi,
                          expected=f"a frequency > 0 and <= {hi:g} (Nyquist)")
    evidence = EvidenceConfig(spectrum_on_rise=t.get_bool("spectrum_on_rise", True),
                              spectrum_interval=interval, spectrum_top_hz=top)
    t.finish()
    return evidence


_SECTIONS = ("node", "source", "spectrum", "speed", "envelope", "bearing", "band", "health", "capture", "evidence",
             "mqtt")


def _toml(text: str, file: str) -> Dict[str, Any]:
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        line = getattr(exc, "lineno", None)
        if line is None:
            m = re.search(r"line (\d+)", str(exc))
            line = int(m.group(1)) if m else None
        raise ConfigError(file, "", f"not valid TOML: {exc}", line) from None


def parse(text: str, file: str = "<config>") -> Config:
    """Check a config given as TOML text; raise ConfigError on the first fault."""
    data = _toml(text, file)
    locator = _Locator(text)
    top = _Table(data, file, locator, "")

    def section(key: str, required: bool) -> _Table:
        if key not in data:
            if required:
                raise ConfigError(file, key, f"missing; the [{key}] section is required")
            return _Table({}, file, locator, key)
        value = top.raw(key)
        if not isinstance(value, dict):
            raise ConfigError(file, key, f"expected a table [{key}], got {_type_name(value)}",
                              locator.find("", None, key))
        return _Table(value, file, locator, key)

    for key in data:
        if key not in _SECTIONS:
            raise ConfigError(file, key, "unknown section; expected one of " + ", ".join(_SECTIONS),
                              locator.find(key, None, None) or locator.find(key, 1, None)
                              or locator.find("", None, key))

    node = _read_node(section("node", True))
    speed_t = section("speed", False)
    speed_rpm = speed_t.data.get("rpm") if isinstance(speed_t.data.get("rpm"), (int, float)) else None
    source = _read_source(section("source", True), speed_rpm)
    spectrum = _read_spectrum(section("spectrum", False))
    speed = _read_speed(speed_t, source.nyquist if source.nyquist > 0 else math.inf)

    def array_of(key: str) -> List[_Table]:
        raw = data.get(key, [])
        top.used.add(key)
        if not isinstance(raw, list) or not all(isinstance(b, dict) for b in raw):
            raise ConfigError(file, key, f"expected [[{key}]] tables", locator.find("", None, key))
        return [_Table(item, file, locator, key, index) for index, item in enumerate(raw, start=1)]

    def unique(table: _Table, name: str, seen: Dict[str, int]) -> None:
        if name in seen:
            raise table.bad("name", name, f"a name not used by {table.table}[{seen[name]}]")
        seen[name] = table.index or 0

    bearings: Dict[str, BearingConfig] = {}
    seen: Dict[str, int] = {}
    for bt in array_of("bearing"):
        bearing = _read_bearing(bt)
        unique(bt, bearing.name, seen)
        bearings[bearing.name] = bearing

    bands: List[BandConfig] = []
    seen = {}
    envelope = None
    if "envelope" in data:
        envelope = _read_envelope(section("envelope", True), source.nyquist)
    for bt in array_of("band"):
        band = _read_band(bt, source, speed, bearings)
        unique(bt, band.name, seen)
        if band.spectrum == "envelope" and envelope is None:
            raise bt.fail("spectrum", "'envelope' needs an [envelope] section with band_hz")
        bands.append(band)

    health = _read_health(section("health", False))
    capture = _read_capture(section("capture", True)) if "capture" in data else None
    evidence = _read_evidence(section("evidence", False), source.nyquist)
    mqtt = None
    if "mqtt" in data:
        mqtt = _read_mqtt(section("mqtt", True))

    return Config(
        path=file,
        node=node,
        source=source,
        spectrum=spectrum,
        speed=speed,
        bands=tuple(bands),
        health=health,
        mqtt=mqtt,
        envelope=envelope,
        bearings=tuple(bearings.values()),
        capture=capture,
        evidence=evidence,
        summary_interval=mqtt.summary_interval if mqtt else 10.0,
        prefix=mqtt.prefix if mqtt else "bandwatch",
    )


def _read_text(path: str) -> str:
    try:
        with open(path, "rb") as fh:
            raw = fh.read()
    except OSError as exc:
        raise ConfigError(path, "", f"cannot read the file: {exc.strerror or exc}") from None
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(path, "", f"not UTF-8 text (byte {exc.start})") from None


def load(path: str) -> Config:
    """Read and check the config file at `path`."""
    return parse(_read_text(path), path)


def load_mqtt(path: str) -> MqttConfig:
    """Only the [mqtt] section of the file at `path`, checked as `load` checks
    it; other sections are not read, so a node's whole config serves as well
    as a file holding [mqtt] alone (what `bandwatch collect` needs)."""
    text = _read_text(path)
    data = _toml(text, path)
    locator = _Locator(text)
    if not isinstance(data.get("mqtt"), dict):
        raise ConfigError(path, "mqtt", "missing; the broker's [mqtt] section is required here",
                          locator.find("", None, "mqtt"))
    return _read_mqtt(_Table(data["mqtt"], path, locator, "mqtt"))
