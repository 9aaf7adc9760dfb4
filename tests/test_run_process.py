"""``skidvib run`` as a real process against a real mosquitto: SIGTERM stops it cleanly
(offline published, exit 0); SIGKILL leaves the broker's last will (offline)."""

from __future__ import annotations

import signal
import subprocess
import sys

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
