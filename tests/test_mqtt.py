"""The MQTT link against a real mosquitto: topics and payloads, last will, no loss across
broker outage + agent restart, ACL, TLS with client certificates."""

from __future__ import annotations

import json
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

pytest.importorskip("paho.mqtt.client", reason="paho-mqtt is a runtime dependency; run the suite in the project .venv (tests/setup-machine.sh)")

from agent.errors import PublishError
from agent.model import Finding, MachineState, Severity
from agent.mqtt import (MqttLink, MqttSettings, Outgoing, Topics, encode, event_payload,
                        findings_payload, health_payload, measurements_payload, read_password,
                        state_payload)
from agent.outbox import Kind, Outbox
from tests.broker import USERS, Subscriber, mosquitto_sub

HERE = Path(__file__).resolve().parent
BASE = "skv/plant1/pump1"


def _pwfile(tmp_path, user="agent") -> str:
    p = tmp_path / f"{user}.pw"
    p.write_text(USERS[user] + "\n")
    p.chmod(0o600)
    return str(p)


def _link(tmp_path, broker, **kw) -> MqttLink:
    s = dict(host="127.0.0.1", port=broker.port, client_id="agent-test", username="agent",
             password_file=_pwfile(tmp_path), prefix="skv", site="plant1", asset="pump1",
             keepalive_s=5, reconnect_min_s=0.1, reconnect_max_s=0.5)
    s.update(kw)
    ob = Outbox(tmp_path / f"outbox-{s['client_id']}.sqlite", overflow_topic=f"{BASE}/events")
    return MqttLink(MqttSettings(**s), ob)


# ---------------------------------------------------------------- pure builders
def test_topics_and_builders():
    t = Topics("skv", "plant1", "pump1")
    assert t.state == f"{BASE}/state" and t.requests == f"{BASE}/req/+"
    assert t.request_command(f"{BASE}/req/list") == "list"
    assert t.request_command(f"{BASE}/req/../x") is None
    assert t.request_command("other/req/list") is None
    for bad in ("a/+", "#", "", "x y"):
        with pytest.raises(ValueError):
            Topics("skv", bad, "pump1")
    with pytest.raises(ValueError, match="unit suffix"):
        measurements_payload({"overall": 1.0}, t_utc_s=0, capture_seq=1, state="normal")
    m = measurements_payload({"vel_rms_mm_s": 2.5, "speed_hz": float("nan"), "kurtosis": 3.0},
                             t_utc_s=1.2345,
                             capture_seq=7, state=MachineState.NORMAL)
    assert json.loads(encode(m))["values"] == {"vel_rms_mm_s": 2.5, "speed_hz": None,
                                               "kurtosis": 3.0}
    f = Finding(code="unbalance", confidence=0.8, severity=Severity.ALERT, title="Unbalance")
    assert findings_payload([f], t_utc_s=0, state="alert")["findings"][0]["severity"] == "alert"


def test_password_file_errors(tmp_path):
    with pytest.raises(PublishError, match="password file"):
        read_password(str(tmp_path / "missing"))
    (tmp_path / "empty").write_text("\n")
    with pytest.raises(PublishError, match="empty"):
        read_password(str(tmp_path / "empty"))


# ---------------------------------------------------------------- real broker
def test_documented_topics_arrive(tmp_path, mqtt_broker):
    sub = Subscriber(mqtt_broker, "skv/#")
    cli = mosquitto_sub(mqtt_broker, "skv/plant1/pump1/+", count=6, timeout_s=8)
    time.sleep(0.3)
    link = _link(tmp_path, mqtt_broker)
    link.start()
    assert link.wait_connected(5)
    now = time.time()
    link.send("state", state_payload(MachineState.ALERT, now - 60, "1X up 8 dB", "check balance",
                                     "within_days", t_utc_s=now, severity="alert"),
              kind=Kind.KEPT, retain=True, replace_key="state")
    link.send("measurements", measurements_payload({"vel_rms_mm_s": 3.1, "speed_hz": 24.7},
                                                   t_utc_s=now, capture_seq=5, state="alert"),
              kind=Kind.PERIODIC)
    link.send("events", event_payload("state_change", t_utc_s=now, state="alert",
                                      previous_state="normal", severity="alert"), kind=Kind.KEPT)
    link.send("findings", findings_payload([], t_utc_s=now, state="alert"), kind=Kind.KEPT,
              retain=True, replace_key="findings")
    link.send("health", health_payload({"uptime_s": 12.0}, t_utc_s=now), kind=Kind.PERIODIC,
              retain=True, replace_key="health")
    got = {m.topic: m for m in sub.collect(6, 5)}
    assert set(got) == {f"{BASE}/{x}" for x in ("availability", "state", "measurements",
                                                 "events", "findings", "health")}
    assert got[f"{BASE}/availability"].payload == b"online"
    state = json.loads(got[f"{BASE}/state"].payload)
    assert {"schema", "state", "since_utc_s", "reason", "action", "urgency"} <= set(state)
    assert state["state"] == "alert" and state["schema"] == 1
    ev = json.loads(got[f"{BASE}/events"].payload)
    assert ev["type"] == "state_change" and len(ev["id"]) == 32 and ev["t_utc_s"] > 0
    assert got[f"{BASE}/events"].qos == 1
    # the same through mosquitto_sub (an independent client implementation)
    out, _ = cli.communicate(timeout=10)
    lines = dict(line.split(" ", 1) for line in out.splitlines())
    assert lines[f"{BASE}/availability"] == "online"
    assert json.loads(lines[f"{BASE}/state"])["reason"] == "1X up 8 dB"
    # retained state is there for an HMI that connects later
    late = Subscriber(mqtt_broker, f"{BASE}/state")
    msg = late.collect(1, 3)[0]
    assert msg.retain and json.loads(msg.payload)["state"] == "alert"
    link.stop()
    assert link.outbox.stats().depth == 0
    avail = sub.collect(1, 3, topic=f"{BASE}/availability")
    assert avail and avail[0].payload == b"offline"  # clean stop says offline too
    sub.close(), late.close()


def test_send_many_one_capture_in_order(tmp_path, mqtt_broker):
    """One capture's messages queued together (one outbox transaction) arrive in that order,
    with their ids, retain flags and the outbox emptied by the PUBACKs."""
    sub = Subscriber(mqtt_broker, f"{BASE}/+")
    link = _link(tmp_path, mqtt_broker)
    now = time.time()
    ev = event_payload("state_change", t_utc_s=now, state="alert", previous_state="normal")
    out = [Outgoing("state", state_payload("alert", now, "1X up", "check", "soon", t_utc_s=now),
                    Kind.KEPT, retain=True, replace_key="state"),
           Outgoing("measurements", measurements_payload({"vel_rms_mm_s": 3.1}, t_utc_s=now,
                                                         capture_seq=9, state="alert"), Kind.PERIODIC),
           Outgoing("events", ev, Kind.KEPT),
           Outgoing("findings", findings_payload([], t_utc_s=now, state="alert"), Kind.KEPT,
                    retain=True, replace_key="findings")]
    seqs = link.send_many(out)  # queued before the link even starts: on disk, sent once connected
    assert seqs == sorted(seqs) and len(set(seqs)) == 4 and link.outbox.stats().depth == 4
    link.start()
    got = [m for m in sub.collect(5, 10) if not m.topic.endswith("/availability")]
    assert [m.topic.rsplit("/", 1)[1] for m in got] == ["state", "measurements", "events", "findings"]
    assert json.loads(got[2].payload)["id"] == ev["id"]
    late = Subscriber(mqtt_broker, f"{BASE}/findings")  # retained: there for a later client
    assert late.collect(1, 3)[0].retain
    link.stop()
    assert link.outbox.stats().depth == 0
    sub.close(), late.close()


def _start_proc(tmp_path, broker, state_dir):
    p = subprocess.Popen([sys.executable, str(HERE / "publisher_proc.py"), "--port",
                          str(broker.port), "--state-dir", str(state_dir), "--password-file",
                          _pwfile(tmp_path)], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                         text=True)
    assert p.stdout.readline().strip() == "ready"
    return p


def _cmd(p, line):
    p.stdin.write(line + "\n")
    p.stdin.flush()
    assert p.stdout.readline().strip() == "ok"


def test_kill9_publishes_last_will(tmp_path, mqtt_broker):
    sub = Subscriber(mqtt_broker, f"{BASE}/availability")
    p = _start_proc(tmp_path, mqtt_broker, tmp_path / "state")
    assert sub.collect(1, 5)[0].payload == b"online"
    p.send_signal(signal.SIGKILL)
    p.wait()
    # keepalive 5 s is not needed: the socket closes and the broker sends the will at once
    msg = sub.collect(1, 5)
    assert msg and msg[0].payload == b"offline" and msg[0].topic == f"{BASE}/availability"
    sub.close()


def test_no_alert_lost_across_outage_and_agent_restart(tmp_path, mqtt_broker):
    """Broker stopped while alerts are produced, agent killed (-9) and restarted meanwhile,
    broker restarted: every alert arrives, first arrivals in order, duplicates only by id."""
    sub = Subscriber(mqtt_broker, f"{BASE}/events", client_id="hmi-persistent", clean=False)
    state = tmp_path / "state"
    p1 = _start_proc(tmp_path, mqtt_broker, state)
    _cmd(p1, "alert 0 5")                      # broker up
    first = sub.collect(5, 5)
    assert [json.loads(m.payload)["detail"]["n"] for m in first] == list(range(5))
    mqtt_broker.stop()                          # outage
    _cmd(p1, "alert 5 10")                      # queued on disk only
    p1.send_signal(signal.SIGKILL)
    p1.wait()
    p2 = _start_proc(tmp_path, mqtt_broker, state)   # agent restarted, broker still down
    _cmd(p2, "alert 15 10")
    time.sleep(0.3)
    mqtt_broker.start()                         # same port, persistent sessions restored
    seen = {json.loads(m.payload)["id"]: json.loads(m.payload)["detail"]["n"] for m in first}

    def distinct(msgs):
        return len({json.loads(m.payload)["id"] for m in msgs} - set(seen)) >= 20

    got = sub.collect_until(distinct, 10)
    # an alert the broker delivered just before it stopped may come again (its PUBACK was
    # lost with the agent): a QoS 1 duplicate, recognised by its id
    ns, ids = [], dict(seen)
    for m in got:
        ev = json.loads(m.payload)
        n = ev["detail"]["n"]
        if ev["id"] in ids:                     # a QoS 1 duplicate: same id, same content
            assert ids[ev["id"]] == n
            continue
        ids[ev["id"]] = n
        ns.append(n)
        if len(ns) == 20:
            break
    assert ns == list(range(5, 25)), ns        # none missing, in order
    _cmd_stop(p2)
    sub.close()


def _cmd_stop(p):
    p.stdin.write("stop\n")
    p.stdin.flush()
    assert p.stdout.readline().strip() == "stopped"
    p.wait(10)


def test_broker_hang_detected_and_resumed(tmp_path, mqtt_broker):
    sub = Subscriber(mqtt_broker, f"{BASE}/events", client_id="hmi-hang", clean=False)
    link = _link(tmp_path, mqtt_broker, keepalive_s=2)
    link.start()
    assert link.wait_connected(5)
    mqtt_broker.pause()                        # SIGSTOP: TCP stays up, nothing answers
    for n in range(5):
        link.send("events", event_payload("state_change", t_utc_s=time.time(), state="alert",
                                          detail={"n": n}), kind=Kind.KEPT)
    t0 = time.monotonic()
    while link.connected and time.monotonic() - t0 < 15:
        time.sleep(0.1)
    assert not link.connected                  # keepalive 2 s → lost after ~2 × 2 s
    assert link.outbox.stats().depth == 5      # nothing acknowledged, nothing deleted
    mqtt_broker.resume()
    t_resume = time.monotonic()
    msgs = sub.collect_until(lambda ms: {json.loads(m.payload)["detail"]["n"] for m in ms}
                             >= set(range(5)), 15)
    print(f"hang detected after {t_resume - t0:.1f} s; delivered "
          f"{time.monotonic() - t_resume:.1f} s after resume")
    got = {json.loads(m.payload)["detail"]["n"] for m in msgs}
    assert got == set(range(5))
    t0 = time.monotonic()
    while link.outbox.stats().depth and time.monotonic() - t0 < 5:
        time.sleep(0.05)
    assert link.outbox.stats().depth == 0
    link.stop(), sub.close()


def test_reply_dropped_when_not_connected(tmp_path, mqtt_broker):
    mqtt_broker.stop()
    link = _link(tmp_path, mqtt_broker)
    link.start()
    assert not link.reply(f"{BASE}/res/x", b"{}")
    assert link.counters["replies_dropped"] == 1
    assert link.send("events", event_payload("x", t_utc_s=0, state="normal"),
                     kind=Kind.KEPT) is not None  # durable messages still queue
    time.sleep(0.5)
    assert "connect" in link.health()["mqtt_last_error"]
    link.stop(0.5)


def test_bad_password_reported(tmp_path, mqtt_broker):
    pw = tmp_path / "wrong.pw"
    pw.write_text("nope\n")
    link = _link(tmp_path, mqtt_broker, password_file=str(pw))
    link.start()
    assert not link.wait_connected(1.5)
    assert "Not authorized" in link.last_error or "authori" in link.last_error.lower()
    link.stop(0.5)


def test_protocol_311(tmp_path, mqtt_broker):
    sub = Subscriber(mqtt_broker, f"{BASE}/events")
    link = _link(tmp_path, mqtt_broker, protocol="3.1.1")
    link.start()
    assert link.wait_connected(5) and link.protocol == "3.1.1"
    link.send("events", event_payload("state_change", t_utc_s=1.0, state="normal"),
              kind=Kind.KEPT)
    assert len(sub.collect(1, 5)) == 1
    link.stop(), sub.close()


def test_acl_denied_publish_is_rejected_not_retried(tmp_path, mqtt_broker):
    """MQTT 5: the broker answers a publish outside the ACL with 'Not authorized'; the row is
    removed and counted instead of being retried for ever."""
    link = _link(tmp_path, mqtt_broker, prefix="elsewhere")
    link.start()
    assert link.wait_connected(5)
    link.send("events", event_payload("x", t_utc_s=0, state="normal"), kind=Kind.KEPT)
    t0 = time.monotonic()
    while link.counters["rejected"] == 0 and time.monotonic() - t0 < 5:
        time.sleep(0.05)
    assert link.counters["rejected"] == 1 and link.outbox.stats().depth == 0
    link.stop(0.5)


def test_tls_client_certificate(tmp_path, tls_broker, pki):
    sub = Subscriber(tls_broker, f"{BASE}/events")
    link = _link(tmp_path, tls_broker, host="localhost", port=tls_broker.tls_port,
                 tls_ca_file=str(pki.ca_crt), tls_cert_file=str(pki.client_crt),
                 tls_key_file=str(pki.client_key))
    link.start()
    assert link.wait_connected(5)
    link.send("events", event_payload("tls", t_utc_s=1.0, state="normal"), kind=Kind.KEPT)
    assert json.loads(sub.collect(1, 5)[0].payload)["type"] == "tls"
    link.stop(), sub.close()


def test_tls_wrong_ca_refused(tmp_path, tls_broker, pki):
    link = _link(tmp_path, tls_broker, host="localhost", port=tls_broker.tls_port,
                 tls_ca_file=str(pki.other_ca_crt), tls_cert_file=str(pki.client_crt),
                 tls_key_file=str(pki.client_key))
    link.start()
    assert not link.wait_connected(1.5)
    assert "certificate verify failed" in link.last_error
    link.stop(0.5)
    # the same with mosquitto_pub: refused
    r = subprocess.run(["mosquitto_pub", "-h", "localhost", "-p", str(tls_broker.tls_port),
                        "--cafile", str(pki.other_ca_crt), "--cert", str(pki.client_crt),
                        "--key", str(pki.client_key), "-u", "agent", "-P", USERS["agent"],
                        "-t", f"{BASE}/x", "-m", "x"], capture_output=True, timeout=10)
    assert r.returncode != 0


def test_settings_from_config(tmp_path):
    from agent.config import parse_config
    from agent.errors import ConfigError
    from agent.mqtt import settings_from_config, topic_level
    from agent.store import Store

    cfg = parse_config({"asset": {"site": "Plant 3 / North", "tag": "P-101A"},
                        "mqtt": {"prefix": "factory/vib", "password_file": "secret.pw",
                                 "protocol": "3.1.1"},
                        "store": {"state_dir": "st", "trend_raw_days": 7}},
                       str(tmp_path / "agent.toml"))
    s = settings_from_config(cfg)
    assert s.topics.base == "factory/vib/plant_3_north/p-101a"
    assert s.password_file == str((tmp_path / "secret.pw").resolve()) and s.protocol == "3.1.1"
    assert s.client_id == "skidvib-p-101a"
    st = Store.from_config(cfg)
    assert st.state_dir == (tmp_path / "st").resolve() and st.raw_keep_s == 7 * 86400
    assert topic_level("  ") == "unnamed"
    with pytest.raises(ConfigError) as info:
        parse_config({"mqtt": {"prefix": "a/+", "protocol": "4", "site": "x y"},
                      "store": {"trend_raw_days": 30, "trend_hourly_days": 10}})
    text = str(info.value)
    for key in ("mqtt.prefix", "mqtt.protocol", "mqtt.site", "store.trend_hourly_days"):
        assert key in text


def test_falls_back_to_311_when_broker_refuses_5(tmp_path):
    """mosquitto 2 always speaks MQTT 5, so a broker that knows only 3.1.1 is played by a
    socket that answers a version-5 CONNECT with the 3.1.1 CONNACK 'unacceptable protocol
    version' (return code 1, MQTT 3.1.1 spec section 3.2.2.3) and accepts version 4."""
    import socket
    import threading

    srv = socket.socket()
    srv.bind(("127.0.0.1", 0))
    srv.listen(4)
    srv.settimeout(10)
    levels, conns = [], []

    def serve():
        try:
            while len(levels) < 2:
                c, _ = srv.accept()
                conns.append(c)
                data = c.recv(4096)
                level = data[2 + 2 + 4]  # fixed header (2), name length (2), "MQTT", level
                levels.append(level)
                c.sendall(b"\x20\x02\x00\x01" if level == 5 else b"\x20\x02\x00\x00")
                if level == 5:
                    c.close()
        except OSError:
            pass

    threading.Thread(target=serve, daemon=True).start()
    link = MqttLink(MqttSettings(host="127.0.0.1", port=srv.getsockname()[1], client_id="fb",
                                 reconnect_min_s=0.1, reconnect_max_s=0.3),
                    Outbox(tmp_path / "o.sqlite"))
    link.start()
    try:
        assert link.wait_connected(5)
        assert link.protocol == "3.1.1" and levels == [5, 4]
    finally:
        link.stop(0.2)
        for c in conns:
            c.close()
        srv.close()
