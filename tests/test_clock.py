"""Wall-clock jumps (NTP steps, a lost real-time clock) while the daemon runs.

The daemon takes ``mono``/``wall`` callables; here the wall clock is the monotonic clock
plus an offset that jumps two years forward, back, and to 1970 (captures as fast as
analysis takes them). Captures are stamped from the wall clock, as the real sources do. Expected:
scheduling follows the monotonic clock (every capture taken), every capture leaves
one trend row in arrival order, alerts are queued in the order they happened, and no
retention step folds or deletes rows on the word of a clock that just jumped.
"""

from __future__ import annotations

import dataclasses
import json
import sqlite3
import time

import pytest

from agent.config import load_config
from agent.daemon import Daemon
from tests.test_daemon import HookedSource, ScriptedSource, write_config

YEAR_S = 365.25 * 86400
QUIET = {"normal", "learning"}  # no alarm (learning: the baseline is not finished yet)


def _into_danger(states) -> int:
    return sum(1 for a, b in zip(states, states[1:]) if a != "danger" and b == "danger")


def _fast(cfg, interval_s=0.05):
    """Captures ``interval_s`` apart (faster than a real capture could be taken)."""
    return dataclasses.replace(cfg, source=dataclasses.replace(cfg.source, interval_s=interval_s))


class WallStampedSource(HookedSource):
    """Scripted levels, stamped by the (injected) wall clock; ``hooks[i]`` runs before capture i."""

    def __init__(self, cfg, script, wall, hooks):
        super().__init__(cfg, script, hooks)
        self.wall = wall

    def read(self, timeout_s):
        (cap,) = super().read(timeout_s)
        return (dataclasses.replace(cap, t0_utc_s=self.wall()),)


@pytest.mark.parametrize("jump_s", [2 * YEAR_S, -2 * YEAR_S, -56 * YEAR_S], ids=["fwd2y", "back2y", "to1970"])
def test_clock_jumps_lose_and_reorder_nothing(tmp_path, jump_s):
    cfg = _fast(load_config(write_config(tmp_path, 1)))
    mono = time.monotonic
    offset = [1_796_169_600.0]
    wall = lambda: offset[0] + mono()  # noqa: E731
    d: Daemon | None = None

    def jump(delta):
        def f():
            offset[0] += delta
        return f

    def hour_passed():  # make the hourly housekeeping due now
        d.next_housekeeping_mono = 0.0

    # healthy; clock jumps at 6; alert episode 8-9 under the wrong clock; housekeeping due at 10;
    # clock corrected at 12; another alert 14-15; housekeeping due at 17
    script = [1.0] * 7 + [2.5, 2.5] + [1.0] * 4 + [2.5, 2.5] + [1.0] * 4
    hooks = {6: jump(jump_s), 10: hour_passed, 12: jump(-jump_s), 17: hour_passed}
    src = WallStampedSource(cfg, script, wall, hooks)
    d = src.daemon = Daemon(cfg, source_factory=lambda c: src, use_mqtt=False, mono=mono, wall=wall)
    d.run()
    assert d.health.captures_done == len(script)  # scheduling did not stall or skip
    assert d.health.clock_jumps == 2
    db = sqlite3.connect(tmp_path / "state" / "trend.sqlite")
    rows = db.execute("SELECT t_utc_s, level, n, state FROM trend ORDER BY rowid").fetchall()
    assert [r[1] for r in rows] == [0] * len(script)  # nothing folded, nothing deleted
    states = [r[3] for r in rows]
    assert set(states[:7]) <= QUIET and "danger" in states[7:11] and "danger" in states[13:17]
    assert _into_danger(states) == 2 and "sensor_fault" not in states, states
    # the stamps are what the clock said (not rewritten), in arrival order
    ts = [r[0] for r in rows]
    assert all(abs((ts[i + 1] - ts[i]) - (jump_s if i == 4 else -jump_s if i == 10 else 0)) < 3600
               for i in range(len(ts) - 1))


def test_alerts_keep_their_order_across_a_backward_jump(tmp_path, mqtt_broker):
    """Alerts queued in the outbox go out in the order they happened even when the second one
    is stamped years before the first."""
    from tests.broker import Subscriber

    cfg = _fast(load_config(write_config(tmp_path, mqtt_broker.port)))
    mono = time.monotonic
    offset = [1_796_169_600.0]
    wall = lambda: offset[0] + mono()  # noqa: E731

    def back():
        offset[0] -= 2 * YEAR_S

    script = [1.0, 2.5, 2.5, 1.0, 1.0, 1.0, 2.5, 2.5, 1.0, 1.0, 1.0]
    src = WallStampedSource(cfg, script, wall, {6: back})
    sub = Subscriber(mqtt_broker, "skv/plant1/p-201/events")
    d = src.daemon = Daemon(cfg, source_factory=lambda c: src, mono=mono, wall=wall)
    d.run()
    evs = [json.loads(m.payload) for m in sub.collect_until(
        lambda ms: sum(json.loads(m.payload)["type"] == "state_change" for m in ms) >= 4, 15)]
    sub.close()
    changes = [("quiet" if e["previous_state"] in QUIET else e["previous_state"],
                "quiet" if e["state"] in QUIET else e["state"]) for e in evs if e["type"] == "state_change"]
    assert changes == [("quiet", "danger"), ("danger", "quiet"), ("quiet", "danger"),
                       ("danger", "quiet")], changes
    stamps = [e["t_utc_s"] for e in evs if e["type"] == "state_change" and e["state"] == "danger"]
    assert stamps[1] < stamps[0]  # the clock said so; the order of arrival still follows events


def test_end_of_source_arrives_when_analysis_is_behind(tmp_path):
    """A finite source (replay) read much faster than analysis: captures are dropped as
    designed, but the end still arrives and the daemon stops by itself."""
    cfg = load_config(write_config(tmp_path, 1))
    t0 = time.monotonic()
    mono = lambda: (time.monotonic() - t0) * 100_000.0  # noqa: E731 — no pause between reads
    src = ScriptedSource(cfg, [1.0] * 12)
    d = Daemon(cfg, source_factory=lambda c: src, use_mqtt=False, mono=mono)
    import threading

    t = threading.Thread(target=d.run, daemon=True)
    t.start()
    t.join(60)
    assert not t.is_alive(), "the daemon never saw the end of the source"
    assert d.health.captures_done + d.health.captures_dropped == 12 and d.health.captures_dropped > 0
