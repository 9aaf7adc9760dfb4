"""A simulated serial ADC board for tests: writes binary frames to a pty at the real rate.

Run as ``python tests/adc_writer.py LINK LOG.json``. Frame ``seq`` carries
``frame_samples(seq)`` (deterministic, so the reader can check every sample).
Scripted faults by frame index: a flipped byte (bad CRC), a truncated frame,
skipped frames (sequence jump), garbage bytes, a false sync word with a
plausible header, and a long sequence jump. When the pty vanishes (the test
kills socat) the writer keeps its clock and counter running, logs those frames
as lost, and reopens the link when it comes back.
"""

from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from agent.sources.serial_frames import FMT_INT16, SYNC, encode_frame  # noqa: E402

FS_HZ = 8000
N = 80  # samples per channel per frame → 100 frames/s
CH = 2
FRAMES = 420


def frame_samples(seq: int) -> np.ndarray:
    return np.random.default_rng(seq).integers(-32768, 32768, (N, CH))


def main(link: str, log_path: str) -> None:
    fd = None
    log: dict[str, list] = {"ok": [], "bad": [], "lost": [], "t": {}}
    rng = np.random.default_rng(99)
    seq = 0
    t_start = time.monotonic()
    for i in range(FRAMES):
        due = t_start + i * N / FS_HZ
        delay = due - time.monotonic()
        if delay > 0:
            time.sleep(delay)
        if i in (60, 61, 62):  # the board skipped three frames (sequence jump of 3)
            log["bad"].append(seq)
            seq += 1
            continue
        if i == 250:  # long jump: 100 frames never sent
            log["bad"].extend(range(seq, seq + 100))
            seq += 100
        frame = encode_frame(seq & 0xFFFF, frame_samples(seq), FMT_INT16)
        out = frame
        status = "ok"
        if i in (20, 300, 301):  # one byte flipped in the samples → CRC fails
            out = frame[:40] + bytes([frame[40] ^ 0x10]) + frame[41:]
            status = "bad"
        elif i == 40:  # truncated: the board reset mid-frame
            out = frame[:100]
            status = "bad"
        elif i == 80:  # line noise before an intact frame
            out = rng.integers(0, 256, 57, dtype=np.uint8).tobytes() + frame
        elif i == 100:  # a false sync with a plausible header (claims 1000 samples) before a frame
            out = SYNC + bytes([1, 1, 0, 0, 2, 0]) + (1000).to_bytes(2, "little") + frame
        if fd is None:
            try:
                fd = os.open(link, os.O_WRONLY | os.O_NOCTTY)
            except OSError:
                fd = None
        if fd is not None:
            try:
                os.write(fd, out)
            except OSError:
                os.close(fd)
                fd = None
        if fd is None:
            status = "lost" if status == "ok" else status
        log[status].append(seq)
        log["t"][seq] = time.time()  # wall clock: the test compares with its unplug times
        seq += 1
    Path(log_path).write_text(json.dumps(log))


def healthy_frame(seq: int) -> np.ndarray:
    """A sound machine: 1X 29.5 Hz, 2X, broadband noise, in int16 counts, continuous across frames."""
    t = (seq * N + np.arange(N)) / FS_HZ
    x = 3000 * np.sin(2 * np.pi * 29.5 * t) + 1000 * np.sin(2 * np.pi * 59 * t + 1)
    x = x[:, None] + np.random.default_rng(seq).normal(0, 400, (N, CH))
    return np.round(x).astype(np.int64)


def clean(link: str, seconds: float) -> None:
    """A healthy board without faults, for runs of the daemon."""
    fd = os.open(link, os.O_WRONLY | os.O_NOCTTY)
    t_start = time.monotonic()
    for seq in range(int(seconds * FS_HZ / N)):
        delay = t_start + seq * N / FS_HZ - time.monotonic()
        if delay > 0:
            time.sleep(delay)
        try:
            os.write(fd, encode_frame(seq & 0xFFFF, healthy_frame(seq), FMT_INT16))
        except OSError:
            return


if __name__ == "__main__":
    if sys.argv[1] == "--clean":
        clean(sys.argv[2], float(sys.argv[3]))
    else:
        main(sys.argv[1], sys.argv[2])
