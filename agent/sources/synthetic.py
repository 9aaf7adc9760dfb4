"""The simulator as an acquisition source: captures from a scenario timeline.

Two ways to run:

* **timeline** (default): capture *i* is stamped with the scenario's own time
  (start + capture time *i*); nothing waits, so a six-week scenario replays
  as fast as the pipeline can take it. :class:`~agent.sources.base.EndOfSource`
  after the last capture.
* **paced** (the daemon with ``source.kind = "synthetic"``): each read waits
  one capture length on the injected ``sleep``, stamps the capture with the
  injected ``clock`` and takes the machine's state at scenario time
  ``(clock − clock at open) × time_scale``; it never ends.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import time
from typing import Callable

import numpy as np

from agent.errors import SourceUnavailable
from agent.model import Capture
from agent.scenario import Scenario, find_scenario, load_scenario, parse_scenario
from agent.simulator import synthesize
from agent.sources.base import EndOfSource, Source


def steady_scenario(
    *,
    fs_hz: float = 25600.0,
    n_samples: int = 65536,
    speed_rpm: float = 1478.0,
    line_hz: float = 50.0,
    poles: int = 4,
    rotor_bars: int = 28,
    vanes: int = 6,
    bearings: tuple[dict, ...] = (),
    seed: int = 1,
    channel: str = "ch0",
    interval_s: float = 60.0,
    days: float = 1.0,
) -> Scenario:
    """A healthy machine running at one speed (the source's default scenario).

    ``days`` bounds only the timeline mode's capture list; paced mode runs on
    past it (the machine keeps running, healthy).
    """
    data = {
        "scenario": {
            "name": "steady", "title": "healthy machine at constant speed",
            "start_utc": dt.datetime(2026, 1, 1, tzinfo=dt.timezone.utc),
            "days": days, "seed": seed, "fs_hz": fs_hz, "n_samples": n_samples,
            "interval_h": interval_s / 3600.0, "channel": channel,
        },
        "machine": {
            "poles": max(2, poles), "line_hz": line_hz, "rotor_bars": rotor_bars, "vanes": vanes,
            "speed_drift_pct": 0.1, "bearings": list(bearings),
        },
        "operation": [{"from_day": 0.0, "speed_rpm": speed_rpm}],
    }
    return parse_scenario(data, "<steady>")


class SyntheticSource(Source):
    """Captures synthesised from a :class:`~agent.scenario.Scenario`."""

    kind = "synthetic"

    def __init__(
        self,
        scenario: Scenario,
        *,
        paced: bool = False,
        time_scale: float = 1.0,
        clock: Callable[[], float] = time.time,
        sleep: Callable[[float], None] = time.sleep,
        source_id: str = "synthetic",
        start_index: int = 0,
    ) -> None:
        if not time_scale > 0:
            raise ValueError(f"time_scale must be > 0, got {time_scale!r}")
        self.scenario = scenario
        self.paced = paced
        self.time_scale = time_scale
        self._clock = clock
        self._sleep = sleep
        self.source_id = source_id
        self._next = start_index
        self._seq = 0
        self._opened_at: float | None = None
        self.last_truth: dict | None = None

    @classmethod
    def from_config(cls, cfg, *, clock: Callable[[], float] = time.time, sleep: Callable[[float], None] = time.sleep):
        """The source for ``source.kind = "synthetic"``: the configured scenario, or a steady healthy machine."""
        src = cfg.source
        if src.synthetic.scenario:
            from agent.config import resolve_path

            scen = load_scenario(find_scenario(str(resolve_path(cfg, src.synthetic.scenario))))
            scen = dataclasses.replace(scen, seed=src.synthetic.seed)
        else:
            m = cfg.machine
            poles = m.poles or 4
            speed = m.line_hz * 120.0 / poles * 0.985
            lo, hi = m.speed_rpm
            if not lo <= speed <= hi:
                speed = 0.5 * (lo + hi)
            bearings = tuple(
                {"name": b.name, "balls": b.balls, "ball_diameter_mm": b.ball_diameter_mm,
                 "pitch_diameter_mm": b.pitch_diameter_mm, "contact_angle_deg": b.contact_angle_deg}
                for b in m.bearings
            )
            scen = steady_scenario(fs_hz=src.fs_hz, n_samples=src.n_samples, speed_rpm=speed, line_hz=m.line_hz,
                                   poles=poles, rotor_bars=m.rotor_bars, vanes=m.vanes or m.blades,
                                   bearings=bearings, seed=src.synthetic.seed, channel=src.channel,
                                   interval_s=src.interval_s)
        return cls(scen, paced=True, time_scale=src.synthetic.time_scale, clock=clock, sleep=sleep,
                   source_id=f"synthetic:{scen.name}")

    def open(self) -> None:
        if self.scenario.n_captures == 0 and not self.paced:
            raise SourceUnavailable(f"scenario {self.scenario.name!r} has no captures")
        self._opened_at = self._clock()

    def close(self) -> None:
        self._opened_at = None

    def describe(self) -> dict:
        s = self.scenario
        return {"kind": self.kind, "scenario": s.name, "fs_hz": s.fs_hz, "channels": [s.channel],
                "captures": s.n_captures, "paced": self.paced}

    def read(self, timeout_s: float) -> tuple[Capture, ...]:
        if self._opened_at is None:
            raise SourceUnavailable("synthetic source read before open()")
        s = self.scenario
        if self.paced:
            self._sleep(s.capture_s)
            now = self._clock()
            t_s = ((now - s.capture_s) - self._opened_at) * self.time_scale
            point, faults = s.point_at(t_s), s.faults_at(t_s)
            x, truth = synthesize(s.machine, point, faults, s.fs_hz, s.n_samples, t_s, seed=(s.seed, self._seq))
            truth.update(scenario=s.name, index=self._seq, day=t_s / 86400.0)
            t0_utc = now - s.capture_s
        else:
            if self._next >= s.n_captures:
                raise EndOfSource(f"scenario {s.name!r}: all {s.n_captures} captures delivered")
            x, truth, t0_utc = s.capture(self._next)
            self._next += 1
        self.last_truth = truth
        # the digitiser's word: float32, exactly what `skidvib simulate` stores in its WAV files,
        # so the live simulator and a replay of its recordings give the same analysis
        x = np.asarray(x, dtype=np.float32).astype(np.float64)
        cap = Capture(
            accel_ms2=x,
            fs_hz=s.fs_hz,
            t0_utc_s=t0_utc,
            channel=s.channel,
            source_id=self.source_id,
            seq=self._seq,
            full_scale_ms2=truth["full_scale_ms2"],
        )
        self._seq += 1
        return (cap,)


__all__ = ["SyntheticSource", "steady_scenario"]
