"""The block: consecutive samples as every source hands them to the monitor.

Decoders make blocks from stream bytes; the file, simulator and memory
sources make them directly. Build one with keywords (`Block(samples=x,
lost=n)`): the optional fields are easy to mix up by position.
"""

from typing import Dict, NamedTuple, Optional

import numpy as np

# Largest positive raw value of each integer sample type, for the clipping
# check. 8-bit WAV samples are unsigned on disk and shifted to -128..127 by
# the reader, so their full scale is 127.
FULL_SCALE: Dict[str, float] = {"uint8": 127.0, "int16": 32767.0, "int24": 8388607.0, "int32": 2147483647.0}


def full_scale(sample_type: str) -> Optional[float]:
    """The clipping level of an integer `sample_type`; None for floats and text."""
    return FULL_SCALE.get(sample_type)


class Block(NamedTuple):
    """Consecutive samples, shaped (n, channels), in raw units (before scale).

    `lost` counts samples per channel known to be missing just before this
    block (a sequence gap); the monitor never lets a spectrum span them.
    `full_scale` is the largest positive value of the raw integer type
    (32767 for int16), when the samples came as integers: a sample at or
    beyond it in magnitude is clipped.
    `timestamp_us` is the sensor's time of the first sample, when it sent one.
    """

    samples: np.ndarray
    lost: int = 0
    full_scale: Optional[float] = None
    timestamp_us: Optional[int] = None
