"""Generated test set for the diagnosis: one fault class alone or two at once, on the machine simulator.

Every case is fixed by its class and seed: machine levels, fault levels,
running speed (a 4-pole 50 Hz motor, 23.5-24.8 Hz), a speed drift within the
capture (±0.2 %), measurement noise and one distractor tone from a
neighbouring machine at a random, non-synchronous frequency are drawn from
``numpy.random.default_rng(seed)``.

The config the agent sees (:data:`CASE_CONFIG`) describes the machine as a
technician would: speed range, line frequency, poles, rotor bars, vanes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from agent.config import AgentConfig, parse_config
from agent.simulator import BearingDefect, Faults, OperatingPoint, Resonance, SimBearing, SimMachine, synthesize

FS_HZ = 25600.0
N_SAMPLES = 65536  # 2.56 s
#: fault level range, mm/s r.m.s. (zone B to D for a group 2 rigid machine: A/B 1.4, C/D 4.5 mm/s)
LEVEL_MM_S = (1.5, 4.0)
#: weak faults: around the zone A/B boundary, where without a baseline the agent should stay quiet or unsure
WEAK_LEVEL_MM_S = (0.8, 1.5)
#: the fault classes of the test set (finding codes), plus "healthy"
CLASSES = (
    "healthy", "unbalance", "misalignment", "bent_shaft", "looseness", "belt", "cavitation",
    "electrical_2xlf", "rotor_bar", "vane_pass", "resonance", "bearing_outer_race", "bearing_inner_race",
)
#: pairs that are run together (each class with another of a different kind)
PAIRS = (
    ("unbalance", "cavitation"), ("misalignment", "electrical_2xlf"), ("looseness", "rotor_bar"),
    ("unbalance", "belt"), ("bent_shaft", "vane_pass"), ("misalignment", "cavitation"),
    ("electrical_2xlf", "vane_pass"), ("rotor_bar", "unbalance"), ("resonance", "misalignment"),
    ("belt", "electrical_2xlf"), ("looseness", "cavitation"), ("bearing_outer_race", "unbalance"),
    ("bearing_inner_race", "misalignment"),
)
#: the pump drive-end bearing of the test machine (6310-like proportions, invented)
BEARING = {"name": "pump drive end", "balls": 8, "ball_diameter_mm": 20.6, "pitch_diameter_mm": 80.0}

CASE_CONFIG: AgentConfig = parse_config({
    "source": {"fs_hz": FS_HZ, "capture_s": N_SAMPLES / FS_HZ},
    "machine": {"speed_rpm": [600.0, 1800.0], "line_hz": 50.0, "poles": 4, "rotor_bars": 28, "vanes": 6,
                "bearings": [BEARING]},
}, "<diagnosis test set>")


@dataclass(frozen=True, slots=True)
class Case:
    classes: tuple[str, ...]
    seed: int
    accel_ms2: np.ndarray
    truth: dict

    @property
    def name(self) -> str:
        return "+".join(self.classes) + f"#{self.seed}"


def _apply(kind: str, rng: np.random.Generator, m: dict, f: dict, levels: tuple[float, float]) -> None:
    level = rng.uniform(*levels)  # mm/s r.m.s.
    if kind == "unbalance":
        f["unbalance_mm_s"] = level
    elif kind == "misalignment":
        f["misalignment_mm_s"] = level
    elif kind == "bent_shaft":
        f["bent_shaft_mm_s"] = level
    elif kind == "looseness":
        f["looseness_mm_s"] = 0.6 * level
    elif kind == "belt":
        f["belt_wear_mm_s"] = 0.6 * level
        m["belt_ratio"] = rng.uniform(0.3, 0.45)
    elif kind == "cavitation":
        f["cavitation_g"] = rng.uniform(0.1, 0.5)
    elif kind == "electrical_2xlf":
        m["line_mm_s"] = (0.05, 0.6 * level)
    elif kind == "rotor_bar":
        m["rotor_bar_g"] = rng.uniform(0.05, 0.2)
        m["rotor_bar_sideband_ratio"] = rng.uniform(0.5, 1.0)
    elif kind == "vane_pass":
        m["vane_pass_mm_s"] = (level, 0.3 * level)
    elif kind == "resonance":
        m["structure"] = Resonance(rng.uniform(130.0, 600.0), rng.uniform(0.03, 0.06), rng.uniform(3.0, 6.0))
    elif kind in ("bearing_outer_race", "bearing_inner_race"):
        defect = "outer" if kind == "bearing_outer_race" else "inner"
        stage = int(rng.integers(2, 4))
        f["bearings"] = (*f.get("bearings", ()), BearingDefect(
            BEARING["name"], defect, impulse_g=rng.uniform(0.3, 1.5), stage=stage,
            tone_mm_s=rng.uniform(0.1, 0.4), slip_frac=rng.uniform(0.0, 0.015)))
    elif kind != "healthy":
        raise ValueError(f"unknown class {kind!r}")


def make_case(classes: tuple[str, ...] | str, seed: int, levels: tuple[float, float] = LEVEL_MM_S) -> Case:
    """One capture of the simulated skid with the given fault class(es); ``levels`` = fault level range, mm/s."""
    if isinstance(classes, str):
        classes = (classes,)
    rng = np.random.default_rng([seed, *(sum(map(ord, c)) for c in classes)])
    m: dict = {"vanes": 6, "rotor_bars": 28, "residual_1x_mm_s": rng.uniform(0.4, 1.0),
               "bearings": (SimBearing(**BEARING),),
               "noise_g": rng.uniform(0.001, 0.004), "floor_mm_s": rng.uniform(0.03, 0.08)}
    f: dict = {}
    for c in classes:
        _apply(c, rng, m, f, levels)
    speed = rng.uniform(23.5, 24.8)
    point = OperatingPoint(speed_hz=speed, speed_end_hz=speed * (1 + rng.uniform(-0.002, 0.002)))
    x, truth = synthesize(SimMachine(**m), point, Faults(**f), FS_HZ, N_SAMPLES, seed=seed)
    # a distractor: a tone from a neighbouring machine, not locked to this one's speed
    fd = rng.uniform(30.0, 400.0)
    while min(abs(fd / speed - k) for k in range(1, 20)) < 0.1 or abs(fd - 100.0) < 2 or abs(fd - 50.0) < 2:
        fd = rng.uniform(30.0, 400.0)
    vd = rng.uniform(0.1, 0.4)  # mm/s r.m.s.
    t = np.arange(N_SAMPLES) / FS_HZ
    x = x + np.sqrt(2) * vd * 1e-3 * 2 * np.pi * fd * np.sin(2 * np.pi * fd * t + rng.uniform(0, 2 * np.pi))
    truth = {**truth, "distractor_hz": fd, "distractor_mm_s": vd}
    return Case(tuple(classes), int(seed), x, truth)


__all__ = ["CASE_CONFIG", "CLASSES", "Case", "FS_HZ", "LEVEL_MM_S", "N_SAMPLES", "PAIRS", "WEAK_LEVEL_MM_S", "make_case"]
