"""Peak accounting: one label per peak, refined fundamental, families, floor and humps."""

from __future__ import annotations

import math
from types import SimpleNamespace as Tone

import numpy as np
import pytest
from scipy import signal

from agent.model import Peak
from agent.peaks import (
    CATEGORIES,
    UNEXPLAINED_CLASSES,
    account_peaks,
    find_humps,
    floor_regions,
    refine_fundamental,
)
from agent.spectra import SpectrumPlan, accel_spectrum, find_peaks, velocity_spectrum

BIN_HZ = 0.25


def pk(f_hz: float, amp: float, height_db: float = 30.0) -> Peak:
    return Peak(freq_hz=f_hz, amp=amp, height_db=height_db, bin_idx=int(f_hz / BIN_HZ))


def tones(speed_hz: float, *, vanes: int = 0, line_hz: float | None = 50.0, rotor_bars: int = 0,
          gear_teeth: int = 0, bearing: dict | None = None) -> tuple:
    """Expected tones with the fields of agent.kinematics.ExpectedTone (a test stand-in)."""
    tol = lambda f: max(0.004 * f, 1.5 * BIN_HZ)  # noqa: E731
    out = [Tone(name=f"{h}X", family="shaft", freq_hz=h * speed_hz, order=h, tolerance_hz=tol(h * speed_hz), shaft="")
           for h in range(1, 11)]
    for k in (1, 2, 3) if vanes else ():
        f = k * vanes * speed_hz
        out.append(Tone(name="vane pass" if k == 1 else f"{k}x vane pass", family="vane_pass", freq_hz=f,
                        order=k * vanes, tolerance_hz=tol(f), shaft=""))
    for k in (1, 2, 3) if gear_teeth else ():
        f = k * gear_teeth * speed_hz
        out.append(Tone(name="gear mesh" if k == 1 else f"{k}x gear mesh", family="gear_mesh", freq_hz=f,
                        order=k * gear_teeth, tolerance_hz=tol(f), shaft=""))
    if line_hz:
        out += [Tone(name="LF", family="line", freq_hz=line_hz, order=line_hz / speed_hz, tolerance_hz=0.2, shaft=""),
                Tone(name="2xLF", family="line", freq_hz=2 * line_hz, order=2 * line_hz / speed_hz,
                     tolerance_hz=0.2, shaft="")]
    if rotor_bars:
        r = rotor_bars * speed_hz
        out.append(Tone(name="RBPF", family="rotor_bar", freq_hz=r, order=rotor_bars, tolerance_hz=tol(r), shaft=""))
        for sgn, t in ((-1, "-"), (1, "+")):
            out.append(Tone(name=f"RBPF{t}2xLF", family="rotor_bar", freq_hz=r + sgn * 2 * line_hz,
                            order=(r + sgn * 2 * line_hz) / speed_hz, tolerance_hz=tol(r), shaft=""))
    for name, order in (bearing or {}).items():
        f = order * speed_hz
        out.append(Tone(name=name, family="bearing", freq_hz=f, order=order, tolerance_hz=0.02 * f, shaft=""))
    return tuple(out)


def test_every_peak_gets_exactly_one_label():
    f1 = 24.6
    peaks = [pk(f1, 2.0), pk(2 * f1, 0.8), pk(3 * f1, 0.3), pk(6 * f1, 0.9), pk(100.0, 0.4), pk(137.3, 0.2),
             pk(0.43 * f1, 0.3), pk(28 * f1, 0.02), pk(28 * f1 - 100, 0.01), pk(28 * f1 + 100, 0.01)]
    acc = account_peaks(peaks, f1, tones(f1, vanes=6, rotor_bars=28), bin_width_hz=BIN_HZ)
    assert len(acc.peaks) == len(peaks)
    for p in acc.peaks:
        assert p.category in CATEGORIES and p.label and p.reason
        if p.category == "unexplained":
            assert p.klass in UNEXPLAINED_CLASSES
    labels = {round(p.freq_hz, 2): p.label for p in acc.peaks}
    assert labels[round(f1, 2)] == "1X"
    assert labels[round(2 * f1, 2)] == "2X"
    assert labels[round(6 * f1, 2)] == "vane pass"  # forcing wins over the bare 6X it coincides with
    assert labels[100.0] == "2xLF"
    assert labels[round(28 * f1, 2)] == "RBPF"
    assert labels[round(28 * f1 + 100, 2)] == "RBPF+2xLF"
    cls = {round(p.freq_hz, 2): p.klass for p in acc.peaks if p.category == "unexplained"}
    assert cls[137.3] == "non_synchronous"
    assert cls[round(0.43 * f1, 2)] == "sub_synchronous"


def test_energy_explained_fraction_is_the_share_of_labelled_peak_energy():
    f1 = 24.6
    peaks = [pk(f1, 3.0), pk(2 * f1, 1.0), pk(137.3, 1.0)]
    acc = account_peaks(peaks, f1, tones(f1), bin_width_hz=BIN_HZ)
    # Σ amp² labelled / Σ amp² all = (9 + 1) / 11 (Parseval: energy adds as the square of r.m.s.)
    assert acc.energy_explained_fraction == pytest.approx(10.0 / 11.0, rel=1e-12)


def test_refined_fundamental_lines_up_high_harmonics():
    # true speed 24.6 Hz; the estimate given is 0.3 % off: the least-squares fit over ten harmonics
    # (each measured to ±0.01 Hz) must land within 0.005 Hz, so 10X is placed to 0.05 Hz
    rng = np.random.default_rng(3)
    f1 = 24.6
    peaks = [pk(h * f1 + rng.uniform(-0.01, 0.01), 1.0 / h) for h in range(1, 11)]
    f0, used = refine_fundamental(peaks, f1 * 1.003, BIN_HZ)
    assert used == 10
    assert abs(f0 - f1) < 0.005
    acc = account_peaks(peaks, f1 * 1.003, tones(f1 * 1.003), bin_width_hz=BIN_HZ)
    assert [p.label for p in acc.peaks] == [f"{h}X" for h in range(1, 11)]


def test_twice_line_frequency_is_twice_the_supply_frequency():
    # common practice: "2×LF" is 2 × the supply frequency (100 Hz on 50 Hz, 120 Hz on 60 Hz), not 2X
    for line_hz, speed_hz in ((50.0, 24.6), (60.0, 29.6)):
        acc = account_peaks([pk(speed_hz, 1.0), pk(2 * line_hz, 0.5), pk(2 * speed_hz, 0.3)], speed_hz, (),
                            bin_width_hz=BIN_HZ, line_hz=line_hz)
        lf2 = acc.labelled("2xLF")
        assert lf2 is not None and lf2.freq_hz == pytest.approx(2 * line_hz)
        assert acc.labelled("2X").freq_hz == pytest.approx(2 * speed_hz)


def test_vane_pass_is_an_integer_multiple_of_running_speed():
    # common practice: vane/blade pass = number of vanes × running speed, an integer order
    for vanes, f1 in ((5, 24.6), (7, 29.3), (12, 16.1)):
        acc = account_peaks([pk(f1, 1.0), pk(vanes * f1, 0.8)], f1, tones(f1, vanes=vanes), bin_width_hz=BIN_HZ)
        vp = acc.labelled("vane pass")
        assert vp is not None and vp.category == "forcing"
        assert vp.order == pytest.approx(vanes, abs=1e-6)
        assert vp.order == round(vp.order)


def test_subsynchronous_family_is_found_and_suggested_as_a_belt():
    # common practice: belt rate is below 1X (belt speed π·d·n over belt length L < d·n·π/(π·d) = n)
    f1, belt = 24.6, 0.37 * 24.6
    assert belt < f1
    peaks = [pk(f1, 1.0), pk(belt, 0.6), pk(2 * belt, 1.0), pk(3 * belt, 0.4), pk(4 * belt, 0.25)]
    acc = account_peaks(peaks, f1, tones(f1), bin_width_hz=BIN_HZ)
    fam = [f for f in acc.families if f.kind == "harmonics"]
    assert fam and fam[0].base_hz == pytest.approx(belt)
    assert fam[0].order < 1.0
    assert any("belt" in s for s in acc.suggestions)
    assert acc.labelled("unexplained sub-synchronous") is not None


def test_unknown_synchronous_family_gives_a_suggestion():
    f1 = 24.6
    peaks = [pk(f1, 1.0), pk(2 * f1, 0.2), pk(7 * f1, 1.5), pk(14 * f1, 0.4)]
    acc = account_peaks(peaks, f1, tones(f1), bin_width_hz=BIN_HZ)
    assert any(s.startswith("strong 7X family") and "7-vane impeller or 7-blade fan" in s for s in acc.suggestions)
    # once configured, the same peak is vane pass and no suggestion is made
    acc2 = account_peaks(peaks, f1, tones(f1, vanes=7), bin_width_hz=BIN_HZ)
    assert acc2.labelled("vane pass") is not None
    assert not any("7X" in s for s in acc2.suggestions)


def test_inner_race_sidebands_are_spaced_at_1x():
    # common practice: an inner-race defect is modulated once per turn → sidebands at BPFI ± 1X
    f1, bpfi = 24.6, 5.4152  # CWRU 6205 BPFI order (REFERENCES §3)
    fi = bpfi * f1
    peaks = [pk(f1, 1.0), pk(fi, 0.3), pk(fi - f1, 0.1), pk(fi + f1, 0.12)]
    acc = account_peaks(peaks, f1, tones(f1, bearing={"BPFI": bpfi}), bin_width_hz=BIN_HZ)
    assert acc.labelled("BPFI").category == "bearing"
    lo, hi = acc.labelled("BPFI-X"), acc.labelled("BPFI+X")
    assert lo is not None and hi is not None and lo.category == hi.category == "sideband"
    assert hi.freq_hz - acc.labelled("BPFI").freq_hz == pytest.approx(f1, abs=2 * BIN_HZ)


def test_gear_mesh_sidebands_and_intermodulation():
    f1, z = 24.6, 23
    gm = z * f1
    peaks = [pk(f1, 1.0), pk(100.0, 0.5), pk(gm, 1.2), pk(gm + f1, 0.3), pk(gm - f1, 0.25), pk(gm + 100.0, 0.05)]
    acc = account_peaks(peaks, f1, tones(f1, gear_teeth=z), bin_width_hz=BIN_HZ)
    assert acc.labelled("gear mesh").category == "forcing"
    assert acc.labelled("gear mesh+X").category == "sideband"
    im = [p for p in acc.peaks if p.category == "intermod"]
    assert len(im) == 1 and im[0].freq_hz == pytest.approx(gm + 100.0)


def test_intermodulation_is_weaker_than_its_parents():
    f1 = 24.6
    # a strong peak at LF − 1X cannot be the product of a weak LF: it stays unexplained
    peaks = [pk(f1, 1.0), pk(50.0, 0.05), pk(50.0 - f1, 0.7)]
    acc = account_peaks(peaks, f1, tones(f1), bin_width_hz=BIN_HZ)
    assert [p.category for p in acc.peaks if p.freq_hz == pytest.approx(50 - f1)] == ["unexplained"]


def test_not_running_everything_is_unexplained_or_line():
    acc = account_peaks([pk(100.0, 0.3), pk(333.3, 0.1)], None, (), bin_width_hz=BIN_HZ, line_hz=50.0)
    assert acc.speed_hz is None
    assert [p.category for p in acc.peaks] == ["line", "unexplained"]


def _resonant_noise(fs_hz: float, n: int, f_n: float, zeta: float, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(n)
    # a second-order resonance (bilinear transform of ω²/(s² + 2ζω s + ω²)) adds a hump at f_n
    b, a = signal.bilinear([(2 * np.pi * f_n) ** 2], [1, 2 * zeta * 2 * np.pi * f_n, (2 * np.pi * f_n) ** 2], fs_hz)
    return x + 3.0 * signal.lfilter(b, a, x)


def test_hump_found_at_a_resonance_and_not_on_white_noise():
    fs, n = 4096.0, 1 << 16
    plan = SpectrumPlan.build(fs, n, lines=1024)
    res = accel_spectrum(_resonant_noise(fs, n, 300.0, 0.04), plan)
    humps = find_humps(res)
    assert len(humps) == 1
    h = humps[0]
    assert h.center_hz == pytest.approx(300.0, rel=0.05)
    # Q = 1/(2ζ) = 12.5 for the half-power width; our half-height width makes it broader, same order
    assert 3.0 < h.q < 30.0
    assert "amplified" in h.caution
    white = accel_spectrum(np.random.default_rng(1).standard_normal(n), plan)
    assert find_humps(white) == ()


def test_peaks_on_a_hump_are_marked():
    fs, n = 4096.0, 1 << 16
    t = np.arange(n) / fs
    x = _resonant_noise(fs, n, 300.0, 0.04) + 2.0 * np.sin(2 * np.pi * 297.0 * t)
    plan = SpectrumPlan.build(fs, n, lines=8192)
    spec = accel_spectrum(x, plan)
    peaks = find_peaks(spec, fmin_hz=20.0)
    acc = account_peaks(peaks, 29.7, tones(29.7, line_hz=None), unit="m/s2", spectrum=spec,
                        hump_spectrum=accel_spectrum(x, SpectrumPlan.build(fs, n, lines=1024)))
    ten = acc.labelled("10X")
    assert ten is not None and ten.on_hump


def test_floor_regions_compare_with_baseline():
    fs, n = 25600.0, 1 << 16
    x = np.random.default_rng(2).standard_normal(n) * 0.1
    spec = accel_spectrum(x, SpectrumPlan.build(fs, n, lines=4096))
    base = {r.name: r.level for r in floor_regions(spec, 24.6)}
    louder = accel_spectrum(2.0 * x, SpectrumPlan.build(fs, n, lines=4096))
    regions = floor_regions(louder, 24.6, baseline=base)
    names = [r.name for r in regions]
    assert names[:3] == ["sub-synchronous", "1X-10X", "10X-1kHz"]
    assert any("kHz" in r for r in names[3:])
    for r in regions:  # twice the amplitude is +6.02 dB (20·log10 2), whatever the region
        assert r.delta_db == pytest.approx(20 * math.log10(2.0), abs=0.01)


def test_velocity_peaks_from_a_real_spectrum_are_labelled():
    """End to end on a synthetic waveform: 1X…3X, vane pass and twice line frequency."""
    fs, n = 12800.0, 1 << 16
    t = np.arange(n) / fs
    f1 = 24.37
    x = np.zeros(n)
    for f, v in ((f1, 2.0), (2 * f1, 0.6), (3 * f1, 0.3), (6 * f1, 0.8), (100.0, 0.4)):
        x += np.sqrt(2) * v * 1e-3 * 2 * np.pi * f * np.sin(2 * np.pi * f * t)
    x += np.random.default_rng(5).normal(0, 0.01, n)
    plan = SpectrumPlan.build(fs, n, lines=8192)
    vel = velocity_spectrum(accel_spectrum(x, plan), 5.0)
    peaks = find_peaks(vel, fmin_hz=5.0, fmax_hz=1000.0)
    acc = account_peaks(peaks, f1 * 0.998, tones(f1 * 0.998, vanes=6), bin_width_hz=plan.bin_width_hz)
    assert acc.speed_hz == pytest.approx(f1, abs=0.01)
    got = {p.label: p.amp for p in acc.peaks}
    for label, v in (("1X", 2.0), ("2X", 0.6), ("3X", 0.3), ("vane pass", 0.8), ("2xLF", 0.4)):
        assert got[label] == pytest.approx(v, rel=0.05)
