"""The durable outbox on its own: order, durability across reopen, bound and shed policy,
corruption handling. (Delivery through a real broker is in test_mqtt.py.)"""

from __future__ import annotations

import json
import sqlite3

import pytest

from agent.outbox import Kind, Outbox

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
        with open(filler, "wb", buffering=0) as fh:
            try:
                while True:
                    fh.write(b"\0" * 4096)
            except OSError:
                pass
        # the disk's own error is reported (not a failed ROLLBACK of a transaction SQLite
        # had already rolled back)
        with pytest.raises(StoreError, match="outbox.*disk is full"):
            for i in range(200):  # WAL pages fill the last free blocks, then the write fails
                ob.enqueue(TOPIC, b"y" * 4000, kind=Kind.KEPT)
        assert [m.msg_id for m in ob.peek(limit=5)] == [f"KEPT-{i}" for i in range(5)]
        filler.unlink()
        assert ob.enqueue(TOPIC, b"{}", kind=Kind.KEPT) is not None
        ob.close()
        ob2 = Outbox(mnt / "o.sqlite")
        assert ob2.recovered_from is None  # not corrupted by the failed writes
        assert [m.msg_id for m in ob2.peek(limit=5)] == [f"KEPT-{i}" for i in range(5)]
        ob2.close()
    finally:
        subprocess.run(["umount", "-l", str(mnt)], check=False)
