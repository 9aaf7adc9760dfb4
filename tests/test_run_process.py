"""``skidvib run`` as a real process against a real mosquitto: SIGTERM stops it cleanly
(offline published, exit 0); SIGKILL leaves the broker's last will (offline); SIGHUP
reloads the config, applying what it can and naming what needs a restart."""

from __future__ import annotations

import json
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tests.broker import USERS, Subscriber

ROOT = Path(__file__).resolve().parents[1]
BASE = "skv/plant1/p-201"


def write_config(tmp_path, port: int) -> Path:
    """The demo config, pointed at the test broker and a state folder in tmp."""
    pw = tmp_path / "agent.pw"
    pw.write_text(USERS["agent"] + "\n")
    text = (ROOT / "config/demo-skid.toml").read_text()
    text = text.replace('state_dir = "../demo-out/state"', 'state_dir = "state"')
    text = text.replace('scenario = "../replay/scenarios/demo.toml"',
                        f'scenario = "{ROOT / "replay/scenarios/demo.toml"}"')
    text = text.replace("interval_s = 60.0", "interval_s = 5.0")
    text = text.replace('prefix = "skidvib"', 'prefix = "skv"\nsite = "plant1"\n'
                        f'username = "agent"\npassword_file = "{pw}"')
    text = text.replace("port = 1883", f"port = {port}")
    p = tmp_path / "agent.toml"
    p.write_text(text)
    return p


def _simulator_ready() -> bool:
    from agent.sources import SOURCES
    return "synthetic" in SOURCES


@pytest.mark.parametrize("how", ["SIGTERM", "SIGKILL"])
def test_skidvib_run_stops_or_dies_visibly(tmp_path, mqtt_broker, how):
    if not _simulator_ready():
        pytest.skip("the synthetic source is not registered yet")
    path = write_config(tmp_path, mqtt_broker.port)
    sub = Subscriber(mqtt_broker, f"{BASE}/#")
    p = subprocess.Popen([sys.executable, "-m", "agent", "run", "-c", str(path)],
                         stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        got = sub.collect_until(lambda ms: any(m.topic == f"{BASE}/measurements" for m in ms), 30)
        if not any(m.topic == f"{BASE}/measurements" for m in got):
            p.kill()
            pytest.fail("no measurement from skidvib run: " + p.communicate()[1][-2000:])
        p.send_signal(getattr(signal, how))
        rc = p.wait(20)
        tail = sub.collect_until(lambda ms: any(m.payload == b"offline" for m in ms), 10)
        assert any(m.topic == f"{BASE}/availability" and m.payload == b"offline" for m in tail)
        if how == "SIGTERM":
            assert rc == 0, p.stderr.read()[-2000:]
        else:
            assert rc == -signal.SIGKILL
    finally:
        if p.poll() is None:
            p.kill()
        sub.close()


def test_sighup_applies_live_keys_and_names_those_needing_a_restart(tmp_path, mqtt_broker):
    """SIGHUP to the real service: the health period applies at once; the topic prefix and
    state_dir cannot (the link and store are open) and are named in one warning line, in
    health (restart_needed) and in the service status, until a reload puts them back."""
    if not _simulator_ready():
        pytest.skip("the synthetic source is not registered yet")
    path = write_config(tmp_path, mqtt_broker.port)
    original = path.read_text()
    notify = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)  # as systemd's notify socket
    notify.bind(str(tmp_path / "notify.sock"))
    notify.settimeout(0.1)
    sub = Subscriber(mqtt_broker, f"{BASE}/#")
    p = subprocess.Popen([sys.executable, "-m", "agent", "run", "-c", str(path)],
                         stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True,
                         env={**os.environ, "NOTIFY_SOCKET": str(tmp_path / "notify.sock")})

    def health(ms, reloads):
        return [json.loads(m.payload) for m in ms if m.topic == f"{BASE}/health"
                and json.loads(m.payload)["reloads_count"] == reloads]

    def statuses() -> list[str]:
        out = []
        while True:
            try:
                text = notify.recv(4096).decode()
            except (socket.timeout, BlockingIOError):
                return out
            out += [line[7:] for line in text.splitlines() if line.startswith("STATUS=")]

    try:
        got = sub.collect_until(lambda ms: health(ms, 0) and any(m.topic.endswith("/measurements") for m in ms), 30)
        if not health(got, 0):
            p.kill()
            pytest.fail("no health from skidvib run: " + p.communicate()[1][-2000:])
        assert health(got, 0)[0]["restart_needed"] is False
        # [store] gets a 1 s health period (live) and a new state_dir; [mqtt] a new prefix
        path.write_text(original.replace('state_dir = "state"', 'state_dir = "state2"\nhealth_every_s = 1.0')
                        .replace('prefix = "skv"', 'prefix = "skv2"'))
        p.send_signal(signal.SIGHUP)
        got = sub.collect_until(lambda ms: len(health(ms, 1)) >= 3, 20)
        h = health(got, 1)
        assert len(h) >= 3  # every second now, not every 60 s
        assert h[0]["restart_needed"] is True
        assert h[0]["restart_needed_keys"] == ["store.state_dir", "mqtt.prefix"]
        assert h[0]["outbox_shed_kept_count"] == h[0]["outbox_dropped_new_count"] == h[0]["mqtt_rejected_count"] == 0
        assert all(m.topic.startswith(f"{BASE}/") for m in got)  # still the running topic tree
        assert not (tmp_path / "state2").exists()  # and the running state directory
        st = statuses()
        assert any(s.startswith("config reloaded; ") and s.endswith("restart needed for store.state_dir, mqtt.prefix")
                   for s in st), st
        # back to the running values (keeping the health period): nothing is pending any more
        path.write_text(original.replace('state_dir = "state"', 'state_dir = "state"\nhealth_every_s = 1.0'))
        p.send_signal(signal.SIGHUP)
        got = sub.collect_until(lambda ms: health(ms, 2), 20)
        assert health(got, 2) and health(got, 2)[0]["restart_needed"] is False
        assert health(got, 2)[0]["restart_needed_keys"] == []
        time.sleep(0.5)
        st = statuses()
        assert any(x.startswith("config reloaded; ") for x in st), st
        assert "restart needed" not in st[-1], st
        p.send_signal(signal.SIGTERM)
        assert p.wait(20) == 0
        log = p.stderr.read().splitlines()
        warned = [line for line in log if "event=reload_restart_needed" in line]
        assert len(warned) == 1, warned
        assert warned[0].startswith("level=warning ")
        assert "sections=store,mqtt keys=store.state_dir,mqtt.prefix" in warned[0] and "restart" in warned[0]
        reloads = [line for line in log if "event=reload " in line]
        assert [line.split("applied=")[1] for line in reloads] == ["store.health_every_s", "none"]
    finally:
        if p.poll() is None:
            p.kill()
        sub.close()
        notify.close()
