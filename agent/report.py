"""The analyst's report: one self-contained HTML file with SVG plots.

``skidvib report SNAPSHOT|RECORDING [-c CONFIG] -o report.html``. The page
has no external assets or links to fetch: plots are inline SVG (made by
:mod:`agent.plots`, the only module that imports matplotlib) and the style
sheet is inline. The daemon never imports this module.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import html
import json
from pathlib import Path

import numpy as np

from agent.cli import SAFETY_NOTE
from agent.config import AgentConfig
from agent.features import ZONE_MEANING
from agent.model import STANDARD_GRAVITY_MS2

CSS = """
body{font-family:Helvetica,Arial,sans-serif;color:#222;margin:24px auto;max-width:980px;line-height:1.4}
h1{font-size:20px;margin:0 0 4px}h2{font-size:15px;border-bottom:1px solid #999;padding-bottom:2px;margin-top:28px}
.facts{color:#555;font-size:12px}.state{display:inline-block;border:2px solid #222;padding:2px 10px;font-weight:bold;
text-transform:uppercase;letter-spacing:.05em}.state.bad{border-color:#c0392b;color:#c0392b}
table{border-collapse:collapse;font-size:12px;margin:6px 0}td,th{border-bottom:1px solid #ddd;padding:3px 8px;text-align:right}
th{border-bottom:1px solid #555}td.l,th.l{text-align:left}tr.unexpl td{color:#c0392b;font-weight:bold}
.finding{border-left:4px solid #555;padding:4px 10px;margin:8px 0}.finding.bad{border-left-color:#c0392b}
.caution{border:1px solid #555;padding:8px 12px;font-size:12px;margin-top:16px}
figure{margin:8px 0}svg{max-width:100%;height:auto}
@media print{body{margin:0}h2{page-break-after:avoid}figure{page-break-inside:avoid}}
"""

BAD_STATES = ("alert", "danger", "sensor_fault")


def _e(x) -> str:
    return html.escape(str(x), quote=True)


def _utc(t: float) -> str:
    if not t:
        return "unknown time"
    return dt.datetime.fromtimestamp(t, dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S UTC")


def peak_rows(analysis, basis: str = "rms"):
    """(freq_hz, amp, label, unexplained, order) for every listed peak, in the report's basis."""
    k = 2**0.5 if basis == "peak" else 1.0
    rows = []
    for p in analysis.peaks:
        label = p.label or "unexplained"
        rows.append((p.freq_hz, p.amp * k, label, not p.label, p.order))
    return rows


def build_report(
    analysis,
    cfg: AgentConfig,
    *,
    state: dict | None = None,
    findings: list[dict] | None = None,
    trend: list | None = None,
    source_name: str = "",
) -> str:
    """The report HTML for one analysis. ``state``: {state, since_utc_s, reason, action, urgency}."""
    from agent import plots

    a = analysis
    basis = cfg.analysis.amplitude_basis
    rows = peak_rows(a, basis)
    findings = findings if findings is not None else [f.to_json() for f in a.findings]
    st = state or {}
    state_name = st.get("state") or ("analysis only" if not findings else "see findings")
    parts: list[str] = []
    add = parts.append
    add("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>")
    add(f"<title>Vibration report {_e(cfg.asset.tag)} {_e(_utc(a.capture.t0_utc_s))}</title>")
    add(f"<style>{CSS}</style></head><body>")
    add(f"<h1>Vibration report — {_e(cfg.asset.name)} [{_e(cfg.asset.tag)}]</h1>")
    add(f"<div class='facts'>{_e(cfg.asset.site)} · point {_e(a.capture.channel)} · capture {_e(_utc(a.capture.t0_utc_s))}"
        f"{' · ' + _e(source_name) if source_name else ''}</div>")

    # ── the answer ──
    add("<h2 id='summary'>Summary</h2>")
    bad = state_name in BAD_STATES
    add(f"<p>Machine state: <span class='state{' bad' if bad else ''}'>{_e(state_name)}</span>")
    if st.get("since_utc_s"):
        add(f" since {_e(_utc(st['since_utc_s']))}")
    add("</p>")
    if st.get("reason"):
        add(f"<p>{_e(st['reason'])}</p>")
    if st.get("action"):
        add(f"<p><b>What to do:</b> {_e(st['action'])} ({_e(st.get('urgency', ''))})</p>")
    o = a.overall
    add(f"<p>Overall velocity {o.vel_rms_mm_s:.2f} mm/s r.m.s. ({o.iso_band_hz[0]:g}–{o.iso_band_hz[1]:g} Hz): "
        f"ISO 20816-3 zone <b>{_e(o.iso_zone)}</b> — {_e(ZONE_MEANING[o.iso_zone])} "
        f"(group {cfg.machine.iso_group}, {_e(cfg.machine.support)} support).</p>")
    add("<h2 id='findings'>Findings</h2>")
    if not findings:
        add("<p>No fault found in this capture.</p>")
    for f in findings:
        sev = f.get("severity", "")
        add(f"<div class='finding{' bad' if sev in ('alert', 'danger') else ''}'>")
        add(f"<b>{_e(f.get('title') or f.get('code'))}</b> <span class='facts'>[{_e(f.get('code'))}, "
            f"confidence {float(f.get('confidence', 0)):.2f}, severity {_e(sev)}]</span>")
        if f.get("action"):
            add(f"<br>Action: {_e(f['action'])} — urgency: {_e(f.get('urgency', ''))}")
        if f.get("confirm"):
            add("<br>To confirm: " + "; ".join(_e(c) for c in f["confirm"]))
        ev = f.get("evidence") or []
        if ev:
            add("<br><span class='facts'>Evidence: " + "; ".join(
                _e(e.get("label", "")) + (f" {float(e['freq_hz']):.2f} Hz" if "freq_hz" in e else "") for e in ev[:8]
            ) + "</span>")
        add("</div>")
    add(f"<div class='caution'><b>Caution.</b> {_e(SAFETY_NOTE)}</div>")

    # ── evidence ──
    vel_amp = a.vel.amplitude(basis)
    unit = f"velocity, mm/s {basis}"
    pk = [(f, amp, lab, un) for f, amp, lab, un, _ in rows]
    add("<h2 id='spectrum'>Velocity spectrum</h2>")
    add("<figure>" + plots.spectrum_svg(a.vel.f_hz, vel_amp, pk, unit=unit, log=False,
                                         title="Velocity spectrum, linear amplitude (peaks named; unexplained in colour)",
                                         fmax_hz=min(a.fmax_hz, 1000.0)) + "</figure>")
    add("<figure>" + plots.spectrum_svg(a.vel.f_hz, vel_amp, pk, unit=unit, log=True,
                                         title="Velocity spectrum, log amplitude", fmax_hz=a.fmax_hz) + "</figure>")
    speed_hz = a.extras.get("speed_hz") if isinstance(a.extras, dict) else None
    if speed_hz:
        add("<h2 id='orders'>Order view</h2>")
        op = [(f / speed_hz, amp, lab, un) for f, amp, lab, un in pk]
        add("<figure>" + plots.orders_svg(a.vel.f_hz / speed_hz, vel_amp, op, unit=unit,
                                           title=f"Orders of running speed {speed_hz * 60:.0f} r/min") + "</figure>")
    env = a.extras.get("envelope") if isinstance(a.extras, dict) else None
    if env is None and speed_hz:
        env = _envelope_view(a, cfg, float(speed_hz), findings)
    if env is not None:
        add("<h2 id='envelope'>Envelope spectrum</h2>")
        add("<figure>" + plots.envelope_svg(env["f_hz"], env["amp"], env.get("markers", []), unit=env.get("unit", "g²"),
                                             title=env.get("title", "Squared envelope spectrum"),
                                             fmax_hz=env.get("fmax_hz", 500.0)) + "</figure>")
    add("<h2 id='waveform'>Time waveform</h2>")
    x_g = np.asarray(a.capture.accel_ms2) / STANDARD_GRAVITY_MS2
    n_show = min(x_g.size, int(a.capture.fs_hz * 0.5))
    add("<figure>" + plots.waveform_svg(np.arange(n_show) / a.capture.fs_hz, x_g[:n_show], unit="acceleration, g",
                                         title=f"First {n_show / a.capture.fs_hz:.2f} s — crest factor {o.crest_factor:.2f}, "
                                               f"kurtosis {o.kurtosis:.2f}") + "</figure>")
    if trend:
        add("<h2 id='trend'>Trend</h2>")
        t = [r["t_utc_s"] for r in trend]
        series = {"overall velocity, mm/s r.m.s.": [r.get("vel_rms_mm_s", np.nan) for r in trend]}
        states, last = [], None
        for r in trend:
            if r.get("state") != last:
                states.append((r["t_utc_s"], r.get("state")))
                last = r.get("state")
        from agent.features import ISO20816_3_VELOCITY_MM_S

        _, bc, cd = ISO20816_3_VELOCITY_MM_S[(cfg.machine.iso_group, cfg.machine.support)]
        add("<figure>" + plots.trend_svg(t, series, levels={"alert (zone C)": bc, "danger (zone D)": cd}, states=states,
                                          title="Overall velocity with ISO alarm levels and state changes",
                                          unit="mm/s r.m.s.") + "</figure>")

    add("<h2 id='peaks'>Peak table</h2><table><tr><th>Hz</th><th>CPM</th><th>order</th>"
        f"<th>mm/s {basis}</th><th class='l'>label</th></tr>")
    for f, amp, lab, un, order in rows:
        order_txt = f"{order:.2f}" if order is not None else (f"{f / speed_hz:.2f}" if speed_hz else "")
        add(f"<tr{' class=unexpl' if un else ''}><td>{f:.2f}</td><td>{f * 60:.0f}</td><td>{order_txt}</td>"
            f"<td>{amp:.4f}</td><td class='l'>{_e(lab)}</td></tr>")
    add("</table>")
    add("<h2 id='facts'>Capture facts</h2><table>")
    facts = [
        ("sample rate", f"{a.capture.fs_hz:g} Hz"),
        ("samples / duration", f"{a.capture.n_samples} / {a.capture.duration_s:.3f} s"),
        ("lines / resolution", f"{a.plan.lines} / {a.plan.bin_width_hz:.4f} Hz"),
        ("window / averages / overlap", f"{a.plan.window} / {a.acc.n_averages} / {a.plan.noverlap / a.plan.nperseg:.0%}"),
        ("units", "acceleration m/s² (shown in g); velocity mm/s"),
        ("amplitude basis", f"{basis}; overall levels r.m.s."),
        ("overall velocity band", f"{o.iso_band_hz[0]:g}–{o.iso_band_hz[1]:g} Hz"),
        ("acceleration", f"{o.acc_rms_g:.4f} g r.m.s., {o.acc_peak_g:.4f} g peak"),
    ]
    for k, v in facts:
        add(f"<tr><td class='l'>{_e(k)}</td><td class='l'>{_e(v)}</td></tr>")
    add("</table>")
    add(f"<p class='facts'>Generated by skidvib from {_e(source_name or 'a capture')}.</p>")
    add("</body></html>")
    return "\n".join(parts)


def _envelope_view(a, cfg: AgentConfig, speed_hz: float, findings: list[dict]) -> dict | None:
    """Squared envelope spectrum (kurtogram band) with every configured bearing's tones marked.

    Computed here, for the report only; a marker is drawn in colour when a finding's
    evidence names a tone within 2 % of it (the usual slip allowance).
    """
    from agent.envelope import envelope_spectrum
    from agent.kinematics import bearing_orders

    try:
        lo, hi = cfg.analysis.envelope_band_hz
        env = envelope_spectrum(a.capture.accel_ms2, a.capture.fs_hz, (lo, hi) if hi > lo else None,
                                fmin_hz=min(1000.0, a.capture.fs_hz / 8), fmax_env_hz=None)
    except ValueError:
        return None
    evidence_hz = [float(e["freq_hz"]) for f in findings for e in (f.get("evidence") or [])
                   if isinstance(e, dict) and isinstance(e.get("freq_hz"), (int, float))]
    markers = []
    top_hz = 0.0
    for b in cfg.machine.bearings:
        bo = bearing_orders(b.balls, b.ball_diameter_mm, b.pitch_diameter_mm, b.contact_angle_deg)
        for name, order in (("BPFO", bo.bpfo), ("BPFI", bo.bpfi), ("2xBSF", 2 * bo.bsf), ("FTF", bo.ftf)):
            for h in (1, 2, 3):
                f = h * order * speed_hz
                found = any(abs(f - e) <= 0.02 * f for e in evidence_hz)
                markers.append((f, f"{h if h > 1 else ''}{'x' if h > 1 else ''}{name} {b.name}", found))
                top_hz = max(top_hz, f)
    fmax = min(float(env.f_hz[-1]), max(10.0 * speed_hz, 1.15 * top_hz))
    band = f"{env.band_hz[0]:.0f}–{env.band_hz[1]:.0f} Hz ({env.band_source})"
    return {"f_hz": env.f_hz, "amp": env.amplitude, "markers": markers, "fmax_hz": fmax,
            "unit": "squared envelope (relative)",
            "title": f"Squared envelope spectrum, demodulation band {band}; bearing tones marked"}


def load_snapshot(path: Path):
    """(Recording-like capture, analysis document) from a snapshot folder."""
    from agent.recordings import read_recording

    doc = json.loads((path / "analysis.json").read_text(encoding="utf-8"))
    rec = read_recording(path / "waveform.wav", units="m/s2")
    return rec, doc


def write_report(target: str | Path, cfg: AgentConfig, out: str | Path, *, state: dict | None = None,
                 findings: list[dict] | None = None, **read_args) -> Path:
    """Analyse a snapshot folder or a recording file and write the report HTML to ``out``.

    For a recording, ``state``/``findings`` may say what the monitor concluded
    (replay and demo pass them); a snapshot carries its own.
    """
    from agent.pipeline import analyse_capture
    from agent.recordings import read_recording

    target = Path(target)
    trend = None
    if target.is_dir() and (target / "analysis.json").is_file():
        rec, doc = load_snapshot(target)
        cap = dataclasses.replace(rec.to_capture(), t0_utc_s=float(doc.get("t_utc_s", 0.0)))
        a = analyse_capture(cap, cfg)
        inner = doc.get("analysis", {})
        state = inner.get("state") if isinstance(inner.get("state"), dict) else state
        findings = inner.get("findings", findings)
        trend = _trend_near(target, cfg)
        name = f"snapshot {target.name}"
    else:
        rec = read_recording(target, **read_args)
        a = analyse_capture(rec.to_capture(), cfg)
        name = str(target)
    html_text = build_report(a, cfg, state=state, findings=findings, trend=trend, source_name=name)
    out = Path(out)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(html_text, encoding="utf-8")
    except OSError as exc:
        from agent.errors import AgentError

        raise AgentError(f"cannot write the report to {out}: {exc.strerror or exc}") from exc
    return out


def _trend_near(snapshot_dir: Path, cfg: AgentConfig):
    """Trend rows from the state directory holding this snapshot, if there is one."""
    from agent.errors import InputError
    from agent.trend import read_trend

    state_dir = snapshot_dir.parent.parent
    if not (state_dir / "trend.sqlite").is_file():
        return None
    try:
        points = read_trend(state_dir)
    except InputError:
        return None
    return [{"t_utc_s": p.t_utc_s, "state": p.state, "vel_rms_mm_s": p.features.get("vel_rms_mm_s", np.nan)}
            for p in points]


def write_replay_reports(res, cfg: AgentConfig, out_dir: str | Path, *, max_reports: int = 24) -> list[Path]:
    """One report per state change of a replay (``agent.replay_cmd.ReplayResult``) and a final one."""
    from agent.model import MachineState
    from agent.monitor import STATE_ACTION

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    picks: list = []
    last_state = None
    for step in res.steps:
        if step.state != last_state and step.path:
            picks.append((step, "change"))
        last_state = step.state
    picks = picks[: max_reports - 1]
    if res.steps and res.steps[-1].path:
        picks.append((res.steps[-1], "final"))
    written = []
    for step, why in picks:
        try:
            action, urgency = STATE_ACTION[MachineState(step.state)]
        except ValueError:
            action, urgency = "", ""
        state = {"state": step.state, "since_utc_s": step.t0_utc_s, "reason": step.reason,
                 "action": action, "urgency": urgency}
        name = f"{step.seq:04d}-{step.state}{'-final' if why == 'final' else ''}.html"
        written.append(write_report(step.path, cfg, out / name, state=state,
                                    findings=[f.to_json() for f in step.findings]))
    return written
