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
    if a.findings:
        lines += ["", "Findings"]
        for f in a.findings:
            lines.append(f"  [{f.severity.name.lower()}] {f.code} ({f.confidence:.2f}) {f.title}")
            for e in f.evidence:
                lines.append(
                    f"      {e.get('label', ''):<24} {e.get('freq_hz', 0.0):10.2f} Hz  "
                    f"{e.get('height_db', 0.0):5.1f} dB > floor  {e.get('spectrum', '')}"
                )
            if f.action:
                lines.append(f"      action: {f.action} ({f.urgency})")
    lines += ["", f"Caution: {SAFETY_NOTE}"]
    return "\n".join(lines)
