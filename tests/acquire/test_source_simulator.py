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
    # seconds times the sample rate, 4096 Hz, rows; one column per channel.
    assert x.shape == (int(2.5 * 4096), 2)
    assert source.samples == x.shape[0]


def test_harmonics_at_orders_of_the_running_speed():
    # Reference: scipy.signal.periodogram with scipy's flat-top window, whose
    # scalloping loss is under 0.02 dB (0.25 %; tests/test_windows.py
    # computes it from scipy's samples). The amplitudes are the invented
    # machine's own settings (README, simulator keys).
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

    # The invented machine's 1x grows sim_growth = 0.6 per minute (README,
    # simulator keys), linearly. A symmetric window reads a linear ramp at
    # its centre: 0.5 + 0.6 * t / 60 at t = 0.5 s, 30.5 s and 59.5 s. The flat
    # top reads within 0.25 % (see above); its error is the same share at
    # each frame, so differences carry under 0.003.
    first, middle, last = (one_x(x[start : start + 4096, 0]) for start in (0, 30 * 4096, 59 * 4096))
    assert first == pytest.approx(0.505, abs=0.002)  # 0.500 without growth
    assert middle - first == pytest.approx(0.30, abs=0.003)
    assert last - first == pytest.approx(0.59, abs=0.003)


def test_same_seed_same_samples():
    _, a = collect(seconds=1.0, sim_noise=0.1)
    _, b = collect(seconds=1.0, sim_noise=0.1)
    assert np.array_equal(a, b)
