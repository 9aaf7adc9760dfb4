"""``skidvib replay PATH... [-c CONFIG] [--speed N | --fast]``: recordings through the daemon's pipeline.

Every capture goes through :func:`agent.monitor.monitor_step`, the step the
daemon runs, with the monitor state carried from one capture to the next as
the daemon carries it; time comes only from the captures (or the injected
clock of the source), so the same recordings and config print the same
lines, byte for byte.

What is printed is what the operator would have seen: a line for every
change of state (with time and reason), findings as they appear and clear,
and a summary. With ``--json`` every capture is one JSON line instead.
When the recordings carry a simulator ground truth (``skidvib simulate``),
the summary also sets what was detected beside what the scenario did.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

SIGNAL_BENCH_TARGET = 50.0  # × real time of the signals (the target, checked by a benchmark)


@dataclass(slots=True)
class StepView:
    """What one capture showed: the operator's view plus the ground truth when there is one."""

    seq: int
    t0_utc_s: float
    path: str
    state: str
    reason: str
    vel_rms_mm_s: float
    zone: str
    kurtosis: float
    crest_factor: float
    speed_hz: float | None  # measured by the pipeline, when it measures speed
    findings: tuple = ()
    truth: dict | None = None

    def to_json(self) -> dict:
        return {
            "seq": self.seq,
            "t0_utc": _utc(self.t0_utc_s),
            "file": Path(self.path).name,
            "state": self.state,
            "reason": self.reason,
            "vel_rms_mm_s": _rounded(self.vel_rms_mm_s, 4),
            "zone": self.zone,
            "kurtosis": _rounded(self.kurtosis, 3),
            "crest_factor": _rounded(self.crest_factor, 3),
            "speed_rpm": None if self.speed_hz is None else round(self.speed_hz * 60.0, 1),
            "findings": [f.to_json() for f in self.findings],
        }


@dataclass(slots=True)
class ReplayResult:
    steps: list[StepView] = field(default_factory=list)
    changes: list[dict] = field(default_factory=list)  # state changes and finding appear/clear
    skipped: list[tuple[str, str]] = field(default_factory=list)
    wall_s: float = 0.0
    signal_s: float = 0.0

    @property
    def signal_factor(self) -> float:
        return self.signal_s / self.wall_s if self.wall_s > 0 else float("inf")

    @property
    def timeline_s(self) -> float:
        if len(self.steps) < 2:
            return self.signal_s
        return self.steps[-1].t0_utc_s - self.steps[0].t0_utc_s + self.signal_s / len(self.steps)


def _rounded(x: float, nd: int) -> float | None:
    """A figure for JSON: rounded, or null when the capture gave none (NaN)."""
    return round(x, nd) if math.isfinite(x) else None


def _utc(t: float) -> str:
    from agent.scenario import utc_text

    return utc_text(t)


# ───────────────────────────── the pipeline seam ─────────────────────────────


def view_of(result, path: str, truth: dict | None) -> StepView:
    """The operator's view of one monitoring step (:class:`agent.monitor.CaptureResult`)."""
    f = result.features or {}
    zone = (result.analysis.overall.iso_zone if result.analysis is not None else "-")
    return StepView(
        seq=result.seq,
        t0_utc_s=result.t_utc_s,
        path=path,
        state=result.state.value,
        reason=result.reason,
        vel_rms_mm_s=float(f.get("vel_rms_mm_s", float("nan"))),
        zone=zone,
        kurtosis=float(f.get("kurtosis", float("nan"))),
        crest_factor=float(f.get("crest_factor", float("nan"))),
        speed_hz=result.speed_hz,
        findings=tuple(result.findings),
        truth=truth,
    )


def run_replay(source, cfg, *, on_step: Callable[[StepView, list[dict]], None] | None = None,
               clock: Callable[[], float] = time.perf_counter) -> ReplayResult:
    """Play ``source`` through :func:`agent.monitor.monitor_step`, the daemon's own step.

    The monitor state is carried from capture to capture exactly as the
    daemon carries it; time comes only from the captures. ``on_step(view,
    new_changes)`` is called after each capture. ``clock`` only measures how
    long the replay took.
    """
    from agent.monitor import initial_state, monitor_step, reportable_findings
    from agent.sources import EndOfSource

    res = ReplayResult()
    ms = None
    prev_codes: set[str] = set()
    t_start = clock()
    while True:
        try:
            caps = source.read(60.0)
        except EndOfSource:
            break
        if ms is None:
            ms = initial_state(cfg, caps[0].t0_utc_s)
        result, ms = monitor_step(ms, tuple(caps), cfg)
        meta = getattr(source, "last_meta", None) or {}
        truth = meta.get("ground_truth") or getattr(source, "last_truth", None)
        view = view_of(result, getattr(source, "last_path", "") or "", truth)
        res.steps.append(view)
        res.signal_s += caps[0].duration_s
        new: list[dict] = []
        if len(res.steps) == 1:
            new.append({"t0_utc_s": view.t0_utc_s, "seq": view.seq, "kind": "state", "from": None,
                        "to": view.state, "reason": view.reason})
        for ev in result.events:
            if ev.get("event") == "state_change" and len(res.steps) > 1:
                new.append({"t0_utc_s": ev["t_utc_s"], "seq": view.seq, "kind": "state",
                            "from": ev["previous_state"], "to": ev["state"], "reason": ev["reason"]})
            elif ev.get("event") == "new_finding":
                new.append({"t0_utc_s": ev["t_utc_s"], "seq": view.seq, "kind": "finding", "code": ev["code"],
                            "severity": ev["severity"], "title": ev["title"]})
        if result.analysis is not None:  # a capture not analysed (bad or no data) clears nothing
            codes = {f.code for f in reportable_findings(result.findings)}
            for code in sorted(prev_codes - codes):
                new.append({"t0_utc_s": view.t0_utc_s, "seq": view.seq, "kind": "cleared", "code": code})
            prev_codes = codes
        res.changes.extend(new)
        if on_step:
            on_step(view, new)
    res.wall_s = clock() - t_start
    res.skipped = list(getattr(source, "skipped", []))
    return res


# ───────────────────────────── text ─────────────────────────────


def change_line(c: dict) -> str:
    t = _when(c["t0_utc_s"])
    if c["kind"] == "state":
        arrow = f"{c['from']} -> {c['to']}" if c["from"] else f"starts {c['to']}"
        return f"{t}  #{c['seq']:04d}  state {arrow}: {c['reason']}"
    if c["kind"] == "finding":
        return f"{t}  #{c['seq']:04d}  + [{c['severity']}] {c['code']}: {c['title']}"
    return f"{t}  #{c['seq']:04d}  - cleared {c['code']}"


#: simulated fault kind (agent.scenario) → the finding codes that name it; bearings: agent.bearings.CODES
FAULT_CODES = {"unbalance": ("unbalance",), "misalignment": ("misalignment",), "bent_shaft": ("bent_shaft",),
               "looseness": ("looseness",), "belt_wear": ("belt",), "cavitation": ("cavitation",)}
#: a resonance finding within this fraction of a simulated natural frequency states a true property
RESONANCE_TOL = 0.1
ALARM_STATES = ("alert", "danger")


def sim_tag(truth: dict | None) -> str:
    """What the simulator was doing, in a few words (the ground truth, for the audience)."""
    if not truth:
        return "-"
    parts = []
    for b in truth.get("bearings", []):
        what = f"{b['defect']} race" if b["defect"] in ("outer", "inner") else b["defect"]
        parts.append(f"{b['bearing']} {what} st.{b['stage']}")
    parts += [n.replace("_", " ") for n in truth.get("faults", []) if n in FAULT_CODES and n != "cavitation"]
    if truth.get("cavitation_g"):
        parts.append("cavitation")
    parts += [f"sensor {s['kind']}" for s in truth.get("sensor", [])]
    if not truth.get("running", True):
        parts.append("stopped")
    return ", ".join(parts) or "healthy"


def _fault_key(ev: dict) -> tuple[str, ...] | None:
    """(code, ..., component) naming a scenario fault event; None for sensor faults and the operation."""
    from agent.bearings import CODES

    if ev.get("kind") == "bearing":
        return CODES[ev["defect"]], ev.get("bearing", "")
    codes = FAULT_CODES.get(ev.get("kind", ""))
    return None if codes is None else (*codes, "")


def _truth_keys(truth: dict | None) -> set[tuple[str, ...]]:
    """The faults one capture's ground truth holds, as :func:`_fault_key` names them."""
    from agent.bearings import CODES

    if not truth:
        return set()
    keys = {(CODES[b["defect"]], b["bearing"]) for b in truth.get("bearings", [])}
    keys |= {(*FAULT_CODES[n], "") for n in truth.get("faults", []) if n in FAULT_CODES}
    if truth.get("cavitation_g"):
        keys.add(("cavitation", ""))
    return keys


def _names(f, key: tuple[str, ...]) -> bool:
    """Whether finding ``f`` names fault ``key``: one of its codes and, for a bearing, that bearing."""
    *codes, component = key
    return f.code in codes and (not component or f.component == component)


def _shown(st: StepView) -> list:
    """The findings the operator was shown for this capture (the monitor's announcement rule)."""
    from agent.monitor import reportable_findings

    return reportable_findings(st.findings)


def _when(t: float) -> str:
    return _utc(t).replace("T", " ")[:-4] + "Z"


def _finding_text(f) -> str:
    where = f", {f.component}" if f.component and f.code.startswith("bearing") else ""
    stage = f", stage {f.stage}" if f.stage else ""
    return f"[{f.severity.name.lower()}] {f.code}{where}{stage}"


def _event_line(ev: dict, steps: list[StepView], story: list[dict]) -> str:
    """What the agent showed for one scenario event (see :func:`truth_comparison`)."""
    t_ev, phase = ev["t0_utc_s"], ev.get("phase", "")
    key = _fault_key(ev)
    same = [e for e in story if e["t0_utc_s"] > t_ev and e.get("kind") == ev.get("kind")
            and (key is None or _fault_key(e) == key)]
    ends = [e["t0_utc_s"] for e in same if e.get("phase") == "ends"]
    t_end = min(ends, default=float("inf"))
    t_next = min([e["t0_utc_s"] for e in same] + [t_end])
    after = [st for st in steps if st.t0_utc_s >= t_ev]
    head = f"  {_when(t_ev)}  {ev['what']:<56}  "
    if key is None:  # a sensor fault: the state should say so
        if phase == "ends":
            back = next((st for st in after if st.state != "sensor_fault"), None)
            if back is None:
                return head + "state stays sensor_fault to the end"
            if after and after[0].truth and after[0].truth.get("sensor") and after[0].state == "sensor_fault":
                return head + "state stays sensor_fault (another sensor fault goes on)"
            return head + f"state back to {back.state} after {(back.t0_utc_s - t_ev) / 3600:5.1f} h"
        hit = next((st for st in after if st.t0_utc_s < t_end and st.state == "sensor_fault"), None)
        if hit is None:
            return head + "NOT FOUND: state never sensor_fault while it lasted"
        return head + f"found after {(hit.t0_utc_s - t_ev) / 3600:5.1f} h: state sensor_fault ({hit.reason})"
    if phase == "ends":
        gone = next((st for st in after if not any(_names(f, key) for f in _shown(st))), None)
        if gone is None:
            return head + "still shown at the end of the replay"
        how = " (machine stopped)" if gone.state == "stopped" else ""
        return head + f"cleared after {(gone.t0_utc_s - t_ev) / 3600:5.1f} h{how}"
    window = [st for st in after if st.t0_utc_s < (t_end if phase == "begins" else t_next)]
    running = [st for st in window if st.state not in ("stopped", "sensor_fault")]
    hits = [(st, f) for st in running for f in _shown(st) if _names(f, key)]
    if not hits:
        other = sorted({f"{f.code}" + (f" ({f.component})" if f.component else "") for st in running for f in _shown(st)})
        return head + f"NOT FOUND in {len(running)} captures" + (f" (shown instead: {', '.join(other)})" if other else "")
    st, f = hits[0]
    n_hit = len({id(s) for s, _ in hits})
    text = f"found after {(st.t0_utc_s - t_ev) / 3600:5.1f} h: {_finding_text(f)}; in {n_hit} of {len(running)} captures"
    if phase == "grows":
        stages = [g.stage for _, g in hits if g.stage]
        if stages:
            text += f", agent's stage {min(stages)}-{max(stages)}"
    return head + text


def truth_comparison(res: ReplayResult, events: list[dict]) -> list[str]:
    """The scenario's story beside what the agent showed, counting only findings that name the fault.

    For each fault event: the first capture at or after it in which the
    operator was shown a finding of the right code — and, for a bearing, on
    the right bearing — while the fault was there (a stage change: until
    the next change), and in how many running captures of that window it
    was shown; for a fault's end, when the finding cleared. A sensor fault
    is found when the state is sensor_fault. State changes (an alarm says
    that something changed, not what) and findings that name no simulated
    fault are listed apart, so a wrong call is never counted as a detection.
    """
    steps = res.steps
    story = [ev for ev in events if ev.get("kind") != "operation"]
    lines = [_event_line(ev, steps, story) for ev in story]
    lines += ["", "Alarm states (the machine state says something changed, not what):"]
    alarms = [c for c in res.changes if c["kind"] == "state" and c["to"] in ALARM_STATES]
    by_seq = {st.seq: st for st in steps}
    false_alarms = 0
    for c in alarms:
        tag = sim_tag(by_seq[c["seq"]].truth) if c["seq"] in by_seq else "-"
        false_alarms += tag == "healthy"
        lines.append(f"  {_when(c['t0_utc_s'])}  {c['from']} -> {c['to']}: {c['reason']}  [sim: {tag}]")
    if not alarms:
        lines.append("  none")
    lines.append(f"  {false_alarms} while the simulated machine was healthy (false alarms)")
    lines += ["", "Other findings (naming no fault simulated at the time: wrong calls):"]
    lines += _other_findings(steps)
    return lines


def _other_findings(steps: list[StepView]) -> list[str]:
    """Shown findings that name no fault of their capture's ground truth, grouped by code and component."""
    groups: dict[tuple[str, str], dict] = {}
    true_props: dict[tuple[str, str], int] = {}
    prev: set[tuple[str, str]] = set()
    for st in steps:
        if st.truth is None:
            prev = set()
            continue
        keys = _truth_keys(st.truth)
        now = set()
        for f in _shown(st):
            if any(_names(f, k) for k in keys):
                continue
            g = (f.code, f.component if f.code.startswith("bearing") else "")
            centre = next((e["value"] for e in f.evidence if e.get("metric") == "hump centre, Hz"), None)
            if f.code == "resonance" and centre and any(
                    abs(centre / r - 1) <= RESONANCE_TOL for r in st.truth.get("resonances_hz", [])):
                true_props[g] = true_props.get(g, 0) + 1  # a natural frequency the simulated machine has
                continue
            now.add(g)
            d = groups.setdefault(g, {"n": 0, "raised": 0, "first": st.t0_utc_s, "last": 0.0, "worst": f.severity})
            d["n"] += 1
            d["raised"] += g not in prev
            d["last"] = st.t0_utc_s
            d["worst"] = max(d["worst"], f.severity)
        prev = now
    out = []
    for (code, comp), d in sorted(groups.items(), key=lambda kv: (-kv[1]["n"], kv[0])):
        out.append(f"  {code:<24} {comp:<18} in {d['n']:3d} captures (raised {d['raised']}x), "
                   f"{_when(d['first'])} ... {_when(d['last'])}, up to {d['worst'].name.lower()}")
    if not out:
        out.append("  none")
    for (code, _), n in sorted(true_props.items()):
        out.append(f"  ({code} in {n} captures sits at a natural frequency of the simulated machine: "
                   "a true property, not counted as a wrong call)")
    return out


def summary_lines(res: ReplayResult, events: list[dict] | None = None) -> list[str]:
    n = len(res.steps)
    if n == 0:
        return ["No captures replayed."] + [f"  skipped {p}: {why}" for p, why in res.skipped]
    first, last = res.steps[0], res.steps[-1]
    out = [
        f"Replayed {n} captures, {_utc(first.t0_utc_s)} ... {_utc(last.t0_utc_s)}"
        + (f", {len(res.skipped)} skipped" if res.skipped else ""),
        f"  {res.wall_s:.1f} s wall: {res.signal_factor:.0f}x real time of the signals ({res.signal_s:.0f} s of samples), "
        f"{res.timeline_s / max(res.wall_s, 1e-9):.0f}x the recordings' timeline",
    ]
    counts: dict[str, int] = {}
    for s in res.steps:
        counts[s.state] = counts.get(s.state, 0) + 1
    out.append("  states: " + ", ".join(f"{k} {v}" for k, v in sorted(counts.items())))
    n_state = sum(1 for c in res.changes if c["kind"] == "state") - 1
    n_find = sum(1 for c in res.changes if c["kind"] == "finding")
    out.append(f"  {n_state} state changes, {n_find} findings raised")
    with_truth = [s for s in res.steps if s.truth and s.speed_hz and s.truth.get("running")]
    if with_truth:
        err = [abs(s.speed_hz - s.truth["speed_hz"]) / s.truth["speed_hz"] for s in with_truth]
        err.sort()
        off = sum(1 for e in err if e > 0.01)
        out.append(f"  running speed vs simulator truth: median error {100 * err[len(err) // 2]:.3f} %, "
                   f"largest {100 * err[-1]:.3f} % over {len(err)} running captures"
                   + (f"; {off} off by more than 1 %" if off else ""))
    for p, why in res.skipped:
        out.append(f"  skipped {p}: {why}")
    if events:
        out.append("")
        out.append("Scenario events vs what the agent showed (a finding counts only when it names the simulated "
                   "fault — its code and, for a bearing, that bearing — while the fault is there):")
        out.extend(truth_comparison(res, events))
    return out


def load_events(paths) -> list[dict] | None:
    """Scenario events from a ``scenario.json`` beside the recordings (written by ``skidvib simulate``)."""
    for raw in paths:
        p = Path(raw)
        story = (p if p.is_dir() else p.parent) / "scenario.json"
        if story.is_file():
            try:
                data = json.loads(story.read_text(encoding="utf-8"))
                return [{**e, "t0_utc_s": float(e["t_utc_s"])} for e in data["events"]]
            except (OSError, ValueError, KeyError, TypeError):
                return None
    return None


# ───────────────────────────── command ─────────────────────────────


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser("replay", help="run recordings through the monitoring pipeline, faster than real time")
    p.add_argument("paths", nargs="+", metavar="PATH", help="recordings or folders of recordings (played in name order)")
    p.add_argument("-c", "--config", help="config file (default: agent.toml beside the recordings, else built-in)")
    pace = p.add_mutually_exclusive_group()
    pace.add_argument("--speed", type=float, help="play the recordings' timeline N times faster than real time")
    pace.add_argument("--fast", action="store_true", help="no waiting at all (the default)")
    p.add_argument("--json", action="store_true", help="one JSON line per capture, then a JSON summary")
    p.add_argument("--fs", type=float, help="sample rate, for files that do not say")
    p.add_argument("--units", choices=("g", "m/s2", "mm/s", "V"), help="units, for files that do not say")
    p.add_argument("--channel", help="variable/column to read, for files with several (e.g. X105_DE_time)")
    p.add_argument("--reports", metavar="DIR", help="write an HTML report for each state change and a final one")
    p.set_defaults(func=run)
    return p


def _config_for(args):
    from agent.config import default_config, load_config

    if args.config:
        return load_config(args.config), args.config
    for raw in args.paths:
        p = Path(raw)
        cand = (p if p.is_dir() else p.parent) / "agent.toml"
        if cand.is_file():
            return load_config(cand), str(cand)
    return default_config(), "built-in defaults"


def run(args) -> int:
    from agent.errors import InputError, SourceUnavailable
    from agent.sources.replay import ReplaySource

    if args.speed is not None and not args.speed > 0:
        raise InputError(f"--speed must be > 0, got {args.speed}")
    cfg, cfg_name = _config_for(args)
    src = ReplaySource(args.paths, speed=args.speed, fs_hz=args.fs, units=args.units, channel=args.channel)
    try:
        src.open()
    except SourceUnavailable as exc:
        raise InputError(str(exc)) from exc
    out = sys.stdout
    if args.json:
        def on_step(view, new):
            out.write(json.dumps(view.to_json(), sort_keys=True) + "\n")
    else:
        print(f"Replaying {len(src)} recordings with config {cfg_name}", file=out)

        def on_step(view, new):
            for c in new:
                print(change_line(c), file=out)
    res = run_replay(src, cfg, on_step=on_step)
    events = load_events(args.paths)
    if args.json:
        out.write(json.dumps({"summary": {"captures": len(res.steps), "changes": res.changes,
                                          "skipped": [list(s) for s in res.skipped]}}, sort_keys=True) + "\n")
    else:
        print("", file=out)
        print("\n".join(summary_lines(res, events)), file=out)
    if args.reports and res.steps:
        from agent.report import write_replay_reports

        written = write_replay_reports(res, cfg, args.reports)
        print(f"{len(written)} reports written to {args.reports}", file=sys.stderr if args.json else out)
    return 0 if res.steps else 3

