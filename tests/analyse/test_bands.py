"""Band values in acceleration, velocity and displacement against outside values."""

import numpy as np
import pytest

from monitor.analyse.bands import BandBank, line_weights
from monitor.analyse.units import STANDARD_GRAVITY
from monitor.config import BandConfig
from monitor.analyse.spectrum import SpectralStage

FS, SIZE, HOP, AVERAGES = 5120.0, 4096, 2048, 4


def spectrum_of(x, window="hann"):
    x = np.atleast_2d(x)
    stage = SpectralStage(FS, SIZE, window, AVERAGES, x.shape[0])
    result = None
    for i in range(AVERAGES):
        result = stage.push(x[:, i * HOP : i * HOP + SIZE])
    return result


def tone(freq, rms, n=SIZE + (AVERAGES - 1) * HOP, phase=0.3):
    t = np.arange(n) / FS
    return rms * np.sqrt(2) * np.sin(2 * np.pi * freq * t + phase)


def bank(bands, unit="m/s2", channels=("x",)):
    return BandBank(bands, channels, unit, FS / SIZE, SIZE // 2 + 1)


def band(name, lo, hi, quantity):
    return BandConfig(name=name, channels=("x",), quantity=quantity, hz=(lo, hi))


def test_calibrator_relation_at_159_15_hz():
    # check-values.md: at 159.15 Hz (omega = 1000 rad/s), 10 m/s^2 corresponds
    # to 10 mm/s and 10 um (handheld calibrator relation, common practice).
    spec = spectrum_of(tone(1000 / (2 * np.pi), 10.0))
    values = bank([band("a", 120, 200, "acceleration"), band("v", 120, 200, "velocity"),
                   band("d", 120, 200, "displacement")]).evaluate(spec, None)
    a, v, d = (b.value for b in values)
    assert a == pytest.approx(10.0, rel=2e-3)
    assert v == pytest.approx(10.0, rel=2e-3)
    assert d == pytest.approx(10.0, rel=2e-3)
    assert [b.unit for b in values] == ["m/s2", "mm/s", "um"]


def test_one_g_at_100_hz_is_15_61_mm_s():
    # check-values.md: 1 g RMS at 100 Hz is 15.61 mm/s RMS (v = a / (2 pi f),
    # g_n = 9.80665 m/s^2 exactly, ISO 80000-3).
    spec = spectrum_of(tone(100.0, 1.0))
    (v,) = bank([band("v", 80, 120, "velocity")], unit="g").evaluate(spec, None)
    assert v.value == pytest.approx(15.61, abs=0.01)
    assert STANDARD_GRAVITY == 9.80665


@pytest.mark.parametrize("freq", [50.0, 123.4, 600.6])
@pytest.mark.parametrize("window", ["hann", "hamming", "blackman-harris", "flattop", "rectangular"])
def test_band_rms_of_a_tone_is_its_rms(freq, window):
    # check-values.md: band RMS is the square root of the summed band power;
    # a sine of amplitude A has RMS A/sqrt(2). The band spans the window's
    # leakage (+-20 lines); the rectangular window leaks further.
    bin_hz = FS / SIZE
    spec = spectrum_of(tone(freq, 0.7), window)
    (a,) = bank([band("a", freq - 20 * bin_hz, freq + 20 * bin_hz, "acceleration")]).evaluate(spec, None)
    tolerance = 0.02 if window == "rectangular" else 1e-3
    assert a.value == pytest.approx(0.7, rel=tolerance)


def test_whole_band_equals_variance_parseval():
    # Parseval (check-values.md): power over every line equals the variance
    # (numpy.var) of white noise, on average over the frames.
    x = np.random.default_rng(1).normal(0.0, 0.3, SIZE + (AVERAGES - 1) * HOP)
    spec = spectrum_of(x, "rectangular")
    (a,) = bank([band("all", 0.0, FS / 2, "acceleration")]).evaluate(spec, None)
    assert a.value**2 == pytest.approx(np.var(x), rel=0.02)


def test_lines_below_the_band_and_dc_are_left_out_of_integration():
    # check-values.md: integration must exclude lines below the low edge and DC,
    # or low-frequency noise swamps the result. A 2 Hz tone 100 times stronger
    # than a 100 Hz tone must not move the 10-1000 Hz velocity. The 4-term
    # Blackman-Harris window keeps the 2 Hz tone's own leakage below -92 dB
    # (Harris 1978), so what is left to see is the integration.
    x = tone(100.0, 0.01) + tone(2.0, 1.0) + 5.0
    b = bank([band("v", 10, 1000, "velocity")])
    clean = b.evaluate(spectrum_of(tone(100.0, 0.01), "blackman-harris"), None)[0].value
    mixed = b.evaluate(spectrum_of(x, "blackman-harris"), None)[0].value
    assert mixed == pytest.approx(clean, rel=1e-3)
    assert clean == pytest.approx(0.01 / (2 * np.pi * 100) * 1e3, rel=2e-3)


def test_severity_velocity_matches_a_velocity_band():
    spec = spectrum_of(tone(80.0, 2.0))
    b = bank([band("v", 10, 1000, "velocity")])
    assert b.velocity_rms(spec)[0] == pytest.approx(b.evaluate(spec, None)[0].value, rel=1e-12)
    # v = a / (2 pi f) (check-values.md)
    assert b.velocity_rms(spec)[0] == pytest.approx(2.0 / (2 * np.pi * 80) * 1e3, rel=2e-3)


def test_edge_rule_splits_a_line_in_proportion():
    # Line k stands for [(k-1/2)df, (k+1/2)df]: an edge at its centre takes half.
    df = 1.0
    w = line_weights(10.0, 20.0, df, 40)
    assert w[10] == pytest.approx(0.5) and w[20] == pytest.approx(0.5)
    assert np.all(w[11:20] == 1.0) and w[9] == 0 and w[21] == 0
    assert w[0] == 0.0  # DC never counts
    # Moving an edge by a tenth of a line moves a tenth of that line's weight.
    assert line_weights(10.1, 20.0, df, 40)[10] == pytest.approx(0.4)


def test_order_band_follows_speed():
    spec = spectrum_of(tone(50.0, 1.0))
    ob = BandConfig(name="1x", channels=("x",), quantity="acceleration", orders=(0.8, 1.2))
    b = bank([ob])
    assert b.evaluate(spec, 50.0)[0].value == pytest.approx(1.0, rel=2e-3)
    assert b.evaluate(spec, 25.0)[0].value < 0.01  # edges 20..30 Hz miss the tone
    assert b.evaluate(spec, 50.0)[0].edges_hz == (40.0, 60.0)
