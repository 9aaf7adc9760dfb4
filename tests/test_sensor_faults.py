"""Every simulated sensor fault, through the daemon: the capture is judged ``sensor_fault``
(no machine judgement from bad data) and the agent recovers by itself when the sensor does.
The quality gate's own thresholds are tested in tests/test_quality.py; the serial
unplug at source level in tests/test_serial_adc.py. Here: the service end to end."""

from __future__ import annotations

import dataclasses
import sqlite3
import time
from pathlib import Path

import numpy as np
import pytest

from agent.config import load_config
from agent.daemon import Daemon
from agent.model import Capture
from agent.simulator import SENSOR_FAULTS, Faults, SensorFault, synthesize
from agent.sources.base import EndOfSource, Source
from agent.sources.synthetic import steady_scenario
from tests.test_daemon import write_config

#: a level per kind that a real fault of that kind would show (g; see SensorFault)
LEVELS = {"clipping": 0.05, "flatline": 0.0, "bias_drift": 3.0, "intermittent": 20.0, "dropout": 0.3}


class FaultySensor(Source):
    """Simulated pump captures; ``plan[i]`` is None (healthy) or a sensor fault kind."""

    kind = "faulty"

    def __init__(self, cfg, plan):
        self.cfg, self.plan, self.i = cfg, plan, 0
        s = steady_scenario(fs_hz=cfg.source.fs_hz, n_samples=cfg.source.n_samples, speed_rpm=1478.0)
        self.machine, self.point = s.machine, s.point_at(0.0)
        self.daemon = None

    def open(self):
        pass

    def close(self):
        pass

    def read(self, timeout_s):
        while self.daemon is not None and not self.daemon.queue.empty():
            time.sleep(0.002)
        if self.i >= len(self.plan):
            raise EndOfSource()
        kind = self.plan[self.i]
        self.i += 1
        faults = Faults(sensor=(SensorFault(kind, LEVELS[kind]),) if kind else ())
        x, truth = synthesize(self.machine, self.point, faults, self.cfg.source.fs_hz,
                              self.cfg.source.n_samples, seed=(7, self.i))
        return (Capture(np.asarray(x, dtype=np.float64), self.cfg.source.fs_hz,
                        t0_utc_s=1_796_169_600.0 + 60.0 * self.i, channel="pump DE",
                        source_id="faulty", seq=self.i, full_scale_ms2=truth["full_scale_ms2"]),)


def test_every_simulated_sensor_fault_kind_is_covered():
    assert set(LEVELS) == set(SENSOR_FAULTS)  # a new simulated fault must be added here


@pytest.mark.slow
def test_every_simulated_sensor_fault_gives_sensor_fault_and_recovers(tmp_path):
    cfg = load_config(write_config(tmp_path, 1))
    cfg = dataclasses.replace(cfg, source=dataclasses.replace(cfg.source, interval_s=0.05))
    plan = [None, None]
    for kind in SENSOR_FAULTS:
        plan += [kind, kind, None, None]
    src = FaultySensor(cfg, plan)
    d = src.daemon = Daemon(cfg, source_factory=lambda c: src, use_mqtt=False)
    d.run()
    assert d.health.captures_done == len(plan)
    db = sqlite3.connect(tmp_path / "state" / "trend.sqlite")
    states = [s for (s,) in db.execute("SELECT state FROM trend WHERE level = 0 ORDER BY rowid")]
    assert len(states) == len(plan)
    for i, kind in enumerate(plan):
        if kind:
            assert states[i] == "sensor_fault", (i, kind, states)
        else:
            assert states[i] != "sensor_fault", (i, states)  # recovered by itself


@pytest.mark.slow
def test_serial_port_vanishing_mid_capture_gives_sensor_fault_then_recovers(tmp_path):
    """A serial ADC on a pty pair (socat); socat is killed (-9) mid-capture and restarted:
    the daemon reports sensor_fault and goes back to judging the machine by itself."""
    import shutil
    import signal
    import subprocess
    import sys
    import threading

    from tests.test_serial_adc import _start_socat

    if shutil.which("socat") is None:
        pytest.skip("needs the Debian package socat")
    cfg = load_config(write_config(tmp_path, 1))
    cfg = dataclasses.replace(cfg, source=dataclasses.replace(
        cfg.source, kind="serial", fs_hz=8000.0, capture_s=0.5, interval_s=0.5,
        serial=dataclasses.replace(cfg.source.serial, port=str(tmp_path / "ttyB"), channels=1,
                                   baud=921600, full_scale_v=2.5)))
    socat = {"p": _start_socat(tmp_path)}
    root = Path(__file__).resolve().parents[1]
    writer = subprocess.Popen([sys.executable, str(root / "tests" / "serial_pump_writer.py"),
                               str(tmp_path / "ttyA"), "9"])
    states: list[str] = []

    class Recording(Daemon):
        def _handle_result(self, result, caps):
            states.append(result.state.value)
            super()._handle_result(result, caps)

    d = Recording(cfg, use_mqtt=False)

    def outside_world():
        time.sleep(3.2)  # mid-capture: captures are 0.5 s long, back to back
        socat["p"].send_signal(signal.SIGKILL)
        socat["p"].wait(5)
        time.sleep(1.0)
        socat["p"] = _start_socat(tmp_path)
        writer.wait(20)
        time.sleep(0.3)
        d.stop_event.set()

    hand = threading.Thread(target=outside_world)
    hand.start()
    try:
        d.run()
    finally:
        hand.join(30)
        writer.kill()
        socat["p"].kill()
        socat["p"].wait(5)
    print("states:", states, "source errors:", d.health.source_errors)
    assert d.health.source_errors >= 1
    first_fault = states.index("sensor_fault")
    assert first_fault >= 2 and "sensor_fault" not in states[:first_fault]  # healthy before
    after = states[first_fault:]
    recovered = [i for i, s in enumerate(after) if s != "sensor_fault"]
    assert recovered and all(s != "sensor_fault" for s in after[recovered[0]:]), states
    assert len(after) - recovered[0] >= 3  # judged the machine again for several captures


def test_speed_profile_on_a_short_capture_is_a_value_error_not_a_crash():
    """Found by the serial test above: 0.5 s captures leave no harmonic to follow; the
    profile must say so with ValueError (which the order view catches), not TypeError."""
    from agent.speed import speed_profile

    fs, f1 = 8000.0, 1480 / 60.0
    t = np.arange(4000) / fs
    x = np.sin(2 * np.pi * f1 * t) + 0.5 * np.sin(2 * np.pi * 6 * f1 * t)
    with pytest.raises(ValueError, match="no harmonic"):
        speed_profile(x, fs, f1, line_hz=50.0)
