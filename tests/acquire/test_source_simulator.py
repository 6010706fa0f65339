"""The invented machine of the simulator source."""

import numpy as np
import pytest
import scipy.signal

from monitor.config import parse
from monitor.acquire.sources import open_source

CONFIG = """
[node]
name = "sim"
[source]
kind = "simulator"
sample_rate = 4096.0
channels = ["a", "b"]
realtime = false
sim_rpm = 1500.0
sim_harmonics = [0.5, 0.2]
sim_growth = 0.6
sim_noise = 0.0
sim_seed = 3
sim_seconds = {seconds}
"""


def collect(seconds=8.0, **replace):
    text = CONFIG.format(seconds=seconds)
    for key, value in replace.items():
        text = text.replace(f"{key} = ", f"{key} = {value} #")
    source = open_source(parse(text).source)
    source.open()
    blocks = []
    while True:
        block = source.read(0.1)
        if block is None:
            break
        blocks.append(block.samples)
    assert source.ended
    return source, np.vstack(blocks)


def test_runs_for_its_seconds_and_counts_samples():
    source, x = collect(seconds=2.5)
    assert x.shape == (int(2.5 * 4096), 2)
    assert source.samples == x.shape[0]


def test_harmonics_at_orders_of_the_running_speed():
    # Reference: scipy.signal.periodogram with a flat-top window reads tone
    # amplitudes to about 0.01 dB (check-values.md, flat top scalloping).
    _, x = collect(seconds=1.0, sim_growth=0.0)
    f, p = scipy.signal.periodogram(x[:, 0], 4096.0, window="flattop", scaling="spectrum")
    amp = lambda hz: np.sqrt(2 * p[np.argmin(np.abs(f - hz))])  # noqa: E731
    # 1500 rpm = 25 Hz (rpm/60, common practice); the speed wanders +-0.3 %.
    assert amp(25.0) == pytest.approx(0.5, rel=0.01)
    assert amp(50.0) == pytest.approx(0.2, rel=0.01)
    # The second channel sees the machine at gain 1/1.4.
    f, p = scipy.signal.periodogram(x[:, 1], 4096.0, window="flattop", scaling="spectrum")
    assert np.sqrt(2 * p[np.argmin(np.abs(f - 25.0))]) == pytest.approx(0.5 / 1.4, rel=0.01)


def test_the_fault_grows():
    _, x = collect(seconds=60.0)

    def one_x(part):
        f, p = scipy.signal.periodogram(part, 4096.0, window="flattop", scaling="spectrum")
        return np.sqrt(2 * p[np.argmin(np.abs(f - 25.0))])

    # The 1x peak grows 0.6 per minute: from 0.5 + 0.005 over the first second
    # (its mean time 0.5 s) to 0.5 + 0.595 over the last.
    assert one_x(x[:4096, 0]) == pytest.approx(0.505, rel=0.01)
    assert one_x(x[-4096:, 0]) == pytest.approx(1.095, rel=0.01)


def test_same_seed_same_samples():
    _, a = collect(seconds=1.0, sim_noise=0.1)
    _, b = collect(seconds=1.0, sim_noise=0.1)
    assert np.array_equal(a, b)
