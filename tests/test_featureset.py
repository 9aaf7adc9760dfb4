"""Feature vector: names with units, values from real signals through the spectral core."""

from __future__ import annotations

import math

import numpy as np
import pytest

from agent.featureset import FeatureVector, build_features, feature_kind, order_feature_name
from agent.model import STANDARD_GRAVITY_MS2
from agent.spectra import SpectrumPlan, accel_spectrum, velocity_spectrum

FS_HZ = 10240.0
N = 40960


def tone_accel(f_hz, vel_rms_mm_s, n=N):
    t = np.arange(n) / FS_HZ
    return math.sqrt(2) * vel_rms_mm_s * 1e-3 * 2 * math.pi * f_hz * np.sin(2 * math.pi * f_hz * t)


def spectra(x):
    acc = accel_spectrum(x, SpectrumPlan.build(FS_HZ, x.size, lines=4096))
    return velocity_spectrum(acc, 2.0), acc


def test_overall_and_line_band_from_known_tones():
    # 2.0 mm/s r.m.s. at 24.6 Hz and 0.5 mm/s at 100 Hz: overall = √(2² + 0.5²) (Parseval)
    x = tone_accel(24.6, 2.0) + tone_accel(100.0, 0.5)
    vel, acc = spectra(x)
    fv = build_features(vel, acc, line_hz=50.0)
    assert fv["vel_rms_mm_s"] == pytest.approx(math.hypot(2.0, 0.5), rel=0.01)
    assert fv["band_2xlf_mm_s"] == pytest.approx(0.5, rel=0.01)
    # acceleration r.m.s. in g = r.m.s. in m/s² / 9.80665 (standard gravity, ISO 80000-3)
    assert fv["acc_rms_g"] == pytest.approx(np.sqrt(np.mean(x**2)) / STANDARD_GRAVITY_MS2, rel=0.01)
    assert {"floor_lf_db", "floor_hf_db"} <= set(fv.names())


def test_optional_parts_are_optional():
    assert len(build_features()) == 0
    fv = build_features(time_metrics={"acc_rms_ms2": 9.80665, "crest_factor": 3.1, "kurtosis": 3.0,
                                      "skewness": 0.1})
    assert fv.to_dict() == {"acc_rms_g": pytest.approx(1.0), "crest_factor": 3.1, "kurtosis": 3.0}
    fv = build_features(order_levels={0.5: 0.02, 1.0: 1.2, 2: 0.4}, envelope_levels={"env_band": 0.01,
                                                                                      "bpfo_de_ms2": 0.0980665})
    assert fv.names() == ("bpfo_de_g", "env_band_g", "order_0.5x_mm_s", "order_1x_mm_s", "order_2x_mm_s")
    assert fv["bpfo_de_g"] == pytest.approx(0.01)
    assert order_feature_name(10) == "order_10x_mm_s"


def test_feature_names_carry_units():
    assert feature_kind("vel_rms_mm_s") == "amplitude" and feature_kind("floor_hf_db") == "db"
    assert feature_kind("kurtosis") == "dimensionless" and feature_kind("env_kurtosis") == "dimensionless"
    with pytest.raises(ValueError, match="carries no known unit"):
        FeatureVector({"velocity": 1.0})
    with pytest.raises(ValueError, match="not finite"):
        FeatureVector({"vel_rms_mm_s": float("nan")})
    with pytest.raises(ValueError, match=">= 0"):
        FeatureVector({"vel_rms_mm_s": -1.0})
    assert FeatureVector({"floor_hf_db": -80.0})["floor_hf_db"] == -80.0  # decibels may be negative
    with pytest.raises(TypeError):
        FeatureVector({"vel_rms_mm_s": "1.0"})


def test_wrong_spectrum_kind_is_refused():
    vel, acc = spectra(tone_accel(24.6, 1.0))
    with pytest.raises(ValueError, match="velocity spectrum"):
        build_features(vel=acc)
    with pytest.raises(ValueError, match="acceleration spectrum"):
        build_features(acc=vel)


def test_feature_vector_is_read_only():
    fv = FeatureVector({"vel_rms_mm_s": 1.0})
    with pytest.raises(TypeError):
        fv.values["vel_rms_mm_s"] = 2.0
    assert fv.replace(vel_rms_mm_s=2.0)["vel_rms_mm_s"] == 2.0 and fv["vel_rms_mm_s"] == 1.0
