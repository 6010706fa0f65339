"""Running-speed tracking inside the search range, and its harmonic guard.
Sources: tests/references.md."""

import numpy as np
import pytest

from monitor.config import SpeedConfig
from monitor.analyse.spectrum import SpectralStage
from monitor.analyse.speed import SpeedTracker, _long_range, _short_range

FS, SIZE = 2560.0, 4096


def spectrum(x):
    return SpectralStage(FS, SIZE, "hann", 1, x.shape[0]).push(x)


def signal(*tones, noise=0.0):
    t = np.arange(SIZE) / FS
    x = sum(a * np.sin(2 * np.pi * f * t) for f, a in tones)
    x = x + np.random.default_rng(0).normal(0, noise, SIZE) if noise else x
    return np.atleast_2d(x)


def tracker(search_hz=(20.0, 30.0)):
    # Shaft frequency = rpm / 60 (common practice): 1500 rpm = 25 Hz.
    return SpeedTracker(SpeedConfig(rpm=1500.0, track=True, search_hz=search_hz))


def test_follows_the_1x_peak_between_lines():
    tr = tracker()
    bin_hz = FS / SIZE
    speed = tr.update(spectrum(signal((24.3, 1.0))))
    # Analytic: the tone is at 24.3 Hz; Hann at 39 lines is within 0.0001
    # line (README, peak table), so 0.01 line is loose.
    assert abs(speed - 24.3) < 0.01 * bin_hz
    assert tr.locked


def test_a_stronger_harmonic_outside_the_range_is_ignored():
    # Analytic: 1x is the 24.3 Hz tone.
    speed = tracker().update(spectrum(signal((24.3, 0.2), (48.6, 2.0), (72.9, 1.0))))
    assert speed == pytest.approx(24.3, abs=0.01)


def test_noise_only_keeps_the_nominal_speed():
    tr = tracker()
    assert tr.update(spectrum(signal(noise=1.0))) == 25.0  # 1500 rpm / 60, untouched
    assert not tr.locked


def test_without_tracking_the_nominal_speed_stays():
    tr = SpeedTracker(SpeedConfig(rpm=2960.0))
    # rpm / 60 (common practice): 2960 rpm is 49.333 Hz.
    assert tr.update(spectrum(signal((24.3, 1.0)))) == pytest.approx(49.333, abs=1e-3)


# Harmonic guard. Every case below is an analytic mix of tones: 1x is the
# lowest tone of the series, whatever the strongest.


def test_a_2x_three_times_stronger_in_a_two_octave_range_reads_1x():
    # 1x at 20.33 Hz, 2x three times stronger, range 11..44 Hz (two octaves).
    tr = tracker(search_hz=(11.0, 44.0))
    speed = tr.update(spectrum(signal((20.33, 1.0), (40.66, 3.0), noise=0.01)))
    assert speed == pytest.approx(20.33, abs=0.01)
    assert tr.locked


def test_the_case_that_read_2x_reads_1x():
    # 1x at 20.33 Hz and 2x twice as strong in 15..45 Hz read 40.66 Hz before the guard.
    speed = tracker(search_hz=(15.0, 45.0)).update(spectrum(signal((20.33, 1.0), (40.66, 2.0))))
    assert speed == pytest.approx(20.33, abs=0.01)


def test_a_constant_25_hz_machine_in_15_to_55_hz_reads_25_hz():
    # 25 Hz with 2x stronger than 1x: the range holds 1x and 2x.
    tr = tracker(search_hz=(15.0, 55.0))
    for seed in range(3):
        x = signal((25.0, 0.5), (50.0, 1.2), (75.0, 0.4)) + np.random.default_rng(seed).normal(0, 0.01, SIZE)
        assert tr.update(spectrum(x)) == pytest.approx(25.0, abs=0.01)


def test_a_3x_stronger_than_1x_reads_1x():
    # f/3: 1x at 15.2 Hz, 3x at 45.6 Hz five times stronger, no 2x.
    speed = tracker(search_hz=(12.0, 50.0)).update(spectrum(signal((15.2, 0.2), (45.6, 1.0), noise=0.01)))
    assert speed == pytest.approx(15.2, abs=0.01)


@pytest.mark.parametrize("seed", range(5))
def test_a_machine_with_only_1x_is_never_halved(seed):
    # Only 1x at 31.7 Hz in noise, 10..80 Hz: f/2 and f/3 hold noise alone.
    x = signal((31.7, 1.0)) + np.random.default_rng(seed).normal(0, 0.3, SIZE)
    tr = tracker(search_hz=(10.0, 80.0))
    assert tr.update(spectrum(x)) == pytest.approx(31.7, abs=0.02)
    # Noise-free, on a line and between lines: rounding residue is no peak.
    assert tr.update(spectrum(signal((31.25, 1.0)))) == pytest.approx(31.25, abs=1e-6)
    assert tr.update(spectrum(signal((31.7, 1.0)))) == pytest.approx(31.7, abs=0.001)


def test_the_guard_takes_the_lowest_of_the_series():
    # 1x, 2x and 4x, 4x strongest: from 4x the guard steps to 2x, then to 1x.
    speed = tracker(search_hz=(10.0, 100.0)).update(
        spectrum(signal((21.1, 0.3), (42.2, 0.6), (84.4, 2.0), noise=0.01)))
    assert speed == pytest.approx(21.1, abs=0.01)


def test_the_speed_is_stamped_at_the_middle_of_the_spectrum():
    # This project's choice (README, What it measures): measured_s is the
    # time given with the spectrum the speed was read from, and stays with a
    # held speed.
    tr = tracker()
    tr.update(spectrum(signal((24.3, 1.0))), centre_s=12.5)
    assert tr.measured_s == 12.5
    tr.update(spectrum(signal(noise=1.0)), centre_s=13.0)  # no clear peak: held
    assert not tr.locked and tr.measured_s == 12.5


@pytest.mark.parametrize("channels", [1, 2, 3])
def test_both_readings_of_the_range_are_numpys(channels):
    # Reference: numpy. The search range is summed over channels as
    # ndarray.sum(axis=0) sums it, its strongest line is np.argmax's (the
    # first of equal ones) and its floor the middle value of np.sort (the
    # upper of the two middle ones for an even count), whether read as plain
    # floats (narrow ranges) or with numpy (wide ones); ties included.
    rng = np.random.default_rng(channels)
    for n in list(range(3, 40)) * 8:
        psd = rng.choice([0.0, 1.0, 2.5, 7.0], size=(channels, n + 10)) if n % 2 else rng.random((channels, n + 10)) ** 4
        block = psd[:, 4 : n + 4]  # a slice of the spectrum, as update reads it
        total = block.sum(axis=0)
        inner = total[1:-1]
        for part, j, floor in (_short_range(block), _long_range(block)):
            assert np.array_equal(np.asarray(part), total)
            assert j == int(np.argmax(inner))
            assert floor == np.sort(inner)[len(inner) // 2]
    block = np.array([[1.0, 2.0, np.nan, 0.5]] * channels)
    assert _short_range(block) is None  # NaN: numpy decides
