"""Healthy captures of a simulated motor-pump skid, through the real spectral core.

Run-to-run variation: speed wanders inside its bin (1455–1505 rpm, a
random walk of at most ±0.6 % per capture, below the transient tolerance),
tone amplitudes vary ±5–10 % (log-normal), the broadband noise and the
high-frequency resonance noise vary by ±10 %. Every capture is a real
waveform put through :mod:`agent.spectra` and :func:`build_features`.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import signal

from agent.featureset import FeatureVector, build_features
from agent.model import STANDARD_GRAVITY_MS2
from agent.spectra import SpectrumPlan, accel_spectrum, band_rms, velocity_spectrum

FS_HZ = 10240.0
N_SAMPLES = 20480
LINE_HZ = 50.0
BPFO_ORDER = 3.5848  # CWRU 6205 drive-end bearing, REFERENCES §3 (used here only as a tone position)
ORDERS = (0.5, 1.0, 2.0, 3.0, 6.0)
_T = np.arange(N_SAMPLES) / FS_HZ
_HANN_ENV = np.hanning(N_SAMPLES)
_PLAN = SpectrumPlan.build(FS_HZ, N_SAMPLES, lines=2048)
_SOS_ENV = signal.butter(4, (2000.0, 4500.0), btype="bandpass", fs=FS_HZ, output="sos")

#: nominal tones, velocity r.m.s. mm/s, at 1480 rpm
TONES_MM_S = {1.0: 1.2, 2.0: 0.5, 3.0: 0.2, 6.0: 0.4}


def _tone_accel(t, f_hz, vel_rms_mm_s, phase):
    a_rms = vel_rms_mm_s * 1e-3 * 2 * math.pi * f_hz
    return math.sqrt(2.0) * a_rms * np.sin(2 * math.pi * f_hz * t + phase)


def healthy_waveform(rng: np.random.Generator, speed_hz: float, scale: dict | None = None) -> np.ndarray:
    """One capture's acceleration, m/s²; ``scale`` multiplies named parts (for fault tests)."""
    scale = scale or {}
    t = _T
    x = np.zeros(N_SAMPLES)
    k = (speed_hz / (1480 / 60.0)) ** 2  # unbalance response grows with speed²
    for order, v in TONES_MM_S.items():
        amp = v * k * math.exp(rng.normal(0, 0.06)) * scale.get(order, 1.0)
        x += _tone_accel(t, order * speed_hz, amp, rng.uniform(0, 2 * math.pi))
    x += _tone_accel(t, 2 * LINE_HZ, 0.3 * math.exp(rng.normal(0, 0.05)) * scale.get("2xlf", 1.0),
                     rng.uniform(0, 2 * math.pi))
    x += rng.normal(0, 0.05 * math.exp(rng.normal(0, 0.1)), N_SAMPLES)
    hf = signal.sosfilt(_SOS_ENV, rng.normal(0, 1.0, N_SAMPLES))
    x += hf / hf.std() * 0.3 * math.exp(rng.normal(0, 0.1)) * scale.get("hf", 1.0)
    return x


def _kurtosis(x: np.ndarray) -> float:
    """Pearson kurtosis m4/m2² (3 for a normal signal), as scipy.stats.kurtosis(fisher=False)."""
    d = x - x.mean()
    m2 = np.mean(d * d)
    return float(np.mean((d * d) ** 2) / (m2 * m2))


def features_of(x: np.ndarray, speed_hz: float) -> FeatureVector:
    """Feature vector of one waveform: spectra, time metrics, order levels, envelope levels."""
    acc = accel_spectrum(x, _PLAN)
    vel = velocity_spectrum(acc, 2.0)
    half = 2.0 * vel.bin_width_hz
    orders = {o: band_rms(vel, o * speed_hz - half, o * speed_hz + half) for o in ORDERS}
    rms = float(np.sqrt(np.mean(x**2)))
    peak = float(np.max(np.abs(x)))
    tm = {"acc_rms_ms2": rms, "acc_peak_ms2": peak, "crest_factor": peak / rms,
          "kurtosis": _kurtosis(x)}
    env = np.abs(signal.hilbert(signal.sosfilt(_SOS_ENV, x)))
    env = env - env.mean()
    env_spec = np.abs(np.fft.rfft(env * _HANN_ENV)) * 2 / _HANN_ENV.sum() / math.sqrt(2)
    f_env = np.fft.rfftfreq(env.size, 1 / FS_HZ)
    sel = np.abs(f_env - BPFO_ORDER * speed_hz) <= 1.5
    envl = {"env_band_g": float(env.std()) / STANDARD_GRAVITY_MS2,
            "bpfo_de_g": float(np.sqrt(np.sum(env_spec[sel] ** 2) / 1.5)) / STANDARD_GRAVITY_MS2}
    return build_features(vel, acc, tm, orders, envl, line_hz=LINE_HZ)


def healthy_run(n: int, seed: int, *, t0_utc_s: float = 1.7e9, interval_s: float = 600.0):
    """``n`` healthy captures: list of (t_utc_s, speed_hz, FeatureVector)."""
    rng = np.random.default_rng(seed)
    speed_rpm = 1480.0
    out = []
    for i in range(n):
        speed_rpm = float(np.clip(speed_rpm * (1 + rng.uniform(-0.006, 0.006)), 1455.0, 1505.0))
        f = speed_rpm / 60.0
        out.append((t0_utc_s + i * interval_s, f, features_of(healthy_waveform(rng, f), f)))
    return out
