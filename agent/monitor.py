"""One step of monitoring: captures in → machine state, findings and events out.

This is the code path shared by the daemon (``skidvib run``), replay
(``skidvib replay``/``demo``) and the tests: the same captures and config
give the same results byte for byte, because every stage is pure and time
comes from the captures' own timestamps, never from the clock.

``monitor_step(state, captures, cfg) -> (CaptureResult, MonitorState)``:

1. quality gate on every channel — a failed capture gives ``sensor_fault``
   and is never used for learning or machine alarms;
2. analysis of the first channel (:func:`agent.pipeline.analyse_capture`):
   spectra, overall levels, speed, peaks, findings;
3. assessment against the ISO 20816-3 zones and the learned baseline
   (:func:`agent.assess.judge_analysis`: operating state, learning, alarms);
4. the operator's state, its one-line reason, action and urgency, and the
   events to publish (state changes, new findings).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from typing import Any

from agent.advice import persisting
from agent.assess import EngineState, judge_analysis
from agent.baseline import Baselines
from agent.config import AgentConfig
from agent.model import Capture, Finding, MachineState, Severity
from agent.pipeline import Analysis, analyse_capture, analysis_to_json
from agent.spectra import CaptureSpectra
from agent.speed import SpeedEstimate

SCHEMA = 1
EVENT_MIN_CONFIDENCE = 0.5  # a finding raises a "new_finding" event from this confidence (or at alert severity)

#: what the operator is told to do in each state (our own wording)
STATE_ACTION = {
    MachineState.NORMAL: ("No action needed.", "none"),
    MachineState.LEARNING: ("No action needed; the agent is learning this machine's normal.", "none"),
    MachineState.ALERT: ("Have the machine checked by the reliability team; plan work.", "within_days"),
    MachineState.DANGER: ("Tell the shift supervisor now; consider a controlled stop.", "act_now"),
    MachineState.SENSOR_FAULT: ("Check the sensor, its cable and connector; readings are not trusted.", "within_days"),
    MachineState.STOPPED: ("No action; the machine is not running.", "none"),
    MachineState.OFFLINE: ("Check the monitoring box and its network.", "within_days"),
}


@dataclass(frozen=True, slots=True)
class MonitorState:
    """What is carried from one capture to the next (serialisable with ``to_json``)."""

    state: MachineState = MachineState.LEARNING
    since_utc_s: float = 0.0
    reason: str = "starting"
    last_speed_hz: float | None = None
    mode: str = "monitor"  # monitor | learn | maintenance
    mode_until_utc_s: float | None = None
    n_captures: int = 0
    finding_codes: tuple[str, ...] = ()
    finding_spells: tuple[tuple[str, float, int], ...] = ()  # (code, since, misses): agent.advice.persisting
    engine: Any = None  # alarm engine state (agent.assess), when present
    baselines: Any = None  # learned baselines (agent.baseline), when present

    def to_json(self) -> dict:
        return {
            "schema": SCHEMA,
            "state": self.state.value,
            "since_utc_s": self.since_utc_s,
            "reason": self.reason,
            "last_speed_hz": self.last_speed_hz,
            "mode": self.mode,
            "mode_until_utc_s": self.mode_until_utc_s,
            "n_captures": self.n_captures,
            "finding_codes": list(self.finding_codes),
            "finding_spells": [list(x) for x in self.finding_spells],
        }


@dataclass(frozen=True, slots=True)
class CaptureResult:
    """The outcome of one monitoring step."""

    t_utc_s: float
    seq: int
    channel: str
    state: MachineState
    previous_state: MachineState
    since_utc_s: float
    reason: str
    action: str
    urgency: str
    analysis: Analysis | None
    quality_ok: bool = True
    quality_problems: tuple[str, ...] = ()
    findings: tuple[Finding, ...] = ()
    features: dict = field(default_factory=dict)
    events: tuple[dict, ...] = ()
    speed_hz: float | None = None
    analysis_doc: dict = field(default_factory=dict)  # spectrum facts, overall levels, peaks (JSON-ready)

    @property
    def state_changed(self) -> bool:
        return self.state != self.previous_state

    def state_json(self) -> dict:
        return {
            "state": self.state.value,
            "since_utc_s": self.since_utc_s,
            "reason": self.reason,
            "action": self.action,
            "urgency": self.urgency,
        }

    def to_json(self) -> dict:
        """The analysis document stored with a snapshot (and sent as findings detail)."""
        doc: dict = {
            "schema": SCHEMA,
            "t_utc_s": self.t_utc_s,
            "seq": self.seq,
            "channel": self.channel,
            "state": self.state_json(),
            "quality": {"ok": self.quality_ok, "problems": list(self.quality_problems)},
            "speed_hz": self.speed_hz,
            "features": self.features,
            "findings": [f.to_json() for f in self.findings],
            "events": list(self.events),
        }
        if self.analysis_doc:
            doc["analysis"] = self.analysis_doc
        return doc


def reportable_findings(findings) -> list[Finding]:
    """Findings worth announcing: at least watch severity with confidence >= EVENT_MIN_CONFIDENCE, or alert and above."""
    return [f for f in findings
            if f.severity >= Severity.ALERT or (f.severity >= Severity.WATCH and f.confidence >= EVENT_MIN_CONFIDENCE)]


def initial_state(cfg: AgentConfig, t_utc_s: float = 0.0) -> MonitorState:
    return MonitorState(since_utc_s=t_utc_s)


def _features(a: Analysis) -> dict:
    o = a.overall
    return {
        "vel_rms_mm_s": o.vel_rms_mm_s,
        "acc_rms_g": o.acc_rms_g,
        "acc_peak_g": o.acc_peak_g,
        "crest_factor": o.crest_factor,
        "kurtosis": o.kurtosis,
    }


def monitor_step(ms: MonitorState, captures: tuple[Capture, ...], cfg: AgentConfig) -> tuple[CaptureResult, MonitorState]:
    """Judge one capture (one per channel); return the result and the state to carry on."""
    if not captures:
        raise ValueError("monitor_step needs at least one capture")
    cap = captures[0]
    spectra = CaptureSpectra.of(cap)  # computed once, shared by the quality gate and the analysis
    failed = _quality_failures(captures, cfg, spectra)
    if failed:
        return quality_fault_step(ms, captures, failed)
    t = cap.t0_utc_s
    previous = None
    if ms.last_speed_hz:
        previous = SpeedEstimate(speed_hz=ms.last_speed_hz, confidence=1.0, found=True)
    analysis = analyse_capture(cap, cfg, previous_speed=previous, spectra=spectra)
    speed = analysis.speed.speed if analysis.speed is not None else None
    speed_hz = speed.speed_hz if speed is not None and speed.found else None
    engine = ms.engine if ms.engine is not None else EngineState()
    baselines = ms.baselines if ms.baselines is not None else Baselines()
    engine, baselines, assessment = judge_analysis(engine, baselines, analysis, cfg)
    new_state, reason = assessment.machine, assessment.reason
    if ms.mode == "maintenance" and new_state in (MachineState.ALERT, MachineState.DANGER):
        reason = f"maintenance mode: alarms held ({reason})"
        new_state = MachineState.NORMAL
    action, urgency = STATE_ACTION[new_state]
    # findings that harm while they last (cavitation) are raised when shown without a break
    findings, spells = persisting(analysis.findings, {f.code for f in reportable_findings(analysis.findings)},
                                  ms.finding_spells, t)
    events: list[dict] = []
    since = ms.since_utc_s if new_state == ms.state else t
    if new_state != ms.state:
        events.append({"event": "state_change", "t_utc_s": t, "state": new_state.value,
                       "previous_state": ms.state.value, "reason": reason})
    for ev in assessment.events:
        if ev.scope == "feature":
            events.append({"event": "alarm", "t_utc_s": ev.t_utc_s, "feature": ev.feature, "state": ev.new,
                           "previous_state": ev.old, "severity": ev.new, "value": ev.value, "level": ev.level,
                           "reason": ev.reason})
    # only findings worth an operator's attention raise events; weak ones that come and go
    # between captures stay in the analysis (and the report) without announcing themselves
    reportable = reportable_findings(findings)
    codes = tuple(sorted(f.code for f in reportable))
    for f in reportable:
        if f.code not in ms.finding_codes:
            events.append({"event": "new_finding", "t_utc_s": t, "code": f.code, "title": f.title,
                           "severity": f.severity.name.lower(), "confidence": round(f.confidence, 3)})
    result = CaptureResult(
        t_utc_s=t,
        seq=cap.seq,
        channel=cap.channel,
        state=new_state,
        previous_state=ms.state,
        since_utc_s=since,
        reason=reason,
        action=action,
        urgency=urgency,
        analysis=analysis,
        findings=findings,
        features=_features(analysis),
        events=tuple(events),
        speed_hz=speed_hz,
        analysis_doc={
            k: v for k, v in analysis_to_json(analysis, cfg).items() if k in ("spectrum", "overall", "peaks", "speed")
        },
    )
    new_ms = dataclasses.replace(
        ms, state=new_state, since_utc_s=since, reason=reason, n_captures=ms.n_captures + 1, finding_codes=codes,
        finding_spells=spells, last_speed_hz=speed_hz, engine=engine, baselines=baselines,
    )
    return result, new_ms


def _quality_failures(captures: tuple[Capture, ...], cfg: AgentConfig,
                      first: CaptureSpectra | None = None) -> list[tuple[Capture, Any]]:
    """Captures that fail the quality gate, with their verdicts; ``first``: the first capture's spectra."""
    from agent.quality import check_capture, limits_from_config

    limits = limits_from_config(cfg)
    out = []
    for i, c in enumerate(captures):
        v = check_capture(c, limits, spectra=first if i == 0 else None)
        if not v.ok:
            out.append((c, v))
    return out


def quality_fault_step(ms: MonitorState, captures: tuple[Capture, ...], failed: list) -> tuple[CaptureResult, MonitorState]:
    """A capture failed the data-quality gate: a sensor fault, no machine judgement, nothing learned."""
    cap = captures[0]
    t = cap.t0_utc_s
    state = MachineState.SENSOR_FAULT
    reason = "; ".join(f"{c.channel}: {v.reason}" for c, v in failed)
    problems = tuple(sorted({p for _, v in failed for p in v.problems}))
    action, urgency = STATE_ACTION[state]
    since = ms.since_utc_s if ms.state == state else t
    events = ()
    if ms.state != state:
        events = ({"event": "state_change", "t_utc_s": t, "state": state.value,
                   "previous_state": ms.state.value, "reason": reason},)
    result = CaptureResult(
        t_utc_s=t, seq=cap.seq, channel=cap.channel, state=state, previous_state=ms.state, since_utc_s=since,
        reason=reason, action=action, urgency=urgency, analysis=None, quality_ok=False,
        quality_problems=problems, events=events,
        analysis_doc={"quality": {c.channel: dict(v.figures) for c, v in failed}},
    )
    return result, dataclasses.replace(ms, state=state, since_utc_s=since, reason=reason, n_captures=ms.n_captures + 1,
                                       finding_spells=_spells_missed(ms, t))


def source_problem_step(ms: MonitorState, t_utc_s: float, problem: str) -> tuple[CaptureResult, MonitorState]:
    """The source could not deliver (device gone, stalled stream): a sensor fault, no machine judgement."""
    state = MachineState.SENSOR_FAULT
    reason = f"no usable data: {problem}"
    action, urgency = STATE_ACTION[state]
    since = ms.since_utc_s if ms.state == state else t_utc_s
    events = ()
    if ms.state != state:
        events = ({"event": "state_change", "t_utc_s": t_utc_s, "state": state.value,
                   "previous_state": ms.state.value, "reason": reason},)
    result = CaptureResult(
        t_utc_s=t_utc_s, seq=-1, channel="", state=state, previous_state=ms.state, since_utc_s=since,
        reason=reason, action=action, urgency=urgency, analysis=None, quality_ok=False,
        quality_problems=("source",), events=events,
    )
    return result, dataclasses.replace(ms, state=state, since_utc_s=since, reason=reason,
                                       finding_spells=_spells_missed(ms, t_utc_s))


def _spells_missed(ms: MonitorState, t_utc_s: float) -> tuple[tuple[str, float, int], ...]:
    """A capture with no judgement (bad data, no data) breaks a finding's spell like one that misses it."""
    return persisting((), set(), ms.finding_spells, t_utc_s)[1]
