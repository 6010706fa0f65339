"""Time-domain statistics of the samples a result covers."""

from typing import Dict

import numpy as np


def time_stats(x: np.ndarray) -> Dict[str, np.ndarray]:
    """RMS, peak, crest factor and kurtosis per row of `x` (channels, samples).

    The mean is removed first: a MEMS sensor's gravity offset or an amplifier's
    DC is not vibration. Kurtosis is Pearson's m4 / m2**2, 3 for Gaussian noise
    and 1.5 for a pure sine (common practice).
    """
    d = x - x.mean(axis=1, keepdims=True)
    m2 = np.mean(d * d, axis=1)
    m4 = np.mean((d * d) ** 2, axis=1)
    rms = np.sqrt(m2)
    peak = np.max(np.abs(d), axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        crest = np.where(rms > 0, peak / rms, np.nan)
        kurtosis = np.where(m2 > 0, m4 / (m2 * m2), np.nan)
    return {"rms": rms, "peak": peak, "crest": crest, "kurtosis": kurtosis}
