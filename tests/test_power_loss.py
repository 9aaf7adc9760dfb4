"""Power loss: writers killed with SIGKILL at random (seeded) moments, many times over.

For each durable artefact (snapshot folders, trend database with its downsampling
transaction, MQTT outbox, atomically replaced state files) a forked child loops over
writes and is killed after a random delay; the next child reopens the same state
directory. After every kill: every artefact is the old or the new version, never a
mixture; SQLite files pass ``PRAGMA integrity_check``; every write that had returned
is there. At the end the outbox is delivered to a real mosquitto: every message that
was queued and not acknowledged arrives.

A SIGKILL stops the process at any instruction but leaves the kernel's page cache
alone, so it tests the *ordering* of writes and renames (what a crash can tear), not
the disk's own write cache (that needs fsync, which the writers do and we cannot
observe without pulling power).
"""

from __future__ import annotations

import json
import multiprocessing as mp
import random
import sqlite3
import time
from pathlib import Path

import numpy as np
import pytest
from scipy.io import wavfile

from tests import crash_writer as cw
from tests.broker import USERS, Subscriber

KILLS = 40  # per artefact type
SEED = 20261202
BASE = "skv/plant1/p-201"


@pytest.fixture(scope="module")
def ctx():
    """Children forked from a clean single-threaded server with the writers preloaded."""
    c = mp.get_context("forkserver")
    c.set_forkserver_preload(["numpy", "scipy.io.wavfile", "agent.store", "agent.outbox",
                              "tests.crash_writer"])
    return c


def _kill_loop(ctx, target, args, check, *, seed: int, kills: int = KILLS,
               max_delay_s: float = 0.12, extra: tuple = ()):
    """Run ``target(*args, started, done, ...)`` and SIGKILL it ``kills`` times; call
    ``check(s0, started, done)`` after each kill (``s0``: ``started`` when that child began;
    the writes ``s0+1 .. done`` returned, write ``started`` may or may not have happened). Returns the number of writes done."""
    rng = random.Random(seed)
    started = ctx.Value("q", 0, lock=False)
    done = ctx.Value("q", 0, lock=False)
    for _ in range(kills):
        s0 = started.value
        p = ctx.Process(target=target, args=(*args, started, done, *extra), daemon=True)
        p.start()
        time.sleep(rng.uniform(0.0, max_delay_s))
        p.kill()
        p.join(10)
        assert p.exitcode == -9, f"writer ended by itself (exit {p.exitcode}): it crashed"
        check(s0, started.value, done.value)
    return done.value


def _integrity(path: Path) -> None:
    db = sqlite3.connect(str(path))
    try:
        assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    finally:
        db.close()


def test_snapshots_are_whole_or_absent(ctx, tmp_path):
    state = tmp_path / "state"
    snaps = state / "snapshots"

    seen: set[int] = set()

    def check(s0, started, done):
        ids = sorted(n for n in (p.name for p in snaps.iterdir()) if not n.startswith("."))
        got = set()
        for sid in ids:
            d = snaps / sid
            assert sorted(p.name for p in d.iterdir()) == ["analysis.json", "spectra.npz", "waveform.wav"]
            i = json.loads((d / "analysis.json").read_text())["analysis"]["i"]
            fs, x = wavfile.read(d / "waveform.wav")
            assert fs == 2048 and x.size == 2048 + i % 7
            with np.load(d / "spectra.npz", allow_pickle=False) as z:
                assert z["f_hz"].size == 129
            got.add(i)
        must = seen | set(range(s0 + 1, done + 1))
        assert must <= got <= must | {started}, (s0, started, done)
        seen.clear()
        seen.update(got)

    n = _kill_loop(ctx, cw.snapshot_writer, (str(state),), check, seed=SEED)
    assert n > 0
    from agent.store import Store

    st = Store(state)  # reopening removes whatever a kill left half-written
    assert not list(snaps.glob(".tmp-*"))
    assert len(st.list_snapshots()) == len(seen) > 0
    print(f"snapshots: {KILLS} kills, {len(seen)} snapshots stored, none torn")


def test_trend_rows_and_downsampling_survive(ctx, tmp_path):
    state = tmp_path / "state"

    prev = [0]

    def check(s0, started, done):
        if not (state / "trend.sqlite").exists():
            assert done == 0
            return
        _integrity(state / "trend.sqlite")
        db = sqlite3.connect(str(state / "trend.sqlite"))
        total = db.execute("SELECT COALESCE(SUM(n), 0) FROM trend").fetchone()[0]
        raw_is = [json.loads(f)["i_count"] for (f,) in db.execute("SELECT features FROM trend WHERE level = 0")]
        db.close()
        # every capture counted exactly once, raw or folded into an hourly row
        base = prev[0] + max(0, done - s0)
        assert total in (base, base + (started > done)), (s0, started, done, total, prev)
        prev[0] = total
        assert len(raw_is) == len(set(raw_is))

    n = _kill_loop(ctx, cw.trend_writer, (str(state),), check, seed=SEED + 1)
    assert n > 8
    print(f"trend: {KILLS} kills, {n} rows written")


def test_atomic_state_file_old_or_new(ctx, tmp_path):
    p = tmp_path / "monitor.json"

    def check(s0, started, done):
        if not p.exists():
            assert done == 0
            return
        v = json.loads(p.read_text())["version"]
        assert done <= v <= started

    n = _kill_loop(ctx, cw.atomic_writer, (str(p),), check, seed=SEED + 2)
    assert n > 0
    print(f"state file: {KILLS} kills, {n} versions written")


def test_outbox_survives_kills_and_delivers_everything(ctx, tmp_path, mqtt_broker):
    path = tmp_path / "state" / "outbox.sqlite"
    acked = ctx.Array("b", 100_000, lock=False)

    def present(done: int) -> set[int]:
        db = sqlite3.connect(str(path))
        try:
            rows = {int(m[1:]) for (m,) in db.execute("SELECT msg_id FROM outbox")}
        except sqlite3.OperationalError:  # killed while the very first child created the table
            assert not acked[1] and not any(i not in unsure for i in range(1, done + 1))
            rows = set()
        finally:
            db.close()
        return rows

    unsure: set[int] = set()

    def check(s0, started, done):
        in_flight = set(range(max(s0, done) + 1, started + 1))  # the batch being written at the kill
        unsure.update(in_flight)  # either way is right, but all of it or none
        if not path.exists():
            return
        _integrity(path)
        rows = present(done)
        assert rows & in_flight in (set(), in_flight), (in_flight, rows & in_flight)
        for i in range(1, started + 1):
            if i in unsure or acked[i] == 1:  # or its ack was in progress
                continue
            assert (i in rows) == (acked[i] == 0), (i, acked[i], done)
        assert max(rows, default=0) <= started

    n = _kill_loop(ctx, cw.outbox_writer, (str(path),), check, seed=SEED + 3, extra=(acked,))
    pending = present(n)
    assert len(pending) > 10
    assert not list(path.parent.glob("*.corrupt-*"))  # never set aside as corrupt
    # deliver what is pending through the real link to a real broker
    from agent.mqtt import MqttLink, MqttSettings
    from agent.outbox import Outbox

    pw = tmp_path / "agent.pw"
    pw.write_text(USERS["agent"] + "\n")
    sub = Subscriber(mqtt_broker, f"{BASE}/events")
    link = MqttLink(MqttSettings(host="127.0.0.1", port=mqtt_broker.port, client_id="agent-pl",
                                 username="agent", password_file=str(pw), prefix="skv",
                                 site="plant1", asset="p-201", keepalive_s=5,
                                 reconnect_min_s=0.1, reconnect_max_s=0.5),
                    Outbox(path, max_bytes=1 << 30))
    link.start()
    want = {f"m{i}" for i in pending}
    msgs = sub.collect_until(lambda ms: {json.loads(m.payload)["id"] for m in ms} >= want, 60)
    got = [int(json.loads(m.payload)["id"][1:]) for m in msgs]
    link.stop(5)
    sub.close()
    assert set(got) == pending
    assert got == sorted(got)  # in queue order
    assert link.outbox.stats().depth == 0
    print(f"outbox: {KILLS} kills, {n} enqueued, {len(pending)} pending delivered")
