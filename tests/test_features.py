"""Overall levels and ISO 20816-3 zones."""

from __future__ import annotations

import math

import numpy as np
import pytest

from agent.features import (
    ISO20816_3_DISPLACEMENT_UM,
    ISO20816_3_REFERENCE_HZ,
    ISO20816_3_VELOCITY_MM_S,
    iso_zone,
    time_metrics,
)
from agent.model import STANDARD_GRAVITY_MS2


def test_iso_20816_3_table_values():
    # ISO 20816-3:2022 / ISO 10816-3:2009 Annex A, Tables A.1 and A.2 — values from memory (REFERENCES.md §1.5).
    assert ISO20816_3_VELOCITY_MM_S[(1, "rigid")] == (2.3, 4.5, 7.1)
    assert ISO20816_3_VELOCITY_MM_S[(1, "flexible")] == (3.5, 7.1, 11.0)
    assert ISO20816_3_VELOCITY_MM_S[(2, "rigid")] == (1.4, 2.8, 4.5)
    assert ISO20816_3_VELOCITY_MM_S[(2, "flexible")] == (2.3, 4.5, 7.1)


@pytest.mark.parametrize("key", list(ISO20816_3_VELOCITY_MM_S))
def test_displacement_boundaries_equal_velocity_over_2_pi_f(key):
    # Internal consistency of the standard's table (REFERENCES.md §1.5 [C]): d = v/(2πf) at 12.5 Hz (group 1)
    # or 10 Hz (group 2), to the table's rounding (2 %).
    f = ISO20816_3_REFERENCE_HZ[key[0]]
    for v, d in zip(ISO20816_3_VELOCITY_MM_S[key], ISO20816_3_DISPLACEMENT_UM[key]):
        assert v / (2 * math.pi * f) * 1000.0 == pytest.approx(d, rel=0.02)


def test_zone_edges():
    assert iso_zone(1.4, 2, "rigid") == "A"
    assert iso_zone(1.41, 2, "rigid") == "B"
    assert iso_zone(2.81, 2, "rigid") == "C"
    assert iso_zone(4.51, 2, "rigid") == "D"
    assert iso_zone(7.0, 1, "flexible") == "B"
    with pytest.raises(ValueError):
        iso_zone(1.0, 3, "rigid")


def test_time_metrics_of_a_sine_and_of_gaussian_noise():
    # Textbook: a sine has crest factor √2 and kurtosis 1.5; Gaussian noise has kurtosis 3.
    n = 1 << 16
    x = 2.0 * np.sin(2 * np.pi * np.arange(n) / 64)
    tm = time_metrics(x)
    assert tm.rms_ms2 == pytest.approx(2 / math.sqrt(2), rel=1e-6)
    assert tm.crest_factor == pytest.approx(math.sqrt(2), rel=1e-4)
    assert tm.kurtosis == pytest.approx(1.5, rel=1e-3)
    assert tm.peak_to_peak_ms2 == pytest.approx(4.0, rel=1e-6)
    g = time_metrics(np.random.default_rng(0).normal(0, 1, 400_000))
    assert g.kurtosis == pytest.approx(3.0, abs=0.05)


def test_standard_gravity_is_iso_80000_3():
    assert STANDARD_GRAVITY_MS2 == 9.80665  # ISO 80000-3 standard acceleration of free fall


def test_cwru_kurtosis_matches_benchmark_table(shared_data):
    # Smith & Randall 2015, MSSP 64-65, Table B1: kurtosis of the drive-end signal of record 105 = 5.40,
    # of the healthy 97 = 2.76 (transcribed in smith_randall_2015_table.csv).
    from agent.recordings import read_recording

    rec = read_recording(shared_data / "bearings/cwru/12k_drive_end/105.mat", channel="X105_DE_time", fs_hz=12000, units="g")
    assert time_metrics(rec.accel_ms2).kurtosis == pytest.approx(5.40, abs=0.05)
    rec = read_recording(shared_data / "bearings/cwru/normal_baseline/97.mat", channel="X097_DE_time", fs_hz=48000, units="g")
    assert time_metrics(rec.accel_ms2).kurtosis == pytest.approx(2.76, abs=0.05)
