"""A PNG of one spectrum message: what the analyst looks at first.

One panel per channel: the RMS per line on log-log axes (DC left out), each
band of that channel shaded between its edges and labelled with its value
and level, and its limits drawn as the level a single line inside the band
would need to reach them: the limit itself for an acceleration band; for
velocity and displacement bands the limit carried back to acceleration at
each frequency (times 2 pi f, or (2 pi f) squared), so the lines bend. A band
whose power sits in one line (a 1x band, say) reaches its limit where that
line touches the drawn one. The band that rose is drawn stronger and named
in the title. Bands read from the envelope spectrum are not drawn: this is
the raw spectrum. Needs matplotlib (the `plot` extra).
"""

import math
from typing import Any, Dict, List, Optional, Sequence

import numpy as np

from ..analyse.units import TO_SI

_LIMIT_STYLE = (("warning", "tab:orange", "--"), ("alarm", "tab:red", "-"))


def single_line_level(limit: float, quantity: str, unit: str, freqs: np.ndarray) -> Optional[np.ndarray]:
    """The RMS of one line, in the spectrum's unit (`g` or `m/s2`), at
    which a band of `quantity` reaches `limit` (its own unit: the source
    unit, mm/s or um); None when the unit is not known."""
    if unit not in TO_SI:
        return None
    omega = 2 * np.pi * freqs
    if quantity == "acceleration":
        return np.full(freqs.shape, limit)
    if quantity == "velocity":
        return limit * 1e-3 * omega / TO_SI[unit]
    if quantity == "displacement":
        return limit * 1e-6 * omega**2 / TO_SI[unit]
    return None


def _title(meta: Dict[str, Any]) -> str:
    head = f"{meta.get('node')}  {meta.get('time')}  stream {meta.get('stream_s')} s"
    events: Sequence[Dict[str, Any]] = meta.get("events") or []
    if not events:
        return head + "  (sent on the interval)"
    units = {(b.get("name"), b.get("channel")): b.get("unit") for b in meta.get("bands") or []}
    parts = []
    for e in events:
        text = f"event {e.get('id')}: {e.get('name')}/{e.get('channel')} {e.get('previous')} -> {e.get('level')}"
        if isinstance(e.get("value"), (int, float)):
            text += f" at {e['value']:.3g} {units.get((e.get('name'), e.get('channel')), '')}".rstrip()
        parts.append(text)
    return head + "\n" + "; ".join(parts)


def draw_spectrum(path: str, meta: Dict[str, Any], freqs: np.ndarray, rms: np.ndarray,
                  channels: Sequence[str]) -> None:
    """Write the picture of one spectrum to `path` (PNG); ImportError
    without matplotlib."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    unit = str(meta.get("unit"))
    rose = {(e.get("name"), e.get("channel")) for e in meta.get("events") or []}
    bands: List[Dict[str, Any]] = [b for b in meta.get("bands") or [] if b.get("spectrum", "raw") == "raw"]
    fig = Figure(figsize=(10, 1.0 + 2.8 * len(channels)))
    FigureCanvasAgg(fig)
    axes = fig.subplots(len(channels), 1, squeeze=False, sharex=True)[:, 0]
    f = freqs[1:]  # DC has no place on a log frequency axis
    for ax, name, row in zip(axes, channels, rms):
        amplitude = np.asarray(row[1:], dtype=float)
        shown = amplitude[np.isfinite(amplitude) & (amplitude > 0)]
        floor = shown.min() if shown.size else 1e-12
        ax.loglog(f, np.maximum(np.nan_to_num(amplitude, nan=floor), floor), lw=0.8, color="k")
        ours = [b for b in bands if b.get("channel") == name]
        for k, band in enumerate(ours):
            _draw_band(ax, band, k, (band.get("name"), name) in rose, unit, f)
        speed = meta.get("speed_hz")
        if isinstance(speed, (int, float)) and f.size and f[0] <= speed <= f[-1]:
            ax.axvline(speed, color="0.4", ls=":", lw=0.9)
        if f.size:
            ax.set_xlim(f[0], f[-1])
        ax.set_ylabel(f"{name}: RMS per line ({unit})", fontsize=8)
        ax.grid(True, alpha=0.25)
    axes[-1].set_xlabel("frequency (Hz); dotted: running speed; dashed/solid: warning/alarm as one line")
    axes[0].set_title(_title(meta), loc="left", fontsize=9)
    # Fixed margins: tight_layout measures every log tick and takes seconds.
    fig.subplots_adjust(left=0.08, right=0.98, top=1 - 0.55 / fig.get_figheight(),
                        bottom=0.65 / fig.get_figheight(), hspace=0.12)
    fig.savefig(path, dpi=90, format="png")


def _draw_band(ax: Any, band: Dict[str, Any], k: int, rose: bool, unit: str, freqs: np.ndarray) -> None:
    try:
        lo, hi = (float(v) for v in band["hz"])
    except (KeyError, TypeError, ValueError):
        return
    if not freqs.size or hi <= freqs[0]:
        return
    lo = max(lo, freqs[0])
    ax.axvspan(lo, hi, color=f"C{k % 10}", alpha=0.35 if rose else 0.12, lw=0)
    value, level = band.get("value"), band.get("level")
    label = f"{band.get('name')}"
    if isinstance(value, (int, float)):
        label += f" {value:.3g} {band.get('unit')}"
    if level and level != "normal":
        label += f" {level}"
    ax.text(math.sqrt(lo * hi), 0.97 - 0.09 * (k % 4), label, transform=ax.get_xaxis_transform(),
            ha="center", va="top", fontsize=7, fontweight="bold" if rose else "normal")
    inside = np.linspace(lo, hi, 32)
    limits = band.get("limits") or {}
    for name, colour, style in _LIMIT_STYLE:
        limit = limits.get(name)
        if not isinstance(limit, (int, float)):
            continue
        level_line = single_line_level(float(limit), str(band.get("quantity")), unit, inside)
        if level_line is not None:
            ax.plot(inside, level_line, color=colour, ls=style, lw=1.2 if rose else 0.8)
