"""Time-domain statistics against textbook values and scipy.stats."""

import numpy as np
import pytest
import scipy.stats

from monitor.analyse.stats import time_stats


def test_sine_rms_crest_kurtosis():
    # Common practice: a sine has RMS A/sqrt(2), crest factor sqrt(2) and
    # Pearson kurtosis 1.5.
    x = 3.0 * np.sin(2 * np.pi * np.arange(4000) / 40.0)[None, :] + 7.0
    s = time_stats(x)
    assert s["rms"][0] == pytest.approx(3.0 / np.sqrt(2), rel=1e-9)
    assert s["peak"][0] == pytest.approx(3.0, rel=1e-9)
    assert s["crest"][0] == pytest.approx(np.sqrt(2), rel=1e-9)
    assert s["kurtosis"][0] == pytest.approx(1.5, rel=1e-9)


def test_kurtosis_matches_scipy():
    # scipy.stats.kurtosis(fisher=False) is Pearson's definition.
    x = np.random.default_rng(2).standard_t(5, size=(3, 5000))
    assert np.allclose(time_stats(x)["kurtosis"], scipy.stats.kurtosis(x, axis=1, fisher=False))


def test_silence_gives_no_crest_or_kurtosis():
    s = time_stats(np.zeros((1, 100)))
    assert s["rms"][0] == 0 and np.isnan(s["crest"][0]) and np.isnan(s["kurtosis"][0])
