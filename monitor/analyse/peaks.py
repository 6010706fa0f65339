"""Reading a tone's frequency and amplitude between DFT lines.

The ratio of the larger neighbour to the peak line fixes the tone's offset
from the peak line, and the window's response at that offset corrects the
amplitude. For the Hann window this is the two-line method of Grandke (IEEE
Trans. Instrum. Meas. 32(2), 1983), with the closed form (2a - 1)/(a + 1).
For every window this project instead inverts the same ratio numerically
from the window's exact transform (monitor.analyse.windows): for Hann that agrees
with the closed form, for the others it is this project's generalisation. Its accuracy per window, near DC and far
from it, is measured in tests/test_peaks.py and tabled in the README.
"""

from typing import Tuple

import numpy as np

from .windows import Window


def interpolate_peak(
    magnitude: np.ndarray, window: Window, bin_hz: float, lo_bin: int, hi_bin: int
) -> Tuple[np.ndarray, np.ndarray]:
    """Frequency (Hz) and corrected magnitude of the largest peak in
    [lo_bin, hi_bin] of each row of `magnitude` (rows: channels, columns: lines).

    `magnitude` must be linear in amplitude (an RMS amplitude spectrum), not
    power. A peak is a line above zero and at least as large as both its
    neighbours, those outside the range included: the skirt of a tone outside
    the range is no peak in it. A row with no peak in the range (no signal,
    or only such a skirt) gives NaN for both.
    """
    mag = np.atleast_2d(magnitude)
    rows, lines = mag.shape
    last = lines - 1
    lo_bin = max(0, lo_bin)
    hi_bin = min(last, hi_bin)
    if hi_bin < lo_bin:
        return np.full(rows, np.nan), np.full(rows, np.nan)
    padded = np.zeros((rows, lines + 2))  # a zero line beyond either end
    padded[:, 1:-1] = mag
    inner = padded[:, lo_bin + 1 : hi_bin + 2]
    is_peak = (inner > 0) & (inner >= padded[:, lo_bin : hi_bin + 1]) & (inner >= padded[:, lo_bin + 2 : hi_bin + 3])
    ranked = np.where(is_peak, inner, -1.0)
    k = lo_bin + np.argmax(ranked, axis=1)
    found = ranked.max(axis=1, initial=-1.0) > 0
    index = np.arange(rows)
    peak = mag[index, k]
    left = padded[index, k]
    right = padded[index, k + 2]
    side = np.where(right >= left, 1.0, -1.0)
    neighbour = np.maximum(left, right)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(found, neighbour / np.where(found, peak, 1.0), 0.0)
    offset = window.offset_from_ratio(ratio)
    freq = np.where(found, (k + side * offset) * bin_hz, np.nan)
    amplitude = np.where(found, peak / window.gain_at(offset), np.nan)
    return freq, amplitude
