"""Benchmark: how much faster than real time the demo scenario simulates and replays.

    python replay/benchmark.py [--recordings DIR] [--jobs N]

Simulates the demo scenario (unless DIR already holds its recordings), then
replays it fast through the pipeline with config/demo-skid.toml, and prints
wall and CPU time per capture and the speed as a multiple of real time: of
the signals (sum of capture lengths; the issue's target is at least 50x) and
of the recordings' timeline. Figures are printed, never asserted.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from agent.config import load_config  # noqa: E402
from agent.replay_cmd import SIGNAL_BENCH_TARGET, run_replay  # noqa: E402
from agent.scenario import find_scenario, load_scenario  # noqa: E402
from agent.simulate_cmd import simulate  # noqa: E402
from agent.sources.replay import ReplaySource  # noqa: E402


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--recordings", help="folder with the demo's recordings (default: simulate into a temp folder)")
    ap.add_argument("--jobs", type=int, default=2, help="simulator worker processes")
    args = ap.parse_args()
    scen = load_scenario(find_scenario("demo"))
    with tempfile.TemporaryDirectory() as tmp:
        rec = Path(args.recordings) if args.recordings else Path(tmp) / "rec"
        if not any(rec.glob("*.wav")):
            t0, c0 = time.perf_counter(), time.process_time()
            simulate(scen, rec, jobs=args.jobs)
            wall = time.perf_counter() - t0
            print(f"simulate: {scen.n_captures} captures in {wall:.1f} s wall "
                  f"({1000 * wall / scen.n_captures:.0f} ms/capture, {args.jobs} workers; "
                  f"parent CPU {time.process_time() - c0:.1f} s)")
        cfg = load_config(ROOT / "config" / "demo-skid.toml")
        src = ReplaySource([rec])
        src.open()
        c0 = time.process_time()
        res = run_replay(src, cfg)
        cpu = time.process_time() - c0
        n = len(res.steps)
        print(f"replay:   {n} captures in {res.wall_s:.1f} s wall, {cpu:.1f} s CPU "
              f"({1000 * res.wall_s / n:.0f} ms/capture wall, {1000 * cpu / n:.0f} ms CPU)")
        print(f"          {res.signal_factor:.0f}x real time of the signals ({res.signal_s:.0f} s of samples; "
              f"target >= {SIGNAL_BENCH_TARGET:.0f}x), by CPU time {res.signal_s / cpu:.0f}x")
        print(f"          {res.timeline_s / res.wall_s:.0f}x the recordings' timeline "
              f"({res.timeline_s / 86400:.1f} days)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
