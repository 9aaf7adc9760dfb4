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
