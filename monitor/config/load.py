"""Load a bandwatch TOML config and check every rule before anything starts.

The file is parsed with tomllib (tomli before Python 3.11). Each section is
read by a `Table` that knows its key path, so an error can name the file, the
key (``band[2].hz``), the bad value, what was expected and, where the key can
be found in the text, its line. Keys nobody asked for are errors: a typo must
not silently fall back to a default.
"""

import math
import os
import re
import sys
from typing import Any, Dict, List, Optional, Tuple

from ..analyse.bearings import DEFECTS, bearing_orders
from ..analyse.units import iso_velocity_hz
from ..errors import ConfigError
from .paths import resolve_paths, resolve_section
from .rates import order_edge_problem
from .schema import (
    FORMATS,
    MAX_CHANNELS,
    MAX_SAMPLE_RATE,
    MEMORY_MB,
    NAME_RE,
    QUANTITIES,
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
from .table import Locator, Table, _show, type_name

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - exercised on old Pythons only
    import tomli as tomllib

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


# ---------------------------------------------------------------------------
# Sections


def _read_node(t: Table) -> Tuple[str, int]:
    name = t.get_name("name")
    memory_mb = t.get_int("memory_mb", MEMORY_MB, 32, 1 << 20)
    t.finish()
    return name, memory_mb


def _read_simulator(t: Table, speed_rpm: Optional[float]) -> SimulatorConfig:
    rpm = t.get_float("sim_rpm", speed_rpm if speed_rpm is not None else 1480.0, lo=0.0, lo_open=True)
    harmonics: Tuple[float, ...] = (0.02, 0.008, 0.004)
    if t.has("sim_harmonics"):
        values = t.get_list("sim_harmonics")
        expected = "an array of 1 to 32 numbers >= 0 (peak at 1x, 2x, ...)"
        if not 1 <= len(values) <= 32:
            raise t.bad("sim_harmonics", values, expected)
        harmonics = tuple(t.number("sim_harmonics", v, expected) for v in values)
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


def _read_source(t: Table, speed_rpm: Optional[float]) -> SourceConfig:
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
            scale = tuple(t.number("scale", v, expected) for v in value)
        else:
            scale = (t.number("scale", value, expected),) * len(channels)
        if any(s == 0 for s in scale):
            raise t.bad("scale", value, expected)

    out: Dict[str, Any] = dict(
        kind=kind, sample_rate=sample_rate, channels=tuple(channels), unit=unit, scale=scale,
        scale_given=t.has("scale"),
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


def _read_spectrum(t: Table) -> SpectrumConfig:
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


def _read_speed(t: Table, nyquist: float) -> SpeedConfig:
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


def _read_bearing(t: Table) -> BearingConfig:
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


def _order_limit(t: Table, key: str, value: Any, orders: Tuple[float, float], source: SourceConfig,
                 speed: SpeedConfig) -> None:
    """Refuse order edges whose top, at the highest speed possible, passes Nyquist."""
    problem = order_edge_problem(orders[1], speed, source.nyquist)
    if problem is not None:
        raise t.bad(key, value, problem)


# Limit keys of the first release. Refused rather than read as aliases, so a
# file says exactly one thing and the user learns the new word once.
RENAMED_BAND_KEYS = {"alert": "warning", "danger": "alarm",
                     "alert_ratio": "warning_ratio", "danger_ratio": "alarm_ratio"}


def _read_band(t: Table, source: SourceConfig, speed: SpeedConfig,
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
        low, high = iso_velocity_hz(speed.rpm)
        hz = (low, min(high, nyquist) if nyquist > 0 else high)
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
        centre = bearing_orders(bearings[bearing])[defect] * harmonic
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


def _read_capture(t: Table) -> CaptureConfig:
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


def _read_envelope(t: Table, nyquist: float) -> EnvelopeConfig:
    if not t.has("band_hz"):
        raise t.fail("band_hz", "missing; the carrier band [low, high] to demodulate")
    top = nyquist if nyquist > 0 else math.inf
    band = t.get_pair("band_hz", 0.0, top, f"0 < low < high <= {top:g} (Nyquist)")
    if band[0] <= 0:
        raise t.bad("band_hz", list(band), f"[low, high] with 0 < low < high <= {top:g} (Nyquist)")
    t.finish()
    return EnvelopeConfig(band_hz=band)


def _read_health(t: Table) -> HealthConfig:
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
        implausible=t.get_float("implausible", 1000.0, lo=0.0, lo_open=True, hi=1e9),
        hysteresis=t.get_float("hysteresis", 0.2, lo=0.0, hi=0.99),
        hold=t.get_float("hold", 10.0, lo=0.0, hi=86400.0),
        blind=t.get_float("blind", None, lo=0.0, lo_open=True, hi=86400.0) if t.has("blind") else None,
    )
    t.finish()
    return health


def _read_mqtt(t: Table) -> MqttConfig:
    from ..deliver.topics import RULE, prefix_problem

    prefix = t.get_str("prefix", "bandwatch")
    problem = prefix_problem(prefix)
    if problem:
        raise t.fail("prefix", f"{_show(prefix)} {problem}; expected {RULE}")
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


def _read_evidence(t: Table, nyquist: float) -> EvidenceConfig:
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
    locator = Locator(text)
    top = Table(data, file, locator, "")

    def section(key: str, required: bool) -> Table:
        if key not in data:
            if required:
                raise ConfigError(file, key, f"missing; the [{key}] section is required")
            return Table({}, file, locator, key)
        value = top.raw(key)
        if not isinstance(value, dict):
            raise ConfigError(file, key, f"expected a table [{key}], got {type_name(value)}",
                              locator.find("", None, key))
        return Table(value, file, locator, key)

    for key in data:
        if key not in _SECTIONS:
            raise ConfigError(file, key, "unknown section; expected one of " + ", ".join(_SECTIONS),
                              locator.find(key, None, None) or locator.find(key, 1, None)
                              or locator.find("", None, key))

    node, memory_mb = _read_node(section("node", True))
    speed_t = section("speed", False)
    speed_rpm = speed_t.data.get("rpm") if isinstance(speed_t.data.get("rpm"), (int, float)) else None
    source = _read_source(section("source", True), speed_rpm)
    spectrum = _read_spectrum(section("spectrum", False))
    speed = _read_speed(speed_t, source.nyquist if source.nyquist > 0 else math.inf)

    def array_of(key: str) -> List[Table]:
        raw = data.get(key, [])
        top.used.add(key)
        if not isinstance(raw, list) or not all(isinstance(b, dict) for b in raw):
            raise ConfigError(file, key, f"expected [[{key}]] tables", locator.find("", None, key))
        return [Table(item, file, locator, key, index) for index, item in enumerate(raw, start=1)]

    def unique(table: Table, name: str, seen: Dict[str, int]) -> None:
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

    config = Config(
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
        memory_mb=memory_mb,
    )
    if config.source.sample_rate > 0:  # a file source's rate comes with the recording: checked then
        from .memory import check

        check(config, line=locator.find("node", None, "memory_mb"))
    return config


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
    """Read and check the config file at `path`; relative paths in it are
    taken from its folder (`paths.py`)."""
    return resolve_paths(parse(_read_text(path), path), os.path.dirname(path))


def load_mqtt(path: str) -> MqttConfig:
    """Only the [mqtt] section of the file at `path`, checked as `load` checks
    it; other sections are not read, so a node's whole config serves as well
    as a file holding [mqtt] alone (what `bandwatch collect` needs). Relative
    paths in it are taken from the file's folder, as `load` takes them."""
    text = _read_text(path)
    data = _toml(text, path)
    locator = Locator(text)
    if not isinstance(data.get("mqtt"), dict):
        raise ConfigError(path, "mqtt", "missing; the broker's [mqtt] section is required here",
                          locator.find("", None, "mqtt"))
    return resolve_section(_read_mqtt(Table(data["mqtt"], path, locator, "mqtt")), "mqtt", os.path.dirname(path))
