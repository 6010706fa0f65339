"""Spectral windows and the scale factors that come with them.

Every window offered is a cosine sum, w[n] = sum_k (-1)^k a_k cos(2 pi k n / N),
in its periodic ("DFT-even") form, as scipy.signal.get_window returns by
default. A `Window` is built once per spectrum size and carries what the
spectral stage needs, computed once: the samples, the coherent gain, the
equivalent noise bandwidth, the spread of its main lobe (for integration),
and a table that turns the ratio of two adjacent bin magnitudes into the
tone's offset from the larger bin.
"""

from bisect import bisect_right
from functools import lru_cache
from typing import Dict, Tuple

import numpy as np

from ..config.schema import WINDOWS

# Coefficients a_k, one set per name in WINDOWS (the names a config accepts). Hann and Hamming are the classical pairs; Blackman-Harris
# is the 4-term -92 dB set of Harris (1978); the flat top is the 5-term set
# scipy.signal.windows.flattop uses.
COEFFICIENTS: Dict[str, Tuple[float, ...]] = {
    "rectangular": (1.0,),
    "hann": (0.5, 0.5),
    "hamming": (0.54, 0.46),
    "blackman-harris": (0.35875, 0.48829, 0.14128, 0.01168),
    "flattop": (0.21557895, 0.41663158, 0.277263158, 0.083578947, 0.006947368),
}

# Half-width of the main lobe in bins: the peak search skips this many bins
# above DC, where the window's own image of the mean would sit.
MAIN_LOBE_BINS = {"rectangular": 1, "hann": 2, "hamming": 2, "blackman-harris": 4, "flattop": 5}
assert set(COEFFICIENTS) == set(MAIN_LOBE_BINS) == set(WINDOWS), "a window name without its coefficients"

_TABLE_POINTS = 2049


class Window:
    """A periodic cosine-sum window of `size` samples and its scale factors."""

    def __init__(self, name: str, size: int) -> None:
        if name not in COEFFICIENTS:
            raise ValueError(f"{name=} is not one of {', '.join(COEFFICIENTS)}")
        if size < 4:
            raise ValueError(f"{size=} is too short for a window")
        self.name = name
        self.size = size
        self.coefficients = np.asarray(COEFFICIENTS[name], dtype=float)
        n = np.arange(size)
        signs = (-1.0) ** np.arange(len(self.coefficients))
        self.samples = np.sum(
            (signs * self.coefficients)[:, None] * np.cos(2 * np.pi * np.outer(np.arange(len(signs)), n) / size),
            axis=0,
        )
        self.sum = float(self.samples.sum())
        self.sum_sq = float(np.dot(self.samples, self.samples))
        self.coherent_gain = self.sum / size
        self.enbw_bins = size * self.sum_sq / self.sum**2
        self.main_lobe = MAIN_LOBE_BINS[name]
        self.spread = _spread(self.coefficients)
        self._ratio_offsets, self._ratios, self._gains = _ratio_table(name, size)
        # The same table as plain floats, for reading one ratio at a time.
        self._ratio_list = self._ratios.tolist()
        self._offset_list = self._ratio_offsets.tolist()

    def kernel(self, offset_bins: np.ndarray) -> np.ndarray:
        """|W(offset)| / W(0): the window's response to a tone `offset` bins away."""
        return _kernel(self.coefficients, self.size, np.asarray(offset_bins, dtype=float))

    def offset_from_ratio(self, ratio: np.ndarray) -> np.ndarray:
        """Tone offset (0..0.5 bin) toward the larger neighbour, from
        ratio = |X[k+-1]| / |X[k]| of the peak bin k and that neighbour."""
        return np.interp(ratio, self._ratios, self._ratio_offsets)

    def offset_at(self, ratio: float) -> float:
        """`offset_from_ratio` of one plain float, worked as np.interp works
        it (the same interval, slope and operations, so the same number),
        without numpy's cost per call: the speed tracker reads one a hop."""
        xs, ys = self._ratio_list, self._offset_list
        if ratio != ratio:
            return ratio
        j = bisect_right(xs, ratio) - 1  # xs[j] <= ratio < xs[j + 1]
        if j < 0:
            return ys[0]
        if j >= len(xs) - 1 or xs[j] == ratio:
            return ys[j]
        slope = (ys[j + 1] - ys[j]) / (xs[j + 1] - xs[j])
        offset = slope * (ratio - xs[j]) + ys[j]
        if offset != offset:  # np.interp's second try, from the right end
            offset = slope * (ratio - xs[j + 1]) + ys[j + 1]
            if offset != offset and ys[j] == ys[j + 1]:
                offset = ys[j]
        return offset

    def gain_at(self, offset: np.ndarray) -> np.ndarray:
        """`kernel` for offsets in 0..0.5 bin, read from the table built once."""
        return np.interp(offset, self._ratio_offsets, self._gains)

    def scalloping_loss_db(self) -> float:
        """Loss of a tone half-way between two bins, in dB."""
        return float(-20 * np.log10(self.kernel(np.array([0.5]))[0]))


def _spread(coefficients: np.ndarray) -> Tuple[float, float]:
    """Second and fourth moments (lines**2, lines**4) of the window's power
    response to a tone on a line: that response is a_0**2 on the line and
    (a_k / 2)**2 at k lines either side, so the moments follow from the
    coefficients alone."""
    a = coefficients
    k = np.arange(len(a))
    side = a[1:] ** 2 / 2.0  # both sides of line k together
    total = a[0] ** 2 + side.sum()
    return float((k[1:] ** 2 * side).sum() / total), float((k[1:] ** 4 * side).sum() / total)


def _kernel(coefficients: np.ndarray, size: int, x: np.ndarray) -> np.ndarray:
    """Magnitude of the window's DTFT at `x` bins, normalised to 1 at 0.

    A periodic cosine-sum window is a sum of complex exponentials, so its
    transform is the same sum of shifted Dirichlet kernels: exact for any N,
    with no large transform to compute.
    """
    total = np.zeros(x.shape, dtype=complex)
    for k, a in enumerate(coefficients):
        sign = (-1.0) ** k
        shifts = (0.0,) if k == 0 else (float(k), float(-k))
        weight = a if k == 0 else a / 2.0
        for s in shifts:
            total += sign * weight * _dirichlet(x - s, size)
    return np.abs(total) / (coefficients[0] * size)


def _dirichlet(x: np.ndarray, size: int) -> np.ndarray:
    """sum_{n<N} exp(-j 2 pi x n / N), the transform of N ones at x bins."""
    x = np.asarray(x, dtype=float)
    out = np.empty(x.shape, dtype=complex)
    near = np.abs(np.sin(np.pi * x / size)) < 1e-12
    xs = x[~near]
    out[~near] = np.exp(-1j * np.pi * xs * (size - 1) / size) * np.sin(np.pi * xs) / np.sin(np.pi * xs / size)
    # At multiples of N bins the kernel is N times a unit phase; only 0 occurs here.
    out[near] = size
    return out


@lru_cache(maxsize=32)
def _ratio_table(name: str, size: int) -> Tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Against d in [0, 0.5]: the ratio |W(1 - d)| / |W(d)| (increasing in
    d) and the gain |W(d)|."""
    coefficients = np.asarray(COEFFICIENTS[name], dtype=float)
    d = np.linspace(0.0, 0.5, _TABLE_POINTS)
    gain = _kernel(coefficients, size, d)
    ratio = _kernel(coefficients, size, 1.0 - d) / gain
    # The ratio rises with d for every window here; keep it strictly so.
    ratio = np.maximum.accumulate(ratio)
    return d, ratio, gain
