"""A serial ADC board on a healthy pump, for tests: binary frames at the real rate to a pty.

Run as ``python tests/serial_pump_writer.py LINK SECONDS``. One channel, 8000 Hz, 80
samples per frame, int16 counts of ±2.5 V at 100 mV/g: a 1480 r/min pump (1X, 2X, vane
pass) plus broadband noise. When the pty vanishes the writer keeps its clock running and
reopens the link when it is back (like a board whose USB cable was pulled).
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from agent.sources.serial_frames import FMT_INT16, encode_frame  # noqa: E402

FS_HZ = 8000
N = 80
COUNTS_PER_G = 32768 / 2.5 * 0.100  # ±2.5 V full scale, 100 mV/g


def pump_counts(seq: int) -> np.ndarray:
    t = (seq * N + np.arange(N)) / FS_HZ
    f1 = 1480 / 60.0
    g = (0.04 * np.sin(2 * np.pi * f1 * t) + 0.02 * np.sin(2 * np.pi * 2 * f1 * t + 1.0)
         + 0.05 * np.sin(2 * np.pi * 6 * f1 * t + 2.0))  # about 1.9 mm/s r.m.s.: ISO zone B
    g = g + np.random.default_rng(seq).normal(0, 0.02, N)
    return np.round(g * COUNTS_PER_G).astype(np.int64)


def main(link: str, seconds: float) -> None:
    fd = None
    t0 = time.monotonic()
    seq = 0
    while time.monotonic() - t0 < seconds:
        due = t0 + seq * N / FS_HZ
        delay = due - time.monotonic()
        if delay > 0:
            time.sleep(delay)
        if fd is None:
            try:
                fd = os.open(link, os.O_WRONLY | os.O_NOCTTY)
            except OSError:
                fd = None
        if fd is not None:
            try:
                os.write(fd, encode_frame(seq & 0xFFFF, pump_counts(seq), FMT_INT16))
            except OSError:
                os.close(fd)
                fd = None
        seq += 1


if __name__ == "__main__":
    main(sys.argv[1], float(sys.argv[2]))
