"""ISO 20816-3 evaluation zones for overall vibration (a pure lookup table).

Zone boundaries of ISO 10816-3:2009 Annex A, Tables A.1 and A.2, believed
unchanged in ISO 20816-3:2022 Annex A. **The numbers are from memory** (the
standard's text could not be read when this table was written): check them
against the purchased standard before relying on them.

Velocity is broad-band r.m.s. in mm/s (10–1000 Hz above 600 r/min,
2–1000 Hz for 120–600 r/min); displacement is r.m.s. in µm. Every
displacement boundary equals v/(2πf) within rounding, with f = 12.5 Hz for
group 1 and 10 Hz for group 2 — a check against transcription errors.

Zones (ISO 20816-1/-3): A newly commissioned; B acceptable for unrestricted
long-term operation; C unsatisfactory for long-term continuous operation;
D severe enough to cause damage.
"""

from __future__ import annotations

from dataclasses import dataclass

GROUPS = (1, 2)
SUPPORTS = ("rigid", "flexible")
ZONES = ("A", "B", "C", "D")


@dataclass(frozen=True, slots=True)
class ZoneLimits:
    """Boundaries A/B, B/C, C/D for one machine group and support class."""

    group: int
    support: str
    ab_vel_mm_s: float
    bc_vel_mm_s: float
    cd_vel_mm_s: float
    ab_disp_um: float
    bc_disp_um: float
    cd_disp_um: float

    @property
    def vel_mm_s(self) -> tuple[float, float, float]:
        return (self.ab_vel_mm_s, self.bc_vel_mm_s, self.cd_vel_mm_s)

    @property
    def disp_um(self) -> tuple[float, float, float]:
        return (self.ab_disp_um, self.bc_disp_um, self.cd_disp_um)


#: (group, support) -> limits. From memory of ISO 10816-3:2009 Annex A (see module doc).
ISO20816_3_LIMITS: dict[tuple[int, str], ZoneLimits] = {
    (1, "rigid"): ZoneLimits(1, "rigid", 2.3, 4.5, 7.1, 29.0, 57.0, 90.0),
    (1, "flexible"): ZoneLimits(1, "flexible", 3.5, 7.1, 11.0, 45.0, 90.0, 140.0),
    (2, "rigid"): ZoneLimits(2, "rigid", 1.4, 2.8, 4.5, 22.0, 45.0, 71.0),
    (2, "flexible"): ZoneLimits(2, "flexible", 2.3, 4.5, 7.1, 37.0, 71.0, 113.0),
}


def zone_limits(group: int, support: str) -> ZoneLimits:
    """The zone boundaries for machine ``group`` (1 or 2) on ``support``."""
    key = (group, support)
    if key not in ISO20816_3_LIMITS:
        raise ValueError(
            f"no ISO 20816-3 limits for group={group!r}, support={support!r}; "
            f"groups {GROUPS}, supports {SUPPORTS}"
        )
    return ISO20816_3_LIMITS[key]


def velocity_zone(vel_rms_mm_s: float, limits: ZoneLimits) -> str:
    """Zone letter A–D of a broad-band r.m.s. velocity (a boundary value belongs to the upper zone)."""
    if not vel_rms_mm_s >= 0:
        raise ValueError(f"vel_rms_mm_s must be >= 0, got {vel_rms_mm_s!r}")
    for letter, edge in zip(ZONES, limits.vel_mm_s):
        if vel_rms_mm_s < edge:
            return letter
    return "D"
