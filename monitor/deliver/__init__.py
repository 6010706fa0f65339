"""Delivery: where payloads go. `open_sink` picks stdout or MQTT from the config."""

from typing import TYPE_CHECKING

from .base import Sink

if TYPE_CHECKING:  # pragma: no cover
    from ..config import Config


def open_sink(config: "Config") -> Sink:
    """The sink the config asks for; the MQTT one loads paho only when chosen."""
    if config.mqtt is None:
        from .stdout import StdoutSink

        return StdoutSink(config.prefix, config.node)
    from .mqtt import MqttSink

    return MqttSink(config.mqtt, config.node)


__all__ = ["Sink", "open_sink"]
