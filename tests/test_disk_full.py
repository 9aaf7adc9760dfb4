"""Disk full: the state directory on a small tmpfs (``mount -t tmpfs -o size=...``, as
root; skipped with the reason otherwise). The daemon, fed captures, fills it to the
last byte mid-run: it keeps monitoring and publishing (state changes, measurements
and events still reach a real broker), reports the storage trouble in its health
message, and goes back to durable operation when space returns.
"""

from __future__ import annotations

import dataclasses
import json
import subprocess
import threading
import time

import pytest

from agent.config import load_config
from agent.daemon import Daemon
from tests.broker import Subscriber
from tests.conftest import fill_disk
from tests.test_daemon import HookedSource, write_config

BASE = "skv/plant1/p-201"


@pytest.fixture
def small_fs(tmp_path):
    mnt = tmp_path / "disk"
    mnt.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=8m", "tmpfs", str(mnt)], capture_output=True)
    if r.returncode != 0:
        pytest.skip("cannot mount a small tmpfs here (needs root): " + r.stderr.decode()[:80])
    yield mnt
    subprocess.run(["umount", "-l", str(mnt)], check=False)


def test_daemon_carries_on_through_a_full_disk(tmp_path, small_fs, mqtt_broker):
    cfg_path = write_config(tmp_path, mqtt_broker.port)
    text = cfg_path.read_text().replace(f'state_dir = "{tmp_path / "state"}"', f'state_dir = "{small_fs / "state"}"')
    cfg_path.write_text(text)
    cfg = load_config(cfg_path)
    cfg = dataclasses.replace(cfg, store=dataclasses.replace(cfg.store, health_every_s=0.01),
                              source=dataclasses.replace(cfg.source, interval_s=0.05))
    filler = small_fs / "filler"
    # healthy, full disk from capture 4 (a danger episode while full), space back from capture 10
    script = [1.0, 1.0, 1.0, 1.0, 2.5, 2.5, 1.0, 1.0, 1.0, 1.0, 2.5, 2.5, 1.0, 1.0, 1.0]
    src = HookedSource(cfg, script, {4: lambda: fill_disk(filler), 10: lambda: filler.unlink()})
    sub = Subscriber(mqtt_broker, "skv/#")
    d = src.daemon = Daemon(cfg, source_factory=lambda c: src)
    t = threading.Thread(target=d.run)
    t.start()
    t.join(120)
    assert not t.is_alive()
    msgs = sub.collect_until(lambda ms: any(m.topic == f"{BASE}/availability" and m.payload == b"offline"
                                            for m in ms), 15)
    sub.close()
    by: dict[str, list] = {}
    for m in msgs:
        by.setdefault(m.topic.rsplit("/", 1)[-1], []).append(json.loads(m.payload) if m.payload[:1] == b"{" else m.payload)
    # monitoring went on: every capture analysed
    assert d.health.captures_done == len(script)
    # the storage trouble was seen and reported
    assert d.health.store_errors > 0
    health = by["health"]
    assert any(h["store_errors_count"] > 0 and "disk full" in h["storage_problem"] for h in health), health
    assert health[-1]["storage_problem"] == ""  # cleared once writes worked again
    # publishing went on: both danger episodes (one while the disk was full) reached the broker
    quiet = {"normal", "learning"}
    changes = [("quiet" if e["previous_state"] in quiet else e["previous_state"],
                "quiet" if e["state"] in quiet else e["state"]) for e in by["events"] if e["type"] == "state_change"]
    assert changes.count(("quiet", "danger")) == 2 and changes.count(("danger", "quiet")) == 2, changes
    assert len(by["measurements"]) == len(script)
    # recovered: rows after the space came back are stored; the outbox drained
    import sqlite3

    db = sqlite3.connect(small_fs / "state" / "trend.sqlite")
    assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    ts = [r[0] for r in db.execute("SELECT t_utc_s FROM trend ORDER BY rowid")]
    assert ts[-1] == src.t0 + 60.0 * len(script)  # the last capture's row is there
    assert len(ts) >= 3 + 5
    ob = sqlite3.connect(small_fs / "state" / "outbox.sqlite")
    assert ob.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    assert ob.execute("SELECT COUNT(*) FROM outbox").fetchone()[0] == 0
    assert d.link.counters["outbox_bypassed"] > 0  # published straight while the disk was full


def test_failed_delete_of_an_acknowledged_row_does_not_end_the_sender(tmp_path, mqtt_broker):
    """Seen once in the daemon test above: on a full disk even the DELETE of an acknowledged
    row fails (it needs journal space), and the exception ended the link's sender thread, so
    nothing was published any more. The disk is made to refuse deletes here by an outbox whose
    ``ack`` raises what the real one raised then (the full-disk timing is not reproducible)."""
    from agent.errors import StoreError
    from agent.mqtt import MqttLink, MqttSettings, event_payload
    from agent.outbox import Kind, Outbox
    from tests.broker import USERS

    class FullDiskOnDelete(Outbox):
        refuse = True

        def ack(self, seq, msg_id=None):
            if self.refuse:
                raise StoreError(f"outbox {self.path}: cannot delete: database or disk is full")
            return super().ack(seq, msg_id)

    pw = tmp_path / "agent.pw"
    pw.write_text(USERS["agent"] + "\n")
    ob = FullDiskOnDelete(tmp_path / "o.sqlite")
    link = MqttLink(MqttSettings(host="127.0.0.1", port=mqtt_broker.port, client_id="agent-df",
                                 username="agent", password_file=str(pw), prefix="skv",
                                 site="plant1", asset="p-201", reconnect_min_s=0.1), ob)
    sub = Subscriber(mqtt_broker, f"{BASE}/events")
    link.start()
    try:
        assert link.wait_connected(5)
        for n in range(5):
            link.send("events", event_payload("x", t_utc_s=0, state="alert", detail={"n": n}), kind=Kind.KEPT)
        assert len(sub.collect(5, 5)) == 5
        time.sleep(0.3)
        assert link._thread.is_alive() and ob.stats().depth == 5  # kept, sender alive
        ob.refuse = False  # space again: the next acknowledgement clears the backlog
        link.send("events", event_payload("x", t_utc_s=0, state="alert", detail={"n": 5}), kind=Kind.KEPT)
        assert len(sub.collect(1, 5)) == 1
        deadline = time.monotonic() + 5
        while ob.stats().depth and time.monotonic() < deadline:
            time.sleep(0.05)
        assert ob.stats().depth == 0
    finally:
        link.stop(2)
        sub.close()
