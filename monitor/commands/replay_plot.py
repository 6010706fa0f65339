"""`bandwatch replay --plot`: band trends against their limits, and the
spectrum at the worst moment with the band edges marked (matplotlib, the
`plot` extra; imported only when a plot is asked for)."""

import math
from typing import Any

import numpy as np

from ..analyse.units import quantity_unit
from .replay_tally import Replayed

PLOT_HINT = "pip install 'bandwatch[plot]'"


def plot_available() -> bool:
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        return False
    return True


def draw_plot(rep: Replayed, path: str) -> None:
    """Band trends against their limits, one panel per band, and the
    spectrum at the worst moment with every band of its channel marked."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    assert rep.history is not None
    t, values = rep.history.arrays()
    cfg = rep.config
    tally = rep.tally
    bands = []  # (band config, [pair indices])
    for band in cfg.bands:
        pairs = [i for i, row in enumerate(tally.rows) if row[0] == band.name]
        bands.append((band, pairs))
    fig = Figure(figsize=(10, 2.0 * len(bands) + 3.6))
    FigureCanvasAgg(fig)
    axes = fig.subplots(len(bands) + 1, 1, squeeze=False)[:, 0]
    worst = rep.worst
    for k, (ax, (band, pairs)) in enumerate(zip(axes, bands)):
        if k:
            ax.sharex(axes[0])
        for i in pairs:
            ax.plot(t, values[:, i], lw=0.9, label=tally.rows[i][1])
        for limit, colour, label in ((band.warning, "tab:orange", "warning"), (band.alarm, "tab:red", "alarm")):
            if limit is not None:
                ax.axhline(limit, color=colour, ls="--", lw=1.0, label=f"{label} {limit:g}")
        if worst is not None:
            ax.axvline(worst.result.stream_s, color="0.5", ls=":", lw=1.0)
        unit = quantity_unit(band.quantity, cfg.source.unit)
        ax.set_title(f"{band.name}: {band.quantity}", loc="left", fontsize=9)
        ax.set_ylabel(unit)
        ax.set_ylim(bottom=0)
        ax.grid(True, alpha=0.3)
        ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=7, frameon=False)
    if bands:
        axes[len(bands) - 1].set_xlabel("stream time (s); dotted: the worst moment")
    _draw_spectrum(axes[-1], rep)
    fig.tight_layout()
    fig.savefig(path, dpi=100)


def _draw_spectrum(ax: Any, rep: Replayed) -> None:
    worst = rep.worst
    if worst is None:
        ax.text(0.5, 0.5, "no result: the recording is shorter than one result", ha="center",
                transform=ax.transAxes)
        ax.set_axis_off()
        return
    result = worst.result
    band_value = result.bands[worst.pair]
    band = rep.config.bands[[b.name for b in rep.config.bands].index(band_value.name)]
    kind = band.spectrum
    spectrum = result.envelope if kind == "envelope" and result.envelope is not None else result.spectrum
    ch = list(rep.config.source.channels).index(band_value.channel)
    amplitude = spectrum.rms_amplitude[ch][1:]
    freqs = spectrum.freqs[1:]  # DC has no place on a log frequency axis
    floor = amplitude[amplitude > 0].min() if (amplitude > 0).any() else 1e-12
    # Log-log: 1x near the bottom and a band at kHz are both readable.
    ax.loglog(freqs, np.maximum(amplitude, floor), lw=0.8, color="k")
    names = {b.name: b for b in rep.config.bands}
    shown = 0
    for k, value in enumerate(result.bands):
        if value.channel != band_value.channel or names[value.name].spectrum != kind:
            continue
        lo, hi = value.edges_hz
        chosen = k == worst.pair
        ax.axvspan(max(lo, freqs[0]), hi, color=f"C{k % 10}", alpha=0.35 if chosen else 0.12, lw=0)
        # Labels at the band's middle on the log axis, staggered so nested bands stay readable.
        ax.text(math.sqrt(max(lo, freqs[0]) * hi), 0.95 - 0.1 * (shown % 4), value.name,
                transform=ax.get_xaxis_transform(), ha="center", va="top", fontsize=7,
                fontweight="bold" if chosen else "normal")
        shown += 1
    ax.set_xlim(freqs[0], freqs[-1])
    relative = (f", {worst.score:.3g} x its {'warning' if band.warning is not None else 'alarm'} limit"
                if worst.relative and (band.warning is not None or band.alarm is not None) else "")
    what = "envelope spectrum" if kind == "envelope" else "spectrum"
    ax.set_title(f"{what} of {band_value.channel} at {result.stream_s:.1f} s, the worst moment: "
                 f"{band_value.name} {band_value.value:.3g} {band_value.unit}{relative}", loc="left",
                 fontsize=9)
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel(f"RMS per line ({rep.config.source.unit})")
    ax.grid(True, which="both", alpha=0.2)
