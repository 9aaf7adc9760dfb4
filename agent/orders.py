"""The order view: spectra on a shaft-order axis and peak labels (pure functions).

* :func:`resample_to_angle` — computed order tracking: the waveform is
  re-sampled at equal increments of shaft angle, the angle being the
  integral of a :class:`agent.speed.SpeedProfile` (K. R. Fyfe, E. D. S.
  Munck, "Analysis of computed order tracking", MSSP 11(2), 1997). A tone
  locked to the shaft then sits on one order line however the speed moved.
* :func:`order_spectrum` — the power spectrum of the angle-domain waveform,
  on an order axis (cycles per revolution).
* :func:`order_levels` — band r.m.s. around 0.5X, 1X … 10X and each
  synchronous forcing order, from an ordinary spectrum and a speed: levels
  that follow speed, so baselines can compare captures at different speeds.
* :func:`label_peaks` — every peak that matches an expected tone of the
  machine train (:func:`agent.kinematics.expected_frequencies`) within that
  tone's tolerance gets its name, family and order.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy import interpolate

from agent.kinematics import ExpectedTone, expected_frequencies, train_from_config
from agent.model import Peak
from agent.spectra import CaptureSpectra, Spectrum, SpectrumPlan, accel_spectrum, band_rms, velocity_spectrum
from agent.speed import (
    SpeedEstimate,
    SpeedProfile,
    estimate_speed,
    resolution_check,
    speed_profile,
    speed_spectrum,
)

#: tie-break between tones at the same distance: forcing names say more than nX
_RANK = {"vane_pass": 0, "blade_pass": 0, "gear_mesh": 0, "rotor_bar": 0, "shaft": 1}

#: default order bands: 0.5X, 1X … 10X
DEFAULT_ORDERS = (0.5,) + tuple(float(k) for k in range(1, 11))


def resample_to_angle(
    accel_ms2: np.ndarray, fs_hz: float, profile: SpeedProfile, samples_per_rev: int = 64
) -> np.ndarray:
    """Waveform re-sampled at ``samples_per_rev`` equal steps of shaft angle.

    Shaft angle (revolutions) is the integral of ``profile``; samples are
    read off a cubic spline through the time samples at the times each
    angle step is reached. ``samples_per_rev`` must keep the highest order
    of interest below samples_per_rev/2, and samples_per_rev × the highest
    speed must stay below the sample rate (no up-sampling beyond the data).
    Only whole revolutions are returned.
    """
    x = np.asarray(accel_ms2, dtype=np.float64)
    if x.ndim != 1 or x.size < 16:
        raise ValueError(f"accel_ms2 must be 1-D with at least 16 samples, got shape {x.shape}")
    if not fs_hz > 0:
        raise ValueError(f"fs_hz must be > 0, got {fs_hz!r}")
    if int(samples_per_rev) != samples_per_rev or samples_per_rev < 4:
        raise ValueError(f"samples_per_rev must be an integer >= 4, got {samples_per_rev!r}")
    t = np.arange(x.size) / fs_hz
    speed = profile.at(t)
    if np.any(speed <= 0):
        raise ValueError("speed profile is not positive over the whole capture")
    if samples_per_rev * float(speed.max()) > fs_hz:
        raise ValueError(
            f"samples_per_rev {samples_per_rev} × {speed.max():.2f} Hz exceeds fs {fs_hz:.0f} Hz; "
            "use fewer samples per revolution"
        )
    # angle in revolutions at each sample: integral of the polynomial profile
    poly = np.polynomial.Polynomial(profile.coeffs).integ()
    rev = poly(t) - poly(0.0)
    n_rev = int(np.floor(rev[-1]))
    if n_rev < 2:
        raise ValueError(f"capture holds only {rev[-1]:.2f} revolutions; need at least 2")
    rev_new = np.arange(n_rev * int(samples_per_rev)) / samples_per_rev
    t_new = np.interp(rev_new, rev, t)
    spline = interpolate.CubicSpline(t, x)
    return spline(t_new)


@dataclass(frozen=True, slots=True)
class OrderSpectrum:
    """Power spectrum on an order axis (tone r.m.s.² per line, like Spectrum).

    ``order`` is in cycles per revolution of the tracked shaft;
    ``order_resolution`` the line spacing in orders; ``speed_hz_mean`` and
    ``speed_span_hz`` describe the speed over the capture.
    """

    spectrum: Spectrum  # its f_hz axis holds orders, not Hz
    speed_hz_mean: float
    speed_span_hz: float
    samples_per_rev: int

    @property
    def order(self) -> np.ndarray:
        return self.spectrum.f_hz

    @property
    def power(self) -> np.ndarray:
        return self.spectrum.power

    @property
    def order_resolution(self) -> float:
        return self.spectrum.bin_width_hz

    def at_mean_speed(self) -> Spectrum:
        """The tracked spectrum on a Hz axis at the mean speed (order × mean
        speed), so Hz-based tools (velocity, band r.m.s., order levels) apply."""
        s = self.spectrum
        return replace(s, f_hz=s.f_hz * self.speed_hz_mean, bin_width_hz=s.bin_width_hz * self.speed_hz_mean)


def order_spectrum(
    accel_ms2: np.ndarray,
    fs_hz: float,
    profile: SpeedProfile,
    *,
    samples_per_rev: int = 64,
    window: str = "hann",
    revs_per_segment: int | None = None,
) -> OrderSpectrum:
    """Order spectrum of a capture after computed order tracking.

    ``revs_per_segment`` None uses one segment over all whole revolutions
    (finest order resolution, 1/revolutions).
    """
    theta = resample_to_angle(accel_ms2, fs_hz, profile, samples_per_rev)
    lines = None if revs_per_segment is None else revs_per_segment * samples_per_rev // 2
    if lines is None:
        lines = theta.size // 2
    plan = SpectrumPlan.build(float(samples_per_rev), theta.size, window=window, lines=lines)
    spec = accel_spectrum(theta, plan)
    return OrderSpectrum(
        spectrum=spec,
        speed_hz_mean=profile.mean_hz,
        speed_span_hz=profile.span_hz,
        samples_per_rev=int(samples_per_rev),
    )


@dataclass(frozen=True, slots=True)
class OrderLevels:
    """Band r.m.s. around each order of the reference shaft.

    ``levels`` pairs (order, r.m.s.) in the spectrum's unit (``unit``);
    each band spans order × speed ± ``half_width_hz`` (its own value in
    ``half_widths_hz``).
    """

    speed_hz: float
    orders: tuple[float, ...]
    levels: tuple[float, ...]
    half_widths_hz: tuple[float, ...]
    unit: str
    quantity: str

    def as_dict(self) -> dict[float, float]:
        return dict(zip(self.orders, self.levels))

    def to_json(self, basis: str = "rms") -> dict:
        """``basis`` "peak" gives √2 × r.m.s. (tones), as the peaks list does."""
        k = 2**0.5 if basis == "peak" else 1.0
        return {
            "speed_hz": round(self.speed_hz, 4),
            "unit": f"{self.unit} {basis}",
            "quantity": self.quantity,
            "bands": [
                {"order": o, "amp": None if v != v else float(f"{v * k:.6g}"), "half_width_hz": round(w, 4)}
                for o, v, w in zip(self.orders, self.levels, self.half_widths_hz)
            ],
        }


def order_levels(
    spec: Spectrum,
    speed_hz: float,
    orders: tuple[float, ...] = DEFAULT_ORDERS,
    *,
    min_lines: float = 3.0,
    rel_width: float = 0.02,
) -> OrderLevels:
    """Band r.m.s. around each order: ± max(``min_lines`` lines, ``rel_width`` × f).

    Orders whose band would pass the spectrum's top are given as NaN.
    """
    if not speed_hz > 0:
        raise ValueError(f"speed_hz must be > 0, got {speed_hz!r}")
    if not orders:
        raise ValueError("orders must not be empty")
    levels, widths = [], []
    for o in orders:
        if not o > 0:
            raise ValueError(f"orders must be > 0, got {o!r}")
        f = o * speed_hz
        hw = max(min_lines * spec.bin_width_hz, rel_width * f)
        widths.append(float(hw))
        if f + hw > spec.fmax_hz:
            levels.append(float("nan"))
            continue
        levels.append(band_rms(spec, f - hw, f + hw))
    return OrderLevels(
        speed_hz=float(speed_hz),
        orders=tuple(float(o) for o in orders),
        levels=tuple(levels),
        half_widths_hz=tuple(widths),
        unit=spec.unit,
        quantity=spec.quantity,
    )


def label_peaks(peaks: tuple[Peak, ...], expected: tuple[ExpectedTone, ...]) -> tuple[Peak, ...]:
    """Peaks with ``label``, ``family`` and ``order`` set where a tone matches.

    A peak matches an expected tone when |f_peak − f_tone| ≤ the tone's
    tolerance; of several matches the closest relative to its tolerance
    wins; on a tie a forcing tone (vane/blade pass, gear mesh, rotor bar)
    beats the shaft harmonic it coincides with ("vane pass" rather than "6X"),
    and a shaft harmonic beats the rest. ``order`` is the peak's measured order, f_peak/f_tone ×
    the tone's order. Unmatched peaks are returned unchanged.
    """
    out = []
    for p in peaks:
        best, best_key = None, (np.inf, 0)
        for e in expected:
            tol = e.tolerance_hz
            d = abs(p.freq_hz - e.freq_hz)
            key = (round(d / tol, 9), _RANK.get(e.family, 2))
            if d <= tol and key < best_key:
                best, best_key = e, key
        if best is None:
            out.append(p)
            continue
        order = best.order * p.freq_hz / best.freq_hz if best.freq_hz > 0 else None
        out.append(replace(p, label=best.name, family=best.family, order=order))
    return tuple(out)


# ------------------------------------------------------------------ one capture's speed view


@dataclass(frozen=True, slots=True)
class SpeedView:
    """Speed, expected tones, labelled peaks and order levels of one capture.

    ``order_levels`` come from the ordinary velocity spectrum, or — when the
    speed moved enough within the capture to smear the highest order band
    by more than a line (``tracked`` True) — from the order-tracked spectrum
    mapped to the mean speed.
    """

    speed: SpeedEstimate
    profile: SpeedProfile | None
    expected: tuple[ExpectedTone, ...]
    peaks: tuple[Peak, ...]
    order_levels: OrderLevels | None
    tracked: bool = False

    def to_json(self) -> dict:
        out = self.speed.to_json()
        if self.profile is not None:
            out["span_hz"] = round(self.profile.span_hz, 4)
            out["span_fraction"] = round(self.profile.span_fraction, 5)
            out["tracked_harmonic"] = self.profile.harmonic
        out["order_tracked"] = self.tracked
        return out


def speed_view(
    accel_ms2: np.ndarray,
    fs_hz: float,
    machine,
    *,
    vel: Spectrum,
    peaks: tuple[Peak, ...],
    fmax_hz: float,
    f_low_hz: float,
    previous: SpeedEstimate | None = None,
    spectra: CaptureSpectra | None = None,
) -> SpeedView:
    """Find running speed (no tachometer), label ``peaks``, compute order levels.

    ``machine`` is the ``[machine]`` config section (duck-typed): search range
    ``speed_rpm``, ``line_hz``, ``poles``, ``drive``, the train. ``vel`` is the
    capture's velocity spectrum (mm/s, high-passed at ``f_low_hz``) whose
    ``peaks`` are labelled; ``spectra`` the same samples'
    :class:`agent.spectra.CaptureSpectra`, to share the speed spectrum.
    """
    train = train_from_config(machine)
    lo_rpm, hi_rpm = machine.speed_rpm
    x = np.asarray(accel_ms2, dtype=np.float64)
    spec = speed_spectrum(x, fs_hz, spectra=spectra)
    hi_hz = min(hi_rpm / 60.0, 0.45 * fs_hz)
    if lo_rpm / 60.0 >= hi_hz:
        why = f"sample rate {fs_hz:g} Hz is too low for the speed range {lo_rpm:g}-{hi_rpm:g} r/min"
        none = SpeedEstimate(speed_hz=0.0, confidence=0.0, found=False, method="none", notes=(why,))
        return SpeedView(speed=none, profile=None, expected=(), peaks=peaks, order_levels=None)
    speed = estimate_speed(
        spec,
        speed_range_hz=(lo_rpm / 60.0, hi_hz),
        line_hz=machine.line_hz,
        poles=machine.poles or None,
        forcing_orders=train.forcing_orders(),
        previous=previous,
        variable_speed=machine.drive == "vfd",
    )
    if not speed.found:
        return SpeedView(speed=speed, profile=None, expected=(), peaks=peaks, order_levels=None)
    f0 = speed.speed_hz
    if not speed.resolution_flag:
        # the capture can separate 2X from 2×LF, but can the analysis spectrum?
        flag, need_s, _ = resolution_check(f0, machine.line_hz, vel.bin_width_hz)
        if flag and need_s is not None:
            lines = int(np.ceil(need_s * fs_hz / 2.0))
            note = (
                f"the analysis spectrum's {vel.bin_width_hz:.3f} Hz lines cannot separate 2X ({2 * f0:.2f} Hz) "
                f"from twice line frequency ({2 * machine.line_hz:g} Hz): segments of at least {need_s:.1f} s "
                f"(analysis.lines >= {lines}) would"
            )
            speed = replace(speed, resolution_flag=True, required_capture_s=need_s, notes=speed.notes + (note,))
    expected = expected_frequencies(train, f0, resolution_hz=vel.bin_width_hz, fmax_hz=fmax_hz)
    labelled = label_peaks(peaks, expected)
    orders = tuple(sorted(set(DEFAULT_ORDERS) | {round(o, 6) for o in train.forcing_orders()}))
    profile = None
    try:
        profile = speed_profile(x, fs_hz, f0, line_hz=machine.line_hz, whole=spec)
    except ValueError:
        profile = None  # capture too short to follow a harmonic: levels from the plain spectrum
    if profile is not None and abs(profile.mean_hz - f0) > 0.005 * f0 + speed.bin_width_hz:
        profile = None  # the ridge wandered off the shaft family: not a credible profile
    tracked = False
    levels_spec = vel
    # track when the speed change would smear the highest order band by more
    # than a line, and the change stands clear of the ridge's own scatter
    if (
        profile is not None
        and profile.span_hz * max(orders) > vel.bin_width_hz
        and profile.span_hz > 4.0 * profile.ridge_rms_hz
    ):
        spr = int(min(256, fs_hz / (1.1 * (f0 + profile.span_hz))))
        if spr >= 2 * max(orders) + 2:
            try:
                osp = order_spectrum(x, fs_hz, profile, samples_per_rev=spr, window=vel.window)
                levels_spec = velocity_spectrum(osp.at_mean_speed(), f_low_hz=f_low_hz)
                tracked = True
            except ValueError:
                levels_spec = vel
    ref_speed = profile.mean_hz if tracked else f0
    levels = order_levels(levels_spec, ref_speed, orders)
    return SpeedView(
        speed=speed, profile=profile, expected=expected, peaks=labelled, order_levels=levels, tracked=tracked
    )



def speed_text(view: SpeedView, *, basis: str = "rms", orders: bool = False) -> list[str]:
    """Console lines for the speed (and, with ``orders``, the order view)."""
    s = view.speed
    if not s.found:
        return ["Speed       not found: " + "; ".join(s.notes)]
    parts = [f"Speed       {s.rpm:.1f} r/min = {s.speed_hz:.3f} Hz (1X), confidence {s.confidence:.2f}"]
    if s.slip is not None:
        parts[0] += f", slip {s.slip:.2%}"
    detail = f"            from {s.harmonics_used} tones ({s.method}), no tachometer"
    if view.profile is not None:
        detail += f"; span within capture {view.profile.span_hz:.3f} Hz ({view.profile.span_fraction:.2%})"
    parts.append(detail)
    parts += [f"            note: {n}" for n in s.notes]
    if orders and view.order_levels is not None:
        lv = view.order_levels
        k = 2**0.5 if basis == "peak" else 1.0
        how = "order-tracked" if view.tracked else "from the spectrum"
        parts += ["", f"Order view ({lv.quantity}, {lv.unit} {basis}, band around each order, {how})"]
        parts.append(f"  {'order':>7} {'Hz':>9} {lv.unit:>9}")
        for o, v in zip(lv.orders, lv.levels):
            val = "    (n/a)" if v != v else f"{v * k:9.4f}"
            parts.append(f"  {o:7.2f} {o * lv.speed_hz:9.2f} {val}")
    return parts
