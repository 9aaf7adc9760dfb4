"""Fault rules and advice on hand-built spectra (each rule with the pattern it looks for)."""

from __future__ import annotations

import numpy as np
import pytest

from agent.advice import advise, severity_of
from agent.diagnose import (
    CODES,
    HIGH_CONFIDENCE,
    RULES,
    DiagnosisInput,
    PhaseReading,
    cross_phase_deg,
    diagnose,
)
from agent.model import Finding, Severity
from agent.peaks import account_peaks
from tests.test_peaks import BIN_HZ, pk, tones

F1 = 24.6


def ctx_of(peaks, *, expected=None, vel=None, **kw) -> DiagnosisInput:
    acc = account_peaks(peaks, F1, tones(F1, vanes=6) if expected is None else expected, bin_width_hz=BIN_HZ)
    v = vel if vel is not None else float(np.sqrt(sum(p.amp**2 for p in peaks)))
    return DiagnosisInput(accounted=acc, vel_rms_mm_s=v, **kw)


def codes(findings) -> list[str]:
    return [f.code for f in findings]


def test_rules_are_small_functions_with_stable_codes():
    assert len(RULES) >= 13 and all(callable(r) for r in RULES)
    assert len(set(CODES)) == len(CODES)
    for c in ("unbalance", "misalignment", "looseness", "bent_shaft", "electrical_2xlf", "rotor_bar", "vane_pass",
              "cavitation", "belt", "gear_mesh", "subsync_instability", "resonance", "bearing_outer_race"):
        assert c in CODES


def test_healthy_spectrum_gives_no_high_confidence_finding():
    f = diagnose(ctx_of([pk(F1, 0.8), pk(6 * F1, 0.5), pk(100.0, 0.3), pk(2 * F1, 0.1)]))
    assert all(x.confidence < HIGH_CONFIDENCE for x in f)


def test_unbalance_1x_dominant_and_phase():
    peaks = [pk(F1, 4.0), pk(2 * F1, 0.3), pk(6 * F1, 0.5)]
    f = diagnose(ctx_of(peaks))
    assert f[0].code == "unbalance" and f[0].confidence >= HIGH_CONFIDENCE
    assert "confirm with phase" in f[0].title
    assert any("phase" in c for c in f[0].confirm)
    # common practice: radial H-V phase near 90° supports unbalance; near 0° argues against it
    at90 = diagnose(ctx_of(peaks, phase=(PhaseReading(1.0, 88.0, "radial_pair"),)))[0]
    at0 = [x for x in diagnose(ctx_of(peaks, phase=(PhaseReading(1.0, 3.0, "radial_pair"),)))
           if x.code == "unbalance"][0]
    assert at90.confidence >= f[0].confidence > at0.confidence


def test_misalignment_2x_3x_high_and_phase_across_coupling():
    peaks = [pk(F1, 1.2), pk(2 * F1, 3.0), pk(3 * F1, 1.3)]
    f = diagnose(ctx_of(peaks))
    assert f[0].code == "misalignment"
    base = f[0].confidence
    # common practice: about 180° across the coupling supports misalignment
    f180 = diagnose(ctx_of(peaks, phase=(PhaseReading(2.0, 178.0, "across_coupling"),)))
    f0 = diagnose(ctx_of(peaks, phase=(PhaseReading(2.0, 5.0, "across_coupling"),)))
    mis = lambda fs: [x for x in fs if x.code == "misalignment"][0].confidence  # noqa: E731
    assert mis(f180) >= base > mis(f0)


def test_bent_shaft_reported_as_1x_family():
    f = diagnose(ctx_of([pk(F1, 3.0), pk(2 * F1, 1.6)]))
    assert f[0].code == "bent_shaft" and "1X family" in f[0].title and "confirm with phase" in f[0].title


def test_looseness_long_family_and_half_orders():
    peaks = [pk(h * F1, 2.0 * 0.85**h) for h in range(1, 11)] + [pk((h + 0.5) * F1, 0.4) for h in range(0, 5)]
    f = diagnose(ctx_of(peaks))
    assert f[0].code == "looseness" and f[0].confidence >= HIGH_CONFIDENCE


def test_electrical_twice_line_frequency():
    f = diagnose(ctx_of([pk(F1, 0.8), pk(100.0, 2.5)]))
    assert f[0].code == "electrical_2xlf"
    assert "2 × 50 Hz" in f[0].title  # 2×LF is twice the supply frequency (common practice)


def test_rotor_bar_pass_with_2xlf_sidebands():
    rb = 28 * F1
    to_mm_s = lambda g: g * 9.80665 / (2 * np.pi * rb) * 1e3  # noqa: E731  g → mm/s at RBPF
    peaks = [pk(F1, 0.8), pk(rb, to_mm_s(0.12)), pk(rb - 100, to_mm_s(0.09)), pk(rb + 100, to_mm_s(0.08))]
    f = diagnose(ctx_of(peaks, expected=tones(F1, rotor_bars=28)))
    assert f[0].code == "rotor_bar"


def test_pole_pass_sidebands_around_1x():
    from types import SimpleNamespace as T

    fp = 4 * (25.0 - F1)  # pole pass = poles × slip frequency (4-pole, 50 Hz)
    exp = tones(F1) + tuple(T(name=f"1X{s}pole pass", family="pole_pass", freq_hz=F1 + g * fp, order=(F1 + g * fp) / F1,
                              tolerance_hz=0.1, shaft="") for s, g in (("-", -1), ("+", 1)))
    peaks = [pk(F1, 2.0), pk(F1 - fp, 0.02), pk(F1 + fp, 0.02)]  # 40 dB below 1X
    f = [x for x in diagnose(ctx_of(peaks, expected=exp)) if x.code == "rotor_bar"]
    assert f and f[0].confidence > 0.2


def test_vane_pass_high():
    f = diagnose(ctx_of([pk(F1, 0.8), pk(6 * F1, 3.0), pk(12 * F1, 0.8)]))
    assert f[0].code == "vane_pass" and f[0].component == "pump"


def test_belt_subsynchronous_family():
    b = 0.37 * F1
    f = diagnose(ctx_of([pk(F1, 0.8), pk(b, 1.0), pk(2 * b, 1.8), pk(3 * b, 0.7), pk(4 * b, 0.4)]))
    assert f[0].code == "belt"


def test_gear_mesh_with_sidebands():
    gm = 23 * F1
    peaks = [pk(F1, 0.8), pk(gm, 2.5), pk(gm - F1, 0.8), pk(gm + F1, 0.9), pk(gm + 2 * F1, 0.3)]
    f = diagnose(ctx_of(peaks, expected=tones(F1, gear_teeth=23)))
    assert f[0].code == "gear_mesh"


def test_subsync_instability_only_credible_with_sleeve_bearings():
    # common practice: oil whirl at 0.38-0.48X in fluid-film (sleeve) bearings
    peaks = [pk(F1, 1.0), pk(0.44 * F1, 2.0)]
    sleeve = [x for x in diagnose(ctx_of(peaks, sleeve_bearings=True)) if x.code == "subsync_instability"]
    rolling = [x for x in diagnose(ctx_of(peaks)) if x.code == "subsync_instability"]
    assert sleeve and sleeve[0].confidence >= HIGH_CONFIDENCE
    assert rolling and rolling[0].confidence < 0.4


def test_bearing_findings_pass_through_and_are_not_outranked():
    bf = Finding(code="bearing_inner_race", confidence=0.93, stage=3, component="pump DE",
                 title="pump DE: inner race defect", extra={"called": True})
    peaks = [pk(F1, 2.2), pk(2 * F1, 0.3)]
    f = diagnose(ctx_of(peaks, bearing_findings=(bf,)))
    assert f[0].code == "bearing_inner_race" and f[0].stage == 3


def test_speed_doubt_lowers_shaft_findings():
    peaks = [pk(F1, 4.0)]
    sure = diagnose(ctx_of(peaks))[0].confidence
    unsure = diagnose(ctx_of(peaks, speed_confidence=0.1))[0].confidence
    assert unsure < sure


def test_cross_phase_of_two_channels():
    fs, n = 2048.0, 1 << 14
    t = np.arange(n) / fs
    rng = np.random.default_rng(0)
    x = np.sin(2 * np.pi * F1 * t) + 0.05 * rng.standard_normal(n)
    y = np.sin(2 * np.pi * F1 * t + np.pi / 2) + 0.05 * rng.standard_normal(n)
    ph, coh = cross_phase_deg(x, y, fs, F1)
    # y leads x by 90°; scipy's csd is conj(X)·Y, so the angle is +90° (numpy/scipy sign convention)
    assert ph == pytest.approx(90.0, abs=3.0) and coh > 0.9
    with pytest.raises(ValueError):
        cross_phase_deg(x, y[:-1], fs, F1)


# ───────────────────────────── advice ─────────────────────────────


def test_advice_severity_urgency_and_safety():
    from agent.cli import SAFETY_NOTE

    stage4 = Finding(code="bearing_outer_race", confidence=0.9, stage=4)
    hi = Finding(code="unbalance", confidence=0.9, extra={"level_mm_s": 5.0})  # zone D level, group 2 rigid
    mid = Finding(code="misalignment", confidence=0.8, extra={"level_mm_s": 3.0})  # zone C
    guess = Finding(code="looseness", confidence=0.2, extra={"level_mm_s": 5.0})
    out = {f.code: f for f in advise([stage4, hi, mid, guess], vel_rms_mm_s=5.2)}
    assert (out["bearing_outer_race"].severity, out["bearing_outer_race"].urgency) == (Severity.DANGER, "act_now")
    assert (out["unbalance"].severity, out["unbalance"].urgency) == (Severity.DANGER, "act_now")
    assert (out["misalignment"].severity, out["misalignment"].urgency) == (Severity.ALERT, "within_days")
    assert out["looseness"].severity <= Severity.WATCH  # a guess never raises an alarm
    for f in out.values():
        assert f.action and f.extra["why"] and f.extra["safety"] == SAFETY_NOTE
        assert f.urgency in ("act_now", "within_days", "plan", "watch")


def test_advice_baseline_ratio():
    f = Finding(code="unbalance", confidence=0.9, extra={"level_mm_s": 1.0})  # zone A level
    sev, why = severity_of(f, baseline_ratio=2.6, alert_ratio=2.0, danger_ratio=4.0)
    assert sev == Severity.ALERT and any("normal level" in w for w in why)
    sev, _ = severity_of(f, baseline_ratio=4.5, alert_ratio=2.0, danger_ratio=4.0)
    assert sev == Severity.DANGER
    low = advise([f])[0]
    assert low.urgency == "watch" and low.action.startswith("Keep watching")


def test_baseline_ratio_replaces_the_iso_level():
    # 1X at 1.0 mm/s is below the zone A/B boundary (1.4 mm/s): no credible unbalance on its own…
    peaks = [pk(F1, 1.0), pk(2 * F1, 0.05)]
    alone = [x for x in diagnose(ctx_of(peaks)) if x.code == "unbalance"]
    assert not alone or alone[0].confidence < 0.4
    # …but three times this machine's normal 1X is (ratio practice: alert ≈ 2× baseline, common practice)
    grown = [x for x in diagnose(ctx_of(peaks, baseline_ratios={"order_1x_mm_s": 3.0})) if x.code == "unbalance"]
    assert grown and grown[0].confidence >= HIGH_CONFIDENCE
    assert any(e.get("metric") == "1X / baseline" for e in grown[0].evidence)


def test_floor_excess_grades_a_floor_finding_not_the_overall_velocity():
    # a cavitation floor is graded on how far it stands beyond the rule's sure level (×4 = +12 dB → alert),
    # not on the overall velocity (zone A here), which lies below the floor's band
    def cav(excess_db, conf=0.6):
        return Finding(code="cavitation", confidence=conf, extra={"floor_excess_db": excess_db})

    assert severity_of(cav(-3.0), vel_rms_mm_s=1.0)[0] == Severity.INFO
    assert severity_of(cav(4.0), vel_rms_mm_s=1.0)[0] == Severity.WATCH
    sev, why = severity_of(cav(15.0), vel_rms_mm_s=1.0)
    assert sev == Severity.ALERT and any("+15.0 dB" in w for w in why)
    assert severity_of(cav(15.0, conf=0.3), vel_rms_mm_s=1.0)[0] <= Severity.WATCH  # a guess stays a guess
    out = advise([cav(4.0)], vel_rms_mm_s=1.0)[0]
    assert out.urgency == "plan" and "high-frequency floor stands +4.0 dB" in out.extra["why"]


def test_cavitation_that_lasts_is_raised_to_alert():
    from agent.advice import PERSISTENCE, persisting

    hold_s = PERSISTENCE["cavitation"][0]
    cav = advise([Finding(code="cavitation", confidence=0.6, extra={"floor_excess_db": 4.0})], vel_rms_mm_s=1.0)[0]
    assert cav.severity == Severity.WATCH
    spells, sev = (), []
    # captures every 2 h: shown, shown, missed once, shown (6 h after the first), shown, missed twice, shown
    pattern = [True, True, False, True, True, False, False, True]
    for i, shown in enumerate(pattern):
        t = 1e9 + 7200.0 * i
        out, spells = persisting((cav,) if shown else (), {"cavitation"} if shown else set(), spells, t)
        sev.append(out[0].severity if out else None)
    W, A = Severity.WATCH, Severity.ALERT
    assert hold_s == 6 * 3600.0
    assert sev == [W, W, None, A, A, None, None, W]  # one miss keeps the clock; two restart it
    out, _ = persisting((cav,), {"cavitation"}, (("cavitation", 1e9, 0),), 1e9 + hold_s)
    assert out[0].urgency == "within_days" and "shown for 6.0 h without a break" in out[0].extra["why"]
    # other findings are left alone
    other = Finding(code="unbalance", confidence=0.9, severity=Severity.WATCH)
    assert persisting((other,), {"unbalance"}, (), 1e9) == ((other,), ())


def test_captures_without_judgement_break_a_spell():
    """Bad or missing data is not 'shown without a break': two such captures end the spell."""
    from agent.monitor import MonitorState, source_problem_step

    ms = MonitorState(finding_spells=(("cavitation", 1e9, 0),))
    _, ms1 = source_problem_step(ms, 1e9 + 60.0, "sensor unplugged")
    assert ms1.finding_spells == (("cavitation", 1e9, 1),)  # one miss keeps the clock
    _, ms2 = source_problem_step(ms1, 1e9 + 120.0, "sensor unplugged")
    assert ms2.finding_spells == ()
