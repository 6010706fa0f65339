"""`bandwatch check`: the resolved config, as the monitor will use it:
source, spectral resolution, speed, bearings, envelope, bands with their
edges in Hz, health and output."""

from typing import TextIO

from ..acquire.sources import available
from ..analyse.bearings import bearing_orders
from ..analyse.units import quantity_unit
from ..analyse.windows import Window
from ..config import Config


def print_check(config: Config, out: TextIO) -> None:
    """The resolved config, as `bandwatch check` prints it."""
    src = config.source
    spec = config.spectrum
    w = out.write
    w(f"config {config.path}: OK\n")
    w(f"node: {config.node}\n")
    rate = f"{src.sample_rate:g} Hz" if src.sample_rate > 0 else "rate from the recording"
    w(f"source: {src.kind}, {len(src.channels)} channel(s) ({', '.join(src.channels)}), {rate}, unit {src.unit}\n")
    if not available(src.kind):
        w(f"  note: source kind {src.kind!r} is not available in this version; `run` will refuse it\n")
    w(f"spectrum: {spec.window} window, {spec.size} samples, overlap {spec.overlap:g}, {spec.averages} average(s)\n")
    if src.sample_rate > 0:
        fs = src.sample_rate
        window = Window(spec.window, spec.size)
        w(f"  bin width {fs / spec.size:.6g} Hz, frame {spec.size / fs:.6g} s, "
          f"result every {spec.hop / fs:.6g} s ({spec.hop} samples), each covering {spec.span / fs:.6g} s\n")
        w(f"  noise bandwidth {window.enbw_bins * fs / spec.size:.6g} Hz ({window.enbw_bins:.4g} bins), "
          f"Nyquist {fs / 2:g} Hz\n")
    sp = config.speed
    if sp.rpm is not None:
        tracked = f", tracked in {sp.search_hz[0]:g}..{sp.search_hz[1]:g} Hz" if sp.track and sp.search_hz else ""
        w(f"speed: {sp.rpm:g} rpm ({sp.rpm / 60:.6g} Hz) nominal{tracked}\n")
    else:
        w("speed: none given (order bands need [speed] rpm)\n")
    for bearing in config.bearings:
        orders = bearing_orders(bearing)
        w(f"bearing {bearing.name}: {bearing.elements} elements, d {bearing.element_diameter:g}, "
          f"D {bearing.pitch_diameter:g}, contact {bearing.contact_angle:g} deg; orders "
          + ", ".join(f"{k.upper()} {v:.4g}" for k, v in orders.items()) + "\n")
    if config.envelope is not None:
        lo, hi = config.envelope.band_hz
        w(f"envelope: carrier band {lo:g}..{hi:g} Hz, same frames and averaging as the spectrum\n")
    w(f"bands: {len(config.bands)}\n")
    if config.bands:
        rows = [("name", "channels", "edges (Hz)", "quantity", "unit", "warning", "alarm", "hyst", "delay")]
        for b in config.bands:
            lo, hi = b.edges_hz(sp.nominal_hz)
            edges = f"{lo:.6g}..{hi:.6g}"
            if b.severity is not None:
                edges += f" (ISO 10816-3 {b.severity})"
            elif b.bearing is not None:
                harmonic = f" x{b.harmonic}" if b.harmonic > 1 else ""
                edges += f" ({b.bearing} {b.defect}{harmonic})"
            elif b.orders is not None:
                edges += f" ({b.orders[0]:g}..{b.orders[1]:g}x)"
            if b.spectrum == "envelope":
                edges += " envelope"
            rows.append((
                b.name, ",".join(b.channels), edges, b.quantity, quantity_unit(b.quantity, src.unit),
                "-" if b.warning is None else f"{b.warning:g}", "-" if b.alarm is None else f"{b.alarm:g}",
                f"{b.hysteresis:g}", f"{b.delay:g} s",
            ))
        widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
        for r in rows:
            w("  " + "  ".join(cell.ljust(widths[i]) for i, cell in enumerate(r)).rstrip() + "\n")
    w(f"health: stale after {config.health.stale:g} s without samples\n")
    if config.mqtt is None:
        w("output: JSON lines on stdout (no [mqtt] section)\n")
    else:
        m = config.mqtt
        w(f"output: MQTT {m.host}:{m.port}, topics {m.prefix}/{config.node}/..., qos {m.qos}, "
          f"summary every {m.summary_interval:g} s\n")
