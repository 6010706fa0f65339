"""Bearing defect orders against the published formulas and worked example."""

import math

import pytest

from monitor.analyse.bearings import defect_orders


def test_worked_example_deep_groove_bearing():
    # Randall and Antoni (2011), section 2, the four defect frequency formulas,
    # worked by hand; the geometry, n = 9, d = 7.94 mm, D = 39.04 mm, phi = 0,
    # is that of a common deep-groove bearing written from memory (no
    # catalogue at hand): BPFO 3.585, BPFI 5.415, FTF 0.398, BSF 2.357 orders.
    orders = defect_orders(9, 7.94, 39.04, 0.0)
    assert orders["bpfo"] == pytest.approx(3.585, abs=5e-4)
    assert orders["bpfi"] == pytest.approx(5.415, abs=5e-4)
    assert orders["ftf"] == pytest.approx(0.398, abs=5e-4)
    assert orders["bsf"] == pytest.approx(2.357, abs=5e-4)


def test_contact_angle_and_identities():
    # Randall and Antoni (2011), section 2 formulas: BPFO + BPFI = n, BPFO = n * FTF,
    # and BSF = D / (2 d) (1 - (d/D cos phi)^2).
    orders = defect_orders(12, 10.0, 60.0, 15.0)
    assert orders["bpfo"] + orders["bpfi"] == pytest.approx(12.0)
    assert orders["bpfo"] == pytest.approx(12 * orders["ftf"])
    ratio = 10.0 / 60.0 * math.cos(math.radians(15.0))
    assert orders["bsf"] == pytest.approx(60.0 / 20.0 * (1 - ratio**2))


def test_impossible_geometry_names_the_value():
    with pytest.raises(ValueError, match="element_diameter=50"):
        defect_orders(9, 50.0, 40.0, 0.0)
