"""Blocks of samples → whole captures, and a host-clock check of the sample rate.

Shared by the sound-card and serial sources. No I/O: arrival times are
passed in by the caller (from its injected clock).
"""

from __future__ import annotations

import numpy as np

from agent.model import Capture
from agent.sources.calibration import Calibration


class BlockAssembler:
    """Collects (k, channels) blocks until ``n_samples`` per channel are in.

    ``add(block, arrival_s, flags, gap_before)``: ``arrival_s`` is the host
    time the block arrived (≈ time of its last sample); ``flags`` belong to
    the block and go to every capture its samples land in; ``gap_before``
    says samples were lost just before this block — a capture that holds
    samples from both sides of that gap is flagged "gap" (a capture that
    *starts* after the gap is whole). ``pop()`` returns
    ``(counts (n, ch), t0_s, flags)`` or None; samples beyond one capture
    are kept for the next one, whose start time follows on by n/fs (or is
    re-anchored from the arrival time after a gap).
    """

    def __init__(self, n_samples: int, channels: int, fs_hz: float):
        if n_samples < 1:
            raise ValueError(f"n_samples must be >= 1, got {n_samples}")
        if channels < 1:
            raise ValueError(f"channels must be >= 1, got {channels}")
        if not fs_hz > 0:
            raise ValueError(f"fs_hz must be > 0, got {fs_hz!r}")
        self.n_samples = int(n_samples)
        self.channels = int(channels)
        self.fs_hz = float(fs_hz)
        # (samples, t0 of first sample, flags, gap_before)
        self._blocks: list[tuple[np.ndarray, float, frozenset[str], bool]] = []
        self._count = 0

    @property
    def buffered(self) -> int:
        return self._count

    def reset(self) -> None:
        self._blocks.clear()
        self._count = 0

    def add(self, block: np.ndarray, arrival_s: float, flags=(), gap_before: bool = False) -> None:
        arr = np.asarray(block)
        if arr.ndim == 1:
            arr = arr[:, None]
        if arr.ndim != 2 or arr.shape[1] != self.channels:
            raise ValueError(f"block has shape {arr.shape}, expected (k, {self.channels})")
        if arr.shape[0] == 0:
            return
        t0 = arrival_s - arr.shape[0] / self.fs_hz
        if self._blocks and not gap_before:
            prev, prev_t0, _, _ = self._blocks[-1]
            t0 = prev_t0 + prev.shape[0] / self.fs_hz  # contiguous: follow on
        self._blocks.append((arr, t0, frozenset(flags), bool(gap_before)))
        self._count += arr.shape[0]

    def pop(self) -> tuple[np.ndarray, float, frozenset[str]] | None:
        if self._count < self.n_samples:
            return None
        need = self.n_samples
        parts: list[np.ndarray] = []
        flags: set[str] = set()
        t0 = self._blocks[0][1]
        first = True
        while need:
            arr, b_t0, b_flags, gap = self._blocks[0]
            if gap and not first:
                flags.add("gap")
            flags |= b_flags
            first = False
            take = min(need, arr.shape[0])
            parts.append(arr[:take])
            need -= take
            if take == arr.shape[0]:
                self._blocks.pop(0)
            else:
                self._blocks[0] = (arr[take:], b_t0 + take / self.fs_hz, b_flags, False)
        self._count -= self.n_samples
        return np.concatenate(parts, axis=0), float(t0), frozenset(flags)


class RateCheck:
    """Sample rate measured against the host clock over at least ``min_span_s``.

    ``measured_fs_hz`` is None until enough time has passed; ``restart()``
    after a gap or a reopen (samples lost in between would bias the count).
    """

    def __init__(self, min_span_s: float = 10.0):
        self.min_span_s = float(min_span_s)
        self.restart()

    def restart(self) -> None:
        self._t_first: float | None = None
        self._samples_after_first = 0
        self._t_last: float | None = None

    def add(self, k: int, arrival_s: float) -> None:
        if self._t_first is None:
            self._t_first = arrival_s
            return
        self._samples_after_first += k
        self._t_last = arrival_s

    @property
    def measured_fs_hz(self) -> float | None:
        if self._t_first is None or self._t_last is None:
            return None
        span = self._t_last - self._t_first
        if span < self.min_span_s:
            return None
        return self._samples_after_first / span


def channel_names_for(channels: int, names: tuple[str, ...] | None) -> tuple[str, ...]:
    """The configured channel names, or ch0, ch1, … ; their number must match ``channels``."""
    out = tuple(names) if names else tuple(f"ch{i}" for i in range(channels))
    if len(out) != channels:
        raise ValueError(f"{len(out)} channel names for {channels} channels")
    return out


def calibrated_captures(
    counts: np.ndarray,
    t0_s: float,
    flags: frozenset[str],
    *,
    calibration: Calibration,
    channel_names: tuple[str, ...],
    fs_hz: float,
    measured_fs_hz: float | None,
    fs_tolerance: float,
    source_id: str,
    seq: int,
) -> tuple[Capture, ...]:
    """One :class:`Capture` per channel from a block of raw ``counts`` (samples × channels).

    Counts become m/s² through ``calibration``; a channel touching the
    converter's rails is flagged ``clipped_at_source``; a host-clock rate more
    than ``fs_tolerance`` (fraction) off the nominal ``fs_hz`` flags every
    channel ``fs_mismatch``. A DC-coupled input reports its bias and has no
    meaningful full scale about zero (its mean is removed).
    """
    if measured_fs_hz is not None and abs(measured_fs_hz / fs_hz - 1.0) > fs_tolerance:
        flags = flags | {"fs_mismatch"}
    cal = calibration
    out = []
    for i, name in enumerate(channel_names):
        col = counts[:, i]
        accel, bias_v = cal.to_ms2(col)
        out.append(
            Capture(
                accel_ms2=accel,
                fs_hz=fs_hz,
                t0_utc_s=t0_s,
                channel=name,
                source_id=source_id,
                seq=seq,
                flags=flags | {"clipped_at_source"} if cal.at_rails(col) else flags,
                full_scale_ms2=None if cal.dc_coupled else cal.full_scale_ms2,
                bias_v=bias_v,
            )
        )
    return tuple(out)
