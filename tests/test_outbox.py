"""The durable outbox on its own: order, durability across reopen, bound and shed policy,
corruption handling. (Delivery through a real broker is in test_mqtt.py.)"""

from __future__ import annotations

import json
import random
import sqlite3
from dataclasses import astuple

import pytest

from agent.outbox import Kind, NewMessage, Outbox, OutboxStats
from tests.conftest import fill_disk

TOPIC = "skv/plant1/pump1/events"


def _fill(ob: Outbox, kind: Kind, n: int, size: int = 200, first: int = 0) -> list[int]:
    return [ob.enqueue(TOPIC, json.dumps({"n": i, "pad": "x" * size}).encode(), kind=kind,
                       msg_id=f"{kind.name}-{i}") for i in range(first, first + n)]


def test_fifo_ack_and_survives_reopen(tmp_path):
    ob = Outbox(tmp_path / "o.sqlite")
    seqs = _fill(ob, Kind.KEPT, 5)
    assert seqs == sorted(seqs)
    assert [m.msg_id for m in ob.peek()] == [f"KEPT-{i}" for i in range(5)]
    assert ob.ack(seqs[0]) and not ob.ack(seqs[0])  # second ack: already gone
    # an ack with a stale id (row rewritten meanwhile) deletes nothing
    assert not ob.ack(seqs[1], "some-other-id")
    ob.close()
    ob2 = Outbox(tmp_path / "o.sqlite")  # "agent restarted"
    assert [m.msg_id for m in ob2.peek()] == [f"KEPT-{i}" for i in range(1, 5)]
    assert [m.msg_id for m in ob2.peek(after_seq=seqs[2], limit=1)] == ["KEPT-3"]
    assert ob2._db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert ob2._db.execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL


def test_periodic_shed_first_then_kept_with_overflow_notice(tmp_path):
    ob = Outbox(tmp_path / "o.sqlite", max_bytes=8192, overflow_topic=TOPIC)
    _fill(ob, Kind.KEPT, 10, first=0)          # ~2.5 kB of alerts
    _fill(ob, Kind.PERIODIC, 30, first=0)      # measurements fill the rest
    st = ob.stats()
    assert st.bytes <= 8192
    assert st.shed_periodic > 0 and st.shed_kept == 0
    kept = [m for m in ob.peek(limit=1000) if m.kind == Kind.KEPT]
    assert len(kept) == 10  # measurements went first; no alert lost
    # now alerts only: measurements are all shed, then the oldest alerts make room
    _fill(ob, Kind.KEPT, 40, first=10)
    st = ob.stats()
    assert st.shed_kept > 0
    msgs = ob.peek(limit=1000)
    assert all(m.kind == Kind.KEPT for m in msgs)
    note = json.loads(msgs[0].payload)  # the notice stands where the first dropped alert was
    assert note["type"] == "outbox_overflow"
    assert note["dropped_count"] == st.shed_kept
    assert note["first_dropped_id"] == "KEPT-0"
    survivors = [json.loads(m.payload)["n"] for m in msgs[1:]]
    assert survivors == list(range(50 - len(survivors), 50))  # newest kept, in order
    assert note["last_dropped_id"] == f"KEPT-{49 - len(survivors)}"
    # dropped + surviving + nothing else = every alert accounted for
    assert note["dropped_count"] + len(survivors) == 50
    # the bound holds up to the one notice (documented)
    assert st.bytes <= 8192 + len(msgs[0].payload) + len(TOPIC)


def test_new_periodic_dropped_when_only_alerts_remain(tmp_path):
    ob = Outbox(tmp_path / "o.sqlite", max_bytes=4096, overflow_topic=TOPIC)
    _fill(ob, Kind.KEPT, 15)  # ~3.5 kB
    before = ob.stats()
    assert ob.enqueue(TOPIC, b"x" * 900, kind=Kind.PERIODIC) is None
    after = ob.stats()
    assert after.dropped_new == 1 and after.shed_kept == before.shed_kept == 0
    assert after.depth == 15


def test_replace_key_keeps_only_latest_unsent(tmp_path):
    ob = Outbox(tmp_path / "o.sqlite")
    a = ob.enqueue("t/state", b"normal", kind=Kind.KEPT, replace_key="state")
    ob.mark_sent(a)  # already handed to the client: must not be touched
    ob.enqueue("t/state", b"alert", kind=Kind.KEPT, replace_key="state")
    ob.enqueue("t/state", b"danger", kind=Kind.KEPT, replace_key="state")
    assert [m.payload for m in ob.peek()] == [b"normal", b"danger"]


def test_shed_never_touches_sent_rows(tmp_path):
    ob = Outbox(tmp_path / "o.sqlite", max_bytes=4096, overflow_topic=TOPIC)
    seqs = _fill(ob, Kind.PERIODIC, 10)
    ob.mark_sent(seqs[4])
    _fill(ob, Kind.PERIODIC, 20, first=10)
    left = {m.seq for m in ob.peek(limit=1000)}
    assert set(seqs[:5]) <= left  # in flight: stays until its PUBACK


@pytest.mark.parametrize("damage", ["garbage", "truncated"])
def test_corrupt_file_set_aside(tmp_path, damage):
    p = tmp_path / "o.sqlite"
    ob = Outbox(p)
    _fill(ob, Kind.KEPT, 50)
    ob.close()
    for side in ("o.sqlite-wal", "o.sqlite-shm"):
        (tmp_path / side).unlink(missing_ok=True)
    raw = p.read_bytes()
    if damage == "garbage":
        p.write_bytes(b"this is not a database" * 100)
    else:  # keep the header, lose the rest of the pages
        p.write_bytes(raw[:100] + b"\0" * (len(raw) - 100))
    ob2 = Outbox(p)
    assert ob2.recovered_from is not None and ob2.recovered_from.exists()
    assert ob2.recovered_from.name.startswith("o.sqlite.corrupt-")
    assert ob2.stats().depth == 0
    ob2.enqueue(TOPIC, b"{}", kind=Kind.KEPT)
    assert ob2.stats().depth == 1
    with pytest.raises(sqlite3.DatabaseError):
        sqlite3.connect(ob2.recovered_from).execute("SELECT * FROM outbox").fetchall()


def test_bad_arguments(tmp_path):
    ob = Outbox(tmp_path / "o.sqlite", max_bytes=4096)
    with pytest.raises(ValueError, match="qos"):
        ob.enqueue(TOPIC, b"x", kind=Kind.KEPT, qos=3)
    with pytest.raises(ValueError, match="quarter"):
        ob.enqueue(TOPIC, b"x" * 2000, kind=Kind.KEPT)
    with pytest.raises(ValueError, match="max_bytes"):
        Outbox(tmp_path / "p.sqlite", max_bytes=10)


def test_disk_full_raises_store_error_and_keeps_rows(tmp_path):
    """On a full disk enqueue raises StoreError (the daemon counts it and keeps monitoring);
    the rows already queued stay intact and the outbox works again once there is space."""
    import subprocess

    from agent.errors import StoreError

    mnt = tmp_path / "disk"
    mnt.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=512k", "tmpfs", str(mnt)],
                       capture_output=True)
    if r.returncode != 0:
        pytest.skip("cannot mount a small tmpfs here (needs root)")
    try:
        ob = Outbox(mnt / "o.sqlite", max_bytes=4 * 1024 * 1024)
        _fill(ob, Kind.KEPT, 5)
        filler = mnt / "filler"
        fill_disk(filler)
        # the disk's own error is reported (not a failed ROLLBACK of a transaction SQLite
        # had already rolled back)
        with pytest.raises(StoreError, match="outbox.*disk is full"):
            for i in range(200):  # WAL pages fill the last free blocks, then the write fails
                ob.enqueue(TOPIC, b"y" * 4000, kind=Kind.KEPT)
        assert [m.msg_id for m in ob.peek(limit=5)] == [f"KEPT-{i}" for i in range(5)]
        depth = _check_totals(ob).depth  # the running total is counted again after the failure
        with pytest.raises(StoreError):  # a batch: none of it is written
            ob.enqueue_many([NewMessage(TOPIC, b"z" * 4000, Kind.KEPT) for _ in range(8)])
        assert _check_totals(ob).depth == depth
        filler.unlink()
        assert ob.enqueue(TOPIC, b"{}", kind=Kind.KEPT) is not None
        assert _check_totals(ob).depth == depth + 1
        ob.close()
        ob2 = Outbox(mnt / "o.sqlite")
        assert ob2.recovered_from is None  # not corrupted by the failed writes
        assert [m.msg_id for m in ob2.peek(limit=5)] == [f"KEPT-{i}" for i in range(5)]
        ob2.close()
    finally:
        subprocess.run(["umount", "-l", str(mnt)], check=False)


# ---- the running byte total and batched writes ----
SIZE = 400  # topic + payload bytes of every message below: 20 fit in 8192, 21 do not


def _exact(i: int, kind: Kind) -> NewMessage:
    head = json.dumps({"n": i, "pad": ""}).encode()
    body = head[:-2] + b"x" * (SIZE - len(TOPIC) - len(head)) + head[-2:]
    assert len(TOPIC) + len(body) == SIZE
    return NewMessage(TOPIC, body, kind, msg_id=f"{kind.name}-{i}")


def _put(ob: Outbox, i: int, kind: Kind = Kind.PERIODIC) -> int | None:
    return ob.enqueue_many([_exact(i, kind)])[0]


def _file_totals(path) -> tuple[int, int]:
    """Depth and bytes counted by another connection (what a restart would count)."""
    db = sqlite3.connect(str(path))
    try:
        return db.execute("SELECT COUNT(*), COALESCE(SUM(size), 0) FROM outbox").fetchone()
    finally:
        db.close()


def _check_totals(ob: Outbox) -> OutboxStats:
    st = ob.stats()
    assert (st.depth, st.bytes) == _file_totals(ob.path)
    return st


def test_cap_enforced_by_running_total_after_reopen_acks_and_eviction(tmp_path):
    p = tmp_path / "o.sqlite"
    ob = Outbox(p, max_bytes=8192, overflow_topic=TOPIC)
    seqs = [_put(ob, i) for i in range(20)]
    st = _check_totals(ob)
    assert (st.depth, st.bytes, st.shed_periodic) == (20, 20 * SIZE, 0)
    _put(ob, 20)  # the 21st does not fit: the oldest measurement goes
    st = _check_totals(ob)
    assert (st.depth, st.bytes, st.shed_periodic) == (20, 20 * SIZE, 1)
    ob.close()

    ob = Outbox(p, max_bytes=8192, overflow_topic=TOPIC)  # "restart": the total is counted again
    assert _check_totals(ob).bytes == 20 * SIZE
    _put(ob, 21)  # still full after the restart
    st = _check_totals(ob)
    assert (st.depth, st.shed_periodic) == (20, 2)
    assert [m.msg_id for m in ob.peek(limit=1)] == ["PERIODIC-2"]

    for m in ob.peek(limit=5):  # PUBACKs free 5 places ...
        assert ob.ack(m.seq, m.msg_id)
    assert not ob.ack(seqs[0])  # (shed long ago: changes nothing)
    st = _check_totals(ob)
    assert (st.depth, st.bytes) == (15, 15 * SIZE)
    for i in range(22, 27):  # ... which 5 new ones take without shedding
        _put(ob, i)
    assert _check_totals(ob).shed_periodic == 2
    _put(ob, 27)
    assert _check_totals(ob).shed_periodic == 3

    # replace keys: the newer unsent one takes the older one's place and bytes
    ob.enqueue_many([NewMessage(TOPIC, _exact(100, Kind.KEPT).payload, Kind.KEPT, "s1",
                                replace_key="state")])
    assert _check_totals(ob).shed_periodic == 4  # full: a measurement made room for it
    ob.enqueue_many([NewMessage(TOPIC, _exact(101, Kind.KEPT).payload, Kind.KEPT, "s2",
                                replace_key="state")])
    st = _check_totals(ob)
    assert st.depth == 20 and st.bytes == 20 * SIZE
    assert "s1" not in {m.msg_id for m in ob.peek(limit=100)}

    # eviction of alerts: every measurement goes first, then the oldest alerts, one notice
    for i in range(30):
        _put(ob, i, Kind.KEPT)
        st = _check_totals(ob)
        note = len(TOPIC) + 300  # the overflow notice is about 300 bytes (docs/mqtt.md)
        assert st.bytes <= 8192 + note
    msgs = ob.peek(limit=100)
    assert all(m.kind == Kind.KEPT for m in msgs)
    notice = json.loads(msgs[0].payload)
    assert notice["type"] == "outbox_overflow" and notice["dropped_count"] == st.shed_kept > 0
    assert st.shed_periodic == 4 + 19  # the 19 measurements left were shed for the first alerts
    # kept: the state message and 30 alerts = what is queued (less the notice) + what was shed
    assert len(msgs) == st.depth and (len(msgs) - 1) + st.shed_kept == 1 + 30
    ob.close()

    ob = Outbox(p, max_bytes=8192, overflow_topic=TOPIC)  # the notice's bytes count after a restart
    assert _check_totals(ob) == st
    _put(ob, 30, Kind.KEPT)
    st2 = _check_totals(ob)
    assert st2.shed_kept == st.shed_kept + 1 and st2.bytes <= 8192 + note
    assert json.loads(ob.peek(limit=1)[0].payload)["dropped_count"] == st2.shed_kept


def test_enqueue_many_one_transaction_same_outcome_as_one_by_one(tmp_path):
    """A batch is one write transaction (one BEGIN, one COMMIT: one disk sync) and ends exactly
    as the same messages enqueued one at a time: same rows, order, sheds and counts."""
    rng = random.Random(7)
    msgs = []
    for i in range(120):
        kind = Kind.KEPT if rng.random() < 0.4 else Kind.PERIODIC
        key = rng.choice([None, None, None, "state", "health"])
        body = json.dumps({"n": i, "pad": "x" * rng.randint(20, 500)}).encode()
        msgs.append(NewMessage(TOPIC, body, kind, msg_id=f"m{i}", replace_key=key))
    # one clock for both: the notice's time stamp is part of its size
    one = Outbox(tmp_path / "one.sqlite", max_bytes=8192, overflow_topic=TOPIC, clock=lambda: 1.8e9)
    many = Outbox(tmp_path / "many.sqlite", max_bytes=8192, overflow_topic=TOPIC, clock=lambda: 1.8e9)
    statements: list[str] = []
    many._db.set_trace_callback(statements.append)
    got_one, got_many = [], []
    for b in range(0, len(msgs), 4):
        batch = msgs[b:b + 4]
        got_one += [one.enqueue(m.topic, m.payload, kind=m.kind, msg_id=m.msg_id,
                                replace_key=m.replace_key) for m in batch]
        statements.clear()
        got_many += many.enqueue_many(batch)
        assert [s for s in statements if s in ("BEGIN IMMEDIATE", "COMMIT")] == ["BEGIN IMMEDIATE", "COMMIT"]
        assert astuple(_check_totals(many)) == astuple(_check_totals(one))

    def rows(ob):  # the notice has a new random id each time: compare its counts
        return [(m.seq, m.msg_id, m.payload) if not m.payload.startswith(b'{"schema"') else
                (m.seq, json.loads(m.payload)["dropped_count"]) for m in ob.peek(limit=1000)]

    assert got_many == got_one and None in got_one  # some measurements did not fit
    assert rows(many) == rows(one)
    st = many.stats()
    assert st.shed_kept > 0 and st.shed_periodic > 0 and st.dropped_new > 0


def test_enqueue_many_checks_every_message_before_writing(tmp_path):
    ob = Outbox(tmp_path / "o.sqlite", max_bytes=4096)
    ok = NewMessage(TOPIC, b"{}", Kind.KEPT, msg_id="ok")
    with pytest.raises(ValueError, match="quarter"):
        ob.enqueue_many([ok, NewMessage(TOPIC, b"x" * 2000, Kind.KEPT)])
    with pytest.raises(ValueError, match="qos"):
        ob.enqueue_many([ok, NewMessage(TOPIC, b"{}", Kind.KEPT, qos=3)])
    assert ob.stats().depth == 0 and _file_totals(ob.path) == (0, 0)
    assert ob.enqueue_many([]) == []


def test_lower_bound_applies_at_the_next_enqueue(tmp_path):
    ob = Outbox(tmp_path / "o.sqlite", max_bytes=16384, overflow_topic=TOPIC)
    for i in range(40):
        _put(ob, i)
    assert ob.stats().depth == 40
    ob.set_max_bytes(8192)
    _put(ob, 40)
    st = _check_totals(ob)
    assert (st.depth, st.shed_periodic) == (20, 21)
    with pytest.raises(ValueError, match="max_bytes"):
        ob.set_max_bytes(100)
