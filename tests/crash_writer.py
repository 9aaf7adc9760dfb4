"""Writers killed with SIGKILL by tests/test_power_loss.py (run in forked children).

Each writer loops over one kind of durable write forever and records in shared
memory (a ``multiprocessing`` array that survives the child's death) how far it
got: ``done`` is bumped only after a write has returned, ``started`` just
before a write begins. After the kill the parent knows that every write up to
``done`` must be on disk and that the one write in progress (``started`` >
``done``) may or may not be.
"""

from __future__ import annotations

import json
import os
import time

import numpy as np

T0 = 1_796_169_600.0  # 2026-12-02T00:00:00Z


def snapshot_writer(state_dir: str, started, done) -> None:
    from agent.store import Store

    st = Store(state_dir, max_count=10_000, max_bytes=1 << 40)
    rng = np.random.default_rng(os.getpid())
    while True:
        i = started.value + 1
        started.value = i
        x = rng.normal(0, 1.0, 2048 + i % 7)
        st.save_snapshot(t_utc_s=T0 + i, reason="scheduled", waveform_ms2=x, fs_hz=2048.0,
                         spectra={"f_hz": np.linspace(0, 1024, 129), "acc_power_ms2sq": np.abs(x[:129])},
                         analysis={"i": i})
        done.value = i


def trend_writer(state_dir: str, started, done) -> None:
    """Trend rows one per 'capture' 10 min apart, downsampling every 8 rows (raw kept 1 h)."""
    from agent.store import Store

    st = Store(state_dir, raw_keep_s=3600.0, hourly_keep_s=1e12)
    while True:
        i = started.value + 1
        started.value = i
        t = T0 + 600.0 * i
        st.add_trend(t, "normal", 24.6, {"vel_rms_mm_s": 1.0 + i % 5, "i_count": i})
        if i % 8 == 0:
            st.downsample(t)  # a multi-statement transaction: killed half-way, none of it applies
        done.value = i


def outbox_writer(path: str, started, done, acked) -> None:
    """Enqueue messages ``i`` (msg_id ``m<i>``) alone or 2-3 in one ``enqueue_many`` (as the
    daemon queues one capture's), ``started``/``done`` moving by the whole batch; acknowledge
    every third one two messages later (as the link does when a PUBACK comes). ``acked[i]``
    is set after the ack returned."""
    from agent.outbox import Kind, NewMessage, Outbox

    ob = Outbox(path, max_bytes=1 << 30)
    while True:
        first = started.value + 1
        last = first + first % 3  # batches of 1, 2 or 3
        started.value = last
        ob.enqueue_many([NewMessage("skv/plant1/p-201/events",
                                    json.dumps({"id": f"m{i}", "i": i}).encode(), Kind.KEPT,
                                    msg_id=f"m{i}") for i in range(first, last + 1)])
        done.value = last
        for j in range(first - 2, last - 1):
            if j > 0 and j % 3 == 0:
                seq = _seq_of(ob, f"m{j}")
                if seq is not None:
                    acked[j] = 1  # "ack in progress": the parent allows it either way
                    ob.ack(seq, f"m{j}")
                    acked[j] = 2
        time.sleep(0.005)  # a busy agent's rate, so the delivery check stays a few hundred rows


def _seq_of(ob, msg_id: str):
    with ob._lock:
        row = ob._db.execute("SELECT seq FROM outbox WHERE msg_id = ?", (msg_id,)).fetchone()
    return None if row is None else row[0]


def atomic_writer(path: str, started, done) -> None:
    """``write_atomic`` of a growing JSON document (as the daemon's monitor.json)."""
    from pathlib import Path

    from agent.store import json_bytes, write_atomic

    p = Path(path)
    while True:
        i = started.value + 1
        started.value = i
        write_atomic(p, json_bytes({"version": i, "pad": "x" * (i % 4000)}))
        done.value = i
