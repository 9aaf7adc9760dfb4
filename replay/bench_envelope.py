"""Time envelope analysis with automatic band selection on one 65 536-sample capture.

    python replay/bench_envelope.py [--repeat 50]

Prints the median and 90th-percentile wall time of
``agent.envelope.envelope_spectrum`` (cepstrum pre-whitening + fast kurtogram
+ squared envelope spectrum) and, for context, of the whole bearing diagnosis
(both envelope views, scoring, velocity-spectrum staging). Target for the
envelope with band selection: ≤ 40 ms on the monitoring box.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from agent.bearings import diagnose_bearings, spec_from_geometry  # noqa: E402
from agent.envelope import envelope_spectrum  # noqa: E402
from replay.bearing_signals import bearing_fault_signal  # noqa: E402


def _times(fn, repeat: int) -> np.ndarray:
    fn()  # warm-up (FFT plans, imports)
    out = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t0)
    return np.array(out) * 1e3


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=50)
    args = ap.parse_args(argv)
    fs, n, speed = 25600.0, 65536, 25.0
    spec = spec_from_geometry("bench", 8, 12.7, 60.0, 0.0)
    x = bearing_fault_signal("outer", -9.0, spec.orders, seed=1, fs_hz=fs, n=n, speed_hz=speed)
    fmin = 4 * spec.orders.bpfi * speed
    env = _times(lambda: envelope_spectrum(x, fs, fmin_hz=fmin, min_bandwidth_hz=fmin, fmax_hz=0.45 * fs),
                 args.repeat)
    full = _times(lambda: diagnose_bearings(x, fs, speed, (spec,)), max(5, args.repeat // 5))
    print(f"machine: {platform.machine()} {platform.processor() or ''} cpus={os.cpu_count()} "
          f"python {platform.python_version()} numpy {np.__version__}")
    print(f"capture: {n} samples at {fs:g} Hz ({n / fs:.2f} s)")
    print(f"envelope + band selection (kurtogram): median {np.median(env):.1f} ms, "
          f"p90 {np.percentile(env, 90):.1f} ms, min {env.min():.1f} ms  (target <= 40 ms)")
    print(f"whole bearing diagnosis (2 views, scoring, staging): median {np.median(full):.1f} ms, "
          f"p90 {np.percentile(full, 90):.1f} ms")
    return 0


if __name__ == "__main__":
    sys.exit(main())
