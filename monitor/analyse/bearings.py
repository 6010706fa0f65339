"""Rolling-element bearing defect frequencies, as orders of shaft speed.

The kinematic formulas (R. B. Randall and J. Antoni, "Rolling element
bearing diagnostics - a tutorial", Mech. Syst. Signal Process. 25(2), 2011),
with n rolling elements of diameter d on pitch diameter D, contact angle phi,
for a stationary outer race:

    FTF  = 1/2 (1 - d/D cos phi)                 cage
    BPFO = n/2 (1 - d/D cos phi)                 outer race
    BPFI = n/2 (1 + d/D cos phi)                 inner race
    BSF  = D/(2d) (1 - (d/D cos phi)^2)          rolling element spin

Real bearings slip a little (1-2 %, common practice), which is why defect
bands are given a width rather than a single line.
"""

import math
from typing import TYPE_CHECKING, Dict

if TYPE_CHECKING:  # pragma: no cover
    from ..config.schema import BearingConfig

DEFECTS = ("bpfo", "bpfi", "bsf", "ftf")


def defect_orders(elements: int, element_diameter: float, pitch_diameter: float,
                  contact_angle_deg: float) -> Dict[str, float]:
    """Defect frequencies in orders (multiples of shaft speed)."""
    if elements < 1:
        raise ValueError(f"{elements=} must be at least 1")
    if not 0 < element_diameter < pitch_diameter:
        raise ValueError(f"{element_diameter=} must be above 0 and below {pitch_diameter=}")
    ratio = element_diameter / pitch_diameter * math.cos(math.radians(contact_angle_deg))
    return {
        "ftf": 0.5 * (1.0 - ratio),
        "bpfo": elements / 2.0 * (1.0 - ratio),
        "bpfi": elements / 2.0 * (1.0 + ratio),
        "bsf": pitch_diameter / (2.0 * element_diameter) * (1.0 - ratio * ratio),
    }


def bearing_orders(bearing: "BearingConfig") -> Dict[str, float]:
    """Defect orders of a `[[bearing]]` table."""
    return defect_orders(bearing.elements, bearing.element_diameter, bearing.pitch_diameter,
                         bearing.contact_angle)
