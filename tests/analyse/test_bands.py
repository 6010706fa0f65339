"""Band values in acceleration, velocity and displacement against outside values.

The sources named in the comments are listed in tests/references.md.
"""

from functools import lru_cache

import numpy as np
import pytest
import scipy.signal

from monitor.analyse.bands import BandBank, line_weights, quantity_factors
from monitor.analyse.units import STANDARD_GRAVITY
from monitor.config import BandConfig
from monitor.analyse.spectrum import SpectralStage, Spectrum
from monitor.analyse.windows import COEFFICIENTS, Window
from readme_tables import half_unit, readme_table
from test_windows import SCIPY_NAMES

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


def bank(bands, unit="m/s2", channels=("x",), window="hann", size=SIZE, fs=FS):
    return BandBank(bands, channels, unit, fs / size, size // 2 + 1, Window(window, size))


def band(name, lo, hi, quantity):
    return BandConfig(name=name, channels=("x",), quantity=quantity, hz=(lo, hi))


def test_calibrator_relation_at_159_15_hz():
    # Analytic: v = a / omega, d = a / omega^2; at omega = 1000 rad/s
    # (159.15 Hz) 10 m/s^2 is 10 mm/s and 10 um, the relation handheld
    # calibrators use (common practice).
    spec = spectrum_of(tone(1000 / (2 * np.pi), 10.0))
    values = bank([band("a", 120, 200, "acceleration"), band("v", 120, 200, "velocity"),
                   band("d", 120, 200, "displacement")]).evaluate(spec, None)
    a, v, d = (b.value for b in values)
    # Hann at 127 lines: the README's tables give < 0.01 % for all three.
    assert a == pytest.approx(10.0, rel=1e-4)
    assert v == pytest.approx(10.0, rel=1e-4)
    assert d == pytest.approx(10.0, rel=1e-4)
    assert [b.unit for b in values] == ["m/s2", "mm/s", "um"]


def test_one_g_at_100_hz_is_15_61_mm_s():
    # Analytic v = a / (2 pi f) with g_n = 9.80665 m/s^2 exactly (ISO 80000-3):
    # 1 g RMS at 100 Hz is 15.6076 mm/s RMS.
    spec = spectrum_of(tone(100.0, 1.0))
    (v,) = bank([band("v", 80, 120, "velocity")], unit="g").evaluate(spec, None)
    assert v.value == pytest.approx(9.80665 / (2 * np.pi * 100) * 1e3, rel=1e-4)
    assert v.value == pytest.approx(15.61, abs=0.005)


def test_a_source_in_g_reads_as_the_same_motion_in_m_s2():
    # ISO 80000-3: 1 g_n = 9.80665 m/s^2 exactly. The same motion, given once
    # in g and once in m/s^2, must give the same velocity and displacement.
    in_g = spectrum_of(tone(60.0, 0.5))
    in_si = spectrum_of(tone(60.0, 0.5 * 9.80665))
    bands = [band("v", 40, 80, "velocity"), band("d", 40, 80, "displacement")]
    for g_value, si_value in zip(bank(bands, unit="g").evaluate(in_g, None),
                                 bank(bands, unit="m/s2").evaluate(in_si, None)):
        assert g_value.value == pytest.approx(si_value.value, rel=1e-12)


@pytest.mark.parametrize("freq", [50.0, 123.4, 600.6])
@pytest.mark.parametrize("window", ["hann", "hamming", "blackman-harris", "flattop", "rectangular"])
def test_band_rms_of_a_tone_is_its_rms(freq, window):
    # Analytic: a sine of amplitude A has RMS A/sqrt(2), and band RMS is the
    # root of the summed band power (Parseval). The band spans +-20 lines:
    # the README's edge table gives under 0.1 % lost there except for the
    # rectangular window (1 % needs 10.2 lines; 0.1 % needs far more).
    bin_hz = FS / SIZE
    spec = spectrum_of(tone(freq, 0.7), window)
    (a,) = bank([band("a", freq - 20 * bin_hz, freq + 20 * bin_hz, "acceleration")], window=window).evaluate(spec, None)
    tolerance = 0.01 if window == "rectangular" else 1e-3
    assert a.value == pytest.approx(0.7, rel=tolerance)


@pytest.mark.parametrize("window", sorted(SCIPY_NAMES))
def test_acceleration_band_is_the_welch_psd_summed(window):
    # Reference: scipy.signal.welch (density scaling, same window, segment,
    # overlap, detrend="constant"). An acceleration band is the PSD times the
    # line spacing summed with the edge rule's weights and nothing else: the
    # integration's window correction must never touch it.
    x = np.random.default_rng(7).normal(0.0, 0.4, SIZE + (AVERAGES - 1) * HOP)
    spec = spectrum_of(x, window)
    _, ref = scipy.signal.welch(x, FS, window=SCIPY_NAMES[window], nperseg=SIZE, noverlap=SIZE - HOP,
                                detrend="constant", scaling="density")
    (a,) = bank([band("a", 33.3, 777.7, "acceleration")], window=window).evaluate(spec, None)
    expected = np.sqrt(ref @ line_weights(33.3, 777.7, FS / SIZE, SIZE // 2 + 1) * FS / SIZE)
    assert a.value == pytest.approx(expected, rel=1e-9)


def test_whole_band_equals_variance_parseval():
    # Parseval: power over every line equals the variance (numpy.var) of white
    # noise, on average over the frames; four averages of 2049 lines leave a
    # few percent of scatter.
    x = np.random.default_rng(1).normal(0.0, 0.3, SIZE + (AVERAGES - 1) * HOP)
    spec = spectrum_of(x, "rectangular")
    (a,) = bank([band("all", 0.0, FS / 2, "acceleration")], window="rectangular").evaluate(spec, None)
    assert a.value**2 == pytest.approx(np.var(x), rel=0.02)


def test_lines_below_the_band_and_dc_are_left_out_of_integration():
    # Common practice: integration must exclude lines below the low edge and
    # DC, or low-frequency noise swamps the result. A 2 Hz tone 100 times
    # stronger than a 100 Hz tone must not move the 10-1000 Hz velocity. The
    # 4-term Blackman-Harris window keeps the 2 Hz tone's own leakage below
    # -92 dB (Harris 1978, Table I), so what is left to see is the integration.
    x = tone(100.0, 0.01) + tone(2.0, 1.0) + 5.0
    b = bank([band("v", 10, 1000, "velocity")], window="blackman-harris")
    clean = b.evaluate(spectrum_of(tone(100.0, 0.01), "blackman-harris"), None)[0].value
    mixed = b.evaluate(spectrum_of(x, "blackman-harris"), None)[0].value
    assert mixed == pytest.approx(clean, rel=1e-3)
    # Analytic v = a / (2 pi f).
    assert clean == pytest.approx(0.01 / (2 * np.pi * 100) * 1e3, rel=1e-4)


def test_severity_velocity_matches_a_velocity_band():
    spec = spectrum_of(tone(80.0, 2.0))
    b = bank([band("v", 10, 1000, "velocity")])
    assert b.velocity_rms(spec)[0] == pytest.approx(b.evaluate(spec, None)[0].value, rel=1e-12)
    # Analytic v = a / (2 pi f).
    assert b.velocity_rms(spec)[0] == pytest.approx(2.0 / (2 * np.pi * 80) * 1e3, rel=1e-4)


def test_edge_rule_splits_a_line_in_proportion():
    # The edge rule is this project's choice (README, What it measures): line k
    # stands for [(k-1/2)df, (k+1/2)df] and counts with the share of it inside
    # the band. The weights below are worked by hand from that rule.
    df = 1.0
    w = line_weights(10.0, 20.0, df, 40)
    assert w[10] == 0.5 and w[20] == 0.5  # an edge on a line's centre takes half
    assert np.all(w[11:20] == 1.0) and w[9] == 0 and w[21] == 0
    assert w[0] == 0.0  # DC never counts
    # Moving an edge by a tenth of a line moves a tenth of that line's weight.
    assert line_weights(10.1, 20.0, df, 40)[10] == pytest.approx(0.4, abs=1e-12)
    # An edge exactly between two lines takes nothing from the outer one.
    assert line_weights(9.5, 20.5, df, 40)[9] == 0.0 and line_weights(9.5, 20.5, df, 40)[20] == 1.0


def test_order_band_follows_speed():
    spec = spectrum_of(tone(50.0, 1.0))
    ob = BandConfig(name="1x", channels=("x",), quantity="acceleration", orders=(0.8, 1.2))
    b = bank([ob])
    # Analytic: the tone's RMS is 1; edges 40..60 Hz hold it (8 lines each side).
    assert b.evaluate(spec, 50.0)[0].value == pytest.approx(1.0, rel=1e-4)
    assert b.evaluate(spec, 25.0)[0].value < 1e-3  # edges 20..30 Hz miss the tone
    assert b.evaluate(spec, 50.0)[0].edges_hz == (40.0, 60.0)


@pytest.mark.parametrize("quantity", ["acceleration", "velocity", "displacement"])
def test_order_band_weights_are_the_edge_rule_times_the_factors(quantity):
    # Reference: line_weights, the edge rule written with numpy over every
    # line (tested above against hand-worked weights), times the quantity's
    # factors. The few lines an order band touches, worked out in plain
    # floats at each speed, are exactly those numbers; the band's value is
    # that full-length product to rounding.
    ob = BandConfig(name="1x", channels=("x", "y"), quantity=quantity, orders=(0.8, 1.2))
    b = bank([ob], channels=("x", "y"))
    df, lines = FS / SIZE, SIZE // 2 + 1
    full_factors = quantity_factors(quantity, "m/s2", df, lines, Window("hann", SIZE).spread)
    spec = spectrum_of(np.vstack([tone(50.0, 1.0), tone(61.3, 0.5)]))
    rng = np.random.default_rng(7)
    speeds = [25.0, 31.25, 30.625, 50.0, 50.0, 12.3] + list(rng.uniform(1.0, 2000.0, 200)) + [3000.0, 25.0]
    for speed in speeds:
        lo, hi = 0.8 * speed, 1.2 * speed
        reference = line_weights(lo, hi, df, lines) * full_factors
        first, w = b._weights(ob, (lo, hi))
        assert np.array_equal(w, reference[first : first + len(w)])
        assert not reference[:first].any() and not reference[first + len(w) :].any()
        values = [v.value for v in b.evaluate(spec, speed)]
        assert values == pytest.approx(np.sqrt(spec.psd @ reference * df), rel=1e-12, abs=1e-300)


def test_the_issue_case_one_g_at_10_lines():
    # Analytic v = a / (2 pi f) with g_n = 9.80665 m/s^2 (ISO 80000-3): 1 g RMS
    # at 12.5 Hz (10 lines of 1.25 Hz) is 124.86 mm/s. Dividing each line by
    # its own (2 pi f)^2 read +0.51 % with Hann and +2.45 % with the flat top;
    # the window correction (monitor.analyse.bands) must bring Hann within 0.2 %
    # (this project's target) and the flat top within the README's table.
    expected = 9.80665 / (2 * np.pi * 12.5) * 1e3
    for window, within in (("hann", 0.002), ("flattop", 0.002)):
        spec = spectrum_of(tone(12.5, 1.0), window)
        (v,) = bank([band("v", 5.0, 25.0, "velocity")], unit="g", window=window).evaluate(spec, None)
        assert v.value == pytest.approx(expected, rel=within), window


# --------------------------------------------------------------------------
# The README's accuracy tables, measured. A tone of RMS 1 on 1 Hz lines
# (fs = N = 4096), one frame, at 21 positions across a line and 8 phases;
# every table cell is the worst case over them, against the analytic value.

N = 4096
POSITIONS = np.linspace(0.0, 1.0, 21)
PHASES = np.linspace(0.0, np.pi, 8, endpoint=False)
WINDOWS = sorted(COEFFICIENTS)


@lru_cache(maxsize=None)
def tone_psds(centre, window):
    """(frequency, PSD) of a unit-RMS tone at centre + each position, each phase."""
    t = np.arange(N) / N
    out = []
    for pos in POSITIONS:
        for phase in PHASES:
            f = centre + pos
            x = np.sqrt(2) * np.sin(2 * np.pi * f * t + phase)
            out.append((f, SpectralStage(float(N), N, window, 1, 1).push(x[None, :]).psd[0]))
    return tuple(out)


def worst_loss(window, distance):
    """Worst |band RMS - 1| of a band whose edges are `distance` lines either side of the tone."""
    return max(abs(np.sqrt(psd @ line_weights(f - distance, f + distance, 1.0, len(psd))) - 1.0)
               for f, psd in tone_psds(1000.0, window))


EDGES = readme_table("*Band edges*")


@pytest.mark.parametrize("window", WINDOWS)
def test_edge_distance_table(window):
    # Analytic: the tone's RMS is 1. The README gives the least distance, in
    # steps of 0.1 line, from which on every band holds it within 1 % / 0.1 %.
    for cell, tolerance in zip(EDGES[window], (0.01, 0.001)):
        distance = float(cell)
        steps = np.round(np.arange(distance, distance + 10.0, 0.1), 1)
        assert all(worst_loss(window, d) <= tolerance for d in steps), (window, cell)
        assert worst_loss(window, round(distance - 0.1, 1)) > tolerance, (window, cell)


def integrated(window, centre, quantity):
    """Worst relative error (%) of a velocity or displacement band from half
    to twice the tone's frequency, against the analytic a / (2 pi f)**p."""
    p = 1 if quantity == "velocity" else 2
    scale = 1e3 if quantity == "velocity" else 1e6
    w = Window(window, N)
    worst = 0.0
    for f, psd in tone_psds(centre - 0.5, window):
        b = BandBank([band("q", f / 2, 2 * f, quantity)], ("x",), "m/s2", 1.0, N // 2 + 1, w)
        value = b.evaluate(Spectrum(psd[None, :], 1.0, w.enbw_bins, w), None)[0].value
        error = value / (scale / (2 * np.pi * f) ** p) - 1.0
        worst = error if abs(error) > abs(worst) else worst
    return 100 * worst


INTEGRATION = readme_table("*Velocity and displacement of a tone*")
LINES = (5, 10, 20, 50)


@pytest.mark.parametrize("window", WINDOWS)
def test_integration_table(window):
    # Analytic: a tone of acceleration RMS a at f has velocity a / (2 pi f)
    # and displacement a / (2 pi f)^2. The README's cells are the worst error
    # in % for a tone within half a line of 5, 10, 20 and 50 lines.
    cells = INTEGRATION[window]
    for i, (quantity, lines) in enumerate([(q, k) for q in ("velocity", "displacement") for k in LINES]):
        got = integrated(window, lines, quantity)
        assert got == pytest.approx(float(cells[i]), abs=half_unit(cells[i])), (window, quantity, lines)


def test_default_window_velocity_within_0_2_percent_from_10_lines():
    # This project's target for the default window (Hann), on the analytic value.
    for lines in (10, 20, 50):
        assert abs(integrated("hann", lines, "velocity")) < 0.2


BROADBAND = readme_table("*Velocity and displacement of a flat spectrum*")


@pytest.mark.parametrize("window", WINDOWS)
def test_broadband_integration_table(window):
    # Analytic: white acceleration noise of density S has velocity power
    # S / (2 pi)^2 (1/lo - 1/hi) between lo and hi, displacement power
    # S / (2 pi)^4 (1/lo^3 - 1/hi^3) / 3. Its expected PSD is flat (common
    # practice), so a flat PSD stands for it without scatter. Band: lo to
    # 1000 lines.
    w = Window(window, N)
    spec = Spectrum(np.ones((1, N // 2 + 1)), 1.0, w.enbw_bins, w)
    cells = BROADBAND[window]
    for i, (quantity, lo) in enumerate([(q, k) for q in ("velocity", "displacement") for k in LINES]):
        b = BandBank([band("q", lo, 1000.0, quantity)], ("x",), "m/s2", 1.0, N // 2 + 1, w)
        value = b.evaluate(spec, None)[0].value
        if quantity == "velocity":
            exact = np.sqrt(1e6 / (2 * np.pi) ** 2 * (1 / lo - 1 / 1000.0))
        else:
            exact = np.sqrt(1e12 / (2 * np.pi) ** 4 * (1 / lo**3 - 1 / 1000.0**3) / 3)
        got = 100 * (value / exact - 1)
        assert got == pytest.approx(float(cells[i]), abs=half_unit(cells[i])), (window, quantity, lo)
