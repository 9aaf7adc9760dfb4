"""Machine simulator: round trip through the spectral core, physics checks, determinism."""

from __future__ import annotations

import io

import numpy as np
import pytest
from scipy import signal
from scipy.io import wavfile

from agent import spectra
from agent.kinematics import bearing_orders
from agent.model import STANDARD_GRAVITY_MS2
from agent.simulator import (
    BearingDefect,
    Faults,
    OperatingPoint,
    Resonance,
    SensorFault,
    SimBearing,
    SimMachine,
    ringing,
    synthesize,
)

FS = 25600.0
N = 65536
# an invented deep-groove bearing of 6310-like proportions (8 balls)
BRG = SimBearing("pump_de", balls=8, ball_diameter_mm=22.2, pitch_diameter_mm=80.0)
QUIET = SimMachine(
    residual_1x_mm_s=0.0, vane_pass_mm_s=(), line_mm_s=(), rotor_bar_g=0.0,
    floor_mm_s=0.0, noise_g=0.0, bearings=(BRG,),
)
POINT = OperatingPoint(True, 24.6, None, 50.0)


def _spectrum(x, lines=16384):
    plan = spectra.SpectrumPlan.build(FS, x.size, window="hann", lines=lines)
    return spectra.accel_spectrum(x, plan)


def _tone_near(spec, f_hz, search_lines=3):
    """(freq, r.m.s.) of the tone peaking within ± search_lines of f_hz (tone_at: Grandke + lobe sum)."""
    k0 = int(round(f_hz / spec.bin_width_hz))
    lo, hi = max(1, k0 - search_lines), k0 + search_lines + 1
    k = lo + int(np.argmax(spec.power[lo:hi]))
    return spectra.tone_at(spec, k)


def _check_tones(truth, spec, families):
    checked = 0
    for t in truth["tones"]:
        if t["family"] not in families:
            continue
        f, a = _tone_near(spec, t["freq_hz"])
        # frequency within 0.05 line (Grandke's estimator is exact for one tone; leakage of
        # neighbours adds a little) and amplitude within 5 % (the brief's round-trip tolerance)
        assert abs(f - t["freq_hz"]) < 0.05 * spec.bin_width_hz, (t["name"], f, t["freq_hz"])
        assert a == pytest.approx(t["accel_rms_ms2"], rel=0.05), (t["name"], a, t["accel_rms_ms2"])
        checked += 1
    return checked


@pytest.mark.parametrize(
    "machine_kw, faults, families, min_tones",
    [
        ({}, Faults(unbalance_mm_s=3.0), {"shaft"}, 1),
        ({}, Faults(misalignment_mm_s=2.0), {"shaft"}, 3),
        ({}, Faults(bent_shaft_mm_s=2.0), {"shaft"}, 2),
        ({}, Faults(looseness_mm_s=2.0), {"shaft"}, 16),
        ({"vane_pass_mm_s": (0.8, 0.3, 0.1)}, Faults(), {"vane_pass"}, 3),
        ({"line_mm_s": (0.1, 0.5, 0.05, 0.05)}, Faults(), {"line"}, 4),
        ({"rotor_bar_g": 0.02}, Faults(), {"rotor_bar"}, 3),
        ({"belt_ratio": 0.31}, Faults(belt_wear_mm_s=1.5), {"belt"}, 4),
        ({}, Faults(bearings=(BearingDefect("pump_de", "inner", 0.0, stage=3, tone_mm_s=0.5,
                                            jitter_frac=0.0),)), {"bearing", "bearing_sideband"}, 6),
    ],
    ids=["unbalance", "misalignment", "bent_shaft", "looseness", "vane_pass", "line", "rotor_bar", "belt",
         "bearing_tones"],
)
def test_round_trip_each_component(machine_kw, faults, families, min_tones):
    import dataclasses

    machine = dataclasses.replace(QUIET, **machine_kw)
    # looseness brings its raised floor: a 4× longer record and 4× finer lines keep the floor's
    # share of each tone's main lobe below 2 %
    n, lines = (4 * N, 65536) if faults.looseness_mm_s else (N, 16384)
    x, truth = synthesize(machine, POINT, faults, FS, n, seed=3)
    assert _check_tones(truth, _spectrum(x, lines), families) >= min_tones


def test_structural_resonance_amplifies_what_falls_under_it():
    import dataclasses

    # resonance placed at 2X: the 2X of misalignment is raised by the peak gain, 1X barely
    res = Resonance(2 * 24.6, 0.05, 4.0)
    m = dataclasses.replace(QUIET, structure=res)
    x, truth = synthesize(m, POINT, Faults(misalignment_mm_s=1.0), FS, N, seed=1)
    spec = _spectrum(x)
    _, a2 = _tone_near(spec, 2 * 24.6)
    v2 = 1.0 * 1e-3 * 2 * np.pi * 2 * 24.6  # set 2X velocity r.m.s. 1.0 mm/s as acceleration r.m.s.
    assert a2 == pytest.approx(4.0 * v2, rel=0.05)  # H(f_n) = gain by construction of the peaking filter
    assert _check_tones(truth, spec, {"shaft"}) == 3


def test_pure_1x_velocity_rms_equals_set_value_parseval():
    x, truth = synthesize(QUIET, POINT, Faults(unbalance_mm_s=2.5), FS, N, seed=7)
    # time domain: a tone of velocity r.m.s. v at f has acceleration r.m.s. v·2πf (exact calculus)
    assert np.sqrt(np.mean(x**2)) == pytest.approx(2.5e-3 * 2 * np.pi * 24.6, rel=2e-3)
    # frequency domain, ISO 10-1000 Hz band: Parseval with the window's ENBW (Harris 1978)
    vel = spectra.velocity_spectrum(_spectrum(x), 2.0)
    assert spectra.band_rms(vel, 10.0, 1000.0) == pytest.approx(2.5, rel=0.01)


def test_ringing_decays_at_the_log_decrement():
    zeta, f_n = 0.04, 1000.0
    ring = Resonance(f_n, zeta)
    f_d = f_n * np.sqrt(1 - zeta**2)
    per = 64  # samples per damped period, so x[k + per] / x[k] is exactly one period apart
    fs = per * f_d
    drive = np.zeros(2000)
    drive[0] = 1.0
    h = ringing(drive, ring, fs)
    delta = 2 * np.pi * zeta / np.sqrt(1 - zeta**2)  # logarithmic decrement (Thomson & Dahleh §2.6)
    k = np.arange(5, 700)
    k = k[np.abs(h[k]) > 1e-3 * np.abs(h).max()]
    assert np.allclose(np.log(h[k] / h[k + per]), delta, rtol=1e-9)
    # the same from successive positive peaks, as an analyst would measure it
    peaks, _ = signal.find_peaks(h)
    assert np.mean(np.log(h[peaks[:-1]] / h[peaks[1:]])) == pytest.approx(delta, rel=1e-3)
    assert ring.log_decrement == pytest.approx(delta)
    # zero area: no static (low-frequency) content, as for an accelerance below resonance
    long = np.zeros(12000)
    long[0] = 1.0
    h_long = ringing(long, ring, fs)  # decays to e^-47 of its start
    assert abs(h_long.sum()) < 1e-9 * np.abs(h_long).sum()


def test_bearing_impacts_ring_at_the_configured_resonance():
    import dataclasses

    ring = Resonance(3000.0, 0.03)
    m = dataclasses.replace(QUIET, ring=ring)
    d = BearingDefect("pump_de", "cage", 1.0, stage=1, jitter_frac=0.0)
    x, truth = synthesize(m, OperatingPoint(True, 10.0), Faults(bearings=(d,)), FS, N, seed=2)
    # FTF of 10 Hz shaft ≈ 3.6 Hz: impacts 0.28 s apart, each decays fully; the ringing envelope
    # starts at 1 g, so the largest sample lies just below it (first crest at ω_d·t ≈ π/2)
    spec = _spectrum(x, lines=1024)
    k = int(np.argmax(spec.power))
    assert spec.f_hz[k] == pytest.approx(ring.freq_hz * np.sqrt(1 - 0.03**2), abs=2 * spec.bin_width_hz)
    assert 0.9 < np.abs(x).max() / STANDARD_GRAVITY_MS2 <= 1.0


def _squared_envelope_spectrum(x, band_hz):
    sos = signal.butter(6, band_hz, btype="bandpass", fs=FS, output="sos")
    env = np.abs(signal.hilbert(signal.sosfiltfilt(sos, x))) ** 2
    f = np.fft.rfftfreq(env.size, 1 / FS)
    p = np.abs(np.fft.rfft((env - env.mean()) * np.hanning(env.size))) ** 2
    return f, p


@pytest.mark.parametrize("defect", ["outer", "inner", "ball"])
def test_bearing_impact_rate_at_kinematic_frequency_within_slip(defect):
    import dataclasses

    m = dataclasses.replace(QUIET, noise_g=0.01)
    slip = 0.015
    d = BearingDefect("pump_de", defect, 1.0, stage=1, slip_frac=slip, jitter_frac=0.015)
    x, truth = synthesize(m, POINT, Faults(bearings=(d,)), FS, N, seed=5)
    o = bearing_orders(8, 22.2, 80.0)
    kin = {"outer": o.bpfo, "inner": o.bpfi, "ball": 2 * o.bsf}[defect] * 24.6
    assert truth["bearings"][0]["kinematic_hz"] == pytest.approx(kin)
    # stage 1: high-frequency only — the squared envelope of the 2-4.5 kHz band (around the
    # 3.3 kHz ring) shows the impact rate (Randall & Antoni 2011, squared envelope spectrum)
    f, p = _squared_envelope_spectrum(x, (2000.0, 4500.0))
    sel = (f > 0.8 * kin) & (f < 1.2 * kin)
    f_pk = f[sel][np.argmax(p[sel])]
    # the line lies between kinematic×(1 − 2·slip) and kinematic: slip ≈ 1-2 % (REFERENCES §3)
    assert kin * (1 - 2 * slip) - 1 / (N / FS) <= f_pk <= kin + 1 / (N / FS)
    # … and no tone at the defect frequency in the low-frequency spectrum yet: 1 g impacts leave
    # under 0.05 mm/s in the ISO 10-1000 Hz velocity band (the ringing has zero area)
    spec = _spectrum(x)
    _, a = _tone_near(spec, truth["bearings"][0]["defect_hz"])
    assert a < 0.002 * STANDARD_GRAVITY_MS2
    assert spectra.band_rms(spectra.velocity_spectrum(spec, 2.0), 10.0, 1000.0) < 0.05


def test_inner_race_impacts_modulated_at_1x():
    d = BearingDefect("pump_de", "inner", 1.0, stage=1, jitter_frac=0.0)
    x, truth = synthesize(QUIET, POINT, Faults(bearings=(d,)), FS, N, seed=5)
    f, p = _squared_envelope_spectrum(x, (2000.0, 4500.0))
    def line(fx):
        sel = np.abs(f - fx) < 0.6
        return p[sel].max()
    bpfi = truth["bearings"][0]["defect_hz"]
    floor = np.median(p[(f > 20) & (f < 400)])
    assert line(24.6) > 100 * floor  # 1X in the envelope: load-zone modulation
    assert line(bpfi - 24.6) > 30 * floor and line(bpfi + 24.6) > 30 * floor  # 1X sidebands


def test_stage_four_raises_the_floor():
    d3 = BearingDefect("pump_de", "outer", 1.0, stage=3)
    d4 = BearingDefect("pump_de", "outer", 1.0, stage=4)
    x3, _ = synthesize(QUIET, POINT, Faults(bearings=(d3,)), FS, N, seed=1)
    x4, _ = synthesize(QUIET, POINT, Faults(bearings=(d4,)), FS, N, seed=1)
    fl3 = np.median(spectra.noise_floor(_spectrum(x3))[1000:8000])
    fl4 = np.median(spectra.noise_floor(_spectrum(x4))[1000:8000])
    assert 10 * np.log10(fl4 / fl3) > 6.0


def test_cavitation_band_rms_and_bursts():
    x, truth = synthesize(QUIET, POINT, Faults(cavitation_g=0.5), FS, N, seed=4)
    lo, hi = truth["cavitation_band_hz"]
    # one rectangular segment: Parseval exact for a non-stationary (bursty) signal
    plan = spectra.SpectrumPlan.build(FS, N, window="rectangular", lines=N // 2)
    spec = spectra.accel_spectrum(x, plan)
    assert spectra.band_rms(spec, lo, hi) / STANDARD_GRAVITY_MS2 == pytest.approx(0.5, rel=0.05)
    # bursts of random energy: far more peaked than Gaussian noise (kurtosis 3)
    kurt = np.mean(x**4) / np.mean(x**2) ** 2
    assert kurt > 6


def test_speed_ramp_within_a_capture():
    pt = OperatingPoint(True, 20.0, 25.0, 42.0)
    x, truth = synthesize(QUIET, pt, Faults(unbalance_mm_s=2.0), FS, N, seed=1)
    assert truth["speed_hz"] == pytest.approx(22.5)
    q = N // 4
    for part, f_expect in ((x[:q], 20.0 + 5 * 0.125), (x[-q:], 25.0 - 5 * 0.125)):
        spec = _spectrum(part, lines=8192)
        f, _ = _tone_near(spec, f_expect, search_lines=4)
        assert f == pytest.approx(f_expect, abs=0.3)


def test_sensor_faults():
    run = lambda *sf: synthesize(SimMachine(), POINT, Faults(sensor=sf), FS, N, seed=1)  # noqa: E731
    x, tr = run(SensorFault("flatline", 0.0))
    assert np.ptp(x) == 0.0
    x, tr = run(SensorFault("clipping", 0.05))
    assert np.abs(x).max() == pytest.approx(0.05 * STANDARD_GRAVITY_MS2)
    assert tr["sensor"][0]["clipped_fraction"] > 0.01
    x, tr = run(SensorFault("dropout", 0.1))
    assert np.mean(x == 0.0) == pytest.approx(0.1, abs=0.002)
    x, tr = run(SensorFault("bias_drift", 0.5))
    assert np.mean(x) / STANDARD_GRAVITY_MS2 == pytest.approx(0.75, rel=0.02)
    x, tr = run(SensorFault("intermittent", 20.0))
    assert np.abs(x).max() == pytest.approx(20 * STANDARD_GRAVITY_MS2)
    assert len(tr["sensor"][0]["spans"]) >= 3
    with pytest.raises(ValueError, match="dropout"):
        SensorFault("dropout", 2.0)
    with pytest.raises(ValueError, match="kind"):
        SensorFault("melted")


def test_stopped_machine_is_noise_only():
    x, truth = synthesize(SimMachine(), OperatingPoint(False, 0.0), Faults(unbalance_mm_s=5), FS, N, seed=1)
    assert truth["tones"] == [] and truth["speed_hz"] == 0.0
    assert np.std(x) / STANDARD_GRAVITY_MS2 == pytest.approx(SimMachine().noise_g, rel=0.02)


def _wav_bytes(x):
    buf = io.BytesIO()
    wavfile.write(buf, int(FS), x.astype(np.float32))
    return buf.getvalue()


def test_same_seed_gives_byte_identical_wav():
    m = SimMachine(bearings=(BRG,), structure=Resonance(80.0, 0.05, 3.0))
    f = Faults(unbalance_mm_s=1.0, looseness_mm_s=0.5, cavitation_g=0.2,
               bearings=(BearingDefect("pump_de", "outer", 1.0, stage=4),),
               sensor=(SensorFault("intermittent", 5.0),))
    a, ta = synthesize(m, POINT, f, FS, N, seed=(11, 3))
    b, tb = synthesize(m, POINT, f, FS, N, seed=(11, 3))
    c, _ = synthesize(m, POINT, f, FS, N, seed=(11, 4))
    assert _wav_bytes(a) == _wav_bytes(b)
    assert ta == tb
    assert _wav_bytes(a) != _wav_bytes(c)


def test_bad_arguments_are_rejected():
    with pytest.raises(ValueError, match="no bearing named"):
        synthesize(QUIET, POINT, Faults(bearings=(BearingDefect("nope", "outer", 1.0),)), FS, N)
    with pytest.raises(ValueError, match="stage"):
        BearingDefect("pump_de", "outer", 1.0, stage=5)
    with pytest.raises(ValueError, match="fs_hz"):
        synthesize(QUIET, POINT, Faults(), 0.0, N)
    with pytest.raises(ValueError, match="damping"):
        Resonance(100.0, 1.5)


def test_impacts_cover_the_whole_capture_even_with_large_jitter():
    d = BearingDefect("pump_de", "outer", 1.0, stage=1, jitter_frac=0.15)
    for seed in range(5):
        x, truth = synthesize(QUIET, POINT, Faults(bearings=(d,)), FS, N, seed=seed)
        tail = x[-N // 16 :]  # the last 0.16 s holds ~11 impacts at ~70 Hz: never silent
        assert np.abs(tail).max() > 0.3 * STANDARD_GRAVITY_MS2
        expected = truth["bearings"][0]["defect_hz"] * N / FS
        assert truth["bearings"][0]["impacts"] == pytest.approx(expected, rel=0.25)
