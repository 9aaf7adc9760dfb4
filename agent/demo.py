"""``skidvib demo``: six weeks of the invented demo skid in about a minute, no hardware needed.

Simulates the demo scenario (``replay/scenarios/demo.toml``: pump P-201 at
the fictional Tarnbrook water works — normal running at two speeds, an
outer-race defect growing over weeks, a cavitation episode, a sensor-cable
afternoon, a repair) into ``OUT/recordings``, then replays it through the
monitoring pipeline with ``config/demo-skid.toml`` — the same code path as
``skidvib replay`` — showing progress, speed, state and the findings shown now
as it goes, and ends with what was detected when, beside the scenario's
ground truth.

Outputs (all under ``OUT``): ``recordings/`` (WAV + JSON sidecars, the
scenario story ``scenario.json``), ``replay.log`` (every line shown plus the
summary) and ``replay.jsonl`` (one JSON line per capture). Recordings made
from the same scenario file are reused.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DEMO_CONFIG = ROOT / "config" / "demo-skid.toml"
DEMO_SCENARIO = "demo"


class _Console:
    """A live status line on a terminal; periodic plain lines otherwise."""

    def __init__(self, stream, live: bool | None = None) -> None:
        self.stream = stream
        self.live = stream.isatty() if live is None else live
        self.width = max(60, shutil.get_terminal_size((100, 20)).columns - 1)
        self._status = ""
        self._last_pct = -1

    def status(self, text: str, done: int, total: int) -> None:
        if self.live:
            self._status = text[: self.width]
            self.stream.write("\r" + self._status.ljust(self.width))
            self.stream.flush()
        else:
            pct = int(100 * done / max(total, 1)) // 10 * 10
            if pct != self._last_pct:
                self._last_pct = pct
                self.stream.write(text + "\n")

    def line(self, text: str) -> None:
        if self.live and self._status:
            self.stream.write("\r" + " " * self.width + "\r")
        self.stream.write(text + "\n")
        if self.live and self._status:
            self.stream.write(self._status.ljust(self.width))
        self.stream.flush()

    def end(self) -> None:
        if self.live and self._status:
            self.stream.write("\r" + " " * self.width + "\r")
            self._status = ""
        self.stream.flush()


def demo_signal(fs_hz: float, n: int, seed: int = 201):
    """P-201 at 1476 r/min: 1X, 2X, vane pass (6X), twice line frequency, broadband noise (m/s²).

    A plain, stationary test signal (for quick checks and tests); the full demo uses the simulator.
    """
    import numpy as np

    rng = np.random.default_rng(seed)
    t = np.arange(n) / fs_hz
    f1 = 1476.0 / 60.0
    parts = [(f1, 1.6), (2 * f1, 0.7), (6 * f1, 0.9), (100.0, 0.25)]  # (Hz, mm/s r.m.s.)
    acc = np.zeros(n)
    for f, v_mm_s in parts:
        acc += np.sqrt(2) * v_mm_s / 1000.0 * 2 * np.pi * f * np.sin(2 * np.pi * f * t + rng.uniform(0, 2 * np.pi))
    return acc + rng.normal(0, 0.05, n)


def _mm_s(v: float) -> str:
    return f"{v:5.2f} mm/s" if v == v else "   -- mm/s"  # NaN: no usable capture


def _bar(done: int, total: int, width: int = 20) -> str:
    k = int(width * done / max(total, 1))
    return "[" + "#" * k + "." * (width - k) + "]"


def _ensure_recordings(scenario_path: Path, rec_dir: Path, console: _Console, jobs: int) -> None:
    from agent.scenario import load_scenario
    from agent.simulate_cmd import simulate

    digest = hashlib.sha256(scenario_path.read_bytes()).hexdigest()
    stamp = rec_dir / ".scenario.sha256"
    if stamp.is_file() and stamp.read_text().strip() == digest and (rec_dir / "scenario.json").is_file():
        console.line(f"Reusing the recordings in {rec_dir} (same scenario file).")
        return
    if rec_dir.exists():
        for p in list(rec_dir.glob("*.wav")) + list(rec_dir.glob("*.json")):
            p.unlink()
    scen = load_scenario(scenario_path)
    console.line(f"Simulating {scen.n_captures} captures of {scen.capture_s:g} s ({scen.duration_s / 86400:g} days) "
                 f"into {rec_dir} ...")
    simulate(scen, rec_dir, jobs=jobs,
             progress=lambda d, n: console.status(f"  simulating {_bar(d, n)} {d}/{n}", d, n))
    console.end()
    stamp.write_text(digest + "\n")


def run_demo(out_dir: str | Path = "demo-out", *, jobs: int | None = None, stream=None, live: bool | None = None,
             scenario: str = DEMO_SCENARIO, config: str | Path = DEMO_CONFIG) -> int:
    """Simulate ``scenario`` (if not done already) and replay it with a live console view."""
    from agent.cli import SAFETY_NOTE
    from agent.config import load_config
    from agent.replay_cmd import change_line, load_events, run_replay, sim_tag, summary_lines
    from agent.scenario import find_scenario, load_scenario
    from agent.sources.replay import ReplaySource

    stream = stream or sys.stdout
    console = _Console(stream, live)
    out = Path(out_dir)
    rec_dir = out / "recordings"
    rec_dir.mkdir(parents=True, exist_ok=True)
    scenario_path = find_scenario(scenario)
    scen = load_scenario(scenario_path)
    console.line(f"skidvib demo: {scen.title}")
    console.line("Everything here is simulated and invented. " + SAFETY_NOTE)
    console.line("")
    _ensure_recordings(scenario_path, rec_dir, console, jobs or min(4, os.cpu_count() or 1))

    config = Path(config)
    cfg = load_config(config)
    src = ReplaySource([rec_dir])
    src.open()
    total = len(src)
    console.line(f"Replaying {total} captures through the monitoring pipeline with {config.name} (fast) ...")
    log_lines: list[str] = []
    jsonl = (out / "replay.jsonl").open("w", encoding="utf-8")
    shown: dict[str, str] = {}  # findings the operator is shown now: code → severity

    def on_step(view, new):
        jsonl.write(json.dumps(view.to_json(), sort_keys=True) + "\n")
        for c in new:
            text = change_line(c)
            log_lines.append(text)
            console.line(text)
            if c["kind"] == "finding":
                shown[c["code"]] = c["severity"]
            elif c["kind"] == "cleared":
                shown.pop(c["code"], None)
        for f in view.findings:  # the shown findings' severity of this capture (it can rise and fall)
            if f.code in shown:
                shown[f.code] = f.severity.name.lower()
        if view.speed_hz:
            speed = f"{view.speed_hz * 60:6.0f} r/min"
        elif view.truth and view.truth.get("running"):
            speed = f"{view.truth['speed_hz'] * 60:6.0f} r/min (sim)"
        elif view.truth:
            speed = "stopped (sim)"
        else:
            speed = "speed n/a"
        when = view.to_json()["t0_utc"].replace("T", " ")[:-4] + "Z"
        n = view.seq + 1
        console.status(f"{_bar(n, total)} {n:3d}/{total}  {when}  {speed}  {view.state}  "
                       f"{_mm_s(view.vel_rms_mm_s)}  findings: {_shown_text(shown)}"
                       f"  | sim: {sim_tag(view.truth)}", n, total)

    try:
        res = run_replay(src, cfg, on_step=on_step)
    finally:
        jsonl.close()
    console.end()
    summary = summary_lines(res, load_events([rec_dir]))
    console.line("")
    for text in summary:
        console.line(text)
    (out / "replay.log").write_text("\n".join(log_lines + [""] + summary) + "\n", encoding="utf-8")
    from agent.errors import MissingExtra
    from agent.report import write_replay_reports

    console.line("Writing a report for each state change and a final one ...")
    try:
        reports = write_replay_reports(res, cfg, out / "reports")
    except MissingExtra as exc:
        reports = []
        console.line(f"  reports skipped: {exc}")
    console.line("")
    console.line("Outputs:")
    console.line(f"  recordings (WAV + JSON with ground truth)  {rec_dir}/")
    console.line(f"  scenario story (events, times)            {rec_dir / 'scenario.json'}")
    console.line(f"  replay log and summary                    {out / 'replay.log'}")
    console.line(f"  one JSON line per capture                 {out / 'replay.jsonl'}")
    console.line(f"  analyst reports (HTML, one per change)    {out / 'reports'}/  ({len(reports)} files; "
                 f"latest {reports[-1].name if reports else '-'})")
    shown = config.relative_to(ROOT) if config.is_relative_to(ROOT) else config
    console.line(f"Replay them again with: skidvib replay {rec_dir} -c {shown}")
    return 0


def _shown_text(shown: dict[str, str]) -> str:
    """The findings shown now, newest last ("none" when there are none)."""
    return ", ".join(f"{code} ({sev})" for code, sev in shown.items()) or "none"
