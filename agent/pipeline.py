"""The functional core: one capture in, one :class:`Analysis` out.

``analyse_capture`` calls the stages in pipeline order; it does no I/O and
reads no clock (time comes from ``Capture.t0_utc_s``), so a recording and a
config always give the same result, in replay, in the daemon and in tests.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from agent.config import AgentConfig, iso_band_hz
from agent.features import OverallLevels, TimeMetrics, overall_levels, time_metrics
from agent.model import Capture, Finding, Peak
from agent.orders import SpeedView, speed_view
from agent.speed import SpeedEstimate
from agent.spectra import (
    Spectrum,
    SpectrumPlan,
    accel_spectrum,
    find_peaks,
    noise_floor,
    velocity_spectrum,
)


@dataclass(frozen=True, slots=True)
class Analysis:
    """Everything the agent concluded from one capture."""

    capture: Capture
    plan: SpectrumPlan
    acc: Spectrum
    vel: Spectrum
    time: TimeMetrics
    overall: OverallLevels
    vel_floor: Any
    peaks: tuple[Peak, ...]
    fmax_hz: float
    findings: tuple[Finding, ...] = ()
    extras: dict = field(default_factory=dict)
    speed: SpeedView | None = None


def plan_for(cfg: AgentConfig, fs_hz: float, n_samples: int) -> SpectrumPlan:
    """Spectrum plan from the config; lines=0 → about 3 averages at the finest resolution."""
    a = cfg.analysis
    if a.lines:
        lines = a.lines
    else:
        nperseg = 1 << max(3, int(n_samples).bit_length() - 1)
        if nperseg * 1.5 > n_samples and nperseg >= 16:
            nperseg //= 2
        lines = nperseg // 2
    return SpectrumPlan.build(fs_hz, n_samples, window=a.window, lines=lines, overlap=a.overlap)


def analysis_fmax_hz(cfg: AgentConfig, fs_hz: float) -> float:
    return cfg.analysis.fmax_hz if cfg.analysis.fmax_hz else 0.4 * fs_hz


def analyse_capture(
    capture: Capture,
    cfg: AgentConfig,
    plan: SpectrumPlan | None = None,
    previous_speed: SpeedEstimate | None = None,
) -> Analysis:
    """Spectra, overall levels, running speed, labelled peaks and order levels of one capture."""
    if plan is None or plan.fs_hz != capture.fs_hz or plan.nperseg > capture.n_samples:
        plan = plan_for(cfg, capture.fs_hz, capture.n_samples)
    band = iso_band_hz(cfg)
    band = (band[0], min(band[1], capture.fs_hz / 2.0))
    acc = accel_spectrum(capture.accel_ms2, plan)
    vel = velocity_spectrum(acc, band[0])
    tm = time_metrics(capture.accel_ms2)
    overall = overall_levels(tm, vel, band, cfg.machine.iso_group, cfg.machine.support)
    fmax = analysis_fmax_hz(cfg, capture.fs_hz)
    floor = noise_floor(vel)
    peaks = find_peaks(
        vel,
        floor,
        min_height_db=cfg.analysis.peak_min_height_db,
        fmin_hz=band[0],
        fmax_hz=fmax,
        max_peaks=cfg.analysis.max_peaks,
    )
    sv = speed_view(
        capture.accel_ms2, capture.fs_hz, cfg.machine, vel=vel, peaks=peaks, fmax_hz=fmax,
        f_low_hz=band[0], previous=previous_speed,
    )
    peaks = sv.peaks
    a = Analysis(
        capture=capture,
        plan=plan,
        acc=acc,
        vel=vel,
        time=tm,
        overall=overall,
        vel_floor=floor,
        peaks=peaks,
        fmax_hz=fmax,
        extras={"speed_hz": sv.speed.speed_hz} if sv.speed.found else {},
        speed=sv,
    )
    return with_bearing_findings(a, cfg)


def with_bearing_findings(a: Analysis, cfg: AgentConfig) -> Analysis:
    """Add the bearing stage's findings (agent.bearings) once the running speed is known.

    Speed comes from the speed stage (``a.extras["speed_hz"]``); with none
    there is no bearing verdict. With no ``[[machine.bearings]]`` configured,
    non-synchronous envelope families are reported as unassigned tones.
    When the speed stage order-tracked the capture (speed moving within
    it), the envelope is taken on the angle-resampled waveform.
    """
    from dataclasses import replace

    from agent.bearings import bearing_findings
    from agent.orders import resample_to_angle

    speed_hz = a.extras.get("speed_hz")
    if not speed_hz:
        return a  # no running speed, no bearing tones (with no bearing configured: unassigned families)
    x, fs, sp, angle_speed = a.capture.accel_ms2, a.capture.fs_hz, float(speed_hz), None
    view = a.speed
    if view is not None and view.tracked and view.profile is not None:
        spr = int(fs / (1.05 * (view.profile.mean_hz + view.profile.span_hz)))
        try:
            x, fs, sp, angle_speed = resample_to_angle(x, fs, view.profile, spr), float(spr), 1.0, view.profile.mean_hz
        except ValueError:
            pass  # fall back to the time-domain capture
    found = bearing_findings(x, fs, sp, cfg.machine, cfg.analysis, angle_domain_speed_hz=angle_speed)
    return replace(a, findings=a.findings + found) if found else a


def analysis_to_json(a: Analysis, cfg: AgentConfig, *, orders: bool = False) -> dict:
    """The documented JSON document of ``skidvib analyze --json`` (schema 1);
    ``orders`` adds the order view (band r.m.s. per order of the reference shaft)."""
    basis = cfg.analysis.amplitude_basis
    k = 2**0.5 if basis == "peak" else 1.0
    doc = {
        "schema": 1,
        "channel": a.capture.channel,
        "fs_hz": a.capture.fs_hz,
        "n_samples": a.capture.n_samples,
        "duration_s": round(a.capture.duration_s, 6),
        "t0_utc_s": a.capture.t0_utc_s,
        "spectrum": {
            "window": a.plan.window,
            "lines": a.plan.lines,
            "bin_width_hz": a.plan.bin_width_hz,
            "n_averages": a.acc.n_averages,
            "overlap": round(a.plan.noverlap / a.plan.nperseg, 3),
            "fmax_hz": a.fmax_hz,
            "amplitude_basis": basis,
        },
        "overall": a.overall.to_json(),
        "peaks": [
            {
                "freq_hz": round(p.freq_hz, 4),
                "cpm": round(p.freq_hz * 60.0, 1),
                "amp": round(p.amp * k, 5),
                "unit": f"mm/s {basis}",
                "height_db": round(p.height_db, 1),
                "label": p.label,
                "family": p.family,
                "order": None if p.order is None else round(p.order, 3),
            }
            for p in a.peaks
        ],
        "findings": [f.to_json() for f in a.findings],
    }
    if a.speed is not None:
        doc["speed"] = a.speed.to_json()
        if orders:
            lv = a.speed.order_levels
            doc["orders"] = None if lv is None else {**lv.to_json(basis), "order_tracked": a.speed.tracked}
    return doc
