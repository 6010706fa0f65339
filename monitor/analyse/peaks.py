"""Reading a tone's frequency and amplitude between DFT lines.

The estimator is the two-line ratio method of Grandke (IEEE Trans. Instrum.
Meas. 32(2), 1983): the ratio of the larger neighbour to the peak line fixes
the tone's offset, and the window's response at that offset corrects the
amplitude. Grandke gives the Hann case in closed form, (2a - 1)/(a + 1); here
the same ratio is inverted numerically from each window's exact transform
(monitor.windows), so every window gets the method.
"""

from typing import Tuple

import numpy as np

from .windows import Window


def interpolate_peak(
    magnitude: np.ndarray, window: Window, bin_hz: float, lo_bin: int, hi_bin: int
) -> Tuple[np.ndarray, np.ndarray]:
    """Frequency (Hz) and corrected magnitude of the largest line in
    [lo_bin, hi_bin] of each row of `magnitude` (rows: channels, columns: lines).

    `magnitude` must be linear in amplitude (an RMS amplitude spectrum), not
    power. Rows with no signal give the line frequency and zero.
    """
    mag = np.atleast_2d(magnitude)
    last = mag.shape[1] - 1
    lo_bin = max(0, lo_bin)
    hi_bin = min(last, hi_bin)
    k = lo_bin + np.argmax(mag[:, lo_bin : hi_bin + 1], axis=1)
    rows = np.arange(mag.shape[0])
    peak = mag[rows, k]
    left = np.where(k > 0, mag[rows, np.maximum(k - 1, 0)], 0.0)
    right = np.where(k < last, mag[rows, np.minimum(k + 1, last)], 0.0)
    side = np.where(right >= left, 1.0, -1.0)
    neighbour = np.maximum(left, right)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(peak > 0, neighbour / peak, 0.0)
    offset = window.offset_from_ratio(ratio)
    freq = (k + side * offset) * bin_hz
    amplitude = peak / window.gain_at(offset)
    return freq, amplitude
