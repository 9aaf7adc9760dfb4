"""Plain-text views for the console (no plotting library; the daemon may import this)."""

from __future__ import annotations

from agent.config import AgentConfig
from agent.features import ZONE_MEANING


def analysis_text(a, cfg: AgentConfig, rec=None, *, orders: bool = False) -> str:
    """A short analyst's note of one analysis: facts, overall levels, zone, peaks, findings."""
    from agent.cli import SAFETY_NOTE

    basis = cfg.analysis.amplitude_basis
    k = 2**0.5 if basis == "peak" else 1.0
    o = a.overall
    lines = []
    if rec is not None:
        lines.append(f"Recording   {rec.path}  (channel {rec.channel}, units in file {rec.units_in_file})")
    lines += [
        f"Capture     {a.capture.n_samples} samples at {a.capture.fs_hz:g} Hz = {a.capture.duration_s:.3f} s",
        f"Spectrum    {a.plan.window} window, {a.plan.lines} lines, {a.plan.bin_width_hz:.4f} Hz/line, "
        f"{a.acc.n_averages} averages, {a.plan.noverlap / a.plan.nperseg:.0%} overlap, to {a.fmax_hz:g} Hz",
        "",
        "Overall levels",
        f"  velocity      {o.vel_rms_mm_s:8.3f} mm/s r.m.s.  ({o.iso_band_hz[0]:g}-{o.iso_band_hz[1]:g} Hz)",
        f"  ISO 20816-3   zone {o.iso_zone} (group {cfg.machine.iso_group}, {cfg.machine.support} support): "
        f"{ZONE_MEANING[o.iso_zone]}",
        f"  acceleration  {o.acc_rms_g:8.4f} g r.m.s., {o.acc_peak_g:.4f} g peak (full band)",
        f"  crest factor  {o.crest_factor:8.2f}    kurtosis {o.kurtosis:.2f} (3 = Gaussian)",
        "",
    ]
    if a.speed is not None:
        from agent.orders import speed_text

        lines += speed_text(a.speed, basis=basis, orders=orders) + [""]
    lines += [
        f"Peaks (velocity, mm/s {basis}; {len(a.peaks)} above the local floor)",
        f"  {'Hz':>10} {'CPM':>10} {'order':>7} {'mm/s':>9} {'dB>floor':>8}  label",
    ]
    for p in a.peaks:
        order = f"{p.order:7.2f}" if p.order is not None else f"{'':>7}"
        lines.append(
            f"  {p.freq_hz:10.2f} {p.freq_hz * 60:10.0f} {order} {p.amp * k:9.4f} {p.height_db:8.1f}  {p.label or '-'}"
        )
    if getattr(a, "accounted", None) is not None:
        lines += ["", *accounted_text(a.accounted, basis, k)]
    if a.findings:
        lines += ["", "Findings (most credible first)"]
        for f in a.findings:
            lines.append(f"  [{f.severity.name.lower()}] {f.code} (confidence {f.confidence:.2f}) {f.title}")
            for e in f.evidence:
                if "freq_hz" in e:
                    lines.append(f"      {e.get('label', ''):<24} {e.get('freq_hz', 0.0):10.2f} Hz  "
                                 f"{e.get('height_db', 0.0):5.1f} dB > floor  {e.get('spectrum', '')}")
                elif "metric" in e and e.get("value") is not None:
                    lines.append(f"      {e['metric']}: {e['value']}")
            if f.action:
                lines.append(f"      do:      {f.action}")
                lines.append(f"      when:    {f.extra.get('urgency_text', f.urgency)} ({f.urgency})")
            if f.extra.get("why"):
                lines.append(f"      why:     {f.extra['why']}")
            for c in f.confirm:
                lines.append(f"      confirm: {c}")
    elif getattr(a, "accounted", None) is not None:
        lines += ["", "Findings: none — nothing in the spectrum points to a fault."]
    lines += ["", f"Caution: {SAFETY_NOTE}"]
    return "\n".join(lines)


def accounted_text(acc, basis: str = "rms", k: float = 1.0) -> list[str]:
    """The accounted spectrum as a table: every peak with its label and reason."""
    speed = f"{acc.speed_hz:.3f} Hz ({acc.speed_hz * 60:.0f} r/min)" if acc.speed_hz else "not found"
    lines = [
        f"Accounted peaks (velocity, {acc.unit} {basis}; running speed {speed}; "
        f"{acc.energy_explained_fraction:.1%} of peak energy explained)",
        f"  {'Hz':>9} {'order':>7} {acc.unit:>8} {'dB':>5}  {'label':<20} reason",
    ]
    for p in acc.peaks:
        order = f"{p.order:7.2f}" if p.order is not None else f"{'':>7}"
        hump = " [on resonance hump]" if p.on_hump else ""
        lines.append(f"  {p.freq_hz:9.2f} {order} {p.amp * k:8.4f} {p.height_db:5.1f}  {p.label:<20} {p.reason}{hump}")
    for fam in acc.families:
        lines.append(f"  family: {fam.note}")
    for h in acc.humps:
        lines.append(f"  resonance hump near {h.center_hz:.0f} Hz ({h.excess_db:.1f} dB above the floor trend, "
                     f"Q about {h.q:.0f}): peaks on it {h.caution}")
    for r in acc.floor_regions:
        d = r.delta_db
        base = f", {d:+.1f} dB vs baseline" if d is not None else ""
        lines.append(f"  floor {r.name:>14}: {r.level:.4g} {r.unit} r.m.s.{base}")
    for s in acc.suggestions:
        lines.append(f"  suggestion: {s}")
    return lines
