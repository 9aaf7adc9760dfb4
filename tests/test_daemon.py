"""The daemon end to end against a real mosquitto: state, measurements, events, store, reload, stop."""

from __future__ import annotations

import json
import sqlite3
import threading
import time
from pathlib import Path


from agent.config import load_config
from agent.daemon import Daemon
from agent.demo import demo_signal
from agent.errors import SourceStalled
from agent.model import Capture
from agent.sources.base import Source
from tests.broker import USERS, Subscriber

ROOT = Path(__file__).resolve().parents[1]
BASE = "skv/plant1/p-201"


class ScriptedSource(Source):
    """A virtual source for the daemon tests: demo-pump captures whose 1X level follows a script.

    ``script`` gives, per capture, the factor applied to the whole signal, or "stall" to simulate
    a stalled device (the real sources raise SourceStalled in that case).
    """

    kind = "scripted"

    def __init__(self, cfg, script, t0_utc_s=1_800_000_000.0):
        self.cfg, self.script, self.i, self.t0 = cfg, list(script), 0, t0_utc_s
        self.opened = 0

    def open(self):
        self.opened += 1

    def read(self, timeout_s):
        from agent.sources.base import EndOfSource

        if self.i >= len(self.script):
            raise EndOfSource()
        step = self.script[self.i]
        self.i += 1
        if step == "stall":
            raise SourceStalled("no data for 5 s (scripted)")
        fs, n = self.cfg.source.fs_hz, self.cfg.source.n_samples
        x = demo_signal(fs, n, seed=self.i) * float(step)
        return (Capture(x, fs, t0_utc_s=self.t0 + 60.0 * self.i, channel="pump DE", source_id="scripted", seq=self.i),)

    def close(self):
        pass


class HookedSource(ScriptedSource):
    """ScriptedSource that calls ``hooks[i]()`` before delivering capture ``i`` (1-based)."""

    def __init__(self, cfg, script, hooks):
        super().__init__(cfg, script)
        self.hooks = hooks

    daemon = None

    def read(self, timeout_s):
        while self.daemon is not None and not self.daemon.queue.empty():
            time.sleep(0.002)  # paced by the analysis: no capture dropped on a busy machine
        hook = self.hooks.get(self.i + 1)
        if hook is not None:
            hook()
        return super().read(timeout_s)


def write_config(tmp_path, broker_port, extra="") -> Path:
    pw = tmp_path / "agent.pw"
    pw.write_text(USERS["agent"] + "\n")
    text = (ROOT / "config/demo-skid.toml").read_text()
    text = text.replace('state_dir = "../demo-out/state"', f'state_dir = "{tmp_path / "state"}"')
    text = text.replace("interval_s = 60.0", "interval_s = 2.56")
    text = text.replace('prefix = "skidvib"', f'prefix = "skv"\nsite = "plant1"\nusername = "agent"\npassword_file = "{pw}"')
    text = text.replace("port = 1883", f"port = {broker_port}")
    p = tmp_path / "agent.toml"
    p.write_text(text + extra)
    return p


def run_daemon(cfg, script, **kw):
    src = ScriptedSource(cfg, script)
    d = Daemon(cfg, source_factory=lambda c: src, **kw)
    d.cfg = cfg
    return d, src


def test_daemon_publishes_state_measurements_and_events(tmp_path, mqtt_broker):
    cfg = load_config(write_config(tmp_path, mqtt_broker.port))
    # interval between captures: no waiting in the test
    import dataclasses

    cfg = dataclasses.replace(cfg, source=dataclasses.replace(cfg.source, interval_s=2.56))
    sub = Subscriber(mqtt_broker, "skv/#")
    # healthy (zone B ~2 mm/s), then 1X family ×2.5 (zone D > 4.5 mm/s), then a stall, then healthy;
    # still learning the baseline (30 captures), so the ISO zones alone raise the alarm (2 of 3 captures)
    # and it clears after two captures below 0.8 × the C/D boundary (hysteresis)
    script = [1.0, 1.0, 2.5, 2.5, "stall", 1.0, 1.0]
    d, src = run_daemon(cfg, script)
    d.acq_interval_override = 0
    t = threading.Thread(target=d.run)
    t.start()
    t.join(120)
    assert not t.is_alive()
    msgs = sub.collect_until(lambda ms: any(m.topic == f"{BASE}/availability" and m.payload == b"offline" for m in ms), 15)
    by_topic: dict[str, list] = {}
    for m in msgs:
        by_topic.setdefault(m.topic, []).append(m)
    states = [json.loads(m.payload)["state"] for m in by_topic[f"{BASE}/state"]]
    assert states[0] == "learning" and "danger" in states and "sensor_fault" in states and states[-1] == "learning"
    events = [json.loads(m.payload) for m in by_topic[f"{BASE}/events"]]
    changes = [(e["previous_state"], e["state"]) for e in events if e["type"] == "state_change"]
    assert ("learning", "danger") in changes and ("danger", "sensor_fault") in changes
    alarms = [e["detail"] for e in events if e["type"] == "alarm"]
    assert ("vel_rms_mm_s", "normal", "danger") in [(a["feature"], a["previous_state"], a["state"]) for a in alarms]
    assert len({e["id"] for e in events}) == len(events)
    meas = [json.loads(m.payload) for m in by_topic[f"{BASE}/measurements"]]
    assert len(meas) == 6  # one per usable capture
    assert all("vel_rms_mm_s" in m["values"] for m in meas)
    # ISO 20816-3 group 2 rigid: > 4.5 mm/s is zone D (from memory of Annex A)
    assert max(m["values"]["vel_rms_mm_s"] for m in meas) > 4.5
    # store: one trend row per usable capture, snapshots at each state change
    db = sqlite3.connect(tmp_path / "state" / "trend.sqlite")
    assert db.execute("SELECT COUNT(*) FROM trend").fetchone()[0] == 6
    snaps = sorted(p.name for p in (tmp_path / "state" / "snapshots").iterdir() if not p.name.startswith("."))
    assert len(snaps) >= 3 and all(p.endswith("state_change") or "state_change" in p for p in snaps)
    # the baseline being learned and the alarm engine are kept in the state directory for a restart
    from agent.assess import EngineState
    from agent.baseline import BaselineStore

    # the demo pump runs at 1476 r/min: speed bin 2 of the demo's edges [600, 1200, 1600] r/min
    learned = BaselineStore(tmp_path / "state").load_strict().get("speed2")
    assert learned is not None and not learned.ready and learned.n_captures >= 4
    engine = EngineState.from_json(json.loads((tmp_path / "state" / "alarms.json").read_text()))
    assert engine.machine.value == "learning"
    doc = json.loads((tmp_path / "state" / "snapshots" / snaps[1] / "analysis.json").read_text())
    assert doc["analysis"]["state"]["state"] in ("danger", "sensor_fault")
    sub.close()


def test_daemon_without_broker_buffers_then_delivers(tmp_path, mqtt_broker):
    cfg = load_config(write_config(tmp_path, mqtt_broker.port))
    mqtt_broker.stop()
    d, _ = run_daemon(cfg, [1.0, 2.5, 2.5, 1.0, 1.0])
    d.run()
    depth = d.link.outbox.stats().depth if d.link else None
    assert depth is not None and depth > 0  # nothing lost: waiting in the outbox
    mqtt_broker.restart()
    sub = Subscriber(mqtt_broker, "skv/#")
    d2, _ = run_daemon(cfg, [1.0])
    d2.run()
    def changes(ms):
        evs = [json.loads(m.payload) for m in ms if m.topic.endswith("/events")]
        return [e["state"] for e in evs if e["type"] == "state_change"]

    got = sub.collect_until(lambda ms: len(changes(ms)) >= 2, 15)
    assert changes(got)[:2] == ["danger", "learning"]
    sub.close()


def test_reload_rejects_invalid_config_and_keeps_old(tmp_path):
    path = write_config(tmp_path, 1)
    cfg = load_config(path)
    d, _ = run_daemon(cfg, [1.0], use_mqtt=False)
    path.write_text(path.read_text() + "\n[mqtt.nonsense]\n")
    d._reload()
    assert d.health.reload_failures == 1 and d.cfg is cfg
    assert "reload rejected" in d.health.last_error


def test_reload_applies_what_it_can_and_keeps_the_rest_running(tmp_path, mqtt_broker, capsys):
    """A reload carries retention, the outbox bound and alarm settings into the running
    service; the asset tag (a topic level), the keepalive and the state directory keep their
    running values, named once in the log, in health and in the status."""
    path = write_config(tmp_path, mqtt_broker.port)
    original = path.read_text()
    d, _ = run_daemon(load_config(path), [1.0])
    d._open_edges()
    try:
        assert d.store.max_count == 500 and d.link.outbox.max_bytes == 16 * 1024 * 1024
        edited = (original.replace(f'state_dir = "{tmp_path / "state"}"',
                                   f'state_dir = "{tmp_path / "elsewhere"}"\nsnapshot_max_count = 7\ntrend_raw_days = 3.0')
                  .replace(f"port = {mqtt_broker.port}", f"port = {mqtt_broker.port}\nkeepalive_s = 45\noutbox_max_mb = 1.0")
                  .replace('tag = "P-201"', 'tag = "P-202"')
                  .replace("alert_ratio = 2.0", "alert_ratio = 2.5"))
        path.write_text(edited)
        capsys.readouterr()
        d._reload()
        log = capsys.readouterr().err.splitlines()
        # applied while running
        assert d.store.max_count == 7 and d.store.raw_keep_s == 3 * 86400.0
        assert d.link.outbox.max_bytes == 1024 * 1024
        assert d.cfg.alarms.alert_ratio == 2.5
        # read only at start: the running values stay, and say so
        assert d.cfg.asset.tag == "P-201" and d.cfg.mqtt.keepalive_s == 30
        assert d.cfg.store.state_dir == str(tmp_path / "state") and d.store.state_dir == tmp_path / "state"
        assert d.link.topics.base == BASE
        pending = ["asset.tag", "store.state_dir", "mqtt.keepalive_s"]
        values = d.health.values(d.mono())
        assert values["restart_needed"] is True and values["restart_needed_keys"] == pending
        assert d.status_text().endswith("restart needed for " + ", ".join(pending))
        warned = [line for line in log if "event=reload_restart_needed" in line]
        assert len(warned) == 1 and warned[0].startswith("level=warning ")
        assert "sections=asset,store,mqtt keys=asset.tag,store.state_dir,mqtt.keepalive_s" in warned[0]
        applied = [line for line in log if "event=reload " in line][0]
        assert "applied=alarms.alert_ratio,store.snapshot_max_count,store.trend_raw_days,mqtt.outbox_max_mb" in applied
        # the same file again: the same keys still wait for the restart
        d._reload()
        assert d.health.restart_needed_keys == tuple(pending)
        # the running values back in the file: nothing waits
        path.write_text(original)
        d._reload()
        assert d.health.restart_needed_keys == () and "restart" not in d.status_text()
        assert d.store.max_count == 500 and d.cfg.alarms.alert_ratio == 2.0
        assert d.health.reloads == 3
    finally:
        d.shutdown()


def test_reload_without_mqtt_ignores_mqtt_keys(tmp_path):
    """Run with MQTT off (--no-mqtt): [mqtt] changes do not call for a restart; state_dir does."""
    path = write_config(tmp_path, 1)
    d, _ = run_daemon(load_config(path), [1.0], use_mqtt=False)
    path.write_text(path.read_text().replace("port = 1", "port = 2")
                    .replace('tag = "P-201"', 'tag = "P-202"')
                    .replace(f'state_dir = "{tmp_path / "state"}"', f'state_dir = "{tmp_path / "other"}"'))
    d._reload()
    assert d.health.restart_needed_keys == ("store.state_dir",)
    assert d.cfg.mqtt.port == 2 and d.cfg.asset.tag == "P-202"


def test_reload_of_sensor_calibration_builds_a_new_source(tmp_path):
    """The sources copy the calibration when built: a changed sensitivity restarts acquisition
    with a source made from the new value (not the old one, which would scale every level)."""
    path = write_config(tmp_path, 1)
    cfg = load_config(path)
    built: list[float] = []

    def factory(c):
        built.append(c.sensor.sensitivity_mv_per_g)
        return ScriptedSource(c, [1.0] * 50)

    d = Daemon(cfg, source_factory=factory, use_mqtt=False)
    d.cfg = cfg
    d._open_edges()
    try:
        d._restart_acquisition()
        deadline = time.monotonic() + 20
        while not built and time.monotonic() < deadline:
            time.sleep(0.05)
        assert built == [cfg.sensor.sensitivity_mv_per_g]
        old = cfg.sensor.sensitivity_mv_per_g
        text = path.read_text()
        assert f"sensitivity_mv_per_g = {old}\n" in text
        path.write_text(text.replace(f"sensitivity_mv_per_g = {old}\n", "sensitivity_mv_per_g = 10.0\n"))
        d._reload()
        while len(built) < 2 and time.monotonic() < deadline:
            time.sleep(0.05)
        assert built == [old, 10.0]
        assert d.health.restart_needed_keys == ()
    finally:
        d.shutdown()
