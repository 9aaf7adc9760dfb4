"""Expected frequencies of the machine train (pure functions).

Rolling-element bearing tones use the standard kinematic formulas for a
rotating inner ring and a fixed outer ring, rolling without slip
(R. B. Randall, J. Antoni, "Rolling element bearing diagnostics — a
tutorial", MSSP 25(2), 2011, eqs. 1–4):

* FTF  = (f_r/2)·(1 − (d/D)·cos φ)
* BPFO = (N·f_r/2)·(1 − (d/D)·cos φ)
* BPFI = (N·f_r/2)·(1 + (d/D)·cos φ)
* BSF  = (D/(2d))·f_r·(1 − ((d/D)·cos φ)²)   (a rolling-element defect
  usually shows at 2×BSF, striking both races once per spin)
"""

from __future__ import annotations

import math
from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class BearingOrders:
    """Bearing defect frequencies as multiples of shaft speed (orders)."""

    ftf: float
    bsf: float
    bpfo: float
    bpfi: float

    def as_dict(self) -> dict[str, float]:
        return {"ftf": self.ftf, "bsf": self.bsf, "bpfo": self.bpfo, "bpfi": self.bpfi}


def bearing_orders(
    balls: int, ball_diameter_mm: float, pitch_diameter_mm: float, contact_angle_deg: float = 0.0
) -> BearingOrders:
    """FTF, BSF, BPFO, BPFI per unit shaft speed from bearing geometry."""
    if balls < 3:
        raise ValueError(f"balls must be >= 3, got {balls}")
    if not 0 < ball_diameter_mm < pitch_diameter_mm:
        raise ValueError(
            f"need 0 < ball_diameter_mm < pitch_diameter_mm, got {ball_diameter_mm}, {pitch_diameter_mm}"
        )
    if not 0 <= contact_angle_deg < 90:
        raise ValueError(f"contact_angle_deg must be in [0, 90), got {contact_angle_deg}")
    r = ball_diameter_mm / pitch_diameter_mm * math.cos(math.radians(contact_angle_deg))
    ftf = 0.5 * (1 - r)
    return BearingOrders(
        ftf=ftf,
        bsf=pitch_diameter_mm / (2 * ball_diameter_mm) * (1 - r * r),
        bpfo=balls * ftf,
        bpfi=0.5 * balls * (1 + r),
    )
