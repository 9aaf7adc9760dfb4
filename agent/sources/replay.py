"""Recordings played back as captures (WAV + sidecar, or any format ``agent.recordings`` reads).

Folders are expanded to their recordings in name order (``skidvib
simulate`` names files by UTC start, so name order is time order); files
given one by one are played in the order given. Each file becomes one
:class:`~agent.model.Capture` stamped with the time its sidecar (or file)
gives, with ``seq`` counting up, ``source_id`` "replay" and the sidecar's
full scale.

Pacing is optional and uses the injected ``monotonic`` and ``sleep``:
``speed`` N plays the recordings' own timeline N times faster than real
time; ``speed=None`` (fast) never waits. A file that cannot be read is
skipped and listed in :attr:`ReplaySource.skipped` with the reason, so one
bad file does not end a replay.
"""

from __future__ import annotations

import dataclasses
import time
from pathlib import Path
from typing import Callable

from agent.errors import InputError, SourceUnavailable
from agent.model import Capture
from agent.recordings import FORMATS, read_recording
from agent.sources.base import EndOfSource, Source


def expand_paths(paths) -> list[Path]:
    """Files as given; folders → their recordings (known suffixes) in name order."""
    out: list[Path] = []
    for raw in paths:
        p = Path(raw)
        if p.is_dir():
            files = sorted(q for q in p.iterdir() if q.is_file() and q.suffix.lower() in FORMATS)
            out.extend(files)
        elif p.exists():
            out.append(p)
        else:
            raise SourceUnavailable(f"{p}: no such file or folder")
    return out


class ReplaySource(Source):
    """Plays recordings as captures, in order."""

    kind = "replay"

    def __init__(
        self,
        paths,
        *,
        speed: float | None = None,
        loop: bool = False,
        channel: str | None = None,
        fs_hz: float | None = None,
        units: str | None = None,
        monotonic: Callable[[], float] = time.monotonic,
        sleep: Callable[[float], None] = time.sleep,
        source_id: str = "replay",
    ) -> None:
        if speed is not None and not speed > 0:
            raise ValueError(f"speed must be > 0 (or None for fast), got {speed!r}")
        self.paths_given = [str(p) for p in paths]
        self.speed = speed
        self.loop = loop
        self._read_kw = {"channel": channel, "fs_hz": fs_hz, "units": units}
        self._monotonic = monotonic
        self._sleep = sleep
        self.source_id = source_id
        self.files: list[Path] = []
        self.skipped: list[tuple[str, str]] = []
        self.last_meta: dict = {}
        self.last_path: str = ""
        self._i = 0
        self._seq = 0
        self._t_first: float | None = None
        self._wall_first: float | None = None
        self._open = False

    @classmethod
    def from_config(cls, cfg, **kw) -> "ReplaySource":
        from agent.config import resolve_path

        paths = [resolve_path(cfg, p) for p in cfg.source.replay.paths]
        return cls(paths, loop=cfg.source.replay.loop, speed=kw.pop("speed", None), **kw)

    def open(self) -> None:
        self.files = expand_paths(self.paths_given)
        if not self.files:
            raise SourceUnavailable(f"no recordings in {', '.join(self.paths_given)}")
        self._open = True

    def close(self) -> None:
        self._open = False

    def describe(self) -> dict:
        return {"kind": self.kind, "files": len(self.files), "speed": self.speed or "fast", "loop": self.loop}

    def __len__(self) -> int:
        return len(self.files)

    def read(self, timeout_s: float) -> tuple[Capture, ...]:
        if not self._open:
            raise SourceUnavailable("replay source read before open()")
        while True:
            if self._i >= len(self.files):
                if not self.loop:
                    raise EndOfSource(f"all {len(self.files)} recordings played")
                self._i = 0
            path = self.files[self._i]
            self._i += 1
            try:
                rec = read_recording(path, **self._read_kw)
            except InputError as exc:
                self.skipped.append((str(path), str(exc)))
                continue
            break
        side = rec.meta.get("sidecar", {}) if isinstance(rec.meta, dict) else {}
        self._pace(rec.t0_utc_s)
        cap = rec.to_capture(source_id=self.source_id, seq=self._seq)
        full = side.get("full_scale_ms2")
        if isinstance(full, (int, float)) and full > 0:
            cap = dataclasses.replace(cap, full_scale_ms2=float(full))
        self._seq += 1
        self.last_meta = side
        self.last_path = str(path)
        return (cap,)

    def _pace(self, t0_utc_s: float) -> None:
        if self.speed is None:
            return
        now = self._monotonic()
        if self._t_first is None:
            self._t_first, self._wall_first = t0_utc_s, now
            return
        due = self._wall_first + (t0_utc_s - self._t_first) / self.speed
        if due > now:
            self._sleep(due - now)


__all__ = ["ReplaySource", "expand_paths"]
