"""Data-quality gate: is this capture a measurement of the machine? (pure)

``check_capture(capture, limits) -> QualityVerdict``. A capture that fails is
a *sensor* problem: it must never raise a machine alarm nor feed learning.
Problem codes, in the order they are reported:

* ``nan`` — non-finite samples (nothing else is checked).
* ``flatline`` — dead channel: no variation, too few distinct values, mostly
  repeated samples, or r.m.s. below ``min_rms_ms2``.
* ``clipped`` — samples at ≥ ``clip_level`` × full scale (converter range or
  sensor range, when known; REFERENCES §10 suggests 0.95, common practice),
  the source saw its converter rails, or flat tops: a pile-up of samples on
  exactly the extreme value (more samples *at* the top than in the 5 % band
  just below it — a smooth waveform, even a quantised sine, has the
  opposite).
* ``bias_out_of_range`` — measured IEPE bias outside the healthy window
  (sources that can see it), a DC offset above ``max_dc_fraction`` of full
  scale, or a baseline that drifts within the capture (range of segment
  means above ``max_drift_ratio`` × the AC level; healthy CWRU/IMS data
  reach 0.32). A constant offset alone is not flagged when the range is
  unknown: some data acquisition systems add one (IMS data: |mean| up to
  1.6 × the AC level).
* ``ski_slope`` — low-frequency rise of the velocity spectrum: more than
  ``ski_max_low_db`` of the acceleration r.m.s. lies in ``ski_low_band_hz``
  (below the machine's running speed), which after division by 2πf
  dominates the velocity spectrum (see :func:`ski_figures`). Threshold set
  from data: healthy CWRU and IMS captures of 1–10 s stay at or below
  −26.6 dB (CWRU 222 drive end, 2 s captures); a baseline decay of 2σ after
  an overload gives about −17 dB, a drifting baseline −16 to −7 dB.
* ``dropout`` — a run of exact zeros, or of one held value, longer than a
  real signal holds still.
* ``gap`` — the source lost samples inside the capture (sequence gap,
  dropped audio block, input overflow, ADC overrun).
* ``fs_mismatch`` — the sample rate is not the nominal one (capture's fs vs
  ``nominal_fs_hz``, or the source's clock check).
* ``implausible_level`` — r.m.s. above ``max_rms_ms2``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Mapping

import numpy as np

from agent.model import STANDARD_GRAVITY_MS2, Capture
from agent.spectra import CaptureSpectra, SpectrumPlan, band_rms, velocity_spectrum

PROBLEM_ORDER = (
    "nan",
    "flatline",
    "clipped",
    "bias_out_of_range",
    "ski_slope",
    "dropout",
    "gap",
    "fs_mismatch",
    "implausible_level",
)

#: source flags and the problem each one means
SOURCE_FLAG_PROBLEMS = {
    "gap": "gap",
    "input_overflow": "gap",
    "adc_overrun": "gap",
    "clipped_at_source": "clipped",
    "fs_mismatch": "fs_mismatch",
}


@dataclass(frozen=True, slots=True)
class QualityLimits:
    """Thresholds of the gate; defaults are common practice unless noted."""

    clip_level: float = 0.95  # fraction of full scale (REFERENCES §10, suggested check)
    sensor_full_scale_ms2: float | None = 50.0 * STANDARD_GRAVITY_MS2  # sensor range (config sensor.full_scale_g)
    flat_top_min_samples: int = 4  # samples exactly on the extreme before a pile-up counts
    flat_top_band: float = 0.05  # the band below the extreme, as a fraction of (extreme − median)
    min_rms_ms2: float = 1e-3  # below this a channel is taken as dead (0.1 mg)
    max_repeat_fraction: float = 0.9  # share of samples equal to their predecessor
    min_distinct_values: int = 5
    bias_v: tuple[float, float] = (8.0, 14.0)  # healthy IEPE bias window (config sensor.bias_v)
    max_dc_fraction: float = 0.25  # |mean| as a fraction of full scale
    max_drift_ratio: float = 0.75  # range of segment means ÷ AC r.m.s. within segments (healthy data ≤ 0.32)
    ski_low_band_hz: tuple[float, float] = (1.0, 5.0)  # keep below half the lowest running speed
    ski_ref_band_hz: tuple[float, float] = (10.0, 1000.0)  # velocity reference (ISO 10-1000 Hz band)
    ski_max_low_db: float = -20.0  # low-band share of the acceleration r.m.s. (see ski_figures)
    ski_resolution_hz: float = 0.5  # finest line spacing used for the check
    dropout_zero_run_s: float = 0.002  # a run of exact zeros this long is a dropout
    dropout_zero_run_min: int = 16  # ... and at least this many samples
    dropout_hold_run_s: float = 0.05  # a run of one held non-zero value this long is a dropout
    dropout_hold_run_min: int = 64
    nominal_fs_hz: float | None = None
    fs_tolerance: float = 0.001  # relative, for capture fs vs nominal
    max_rms_ms2: float = 20.0 * STANDARD_GRAVITY_MS2  # implausible for a pump skid (common practice)

    def __post_init__(self) -> None:
        if not 0.0 < self.clip_level <= 1.0:
            raise ValueError(f"clip_level must be in (0, 1], got {self.clip_level}")
        lo, hi = self.bias_v
        if not lo < hi:
            raise ValueError(f"bias_v window must be [low, high] with low < high, got {self.bias_v}")
        for name in ("ski_low_band_hz", "ski_ref_band_hz"):
            a, b = getattr(self, name)
            if not 0 < a < b:
                raise ValueError(f"{name} must be [low, high] with 0 < low < high, got {(a, b)}")
        if self.ski_low_band_hz[1] > self.ski_ref_band_hz[0]:
            raise ValueError("ski_low_band_hz must lie below ski_ref_band_hz")


@dataclass(frozen=True, slots=True)
class QualityVerdict:
    ok: bool
    problems: tuple[str, ...] = ()
    reasons: tuple[str, ...] = ()
    figures: Mapping[str, float] = field(default_factory=dict)

    def __post_init__(self) -> None:
        object.__setattr__(self, "figures", MappingProxyType(dict(self.figures)))

    @property
    def reason(self) -> str:
        """One line for operators: every reason, '; '-separated ('' when ok)."""
        return "; ".join(self.reasons)


def limits_from_config(cfg) -> QualityLimits:
    """Gate limits from an :class:`agent.config.AgentConfig` (``[sensor]``, ``[source]``, ``[machine]``).

    The ski-slope band stays below half the lowest running speed; hardware
    sources are held to the configured sample rate (a replay file keeps its own).
    """
    sen = cfg.sensor
    lowest_speed_hz = cfg.machine.speed_rpm[0] / 60.0
    ski_hi = max(2.0, min(5.0, 0.5 * lowest_speed_hz))
    return QualityLimits(
        sensor_full_scale_ms2=sen.full_scale_g * STANDARD_GRAVITY_MS2,
        bias_v=tuple(sen.bias_v),
        min_rms_ms2=sen.min_rms_g * STANDARD_GRAVITY_MS2,
        max_rms_ms2=sen.max_rms_g * STANDARD_GRAVITY_MS2,
        ski_low_band_hz=(min(1.0, ski_hi / 2.0), ski_hi),
        nominal_fs_hz=cfg.source.fs_hz if cfg.source.kind in ("soundcard", "serial") else None,
    )


def _baseline_drift(x: np.ndarray, fs_hz: float, limits: QualityLimits) -> tuple[float, float] | None:
    """(range of segment means, that range ÷ r.m.s. within segments); None if too short.

    Segments last at least 2 periods of the ski band's upper edge (so a
    machine tone above it, which lies at ≥ 2× that edge, averages out) and
    at least a tenth of the capture; at least 3 are needed.
    """
    seg_n = max(x.size // 10, int(math.ceil(2.0 * fs_hz / limits.ski_low_band_hz[1])))
    k = x.size // seg_n
    if k < 3:
        return None
    segs = x[: k * seg_n].reshape(k, seg_n)
    means = segs.mean(axis=1)
    within = float(np.sqrt(np.mean((segs - means[:, None]) ** 2)))
    if within == 0.0:
        return None
    span = float(means.max() - means.min())
    return span, span / within


def _longest_run(mask: np.ndarray) -> int:
    """Length of the longest run of True in a boolean array."""
    if not mask.any():
        return 0
    m = np.concatenate(([False], mask, [False])).astype(np.int8)
    d = np.diff(m)
    starts = np.flatnonzero(d == 1)
    ends = np.flatnonzero(d == -1)
    return int((ends - starts).max())


def _pile_up(x: np.ndarray, median: float, band: float, step: float, sign: int) -> tuple[int, int]:
    """(samples exactly on the extreme, samples in the band just inside it) for one side.

    The band is at least three quantisation steps wide, so a low-level
    quantised sine (which dwells on its top code) is not taken for a flat top.
    """
    top = x.max() if sign > 0 else x.min()
    at = int(np.count_nonzero(x == top))
    width = max(abs(top - median) * band, 3.0 * step)
    if sign > 0:
        near = int(np.count_nonzero((x < top) & (x >= top - width)))
    else:
        near = int(np.count_nonzero((x > top) & (x <= top + width)))
    return at, near


def ski_figures(
    x: np.ndarray, fs_hz: float, limits: QualityLimits, spectra: CaptureSpectra | None = None
) -> tuple[float, float] | None:
    """(low-band share of the acceleration, velocity rise), both in dB; None if too short.

    ``x`` may carry its mean (the spectrum removes each segment's mean);
    ``spectra``, the same samples' :class:`agent.spectra.CaptureSpectra`,
    shares the spectrum with the later stages.

    * low-band share: r.m.s. of the acceleration lines in ``ski_low_band_hz``
      relative to the capture's AC r.m.s. Real machine acceleration has
      almost nothing down there; a baseline shift after overload, a drifting
      cable or a thermal transient puts a lot there — and that is what rises
      as a ski slope once divided by 2πf into velocity.
    * velocity rise: low-band velocity r.m.s. relative to the velocity r.m.s.
      in ``ski_ref_band_hz`` — the ski slope as an analyst sees it (reported
      for the snapshot; the gate uses the share, which does not depend on how
      much the machine itself vibrates in the reference band).
    """
    lo_a, lo_b = limits.ski_low_band_hz
    ref_a, ref_b = limits.ski_ref_band_hz
    ref_b = min(ref_b, 0.45 * fs_hz)
    if ref_b <= ref_a:
        return None
    want = int(2 ** math.ceil(math.log2(fs_hz / limits.ski_resolution_hz)))
    nperseg = min(want, 1 << int(math.floor(math.log2(x.size))))
    bin_hz = fs_hz / nperseg
    if (lo_b - lo_a) / bin_hz < 3:
        return None
    plan = SpectrumPlan.build(fs_hz, x.size, window="hann", lines=nperseg // 2)
    acc = (CaptureSpectra(x, fs_hz) if spectra is None else spectra.of_samples(x)).accel(plan)
    vel = velocity_spectrum(acc, f_low_hz=0.5 * bin_hz)
    ac_rms = float(np.std(x))
    low_acc = band_rms(acc, lo_a, lo_b)
    low_vel, ref_vel = band_rms(vel, lo_a, lo_b), band_rms(vel, ref_a, ref_b)
    share_db = 20.0 * math.log10(max(low_acc, 1e-300) / ac_rms)
    rise_db = 20.0 * math.log10(max(low_vel, 1e-300) / max(ref_vel, 1e-300))
    return share_db, rise_db


def check_capture(
    capture: Capture, limits: QualityLimits = QualityLimits(), measured_fs_hz: float | None = None,
    *, spectra: CaptureSpectra | None = None,
) -> QualityVerdict:
    """Run every check on one capture; problems are values, never exceptions.

    ``spectra`` (the capture's :class:`agent.spectra.CaptureSpectra`) lets the
    ski-slope check share its spectrum with the analysis that follows.
    """
    x = capture.accel_ms2
    fs = capture.fs_hz
    problems: dict[str, str] = {}
    figures: dict[str, float] = {"n_samples": float(x.size), "fs_hz": fs}

    def flag(code: str, reason: str) -> None:
        problems.setdefault(code, reason)

    for fl in sorted(capture.flags):
        code = SOURCE_FLAG_PROBLEMS.get(fl)
        if code:
            flag(code, f"source reports {fl.replace('_', ' ')}")

    if x.size < 8:
        flag("dropout", f"capture holds only {x.size} samples")
        return _verdict(problems, figures)
    finite = np.isfinite(x)
    if not finite.all():
        figures["nonfinite_samples"] = float(x.size - finite.sum())
        flag("nan", f"{x.size - int(finite.sum())} samples are NaN or infinite")
        return _verdict(problems, figures)

    mean = float(x.mean())
    std = float(x.std())
    peak = float(np.abs(x).max())
    # one sort gives the median, the distinct levels and the smallest step between them
    xs = np.sort(x)
    mid = x.size // 2
    median = float(xs[mid] if x.size % 2 else (xs[mid - 1] + xs[mid]) / 2.0)  # as np.median of the sorted samples
    figures.update(mean_ms2=mean, std_ms2=std, peak_ms2=peak, rms_ms2=math.sqrt(mean * mean + std * std))

    # flatline / dead channel
    repeat = float(np.mean(x[1:] == x[:-1]))
    gaps = np.diff(xs)
    rises = gaps > 0  # the steps between consecutive distinct levels (as np.unique would give them)
    distinct = int(np.count_nonzero(rises)) + 1
    step = float(np.min(gaps, where=rises, initial=np.inf)) if distinct > 1 else 0.0  # quantisation step (or finer)
    figures.update(repeat_fraction=repeat)
    if distinct == 1:
        flag("flatline", "signal does not vary at all (dead channel)")
    elif distinct < limits.min_distinct_values:
        flag("flatline", f"only {distinct} distinct values (dead channel or stuck converter)")
    elif repeat >= limits.max_repeat_fraction:
        flag("flatline", f"{repeat:.0%} of samples repeat the previous one (stuck converter)")
    elif std < limits.min_rms_ms2:
        flag("flatline", f"AC level {std:.2g} m/s² is below {limits.min_rms_ms2:g} m/s² (dead channel)")

    # clipping against known ranges
    ranges = [r for r in (capture.full_scale_ms2, limits.sensor_full_scale_ms2) if r]
    if ranges:
        fs_ms2 = min(ranges)
        figures["full_scale_ms2"] = fs_ms2
        level = limits.clip_level * fs_ms2
        n_clip = int(np.count_nonzero(np.abs(x) >= level))
        figures["clipped_fraction"] = n_clip / x.size
        if n_clip:
            flag("clipped", f"{n_clip} samples at ≥ {limits.clip_level:.0%} of full scale ({fs_ms2:.4g} m/s²)")
    # flat tops: a pile-up on exactly the extreme value
    if "flatline" not in problems:
        for sign, name in ((1, "top"), (-1, "bottom")):
            at, near = _pile_up(x, median, limits.flat_top_band, step, sign)
            figures[f"flat_{name}_samples"] = float(at)
            if at >= limits.flat_top_min_samples and at > near:
                flag("clipped", f"flat {name}s: {at} samples on the extreme value, {near} just inside it")

    # bias / DC offset
    if capture.bias_v is not None:
        figures["bias_v"] = capture.bias_v
        lo, hi = limits.bias_v
        if not lo <= capture.bias_v <= hi:
            what = "short or sensor saturated" if capture.bias_v < lo else "open circuit or cable break"
            flag("bias_out_of_range", f"sensor bias {capture.bias_v:.2f} V outside [{lo:g}, {hi:g}] V ({what})")
    if ranges and abs(mean) > limits.max_dc_fraction * min(ranges):
        flag("bias_out_of_range", f"DC offset {mean:.3g} m/s² is {abs(mean) / min(ranges):.0%} of full scale")
    if "flatline" not in problems:
        drift = _baseline_drift(x, fs, limits)
        if drift is not None:
            span, ratio = drift
            figures["drift_ratio"] = ratio
            if ratio > limits.max_drift_ratio:
                flag(
                    "bias_out_of_range",
                    f"baseline drifts by {span:.3g} m/s² within the capture ({ratio:.1f}× the AC level): "
                    "sensor bias drifting or cable fault",
                )

    # ski slope
    if "flatline" not in problems:
        ski = ski_figures(x, fs, limits, spectra)
        if ski is not None:
            share_db, rise_db = ski
            figures.update(ski_low_share_db=share_db, ski_velocity_rise_db=rise_db)
            if share_db > limits.ski_max_low_db:
                flag(
                    "ski_slope",
                    f"{10 ** (share_db / 20):.0%} of the acceleration lies below {limits.ski_low_band_hz[1]:g} Hz "
                    f"(velocity there {rise_db:+.0f} dB re {limits.ski_ref_band_hz[0]:g}-"
                    f"{limits.ski_ref_band_hz[1]:g} Hz): overload recovery, cable or thermal transient",
                )

    # dropouts
    zero_run = _longest_run(x == 0.0)
    hold_run = _longest_run(np.concatenate(([False], x[1:] == x[:-1]))) + 1
    figures.update(longest_zero_run=float(zero_run), longest_hold_run=float(hold_run))
    zero_lim = max(limits.dropout_zero_run_min, int(limits.dropout_zero_run_s * fs))
    hold_lim = max(limits.dropout_hold_run_min, int(limits.dropout_hold_run_s * fs))
    if "flatline" not in problems:
        if zero_run >= zero_lim:
            flag("dropout", f"{zero_run} consecutive zero samples ({zero_run / fs * 1e3:.1f} ms)")
        elif hold_run >= hold_lim:
            flag("dropout", f"one value held for {hold_run} samples ({hold_run / fs * 1e3:.1f} ms)")

    # sample rate
    if limits.nominal_fs_hz is not None and abs(fs / limits.nominal_fs_hz - 1.0) > limits.fs_tolerance:
        flag("fs_mismatch", f"sample rate {fs:g} Hz, expected {limits.nominal_fs_hz:g} Hz")
    if measured_fs_hz is not None:
        figures["measured_fs_hz"] = measured_fs_hz
        if abs(measured_fs_hz / fs - 1.0) > 0.02:
            flag("fs_mismatch", f"clock check measured {measured_fs_hz:.1f} Hz for a nominal {fs:g} Hz")

    # implausible level
    rms = figures["rms_ms2"]
    if rms > limits.max_rms_ms2:
        flag(
            "implausible_level",
            f"r.m.s. {rms / STANDARD_GRAVITY_MS2:.1f} g exceeds {limits.max_rms_ms2 / STANDARD_GRAVITY_MS2:.1f} g",
        )
    return _verdict(problems, figures)


def _verdict(problems: dict[str, str], figures: dict[str, float]) -> QualityVerdict:
    codes = tuple(c for c in PROBLEM_ORDER if c in problems)
    return QualityVerdict(
        ok=not codes,
        problems=codes,
        reasons=tuple(f"{c}: {problems[c]}" for c in codes),
        figures=figures,
    )
