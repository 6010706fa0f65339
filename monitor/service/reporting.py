"""The payloads the monitor sends: status, events, levels and summaries.

`Monitor` decides when a payload goes out; a `Reporter` builds it from what
the monitor hands over, with the fields and rounding of the README's
payload reference (`deliver/payloads.py` has the common fields).
"""

from typing import TYPE_CHECKING, Dict, List, Optional, Sequence, Tuple

import numpy as np

from .. import __version__
from ..analyse.bands import BandValue
from ..deliver.event_ids import EventIds
from ..deliver.payloads import NO_LIMITS, Payload, num, stamp
from ..judge.baseline import Baseline
from ..judge.health import Check, Health
from ..judge.levels import LevelMachine

if TYPE_CHECKING:  # pragma: no cover
    from .monitor import Result

LevelChange = Tuple[str, str]  # (previous level, new level)


def limits(base: Baseline) -> Payload:
    """The limits in force now (learned ones once known), as payloads carry them."""
    warning, alarm = base.limits()
    return {"warning": num(warning), "alarm": num(alarm)}


class Reporter:
    """Builds payloads for one node; takes event ids from `ids`."""

    def __init__(self, node: str, ids: EventIds, channels: Sequence[str], unit: str, since: str) -> None:
        self.node = node
        self.ids = ids
        self.channels = list(channels)
        self.unit = unit
        self.since = since

    def status(self, state: str, stream_s: float) -> Payload:
        payload = stamp(self.node, stream_s)
        payload.update(state=state, version=__version__, since=self.since)
        return payload

    def _event(self, kind: str, name: str, channel: Optional[str], change: LevelChange, stream_s: float) -> Payload:
        event = stamp(self.node, stream_s)
        event.update(id=self.ids.take(), kind=kind, name=name, channel=channel,
                     level=change[1], previous=change[0])
        return event

    def band_event(self, value: BandValue, change: LevelChange, base: Baseline, stream_s: float,
                   speed_hz: Optional[float], dominant_hz: np.ndarray) -> Payload:
        event = self._event("band", value.name, value.channel, change, stream_s)
        event.update(
            value=num(value.value),
            limits=limits(base),
            unit=value.unit,
            quantity=value.quantity,
            speed_hz=num(speed_hz),
            dominant_hz=num(dominant_hz[self.channels.index(value.channel)]),
        )
        return event

    def health_event(self, check: Check, change: LevelChange, stream_s: float, speed_hz: Optional[float],
                     dominant_hz: Optional[np.ndarray]) -> Payload:
        """`dominant_hz` per channel from the latest result, None before the first."""
        event = self._event("health", check.name, check.channel, change, stream_s)
        dominant = None
        if dominant_hz is not None and check.channel is not None:
            dominant = dominant_hz[self.channels.index(check.channel)]
        event.update(value=num(check.value), limits=dict(NO_LIMITS), unit=check.unit, quantity=None,
                     speed_hz=num(speed_hz), dominant_hz=num(dominant))
        return event

    def levels(self, bands: List[BandValue], rules: List[LevelMachine], baselines: List[Baseline],
               health: Health, stream_s: float) -> Payload:
        payload = stamp(self.node, stream_s)
        rows = [
            {"name": v.name, "channel": v.channel, "level": rule.level, "value": num(v.value),
             "limits": limits(base)}
            for v, rule, base in zip(bands, rules, baselines)
        ]
        rows.extend({**row, "value": num(row["value"]), "limits": dict(NO_LIMITS)} for row in health.rows())
        payload["levels"] = rows
        return payload

    def summary(self, result: "Result", stats: Dict[str, np.ndarray], rules: List[LevelMachine],
                baselines: List[Baseline]) -> Payload:
        """`stats`: time-domain statistics over the samples `result` covers."""
        payload = stamp(self.node, result.stream_s)
        channels = {}
        for i, name in enumerate(self.channels):
            channels[name] = {
                "rms": num(stats["rms"][i]),
                "peak": num(stats["peak"][i]),
                "crest": num(stats["crest"][i]),
                "kurtosis": num(stats["kurtosis"][i]),
                "velocity_rms": num(result.velocity_rms[i]),
                "dominant_hz": num(result.dominant_hz[i]),
                "dominant_rms": num(result.dominant_rms[i]),
                "unit": self.unit,
            }
        payload["speed_hz"] = num(result.speed_hz)
        payload["speed_s"] = None if result.speed_s is None else round(result.speed_s, 6)
        payload["channels"] = channels
        payload["bands"] = self.band_rows(result.bands, rules, baselines)
        return payload

    @staticmethod
    def band_rows(bands: List[BandValue], rules: List[LevelMachine], baselines: List[Baseline]) -> List[Payload]:
        """The bands as summaries and spectra list them."""
        return [
            {"name": v.name, "channel": v.channel, "value": num(v.value), "unit": v.unit, "level": rule.level,
             "limits": limits(base)}
            for v, rule, base in zip(bands, rules, baselines)
        ]
