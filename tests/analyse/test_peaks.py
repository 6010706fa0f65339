"""Peak frequency and amplitude between lines, against the published accuracy."""

import numpy as np
import pytest

from monitor.analyse.peaks import interpolate_peak
from monitor.analyse.spectrum import SpectralStage

FS, SIZE = 4096.0, 4096  # 1 Hz lines


def measure(freq, amplitude, window):
    t = np.arange(SIZE) / FS
    x = (amplitude * np.sin(2 * np.pi * freq * t + 0.7))[None, :]
    spec = SpectralStage(FS, SIZE, window, 1, 1).push(x)
    f, a = interpolate_peak(spec.rms_amplitude, spec.window, spec.bin_hz, 5, SIZE // 2)
    return f[0], a[0]


OFFSETS = np.linspace(-0.5, 0.5, 11)


@pytest.mark.parametrize("window", ["hann", "hamming", "blackman-harris", "flattop", "rectangular"])
@pytest.mark.parametrize("offset", OFFSETS)
def test_noise_free_tone_within_published_accuracy(window, offset):
    # check-values.md, Grandke (1983): noise-free tones, frequency within
    # 0.01 bin and amplitude within 0.1 %.
    freq = 300.0 + offset
    f, a = measure(freq, 2.0, window)
    assert abs(f - freq) < 0.01 * FS / SIZE
    assert a == pytest.approx(2.0 / np.sqrt(2), rel=1e-3)


@pytest.mark.parametrize("offset", [0.05, 0.2, 0.33, 0.45])
def test_hann_offset_is_grandkes_closed_form(offset):
    # Grandke (1983): for Hann, with a = |X[k+1]| / |X[k]|, the tone sits
    # (2a - 1) / (a + 1) lines above k.
    freq = 500.0 + offset
    t = np.arange(SIZE) / FS
    x = np.hanning(SIZE + 1)[:-1] * np.sin(2 * np.pi * freq * t)
    mag = np.abs(np.fft.rfft(x))
    k = int(np.argmax(mag))
    a = mag[k + 1] / mag[k]
    f, _ = measure(freq, 1.0, "hann")
    assert f == pytest.approx(k + (2 * a - 1) / (a + 1), abs=1e-4)


def test_peak_search_respects_the_range():
    t = np.arange(SIZE) / FS
    x = (np.sin(2 * np.pi * 100.2 * t) + 0.1 * np.sin(2 * np.pi * 700.7 * t))[None, :]
    spec = SpectralStage(FS, SIZE, "hann", 1, 1).push(x)
    f, a = interpolate_peak(spec.rms_amplitude, spec.window, spec.bin_hz, 600, 800)
    assert f[0] == pytest.approx(700.7, abs=0.01)
    assert a[0] == pytest.approx(0.1 / np.sqrt(2), rel=1e-3)
