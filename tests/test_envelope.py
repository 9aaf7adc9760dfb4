"""Envelope spectrum, cepstrum pre-whitening and fast kurtogram (agent/envelope.py)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import signal

from agent.envelope import (
    EnvelopeSpectrum,
    band_kurtosis,
    envelope_spectrum,
    fast_kurtogram,
    prewhiten,
)
from agent.kinematics import bearing_orders
from replay.bearing_signals import bearing_fault_signal

FS = 25600.0
N = 65536


def test_prewhiten_gives_unit_magnitude_and_keeps_phase():
    # Borghesani et al. (MSSP 36, 2013): x_cpw = IFFT{X/|X|}; checked against numpy's FFT
    rng = np.random.default_rng(1)
    x = rng.standard_normal(4096) + 5 * np.sin(2 * np.pi * 0.05 * np.arange(4096))
    y = prewhiten(x)
    X, Y = np.fft.rfft(x - x.mean()), np.fft.rfft(y)
    assert np.allclose(np.abs(Y[1:]), 1.0, atol=1e-9)
    assert np.allclose(np.angle(Y[1:-1]), np.angle(X[1:-1]), atol=1e-9)
    assert abs(Y[0]) < 1e-9


def test_prewhiten_removes_a_dominant_tone():
    # a tone 40 dB above white noise: after whitening its line is no higher than the noise lines
    rng = np.random.default_rng(2)
    n = 8192
    x = 100 * np.sin(2 * np.pi * 1000 * np.arange(n) / FS) + rng.standard_normal(n)
    y = prewhiten(x)
    p = np.abs(np.fft.rfft(y * np.hanning(n))) ** 2
    k = int(round(1000 * n / FS))
    assert p[k - 3 : k + 4].max() < 50 * np.median(p)


def test_squared_envelope_of_am_tone_matches_the_analytic_lines():
    # x = (1 + m cos 2π fm t) cos 2π fc t → |analytic|² = (1 + m cos)² = 1 + m²/2 + 2m cos(fm) + (m²/2) cos(2fm):
    # SES lines 2m at fm and m²/2 at 2fm (trigonometric identity; Hann amplitude exact on a bin)
    m, fc = 0.5, 5000.0
    fm = 100 * FS / N  # on a line
    t = np.arange(N) / FS
    x = (1 + m * np.cos(2 * np.pi * fm * t)) * np.cos(2 * np.pi * fc * t)
    es = envelope_spectrum(x, FS, (4000.0, 6000.0), whiten=False)
    assert isinstance(es, EnvelopeSpectrum)
    assert es.band_source == "config" and es.band_hz == (4000.0, 6000.0)
    k = int(round(fm / es.bin_width_hz))
    assert es.f_hz[k] == pytest.approx(fm)
    assert es.amplitude[k] == pytest.approx(2 * m, rel=1e-3)
    assert es.amplitude[2 * k] == pytest.approx(m * m / 2, rel=1e-3)
    assert es.bin_width_hz == pytest.approx(FS / N)
    with pytest.raises(ValueError):
        es.amplitude[0] = 1.0  # read-only


def test_kurtogram_finds_the_resonance_rung_by_impacts():
    # impacts ring a 3.3 kHz resonance (replay/bearing_signals.py); the band of largest
    # spectral kurtosis must contain it (Antoni 2007: SK peaks where the transients are)
    orders = bearing_orders(8, 12.7, 60.0, 0.0)
    x = bearing_fault_signal("outer", -6.0, orders, seed=3)
    kg = fast_kurtogram(prewhiten(x), FS)
    lo, hi = kg.band_hz
    assert lo <= 3300.0 <= hi
    assert len(kg.nw) == len(kg.sk) == len(kg.fc_hz)
    # white Gaussian noise has spectral kurtosis 0 in every band (Antoni 2006); the estimate from
    # L samples scatters by about 2/√L (128 samples in the narrowest band → ≈ 0.18), so its
    # maximum over all bands stays below 1, and the impacts' band stands well above that
    noise = np.random.default_rng(4).standard_normal(N)
    sk_noise = fast_kurtogram(noise, FS).sk_max
    assert sk_noise < 1.0
    assert kg.sk_max > 1.3 and kg.sk_max > 2 * sk_noise


def test_band_kurtosis_of_gaussian_noise_is_near_zero():
    # complex Gaussian envelope: <|c|^4>/<|c|^2>^2 = 2, so K = 0 (Antoni 2006, MSSP 20)
    noise = np.random.default_rng(5).standard_normal(N)
    assert band_kurtosis(noise, FS, (2000.0, 4000.0)) == pytest.approx(0.0, abs=0.1)


def test_envelope_with_kurtogram_band_reports_its_choice():
    orders = bearing_orders(8, 12.7, 60.0, 0.0)
    x = bearing_fault_signal("outer", -6.0, orders, seed=6)
    es = envelope_spectrum(x, FS, fmin_hz=500.0, min_bandwidth_hz=800.0)
    assert es.band_source == "kurtogram" and es.prewhitened
    assert es.band_hz[0] >= 500.0 and es.band_hz[1] - es.band_hz[0] >= 800.0
    # the envelope shows BPFO (25 Hz shaft) as its strongest line above 20 Hz
    bpfo = orders.bpfo * 25.0
    sel = es.f_hz > 20.0
    f_top = es.f_hz[sel][np.argmax(es.amplitude[sel])]
    assert f_top == pytest.approx(bpfo, rel=0.02)
    full = envelope_spectrum(x, FS, select_band=False, fmin_hz=500.0, fmax_hz=10000.0)
    assert full.band_source == "full" and full.band_hz == (500.0, 10000.0)


def test_angle_domain_input_gives_orders():
    # an order-tracked signal: fs = samples per revolution, so frequencies read as orders
    spr = 256.0
    rev = np.arange(256 * 512) / spr
    x = (1 + 0.5 * np.cos(2 * np.pi * 3.58 * rev)) * signal.chirp(rev, 60, rev[-1], 60)
    es = envelope_spectrum(x, spr, (40.0, 80.0), whiten=False)
    sel = es.f_hz > 1.0
    assert es.f_hz[sel][np.argmax(es.amplitude[sel])] == pytest.approx(3.58, abs=es.bin_width_hz)


@pytest.mark.parametrize(
    "kwargs, match",
    [
        ({"band_hz": (5000.0, 4000.0)}, "band_hz"),
        ({"band_hz": (100.0, 20000.0)}, "band_hz"),
    ],
)
def test_bad_band_is_refused(kwargs, match):
    x = np.random.default_rng(0).standard_normal(4096)
    with pytest.raises(ValueError, match=match):
        envelope_spectrum(x, FS, **kwargs)


def test_bad_signals_are_refused():
    with pytest.raises(ValueError, match="NaN"):
        envelope_spectrum(np.full(4096, np.nan), FS)
    with pytest.raises(ValueError, match="1-D"):
        envelope_spectrum(np.zeros((4, 4096)), FS)
    with pytest.raises(ValueError, match="at least"):
        envelope_spectrum(np.zeros(10), FS)
    with pytest.raises(ValueError, match="fs_hz"):
        envelope_spectrum(np.zeros(4096), 0.0)
    with pytest.raises(ValueError, match="no kurtogram band"):
        fast_kurtogram(np.random.default_rng(0).standard_normal(4096), FS, fmin_hz=12000.0)
