"""Overall levels of one capture: time-waveform metrics, ISO band velocity, ISO zone.

ISO 20816-3 zone boundaries (Annex A; believed unchanged from ISO
10816-3:2009 Annex A, Tables A.1/A.2) are **from memory** of the standard and
must be checked against a purchased copy. Their internal consistency is
checked in the tests: each displacement boundary equals v/(2πf) at 12.5 Hz
(group 1) or 10 Hz (group 2).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from agent.model import STANDARD_GRAVITY_MS2
from agent.spectra import Spectrum, band_rms

#: (group, support) → (A/B, B/C, C/D) velocity r.m.s. mm/s — from memory of ISO 20816-3 Annex A
ISO20816_3_VELOCITY_MM_S: dict[tuple[int, str], tuple[float, float, float]] = {
    (1, "rigid"): (2.3, 4.5, 7.1),
    (1, "flexible"): (3.5, 7.1, 11.0),
    (2, "rigid"): (1.4, 2.8, 4.5),
    (2, "flexible"): (2.3, 4.5, 7.1),
}
#: (group, support) → (A/B, B/C, C/D) displacement r.m.s. µm — from memory of the same tables
ISO20816_3_DISPLACEMENT_UM: dict[tuple[int, str], tuple[float, float, float]] = {
    (1, "rigid"): (29.0, 57.0, 90.0),
    (1, "flexible"): (45.0, 90.0, 140.0),
    (2, "rigid"): (22.0, 45.0, 71.0),
    (2, "flexible"): (37.0, 71.0, 113.0),
}
#: the frequency at which the tables' displacement and velocity columns agree (from memory)
ISO20816_3_REFERENCE_HZ = {1: 12.5, 2: 10.0}

ZONE_MEANING = {
    "A": "newly commissioned machines normally fall here",
    "B": "acceptable for unrestricted long-term operation",
    "C": "unsatisfactory for long-term continuous operation; plan remedial action",
    "D": "severe enough to cause damage",
}


def iso_zone(vel_rms_mm_s: float, group: int = 2, support: str = "rigid") -> str:
    """ISO 20816-3 evaluation zone (A–D) for a broadband velocity r.m.s. in mm/s."""
    try:
        ab, bc, cd = ISO20816_3_VELOCITY_MM_S[(group, support)]
    except KeyError:
        raise ValueError(f"no ISO 20816-3 limits for group {group!r}, support {support!r}") from None
    if not np.isfinite(vel_rms_mm_s) or vel_rms_mm_s < 0:
        raise ValueError(f"vel_rms_mm_s must be a finite value >= 0, got {vel_rms_mm_s!r}")
    if vel_rms_mm_s <= ab:
        return "A"
    if vel_rms_mm_s <= bc:
        return "B"
    if vel_rms_mm_s <= cd:
        return "C"
    return "D"


@dataclass(frozen=True, slots=True)
class TimeMetrics:
    """Waveform metrics of acceleration, m/s² (mean removed)."""

    rms_ms2: float
    peak_ms2: float
    peak_to_peak_ms2: float
    crest_factor: float
    kurtosis: float  # Pearson (normal distribution = 3)
    mean_ms2: float


def time_metrics(accel_ms2: np.ndarray) -> TimeMetrics:
    """r.m.s., peak, peak-to-peak, crest factor and kurtosis of a waveform.

    Kurtosis is the fourth standardised moment (Pearson; 3 for Gaussian
    noise), as used for the CWRU records by Smith & Randall (2015).
    """
    x = np.asarray(accel_ms2, dtype=np.float64)
    if x.size < 2:
        raise ValueError("need at least 2 samples")
    mean = float(x.mean())
    d = x - mean
    d2 = d * d
    m2 = float(np.mean(d2))
    rms = float(np.sqrt(m2))
    hi, lo = float(d.max()), float(d.min())
    peak = max(hi, -lo)
    p2p = hi - lo
    d2 *= d2  # d⁴ (a float power would be computed element by element with pow())
    kurt = float(np.mean(d2) / m2**2) if m2 > 0 else 0.0
    crest = peak / rms if rms > 0 else 0.0
    return TimeMetrics(rms, peak, p2p, crest, kurt, mean)


@dataclass(frozen=True, slots=True)
class OverallLevels:
    """Overall levels with their basis; velocity in the ISO band."""

    vel_rms_mm_s: float
    iso_band_hz: tuple[float, float]
    iso_zone: str
    acc_rms_g: float
    acc_peak_g: float
    crest_factor: float
    kurtosis: float
    acc_rms_ms2: float

    def to_json(self) -> dict:
        return {
            "vel_rms_mm_s": round(self.vel_rms_mm_s, 4),
            "vel_band_hz": list(self.iso_band_hz),
            "iso_zone": self.iso_zone,
            "acc_rms_g": round(self.acc_rms_g, 5),
            "acc_peak_g": round(self.acc_peak_g, 5),
            "crest_factor": round(self.crest_factor, 3),
            "kurtosis": round(self.kurtosis, 3),
        }


def overall_levels(
    tm: TimeMetrics,
    vel: Spectrum,
    iso_band_hz: tuple[float, float],
    group: int = 2,
    support: str = "rigid",
) -> OverallLevels:
    """Combine waveform metrics and the ISO-band velocity r.m.s. into one record."""
    v = band_rms(vel, *iso_band_hz)
    return OverallLevels(
        vel_rms_mm_s=v,
        iso_band_hz=(float(iso_band_hz[0]), float(iso_band_hz[1])),
        iso_zone=iso_zone(v, group, support),
        acc_rms_g=tm.rms_ms2 / STANDARD_GRAVITY_MS2,
        acc_peak_g=tm.peak_ms2 / STANDARD_GRAVITY_MS2,
        crest_factor=tm.crest_factor,
        kurtosis=tm.kurtosis,
        acc_rms_ms2=tm.rms_ms2,
    )
