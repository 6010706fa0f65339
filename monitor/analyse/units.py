"""Quantities and their units, and the conversions between them.

Samples come in g or m/s2 (`[source] unit`). A band reports acceleration in
that unit, velocity in mm/s and displacement in um (QUANTITY_UNITS).
"""

from typing import Optional, Tuple

from ..config.schema import QUANTITY_UNITS, UNITS

STANDARD_GRAVITY = 9.80665  # m/s^2, exact (CGPM 1901, ISO 80000-3)
TO_SI = {"g": STANDARD_GRAVITY, "m/s2": 1.0}
assert tuple(TO_SI) == UNITS, "every unit a config accepts needs its SI factor"

# The broadband velocity band of ISO 10816-3 (and ISO 20816-3): 10-1000 Hz
# for machines above 600 r/min; 2-1000 Hz for 120-600 r/min.
ISO_VELOCITY_HZ = (10.0, 1000.0)
ISO_SLOW_LOW_HZ = 2.0
ISO_SLOW_RPM = 600.0


def quantity_unit(quantity: str, source_unit: str) -> str:
    """The unit a band of this quantity is reported in."""
    return QUANTITY_UNITS.get(quantity, source_unit)


def iso_velocity_hz(rpm: Optional[float]) -> Tuple[float, float]:
    """The ISO 10816-3 broadband velocity band for a machine at `rpm`
    (None: speed unknown, taken as above 600 r/min)."""
    low = ISO_SLOW_LOW_HZ if rpm is not None and rpm <= ISO_SLOW_RPM else ISO_VELOCITY_HZ[0]
    return (low, ISO_VELOCITY_HZ[1])
