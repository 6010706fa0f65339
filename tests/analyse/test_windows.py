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


# F. J. Harris, Proc. IEEE 66(1), 1978, Table I (via check-values.md):
# coherent gain, ENBW in bins, scalloping loss in dB.
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


def test_hamming_against_harris_and_its_coefficients():
    # Harris Table I: coherent gain 0.54, ENBW 1.36 bins; scalloping 1.78 dB in
    # the table, 1.75 dB computed from the 0.54/0.46 coefficients (check-values.md).
    w = Window("hamming", 4096)
    assert w.coherent_gain == pytest.approx(0.54, abs=1e-3)
    assert w.enbw_bins == pytest.approx(1.36, abs=0.01)
    assert w.scalloping_loss_db() == pytest.approx(1.75, abs=0.01)


def test_flattop_against_its_coefficients():
    # check-values.md: scipy's 5-term flat top (D'Antona and Ferrero, 2006):
    # coherent gain 0.2156, ENBW 3.77 bins, scalloping about 0.01 dB.
    w = Window("flattop", 4096)
    assert w.coherent_gain == pytest.approx(0.2156, abs=1e-4)
    assert w.enbw_bins == pytest.approx(3.77, abs=0.01)
    assert abs(w.scalloping_loss_db()) < 0.02


@pytest.mark.parametrize("name", sorted(SCIPY_NAMES))
def test_enbw_equals_scipy_formula(name):
    # check-values.md: ENBW = N * sum(w^2) / sum(w)^2 from scipy's coefficients.
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
