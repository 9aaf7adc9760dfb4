"""Short soak (replay/soak.py): 150 captures (2.5 simulated hours at one a minute, with
danger episodes and sensor stalls) through the daemon and a real broker. No error, no
file-handle or thread growth, every event received. The long run's figures are in
docs/reliability.md."""

from __future__ import annotations

import io

from replay.soak import run_soak


def test_short_soak_is_flat_and_clean(tmp_path, mqtt_broker):
    out = io.StringIO()
    r = run_soak(150, tmp_path / "agent", mqtt_broker, report_every=30, episode_every=50,
                 fault_every=70, out=out)
    print(out.getvalue())
    running = r["samples"][:-1]  # the last sample is taken after the daemon stopped
    assert len(running) >= 4
    first, last = running[0], running[-1]
    assert last["fds"] <= first["fds"], out.getvalue()  # no file handle leaks
    assert last["threads"] <= first["threads"]
    end = r["samples"][-1]
    assert end["store_errors"] == end["publish_errors"] == end["log_errors"] == 0
    assert end["dropped"] == 0 and end["outbox_depth"] == 0
    assert r["stalls"] == 2 and end["source_errors"] == 2  # sensor faults injected, seen
    assert r["captures"] == 150 - r["stalls"]
    assert r["events_sent"] == r["events_received"] > 0  # nothing lost on the way
