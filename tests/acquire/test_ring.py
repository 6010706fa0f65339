"""The fixed sample ring."""

import numpy as np
import pytest

from monitor.acquire.ring import Ring


def test_keeps_the_newest_samples_in_order():
    # The newest 10 of 100 written rows, in order: rows 90..99, by construction.
    ring = Ring(2, 10)
    data = np.arange(200, dtype=float).reshape(100, 2)
    for start in range(0, 100, 7):
        ring.write(data[start : start + 7])
    assert np.array_equal(ring.latest(10), data[-10:].T)
    assert ring.count == 10


def test_memory_is_allocated_once():
    ring = Ring(3, 64)
    buf = ring._buf
    for _ in range(1000):
        ring.write(np.ones((17, 3)))
    assert ring._buf is buf


def test_clear_and_limits():
    ring = Ring(1, 8)
    ring.write(np.ones((5, 1)))
    ring.clear()
    with pytest.raises(ValueError, match="n=1"):
        ring.latest(1)
    with pytest.raises(ValueError, match="n=9"):
        ring.write(np.ones((9, 1)))
