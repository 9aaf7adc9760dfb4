"""``skidvib demo``: try the agent on the invented demo skid, no hardware needed.

Writes a short synthetic recording of the demo pump (P-201, fictional) into
an output folder and analyses it with ``config/demo-skid.toml``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from agent.config import load_config
from agent.pipeline import analyse_capture
from agent.recordings import read_recording, write_wav_with_sidecar
from agent.report_text import analysis_text

ROOT = Path(__file__).resolve().parents[1]
DEMO_CONFIG = ROOT / "config" / "demo-skid.toml"


def demo_signal(fs_hz: float, n: int, seed: int = 201) -> np.ndarray:
    """P-201 at 1476 r/min: 1X, 2X, vane pass (6X), twice line frequency, broadband noise (m/s²)."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / fs_hz
    f1 = 1476.0 / 60.0
    parts = [(f1, 1.6), (2 * f1, 0.7), (6 * f1, 0.9), (100.0, 0.25)]  # (Hz, mm/s r.m.s.)
    acc = np.zeros(n)
    for f, v_mm_s in parts:
        acc += np.sqrt(2) * v_mm_s / 1000.0 * 2 * np.pi * f * np.sin(2 * np.pi * f * t + rng.uniform(0, 2 * np.pi))
    return acc + rng.normal(0, 0.05, n)


def run_demo(out_dir: str | Path = "demo-out") -> int:
    cfg = load_config(DEMO_CONFIG)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    fs, n = cfg.source.fs_hz, cfg.source.n_samples
    path = out / "p201-demo.wav"
    write_wav_with_sidecar(path, demo_signal(fs, n), fs, {"channel": cfg.source.channel, "scenario": "demo"})
    rec = read_recording(path)
    print(analysis_text(analyse_capture(rec.to_capture(), cfg), cfg, rec))
    print(f"\nDemo recording written to {path}")
    return 0
