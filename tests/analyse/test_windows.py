"""Window coefficients and scale factors against outside references."""

import numpy as np
import pytest
import scipy.signal

from monitor.analyse.windows import Window

SCIPY_NAMES = {
    "rectangular": "boxcar",
    "hann": "hann",
    "hamming": "hamming",
    "blackman-harris": "blackmanharris",
    "flattop": "flattop",
}


@pytest.mark.parametrize("name", sorted(SCIPY_NAMES))
@pytest.mark.parametrize("size", [256, 4096])
def test_samples_match_scipy_periodic_windows(name, size):
    # Reference: scipy.signal.get_window, periodic (fftbins=True) as welch uses it.
    ref = scipy.signal.get_window(SCIPY_NAMES[name], size, fftbins=True)
    assert np.max(np.abs(Window(name, size).samples - ref)) < 1e-12


# F. J. Harris, Proc. IEEE 66(1), 1978, Table I: coherent gain, ENBW in
# bins, scalloping loss in dB (printed to two decimals there).
HARRIS = {
    "rectangular": (1.00, 1.00, 3.92),
    "hann": (0.50, 1.50, 1.42),
    "blackman-harris": (0.36, 2.00, 0.83),
}


@pytest.mark.parametrize("name", sorted(HARRIS))
def test_scale_factors_match_harris_1978(name):
    gain, enbw, scallop = HARRIS[name]
    w = Window(name, 4096)
    assert w.coherent_gain == pytest.approx(gain, abs=0.005)
    assert w.enbw_bins == pytest.approx(enbw, abs=0.01)
    assert w.scalloping_loss_db() == pytest.approx(scallop, abs=0.01)


def test_hamming_against_harris_and_scipy():
    # Harris (1978) Table I: coherent gain 0.54, ENBW 1.36 bins; scalloping
    # 1.78 dB there. The 0.54/0.46 coefficients give 1.75 dB: read here from
    # scipy.signal.get_window("hamming") zero-padded 64 times (numpy.fft.fft),
    # at half a line against the peak.
    w = Window("hamming", 4096)
    assert w.coherent_gain == pytest.approx(0.54, abs=1e-3)
    assert w.enbw_bins == pytest.approx(1.36, abs=0.01)
    ref = np.abs(np.fft.fft(scipy.signal.get_window("hamming", 4096), 4096 * 64))
    assert w.scalloping_loss_db() == pytest.approx(-20 * np.log10(ref[32] / ref[0]), abs=1e-6)
    assert w.scalloping_loss_db() == pytest.approx(1.78, abs=0.04)


def test_flattop_against_scipy():
    # scipy.signal.windows.flattop, the 5-term set scipy's documentation
    # attributes to D'Antona and Ferrero (2006): coherent gain, ENBW (bins)
    # and scalloping loss computed from scipy's own samples (zero-padded
    # numpy.fft.fft for the loss). A flat top's point is a loss near 0 dB.
    w = Window("flattop", 4096)
    ref = scipy.signal.get_window("flattop", 4096)
    assert w.coherent_gain == pytest.approx(ref.mean(), rel=1e-12)
    assert w.coherent_gain == pytest.approx(0.2156, abs=1e-4)
    assert w.enbw_bins == pytest.approx(3.77, abs=0.01)
    padded = np.abs(np.fft.fft(ref, 4096 * 64))
    assert w.scalloping_loss_db() == pytest.approx(-20 * np.log10(padded[32] / padded[0]), abs=1e-6)
    assert abs(w.scalloping_loss_db()) < 0.02


@pytest.mark.parametrize("name", sorted(SCIPY_NAMES))
def test_enbw_equals_scipy_formula(name):
    # Harris (1978): ENBW in bins = N * sum(w^2) / sum(w)^2, here from
    # scipy.signal.get_window's samples.
    ref = scipy.signal.get_window(SCIPY_NAMES[name], 1024)
    expected = 1024 * np.sum(ref**2) / np.sum(ref) ** 2
    assert Window(name, 1024).enbw_bins == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("name", sorted(SCIPY_NAMES))
def test_kernel_matches_zero_padded_fft(name):
    # numpy.fft.fft of the zero-padded window samples its transform finely.
    w = Window(name, 512)
    pad = 32
    ref = np.abs(np.fft.fft(w.samples, 512 * pad))
    ref /= ref[0]
    offsets = np.arange(3 * pad) / pad
    assert np.max(np.abs(w.kernel(offsets) - ref[: 3 * pad])) < 1e-12


def test_bad_arguments_name_the_value():
    with pytest.raises(ValueError, match="name='kaiser'"):
        Window("kaiser", 1024)


@pytest.mark.parametrize("name", sorted(SCIPY_NAMES))
def test_spread_is_the_moments_of_the_power_response(name):
    # The power response to a tone on a line is |FFT(w)|^2 at the lines
    # around it (numpy.fft.fft of scipy.signal.get_window's samples); its
    # second and fourth moments, in lines, are what the integration's window
    # correction (monitor.analyse.bands) uses.
    ref = scipy.signal.get_window(SCIPY_NAMES[name], 1024)
    power = np.abs(np.fft.fft(ref)) ** 2
    k = np.fft.fftfreq(1024, 1 / 1024)
    near = np.abs(k) <= 8
    m2 = np.sum(k[near] ** 2 * power[near]) / np.sum(power[near])
    m4 = np.sum(k[near] ** 4 * power[near]) / np.sum(power[near])
    assert Window(name, 1024).spread == pytest.approx((m2, m4), abs=1e-12)
    if name == "hann":
        # By hand: power 1/4 on the line, 1/16 a line either side, so
        # m2 = m4 = (2/16) / (6/16) = 1/3.
        assert Window(name, 1024).spread == pytest.approx((1 / 3, 1 / 3), abs=1e-12)


@pytest.mark.parametrize("name", sorted(SCIPY_NAMES))
def test_one_ratio_read_as_np_interp_reads_it(name):
    # Reference: np.interp on the same table. The plain-float reading the
    # speed tracker uses gives the very same number: between the table's
    # points, on them, just off them, outside the table and for NaN.
    w = Window(name, 4096)
    table = w._ratios
    rng = np.random.default_rng(3)
    ratios = np.concatenate([rng.uniform(-0.1, 1.2, 5000), table, np.nextafter(table, 2.0), np.nextafter(table, -1.0),
                             [0.0, 1.0, np.inf, -np.inf, np.nan]])
    expected = np.interp(ratios, table, w._ratio_offsets)
    got = np.array([w.offset_at(r) for r in ratios.tolist()])
    assert np.array_equal(got, expected, equal_nan=True)
