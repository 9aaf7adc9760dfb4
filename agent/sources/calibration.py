"""Counts → volts → m/s²: the one calibration used by every hardware source (pure).

Chain (accelerometer → conditioner → converter)::

    volts_at_input = counts / full_scale_counts × full_scale_v
    volts_at_sensor = volts_at_input / conditioner_gain
    accel_g = volts_at_sensor × 1000 / sensitivity_mv_per_g
    accel_ms2 = accel_g × g_n            (g_n = 9.80665 m/s², ISO 80000-3)

``full_scale_counts`` is the count at digital full scale: 32768 for int16,
8388608 for int24, 1.0 for a sound card's float samples (±1.0 = full scale).

With ``dc_coupled=True`` (a serial ADC that sees the IEPE line through a DC
path) the mean input voltage divided by the gain is reported as the bias
voltage and removed before scaling; an AC-coupled input (every sound card)
cannot see the bias, so ``bias_v`` is None.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from agent.model import STANDARD_GRAVITY_MS2


@dataclass(frozen=True, slots=True)
class Calibration:
    full_scale_counts: float
    full_scale_v: float
    sensitivity_mv_per_g: float
    conditioner_gain: float = 1.0
    dc_coupled: bool = False

    def __post_init__(self) -> None:
        for name in ("full_scale_counts", "full_scale_v", "sensitivity_mv_per_g", "conditioner_gain"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and np.isfinite(value) and value > 0):
                raise ValueError(f"Calibration.{name} must be a finite number > 0, got {value!r}")

    @property
    def ms2_per_count(self) -> float:
        volts_per_count = self.full_scale_v / self.full_scale_counts
        return volts_per_count / self.conditioner_gain * 1000.0 / self.sensitivity_mv_per_g * STANDARD_GRAVITY_MS2

    @property
    def full_scale_ms2(self) -> float:
        """Acceleration that drives the input to digital full scale."""
        return self.full_scale_counts * self.ms2_per_count

    def to_ms2(self, counts: np.ndarray) -> tuple[np.ndarray, float | None]:
        """(acceleration in m/s², bias volts or None) for one channel's counts."""
        x = np.asarray(counts, dtype=np.float64)
        if not self.dc_coupled:
            return x * self.ms2_per_count, None
        mean = float(x.mean()) if x.size else 0.0
        bias_v = mean * self.full_scale_v / self.full_scale_counts / self.conditioner_gain
        return (x - mean) * self.ms2_per_count, bias_v

    def at_rails(self, counts: np.ndarray) -> bool:
        """True if any count sits on the converter's digital limits (hard clipping)."""
        x = np.asarray(counts)
        if x.size == 0:
            return False
        # within one int16 step of full scale (one count for int16 data, ±1.0·(1-2⁻¹⁵) for floats)
        limit = self.full_scale_counts * (1.0 - 2.0**-15)
        return bool(x.max() >= limit or x.min() <= -limit)

