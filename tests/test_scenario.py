"""Scenarios (strict loader, timeline), the synthetic source and ``simulate`` output."""

from __future__ import annotations

import json
import textwrap
from pathlib import Path

import numpy as np
import pytest
from scipy.io import wavfile

from agent.config import load_config
from agent.errors import ConfigError
from agent.scenario import find_scenario, load_scenario
from agent.simulate_cmd import simulate
from agent.sources import EndOfSource, source_class
from agent.sources.synthetic import SyntheticSource, steady_scenario

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "replay" / "scenarios" / "demo.toml"

SMALL = """
[scenario]
name = "small"
start_utc = 2026-01-05T00:00:00Z
days = 0.5
seed = 9
fs_hz = 8192
n_samples = 8192
interval_h = 2.0

[[scenario.dense]]
from_day = 0.25
to_day = 0.26
interval_min = 5

[machine]
tag = "T-1"
[[machine.bearings]]
name = "b1"
balls = 9
ball_diameter_mm = 7.94
pitch_diameter_mm = 38.5

[[operation]]
from_day = 0
speed_rpm = 1480
[[operation]]
from_day = 0.25
speed_rpm = 1200
ramp_s = 30

[[fault]]
kind = "bearing"
bearing = "b1"
defect = "inner"
from_day = 0.1
to_day = 0.4
levels = [[0.1, 0.1], [0.4, 1.0]]
stages = [[0.1, 1], [0.3, 3]]

[[sensor_fault]]
kind = "clipping"
from_day = 0.4
to_day = 0.45
level_g = 0.05
"""


def _write(tmp_path, text, name="s.toml"):
    p = tmp_path / name
    p.write_text(textwrap.dedent(text), encoding="utf-8")
    return p


def test_demo_scenario_loads_and_tells_its_story():
    s = load_scenario(DEMO)
    assert 300 <= s.n_captures <= 600
    assert s.capture_s == pytest.approx(2.56)
    whats = " | ".join(e["what"] for e in s.events())
    for part in ("outer defect on bearing 'pump drive end' begins", "stage 4", "cavitation begins",
                 "sensor fault (intermittent) begins", "stopped", "ends (repaired)"):
        assert part in whats
    assert {round(op.speed_hz * 60) for op in s.operations if op.running} == {1478, 1140}
    # a capture starting at a speed change lies inside the 60 s VFD ramp
    i = s.capture_times_s.index(2 * 86400.0)
    p = s.point_at(s.capture_times_s[i])
    assert p.speed_hz - p.end_hz == pytest.approx((1478 - 1140) / 60 * s.capture_s / 60, rel=0.05)
    # VFD: electrical frequency follows speed, n = 120·f·(1 − s)/P (REFERENCES §6)
    assert p.line_hz == pytest.approx(p.speed_hz * 2 / (1 - 0.013))
    assert not s.point_at(36.2 * 86400).running
    assert s.faults_at(27 * 86400).bearings[0].stage == 3
    assert s.faults_at(37 * 86400).bearings == ()
    assert s.faults_at(24.5 * 86400).cavitation_g > 0
    assert [f.kind for f in s.faults_at(33.3 * 86400).sensor] == ["intermittent"]


def test_agent_config_from_scenario_is_valid(tmp_path):
    s = load_scenario(_write(tmp_path, SMALL))
    paths = simulate(s, tmp_path / "out", limit=2)
    assert len(paths) == 2
    cfg = load_config(tmp_path / "out" / "agent.toml")
    assert cfg.machine.bearings[0].name == "b1" and cfg.source.fs_hz == 8192.0


def test_strict_loader_reports_every_problem(tmp_path):
    bad = SMALL.replace("speed_rpm = 1480", "speed_rmp = 1480").replace("balls = 9", "balls = 2")
    bad = bad.replace('bearing = "b1"', 'bearing = "b9"').replace("level_g = 0.05", "level_g = -1.0")
    bad = bad.replace("seed = 9", "seed = 9\nwobble = 3")
    with pytest.raises(ConfigError) as ei:
        load_scenario(_write(tmp_path, bad))
    msg = str(ei.value)
    assert "s.toml" in msg
    assert "operation[0].speed_rmp: unknown key (did you mean 'speed_rpm'?)" in msg
    assert "machine.bearings[0].balls: 2 out of range" in msg
    assert "fault[0].bearing: 'b9' is not one of machine.bearings" in msg
    assert "sensor_fault[0].level_g" in msg
    assert "scenario.wobble: unknown key" in msg


def test_loader_rejects_bad_files(tmp_path):
    with pytest.raises(ConfigError, match="TOML syntax"):
        load_scenario(_write(tmp_path, "[scenario\n"))
    with pytest.raises(ConfigError, match="cannot read scenario file"):
        load_scenario(tmp_path / "missing.toml")
    with pytest.raises(ConfigError, match="known scenarios: .*demo"):
        find_scenario("no-such-scenario")
    assert find_scenario("demo") == DEMO
    text = SMALL.replace("levels = [[0.1, 0.1], [0.4, 1.0]]", "levels = [[0.4, 0.1], [0.1, 1.0]]")
    with pytest.raises(ConfigError, match="days must be in increasing order"):
        load_scenario(_write(tmp_path, text))


def test_synthetic_source_plays_the_timeline(tmp_path):
    s = load_scenario(_write(tmp_path, SMALL))
    assert s.n_captures == 6 + 2  # every 2 h over 12 h, plus 5-min captures in the dense window
    assert source_class("synthetic") is SyntheticSource
    seen = []
    with SyntheticSource(s) as src:
        while True:
            try:
                (cap,) = src.read(1.0)
            except EndOfSource:
                break
            seen.append((cap.seq, cap.t0_utc_s, src.last_truth["faults"]))
            assert cap.fs_hz == 8192.0 and cap.n_samples == 8192
            assert cap.full_scale_ms2 == pytest.approx(50 * 9.80665)
    assert [q for q, _, _ in seen] == list(range(8))
    assert np.all(np.diff([t for _, t, _ in seen]) > 0)
    assert seen[0][1] == s.start_utc_s
    assert any("sensor_clipping" in f for _, _, f in seen)
    # the same scenario gives the same samples
    a = SyntheticSource(s)
    b = SyntheticSource(s)
    a.open(), b.open()
    assert np.array_equal(a.read(1.0)[0].accel_ms2, b.read(1.0)[0].accel_ms2)


def test_synthetic_source_paced_uses_the_injected_clock():
    now = [1_000_000.0]
    slept = []

    def sleep(dt_s):
        slept.append(dt_s)
        now[0] += dt_s

    scen = steady_scenario(fs_hz=4096.0, n_samples=4096, speed_rpm=1480.0)
    src = SyntheticSource(scen, paced=True, clock=lambda: now[0], sleep=sleep)
    src.open()
    c1 = src.read(5.0)[0]
    now[0] += 57.0
    c2 = src.read(5.0)[0]
    assert slept == [1.0, 1.0]
    assert c1.t0_utc_s == 1_000_000.0 and c2.t0_utc_s == 1_000_058.0
    assert src.last_truth["speed_hz"] == pytest.approx(1480 / 60, rel=0.005)


def test_simulate_is_byte_identical_and_sidecars_are_complete(tmp_path):
    s = load_scenario(_write(tmp_path, SMALL))
    a = simulate(s, tmp_path / "a", limit=3)
    b = simulate(s, tmp_path / "b", limit=3, jobs=2)
    for pa, pb in zip(a, b):
        assert pa.read_bytes() == pb.read_bytes()
        assert pa.with_suffix(".json").read_bytes() == pb.with_suffix(".json").read_bytes()
    fs, data = wavfile.read(a[1])
    x, truth, t0 = s.capture(1)
    assert fs == 8192 and data.dtype == np.float32
    assert np.array_equal(data, x.astype(np.float32))
    meta = json.loads(a[1].with_suffix(".json").read_text())
    assert meta["units"] == "m/s2" and meta["fs_hz"] == 8192.0 and meta["t0_utc_s"] == t0
    assert meta["start_utc"] == "2026-01-05T02:00:00Z" and a[1].name == "T-1_20260105T020000Z.wav"
    assert meta["ground_truth"]["tones"][0]["name"] == "1X"
    story = json.loads((tmp_path / "a" / "scenario.json").read_text())
    assert story["captures"] == 3 and story["events"][0]["utc"] == "2026-01-05T00:00:00Z"


def test_synthetic_source_from_the_demo_config_runs_the_scenario_live():
    """The daemon's way: source.kind = "synthetic" with the demo scenario, paced on an injected clock."""
    import dataclasses

    cfg = load_config(ROOT / "config" / "demo-skid.toml")
    syn = dataclasses.replace(cfg.source.synthetic, time_scale=86400.0)  # one scenario day per second
    cfg = dataclasses.replace(cfg, source=dataclasses.replace(cfg.source, synthetic=syn))
    now = [1_900_000_000.0]

    def sleep(dt_s):
        now[0] += dt_s

    src = source_class("synthetic").from_config(cfg, clock=lambda: now[0], sleep=sleep)
    src.open()
    assert src.scenario.name == "demo" and src.scenario.seed == cfg.source.synthetic.seed
    now[0] += 27.0  # → scenario day 27: stage-3 outer-race defect on the pump drive end
    (cap,) = src.read(10.0)
    assert cap.t0_utc_s == 1_900_000_027.0
    assert src.last_truth["bearings"][0]["stage"] == 3
    assert src.last_truth["day"] == pytest.approx(27.0, abs=1e-3)
