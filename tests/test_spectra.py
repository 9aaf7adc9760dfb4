"""Spectral core against outside references (Harris 1978, scipy.signal.welch, Parseval)."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from scipy import signal

from agent.spectra import (
    SpectrumPlan,
    accel_spectrum,
    band_rms,
    find_peaks,
    noise_floor,
    tone_at,
    velocity_spectrum,
    window_figures,
)
from tests.conftest import tone

FS = 25600.0
N = 65536


def test_window_figures_match_harris_1978():
    # F. J. Harris, Proc. IEEE 66(1), 1978, Table I: Hann CG 0.50, ENBW 1.50 bins, scallop loss 1.42 dB
    # (the table's values are from memory; REFERENCES.md §4 computes the same for periodic windows).
    h = window_figures("hann", 1024)
    assert h.coherent_gain == pytest.approx(0.5, abs=1e-9)
    assert h.enbw_bins == pytest.approx(1.5, abs=1e-9)
    assert h.scallop_loss_db == pytest.approx(1.42, abs=0.01)
    # scipy's flat-top (D'Antona & Ferrero five-term): CG 0.2156, ENBW 3.77 bins, scallop < 0.02 dB
    f = window_figures("flattop", 1024)
    assert f.coherent_gain == pytest.approx(0.2156, abs=1e-3)
    assert f.enbw_bins == pytest.approx(3.77, abs=0.01)
    assert f.scallop_loss_db < 0.02
    r = window_figures("rectangular", 1024)
    assert (r.coherent_gain, r.enbw_bins) == (1.0, 1.0)
    assert r.scallop_loss_db == pytest.approx(3.92, abs=0.01)  # Harris Table I: 3.92 dB


@pytest.mark.parametrize("offset_bins", [0.0, 0.25, 0.5, 0.37])
def test_flattop_reads_tone_within_0p1_percent(offset_bins):
    # Harris 1978: the flat-top window's scalloping loss is ~0.01 dB → amplitude within 0.1 % on or off line.
    plan = SpectrumPlan.build(FS, N, window="flattop", lines=4096)
    f0 = (500 + offset_bins) * plan.bin_width_hz
    spec = accel_spectrum(tone(FS, f0, 2.0, N), plan)
    k = int(np.argmax(spec.power))
    peak_line_amp = np.sqrt(spec.power[k])  # the single highest line, no interpolation: within the scallop loss
    assert 20 * np.log10(peak_line_amp / 2.0) >= -plan.figures.scallop_loss_db - 1e-6
    assert peak_line_amp == pytest.approx(2.0, rel=1.2e-3)
    _, amp = tone_at(spec, k)  # main-lobe power sum ÷ ENBW
    assert amp == pytest.approx(2.0, rel=1e-3)


@pytest.mark.parametrize("offset_bins", [0.0, 0.25, 0.5])
def test_hann_single_line_within_scalloping_loss(offset_bins):
    # Harris 1978: Hann scalloping loss 1.42 dB at half a line; the highest line may read low by no more.
    plan = SpectrumPlan.build(FS, N, window="hann", lines=4096)
    f0 = (500 + offset_bins) * plan.bin_width_hz
    spec = accel_spectrum(tone(FS, f0, 1.0, N), plan)
    line_db = 10 * np.log10(spec.power.max())
    assert -1.43 <= line_db <= 1e-6
    # ... and our interpolated reading removes the loss (power summed over the main lobe ÷ ENBW)
    f_est, amp = tone_at(spec, int(np.argmax(spec.power)))
    assert amp == pytest.approx(1.0, rel=0.01)
    assert abs(f_est - f0) / plan.bin_width_hz <= 0.05


def test_parseval_overall_rms_equals_time_rms():
    # Parseval's theorem: the sum over all lines ÷ ENBW equals the mean square of the waveform.
    rng = np.random.default_rng(7)
    x = rng.normal(0, 3.0, N) + tone(FS, 333.3, 2.0, N) + tone(FS, 4100.7, 0.5, N)
    for window in ("hann", "flattop", "rectangular"):
        plan = SpectrumPlan.build(FS, N, window=window, lines=8192, overlap=0.5)
        spec = accel_spectrum(x, plan)
        assert band_rms(spec, 0, FS / 2) == pytest.approx(np.std(x), rel=0.01)


@pytest.mark.parametrize("kind", ["random", "tonal"])
def test_band_power_agrees_with_scipy_welch(kind):
    # Reference library: scipy.signal.welch (density scaling) integrated over the band.
    rng = np.random.default_rng(3)
    x = rng.normal(0, 1.0, N) if kind == "random" else tone(FS, 1234.5, 1.5, N) + rng.normal(0, 0.01, N)
    plan = SpectrumPlan.build(FS, N, window="hann", lines=2048, overlap=0.5)
    ours = band_rms(accel_spectrum(x, plan), 100.0, 5000.0) ** 2
    f, pxx = signal.welch(x, FS, window="hann", nperseg=4096, noverlap=2048, detrend="constant")
    sel = (f >= 100.0) & (f <= 5000.0)
    ref = pxx[sel].sum() * (f[1] - f[0])
    assert ours == pytest.approx(ref, rel=0.005)


def test_velocity_units_50hz_10mm_s_peak_reads_7p07_rms():
    # Units: a 50 Hz tone of 10 mm/s peak is 7.07 mm/s r.m.s. (peak/√2). Acceleration = 2πf·v.
    v_peak_m_s = 0.010
    t = np.arange(N) / FS
    accel = v_peak_m_s * 2 * np.pi * 50.0 * np.cos(2 * np.pi * 50.0 * t)
    plan = SpectrumPlan.build(FS, N, lines=16384)
    vel = velocity_spectrum(accel_spectrum(accel, plan), 10.0)
    assert band_rms(vel, 10.0, 1000.0) == pytest.approx(7.071, rel=0.005)
    pk = find_peaks(vel, max_peaks=1)[0]
    assert pk.freq_hz == pytest.approx(50.0, abs=0.01)
    assert pk.amp == pytest.approx(7.071, rel=0.005)


def test_velocity_high_pass_removes_integration_ski_slope():
    # Low-frequency noise (1-5 Hz) would blow up as 1/f after integration; lines below f_low are zeroed.
    rng = np.random.default_rng(1)
    sos = signal.butter(4, [1.0, 5.0], btype="band", fs=FS, output="sos")
    x = signal.sosfilt(sos, rng.normal(0, 5.0, N))
    plan = SpectrumPlan.build(FS, N, lines=16384)
    vel = velocity_spectrum(accel_spectrum(x, plan), 10.0)
    assert band_rms(vel, 0, 10.0 - plan.bin_width_hz) == 0.0


def test_noise_floor_and_peaks_find_small_and_large_peaks():
    rng = np.random.default_rng(5)
    x = rng.normal(0, 0.05, N) + tone(FS, 100.0, 5.0, N) + tone(FS, 3000.0, 0.02, N)
    plan = SpectrumPlan.build(FS, N, lines=8192)
    spec = accel_spectrum(x, plan)
    floor = noise_floor(spec)
    # the floor follows the white noise level (0.05² / (fs/2) per Hz × ENBW × line width), not the tones
    expected_line = 0.05**2 / (FS / 2) * plan.bin_width_hz * plan.figures.enbw_bins
    assert np.median(floor) == pytest.approx(expected_line, rel=0.3)
    peaks = find_peaks(spec, floor, min_height_db=10)
    freqs = sorted(round(p.freq_hz) for p in peaks)
    assert 100 in freqs and 3000 in freqs
    small = [p for p in peaks if abs(p.freq_hz - 3000) < 1][0]
    assert small.amp == pytest.approx(0.02, rel=0.1)


def test_plan_and_spectrum_are_read_only():
    plan = SpectrumPlan.build(FS, 4096)
    with pytest.raises(ValueError):
        plan.win[0] = 2.0
    spec = accel_spectrum(np.ones(4096), plan)
    with pytest.raises(ValueError):
        spec.power[0] = 1.0


def test_bad_arguments_raise_value_error():
    with pytest.raises(ValueError, match="window"):
        SpectrumPlan.build(FS, 4096, window="kaiser")
    with pytest.raises(ValueError, match="shorter"):
        accel_spectrum(np.ones(100), SpectrumPlan.build(FS, 4096))


@pytest.mark.parametrize("n_samples", [65536, 121265, 1004, 300])
def test_floor_spectrum_equals_scipy_welch(n_samples):
    # Reference library: scipy.signal.welch with a periodic 4-term Blackman-Harris window,
    # "spectrum" scaling, 50 % overlap, mean removed per segment — line by line.
    from agent.pipeline import floor_spectrum

    x = np.random.default_rng(11).normal(0, 1.0, n_samples) + tone(FS, 777.7, 3.0, n_samples)
    ours = floor_spectrum(x, FS)
    n = ours.nperseg
    win = signal.get_window("blackmanharris", n, fftbins=True)
    f, p = signal.welch(x, FS, window=win, nperseg=n, noverlap=n // 2, scaling="spectrum", detrend="constant")
    assert n == min(16384, max(64, n_samples // 4))
    np.testing.assert_allclose(ours.f_hz, f, rtol=1e-12)
    np.testing.assert_allclose(ours.power, p, rtol=1e-9, atol=1e-12 * p.max())
    assert ours.enbw_bins == pytest.approx(n * np.sum(win**2) / win.sum() ** 2, rel=1e-12)


def test_capture_spectra_computes_each_segmentation_once():
    # Plans that cut the capture into the same segments share one spectrum, equal to scipy.signal.welch
    # (reference library, "spectrum" scaling); a different segmentation is computed on its own.
    from agent.spectra import CaptureSpectra

    x = np.random.default_rng(2).normal(0, 1.0, N) + tone(FS, 250.0, 2.0, N)
    spectra = CaptureSpectra(x, FS)
    one_a = spectra.accel(SpectrumPlan.build(FS, N, lines=N // 2, overlap=0.5))  # a single segment ...
    one_b = spectra.accel(SpectrumPlan.build(FS, N, lines=N // 2, overlap=0.0))  # ... whatever the overlap
    assert one_a is one_b
    _, p = signal.welch(x, FS, window="hann", nperseg=N, scaling="spectrum", detrend="constant")
    np.testing.assert_allclose(one_a.power, p, rtol=1e-9, atol=1e-12 * p.max())
    avg = spectra.accel(SpectrumPlan.build(FS, N, lines=4096, overlap=0.5))
    assert avg is not one_a and avg.n_averages == 15
    assert avg is spectra.accel(SpectrumPlan.build(FS, N, lines=4096, overlap=0.5))
    np.testing.assert_array_equal(avg.power, accel_spectrum(x, SpectrumPlan.build(FS, N, lines=4096)).power)
    with pytest.raises(ValueError):
        spectra.of_samples(x[::-1])
    with pytest.raises(ValueError):
        spectra.accel(SpectrumPlan.build(2 * FS, N, lines=4096))


def test_segment_powers_and_row_tones_equal_the_one_segment_path():
    # Each row is accel_spectrum of its slice alone; tones_at_rows is tone_at row by row, bit for bit
    # (Grandke's estimator: a 1 000.37 Hz tone reads within 0.05 line, its r.m.s. within 1 %).
    from agent.spectra import segment_powers, segment_spectra, tones_at_rows

    x = tone(FS, 1000.37, 2.0, 8192) + np.random.default_rng(4).normal(0, 0.01, 8192)
    plan = SpectrumPlan.build(FS, 2048, lines=1024, overlap=0.75)
    rows = segment_powers(x, plan, n_lines=120)
    assert rows.shape == (13, 120) and not rows.flags.writeable
    for i, row in enumerate(rows):
        one = accel_spectrum(x[i * 512 : i * 512 + 2048], plan)
        np.testing.assert_array_equal(row, one.power[:120])
    ks = np.argmax(rows, axis=1)
    f, amp = tones_at_rows(rows, ks, bin_width_hz=plan.bin_width_hz, enbw_bins=plan.figures.enbw_bins)
    for i, sp in enumerate(segment_spectra(x, plan, n_lines=120)):
        assert (f[i], amp[i]) == tone_at(sp, int(ks[i]))
    assert np.all(np.abs(f - 1000.37) < 0.05 * plan.bin_width_hz) and np.allclose(amp, 2.0, rtol=0.01)
    # at the edges (line 0 or 1) the lobe is cut and there is no interpolation, as in tone_at
    f0, a0 = tones_at_rows(rows[:1], np.array([1]), bin_width_hz=plan.bin_width_hz, enbw_bins=1.5)
    sp0 = segment_spectra(x, plan, n_lines=120)[0]
    assert (f0[0], a0[0]) == tone_at(replace(sp0, enbw_bins=1.5), 1)


@pytest.mark.parametrize("f_low_hz", [2.5, 10.0, 400.0])
def test_velocity_floor_from_the_acceleration_floor_equals_the_direct_one(f_low_hz):
    # noise_floor(vel) takes its running median on vel·(2πf)² = acc·10⁶: converted from the
    # acceleration floor it must agree to rounding, at the high-pass cut too.
    from agent.spectra import velocity_floor

    x = np.random.default_rng(9).normal(0, 0.05, N) + tone(FS, 24.6, 0.3, N) + tone(FS, 147.6, 0.5, N)
    acc = accel_spectrum(x, SpectrumPlan.build(FS, N, lines=16384))
    vel = velocity_spectrum(acc, f_low_hz)
    direct = noise_floor(vel)
    shared = velocity_floor(vel, acc, noise_floor(acc))
    np.testing.assert_allclose(shared, direct, rtol=1e-12, atol=0)
    assert np.all((shared == 0) == (direct == 0))
    # a noise-free tone leaves lines at the floor's clipping level: computed directly, equal bit for bit
    clean = accel_spectrum(tone(FS, 100.0, 1.0, N), SpectrumPlan.build(FS, N, lines=16384))
    cvel = velocity_spectrum(clean, f_low_hz)
    np.testing.assert_array_equal(velocity_floor(cvel, clean, noise_floor(clean)), noise_floor(cvel))
    with pytest.raises(ValueError):
        velocity_floor(acc, vel, noise_floor(acc))
