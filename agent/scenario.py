"""Simulator scenarios: a machine and a timeline of operating states, faults and captures (TOML).

A scenario file (``replay/scenarios/*.toml``) says what the machine is, how
it runs over days or weeks (speed steps with VFD ramps, stops, slow speed
drift) and when faults start, grow and are repaired. The loader is strict:
unknown keys, wrong types and values out of range are all collected and
reported together (:class:`~agent.errors.ConfigError`, naming file and key).

:meth:`Scenario.capture` turns capture number *i* into samples and ground
truth with :func:`agent.simulator.synthesize`, seeded by (scenario seed, i):
the same file always gives the same recordings.

Layout::

    [scenario]   name, title, start_utc, days, seed, fs_hz, n_samples, interval_h, channel
    [[scenario.dense]]  from_day, to_day, interval_min     (extra captures in a window)
    [machine]    site, name, tag, poles, line_hz, vfd, rated_slip, rotor_bars, vanes, belt_ratio,
                 residual_1x_mm_s, vane_pass_mm_s, line_mm_s, rotor_bar_g, floor_mm_s, noise_g,
                 full_scale_g, speed_drift_pct, structure = {freq_hz, damping, gain},
                 ring = {freq_hz, damping}
    [[machine.bearings]]  name, balls, ball_diameter_mm, pitch_diameter_mm, contact_angle_deg
    [[operation]] from_day, state ("running" | "stopped"), speed_rpm, ramp_s
    [[fault]]    kind, from_day, to_day, levels = [[day, level], ...]   (piecewise linear)
                 bearing faults also: bearing, defect, stages = [[day, stage], ...],
                 tone_mm_s = [[day, v], ...], slip_frac, jitter_frac
    [[sensor_fault]] kind, from_day, to_day, level_g
"""

from __future__ import annotations

import datetime as dt
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from agent.errors import ConfigError
from agent.simulator import (
    BEARING_DEFECTS,
    SENSOR_FAULTS,
    BearingDefect,
    Faults,
    OperatingPoint,
    Resonance,
    SensorFault,
    SimBearing,
    SimMachine,
    synthesize,
)

FAULT_KINDS = ("unbalance", "misalignment", "bent_shaft", "looseness", "belt_wear", "cavitation", "bearing")
#: level unit per fault kind (for messages and the ground truth)
FAULT_UNITS = {
    "unbalance": "mm/s", "misalignment": "mm/s", "bent_shaft": "mm/s", "looseness": "mm/s",
    "belt_wear": "mm/s", "cavitation": "g", "bearing": "g",
}
_REQUIRED = object()


# ───────────────────────────── model ─────────────────────────────


@dataclass(frozen=True, slots=True)
class Operation:
    from_s: float
    running: bool
    speed_hz: float
    ramp_s: float


@dataclass(frozen=True, slots=True)
class FaultEvent:
    kind: str
    from_s: float
    to_s: float
    levels: tuple[tuple[float, float], ...]  # (time s, level)
    bearing: str = ""
    defect: str = ""
    stages: tuple[tuple[float, int], ...] = ()
    tone_mm_s: tuple[tuple[float, float], ...] = ()
    slip_frac: float = 0.01
    jitter_frac: float = 0.01

    def active(self, t_s: float) -> bool:
        return self.from_s <= t_s < self.to_s

    def level(self, t_s: float) -> float:
        if not self.active(t_s):
            return 0.0
        ts, vs = zip(*self.levels)
        return float(np.interp(t_s, ts, vs))

    def stage(self, t_s: float) -> int:
        st = 1
        for t, s in self.stages:
            if t_s >= t:
                st = s
        return st

    def tone(self, t_s: float) -> float:
        if not self.tone_mm_s:
            return 0.4 * self.level(t_s)  # common-practice default: tone grows with the impacts
        ts, vs = zip(*self.tone_mm_s)
        return float(np.interp(t_s, ts, vs))

    def describe(self) -> str:
        if self.kind == "bearing":
            return f"{self.defect} defect on bearing '{self.bearing}'"
        return self.kind.replace("_", " ")


@dataclass(frozen=True, slots=True)
class SensorFaultEvent:
    kind: str
    from_s: float
    to_s: float
    level_g: float


@dataclass(frozen=True, slots=True)
class Scenario:
    """A loaded scenario; times are seconds from ``start_utc_s``."""

    name: str
    title: str
    path: str
    start_utc_s: float
    duration_s: float
    seed: int
    fs_hz: float
    n_samples: int
    channel: str
    site: str
    machine_name: str
    tag: str
    line_hz: float
    vfd: bool
    rated_slip: float
    speed_drift_pct: float
    machine: SimMachine
    operations: tuple[Operation, ...]
    faults: tuple[FaultEvent, ...]
    sensor_faults: tuple[SensorFaultEvent, ...]
    interval_s: float = 3600.0
    capture_times_s: tuple[float, ...] = field(repr=False, default=())

    @property
    def n_captures(self) -> int:
        return len(self.capture_times_s)

    @property
    def capture_s(self) -> float:
        return self.n_samples / self.fs_hz

    # --- timeline ---

    def _drift(self, t_s: float) -> float:
        """Slow speed drift factor: two slow sines (7 h and 31 h periods), phases from the seed."""
        if not self.speed_drift_pct:
            return 1.0
        p1, p2 = np.random.default_rng([self.seed, 7]).uniform(0, 2 * np.pi, 2)
        d = 0.6 * math.sin(2 * math.pi * t_s / (7 * 3600) + p1) + 0.4 * math.sin(2 * math.pi * t_s / (31 * 3600) + p2)
        return 1.0 + self.speed_drift_pct / 100.0 * d

    def speed_at(self, t_s: float) -> float:
        """Shaft speed (Hz) at scenario time ``t_s``; 0 when stopped."""
        cur, prev = None, None
        for op in self.operations:
            if op.from_s <= t_s:
                prev, cur = cur, op
        if cur is None or not cur.running:
            return 0.0
        target = cur.speed_hz
        if prev is not None and prev.running and cur.ramp_s > 0 and t_s < cur.from_s + cur.ramp_s:
            a = (t_s - cur.from_s) / cur.ramp_s
            target = prev.speed_hz + a * (cur.speed_hz - prev.speed_hz)
        return target * self._drift(t_s)

    def point_at(self, t_s: float) -> OperatingPoint:
        s0 = self.speed_at(t_s)
        s1 = self.speed_at(t_s + self.capture_s)
        if s0 <= 0 or s1 <= 0:
            return OperatingPoint(False, 0.0, None, self.line_hz)
        line = s0 * self.machine.poles / 2 / (1 - self.rated_slip) if self.vfd else self.line_hz
        return OperatingPoint(True, s0, None if s1 == s0 else s1, line)

    def faults_at(self, t_s: float) -> Faults:
        kw: dict[str, Any] = {}
        bearings = []
        for f in self.faults:
            if not f.active(t_s):
                continue
            if f.kind == "bearing":
                bearings.append(BearingDefect(f.bearing, f.defect, f.level(t_s), f.stage(t_s), f.tone(t_s),
                                              f.slip_frac, f.jitter_frac))
            else:
                key = f"{f.kind}_g" if f.kind == "cavitation" else f"{f.kind}_mm_s"
                kw[key] = kw.get(key, 0.0) + f.level(t_s)
        sensor = tuple(SensorFault(s.kind, s.level_g) for s in self.sensor_faults if s.from_s <= t_s < s.to_s)
        return Faults(bearings=tuple(bearings), sensor=sensor, **kw)

    def capture(self, i: int) -> tuple[np.ndarray, dict, float]:
        """Samples (m/s²), ground truth and UTC start time of capture ``i``."""
        if not 0 <= i < self.n_captures:
            raise IndexError(f"capture {i} outside 0..{self.n_captures - 1}")
        t_s = self.capture_times_s[i]
        x, truth = synthesize(self.machine, self.point_at(t_s), self.faults_at(t_s), self.fs_hz, self.n_samples,
                              t_s, seed=(self.seed, i))
        truth["scenario"] = self.name
        truth["index"] = i
        truth["day"] = t_s / 86400.0
        return x, truth, self.start_utc_s + t_s

    def events(self) -> list[dict]:
        """The scenario's story, in time order: what a monitor should notice and when."""
        ev = []
        prev = None
        for op in self.operations:
            if prev is None or op.running != prev.running or op.speed_hz != prev.speed_hz:
                what = f"running at {op.speed_hz * 60:.0f} r/min" if op.running else "stopped"
                ev.append({"t_s": op.from_s, "kind": "operation", "what": what})
            prev = op
        for f in self.faults:
            extra = {"bearing": f.bearing, "defect": f.defect} if f.kind == "bearing" else {}
            ev.append({"t_s": f.from_s, "kind": f.kind, "phase": "begins", "what": f"{f.describe()} begins", **extra})
            for t, s in f.stages:
                if t > f.from_s:
                    ev.append({"t_s": t, "kind": f.kind, "phase": "grows",
                               "what": f"{f.describe()} reaches stage {s}", **extra})
            if f.to_s < self.duration_s:
                how = "ends" if f.kind == "cavitation" else "ends (repaired)"
                ev.append({"t_s": f.to_s, "kind": f.kind, "phase": "ends", "what": f"{f.describe()} {how}", **extra})
        for s in self.sensor_faults:
            ev.append({"t_s": s.from_s, "kind": "sensor", "phase": "begins", "what": f"sensor fault ({s.kind}) begins"})
            ev.append({"t_s": s.to_s, "kind": "sensor", "phase": "ends", "what": f"sensor fault ({s.kind}) ends"})
        ev.sort(key=lambda e: e["t_s"])
        for e in ev:
            e["day"] = e["t_s"] / 86400.0
            e["t_utc_s"] = self.start_utc_s + e["t_s"]
            e["utc"] = utc_text(e["t_utc_s"])
        return ev

    def agent_config(self) -> dict:
        """An agent configuration (as a TOML-ready dict) that matches this machine."""
        m = self.machine
        speeds = [op.speed_hz * 60 for op in self.operations if op.running] or [1500.0]
        return {
            "asset": {"site": self.site, "name": self.machine_name, "tag": self.tag},
            "source": {"kind": "replay", "fs_hz": self.fs_hz, "capture_s": self.capture_s, "channel": self.channel,
                       "interval_s": min(self.interval_s, 86400.0),
                       "replay": {"paths": ["."]}},
            "machine": {
                "speed_rpm": [float(round(0.8 * min(speeds))), float(round(1.1 * max(speeds)))],
                "line_hz": self.line_hz,
                "poles": m.poles,
                "rotor_bars": m.rotor_bars,
                "vanes": m.vanes,
                "bearings": [
                    {"name": b.name, "balls": b.balls, "ball_diameter_mm": b.ball_diameter_mm,
                     "pitch_diameter_mm": b.pitch_diameter_mm, "contact_angle_deg": b.contact_angle_deg}
                    for b in m.bearings
                ],
            },
            "sensor": {"full_scale_g": m.full_scale_g},
        }


def utc_text(t_utc_s: float) -> str:
    return dt.datetime.fromtimestamp(t_utc_s, dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


# ───────────────────────────── strict reading ─────────────────────────────


class _Reader:
    """Collects every problem of a scenario file, each naming its dotted key."""

    def __init__(self) -> None:
        self.errors: list[str] = []

    def table(self, data: Any, key: str) -> dict:
        if not isinstance(data, dict):
            self.errors.append(f"{key}: expected a table, got {type(data).__name__}")
            return {}
        return data

    def tables(self, data: Any, key: str) -> list[dict]:
        if data is None:
            return []
        if not isinstance(data, list) or not all(isinstance(d, dict) for d in data):
            self.errors.append(f"{key}: expected an array of tables ([[{key}]])")
            return []
        return data

    def get(self, t: dict, key: str, prefix: str, kind: type, default: Any = _REQUIRED, *, lo=None, hi=None,
            choices=None) -> Any:
        dotted = f"{prefix}.{key}" if prefix else key
        if key not in t:
            if default is _REQUIRED:
                self.errors.append(f"{dotted}: required key is missing")
                return None
            return default
        v = t[key]
        ok = isinstance(v, kind) and not (kind in (int, float) and isinstance(v, bool))
        if kind is float and isinstance(v, int) and not isinstance(v, bool):
            v, ok = float(v), True
        if not ok:
            self.errors.append(f"{dotted}: expected {kind.__name__}, got {type(v).__name__} {v!r}")
            return None if default is _REQUIRED else default
        if isinstance(v, float) and not math.isfinite(v):
            self.errors.append(f"{dotted}: expected a finite number, got {v!r}")
            return None if default is _REQUIRED else default
        if (lo is not None and v < lo) or (hi is not None and v > hi):
            self.errors.append(f"{dotted}: {v!r} out of range [{lo}, {hi}]")
            return None if default is _REQUIRED else default
        if choices is not None and v not in choices:
            self.errors.append(f"{dotted}: {v!r} is not allowed; choose one of {', '.join(map(repr, choices))}")
            return None if default is _REQUIRED else default
        return v

    def numbers(self, t: dict, key: str, prefix: str, default=(), *, lo=0.0) -> tuple[float, ...]:
        dotted = f"{prefix}.{key}"
        v = t.get(key, list(default))
        if not isinstance(v, list) or not all(isinstance(a, (int, float)) and not isinstance(a, bool) for a in v):
            self.errors.append(f"{dotted}: expected a list of numbers, got {v!r}")
            return tuple(default)
        if any(a < lo for a in v):
            self.errors.append(f"{dotted}: values must be >= {lo}, got {v!r}")
        return tuple(float(a) for a in v)

    def points(self, t: dict, key: str, prefix: str, *, lo=0.0, hi=None, integer=False, required=False):
        dotted = f"{prefix}.{key}"
        if key not in t:
            if required:
                self.errors.append(f"{dotted}: required key is missing (a list of [day, value] pairs)")
            return ()
        v = t[key]
        good = isinstance(v, list) and len(v) > 0 and all(
            isinstance(p, list) and len(p) == 2
            and all(isinstance(a, (int, float)) and not isinstance(a, bool) for a in p) for p in v
        )
        if not good:
            self.errors.append(f"{dotted}: expected a non-empty list of [day, value] pairs, got {v!r}")
            return ()
        days = [p[0] for p in v]
        if days != sorted(days):
            self.errors.append(f"{dotted}: days must be in increasing order, got {days}")
        for d, val in v:
            if val < lo or (hi is not None and val > hi) or (integer and val != int(val)):
                what = "an integer " if integer else ""
                self.errors.append(f"{dotted}: value {val!r} at day {d} must be {what}in [{lo}, {hi}]")
        return tuple((float(d) * 86400.0, int(val) if integer else float(val)) for d, val in v)

    def unknown(self, t: dict, allowed: set[str], prefix: str) -> None:
        for k in t:
            if k not in allowed:
                import difflib

                hint = difflib.get_close_matches(k, sorted(allowed), n=1)
                extra = f" (did you mean '{hint[0]}'?)" if hint else ""
                self.errors.append(f"{prefix + '.' if prefix else ''}{k}: unknown key{extra}; "
                                   f"allowed here: {', '.join(sorted(allowed))}")


_SCENARIO_KEYS = {"name", "title", "start_utc", "days", "seed", "fs_hz", "n_samples", "interval_h", "channel", "dense"}
_MACHINE_KEYS = {
    "site", "name", "tag", "poles", "line_hz", "vfd", "rated_slip", "rotor_bars", "vanes", "belt_ratio",
    "residual_1x_mm_s", "vane_pass_mm_s", "line_mm_s", "rotor_bar_g", "rotor_bar_sideband_ratio",
    "floor_mm_s", "noise_g", "full_scale_g", "speed_drift_pct", "structure", "ring", "bearings",
}


def parse_scenario(data: dict, path: str = "<scenario>") -> Scenario:
    """Validate a parsed scenario document; raise ConfigError listing every problem."""
    r = _Reader()
    r.unknown(data, {"scenario", "machine", "operation", "fault", "sensor_fault"}, "")
    sc = r.table(data.get("scenario", {}), "scenario")
    r.unknown(sc, _SCENARIO_KEYS, "scenario")
    name = r.get(sc, "name", "scenario", str)
    title = r.get(sc, "title", "scenario", str, "")
    start = sc.get("start_utc")
    start_s = 0.0
    if not isinstance(start, dt.datetime) or start.tzinfo is None:
        r.errors.append(f"scenario.start_utc: expected a TOML date-time with zone, e.g. 2026-03-02T06:00:00Z, "
                        f"got {start!r}")
    else:
        start_s = start.timestamp()
    days = r.get(sc, "days", "scenario", float, lo=0.01, hi=3650.0)
    seed = r.get(sc, "seed", "scenario", int, 1, lo=0, hi=2**63 - 1)
    fs_hz = r.get(sc, "fs_hz", "scenario", float, 25600.0, lo=1000.0, hi=200_000.0)
    n_samples = r.get(sc, "n_samples", "scenario", int, 65536, lo=1024, hi=1 << 22)
    interval_h = r.get(sc, "interval_h", "scenario", float, 1.0, lo=0.001, hi=24 * 30)
    channel = r.get(sc, "channel", "scenario", str, "ch0")
    dense = []
    for i, d in enumerate(r.tables(sc.get("dense"), "scenario.dense")):
        p = f"scenario.dense[{i}]"
        r.unknown(d, {"from_day", "to_day", "interval_min"}, p)
        a = r.get(d, "from_day", p, float, lo=0.0)
        b = r.get(d, "to_day", p, float, lo=0.0)
        step = r.get(d, "interval_min", p, float, lo=0.1)
        if None not in (a, b, step):
            if b <= a:
                r.errors.append(f"{p}.to_day: {b} must be after from_day {a}")
            dense.append((a * 86400.0, b * 86400.0, step * 60.0))

    mt = r.table(data.get("machine", {}), "machine")
    r.unknown(mt, _MACHINE_KEYS, "machine")
    bearings = []
    for i, b in enumerate(r.tables(mt.get("bearings"), "machine.bearings")):
        p = f"machine.bearings[{i}]"
        r.unknown(b, {"name", "balls", "ball_diameter_mm", "pitch_diameter_mm", "contact_angle_deg"}, p)
        bn = r.get(b, "name", p, str)
        balls = r.get(b, "balls", p, int, lo=3, hi=100)
        bd = r.get(b, "ball_diameter_mm", p, float, lo=0.1, hi=500.0)
        pd = r.get(b, "pitch_diameter_mm", p, float, lo=1.0, hi=5000.0)
        ca = r.get(b, "contact_angle_deg", p, float, 0.0, lo=0.0, hi=60.0)
        if None not in (bn, balls, bd, pd, ca):
            if bd >= pd:
                r.errors.append(f"{p}: ball_diameter_mm {bd} must be smaller than pitch_diameter_mm {pd}")
            else:
                bearings.append(SimBearing(bn, balls, bd, pd, ca))

    def resonance(key: str, gain: bool, default: Resonance | None) -> Resonance | None:
        if key not in mt:
            return default
        t = r.table(mt[key], f"machine.{key}")
        keys = {"freq_hz", "damping", "gain"} if gain else {"freq_hz", "damping"}
        r.unknown(t, keys, f"machine.{key}")
        f = r.get(t, "freq_hz", f"machine.{key}", float, lo=0.1, hi=100_000.0)
        z = r.get(t, "damping", f"machine.{key}", float, lo=0.001, hi=0.9)
        g = r.get(t, "gain", f"machine.{key}", float, 1.0, lo=0.01, hi=100.0) if gain else 1.0
        if None in (f, z, g):
            return default
        return Resonance(f, z, g)

    defaults = SimMachine()
    poles = r.get(mt, "poles", "machine", int, 4, lo=2, hi=48)
    if poles is not None and poles % 2:
        r.errors.append(f"machine.poles: {poles} must be even")
    mk = dict(
        poles=poles or 4,
        rotor_bars=r.get(mt, "rotor_bars", "machine", int, defaults.rotor_bars, lo=0, hi=500),
        vanes=r.get(mt, "vanes", "machine", int, defaults.vanes, lo=0, hi=128),
        belt_ratio=r.get(mt, "belt_ratio", "machine", float, 0.0, lo=0.0, hi=0.99),
        bearings=tuple(bearings),
        residual_1x_mm_s=r.get(mt, "residual_1x_mm_s", "machine", float, defaults.residual_1x_mm_s, lo=0.0, hi=100.0),
        vane_pass_mm_s=r.numbers(mt, "vane_pass_mm_s", "machine", defaults.vane_pass_mm_s),
        line_mm_s=r.numbers(mt, "line_mm_s", "machine", defaults.line_mm_s),
        rotor_bar_g=r.get(mt, "rotor_bar_g", "machine", float, defaults.rotor_bar_g, lo=0.0, hi=100.0),
        rotor_bar_sideband_ratio=r.get(mt, "rotor_bar_sideband_ratio", "machine", float,
                                       defaults.rotor_bar_sideband_ratio, lo=0.0, hi=10.0),
        floor_mm_s=r.get(mt, "floor_mm_s", "machine", float, defaults.floor_mm_s, lo=0.0, hi=100.0),
        noise_g=r.get(mt, "noise_g", "machine", float, defaults.noise_g, lo=0.0, hi=100.0),
        full_scale_g=r.get(mt, "full_scale_g", "machine", float, defaults.full_scale_g, lo=0.01, hi=10_000.0),
        structure=resonance("structure", True, None),
        ring=resonance("ring", False, defaults.ring),
    )
    line_hz = r.get(mt, "line_hz", "machine", float, 50.0, choices=(50.0, 60.0))
    vfd = r.get(mt, "vfd", "machine", bool, False)
    rated_slip = r.get(mt, "rated_slip", "machine", float, 0.015, lo=0.0, hi=0.2)
    drift = r.get(mt, "speed_drift_pct", "machine", float, 0.0, lo=0.0, hi=10.0)
    site = r.get(mt, "site", "machine", str, "")
    mname = r.get(mt, "name", "machine", str, "")
    tag = r.get(mt, "tag", "machine", str, "SIM-1")
    machine = None
    if not r.errors and all(v is not None for k, v in mk.items() if k != "structure"):
        machine = SimMachine(**mk)
    names = {b.name for b in bearings}
    dur_s = (days or 0.0) * 86400.0

    ops = []
    for i, o in enumerate(r.tables(data.get("operation"), "operation")):
        p = f"operation[{i}]"
        r.unknown(o, {"from_day", "state", "speed_rpm", "ramp_s"}, p)
        fd = r.get(o, "from_day", p, float, lo=0.0)
        state = r.get(o, "state", p, str, "running", choices=("running", "stopped"))
        rpm = r.get(o, "speed_rpm", p, float, 0.0 if state == "stopped" else _REQUIRED, lo=0.0, hi=60_000.0)
        ramp = r.get(o, "ramp_s", p, float, 0.0, lo=0.0, hi=3600.0)
        if state == "running" and rpm is not None and rpm < 30.0:
            r.errors.append(f"{p}.speed_rpm: {rpm} is too slow for a running machine (>= 30 r/min)")
        if None not in (fd, state, rpm, ramp):
            ops.append(Operation(fd * 86400.0, state == "running", rpm / 60.0, ramp))
    if not ops:
        r.errors.append("operation: at least one [[operation]] is required (from_day = 0)")
    elif [o.from_s for o in ops] != sorted(o.from_s for o in ops):
        r.errors.append("operation: from_day values must be in increasing order")
    elif ops[0].from_s != 0.0:
        r.errors.append(f"operation[0].from_day: the first operation must start at day 0, got {ops[0].from_s / 86400}")

    faults = []
    for i, f in enumerate(r.tables(data.get("fault"), "fault")):
        p = f"fault[{i}]"
        kind = r.get(f, "kind", p, str, choices=FAULT_KINDS)
        allowed = {"kind", "from_day", "to_day", "levels"}
        if kind == "bearing":
            allowed |= {"bearing", "defect", "stages", "tone_mm_s", "slip_frac", "jitter_frac"}
        r.unknown(f, allowed, p)
        fd = r.get(f, "from_day", p, float, lo=0.0)
        td = r.get(f, "to_day", p, float, days or 1e9, lo=0.0)
        hi = 10_000.0
        levels = r.points(f, "levels", p, lo=0.0, hi=hi, required=True)
        extra: dict[str, Any] = {}
        if kind == "bearing":
            bn = r.get(f, "bearing", p, str)
            if bn is not None and bn not in names:
                r.errors.append(f"{p}.bearing: {bn!r} is not one of machine.bearings ({', '.join(sorted(names)) or 'none'})")
            extra = dict(
                bearing=bn or "",
                defect=r.get(f, "defect", p, str, choices=BEARING_DEFECTS) or "",
                stages=r.points(f, "stages", p, lo=1, hi=4, integer=True),
                tone_mm_s=r.points(f, "tone_mm_s", p, lo=0.0, hi=100.0),
                slip_frac=r.get(f, "slip_frac", p, float, 0.01, lo=0.0, hi=0.1),
                jitter_frac=r.get(f, "jitter_frac", p, float, 0.01, lo=0.0, hi=0.1),
            )
        if fd is not None and td is not None and td <= fd:
            r.errors.append(f"{p}.to_day: {td} must be after from_day {fd}")
        if kind is not None and fd is not None and td is not None and levels:
            faults.append(FaultEvent(kind, fd * 86400.0, td * 86400.0, levels, **extra))

    sensor = []
    for i, s in enumerate(r.tables(data.get("sensor_fault"), "sensor_fault")):
        p = f"sensor_fault[{i}]"
        r.unknown(s, {"kind", "from_day", "to_day", "level_g"}, p)
        kind = r.get(s, "kind", p, str, choices=SENSOR_FAULTS)
        fd = r.get(s, "from_day", p, float, lo=0.0)
        td = r.get(s, "to_day", p, float, lo=0.0)
        lvl = r.get(s, "level_g", p, float, 0.0, lo=-1000.0, hi=10_000.0)
        if None not in (kind, fd, td, lvl):
            if td <= fd:
                r.errors.append(f"{p}.to_day: {td} must be after from_day {fd}")
            try:
                SensorFault(kind, lvl)
            except ValueError as exc:
                r.errors.append(f"{p}.level_g: {exc}")
            else:
                sensor.append(SensorFaultEvent(kind, fd * 86400.0, td * 86400.0, lvl))

    if machine is not None and fs_hz is not None and ops:
        top = max(o.speed_hz for o in ops)
        if top * max(machine.vanes, 1) * 2 > fs_hz / 2:
            r.errors.append(f"scenario.fs_hz: {fs_hz} is too low for {top * 60:.0f} r/min and {machine.vanes} vanes")
    if r.errors or machine is None:
        raise ConfigError(path, r.errors or ["scenario could not be read"])

    times = set(np.round(np.arange(0.0, dur_s, interval_h * 3600.0), 3).tolist())
    for a, b, step in dense:
        times.update(np.round(np.arange(a, min(b, dur_s), step), 3).tolist())
    return Scenario(
        name=name, title=title, path=str(path), start_utc_s=start_s, duration_s=dur_s, seed=seed, fs_hz=fs_hz,
        n_samples=n_samples, channel=channel, site=site, machine_name=mname, tag=tag, line_hz=line_hz, vfd=vfd,
        rated_slip=rated_slip, speed_drift_pct=drift, machine=machine, operations=tuple(ops),
        faults=tuple(faults), sensor_faults=tuple(sensor), interval_s=interval_h * 3600.0,
        capture_times_s=tuple(sorted(times)),
    )


def load_scenario(path: str | Path) -> Scenario:
    """Read and validate a scenario TOML file. Raises ConfigError naming the file and keys."""
    from agent.config import read_toml

    return parse_scenario(read_toml(path, "scenario file"), str(Path(path)))


def scenarios_dir() -> Path:
    """The project's replay/scenarios folder (next to the agent package)."""
    return Path(__file__).resolve().parents[1] / "replay" / "scenarios"


def find_scenario(name_or_path: str) -> Path:
    """A scenario file by path, or by name in replay/scenarios (with or without .toml)."""
    p = Path(name_or_path)
    if p.exists():
        return p
    for cand in (scenarios_dir() / name_or_path, scenarios_dir() / f"{name_or_path}.toml"):
        if cand.exists():
            return cand
    known = sorted(q.stem for q in scenarios_dir().glob("*.toml"))
    raise ConfigError(str(p), [f"no such scenario file; known scenarios: {', '.join(known) or 'none'}"])


__all__ = ["FaultEvent", "Scenario", "find_scenario", "load_scenario", "parse_scenario", "utc_text"]
