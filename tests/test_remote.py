"""Remote requests against a real mosquitto: the analyst CLI pulls a snapshot byte for byte;
bad requests get error replies and change nothing; users without ACL rights cannot command."""

from __future__ import annotations

import hashlib
import json
import queue
import subprocess
import sys
import time
import types

import numpy as np
import pytest

pytest.importorskip("paho.mqtt.client", reason="paho-mqtt is a runtime dependency; run the suite in the project .venv (tests/setup-machine.sh)")
import paho.mqtt.client as paho  # noqa: E402
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from agent.mqtt import Inbound, MqttLink, MqttSettings, Topics
from agent.outbox import Outbox
from agent.remote import CHUNK_BYTES, BasicControls, RateLimit, RemoteClient, RemoteService, \
    RequestHandler
from agent.store import Store
from tests.broker import USERS

T0 = 1_796_169_600.0
BASE = "skv/plant1/pump1"
TOPICS = Topics("skv", "plant1", "pump1")


def _pw(tmp_path, user):
    p = tmp_path / f"{user}.pw"
    p.write_text(USERS[user] + "\n")
    return str(p)


def _snap(store, t, reason="scheduled", n=60_000):
    x = np.random.default_rng(int(t) % 97).normal(0, 2.0, n)  # 240 kB of float32: 5 chunks
    return store.save_snapshot(t_utc_s=t, reason=reason, waveform_ms2=x, fs_hz=25600,
                               spectra={"f_hz": np.arange(100.0)}, analysis={"state": "alert"})


def _digests(store):
    out = {}
    for s in store.list_snapshots():
        for f in s.files:
            out[(s.snapshot_id, f)] = hashlib.sha256(
                store.snapshot_file(s.snapshot_id, f).read_bytes()).hexdigest()
    return out


@pytest.fixture
def agent(tmp_path, mqtt_broker):
    store = Store(tmp_path / "state")
    sid = _snap(store, T0)
    relearns = []
    controls = BasicControls(snapshot_fn=lambda: _snap(store, time.time(), "on_request", 1000),
                             relearn_fn=lambda: relearns.append(1), ack_fn=store.unpin_alarm)
    controls.open_alarms["A1"] = {"state": "alert"}
    store.pin(sid, "A1")
    s = MqttSettings(host="127.0.0.1", port=mqtt_broker.port, client_id="agent-remote",
                     username="agent", password_file=_pw(tmp_path, "agent"), prefix="skv",
                     site="plant1", asset="pump1", reconnect_min_s=0.1, reconnect_max_s=0.5)
    link = MqttLink(s, Outbox(store.outbox_path))
    handler = RequestHandler(TOPICS, store, controls)
    svc = RemoteService(link, handler)
    link.start()
    assert link.wait_connected(5)
    svc.start()
    yield types.SimpleNamespace(store=store, sid=sid, controls=controls, link=link,
                                handler=handler, relearns=relearns, broker=mqtt_broker,
                                tmp=tmp_path)
    svc.stop()
    link.stop(1)


def _cli(agent, *args, user="analyst", timeout_s=5):
    cmd = [sys.executable, "-m", "agent", "remote", "--broker", f"127.0.0.1:{agent.broker.port}",
           "--prefix", "skv", "--site", "plant1", "--asset", "pump1", "--user", user,
           "--password-file", _pw(agent.tmp, user), "--timeout-s", str(timeout_s), *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=30)


def test_cli_list_and_pull_byte_identical(agent, tmp_path):
    r = _cli(agent, "list")
    assert r.returncode == 0, r.stderr
    listed = json.loads(r.stdout)["snapshots"]
    assert [s["snapshot_id"] for s in listed] == [agent.sid]
    r = _cli(agent, "pull", agent.sid, "-o", str(tmp_path / "pulled"))
    assert r.returncode == 0, r.stderr
    stored = _digests(agent.store)
    got = tmp_path / "pulled" / agent.sid
    assert sorted(p.name for p in got.iterdir()) == sorted(f for _, f in stored)
    for (_, name), sha in stored.items():
        assert hashlib.sha256((got / name).read_bytes()).hexdigest() == sha
    wav = agent.store.snapshot_file(agent.sid, "waveform.wav").stat().st_size
    assert wav > 4 * CHUNK_BYTES  # really went in several chunks


def test_mqtt311_requester_uses_reply_to(agent):
    c = RemoteClient("127.0.0.1", agent.broker.port, TOPICS, username="analyst",
                     password=USERS["analyst"], protocol="3.1.1", timeout_s=5)
    try:
        rep = c.request("list")
    finally:
        c.close()
    assert rep["ok"] and rep["correlation_id"] and rep["result"]["snapshots"]


def test_commands_do_what_they_say(agent, tmp_path):
    r = _cli(agent, "mode", "maintenance", "--duration-s", "3600")
    assert r.returncode == 0, r.stderr
    assert agent.controls.current_mode() == "maintenance"
    until = json.loads(r.stdout)["until_utc_s"]
    assert until == pytest.approx(time.time() + 3600, abs=30)
    assert _cli(agent, "ack", "--alarm-id", "A1", "--note", "seen").returncode == 0
    assert "A1" in agent.controls.acked and not agent.controls.open_alarms
    assert not agent.store.pinned_ids()  # the alarm's snapshot may now age out
    r = _cli(agent, "snapshot")
    new = json.loads(r.stdout)["snapshot_id"]
    assert new.endswith("-on_request") and agent.store.resolve(new) is not None
    r = _cli(agent, "feedback", agent.sid, "--found", "outer race spall, drive end",
             "--done", "bearing replaced", "--finding-code", "bearing_outer_race",
             "--confirmed", "--relearn")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert out["stored"] == "feedback-1.json" and out["relearn_started"] and agent.relearns
    fb = json.loads(agent.store.snapshot_file(agent.sid, "feedback-1.json").read_text())
    assert fb["done"] == "bearing replaced" and fb["confirmed"] is True


class _Requester:
    """A raw MQTT 5 client (the analyst user) for sending hand-made requests."""

    def __init__(self, broker, user="analyst", protocol=paho.MQTTv5):
        self.replies: queue.SimpleQueue = queue.SimpleQueue()
        self.c = paho.Client(paho.CallbackAPIVersion.VERSION2, protocol=protocol)
        self.c.username_pw_set(user, USERS[user])
        self.c.on_message = lambda cl, ud, m: self.replies.put(m)
        self.c.connect("127.0.0.1", broker.port)
        self.c.loop_start()
        self.c.subscribe(f"{BASE}/res/#", qos=1)
        self.c.subscribe(f"{BASE}/state", qos=1)
        time.sleep(0.2)

    def ask(self, cmd, payload, reply_topic=f"{BASE}/res/t1", corr=b"c-1", timeout_s=3.0):
        props = Properties(PacketTypes.PUBLISH)
        if reply_topic:
            props.ResponseTopic = reply_topic
        props.CorrelationData = corr
        if not isinstance(payload, bytes):
            payload = json.dumps(payload).encode()
        self.c.publish(f"{BASE}/req/{cmd}", payload, qos=1, properties=props)
        try:
            return self.replies.get(timeout=timeout_s)
        except queue.Empty:
            return None

    def close(self):
        self.c.disconnect()
        self.c.loop_stop()


def test_bad_requests_get_error_replies_and_change_nothing(agent):
    sid = agent.sid
    before = _digests(agent.store)
    cases = [
        ("list", b"{not json", "bad_json"),
        ("list", b"\xff\xfe", "bad_json"),
        ("list", b"[1, 2]", "not_object"),
        ("list", b'{"pad": "' + b"x" * 5000 + b'"}', "too_large"),
        ("frobnicate", {}, "unknown_command"),
        ("list", {"limit": True}, "bad_value"),
        ("get", {"snapshot_id": "../../trend.sqlite"}, "bad_value"),
        ("get", {"snapshot_id": "/etc/passwd"}, "bad_value"),
        ("get", {"snapshot_id": "20991231T000000000Z-scheduled"}, "unknown_snapshot"),
        ("chunk", {"snapshot_id": sid, "file": "../../trend.sqlite", "index": 0},
         "unknown_file"),
        ("chunk", {"snapshot_id": sid, "file": "waveform.wav", "index": 999}, "bad_value"),
        ("chunk", {"snapshot_id": sid, "file": "waveform.wav"}, "missing_field"),
        ("mode", {"mode": "maintenance"}, "missing_field"),
        ("mode", {"mode": "sleep"}, "bad_value"),
        ("mode", {"mode": "maintenance", "duration_s": 1e9}, "bad_value"),
        ("mode", {"mode": "learn", "extra": 1}, "unknown_field"),
        ("ack", {"alarm_id": "nope"}, "unknown_alarm"),
        ("ack", {"alarm_id": "../x y"}, "bad_value"),
        ("feedback", {"snapshot_id": sid, "found": "x"}, "missing_field"),
        ("feedback", {"snapshot_id": sid, "found": 5, "done": "y"}, "bad_value"),
        ("feedback", {"snapshot_id": "..", "found": "a", "done": "b"}, "bad_value"),
    ]
    rq = _Requester(agent.broker)
    try:
        for i, (cmd, payload, code) in enumerate(cases):
            corr = f"c-{i}".encode()
            msg = rq.ask(cmd, payload, corr=corr)
            assert msg is not None, (cmd, payload)
            rep = json.loads(msg.payload)
            assert msg.topic == f"{BASE}/res/t1"
            assert msg.properties.CorrelationData == corr
            assert rep["ok"] is False and rep["error"]["code"] == code, (cmd, payload, rep)
        # a reply topic outside <base>/res/ is refused; the answer goes to res/errors
        msg = rq.ask("list", {}, reply_topic=f"{BASE}/state")
        assert msg.topic == f"{BASE}/res/errors"
        assert json.loads(msg.payload)["error"]["code"] == "bad_reply_topic"
        msg = rq.ask("list", {}, reply_topic=None)
        assert json.loads(msg.payload)["error"]["code"] == "no_reply_topic"
        assert rq.replies.empty()  # nothing was published on the state topic
    finally:
        rq.close()
    assert _digests(agent.store) == before
    assert agent.controls.current_mode() == "monitor"
    assert list(agent.controls.open_alarms) == ["A1"] and not agent.controls.feedback
    assert not agent.relearns


@pytest.mark.parametrize("user", ["intruder", "hmi"])
def test_user_without_acl_rights_cannot_command(agent, user):
    rq = _Requester(agent.broker, user=user, protocol=paho.MQTTv311)
    try:
        props = None
        rq.c.publish(f"{BASE}/req/mode", json.dumps(
            {"mode": "maintenance", "duration_s": 3600, "reply_to": f"{BASE}/res/x",
             "correlation_id": "x"}), qos=1, properties=props)
        time.sleep(1.0)
    finally:
        rq.close()
    assert agent.controls.current_mode() == "monitor"
    assert agent.handler.counters["requests"] == 0  # the broker never delivered it
    # while the analyst may
    r = _cli(agent, "mode", "learn")
    assert r.returncode == 0 and agent.controls.current_mode() == "learn"


def test_rate_limit(tmp_path):
    now = [0.0]
    store = Store(tmp_path)
    h = RequestHandler(TOPICS, store, BasicControls(snapshot_fn=lambda: ""),
                       rate=RateLimit(rate_per_s=1.0, burst=3), monotonic=lambda: now[0])
    req = Inbound("list", b"{}", f"{BASE}/res/a", b"1", "5")
    codes = [json.loads(h.handle(req).payload).get("error", {}).get("code") for _ in range(4)]
    assert codes == [None, None, None, "rate_limited"]
    now[0] = 1.0  # one token back after 1 s at 1/s
    assert json.loads(h.handle(req).payload)["ok"]


def test_cli_errors(agent, tmp_path):
    r = _cli(agent, "pull", "20991231T000000000Z-scheduled", "-o", str(tmp_path / "x"))
    assert r.returncode == 1 and "unknown_snapshot" in r.stderr
    r = _cli(agent, "list", user="intruder", timeout_s=1)  # may not publish requests: no reply
    assert r.returncode == 3
