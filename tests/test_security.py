"""Request floods against the agent over a real broker: oversized and rapid requests are
refused (too_large / rate_limited) or dropped at the bounded inbound queue, every one is
accounted for, memory stays bounded and alerts keep flowing meanwhile.

ACL refusal (tests/test_remote.py::test_user_without_acl_rights_cannot_command), TLS
client certificates (tests/test_mqtt.py::test_tls_*), the request size and rate limits at
handler level (tests/test_remote.py) and the request-path static check and traversal
corpus (tests/test_fuzz.py) are not repeated here.
"""

from __future__ import annotations

import json
import queue
import time
from pathlib import Path

import pytest

pytest.importorskip("paho.mqtt.client", reason="paho-mqtt is a runtime dependency; run the suite in the project .venv (tests/setup-machine.sh)")
import paho.mqtt.client as paho  # noqa: E402
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from agent.mqtt import event_payload
from agent.outbox import Kind
from tests.broker import USERS, Subscriber
from tests.test_remote import BASE, agent  # noqa: F401 — the fixture


def _rss_kib() -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    return -1


def test_request_flood_is_bounded_and_accounted(agent):  # noqa: F811
    replies: queue.SimpleQueue = queue.SimpleQueue()
    c = paho.Client(paho.CallbackAPIVersion.VERSION2, protocol=paho.MQTTv5)
    c.username_pw_set("analyst", USERS["analyst"])
    c.on_message = lambda cl, ud, m: replies.put(json.loads(m.payload))
    c.connect("127.0.0.1", agent.broker.port)
    c.loop_start()
    c.subscribe(f"{BASE}/res/#", qos=1)
    time.sleep(0.2)
    sub = Subscriber(agent.broker, f"{BASE}/events")
    rss0 = _rss_kib()
    n_big, n_small = 60, 400
    big = b'{"pad":"' + b"x" * (512 * 1024) + b'"}'
    try:
        for i in range(n_big + n_small):
            props = Properties(PacketTypes.PUBLISH)
            props.ResponseTopic = f"{BASE}/res/flood"
            props.CorrelationData = str(i).encode()
            c.publish(f"{BASE}/req/list", big if i % 8 == 0 and i // 8 < n_big else b"{}", qos=0,
                      properties=props)
        # meanwhile the agent's alerts still go out
        agent.link.send("events", event_payload("state_change", t_utc_s=time.time(), state="alert",
                                                detail={"n": 1}), kind=Kind.KEPT)
        got = sub.collect_until(lambda ms: len(ms) >= 1, 10)
        assert len(got) == 1 and json.loads(got[0].payload)["detail"]["n"] == 1
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline:  # until every request is answered or dropped
            handled = agent.handler.counters["requests"]
            if handled + agent.link.counters["requests_dropped"] >= n_big + n_small:
                break
            time.sleep(0.1)
        time.sleep(0.5)
    finally:
        c.disconnect()
        c.loop_stop()
        sub.close()
    codes: dict = {}
    while not replies.empty():
        r = replies.get()
        code = "ok" if r["ok"] else r["error"]["code"]
        codes[code] = codes.get(code, 0) + 1
    handled = agent.handler.counters["requests"]
    dropped = agent.link.counters["requests_dropped"]
    print(f"flood: {n_big} x 512 KiB + {n_small} small requests; handled {handled}, dropped at the "
          f"queue {dropped}, replies {codes}, replies dropped "
          f"{agent.link.counters['replies_dropped']}, RSS +{(_rss_kib() - rss0) / 1024:.1f} MiB")
    # a request was either handled or counted as dropped: none vanished (QoS 0 from a local
    # client to a local broker is not lost)
    assert handled + dropped == n_big + n_small
    # each handled request got its one reply, published or (reply queue full) counted as dropped
    assert sum(codes.values()) + agent.link.counters["replies_dropped"] == handled
    assert set(codes) <= {"ok", "rate_limited", "too_large"}
    assert codes.get("rate_limited", 0) > 0  # the rate limit bit
    assert codes.get("ok", 0) <= 40 + 20 * 30  # burst + rate × the flood's duration (generous)
    assert agent.link.connected
    assert _rss_kib() - rss0 < 96 * 1024  # bounded queue: at most 32 requests held at once
