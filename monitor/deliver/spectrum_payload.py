"""The `spectrum` payload: the averaged spectrum of every channel, for the analyst.

Each channel's RMS amplitude per line (`Spectrum.rms_amplitude`: the window's
coherent gain corrected, in the source unit), from DC up to the configured
top frequency, plus what a reader needs to put it back on a frequency axis
(`bin_hz`, `size`, `window`, `averages`) and to judge it: every band with
its edges at this result, value, level and limits, and the band rises it
serves. Line k sits at k * bin_hz.

The lines are `Lines` (4 significant digits, short JSON numbers, at most 9
bytes and a comma a line in practice): 3 channels of a 4096-point spectrum
(2049 lines) come to about 55 kB. Building the payload only slices the
spectrum; the numbers are formatted when the sink encodes it (for MQTT in
the delivery thread, never in the measuring one).
"""

import math
from typing import TYPE_CHECKING, Any, Dict, List, Optional, Sequence

from .payloads import Lines, Payload, num, stamp

if TYPE_CHECKING:  # pragma: no cover
    from ..config import Config, EvidenceConfig
    from ..service.results import Result


class SpectrumSchedule:
    """When a spectrum goes out: with a result's band rises (if
    `spectrum_on_rise`), and every `spectrum_interval` s of stream time from
    the first result (if set). One spectrum a result at most."""

    def __init__(self) -> None:
        self._next = 0.0

    def take(self, evidence: "EvidenceConfig", stream_s: float,
             rises: Sequence[Payload]) -> Optional[Sequence[Payload]]:
        """The rises the spectrum of this result goes with (maybe none), or
        None when no spectrum is due."""
        rises = rises if evidence.spectrum_on_rise else ()
        interval = evidence.spectrum_interval
        due = interval > 0 and stream_s >= self._next
        if due:
            self._next = (math.floor(stream_s / interval) + 1) * interval
        return rises if rises or due else None


def line_count(size: int, bin_hz: float, top_hz: Optional[float]) -> int:
    """Lines from DC up to `top_hz` (all of the one-sided spectrum when None)."""
    lines = size // 2 + 1
    if top_hz is None:
        return lines
    return max(1, min(lines, int(math.floor(top_hz / bin_hz + 1e-9)) + 1))


def spectrum_payload(node: str, config: "Config", result: "Result", band_rows: Sequence[Payload],
                     rises: Sequence[Payload]) -> Payload:
    """The payload for `result`. `band_rows` are the summary's band rows (name,
    channel, value, unit, level, limits), in the order of `result.bands`;
    `rises` are the band events this spectrum goes with (empty for one sent on
    the interval)."""
    spectrum = result.spectrum
    spec = config.spectrum
    n = line_count(spec.size, spectrum.bin_hz, config.evidence.spectrum_top_hz)
    # A new array (sqrt of a product), so later results cannot change it.
    rms = spectrum.rms_amplitude[:, :n]
    kinds = [band.spectrum for band, _ in result.bank.pairs]
    bands: List[Dict[str, Any]] = []
    for row, value, kind in zip(band_rows, result.bands, kinds):
        lo, hi = value.edges_hz
        bands.append({**row, "quantity": value.quantity, "spectrum": kind, "hz": [num(lo), num(hi)]})
    payload = stamp(node, result.stream_s)
    payload.update(
        id=rises[0]["id"] if rises else None,
        events=[{k: e[k] for k in ("id", "name", "channel", "level", "previous", "value")} for e in rises],
        bin_hz=num(spectrum.bin_hz),
        size=spec.size,
        window=spec.window,
        averages=spec.averages,
        unit=config.source.unit,
        lines=n,
        top_hz=num((n - 1) * spectrum.bin_hz),
        speed_hz=num(result.speed_hz),
        bands=bands,
        channels={name: Lines(rms[i]) for i, name in enumerate(config.source.channels)},
    )
    return payload
