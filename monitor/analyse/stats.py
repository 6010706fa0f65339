"""Time-domain statistics of the samples a result covers."""

from typing import Dict

import numpy as np


def time_stats(x: np.ndarray) -> Dict[str, np.ndarray]:
    """RMS, peak, crest factor and kurtosis per row of `x` (channels, samples).

    The mean is removed first: a MEMS sensor's gravity offset or an amplifier's
    DC is not vibration. Kurtosis is Pearson's m4 / m2**2, 3 for Gaussian noise
    and 1.5 for a pure sine (common practice).
    """
    # One row at a time, squares and magnitudes in place: the summary asks
    # for a whole span every interval, and the temporaries of all channels
    # at once (about 1 MB at 3 x 20480) would set the process's peak memory.
    mean = x.mean(axis=1)
    m2, m4, peak = (np.empty(x.shape[0]) for _ in range(3))
    for i, row in enumerate(x):
        d = row - mean[i]
        sq = d * d
        m2[i] = np.mean(sq)
        m4[i] = np.mean(np.square(sq, out=sq))
        peak[i] = np.max(np.abs(d, out=d))
        del d, sq  # before the next row's are made
    rms = np.sqrt(m2)
    with np.errstate(invalid="ignore", divide="ignore"):
        crest = np.where(rms > 0, peak / rms, np.nan)
        kurtosis = np.where(m2 > 0, m4 / (m2 * m2), np.nan)
    return {"rms": rms, "peak": peak, "crest": crest, "kurtosis": kurtosis}
