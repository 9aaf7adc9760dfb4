"""Severity, action and urgency for each finding (pure functions).

Severity is the worst of three views:

* **ISO zone** of the finding's own level (``extra["level_mm_s"]``, the
  r.m.s. of the components it rests on) on the scale of ISO 20816-3
  (boundaries from memory, :func:`agent.features.iso_zone`): A → info,
  B → watch, C → alert, D → danger. A finding without a level of its own
  (a high-frequency floor) takes the overall zone, capped at alert;
* **learned baseline**: the finding's feature (or the overall level) as a
  ratio to its baseline — at or above ``alert_ratio`` → alert, at or above
  ``danger_ratio`` → danger, above 1.5× → watch (ratio practice: alert ≈ 2×
  baseline, danger ≈ 2.5-4×, common practice);
* **fault stage** (bearings): 1-2 → watch, 3 → alert, 4 → danger;
* **floor excess** (a finding that rests on a raised broadband floor,
  cavitation: ``extra["floor_excess_db"]``, how far the floor stands beyond
  the level at which the rule is sure): at or above 0 dB → watch, at or
  above 12 dB (×4 in amplitude, as the danger ratio) → alert. Such a finding
  is not graded on the overall velocity zone: the floor lies above the
  velocity band.

Persistence (:func:`persisting`, applied by the monitor across captures):
some findings do their harm while they last — cavitation erodes the
impeller, so cavitation shown for 6 h without a break is raised to alert
(act within days), whatever its strength (our own rule, after the common
advice to act on cavitation that persists).

A finding of low confidence (below 0.4) is held at watch at most: the agent
does not raise an alarm on a guess. Urgency follows severity: danger →
``act_now``, alert → ``within_days``, watch → ``plan`` (at the next
opportunity), info → ``watch`` (keep watching).

The recommendations are this project's own words.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import replace

from agent.features import iso_zone
from agent.model import Finding, Severity

URGENCY = {Severity.DANGER: "act_now", Severity.ALERT: "within_days", Severity.WATCH: "plan",
           Severity.INFO: "watch"}
URGENCY_TEXT = {"act_now": "act now", "within_days": "within days", "plan": "plan at the next opportunity",
                "watch": "keep watching"}
ZONE_SEVERITY = {"A": Severity.INFO, "B": Severity.WATCH, "C": Severity.ALERT, "D": Severity.DANGER}
STAGE_SEVERITY = {1: Severity.WATCH, 2: Severity.WATCH, 3: Severity.ALERT, 4: Severity.DANGER}
#: below this confidence a finding is held at watch at most
GUESS_CONFIDENCE = 0.4
#: floor excess (dB beyond the rule's sure level) from which a floor finding is an alert (×4, as danger_ratio)
FLOOR_EXCESS_ALERT_DB = 12.0
#: findings that harm while they last: shown this long without a break (s) → at least this severity
PERSISTENCE: dict[str, tuple[float, Severity]] = {"cavitation": (6 * 3600.0, Severity.ALERT)}
#: a spell of a persisting finding ends after this many captures in a row without it
PERSISTENCE_MISSES = 2

#: what to do, per finding code (our own wording); {urgency} is filled in
ACTIONS: dict[str, str] = {
    "unbalance": "Check the rotor for build-up, erosion or a lost balance weight; clean it, then balance in place "
                 "if 1X stays high.",
    "bent_shaft": "Take phase readings to tell a bent shaft from unbalance; check shaft run-out at the next stop.",
    "misalignment": "Check coupling alignment (and soft foot, pipe strain) at the next stop; realign to tolerance.",
    "looseness": "Check hold-down bolts, base, grout and bearing-housing fits; tighten and repair what is loose.",
    "bearing_outer_race": "Plan a bearing replacement; check lubrication now and trend the bearing tones closely.",
    "bearing_inner_race": "Plan a bearing replacement; check lubrication now and trend the bearing tones closely.",
    "bearing_rolling_element": "Plan a bearing replacement; check lubrication now and trend the bearing tones "
                               "closely.",
    "bearing_cage": "Plan a bearing replacement soon: cage damage can progress quickly; check lubrication now.",
    "electrical_2xlf": "Have a qualified electrician check the motor supply, windings and air gap; check soft foot.",
    "rotor_bar": "Have the motor rotor tested (current signature analysis) by a qualified electrician.",
    "vane_pass": "Check where the pump or fan runs against its best efficiency point; inspect impeller/cutwater "
                 "gap and wear at the next opening.",
    "cavitation": "Check suction conditions (level, strainer, valve, NPSH margin) and the operating flow.",
    "belt": "Inspect the belts and sheaves; re-tension or replace worn belts as a set, align the sheaves.",
    "gear_mesh": "Take an oil sample for wear metals and inspect the gear teeth at the next stop.",
    "subsync_instability": "Check the sleeve bearings' oil supply, temperature and clearance; reduce load or speed "
                           "if the sub-synchronous peak grows.",
    "resonance": "Confirm the resonance with a coast-down or bump test; move the natural frequency (stiffen or add "
                 "mass) or the forcing frequency away from it.",
    "bearing_tone_unassigned": "Give the bearing geometry in the config so the tone can be identified.",
}
WHY: dict[str, str] = {
    "unbalance": "unbalance loads the bearings once per turn and wears them early",
    "bent_shaft": "a bent shaft loads bearings and seals and does not go away with balancing",
    "misalignment": "misalignment overloads the coupling, bearings and seals",
    "looseness": "looseness lets other forces grow and damages fits and foundations",
    "bearing_outer_race": "a race defect grows until the bearing fails",
    "bearing_inner_race": "a race defect grows until the bearing fails",
    "bearing_rolling_element": "a rolling-element defect grows until the bearing fails",
    "bearing_cage": "a damaged cage can fail suddenly and seize the bearing",
    "electrical_2xlf": "electrical forces heat and shake the motor and point at a winding or air-gap problem",
    "rotor_bar": "cracked rotor bars heat up and can break loose",
    "vane_pass": "strong pressure pulsation tires the impeller, casing and piping",
    "cavitation": "cavitation erodes the impeller and shakes seals and bearings",
    "belt": "worn or loose belts slip, heat and break",
    "gear_mesh": "worn or damaged teeth can break and wreck the gearbox",
    "subsync_instability": "oil whirl can turn into whip and destroy the bearing",
    "resonance": "a resonance multiplies any force near its frequency",
    "bearing_tone_unassigned": "an unexplained non-synchronous family often comes from a bearing",
}


def severity_of(
    f: Finding,
    *,
    vel_rms_mm_s: float | None = None,
    iso_group: int = 2,
    support: str = "rigid",
    baseline_ratio: float | None = None,
    alert_ratio: float = 2.0,
    danger_ratio: float = 4.0,
) -> tuple[Severity, list[str]]:
    """Severity of one finding and the reasons for it (see the module text)."""
    sev = Severity.INFO
    why: list[str] = []
    own = f.extra.get("level_mm_s")
    if own is not None:
        # the finding's own components, judged on the same scale as the overall level
        zone = iso_zone(float(own), iso_group, support)
        sev = max(sev, ZONE_SEVERITY[zone])
        why.append(f"its components reach {float(own):.2f} mm/s r.m.s. (ISO 20816-3 zone {zone} level)")
    elif f.extra.get("floor_excess_db") is not None:
        # graded on its own evidence: how far the broadband floor stands beyond the rule's sure level
        ex = float(f.extra["floor_excess_db"])
        sev = max(sev, Severity.ALERT if ex >= FLOOR_EXCESS_ALERT_DB else Severity.WATCH if ex >= 0 else Severity.INFO)
        why.append(f"its high-frequency floor stands {ex:+.1f} dB from the level at which the pattern is sure"
                   + (f" (alert from {FLOOR_EXCESS_ALERT_DB:+.0f} dB)" if ex < FLOOR_EXCESS_ALERT_DB else ""))
    elif vel_rms_mm_s is not None and f.stage is None:
        # no level of its own (e.g. a high-frequency floor): the overall zone, but not above alert
        zone = iso_zone(vel_rms_mm_s, iso_group, support)
        sev = max(sev, min(ZONE_SEVERITY[zone], Severity.ALERT if f.confidence >= 0.5 else Severity.WATCH))
        why.append(f"overall {vel_rms_mm_s:.2f} mm/s r.m.s. is in ISO 20816-3 zone {zone}")
    if baseline_ratio is not None:
        b = (Severity.DANGER if baseline_ratio >= danger_ratio else Severity.ALERT if baseline_ratio >= alert_ratio
             else Severity.WATCH if baseline_ratio >= 1.5 else Severity.INFO)
        sev = max(sev, b)
        why.append(f"{baseline_ratio:.1f} × its normal level")
    if f.stage is not None and f.stage in STAGE_SEVERITY:
        sev = max(sev, STAGE_SEVERITY[f.stage])
        why.append(f"stage {f.stage} of 4")
    if f.confidence < GUESS_CONFIDENCE and sev > Severity.WATCH:
        sev = Severity.WATCH
        why.append(f"held at watch: confidence only {f.confidence:.2f}")
    if f.confidence < GUESS_CONFIDENCE and sev == Severity.WATCH and f.stage is None and baseline_ratio is None:
        sev = Severity.INFO if vel_rms_mm_s is None or iso_zone(vel_rms_mm_s, iso_group, support) in "AB" else sev
    return sev, why


def advise(
    findings: Sequence[Finding],
    *,
    vel_rms_mm_s: float | None = None,
    iso_group: int = 2,
    support: str = "rigid",
    baseline_ratios: Mapping[str, float] | None = None,
    alert_ratio: float = 2.0,
    danger_ratio: float = 4.0,
) -> tuple[Finding, ...]:
    """Each finding with severity, action, urgency and why (``extra["why"]``), plus the safety note."""
    from agent.cli import SAFETY_NOTE

    out = []
    for f in findings:
        ratio = None
        if baseline_ratios:
            ratio = baseline_ratios.get(f.code, baseline_ratios.get("overall"))
        sev, reasons = severity_of(f, vel_rms_mm_s=vel_rms_mm_s, iso_group=iso_group, support=support,
                                   baseline_ratio=ratio, alert_ratio=alert_ratio, danger_ratio=danger_ratio)
        sev = max(sev, f.severity) if f.confidence >= GUESS_CONFIDENCE else min(max(sev, f.severity), Severity.WATCH)
        urgency = URGENCY[sev]
        action = ACTIONS.get(f.code, "Have an analyst review the evidence.")
        if urgency == "watch":
            action = "Keep watching the trend; no work needed yet. If it grows: " + action[0].lower() + action[1:]
        why = WHY.get(f.code, "")
        why_text = (why + "; " if why else "") + "; ".join(reasons)
        extra = {**f.extra, "why": why_text, "urgency_text": URGENCY_TEXT[urgency], "safety": SAFETY_NOTE}
        out.append(replace(f, severity=sev, action=action, urgency=urgency, extra=extra))
    return tuple(out)


def persisting(
    findings: Sequence[Finding], shown: set[str], spells: tuple[tuple[str, float, int], ...], t_utc_s: float,
) -> tuple[tuple[Finding, ...], tuple[tuple[str, float, int], ...]]:
    """Raise findings that have lasted (:data:`PERSISTENCE`); returns them and the spells to carry on.

    ``shown`` are the codes the operator is shown in this capture; a spell
    ``(code, since_utc_s, misses)`` starts when a code of :data:`PERSISTENCE`
    is shown and ends after :data:`PERSISTENCE_MISSES` captures in a row
    without it (one capture that misses it does not restart the clock).
    """
    known = {code: (since, misses) for code, since, misses in spells}
    out_spells = []
    for code in sorted(PERSISTENCE):
        if code in shown:
            since = known[code][0] if code in known else t_utc_s
            out_spells.append((code, since, 0))
        elif code in known and known[code][1] + 1 < PERSISTENCE_MISSES:
            out_spells.append((code, known[code][0], known[code][1] + 1))
    lasting = {code: since for code, since, misses in out_spells if misses == 0}
    out = []
    for f in findings:
        rule = PERSISTENCE.get(f.code)
        if rule is not None and f.code in lasting and t_utc_s - lasting[f.code] >= rule[0] and f.severity < rule[1]:
            hours = (t_utc_s - lasting[f.code]) / 3600.0
            urgency = URGENCY[rule[1]]
            why = f.extra.get("why", "")
            why += ("; " if why else "") + f"shown for {hours:.1f} h without a break (raised at {rule[0] / 3600:g} h)"
            f = replace(f, severity=rule[1], urgency=urgency, action=ACTIONS.get(f.code, f.action),
                        extra={**f.extra, "why": why, "urgency_text": URGENCY_TEXT[urgency]})
        out.append(f)
    return tuple(out), tuple(out_spells)


__all__ = ["ACTIONS", "PERSISTENCE", "URGENCY", "URGENCY_TEXT", "WHY", "advise", "persisting", "severity_of"]
