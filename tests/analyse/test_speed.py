"""Running-speed tracking inside the search range."""

import numpy as np
import pytest

from monitor.config import SpeedConfig
from monitor.analyse.spectrum import SpectralStage
from monitor.analyse.speed import SpeedTracker

FS, SIZE = 2560.0, 4096


def spectrum(x):
    return SpectralStage(FS, SIZE, "hann", 1, x.shape[0]).push(x)


def signal(*tones, noise=0.0):
    t = np.arange(SIZE) / FS
    x = sum(a * np.sin(2 * np.pi * f * t) for f, a in tones)
    x = x + np.random.default_rng(0).normal(0, noise, SIZE) if noise else x
    return np.atleast_2d(x)


def tracker():
    # Shaft frequency = rpm / 60 (check-values.md, common practice): 1500 rpm = 25 Hz.
    return SpeedTracker(SpeedConfig(rpm=1500.0, track=True, search_hz=(20.0, 30.0)))


def test_follows_the_1x_peak_between_lines():
    tr = tracker()
    bin_hz = FS / SIZE
    speed = tr.update(spectrum(signal((24.3, 1.0))))
    assert abs(speed - 24.3) < 0.01 * bin_hz  # Grandke (1983): 0.01 bin on noise-free tones
    assert tr.locked


def test_a_stronger_harmonic_outside_the_range_is_ignored():
    speed = tracker().update(spectrum(signal((24.3, 0.2), (48.6, 2.0), (72.9, 1.0))))
    assert speed == pytest.approx(24.3, abs=0.01)


def test_noise_only_keeps_the_nominal_speed():
    tr = tracker()
    assert tr.update(spectrum(signal(noise=1.0))) == pytest.approx(25.0)
    assert not tr.locked


def test_without_tracking_the_nominal_speed_stays():
    tr = SpeedTracker(SpeedConfig(rpm=2960.0))
    # check-values.md: 2960 rpm is 49.33 Hz.
    assert tr.update(spectrum(signal((24.3, 1.0)))) == pytest.approx(49.333, abs=1e-3)
