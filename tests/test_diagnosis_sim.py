"""The diagnosis on the machine simulator: generated faults alone and in pairs, and `skidvib analyze`.

The full sweep (20 seeds per class and pair) is ``replay/diagnosis_validation.py``,
which writes ``docs/diagnosis-validation.md``; here a few seeds per class keep the
suite fast.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from agent.diagnose import HIGH_CONFIDENCE

ROOT = Path(__file__).resolve().parents[1]

sim = pytest.importorskip("agent.simulator", reason="the machine simulator is not in this tree yet")

from agent.model import Capture  # noqa: E402
from agent.pipeline import analyse_capture  # noqa: E402
from replay.diagnosis_cases import CASE_CONFIG, CLASSES, FS_HZ, PAIRS, make_case  # noqa: E402


def _findings(classes, seed):
    case = make_case(classes, seed)
    return analyse_capture(Capture(case.accel_ms2, FS_HZ), CASE_CONFIG).findings


@pytest.mark.parametrize("kind", [c for c in CLASSES if c != "healthy"])
@pytest.mark.parametrize("seed", [11, 12])
def test_simulated_fault_gives_right_top_finding(kind, seed):
    f = _findings(kind, seed)
    assert f and f[0].code == kind, [(x.code, x.confidence) for x in f]


@pytest.mark.parametrize("seed", range(21, 27))
def test_simulated_healthy_machine_gives_no_high_confidence_finding(seed):
    f = _findings("healthy", seed)
    assert all(x.confidence < HIGH_CONFIDENCE for x in f), [(x.code, x.confidence) for x in f]


@pytest.mark.parametrize("pair", PAIRS)
def test_simulated_fault_pairs_both_reported(pair):
    got = [x.code for x in _findings(pair, 31)]
    assert got[0] in pair and set(pair) <= set(got), got


# ───────────────────────────── command line ─────────────────────────────


def test_analyze_prints_accounted_table_and_findings(tmp_path):
    from agent.recordings import write_wav_with_sidecar

    case = make_case("misalignment", 5)
    p = tmp_path / "mis.wav"
    write_wav_with_sidecar(p, case.accel_ms2, FS_HZ, {"channel": "pump DE horizontal"})
    cfg = tmp_path / "skid.toml"
    cfg.write_text('[source]\nfs_hz = 25600.0\ncapture_s = 2.56\n[machine]\nspeed_rpm = [600.0, 1800.0]\n'
                   'line_hz = 50.0\npoles = 4\nrotor_bars = 28\nvanes = 6\n', encoding="utf-8")
    res = subprocess.run([sys.executable, "-m", "agent", "analyze", str(p), "-c", str(cfg), "--json"],
                         capture_output=True, text=True, cwd=ROOT)
    assert res.returncode == 0, res.stderr
    doc = json.loads(res.stdout)
    acc = doc["accounted"]
    assert acc["peaks"] and all(pk_["label"] and pk_["reason"] for pk_ in acc["peaks"])
    assert {"1X", "2X", "3X", "vane pass", "2xLF"} <= {pk_["label"] for pk_ in acc["peaks"]}
    top = doc["findings"][0]
    assert top["code"] == "misalignment" and top["urgency"] in ("act_now", "within_days", "plan", "watch")
    assert top["action"] and top["why"]
    human = subprocess.run([sys.executable, "-m", "agent", "analyze", str(p), "-c", str(cfg)],
                           capture_output=True, text=True, cwd=ROOT)
    assert human.returncode == 0, human.stderr
    out = human.stdout
    assert "Accounted peaks" in out and "vane pass" in out and "misalignment" in out
    assert "do:" in out and "when:" in out and "lockout/tagout" in out


# ───────────────────────────── cavitation beside a bearing defect ─────────────────────────────


def _demo_skid_capture(faults, seed, speed_hz=24.6):
    """One 2.56 s capture of the demo skid (replay/scenarios/demo.toml machine) through the pipeline.

    The previous capture's speed is passed, as the monitor does while the machine runs steadily.
    """
    from agent.config import load_config
    from agent.simulator import OperatingPoint, Resonance, SimBearing, SimMachine, synthesize
    from agent.speed import SpeedEstimate

    cfg = load_config(ROOT / "config" / "demo-skid.toml")
    machine = SimMachine(bearings=(SimBearing("pump drive end", 9, 22.225, 80.0),
                                   SimBearing("motor drive end", 8, 17.46, 72.5)),
                         vane_pass_mm_s=(0.45, 0.15), line_mm_s=(0.03, 0.25), floor_mm_s=0.08, noise_g=0.003,
                         structure=Resonance(160.0, 0.05, 3.0))
    x, _ = synthesize(machine, OperatingPoint(speed_hz=speed_hz, line_hz=2 * speed_hz / 0.987), faults, 25600.0,
                      65536, seed=seed)
    previous = SpeedEstimate(speed_hz=speed_hz, confidence=1.0, found=True)
    return {f.code: f for f in analyse_capture(Capture(x, 25600.0), cfg, previous_speed=previous).findings}


def _outer(stage, impulse_g):
    from agent.simulator import BearingDefect

    tone = {1: 0.0, 2: 0.3, 3: 0.7, 4: 1.6}[stage]
    return BearingDefect("pump drive end", "outer", impulse_g, stage=stage, tone_mm_s=tone, slip_frac=0.012)


@pytest.mark.parametrize("seed", [1, 2])
def test_cavitation_beside_a_called_bearing_defect_is_reported_and_graded(seed):
    from agent.model import Severity
    from agent.simulator import Faults

    # the demo's episode: cavitation (0.4-0.9 g in 1-10 kHz) while the pump DE outer race is at stage 2
    strong = _demo_skid_capture(Faults(cavitation_g=0.5, bearings=(_outer(2, 0.7),)), seed)
    assert strong["bearing_outer_race"].extra["called"]
    cav = strong["cavitation"]
    assert cav.confidence >= 0.5 and cav.severity == Severity.ALERT and cav.urgency == "within_days"
    assert cav.extra["floor_excess_db"] >= 12.0 and "high-frequency floor stands" in cav.extra["why"]
    # weaker cavitation, no bearing defect: shown, graded watch (plan)
    mild = _demo_skid_capture(Faults(cavitation_g=0.12), seed)["cavitation"]
    assert mild.confidence >= 0.5 and mild.severity == Severity.WATCH and 0.0 <= mild.extra["floor_excess_db"] < 12.0


@pytest.mark.parametrize("stage,impulse_g", [(1, 0.25), (2, 0.7), (3, 1.6), (4, 3.0)])
def test_a_bearing_defect_alone_is_not_taken_for_cavitation(stage, impulse_g):
    from agent.simulator import Faults

    found = _demo_skid_capture(Faults(bearings=(_outer(stage, impulse_g),)), 3)
    assert found["bearing_outer_race"].extra["called"]
    cav = found.get("cavitation")
    # its ringing lifts one octave (stage 1-3) or, at stage 4, a floor less even than cavitation's
    assert cav is None or cav.confidence < 0.5, cav


@pytest.mark.parametrize("seed", [4, 5])
def test_healthy_demo_skid_shows_no_cavitation(seed):
    from agent.simulator import Faults

    assert "cavitation" not in _demo_skid_capture(Faults(), seed)


def test_bearing_stage_four_when_the_high_frequency_floor_rises_broadly():
    """Common practice: in the last stage the damage spreads and the floor rises across the
    high-frequency octaves, not only where the impacts ring a resonance (stages 1-3)."""
    from agent.config import load_config
    from agent.model import Capture
    from agent.pipeline import analyse_capture

    from tests.test_speed import _pump_with_outer_race_defect

    cfg = load_config(Path(__file__).resolve().parents[1] / "config/demo-skid.toml")
    stages = {}
    for stage in (3, 4):
        x, _ = _pump_with_outer_race_defect(1478, stage, 0.9 if stage == 3 else 1.6, seed=3)
        a = analyse_capture(Capture(x, 25600.0, t0_utc_s=1.8e9, channel="pump DE", source_id="t", seq=0), cfg)
        found = [f for f in a.findings if f.code == "bearing_outer_race"]
        assert found, [f.code for f in a.findings]
        stages[stage] = found[0]
    assert stages[3].stage == 3
    assert stages[4].stage == 4 and stages[4].title.endswith("stage 4")
    assert stages[4].severity.name == "DANGER"  # agent.advice: stage 4 → danger
    assert any("median octave ÷ highest" in e.get("metric", "") for e in stages[4].evidence)


def test_floor_stage_rule_on_floor_regions():
    from agent.bearings import STAGE4_DENSITY_G_RTHZ, with_floor_stage
    from agent.model import STANDARD_GRAVITY_MS2, Finding
    from agent.peaks import FloorRegion

    def regions(dens_g):  # octaves from 1 kHz, levels from densities in g/√Hz
        out, lo = [], 1000.0
        for d in dens_g:
            out.append(FloorRegion(f"{lo:.0f} Hz", lo, 2 * lo, d * STANDARD_GRAVITY_MS2 * (lo ** 0.5), "m/s2"))
            lo *= 2
        return tuple(out)

    called = Finding(code="bearing_outer_race", confidence=0.9, stage=3, title="x, stage 3",
                     extra={"called": True, "bearing": "b", "defect": "outer", "fundamental": 79.1, "order": 3.21})
    hi = 4 * STAGE4_DENSITY_G_RTHZ
    assert with_floor_stage((called,), regions([hi, 0.7 * hi, 0.7 * hi, 0.6 * hi]))[0].stage == 4  # raised broadly
    assert with_floor_stage((called,), regions([hi, hi, 0.95 * hi, hi]))[0].stage == 3  # evenly: flow noise
    assert with_floor_stage((called,), regions([hi, 0.2 * hi, 0.2 * hi, 0.2 * hi]))[0].stage == 3  # one band rings
    low = 0.5 * STAGE4_DENSITY_G_RTHZ
    assert with_floor_stage((called,), regions([low] * 4))[0].stage == 3  # flat but not raised
    guess = Finding(code="bearing_outer_race", confidence=0.4, stage=3, extra={**called.extra, "called": False})
    assert with_floor_stage((guess,), regions([hi] * 4))[0].stage == 3  # a guess is not staged further
    assert with_floor_stage((called,), regions([hi] * 2)) == (called,)  # too few octaves to judge
