"""Operating state: stopped / starting / running, transients, speed and load bins."""

from __future__ import annotations

import pytest

from agent.opstate import RUNNING, STARTING, STOPPED, OpStateConfig, bin_index, classify

CFG = OpStateConfig(speed_bin_edges_rpm=(900.0, 1200.0, 1500.0))


def running(speed_rpm, cfg=CFG, **kw):
    prev = classify(1.0, speed_rpm / 60, cfg)
    return classify(1.0, speed_rpm / 60, cfg, previous=prev, **kw)


def test_bins_from_edges():
    assert [bin_index(v, (900.0, 1200.0, 1500.0)) for v in (100, 900, 1199.9, 1200, 1480, 1500, 3000)] == [
        0, 1, 1, 2, 2, 3, 3]
    op = running(1480)
    assert op.mode == RUNNING and op.usable and op.key == "speed2" and op.label == "1200-1500 rpm"
    assert running(600).label == "< 900 rpm" and running(1600).label == ">= 1500 rpm"
    one = running(1480, OpStateConfig())
    assert one.key == "speed0" and one.label == "any rpm"


def test_stopped_by_level_or_speed():
    op = classify(0.05, None, CFG)
    assert op.mode == STOPPED and not op.usable and op.key == "" and "below 0.2 mm/s" in op.reason
    # quiet but turning (e.g. a bearing fault that lives above the velocity band): running, not stopped
    assert classify(0.05, 24.6, CFG).mode != STOPPED
    op = classify(1.0, 0.5, CFG)  # 30 rpm: below min_running_rpm 60
    assert op.mode == STOPPED and "below 60 rpm" in op.reason


def test_start_and_speed_changes_are_transient():
    stopped = classify(0.05, None, CFG)
    start = classify(1.0, 24.6, CFG, previous=stopped)
    assert start.mode == STARTING and start.transient and not start.usable
    steady = classify(1.0, 24.6, CFG, previous=start)
    assert steady.usable
    # tolerance max(2 % of speed, 10 rpm): 1476 rpm → 29.5 rpm
    assert classify(1.0, (1476 + 25) / 60, CFG, previous=steady).usable
    moved = classify(1.0, (1476 + 35) / 60, CFG, previous=steady)
    assert moved.transient and "changed 35 rpm" in moved.reason
    ramp = classify(1.0, 24.6, CFG, previous=steady, speed_span_hz=1.0)
    assert ramp.transient and "within the capture" in ramp.reason


def test_unknown_speed():
    assert running(1480, OpStateConfig()).usable
    prev = classify(1.0, None, OpStateConfig())
    assert classify(1.0, None, OpStateConfig(), previous=prev).usable  # one bin: speed not needed
    prev = classify(1.0, 24.6, CFG)
    op = classify(1.0, None, CFG, previous=prev)
    assert op.transient and not op.usable and "no speed found" in op.reason


def test_load_bins():
    cfg = OpStateConfig(load_bin_edges=(50.0,))
    op = running(1480, cfg, load=70.0)
    assert op.key == "speed0-load1" and op.usable
    missing = running(1480, cfg)
    assert not missing.usable and "load proxy" in missing.reason


@pytest.mark.parametrize("kw", [{"speed_bin_edges_rpm": (1200.0, 900.0)}, {"speed_bin_edges_rpm": (0.0,)},
                                {"stopped_vel_mm_s": -1.0}, {"load_bin_edges": (1.0, float("nan"))}])
def test_config_validation(kw):
    with pytest.raises(ValueError):
        OpStateConfig(**kw)


def test_bad_inputs():
    with pytest.raises(ValueError, match="vel_rms_mm_s"):
        classify(float("nan"), 24.6, CFG)
    with pytest.raises(ValueError, match="speed_hz"):
        classify(1.0, -3.0, CFG)
