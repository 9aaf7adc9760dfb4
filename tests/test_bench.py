"""Smoke test of the benchmark script: it runs and prints every figure (no timing thresholds)."""

from __future__ import annotations

import json
import statistics
import subprocess
import sys
from pathlib import Path

from agent import bench, orders, pipeline

ROOT = Path(__file__).resolve().parents[1]


def test_stats_match_the_statistics_module():
    xs = [5.0, 1.0, 9.0, 3.0, 7.0, 2.0, 8.0]
    s = bench.Stats.of(xs)
    # reference: Python's statistics.median / statistics.quantiles (exclusive method)
    q1, _, q3 = statistics.quantiles(xs, n=4)
    assert (s.median, s.q1, s.q3, s.lo, s.hi, s.n) == (statistics.median(xs), q1, q3, 1.0, 9.0, 7)


def test_stage_timer_puts_the_stage_functions_back():
    before = dict(vars(pipeline)), dict(vars(orders))
    timer = bench.StageTimer()
    timer.install()
    assert vars(pipeline)["accel_spectrum"] is not before[0]["accel_spectrum"]
    timer.restore()
    assert all(vars(pipeline)[k] is v for k, v in before[0].items())
    assert all(vars(orders)[k] is v for k, v in before[1].items())


def test_quick_run_prints_the_figures(tmp_path):
    out, js = tmp_path / "bench.md", tmp_path / "bench.json"
    p = subprocess.run([sys.executable, "-m", "agent.bench", "--quick", "--out", str(out), "--json", str(js)],
                       cwd=ROOT, capture_output=True, text=True, timeout=600)
    assert p.returncode == 0, p.stderr[-3000:]
    text = p.stdout
    for needle in ("Machine:", "25600 Hz × 65536", "51200 Hz × 65536", "bare rfft ms", "real-time factor",
                   "Per-stage breakdown", "`pipeline.analyse_capture`", "÷ bare import", "Start-up to the first capture",
                   "outbox durable enqueue", "msg/s", "queue 20000 deep", "one capture (4 messages) per transaction",
                   "trend database insert", "rows/s", "## Replay",
                   "Envelope analysis with band selection", "bearing stage's bands"):
        assert needle in text, f"{needle!r} missing from the output"
    assert out.read_text(encoding="utf-8").strip() == text.strip()
    fig = json.loads(js.read_text(encoding="utf-8"))
    for a in fig["analysis"]:
        assert a["analysis_cpu_ms"]["median"] > 0 and a["rfft_cpu_ms"]["median"] > 0
        assert a["real_time_factor"] > 0 and a["fft_ratio"] > 1
        assert any(k.endswith("spectra.accel_spectrum") for k in a["stages"])
    env = fig["envelope"]["searches"]["bearing stage's bands"]
    assert 0 < env["cpu_ms"]["median"] <= env["cpu_p90_ms"] and env["band_hz"][0] < env["band_hz"][1]
    svc = fig["service"]
    assert svc["service_rss_mb"] > 0 and svc["bare_hwm_mb"] > 0 and svc["start_s"] > 0
    assert svc["soak_captures"] >= 20
    st = fig["storage"]
    assert st["outbox_enqueue_msg_s"] > 0 and st["outbox_drain_msg_s"] > 0 and st["trend_insert_rows_s"] > 0
    assert st["outbox_deep_filled"] == st["outbox_deep_queue"] == 20_000
    assert all(st[f"outbox_{k}_msg_s"] > 0 and st[f"outbox_{k}_cpu_us"] > 0
               for k in ("enqueue", "enqueue_deep", "batch", "batch_deep"))
