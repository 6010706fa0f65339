"""The rules that need the sample rate: nothing may reach past Nyquist.

`load.py` applies them while reading, when `[source] sample_rate` is given.
A file source with `sample_rate = 0` takes its rate from the recording, so
`bandwatch replay` applies them again (`check_rate`) once the recording is
open. Both go through the functions here.
"""

from typing import Optional

from ..errors import ConfigError
from .schema import BandConfig, Config, SpeedConfig


def top_speed_hz(speed: SpeedConfig) -> Optional[float]:
    """The highest running speed order edges can meet: the top of the
    search range when the speed is tracked, else the nominal speed."""
    if speed.track and speed.search_hz:
        return speed.search_hz[1]
    return speed.nominal_hz


def order_edge_problem(top_order: float, speed: SpeedConfig, nyquist: float) -> Optional[str]:
    """What an order band's high edge must be instead, when at the highest
    speed it passes Nyquist; None when it fits (or the rate is not known)."""
    top_hz = top_speed_hz(speed)
    if nyquist <= 0 or top_hz is None or top_order * top_hz <= nyquist:
        return None
    return (f"a high edge at most {nyquist / top_hz:g} orders: "
            f"{top_order:g} x {top_hz:g} Hz is above the Nyquist frequency {nyquist:g} Hz")


def band_top_hz(band: BandConfig, speed: SpeedConfig) -> float:
    """The highest frequency a band reaches, order bands at their highest speed."""
    if band.hz is not None:
        return band.hz[1]
    top_hz = top_speed_hz(speed)
    return band.orders[1] * top_hz if band.orders and top_hz else 0.0


def check_rate(config: Config, sample_rate: float, whose: str = "the recording's") -> None:
    """Refuse bands and an envelope band that reach past the Nyquist
    frequency of `sample_rate`, naming the key (ConfigError)."""
    nyquist = sample_rate / 2.0
    for i, band in enumerate(config.bands, start=1):
        key = "hz" if band.hz is not None else "orders"
        hi = band_top_hz(band, config.speed)
        if hi > nyquist:
            raise ConfigError(config.path, f"band[{i}].{key}",
                              f"reaches {hi:g} Hz, above {whose} Nyquist frequency {nyquist:g} Hz")
    if config.envelope is not None and config.envelope.band_hz[1] > nyquist:
        raise ConfigError(config.path, "envelope.band_hz",
                          f"reaches {config.envelope.band_hz[1]:g} Hz, above {whose} "
                          f"Nyquist frequency {nyquist:g} Hz")
