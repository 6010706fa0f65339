"""The spectral stage against scipy.signal.welch and Parseval."""

import numpy as np
import pytest
import scipy.signal

from monitor.analyse.spectrum import SpectralStage
from test_windows import SCIPY_NAMES


def _run_stage(x, fs, size, hop, window, averages):
    stage = SpectralStage(fs, size, window, averages, x.shape[0])
    result = None
    for i in range(averages):
        result = stage.push(x[:, i * hop : i * hop + size])
    return result


@pytest.mark.parametrize("window", sorted(SCIPY_NAMES))
@pytest.mark.parametrize("size,hop,averages", [(256, 128, 4), (1024, 1024, 2), (512, 52, 7), (256, 256, 1)])
def test_equals_scipy_welch(window, size, hop, averages):
    # Reference: scipy.signal.welch (Welch 1967) with the same window, segment
    # length, overlap and detrend="constant": our PSD and power spectrum equal
    # it to 1e-9 (this project's bound: rounding, far above it in practice).
    fs = 2560.0
    rng = np.random.default_rng(size + hop)
    x = rng.normal(size=(3, size + (averages - 1) * hop)) + np.array([[0.5], [-2.0], [0.0]])
    got = _run_stage(x, fs, size, hop, window, averages)
    for scaling, ours in (("density", got.psd), ("spectrum", got.power)):
        f, ref = scipy.signal.welch(
            x, fs, window=SCIPY_NAMES[window], nperseg=size, noverlap=size - hop,
            detrend="constant", scaling=scaling,
        )
        # DC is zero after mean removal; compare it against the spectrum's scale.
        assert np.allclose(ours, ref, rtol=1e-9, atol=1e-15 * ref.max())
        assert np.allclose(got.freqs, f, rtol=1e-12)


def test_parseval_power_sum_equals_variance():
    # Parseval's theorem (common practice): PSD times bin width summed over all
    # lines equals the time-domain variance; with one rectangular frame it is exact
    # against numpy.var.
    fs, size = 1000.0, 1024
    x = np.random.default_rng(3).normal(0.2, 1.5, size=(1, size))
    got = _run_stage(x, fs, size, size, "rectangular", 1)
    assert np.sum(got.psd) * got.bin_hz == pytest.approx(np.var(x), rel=1e-12)


@pytest.mark.parametrize("window", ["hann", "blackman-harris", "flattop"])
def test_parseval_on_noise_with_any_window(window):
    # Parseval's theorem (common practice): on white noise, averaged over 64
    # frames, the windowed estimate of the total power approaches numpy.var
    # (about 1/sqrt(64 * 1024 / ENBW) of scatter: 3 % holds it).
    fs, size, hop, averages = 1000.0, 1024, 512, 64
    x = np.random.default_rng(4).normal(0, 2.0, size=(1, size + (averages - 1) * hop))
    got = _run_stage(x, fs, size, hop, window, averages)
    assert np.sum(got.psd) * got.bin_hz == pytest.approx(np.var(x), rel=0.03)


@pytest.mark.parametrize("window", sorted(SCIPY_NAMES))
def test_tone_on_a_bin_reads_its_rms(window):
    # Analytic: a sine of amplitude A has RMS A/sqrt(2); the one-sided
    # amplitude spectrum corrected by the coherent gain shows it at the tone
    # (Harris 1978, Table I, coherent gain).
    fs, size = 1024.0, 1024
    k = 100
    t = np.arange(size) / fs
    x = 3.0 * np.sin(2 * np.pi * k * fs / size * t)[None, :]
    got = _run_stage(x, fs, size, size, window, 1)
    assert got.rms_amplitude[0, k] == pytest.approx(3.0 / np.sqrt(2), rel=1e-9)


def test_alias_of_a_tone_just_under_the_sampling_rate():
    # Sampling theorem (common practice): a tone at f sampled at fs shows at |f - fs|.
    fs, size = 1000.0, 1024
    f = fs - 12.5
    x = np.sin(2 * np.pi * f * np.arange(4 * size) / fs)[None, :]
    got = _run_stage(x, fs, size, size, "hann", 4)
    peak_hz = got.freqs[np.argmax(got.psd[0])]
    assert abs(peak_hz - 12.5) <= got.bin_hz


def test_reset_forgets_frames():
    stage = SpectralStage(100.0, 256, "hann", 2, 1)
    frame = np.ones((1, 256))
    assert stage.push(frame) is None
    stage.reset()
    assert stage.push(frame) is None
    assert stage.push(frame) is not None


def test_size_must_be_a_power_of_two():
    with pytest.raises(ValueError, match="size=1000"):
        SpectralStage(100.0, 1000, "hann", 1, 1)


@pytest.mark.parametrize("averages", [1, 3, 4])
def test_the_average_is_numpys_mean_of_the_frames_power_exactly(averages):
    # Reference: numpy itself, term by term (ndarray.mean for the mean removal
    # and for the average, np.fft.rfft, |X|^2 as re^2 + im^2, welch's density
    # scale): the stage gives the very same numbers, not just close ones,
    # through a non-contiguous frame as the sample ring hands it over.
    fs, size, hop = 5120.0, 1024, 384
    rng = np.random.default_rng(averages)
    x = rng.normal(size=(2, size + (averages + 2) * hop)) * np.array([[1e-3], [40.0]]) + 0.7
    stage = SpectralStage(fs, size, "hann", averages, 2)
    w = scipy.signal.get_window("hann", size, fftbins=True)
    scale = np.full(size // 2 + 1, 2.0 / (fs * np.dot(stage.window.samples, stage.window.samples)))
    scale[0] /= 2.0
    scale[-1] /= 2.0
    powers = []
    for i in range(averages + 3):
        frame = x[:, i * hop : i * hop + size]
        got = stage.push(frame)
        spectrum = np.fft.rfft((frame - frame.mean(axis=1, keepdims=True)) * stage.window.samples, axis=1)
        powers = (powers + [(spectrum.real**2 + spectrum.imag**2) * scale])[-averages:]
        if i + 1 < averages:
            assert got is None
            continue
        # The stage keeps frame f in slot f % averages and adds the slots in
        # that order (this project's choice): the mean below takes them so.
        slots = [powers[(k - (i + 1)) % averages] for k in range(averages)]
        assert np.array_equal(got.psd, np.array(slots).mean(axis=0))
    assert np.max(np.abs(stage.window.samples - w)) < 1e-12  # the window is scipy's
