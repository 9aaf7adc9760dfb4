"""Replay: source, command, same results as the live simulator source, and the demo."""

from __future__ import annotations

import io
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from agent.config import load_config
from agent.errors import SourceUnavailable
from agent.replay_cmd import run_replay, summary_lines
from agent.scenario import load_scenario
from agent.simulate_cmd import simulate
from agent.sources import EndOfSource, source_class
from agent.sources.replay import ReplaySource
from agent.sources.synthetic import SyntheticSource

from tests.test_scenario import SMALL

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    d = tmp_path_factory.mktemp("small")
    path = d / "small.toml"
    path.write_text(SMALL, encoding="utf-8")
    scen = load_scenario(path)
    simulate(scen, d / "rec")
    return scen, path, d / "rec"


def run_cli(*args):
    r = subprocess.run([sys.executable, "-m", "agent", *map(str, args)], capture_output=True, text=True, cwd=ROOT)
    return r


def test_replay_source_plays_folder_in_time_order(small):
    scen, _, rec = small
    assert source_class("replay") is ReplaySource
    src = ReplaySource([rec])
    src.open()
    assert len(src) == scen.n_captures
    t0s = []
    while True:
        try:
            (cap,) = src.read(1.0)
        except EndOfSource:
            break
        t0s.append(cap.t0_utc_s)
        assert cap.source_id == "replay" and cap.full_scale_ms2 == pytest.approx(50 * 9.80665)
        assert src.last_meta["ground_truth"]["index"] == cap.seq
    assert t0s == [scen.start_utc_s + t for t in scen.capture_times_s]


def test_replay_source_skips_bad_files_and_paces_on_the_injected_clock(small, tmp_path):
    _, _, rec = small
    files = sorted(rec.glob("*.wav"))[:3]
    bad = tmp_path / "broken.wav"
    bad.write_bytes(b"RIFF0000WAVEjunk")
    now = [100.0]
    waits = []

    def sleep(s):
        waits.append(round(s, 6))
        now[0] += s

    src = ReplaySource([files[0], bad, files[1], files[2]], speed=3600.0, monotonic=lambda: now[0], sleep=sleep)
    src.open()
    caps = [src.read(1.0)[0] for _ in range(3)]
    with pytest.raises(EndOfSource):
        src.read(1.0)
    assert [c.seq for c in caps] == [0, 1, 2]
    assert src.skipped and src.skipped[0][0] == str(bad)
    # captures 2 h apart at 3600× real time: 2 s waits on the injected clock
    assert waits == [2.0, 2.0]
    with pytest.raises(SourceUnavailable, match="no such file"):
        ReplaySource([tmp_path / "nothing-here"]).open()


def test_replay_of_recordings_equals_the_live_simulator_path(small):
    """The same scenario through the simulator source and through its recordings: same views."""
    scen, _, rec = small
    cfg = load_config(rec / "agent.toml")
    live = run_replay(SyntheticSource(scen).__enter__(), cfg)
    played = ReplaySource([rec])
    played.open()
    rep = run_replay(played, cfg)
    a = [s.to_json() | {"file": ""} for s in live.steps]
    b = [s.to_json() | {"file": ""} for s in rep.steps]
    assert json.dumps(a) == json.dumps(b)  # byte for byte (null levels of sensor-fault captures included)
    assert live.changes == rep.changes
    assert any(c["kind"] == "state" for c in rep.changes)


def test_replay_command_is_deterministic_and_prints_a_summary(small):
    _, _, rec = small
    r1 = run_cli("replay", rec, "--json")
    r2 = run_cli("replay", rec, "--json")
    assert r1.returncode == 0, r1.stderr
    assert r1.stdout == r2.stdout
    lines = [json.loads(x) for x in r1.stdout.splitlines()]
    assert len(lines) == 8 + 1 and "summary" in lines[-1]
    assert lines[0]["t0_utc"] == "2026-01-05T00:00:00Z" and lines[0]["zone"] in "ABCD"
    human = run_cli("replay", rec, "-c", rec / "agent.toml")
    assert human.returncode == 0, human.stderr
    assert "Replayed 8 captures" in human.stdout
    assert "Scenario events vs what the agent showed" in human.stdout
    assert "inner defect on bearing 'b1' begins" in human.stdout
    bad = run_cli("replay", rec / "nope")
    assert bad.returncode == 3 and "no such file" in bad.stderr


def test_replay_summary_reports_speed_factors():
    from agent.replay_cmd import ReplayResult, StepView

    res = ReplayResult(steps=[StepView(i, 1000.0 + 3600 * i, "", "zone A", "", 1.0, "A", 3.0, 3.0, None)
                              for i in range(4)], wall_s=2.0, signal_s=4 * 2.56)
    text = "\n".join(summary_lines(res))
    assert "5x real time of the signals" in text  # 10.24 s of samples in 2 s
    assert "zone A 4" in text


def test_demo_runs_on_a_small_scenario(small, tmp_path):
    from agent.demo import run_demo

    _, path, _ = small
    buf = io.StringIO()
    assert run_demo(tmp_path / "out", scenario=str(path), stream=buf, live=False, jobs=1) == 0
    text = buf.getvalue()
    assert "Replaying 8 captures" in text and "Outputs:" in text
    assert (tmp_path / "out" / "replay.log").read_text().count("Replayed 8 captures") == 1
    assert len((tmp_path / "out" / "replay.jsonl").read_text().splitlines()) == 8
    # a report per state change and a final one, each naming the state it was written for
    steps = [json.loads(x) for x in (tmp_path / "out" / "replay.jsonl").read_text().splitlines()]
    changes = sum(1 for i, st in enumerate(steps) if i == 0 or st["state"] != steps[i - 1]["state"])
    reports = sorted((tmp_path / "out" / "reports").glob("*.html"))
    final = [r for r in reports if r.name.endswith("-final.html")]
    assert len(reports) == changes + 1 and len(final) == 1
    assert "<span class='state" in final[0].read_text() and steps[-1]["state"] in final[0].read_text()
    buf2 = io.StringIO()
    run_demo(tmp_path / "out", scenario=str(path), stream=buf2, live=True, jobs=1)
    assert "Reusing the recordings" in buf2.getvalue()
    assert "\r[" in buf2.getvalue()  # the live status line


def test_simulate_via_main_cli(tmp_path, small):
    _, path, _ = small
    r = run_cli("simulate", path, "-o", tmp_path / "o", "--limit", "1", "-j", "1")
    assert r.returncode == 0, r.stderr
    assert len(list((tmp_path / "o").glob("*.wav"))) == 1
    r = run_cli("simulate", tmp_path / "missing.toml", "-o", tmp_path / "o")
    assert r.returncode == 2 and "no such scenario file" in r.stderr


@pytest.mark.slow
def test_daemon_path_gives_the_same_states_as_replay(small, tmp_path):
    """The daemon (acquisition thread, queue, monitor step, store) fed the same recordings as replay."""
    import dataclasses
    import sqlite3

    from agent.daemon import Daemon

    _, _, rec = small
    cfg = load_config(rec / "agent.toml")
    cfg = dataclasses.replace(
        cfg,
        source=dataclasses.replace(cfg.source, interval_s=1.0),
        store=dataclasses.replace(cfg.store, state_dir=str(tmp_path / "state")),
    )
    d = Daemon(cfg, source_factory=lambda c: ReplaySource([rec]), use_mqtt=False)
    assert d.run() == 0
    db = sqlite3.connect(tmp_path / "state" / "trend.sqlite")
    daemon_rows = db.execute("SELECT t_utc_s, state FROM trend WHERE level = 0 ORDER BY t_utc_s").fetchall()
    src = ReplaySource([rec])
    src.open()
    res = run_replay(src, cfg)
    # trend rows: one per capture, sensor-fault ones included
    assert daemon_rows == [(s.t0_utc_s, s.state) for s in res.steps]
    # state changes: the daemon snapshots each one; replay shows each one
    snaps = [json.loads(p.read_text()) for p in (tmp_path / "state" / "snapshots").glob("*/analysis.json")]
    daemon_changes = {(d["t_utc_s"], d["analysis"]["state"]["state"]) for d in snaps if d["reason"] == "state_change"}
    replay_changes = {(c["t0_utc_s"], c["to"]) for c in res.changes if c["kind"] == "state" and c["from"]}
    assert daemon_changes == replay_changes and replay_changes
    assert any(state == "sensor_fault" for _, state in replay_changes)
    final = json.loads((tmp_path / "state" / "monitor.json").read_text())
    assert final["state"] == res.steps[-1].state


def test_analyze_command_finds_every_simulated_tone(tmp_path):
    """Round trip through `skidvib analyze`: each simulated tone is a peak at its frequency, ±5 % amplitude."""
    from agent.recordings import write_wav_with_sidecar
    from agent.simulator import Faults, OperatingPoint, SimMachine, synthesize

    m = SimMachine(residual_1x_mm_s=0.0, floor_mm_s=0.02, noise_g=0.001, rotor_bar_g=0.02, line_mm_s=(0.0, 0.4))
    x, truth = synthesize(m, OperatingPoint(True, 24.6, None, 50.0), Faults(misalignment_mm_s=2.0), 25600.0, 65536,
                          seed=1)
    wav = tmp_path / "sim.wav"
    write_wav_with_sidecar(wav, x, 25600.0, {"channel": "pump DE"})
    r = run_cli("analyze", wav, "-c", ROOT / "config" / "demo-skid.toml", "--json")
    assert r.returncode == 0, r.stderr
    doc = json.loads(r.stdout)
    bin_hz = doc["spectrum"]["bin_width_hz"]
    assert len(truth["tones"]) == 9
    for t in truth["tones"]:
        near = [p for p in doc["peaks"] if abs(p["freq_hz"] - t["freq_hz"]) < 0.1 * bin_hz]
        assert near, (t["name"], t["freq_hz"])
        assert near[0]["amp"] == pytest.approx(t["vel_rms_mm_s"], rel=0.05), t["name"]


def test_replay_source_reads_other_formats(tmp_path):
    """Real data without sidecars: any format agent.recordings reads, with fs and units given."""
    rng = np.random.default_rng(0)
    for i in range(2):
        np.save(tmp_path / f"rec{i}.npy", rng.standard_normal(4096) * 0.1)
    src = ReplaySource([tmp_path], fs_hz=4096.0, units="g")
    src.open()
    a = src.read(1.0)[0]
    b = src.read(1.0)[0]
    assert (a.seq, b.seq) == (0, 1) and a.fs_hz == 4096.0
    assert np.std(a.accel_ms2) == pytest.approx(0.1 * 9.80665, rel=0.05)  # g → m/s² (ISO 80000-3)


def _story_step(seq, t, state, truth, *findings):
    from agent.replay_cmd import StepView

    return StepView(seq, t, "", state, "dropout: 1127 zero samples" if state == "sensor_fault" else "", 1.0, "A",
                    3.0, 3.0, 24.6, tuple(findings), truth)


def test_truth_comparison_counts_only_findings_that_name_the_simulated_fault():
    from agent.model import Finding, Severity
    from agent.replay_cmd import ReplayResult, truth_comparison

    def f(code, component, sev=Severity.WATCH):
        return Finding(code=code, confidence=0.8, severity=sev, component=component, stage=2)

    outer = {"running": True, "bearings": [{"bearing": "pump DE", "defect": "outer", "stage": 2}], "faults": []}
    healthy = {"running": True, "bearings": [], "faults": []}
    sensor = {**outer, "sensor": [{"kind": "intermittent"}]}
    ev = [
        {"t0_utc_s": 100.0, "utc": "2026-01-01T00:01:40Z", "kind": "bearing", "phase": "begins",
         "bearing": "pump DE", "defect": "outer", "what": "outer defect on bearing 'pump DE' begins"},
        {"t0_utc_s": 450.0, "utc": "2026-01-01T00:07:30Z", "kind": "sensor", "phase": "begins",
         "what": "sensor fault (intermittent) begins"},
        {"t0_utc_s": 650.0, "utc": "2026-01-01T00:10:50Z", "kind": "sensor", "phase": "ends",
         "what": "sensor fault (intermittent) ends"},
        {"t0_utc_s": 1000.0, "utc": "2026-01-01T00:16:40Z", "kind": "bearing", "phase": "ends",
         "bearing": "pump DE", "defect": "outer", "what": "outer defect on bearing 'pump DE' ends (repaired)"},
    ]
    steps = [
        _story_step(0, 0.0, "normal", healthy),
        _story_step(1, 200.0, "normal", outer, f("bearing_inner_race", "motor DE")),  # another bearing
        _story_step(2, 300.0, "alert", outer, f("bearing_inner_race", "pump DE")),  # the right bearing, wrong defect
        _story_step(3, 400.0, "alert", outer, f("bearing_outer_race", "pump DE")),  # the detection
        _story_step(4, 500.0, "sensor_fault", sensor),
        _story_step(5, 600.0, "sensor_fault", sensor),
        _story_step(6, 700.0, "alert", outer, f("bearing_outer_race", "pump DE")),
        _story_step(7, 1000.0, "stopped", {"running": False, "bearings": [], "faults": []}),
        _story_step(8, 1100.0, "alert", healthy, f("bearing_inner_race", "motor DE", Severity.ALERT)),
    ]
    changes = [{"t0_utc_s": 300.0, "seq": 2, "kind": "state", "from": "normal", "to": "alert", "reason": "floor"},
               {"t0_utc_s": 1100.0, "seq": 8, "kind": "state", "from": "stopped", "to": "alert", "reason": "x"}]
    lines = truth_comparison(ReplayResult(steps=steps, changes=changes), ev)
    text = "\n".join(lines)
    # 300 s after the event (0.1 h), not the wrong-defect call 200 s after it
    assert "begins" in lines[0] and "found after   0.1 h: [watch] bearing_outer_race, pump DE, stage 2" in lines[0]
    assert "in 2 of 4 captures" in lines[0]  # running captures while it lasted: 200, 300, 400, 700 s
    assert "found after   0.0 h: state sensor_fault (dropout" in lines[1]
    assert "state back to alert after   0.0 h" in lines[2]
    assert "cleared after   0.0 h (machine stopped)" in lines[3]
    # state changes are listed with what was simulated; the one on a healthy machine is a false alarm
    assert "normal -> alert: floor  [sim: pump DE outer race st.2]" in text
    assert "stopped -> alert: x  [sim: healthy]" in text and "1 while the simulated machine was healthy" in text
    # the wrong calls, apart: inner race on the motor DE twice (raised twice), on the pump DE once
    other = lines[lines.index("Other findings (naming no fault simulated at the time: wrong calls):") + 1:]
    assert other[0].split()[:2] == ["bearing_inner_race", "motor"] and "in   2 captures (raised 2x)" in other[0]
    assert "up to alert" in other[0]
    assert other[1].split()[:3] == ["bearing_inner_race", "pump", "DE"] and "in   1 captures" in other[1]


def test_truth_comparison_says_when_a_fault_is_not_found():
    from agent.model import Finding, Severity
    from agent.replay_cmd import ReplayResult, truth_comparison

    cav = {"running": True, "bearings": [], "faults": ["cavitation"], "cavitation_g": 0.5,
           "resonances_hz": [160.0, 3300.0]}
    ev = [{"t0_utc_s": 0.0, "utc": "2026-01-01T00:00:00Z", "kind": "cavitation", "phase": "begins",
           "what": "cavitation begins"}]
    res_ = Finding(code="resonance", confidence=0.6, severity=Severity.WATCH, component="",
                   evidence=({"metric": "hump centre, Hz", "value": 166.0},))
    vp = Finding(code="vane_pass", confidence=0.8, severity=Severity.WATCH, component="pump")
    steps = [_story_step(i, 100.0 * i, "normal", cav, res_, vp) for i in range(3)]
    lines = truth_comparison(ReplayResult(steps=steps), ev)
    assert "NOT FOUND in 3 captures (shown instead: resonance, vane_pass (pump))" in lines[0]
    text = "\n".join(lines)
    assert "vane_pass" in text.split("wrong calls):")[1].splitlines()[1]
    # the simulated machine has a 160 Hz mode: a resonance near it is true, not a wrong call
    assert "(resonance in 3 captures sits at a natural frequency of the simulated machine" in text


class _ListSource:
    """Captures from a list (the replay loop needs only read())."""

    def __init__(self, caps):
        self.caps = list(caps)

    def read(self, timeout_s=None):
        if not self.caps:
            raise EndOfSource()
        return (self.caps.pop(0),)


def test_a_capture_with_bad_data_clears_no_finding():
    """A flatlined capture between two faulty ones: the replay log does not say the defect
    cleared (the agent could not look), and so shows no new finding when data returns."""
    from agent.model import Capture
    from tests.test_speed import _pump_with_outer_race_defect

    cfg = load_config(ROOT / "config/demo-skid.toml")
    x, _ = _pump_with_outer_race_defect(1478, 3, 0.9)
    t0 = 1.8e9
    caps = [Capture(x, 25600.0, t0_utc_s=t0 + 60.0 * i, channel="pump DE horizontal", source_id="t", seq=i)
            for i in range(3)]
    caps[1] = Capture(np.zeros_like(x), 25600.0, t0_utc_s=t0 + 60.0, channel="pump DE horizontal",
                      source_id="t", seq=1)
    res = run_replay(_ListSource(caps), cfg)
    assert [s.state for s in res.steps][1] == "sensor_fault"
    kinds = [(c["seq"], c["kind"], c.get("code")) for c in res.changes if c["kind"] != "state"]
    assert (0, "finding", "bearing_outer_race") in kinds  # the defect is found at once
    assert not any(k == "cleared" for _, k, _ in kinds), kinds
    assert [k for k in kinds if k[1] == "finding" and k[2] == "bearing_outer_race"] == [(0, "finding",
                                                                                          "bearing_outer_race")]
