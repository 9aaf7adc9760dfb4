"""The functional core: one capture in, one :class:`Analysis` out.

``analyse_capture`` calls the stages in pipeline order; it does no I/O and
reads no clock (time comes from ``Capture.t0_utc_s``), so a recording and a
config always give the same result, in replay, in the daemon and in tests.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from agent.config import AgentConfig, iso_band_hz
from agent.features import OverallLevels, TimeMetrics, overall_levels, time_metrics
from agent.model import Capture, Finding, Peak
from agent.orders import SpeedView, speed_view
from agent.speed import SpeedEstimate
from agent.spectra import (
    CaptureSpectra,
    Spectrum,
    SpectrumPlan,
    accel_spectrum,
    find_peaks,
    noise_floor,
    velocity_floor,
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
    accounted: Any = None  # agent.peaks.AccountedSpectrum: every peak labelled (diagnosis stage)
    spectra: CaptureSpectra | None = None  # the capture's acceleration spectra, shared by the stages
    acc_floor: Any = None  # noise_floor(acc): the running-median floor the velocity floors are taken from


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
    spectra: CaptureSpectra | None = None,
) -> Analysis:
    """Spectra, overall levels, running speed, labelled peaks and order levels of one capture.

    ``spectra`` is the capture's :class:`agent.spectra.CaptureSpectra` when
    an earlier stage (the quality gate) made it: every acceleration spectrum
    of the capture is then computed once for all the stages.
    """
    if plan is None or plan.fs_hz != capture.fs_hz or plan.nperseg > capture.n_samples:
        plan = plan_for(cfg, capture.fs_hz, capture.n_samples)
    spectra = CaptureSpectra.of(capture) if spectra is None else spectra.of_samples(capture.accel_ms2)
    band = iso_band_hz(cfg)
    band = (band[0], min(band[1], capture.fs_hz / 2.0))
    acc = spectra.accel(plan)
    vel = velocity_spectrum(acc, band[0])
    tm = time_metrics(capture.accel_ms2)
    overall = overall_levels(tm, vel, band, cfg.machine.iso_group, cfg.machine.support)
    fmax = analysis_fmax_hz(cfg, capture.fs_hz)
    acc_floor = noise_floor(acc)
    floor = velocity_floor(vel, acc, acc_floor)
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
        f_low_hz=band[0], previous=previous_speed, spectra=spectra,
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
        spectra=spectra,
        acc_floor=acc_floor,
    )
    return with_diagnosis(with_bearing_findings(a, cfg), cfg)


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
    spectra = a.spectra  # the capture's own spectra serve only the time-domain samples
    view = a.speed
    if view is not None and view.tracked and view.profile is not None:
        spr = int(fs / (1.05 * (view.profile.mean_hz + view.profile.span_hz)))
        try:
            x, fs, sp, angle_speed = resample_to_angle(x, fs, view.profile, spr), float(spr), 1.0, view.profile.mean_hz
            spectra = None
        except ValueError:
            pass  # fall back to the time-domain capture
    found = bearing_findings(x, fs, sp, cfg.machine, cfg.analysis, angle_domain_speed_hz=angle_speed,
                             spectra=spectra)
    return replace(a, findings=a.findings + found) if found else a


# ───────────────────────── diagnosis stage: peak accounting → findings → advice ─────────────────────────


def floor_spectrum(accel_ms2, fs_hz: float, line_hz: float = 1.5) -> Spectrum:
    """A well-averaged acceleration spectrum of about ``line_hz`` per line for floor levels and humps.

    4-term Blackman-Harris window (side lobes below −92 dB; Harris 1978), so
    the leakage skirts of strong tones do not pose as a raised floor or a hump;
    Welch averaging with 50 % overlap (the same figures as
    ``scipy.signal.welch(..., scaling="spectrum")``, from a shared plan).
    """
    x = np.asarray(accel_ms2, dtype=np.float64)
    n = 1 << int(round(np.log2(fs_hz / line_hz)))
    n = int(min(n, max(64, x.size // 4)))
    plan = SpectrumPlan.with_segments(fs_hz, n, n // 2, window="blackmanharris")
    return accel_spectrum(x, plan)


def with_diagnosis(a: Analysis, cfg: AgentConfig) -> Analysis:
    """The last stages: account for every peak, then diagnose and advise.

    Takes the running speed and the expected tones from the speed stage
    (``a.speed``) and the bearing findings already in ``a.findings`` (the
    bearing stage); returns the analysis with the accounted spectrum and all
    findings, most credible first, each with severity, action and urgency.
    """
    from dataclasses import replace

    bearing = tuple(f for f in a.findings if f.code.startswith("bearing"))
    others = tuple(f for f in a.findings if not f.code.startswith("bearing"))
    found = a.speed is not None and a.speed.speed.found
    accounted, findings = diagnosis_stage(
        a.capture, cfg, a.acc, a.overall, a.fmax_hz,
        speed_hz=a.speed.speed.speed_hz if found else None,
        speed_confidence=a.speed.speed.confidence if found else 0.0,
        expected=a.speed.expected if found else (),
        bearing_findings=bearing, acc_floor=a.acc_floor,
    )
    return replace(a, accounted=accounted, findings=findings + others)


def diagnosis_stage(capture: Capture, cfg: AgentConfig, acc: Spectrum, overall: OverallLevels, fmax_hz: float,
                    *, speed_hz: float | None, speed_confidence: float = 1.0, expected: tuple = (),
                    bearing_findings: tuple[Finding, ...] = (), baseline_ratios: dict | None = None,
                    acc_floor: np.ndarray | None = None):
    """Account for every peak, then diagnose and advise: (AccountedSpectrum, findings).

    ``baseline_ratios`` (optional): current level ÷ learned normal per feature
    name of :mod:`agent.featureset` ("order_1x_mm_s", ...) or per finding
    code / "overall"; with them the rules and the severity judge against
    normal rather than against the ISO zone alone.

    Peaks are taken from a velocity spectrum with a lower cut than the ISO
    band (a quarter of the lowest running speed), so sub-synchronous tones
    (belts, oil whirl, half orders) are seen; the floor regions and humps
    from a well-averaged spectrum of a few Hz per line. ``acc_floor``
    (``noise_floor(acc)``, when the caller has it) spares the peak floor's
    running median.
    """
    from agent.advice import advise
    from agent.bearings import with_floor_stage
    from agent.diagnose import DiagnosisInput, diagnose
    from agent.peaks import account_peaks

    bin_hz = acc.bin_width_hz
    f_low = max(3 * bin_hz, min(iso_band_hz(cfg)[0], 0.25 * cfg.machine.speed_rpm[0] / 60.0))
    dvel = velocity_spectrum(acc, f_low)
    dfloor = None if acc_floor is None else velocity_floor(dvel, acc, acc_floor)
    pk = find_peaks(dvel, dfloor, min_height_db=cfg.analysis.peak_min_height_db, fmin_hz=f_low, fmax_hz=fmax_hz,
                    max_peaks=2 * cfg.analysis.max_peaks)
    cacc = floor_spectrum(capture.accel_ms2, capture.fs_hz)
    accounted = account_peaks(
        pk, speed_hz, expected, unit="mm/s", bin_width_hz=bin_hz, line_hz=cfg.machine.line_hz,
        spectrum=dvel, hump_spectrum=velocity_spectrum(cacc, max(f_low, 3 * cacc.bin_width_hz)),
        floor_spectrum=cacc,
    )
    bearing_findings = with_floor_stage(tuple(bearing_findings), accounted.floor_regions)
    ctx = DiagnosisInput(accounted=accounted, vel_rms_mm_s=overall.vel_rms_mm_s, iso_group=cfg.machine.iso_group,
                         support=cfg.machine.support, speed_confidence=speed_confidence,
                         bearing_findings=tuple(bearing_findings), baseline_ratios=baseline_ratios)
    findings = advise(diagnose(ctx), vel_rms_mm_s=overall.vel_rms_mm_s, iso_group=cfg.machine.iso_group,
                      support=cfg.machine.support, baseline_ratios=baseline_ratios,
                      alert_ratio=cfg.alarms.alert_ratio, danger_ratio=cfg.alarms.danger_ratio)
    return accounted, findings


def _finding_json(f: Finding) -> dict:
    d = f.to_json()
    for key in ("why", "urgency_text"):
        if key in f.extra:
            d[key] = f.extra[key]
    return d


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
        "accounted": None if a.accounted is None else a.accounted.to_json(k),
        "findings": [_finding_json(f) for f in a.findings],
    }
    if a.speed is not None:
        doc["speed"] = a.speed.to_json()
        if orders:
            lv = a.speed.order_levels
            doc["orders"] = None if lv is None else {**lv.to_json(basis), "order_tracked": a.speed.tracked}
    return doc
