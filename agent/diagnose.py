"""Findings from the accounted spectrum: fault rules, each citing its evidence (pure functions).

``RULES`` is a tuple of small functions ``rule(ctx) -> Finding | None``; each
looks at the :class:`~agent.peaks.AccountedSpectrum` (velocity peaks, mm/s
r.m.s.) and the other facts in :class:`DiagnosisInput`, and returns a
finding with a stable ``code``, a ``confidence`` in [0, 1], the
``evidence`` it used (peaks and figures) and the checks that would confirm
it which the agent cannot make itself (``confirm``). Several findings may
stand at once; :func:`diagnose` ranks them, most credible first.

Confidence = pattern × level: *pattern* says how well the spectrum matches
the fault's signature (the textbook patterns below, common practice);
*level* says whether the amplitude is high enough to matter — against the
learned baseline when there is one (ratio 1.4 → 0, 2.5 → 1), else against
the ISO 20816-3 zone A/B boundary of the machine's group and support
(:data:`agent.features.ISO20816_3_VELOCITY_MM_S`, from memory). A healthy
machine therefore yields at most low-confidence findings.

Signatures used (common practice, from the vibration analysis trade):

* unbalance — 1X dominant in the radial directions, little 2X/3X;
* misalignment — 2X (and 3X) high relative to 1X; high axial 1X/2X;
  phase across the coupling near 180°;
* bent shaft / eccentricity — a 1X family with a clear 2X; reported with
  unbalance as "1X family — confirm with phase";
* mechanical looseness — long harmonic families (many n×X), half orders,
  a raised floor;
* bearing defects — taken from :mod:`agent.bearings` (envelope analysis),
  with their stage;
* electrical — twice line frequency (2× supply frequency) high; rotor-bar
  pass with ±2×LF sidebands; pole-pass sidebands around 1X;
* hydraulic — vane/blade pass high; cavitation = a broadband, random rise
  of the floor above vane pass;
* belt — a sub-synchronous family at the belt rate (below 1X) and harmonics;
* gear mesh — mesh frequency with sidebands at the shaft speeds;
* sub-synchronous instability (oil whirl/whip) — 0.38-0.48X, sleeve
  bearings only;
* resonance — a hump in the floor with peaks riding on it.

The absolute thresholds without a baseline (cavitation floor, rotor-bar
level) are this agent's own settings, tuned on the simulator, not values
from a standard; the learned baseline replaces them.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace

import numpy as np

from agent.features import ISO20816_3_VELOCITY_MM_S
from agent.model import STANDARD_GRAVITY_MS2, Finding
from agent.peaks import AccountedPeak, AccountedSpectrum, floor_spread, hf_floor_densities

#: a finding at or above this confidence is "high confidence"
HIGH_CONFIDENCE = 0.7
#: findings below this confidence are not reported
REPORT_CONFIDENCE = 0.15
#: codes of bearing findings (from agent.bearings)
BEARING_CODES = ("bearing_outer_race", "bearing_inner_race", "bearing_rolling_element", "bearing_cage")
#: every code a rule of this module can give
CODES = (
    "unbalance", "misalignment", "bent_shaft", "looseness", *BEARING_CODES, "electrical_2xlf", "rotor_bar",
    "vane_pass", "cavitation", "belt", "gear_mesh", "subsync_instability", "resonance",
)
#: cavitation without a baseline: high-frequency floor density (g/√Hz) ramp — agent's own setting
CAVITATION_DENSITY_G_RTHZ = (1.5e-4, 6e-4)
#: cavitation beside a called bearing defect: (median ÷ highest) high-frequency region ramp — agent's own setting
CAVITATION_SPREAD = (0.75, 0.85)
#: rotor-bar pass without a baseline: carrier level ramp, g r.m.s. — agent's own setting
ROTOR_BAR_G = (0.02, 0.06)


@dataclass(frozen=True, slots=True)
class PhaseReading:
    """Phase difference (degrees, −180…180) between two channels at an order of running speed.

    ``relation`` says how the two sensors sit: "radial_pair" (horizontal and
    vertical on one bearing) or "across_coupling" (same direction, either
    side of the coupling).
    """

    order: float
    phase_deg: float
    relation: str
    coherence: float = 1.0


@dataclass(frozen=True, slots=True)
class DiagnosisInput:
    """Everything the rules may look at for one capture."""

    accounted: AccountedSpectrum  # velocity peaks in mm/s r.m.s.
    vel_rms_mm_s: float  # overall velocity in the ISO band
    iso_group: int = 2
    support: str = "rigid"
    speed_confidence: float = 1.0
    bearing_findings: tuple[Finding, ...] = ()
    baseline_ratios: Mapping[str, float] | None = None  # feature name → current / baseline (amplitude)
    sleeve_bearings: bool = False
    phase: tuple[PhaseReading, ...] = ()
    axial: bool = False  # the channel is axial

    @property
    def ab_mm_s(self) -> float:
        return ISO20816_3_VELOCITY_MM_S[(self.iso_group, self.support)][0]


Rule = Callable[[DiagnosisInput], "Finding | None"]


# ───────────────────────────── helpers ─────────────────────────────


def ramp(x: float, lo: float, hi: float) -> float:
    """0 at or below ``lo``, 1 at or above ``hi``, linear between."""
    if hi <= lo:
        return 1.0 if x >= hi else 0.0
    return float(min(1.0, max(0.0, (x - lo) / (hi - lo))))


#: rule feature keys → the names of the same levels in the learned baseline (agent.featureset)
BASELINE_FEATURE = {"1X": "order_1x_mm_s", "2X": "order_2x_mm_s", "2xLF": "band_2xlf_mm_s",
                    "subsync": "order_0.5x_mm_s"}


def level_factor(ctx: DiagnosisInput, amp_mm_s: float, feature: str | None = None,
                 lo: float = 0.7, hi: float = 1.5) -> tuple[float, dict]:
    """How much an amplitude matters: vs the baseline ratio of ``feature`` when known, else vs ISO A/B.

    ``ctx.baseline_ratios`` may be keyed by the rule's key ("1X") or by the
    baseline's feature name ("order_1x_mm_s").
    """
    r = None
    if ctx.baseline_ratios is not None and feature is not None:
        r = ctx.baseline_ratios.get(feature, ctx.baseline_ratios.get(BASELINE_FEATURE.get(feature, ""), None))
    if r is not None and math.isfinite(r):
        return ramp(r, 1.4, 2.5), {"metric": f"{feature} / baseline", "value": round(r, 2)}
    rel = amp_mm_s / ctx.ab_mm_s
    return ramp(rel, lo, hi), {"metric": "amplitude / ISO zone A/B boundary", "value": round(rel, 2),
                               "boundary_mm_s": ctx.ab_mm_s}


def _ev(p: AccountedPeak, unit: str) -> dict:
    return {"freq_hz": round(p.freq_hz, 3), "label": p.label, "amp": round(p.amp, 4), "unit": f"{unit} r.m.s.",
            "order": None if p.order is None else round(p.order, 3), "height_db": round(p.height_db, 1)}


def _h(acc: AccountedSpectrum, n: float) -> AccountedPeak | None:
    """The peak at n×X of the reference shaft (shaft or forcing label), if any."""
    f1 = acc.speed_hz
    if not f1:
        return None
    best = None
    for p in acc.peaks:
        if p.category in ("shaft", "forcing") and p.order is not None and p.shaft in ("", acc.shaft_speeds_hz[0][0]):
            if abs(p.order - n) <= max(0.004 * n, 1.5 * acc.bin_width_hz / f1) and (best is None or p.amp > best.amp):
                best = p
    return best


def _amp(p: AccountedPeak | None) -> float:
    return 0.0 if p is None else p.amp


def _accel_g(p: AccountedPeak, unit: str) -> float:
    """Acceleration r.m.s. in g of a velocity peak (mm/s) or an acceleration peak (m/s²)."""
    if unit == "mm/s":
        return p.amp * 1e-3 * 2 * math.pi * p.freq_hz / STANDARD_GRAVITY_MS2
    return p.amp / STANDARD_GRAVITY_MS2


def _hump_note(peaks) -> str:
    return ("; amplified by a resonance hump — judge the level with care" if any(p.on_hump for p in peaks if p)
            else "")


def _finding(code: str, confidence: float, title: str, evidence: list, confirm: tuple[str, ...],
             component: str = "", **extra) -> Finding | None:
    c = float(round(min(1.0, max(0.0, confidence)), 3))
    if c < REPORT_CONFIDENCE:
        return None
    if extra.get("level_mm_s") is None:
        extra.pop("level_mm_s", None)
    else:
        extra["level_mm_s"] = round(float(extra["level_mm_s"]), 4)
    return Finding(code=code, confidence=c, title=title, evidence=tuple(evidence), component=component,
                   confirm=confirm, extra=dict(extra))


def _sync_family(acc: AccountedSpectrum) -> dict[float, float]:
    """Amplitude at 1X…10X of the reference shaft, leaving out forcing tones (vane pass, …)."""
    out = {}
    for n in range(1, 11):
        p = _h(acc, n)
        if p is not None and p.category == "shaft":
            out[n] = p.amp
    return out


def _phase(ctx: DiagnosisInput, order: float, relation: str) -> PhaseReading | None:
    for r in ctx.phase:
        if abs(r.order - order) < 0.01 and r.relation == relation and r.coherence >= 0.5:
            return r
    return None


# ───────────────────────────── shaft rules ─────────────────────────────


def _shaft_pattern(ctx: DiagnosisInput) -> dict:
    acc = ctx.accounted
    p1, p2, p3 = _h(acc, 1), _h(acc, 2), _h(acc, 3)
    a1, a2, a3 = _amp(p1), _amp(p2), _amp(p3)
    fam = _sync_family(acc)
    n_harm = sum(1 for n, a in fam.items() if n >= 2 and a > 0)
    halves = [p for p in acc.peaks if p.family == "half_order"]
    r2 = a2 / a1 if a1 > 0 else (math.inf if a2 > 0 else 0.0)
    r3 = a3 / a1 if a1 > 0 else (math.inf if a3 > 0 else 0.0)
    loose = ramp(n_harm, 3.5, 6.5) * (0.5 + 0.5 * ramp(len(halves), 0.5, 2.5))
    return {"p1": p1, "p2": p2, "p3": p3, "a1": a1, "a2": a2, "a3": a3, "r2": r2, "r3": r3,
            "n_harm": n_harm, "halves": halves, "loose": loose, "fam": fam}


def rule_unbalance(ctx: DiagnosisInput) -> Finding | None:
    """1X dominant (radial), little 2X and 3X."""
    s = _shaft_pattern(ctx)
    if s["p1"] is None:
        return None
    pattern = (1.0 - ramp(s["r2"], 0.2, 0.45)) * (1.0 - ramp(s["r3"], 0.2, 0.4)) * (1.0 - 0.8 * s["loose"])
    if ctx.axial:
        pattern *= 0.6  # unbalance shows radially; a high axial 1X points elsewhere
    lvl, lev = level_factor(ctx, s["a1"], "1X")
    conf = 0.9 * pattern * lvl
    ph = _phase(ctx, 1.0, "radial_pair")
    ev = [_ev(s["p1"], ctx.accounted.unit), {"metric": "2X / 1X", "value": round(s["r2"], 2)},
          {"metric": "3X / 1X", "value": round(s["r3"], 2)}, lev]
    if ph is not None:
        ev.append({"metric": "phase H-V at 1X, degrees", "value": round(ph.phase_deg, 1)})
        conf *= 1.15 if 60 <= abs(ph.phase_deg) <= 120 else 0.6  # ~90° between radial directions
    return _finding(
        "unbalance", conf,
        "1X family — unbalance likely (1X dominant); confirm with phase" + _hump_note([s["p1"]]),
        ev,
        ("phase at 1X: horizontal and vertical on the same bearing about 90° apart, steady from reading to reading",
         "1X in the other radial direction of similar size; axial 1X low",
         "look for build-up, erosion or a lost balance weight before trim balancing"),
        level_mm_s=s["a1"],
    )


def rule_bent_shaft(ctx: DiagnosisInput) -> Finding | None:
    """A 1X family with a clear 2X but little 3X: bent shaft or eccentricity (reported with unbalance)."""
    s = _shaft_pattern(ctx)
    if s["p1"] is None or s["p2"] is None:
        return None
    r2, r3 = s["r2"], s["r3"]
    pattern = ramp(r2, 0.35, 0.55) * (1.0 - ramp(r2, 0.9, 1.2)) * (1.0 - ramp(r3, 0.2, 0.35)) * (1.0 - 0.8 * s["loose"])
    lvl, lev = level_factor(ctx, math.hypot(s["a1"], s["a2"]), "1X")
    conf = 0.8 * pattern * lvl
    ev = [_ev(s["p1"], ctx.accounted.unit), _ev(s["p2"], ctx.accounted.unit),
          {"metric": "2X / 1X", "value": round(r2, 2)}, {"metric": "3X / 1X", "value": round(r3, 2)}, lev]
    return _finding(
        "bent_shaft", conf,
        "1X family with 2X — bent shaft or eccentric rotor; confirm with phase" + _hump_note([s["p1"], s["p2"]]),
        ev,
        ("axial phase at 1X: the two ends of the rotor about 180° apart points to a bent shaft",
         "dial-indicator run-out check of the shaft when stopped and locked out",
         "unbalance gives the same 1X: phase tells them apart"),
        level_mm_s=math.hypot(s["a1"], s["a2"]),
    )


def rule_misalignment(ctx: DiagnosisInput) -> Finding | None:
    """2X (and 3X) high relative to 1X; axial levels; phase across the coupling."""
    s = _shaft_pattern(ctx)
    if s["p2"] is None:
        return None
    r2, r3 = s["r2"], s["r3"]
    pattern = max(ramp(r2, 0.7, 1.1), ramp(r2, 0.45, 0.8) * ramp(r3, 0.25, 0.45)) * (1.0 - 0.8 * s["loose"])
    if ctx.axial:
        pattern = min(1.0, pattern * 1.3 + 0.1)
    level = math.sqrt(s["a1"] ** 2 + s["a2"] ** 2 + s["a3"] ** 2)
    lvl, lev = level_factor(ctx, level, "2X")
    conf = 0.9 * pattern * lvl
    ev = [_ev(p, ctx.accounted.unit) for p in (s["p1"], s["p2"], s["p3"]) if p is not None]
    ev += [{"metric": "2X / 1X", "value": round(r2, 2) if math.isfinite(r2) else None},
           {"metric": "3X / 1X", "value": round(r3, 2) if math.isfinite(r3) else None}, lev]
    for order in (1.0, 2.0):
        ph = _phase(ctx, order, "across_coupling")
        if ph is not None:
            ev.append({"metric": f"phase across the coupling at {order:g}X, degrees", "value": round(ph.phase_deg, 1)})
            conf *= 1.2 if abs(ph.phase_deg) >= 140 else 0.6
    return _finding(
        "misalignment", conf, "2X and 3X high relative to 1X — shaft misalignment likely" + _hump_note([s["p2"]]),
        ev,
        ("axial readings at both coupling bearings: high axial 1X/2X supports misalignment",
         "phase across the coupling at 1X and 2X: about 180° (axial or radial) supports it",
         "laser alignment check when stopped and locked out; look for soft foot and pipe strain"),
        level_mm_s=level,
    )


def rule_looseness(ctx: DiagnosisInput) -> Finding | None:
    """Long harmonic family (many n×X), half orders, raised floor."""
    s = _shaft_pattern(ctx)
    if s["p1"] is None:
        return None
    acc = ctx.accounted
    pattern = s["loose"]
    floor_ev = None
    for r in acc.floor_regions:
        if r.name == "1X-10X" and r.delta_db is not None:
            floor_ev = {"metric": "floor 1X-10X vs baseline, dB", "value": round(r.delta_db, 1)}
            pattern = min(1.0, pattern + 0.2 * ramp(r.delta_db, 3.0, 9.0))
    energy = math.sqrt(sum(a * a for a in s["fam"].values()) + sum(p.amp**2 for p in s["halves"]))
    lvl, lev = level_factor(ctx, energy, "1X", lo=0.5, hi=1.1)
    conf = 0.95 * pattern * lvl
    ev = [{"metric": "harmonics 2X-10X present", "value": s["n_harm"]},
          {"metric": "half orders present", "value": len(s["halves"])}, lev]
    ev += [_ev(p, acc.unit) for p in sorted(s["halves"], key=lambda p: -p.amp)[:3]]
    if floor_ev:
        ev.append(floor_ev)
    return _finding(
        "looseness", conf, f"long 1X harmonic family ({s['n_harm'] + 1} orders) with half orders — mechanical looseness",
        ev,
        ("time waveform: truncated or impacting, non-sinusoidal pattern",
         "compare the readings in the horizontal and vertical directions (looseness is often directional)",
         "check hold-down bolts, base and bearing housing fits when stopped and locked out"),
        level_mm_s=energy,
    )


# ───────────────────────────── bearings ─────────────────────────────


def rule_bearings(ctx: DiagnosisInput) -> tuple[Finding, ...]:
    """Bearing defects as found by the envelope analysis (agent.bearings), with their stage."""
    out = []
    for f in ctx.bearing_findings:
        if not f.code.startswith("bearing"):
            continue
        called = f.code in BEARING_CODES and bool(f.extra.get("called", f.confidence >= 0.5))
        conf = f.confidence if called else min(f.confidence, 0.45)
        confirm = f.confirm or (
            "envelope (demodulated) spectrum trend over the next readings",
            "time waveform review: periodic impacts at the defect rate",
            "listen with a stethoscope; check lubrication and bearing temperature",
        )
        out.append(replace(f, confidence=round(conf, 3), confirm=confirm))
    return tuple(out)


# ───────────────────────────── electrical ─────────────────────────────


def rule_electrical_2xlf(ctx: DiagnosisInput) -> Finding | None:
    """Twice line frequency high (stator, soft foot, air-gap eccentricity)."""
    acc = ctx.accounted
    p = acc.labelled("2xLF")
    if p is None or not acc.line_hz:
        return None
    lvl, lev = level_factor(ctx, p.amp, "2xLF", lo=0.35, hi=0.9)
    a1 = _amp(_h(acc, 1))
    rel = p.amp / a1 if a1 > 0 else 1.0
    conf = 0.9 * lvl * (0.6 + 0.4 * ramp(rel, 0.3, 0.8))
    ev = [_ev(p, acc.unit), {"metric": "2xLF / 1X", "value": round(rel, 2)}, lev]
    notes = []
    p2 = _h(acc, 2)
    if p2 is not None and abs(p2.freq_hz - p.freq_hz) < 3 * acc.bin_width_hz:
        notes.append("2X lies close to 2xLF: a longer capture would separate them")
    return _finding(
        "electrical_2xlf", conf,
        f"twice line frequency ({p.freq_hz:.1f} Hz = 2 × {acc.line_hz:g} Hz supply) high — electrical "
        "(stator, air gap or soft foot)" + _hump_note([p]),
        ev,
        ("switch the motor off and watch: a 2xLF that vanishes the instant power is cut is electrical",
         "check soft foot and the motor's air gap; have the supply and winding checked by a qualified electrician",
         *notes),
        component="motor",
        level_mm_s=p.amp,
    )


def rule_rotor_bar(ctx: DiagnosisInput) -> Finding | None:
    """Rotor-bar pass with ±2×LF sidebands; pole-pass sidebands around 1X."""
    acc = ctx.accounted
    rb = [p for p in acc.peaks if p.category == "rotor_bar"]
    pp = [p for p in acc.peaks if p.category == "pole_pass"]
    if not rb and not pp:
        return None
    carrier = next((p for p in rb if "LF" not in p.label), None)
    sbs = [p for p in rb if "LF" in p.label]
    ev = [_ev(p, acc.unit) for p in rb + pp]
    conf = 0.0
    if carrier is not None:
        g = _accel_g(carrier, acc.unit)
        ratio = (sum(p.amp for p in sbs) / len(sbs) / carrier.amp) if sbs else 0.0
        r = None if ctx.baseline_ratios is None else ctx.baseline_ratios.get("rotor_bar")
        lvl = ramp(r, 1.4, 2.5) if r is not None else ramp(g, *ROTOR_BAR_G)
        conf = 0.85 * lvl * (0.4 + 0.6 * ramp(len(sbs), 0.5, 2.0) * ramp(ratio, 0.3, 0.6))
        ev += [{"metric": "rotor-bar pass, g r.m.s.", "value": round(g, 4)},
               {"metric": "mean 2xLF sideband / carrier", "value": round(ratio, 2)}]
    a1 = _amp(_h(acc, 1))
    lower = [p for p in pp if p.label.startswith("1X-")]
    upper = [p for p in pp if p.label.startswith("1X+")]
    if lower and upper and a1 > 0:  # a rotor problem modulates 1X: sidebands on both sides
        sb = min(max(p.amp for p in lower), max(p.amp for p in upper))
        db = 20 * math.log10(a1 / sb)
        ev.append({"metric": "1X over the weaker pole-pass sideband, dB", "value": round(db, 1)})
        conf = max(conf, 0.8 * (1.0 - ramp(db, 35.0, 50.0)))  # sidebands within ~40 dB of 1X (common practice)
    return _finding(
        "rotor_bar", conf, "rotor-bar pass with 2xLF sidebands / pole-pass sidebands — rotor bar or end-ring problem",
        ev,
        ("high-resolution spectrum around 1X (zoom) for pole-pass sidebands under load",
         "motor current signature analysis by a qualified electrician",
         "compare at full and reduced load: rotor faults grow with load"),
        component="motor",
    )


# ───────────────────────────── hydraulic / aerodynamic ─────────────────────────────


def rule_vane_pass(ctx: DiagnosisInput) -> Finding | None:
    """Vane (blade) pass high: flow off best efficiency point, impeller-to-cutwater gap, wear."""
    acc = ctx.accounted
    vp = [p for p in acc.peaks if p.category == "forcing" and p.family in ("vane_pass", "blade_pass")]
    if not vp:
        return None
    main = max(vp, key=lambda p: p.amp)
    lvl, lev = level_factor(ctx, main.amp, "vane_pass", lo=0.6, hi=1.3)
    a1 = _amp(_h(acc, 1))
    rel = main.amp / a1 if a1 > 0 else 1.0
    conf = 0.9 * lvl * (0.6 + 0.4 * ramp(rel, 0.5, 1.2))
    if main.on_hump:
        conf *= 0.5  # the structure, not the flow, may be what makes it high
    what = "blade pass" if main.family == "blade_pass" else "vane pass"
    return _finding(
        "vane_pass", conf, f"{what} high ({main.label}, {main.order:.0f}X) — hydraulic/aerodynamic forcing"
        + _hump_note([main]),
        [_ev(p, acc.unit) for p in vp] + [{"metric": f"{what} / 1X", "value": round(rel, 2)}, lev],
        ("compare the operating point (flow, head) with the best efficiency point",
         "check the impeller-to-cutwater (or blade-to-casing) gap and wear at the next opening",
         "readings at other flows: vane pass that follows flow is hydraulic"),
        component="pump" if main.family == "vane_pass" else "fan",
        level_mm_s=main.amp,
    )


def rule_cavitation(ctx: DiagnosisInput) -> Finding | None:
    """Broadband, random rise of the floor above vane pass (high-frequency regions).

    ``extra["floor_excess_db"]`` says how far the median high-frequency
    region stands above the level at which the pattern is taken as sure
    (10 dB over the baseline, or the top of the fixed density ramp): the
    evidence strength that :func:`agent.advice.severity_of` grades.
    """
    acc = ctx.accounted
    hf = [r for r in acc.floor_regions if r.f_lo_hz >= 999.0 and r.f_hi_hz > r.f_lo_hz]
    if not hf:
        return None
    with_base = [r for r in hf if r.delta_db is not None]
    ev = []
    if with_base:
        deltas = sorted(r.delta_db for r in with_base)
        mid = deltas[len(deltas) // 2]  # the median region: broadband, not one band
        conf = 0.9 * ramp(mid, 4.0, 10.0)
        excess_db = mid - 10.0
        ev += [{"metric": f"floor {r.name} vs baseline, dB", "value": round(r.delta_db, 1)} for r in with_base]
    else:
        dens = []
        for r, density in hf_floor_densities(hf):
            dens.append(density)
            ev.append({"metric": f"floor {r.name}, g r.m.s.", "value": round(r.level / STANDARD_GRAVITY_MS2, 4)})
        if not dens:
            return None
        mid = sorted(dens)[len(dens) // 2]
        conf = 0.6 * ramp(mid, *CAVITATION_DENSITY_G_RTHZ)  # no baseline: a fixed level, so never high confidence
        excess_db = 20.0 * math.log10(max(mid, 1e-30) / CAVITATION_DENSITY_G_RTHZ[1])
        ev.append({"metric": "no baseline", "value": None, "note": "judged against a fixed floor density"})
    # a bearing defect also lifts the high-frequency floor, with periodic impacts ringing a
    # resonance: its rise sits in that band. Cavitation lifts every octave alike. A called bearing
    # explains the rise unless the median region stands near the highest (agent's own setting,
    # on the simulator: bearing ringing 0.22-0.42, stage-4 bearing floor 0.65-0.72, cavitation 0.88-1)
    called = [f for f in ctx.bearing_findings if f.code in BEARING_CODES and f.extra.get("called", f.confidence >= 0.5)]
    if called:
        spread = floor_spread([r.level / math.sqrt(r.f_hi_hz - r.f_lo_hz) for r in hf])  # per √Hz
        conf *= 0.4 + 0.6 * ramp(spread, *CAVITATION_SPREAD)
        ev.append({"metric": "bearing defect called", "value": called[0].code})
        ev.append({"metric": "median high-frequency region / highest (1 = evenly broadband)", "value": round(spread, 2)})
    return _finding(
        "cavitation", conf, "broadband high-frequency floor raised, no periodic impacts — cavitation or flow noise",
        ev,
        ("check suction pressure and NPSH margin; listen for a gravel-like noise at the pump",
         "time waveform review: random bursts (cavitation) rather than periodic impacts (bearing)",
         "readings at another flow: cavitation changes strongly with flow and suction level"),
        component="pump",
        floor_excess_db=round(excess_db, 1),
    )


# ───────────────────────────── belts, gears, instability ─────────────────────────────


def rule_belt(ctx: DiagnosisInput) -> Finding | None:
    """Sub-synchronous family at the belt rate (or the configured belt tones) with harmonics."""
    acc = ctx.accounted
    belt = [p for p in acc.peaks if p.family == "belt"]
    fams = [f for f in acc.families if f.kind == "harmonics" and f.order is not None and f.order < 0.95]
    members: list[AccountedPeak] = list(belt)
    base = None
    if fams:
        fam = max(fams, key=lambda f: f.energy)
        base = fam.base_hz
        members += [p for p in acc.peaks if p.freq_hz in fam.members_hz]
    elif belt:
        base = min(p.freq_hz for p in belt)
    if not members or base is None:
        return None
    energy = math.sqrt(sum(p.amp**2 for p in members))
    lvl, lev = level_factor(ctx, energy, "belt", lo=0.3, hi=0.8)
    n = len({round(p.freq_hz, 2) for p in members})
    conf = 0.9 * lvl * ramp(n, 1.5, 3.0)
    if any(f.code == "bearing_cage" and f.extra.get("called", f.confidence >= 0.5) for f in ctx.bearing_findings):
        conf *= 0.3  # the envelope found a cage defect: its FTF family, not a belt
    order = base / acc.speed_hz if acc.speed_hz else None
    return _finding(
        "belt", conf,
        f"sub-synchronous family at {base:.2f} Hz" + (f" ({order:.2f}X)" if order else "") + " — belt wear, "
        "looseness or sheave trouble",
        [_ev(p, acc.unit) for p in sorted(members, key=lambda p: p.freq_hz)] + [lev],
        ("strobe the belts: the belt rate is the sub-synchronous fundamental",
         "check belt tension, wear and sheave alignment when stopped and locked out"),
        component="belt drive",
        level_mm_s=energy,
    )


def rule_gear_mesh(ctx: DiagnosisInput) -> Finding | None:
    """Gear mesh frequency high with sidebands at the shaft speeds."""
    acc = ctx.accounted
    gm = [p for p in acc.peaks if p.family == "gear_mesh" and p.category == "forcing"]
    if not gm:
        return None
    sbs = [p for p in acc.peaks if p.family == "gear_mesh" and p.category == "sideband"]
    main = max(gm, key=lambda p: p.amp)
    lvl, lev = level_factor(ctx, main.amp, "gear_mesh", lo=0.5, hi=1.2)
    conf = 0.85 * lvl * (0.5 + 0.5 * ramp(len(sbs), 0.5, 2.5))
    return _finding(
        "gear_mesh", conf, f"gear mesh high with {len(sbs)} sidebands — tooth wear, eccentric gear or backlash",
        [_ev(p, acc.unit) for p in gm + sbs] + [lev],
        ("time waveform synchronous with each shaft: a once-per-turn impact marks one damaged tooth",
         "oil analysis (wear metals) and a gearbox inspection at the next stop"),
        component="gearbox",
        level_mm_s=main.amp,
    )


def rule_subsync_instability(ctx: DiagnosisInput) -> Finding | None:
    """Sub-synchronous peak at 0.38-0.48X (oil whirl) — sleeve (fluid-film) bearings only."""
    acc = ctx.accounted
    out = None
    for name, f1 in acc.shaft_speeds_hz:
        for p in acc.peaks:
            if p.category != "unexplained" or p.klass != "sub_synchronous":
                continue
            o = p.freq_hz / f1
            if 0.38 <= o <= 0.48 and (out is None or p.amp > out[0].amp):
                out = (p, o, name)
    if out is None:
        return None
    p, o, name = out
    in_family = any(f.kind == "harmonics" and p.freq_hz in f.members_hz for f in acc.families)
    lvl, lev = level_factor(ctx, p.amp, "subsync", lo=0.3, hi=0.8)
    conf = (0.85 if ctx.sleeve_bearings else 0.3) * lvl * (0.4 if in_family else 1.0)
    return _finding(
        "subsync_instability", conf,
        f"sub-synchronous peak at {o:.2f}X — oil whirl/whip in a sleeve bearing"
        + ("" if ctx.sleeve_bearings else " (the machine is not configured with sleeve bearings: a belt or another "
           "source is more likely)"),
        [_ev(p, acc.unit), {"metric": "order", "value": round(o, 3)}, lev],
        ("shaft proximity probes / orbit: a forward whirl at 0.4-0.48X",
         "oil temperature, pressure and bearing clearance; the peak tracking speed at a fixed fraction"),
        component=name or "shaft",
        level_mm_s=p.amp,
    )


def rule_resonance(ctx: DiagnosisInput) -> Finding | None:
    """A hump in the floor (structural resonance), worst when a forcing peak rides on it."""
    acc = ctx.accounted
    if not acc.humps:
        return None
    best = max(acc.humps, key=lambda h: h.excess_db)
    riding = [p for p in acc.peaks if p.on_hump and best.f_lo_hz * 0.97 <= p.freq_hz <= best.f_hi_hz * 1.03
              and p.category != "unexplained"]
    forcing = [p for p in riding if p.category in ("forcing", "shaft", "line")]
    conf = 0.65 * ramp(best.excess_db, 4.5, 10.0) * (0.6 + 0.4 * (1.0 if riding else 0.0)) * ramp(best.q, 2.5, 5.0)
    if forcing:  # a forcing tone sitting on the hump: the resonance is what makes it high
        conf = max(conf, 0.65 * ramp(best.excess_db, 4.0, 8.0))
    conf = min(conf, 0.65)  # the spectrum alone cannot prove a resonance: a stop test can
    ev = [{"metric": "hump centre, Hz", "value": round(best.center_hz, 1)},
          {"metric": "hump height above floor trend, dB", "value": round(best.excess_db, 1)},
          {"metric": "Q (centre / half-power width)", "value": round(best.q, 1)}]
    ev += [_ev(p, acc.unit) for p in riding]
    what = ", ".join(p.label for p in riding) or "no labelled peak"
    return _finding(
        "resonance", conf,
        f"resonance near {best.center_hz:.0f} Hz ({what} riding on it) — amplitudes there are amplified",
        ev,
        ("coast-down or run-up test: a resonance shows as a peak in amplitude with a 180° phase shift",
         "impact (bump) test with the machine stopped and locked out",
         "judge the severity of peaks on the hump with the amplification in mind"),
        level_mm_s=max((p.amp for p in forcing), default=None),
    )


RULES: tuple[Callable[[DiagnosisInput], object], ...] = (
    rule_unbalance,
    rule_bent_shaft,
    rule_misalignment,
    rule_looseness,
    rule_bearings,
    rule_electrical_2xlf,
    rule_rotor_bar,
    rule_vane_pass,
    rule_cavitation,
    rule_belt,
    rule_gear_mesh,
    rule_subsync_instability,
    rule_resonance,
)


def _rank_key(f: Finding) -> tuple:
    # a called bearing defect is ranked on its own confidence; ties go to the more specific finding
    return (-f.confidence, CODES.index(f.code) if f.code in CODES else len(CODES), f.component)


def diagnose(ctx: DiagnosisInput, rules: tuple = RULES) -> tuple[Finding, ...]:
    """All findings for one capture, most credible first (confidence, then a fixed code order)."""
    if ctx.accounted.speed_hz is None and not ctx.bearing_findings:
        return ()
    out: list[Finding] = []
    for rule in rules:
        r = rule(ctx)
        if r is None:
            continue
        if isinstance(r, Finding):
            out.append(r)
        else:
            out.extend(r)
    if ctx.speed_confidence < 0.5:
        out = [replace(f, confidence=round(f.confidence * (0.5 + ctx.speed_confidence), 3))
               if f.code not in BEARING_CODES + ("cavitation", "resonance") else f for f in out]
    return tuple(sorted(out, key=_rank_key))


def cross_phase_deg(x_ms2: np.ndarray, y_ms2: np.ndarray, fs_hz: float, f_hz: float) -> tuple[float, float]:
    """Phase of ``y`` relative to ``x`` at ``f_hz`` (degrees) and the magnitude-squared coherence there.

    Welch cross-spectrum with a Hann window and 8 segments (common practice
    for cross-channel phase at 1X/2X); the phase is read at the line nearest
    ``f_hz``.
    """
    from scipy import signal

    x = np.asarray(x_ms2, dtype=np.float64)
    y = np.asarray(y_ms2, dtype=np.float64)
    if x.shape != y.shape or x.ndim != 1:
        raise ValueError(f"channels must be 1-D and of equal length, got {x.shape} and {y.shape}")
    if not 0 < f_hz < fs_hz / 2:
        raise ValueError(f"f_hz must be in (0, fs/2), got {f_hz!r}")
    nper = int(min(x.size, 2 ** int(np.floor(np.log2(max(16, x.size // 4))))))
    f, pxy = signal.csd(x, y, fs=fs_hz, window="hann", nperseg=nper)
    _, coh = signal.coherence(x, y, fs=fs_hz, window="hann", nperseg=nper)
    k = int(np.argmin(np.abs(f - f_hz)))
    return float(np.degrees(np.angle(pxy[k]))), float(coh[k])


__all__ = [
    "BEARING_CODES",
    "CODES",
    "DiagnosisInput",
    "HIGH_CONFIDENCE",
    "PhaseReading",
    "RULES",
    "cross_phase_deg",
    "diagnose",
    "level_factor",
    "ramp",
]
