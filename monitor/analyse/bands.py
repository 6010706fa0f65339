"""Band values: RMS between two edges, as acceleration, velocity or displacement.

A band's power is the sum of the power spectral density over its lines times
the line spacing (Parseval), taken from the same `Spectrum` every other value
comes from. The edge rule: line k stands for the interval
[(k - 1/2) df, (k + 1/2) df]; it counts with the share of that interval that
lies between the band's edges. So an edge between two lines splits their
power in proportion, and a band value moves smoothly as an order band follows
the running speed. DC (line 0) never counts.

Velocity and displacement are integrated line by line in the frequency
domain: each line's acceleration power is divided by (2 pi f)**2 or
(2 pi f)**4. Only lines inside the band are used, so the low-frequency lines
below the band's low edge and DC, where integration would blow noise up,
are left out by construction.

The window spreads a tone over its main lobe, and 1/f**2 is convex, so
dividing each line by its own (2 pi f)**2 alone reads a tone high (+0.5 % in
velocity for Hann at 10 lines, +2.5 % for the flat top). So each line's
factor is the one whose average over the window's spread gives
1/(2 pi f)**2 at the tone (lobe_correction). Acceleration keeps factor 1.
"""

import math
from typing import Any, Dict, List, Mapping, NamedTuple, Optional, Sequence, Tuple, Union

import numpy as np

from ..config import BandConfig
from .spectrum import Spectrum
from .units import ISO_VELOCITY_HZ, TO_SI, quantity_unit
from .windows import Window


def line_weights(lo: float, hi: float, bin_hz: float, lines: int) -> np.ndarray:
    """Share of each line's interval [(k-1/2)df, (k+1/2)df] inside [lo, hi]."""
    k = np.arange(lines)
    left = np.maximum((k - 0.5) * bin_hz, lo)
    right = np.minimum((k + 0.5) * bin_hz, hi)
    weights = np.clip((right - left) / bin_hz, 0.0, 1.0)
    weights[0] = 0.0
    return weights


def _cut(left: float, right: float, lo: float, hi: float, bin_hz: float) -> float:
    """The share of the line [left, right] inside [lo, hi], as line_weights
    works it (max, min, then np.clip to 0..1), on plain floats: cheaper for
    the few lines an edge cuts. Written out, the builtins' calls cost more
    than the arithmetic."""
    a = lo if lo > left else left  # max(left, lo)
    b = hi if hi < right else right  # min(right, hi)
    share = (b - a) / bin_hz
    if share != share:  # NaN passes through, as in np.clip
        return share
    share = share if share > 0.0 else 0.0
    return share if share < 1.0 else 1.0


def _root(power: float) -> float:
    """np.sqrt on one plain float (math.sqrt rounds alike), NaN below zero."""
    return math.sqrt(power) if power >= 0.0 else math.nan


def quantity_factors(quantity: str, unit: str, bin_hz: float, lines: int,
                     spread: Tuple[float, float]) -> np.ndarray:
    """Per-line factor turning acceleration power (unit**2) into the power of
    `quantity` in its reporting unit: unit**2, (mm/s)**2 or (um)**2.
    `spread`: the window's main-lobe moments (Window.spread)."""
    if quantity == "acceleration":
        return np.ones(lines)
    omega = 2 * np.pi * np.arange(lines) * bin_hz
    omega[0] = np.inf  # DC has no finite integral; its factor becomes 0
    si = TO_SI[unit]
    if quantity == "velocity":
        return (si * 1e3 / omega) ** 2 * lobe_correction(2, spread, lines)
    if quantity == "displacement":
        return (si * 1e6 / omega**2) ** 2 * lobe_correction(4, spread, lines)
    raise ValueError(f"{quantity=} is not acceleration, velocity or displacement")


def lobe_correction(p: int, spread: Tuple[float, float], lines: int) -> np.ndarray:
    """h[k] such that the factors g(k) h[k], g = k**-p, averaged over the
    window's power response around a tone at f lines, give g(f).

    That average of a smooth c is c + m2/2 c'' + m4/24 c'''' + ... (Taylor,
    with the response's moments m2, m4); solved for c to fourth order,
    c = g - m2/2 g'' + (m2**2/4 - m4/24) g''''. Near DC the series stops
    converging: from the line where h turns back up, h is held there.
    """
    m2, m4 = spread
    a = m2 / 2 * p * (p + 1)
    b = (m2**2 / 4 - m4 / 24) * p * (p + 1) * (p + 2) * (p + 3)
    k = np.arange(lines, dtype=float)
    k[0] = 1.0  # DC's factor is 0 anyway
    u = 1.0 / k**2
    if b > 0:
        u = np.minimum(u, a / (2 * b))  # h(u) = 1 - a u + b u**2 is least there
    return np.maximum(1.0 - a * u + b * u**2, 0.0)


_new_tuple = tuple.__new__


class BandValue(NamedTuple):
    """One band's value on one channel (a tuple: made every hop, kept cheap)."""

    name: str
    channel: str
    quantity: str
    unit: str
    value: float
    edges_hz: Tuple[float, float]


class BandBank:
    """Every (band, channel) pair of the config, evaluated on each spectrum.

    Each pair keeps only the lines its edges touch (a slice and its
    weights), so a band costs in proportion to its width, not the spectrum's.
    """

    def __init__(
        self,
        bands: Sequence[BandConfig],
        channels: Sequence[str],
        unit: str,
        bin_hz: float,
        lines: int,
        window: Window,
    ) -> None:
        self.pairs: List[Tuple[BandConfig, int]] = [
            (band, list(channels).index(ch)) for band in bands for ch in band.channels
        ]
        self.channels = list(channels)
        self.unit = unit
        self.bin_hz = bin_hz
        self.lines = lines
        self._factors: Dict[str, np.ndarray] = {
            q: quantity_factors(q, unit, bin_hz, lines, window.spread)
            for q in {b.quantity for b, _ in self.pairs}
        }
        # Weight times factor of each line as a line wholly inside a band
        # gets it (the edge rule's own expression): per hop only the few
        # lines an edge cuts are worked out, the rest is a slice of this.
        k = np.arange(lines)
        whole = np.clip(((k + 0.5) * bin_hz - (k - 0.5) * bin_hz) / bin_hz, 0.0, 1.0)
        self._inner = {q: whole * f for q, f in self._factors.items()}
        self._units = [quantity_unit(band.quantity, unit) for band, _ in self.pairs]
        # One group per band, with all that does not change between hops: the
        # spectrum it reads, its channels' rows (a slice where they run in
        # order), the labels of its values, and for a band with fixed edges
        # its first line, weights and edges (order bands follow the speed).
        self._groups: List[Tuple[str, Any, List[Tuple[str, ...]], BandConfig,
                                 Optional[Tuple[int, np.ndarray, Tuple[float, float]]]]] = []
        rows: List[int] = []
        for i, (band, ch) in enumerate(self.pairs):
            if not self._groups or self._groups[-1][3] is not band:
                fixed = (*self._weights(band, band.hz), band.hz) if band.hz is not None else None
                rows = []
                self._groups.append((band.spectrum, rows, [], band, fixed))
            rows.append(ch)
            self._groups[-1][2].append((band.name, self.channels[ch], band.quantity, self._units[i]))
        # Channels that run 0..k-1 in order are read as a slice, not a copy.
        for n, (spectrum, rows, labels, band, fixed) in enumerate(self._groups):
            if rows == list(range(rows[0], rows[0] + len(rows))):
                self._groups[n] = (spectrum, slice(rows[0], rows[0] + len(rows)), labels, band, fixed)
        # Each order band's last edges and weights: a speed that holds (nominal,
        # or tracked and unchanged) reuses them.
        self._last: Dict[int, Tuple[Tuple[float, float], Tuple[int, np.ndarray]]] = {}
        top = min(ISO_VELOCITY_HZ[1], bin_hz * (lines - 1))
        self._velocity = quantity_factors("velocity", unit, bin_hz, lines, window.spread) * line_weights(
            ISO_VELOCITY_HZ[0], top, bin_hz, lines
        )

    def _weights(self, band: BandConfig, edges: Tuple[float, float]) -> Tuple[int, np.ndarray]:
        """First line and the weights of the lines from there that the band
        with these edges touches (line_weights times the quantity's factors)."""
        lo, hi = edges
        df = self.bin_hz
        first = max(1, math.floor(lo / df - 0.5))
        last = min(self.lines - 1, math.ceil(hi / df + 0.5))
        if last < first:
            return first, np.zeros(0)
        # As plain floats: an order band's few lines are put together in a
        # list, cheaper than numpy's calls on a dozen numbers. Only the band's
        # own lines are turned into floats (whole spectra as lists would take
        # 32 bytes a line, resident all the time).
        weights = self._inner[band.quantity][first : last + 1].tolist()
        factors = self._factors[band.quantity][first : last + 1].tolist()
        # Lines wholly inside the edges form one run, whose values the list
        # holds; the lines an edge cuts are at its ends: walk in from both.
        k = first
        while k <= last:
            left, right = (k - 0.5) * df, (k + 0.5) * df
            if lo <= left and right <= hi:
                break
            weights[k - first] = _cut(left, right, lo, hi, df) * factors[k - first]
            k += 1
        j = last
        while j > k:
            left, right = (j - 0.5) * df, (j + 0.5) * df
            if lo <= left and right <= hi:
                break
            weights[j - first] = _cut(left, right, lo, hi, df) * factors[j - first]
            j -= 1
        return first, np.array(weights)

    def evaluate(self, spectra: Union[Spectrum, Mapping[str, Spectrum]],
                 speed_hz: Optional[float]) -> List[BandValue]:
        """Band values at the current running speed. `spectra` maps each
        band's `spectrum` ("raw", "envelope") to its Spectrum; a lone
        Spectrum serves as "raw"."""
        if isinstance(spectra, Spectrum):
            spectra = {"raw": spectra}
        out: List[BandValue] = []
        df = self.bin_hz
        for spectrum, rows, labels, band, fixed in self._groups:
            if fixed is None:
                edges = band.edges_hz(speed_hz)
                last = self._last.get(id(band))
                if last is not None and last[0] == edges:
                    first, w = last[1]
                else:
                    first, w = self._weights(band, edges)
                    self._last[id(band)] = (edges, (first, w))
            else:
                first, w, edges = fixed
            # One band's weights serve all its channels: one product per band.
            psd = spectra[spectrum].psd[rows, first : first + len(w)]
            for label, power in zip(labels, (psd @ w).tolist()):
                # A BandValue made as its own __new__ makes it, minus the call.
                out.append(_new_tuple(BandValue, (*label, _root(power * df), edges)))
        return out

    def velocity_rms(self, spectrum: Spectrum) -> np.ndarray:
        """Broadband RMS velocity over 10-1000 Hz (capped at Nyquist), mm/s,
        per channel: the digital stand-in for the ISO 2954 analogue filter."""
        return np.sqrt(spectrum.psd @ self._velocity * spectrum.bin_hz)
