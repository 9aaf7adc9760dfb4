"""Machine simulator: synthetic accelerometer captures of a motor-driven pump, fan or blower.

A pure, seeded function: :func:`synthesize` turns a machine description, an
operating point and a set of faults into one capture of acceleration in m/s²
plus a ground-truth dictionary of what was put in. The same arguments and
seed give the same samples, bit for bit.

Amplitudes are given in the units an analyst reads them in and converted
exactly: low-order components as velocity r.m.s. in mm/s (a tone of
velocity r.m.s. v at f has acceleration peak √2·v·2πf), bearing and other
high-frequency content in g (1 g = 9.806 65 m/s², ISO 80000-3).

Components
----------
* shaft orders: residual 1X; unbalance (1X); misalignment (1X, 2X, 3X);
  bent shaft (1X, 2X); looseness (1X…10X, half orders, raised floor);
  phasors of the same order add as complex numbers;
* vane/blade pass N·f_r and 2×, 3×;
* line-frequency family k·f_line, twice line frequency 2·f_line;
* rotor-bar pass N_bars·f_r with ±2·f_line sidebands;
* belt wear: a sub-synchronous family at the belt rate (2× highest;
  common practice);
* rolling-element bearing defects: impulse trains at BPFO / BPFI / 2×BSF /
  FTF (kinematics from :func:`agent.kinematics.bearing_orders`) with a mean
  slip and random jitter of the impact intervals, each impact ringing a
  high-frequency resonance as a damped sinusoid; inner-race impacts
  amplitude-modulated at 1X, rolling-element impacts at FTF; stage 1
  (high-frequency ringing only) → 2 (a visible tone at the defect
  frequency) → 3 (its harmonics and sidebands) → 4 (a raised broadband
  floor and erratic impacts);
* cavitation: bursts of broadband random energy;
* a structural resonance (a peaking filter) that amplifies whatever lies
  under it (tones and broadband), but not the bearing ringing, which has
  its own resonance;
* measurement noise (white);
* speed: a linear ramp within the capture (VFD) — slow drift is the
  caller's (scenario's) business;
* sensor faults: clipping at a full scale, flatline, bias drift,
  intermittent cable (dropout bursts with spikes), dropouts.

The ringing of one impact is the impulse response of a single-degree-of-
freedom resonance, ``x(t) = A·exp(−ζω_n t)·sin(ω_d t)`` with
``ω_d = ω_n√(1−ζ²)``; successive peaks decay by the logarithmic decrement
``δ = 2πζ/√(1−ζ²)`` (any vibrations text, e.g. Thomson & Dahleh, *Theory of
Vibration with Applications*, §2.6). It is generated exactly at the sample
instants with a two-pole recursive filter (impulse invariance).
"""

from __future__ import annotations

import math
import zlib
from dataclasses import dataclass, field

import numpy as np
from scipy import signal

from agent.kinematics import bearing_orders
from agent.model import STANDARD_GRAVITY_MS2

G_MS2 = STANDARD_GRAVITY_MS2
BEARING_DEFECTS = ("outer", "inner", "ball", "cage")
SENSOR_FAULTS = ("clipping", "flatline", "bias_drift", "intermittent", "dropout")

# Relative shapes of fault families (common practice, qualitative textbook patterns):
#: misalignment: 2X dominant, with 1X and 3X; level = the 2X amplitude
MISALIGNMENT_ORDERS = {1.0: 0.3, 2.0: 1.0, 3.0: 0.45}
#: bent shaft: 1X dominant with a 2X; level = the 1X amplitude
BENT_SHAFT_ORDERS = {1.0: 1.0, 2.0: 0.5}
#: looseness: a long train of harmonics and half orders; level = the 1X amplitude
LOOSENESS_ORDERS = {
    **{float(n): a for n, a in zip(range(1, 11), (1.0, 0.8, 0.65, 0.55, 0.45, 0.4, 0.35, 0.3, 0.25, 0.2))},
    **{n + 0.5: a for n, a in zip(range(0, 6), (0.25, 0.3, 0.25, 0.2, 0.15, 0.12))},
}
#: looseness raised floor: velocity r.m.s. of the broadband floor per mm/s of level
LOOSENESS_FLOOR_RATIO = 0.3
#: belt wear: harmonics of the belt rate, 2× highest; level = the 2× amplitude
BELT_ORDERS = {1.0: 0.6, 2.0: 1.0, 3.0: 0.4, 4.0: 0.25}
#: fixed relative phases (rad) of each order for each family, so resultants are reproducible
_FAMILY_PHASE = {"residual": 0.0, "unbalance": 0.0, "misalignment": 1.1, "bent_shaft": 2.3, "looseness": 0.4}
#: inner-race impacts modulated at 1X, ball impacts at FTF, by this depth
MODULATION_DEPTH = 0.6
#: broadband floor band (velocity-flat), Hz
FLOOR_BAND_HZ = (2.0, 1000.0)
#: cavitation bursts: band, burst rate and duration
CAVITATION_BAND_HZ = (1000.0, 10_000.0)
CAVITATION_BURSTS_PER_S = 6.0
CAVITATION_BURST_S = (0.02, 0.08)


def _vel_to_accel_pk(vel_rms_mm_s: float | np.ndarray, f_hz: float | np.ndarray):
    """Acceleration peak (m/s²) of a tone of velocity r.m.s. ``vel_rms_mm_s`` at ``f_hz``."""
    return np.sqrt(2.0) * np.asarray(vel_rms_mm_s) * 1e-3 * 2.0 * np.pi * np.asarray(f_hz)


@dataclass(frozen=True, slots=True)
class Resonance:
    """A structural resonance: natural frequency, damping ratio ζ, gain at resonance."""

    freq_hz: float
    damping: float
    gain: float = 1.0

    def __post_init__(self) -> None:
        if not self.freq_hz > 0:
            raise ValueError(f"Resonance.freq_hz must be > 0, got {self.freq_hz!r}")
        if not 0 < self.damping < 1:
            raise ValueError(f"Resonance.damping must be in (0, 1), got {self.damping!r}")
        if not self.gain > 0:
            raise ValueError(f"Resonance.gain must be > 0, got {self.gain!r}")

    def response(self, f_hz) -> np.ndarray:
        """Complex gain of the peaking filter (1 far away, ``gain`` at ``freq_hz``).

        H(r) = (1 − r² + j·2ζ·g·r)/(1 − r² + j·2ζ·r), r = f/f_n — a
        second-order peaking section whose bandwidth is set by ζ.
        """
        r = np.asarray(f_hz, dtype=np.float64) / self.freq_hz
        num = 1.0 - r * r + 2j * self.damping * self.gain * r
        den = 1.0 - r * r + 2j * self.damping * r
        return num / den

    @property
    def log_decrement(self) -> float:
        """δ = 2πζ/√(1−ζ²): ln of the ratio of successive peaks of the free decay."""
        z = self.damping
        return 2.0 * np.pi * z / np.sqrt(1.0 - z * z)


@dataclass(frozen=True, slots=True)
class SimBearing:
    """Bearing geometry (as in the config's machine.bearings)."""

    name: str
    balls: int
    ball_diameter_mm: float
    pitch_diameter_mm: float
    contact_angle_deg: float = 0.0

    def defect_order(self, defect: str) -> float:
        """Impact rate of a defect as a multiple of shaft speed (ball: 2×BSF)."""
        o = bearing_orders(self.balls, self.ball_diameter_mm, self.pitch_diameter_mm, self.contact_angle_deg)
        return {"outer": o.bpfo, "inner": o.bpfi, "ball": 2.0 * o.bsf, "cage": o.ftf}[defect]


@dataclass(frozen=True, slots=True)
class SimMachine:
    """What the simulated machine is and how it vibrates when healthy."""

    poles: int = 4
    rotor_bars: int = 28
    vanes: int = 6
    belt_ratio: float = 0.0  # belt rate / shaft speed; 0 = direct coupled
    bearings: tuple[SimBearing, ...] = ()
    residual_1x_mm_s: float = 0.8
    vane_pass_mm_s: tuple[float, ...] = (0.5, 0.15)  # at 1×, 2×, … vane pass
    line_mm_s: tuple[float, ...] = (0.05, 0.35)  # at 1×, 2×, … line frequency
    rotor_bar_g: float = 0.01  # r.m.s. at rotor-bar pass
    rotor_bar_sideband_ratio: float = 0.3  # each ±2·f_line sideband relative to the carrier
    floor_mm_s: float = 0.05  # broadband velocity floor, r.m.s. over FLOOR_BAND_HZ
    noise_g: float = 0.002  # measurement noise r.m.s., white over 0…fs/2
    structure: Resonance | None = None  # amplifies what falls under it
    ring: Resonance = Resonance(3300.0, 0.05)  # rung by bearing impacts
    full_scale_g: float = 50.0  # sensor/ADC range; samples beyond are clipped

    def bearing(self, name: str) -> SimBearing:
        for b in self.bearings:
            if b.name == name:
                return b
        raise ValueError(f"no bearing named {name!r}; known: {[b.name for b in self.bearings]}")


@dataclass(frozen=True, slots=True)
class OperatingPoint:
    """Running state during one capture: shaft speed (ramping linearly) and electrical frequency."""

    running: bool = True
    speed_hz: float = 24.6
    speed_end_hz: float | None = None  # None = constant speed
    line_hz: float = 50.0

    def __post_init__(self) -> None:
        if self.running and not self.speed_hz > 0:
            raise ValueError(f"OperatingPoint.speed_hz must be > 0 when running, got {self.speed_hz!r}")
        if self.speed_end_hz is not None and not self.speed_end_hz > 0:
            raise ValueError(f"OperatingPoint.speed_end_hz must be > 0, got {self.speed_end_hz!r}")
        if not self.line_hz > 0:
            raise ValueError(f"OperatingPoint.line_hz must be > 0, got {self.line_hz!r}")

    @property
    def end_hz(self) -> float:
        return self.speed_hz if self.speed_end_hz is None else self.speed_end_hz

    @property
    def mean_speed_hz(self) -> float:
        return 0.5 * (self.speed_hz + self.end_hz)


@dataclass(frozen=True, slots=True)
class BearingDefect:
    """A defect on one bearing: impacts of ``impulse_g`` ringing the machine's ``ring`` resonance."""

    bearing: str
    defect: str  # outer | inner | ball | cage
    impulse_g: float
    stage: int = 1
    tone_mm_s: float = 0.3  # velocity r.m.s. of the defect-frequency tone from stage 2
    slip_frac: float = 0.01  # mean slip: impact rate = kinematic × (1 − slip)
    jitter_frac: float = 0.01  # r.m.s. random variation of each impact interval

    def __post_init__(self) -> None:
        if self.defect not in BEARING_DEFECTS:
            raise ValueError(f"BearingDefect.defect must be one of {BEARING_DEFECTS}, got {self.defect!r}")
        if self.stage not in (1, 2, 3, 4):
            raise ValueError(f"BearingDefect.stage must be 1..4, got {self.stage!r}")
        if self.impulse_g < 0 or self.tone_mm_s < 0:
            raise ValueError("BearingDefect.impulse_g and tone_mm_s must be >= 0")
        if not 0 <= self.slip_frac < 0.2 or not 0 <= self.jitter_frac < 0.2:
            raise ValueError("BearingDefect.slip_frac and jitter_frac must be in [0, 0.2)")


@dataclass(frozen=True, slots=True)
class SensorFault:
    """A sensor or cable fault; ``level_g`` means: clipping → full scale; flatline → the constant;
    bias_drift → offset at the start (doubling by the end); intermittent → spike height;
    dropout → fraction of the capture lost (0…1)."""

    kind: str
    level_g: float = 0.0

    def __post_init__(self) -> None:
        if self.kind not in SENSOR_FAULTS:
            raise ValueError(f"SensorFault.kind must be one of {SENSOR_FAULTS}, got {self.kind!r}")
        if self.kind == "clipping" and not self.level_g > 0:
            raise ValueError(f"clipping needs level_g > 0 (the full scale), got {self.level_g!r}")
        if self.kind == "dropout" and not 0 < self.level_g < 1:
            raise ValueError(f"dropout needs level_g in (0, 1) (fraction lost), got {self.level_g!r}")


@dataclass(frozen=True, slots=True)
class Faults:
    """Fault levels for one capture (all zero = healthy)."""

    unbalance_mm_s: float = 0.0
    misalignment_mm_s: float = 0.0
    bent_shaft_mm_s: float = 0.0
    looseness_mm_s: float = 0.0
    belt_wear_mm_s: float = 0.0
    cavitation_g: float = 0.0  # r.m.s. over the capture, in CAVITATION_BAND_HZ
    bearings: tuple[BearingDefect, ...] = ()
    sensor: tuple[SensorFault, ...] = field(default_factory=tuple)

    def active(self) -> list[str]:
        names = [
            n for n in ("unbalance", "misalignment", "bent_shaft", "looseness", "belt_wear", "cavitation")
            if getattr(self, f"{n}_g" if n == "cavitation" else f"{n}_mm_s") > 0
        ]
        names += [f"bearing_{d.defect}:{d.bearing}" for d in self.bearings if d.impulse_g > 0]
        names += [f"sensor_{s.kind}" for s in self.sensor]
        return names


# ───────────────────────────── helpers ─────────────────────────────


def _rng(seed, name: str) -> np.random.Generator:
    """An independent, named random stream: adding a component never changes another's draws."""
    base = list(seed) if isinstance(seed, (tuple, list)) else [int(seed)]
    return np.random.default_rng([*base, zlib.crc32(name.encode())])


def _phase_cycles(f0_hz: float, f1_hz: float, t_s: np.ndarray, dur_s: float) -> np.ndarray:
    """Cycles completed by a tone whose frequency ramps linearly from f0 to f1 over ``dur_s``."""
    return f0_hz * t_s + (f1_hz - f0_hz) * t_s * t_s / (2.0 * dur_s)


def _rfft_scale_rms(spec: np.ndarray, n: int) -> float:
    """r.m.s. of ``irfft(spec, n)`` by Parseval (one-sided coefficients)."""
    p = np.abs(spec[0]) ** 2 + 2.0 * np.sum(np.abs(spec[1:]) ** 2)
    if n % 2 == 0:
        p -= np.abs(spec[-1]) ** 2
    return float(np.sqrt(p) / n)


@dataclass(slots=True)
class _Tone:
    name: str
    family: str
    f0_hz: float  # frequency at the start of the capture
    f1_hz: float  # … at the end
    phase_rad: float
    vel_rms_mm_s: float = 0.0  # one of these two is set
    accel_rms_ms2: float = 0.0


def _add_tones(x, tones, t_s, dur_s, structure):
    truth = []
    for tone in tones:
        f_mean = 0.5 * (tone.f0_hz + tone.f1_hz)
        if f_mean <= 0:
            continue
        steady = abs(tone.f1_hz - tone.f0_hz) < 1e-6 * f_mean  # drift only: amplitude constant to 1 ppm
        if tone.vel_rms_mm_s:
            f_inst = f_mean if steady else tone.f0_hz + (tone.f1_hz - tone.f0_hz) * t_s / dur_s
            amp = _vel_to_accel_pk(tone.vel_rms_mm_s, f_inst)
        else:
            amp = np.sqrt(2.0) * tone.accel_rms_ms2
        ph = 2 * np.pi * _phase_cycles(tone.f0_hz, tone.f1_hz, t_s, dur_s) + tone.phase_rad
        gain_mean = 1.0
        if structure is not None:
            h_mean = complex(structure.response(f_mean))
            gain_mean = abs(h_mean)
            if abs(tone.f1_hz - tone.f0_hz) < 1e-3 * structure.damping * structure.freq_hz:
                amp = amp * gain_mean  # the gain cannot change measurably within the capture
                ph = ph + np.angle(h_mean)
            else:  # a ramp: the gain follows the instantaneous frequency (smooth; 65 knots)
                tk = np.linspace(0.0, dur_s, 65)
                hk = structure.response(tone.f0_hz + (tone.f1_hz - tone.f0_hz) * tk / dur_s)
                amp = amp * np.interp(t_s, tk, np.abs(hk))
                ph = ph + np.interp(t_s, tk, np.unwrap(np.angle(hk)))
        x += amp * np.sin(ph)
        a_rms = (tone.accel_rms_ms2 or float(_vel_to_accel_pk(tone.vel_rms_mm_s, f_mean)) / np.sqrt(2.0))
        a_rms *= gain_mean
        truth.append({
            "name": tone.name,
            "family": tone.family,
            "freq_hz": f_mean,
            "accel_rms_ms2": a_rms,
            "vel_rms_mm_s": a_rms / (2 * np.pi * f_mean) * 1e3,
        })
    return truth


def _order_phasors(machine: SimMachine, faults: Faults) -> dict[float, complex]:
    """Velocity r.m.s. phasors (mm/s) of every shaft order from every family."""
    out: dict[float, complex] = {}

    def add(family: str, level: float, shape: dict[float, float]) -> None:
        if level <= 0:
            return
        for order, rel in shape.items():
            ph = _FAMILY_PHASE[family] * order
            out[order] = out.get(order, 0j) + level * rel * complex(math.cos(ph), math.sin(ph))

    add("residual", machine.residual_1x_mm_s, {1.0: 1.0})
    add("unbalance", faults.unbalance_mm_s, {1.0: 1.0})
    add("misalignment", faults.misalignment_mm_s, MISALIGNMENT_ORDERS)
    add("bent_shaft", faults.bent_shaft_mm_s, BENT_SHAFT_ORDERS)
    add("looseness", faults.looseness_mm_s, LOOSENESS_ORDERS)
    return out


def _order_label(order: float) -> str:
    return f"{order:g}X"


# ───────────────────────────── bearings ─────────────────────────────


def ringing(drive: np.ndarray, ring: Resonance, fs_hz: float) -> np.ndarray:
    """Each sample of ``drive`` rings ``ring``: drive ∗ h with h[k] = r^k·sin(k·θ + φ).

    h is a damped sinusoid exp(−ζω_n t)·sin(ω_d t + φ) sampled at t = k/fs
    (r = exp(−ζω_n/fs), θ = ω_d/fs) with unit envelope at t = 0. The phase
    φ = atan2(−r·sin θ, 1 − r·cos θ) makes Σh = 0: like the accelerance of a
    resonance (∝ f² below it), an impact then puts no energy at low
    frequencies — stage 1 is high-frequency only. The envelope, and so the
    logarithmic decrement between successive peaks, is that of the free
    decay. Realised as the two-pole recursion
    y[k] = 2r·cos θ·y[k−1] − r²·y[k−2] + sin φ·drive[k] + r·sin(θ − φ)·drive[k−1].
    """
    wn = 2 * np.pi * ring.freq_hz
    r = np.exp(-ring.damping * wn / fs_hz)
    th = wn * np.sqrt(1 - ring.damping**2) / fs_hz
    phi = np.arctan2(-r * np.sin(th), 1 - r * np.cos(th))
    return signal.lfilter([np.sin(phi), r * np.sin(th - phi)], [1.0, -2 * r * np.cos(th), r * r], drive)



def _bearing(defect: BearingDefect, machine: SimMachine, point: OperatingPoint, fs_hz: float, n: int,
             seed, tones: list[_Tone], floor_rms: list[float]) -> tuple[np.ndarray, dict]:
    """Impact train of one defect rung through ``machine.ring``; adds stage 2+ tones to ``tones``."""
    b = machine.bearing(defect.bearing)
    order = b.defect_order(defect.defect)
    rng = _rng(seed, f"bearing:{defect.bearing}:{defect.defect}")
    ring = machine.ring
    wn = 2 * np.pi * ring.freq_hz
    # lead-in so ringing from impacts before the capture is present at its start
    n_pre = min(int(np.ceil(7.0 / (ring.damping * wn) * fs_hz)), n)
    dur_s = n / fs_hz
    f0 = order * point.speed_hz * (1 - defect.slip_frac)
    f1 = order * point.end_hz * (1 - defect.slip_frac)
    slope = (f1 - f0) / dur_s
    # impact phase Φ(t) (in impacts) over [-pre, dur): invert for impact times
    t_all = (np.arange(-n_pre, n)) / fs_hz
    phi = f0 * t_all + 0.5 * slope * t_all * t_all
    # enough intervals even when the random walk of the jitter runs slow (≥ 4σ margin)
    span = phi[-1] - phi[0]
    n_imp = int(np.ceil(span + 4 * defect.jitter_frac * (span + np.sqrt(span)))) + 3
    targets = phi[0] + rng.uniform(0, 1) + np.cumsum(1.0 + defect.jitter_frac * rng.standard_normal(n_imp))
    targets = targets[targets < phi[-1]]
    t_imp = np.interp(targets, phi, t_all)
    amp = np.full(t_imp.size, defect.impulse_g * G_MS2)
    shaft_ph0 = rng.uniform(0, 2 * np.pi)
    if defect.defect == "inner":  # the defect passes through the load zone once per turn
        sh = 2 * np.pi * _phase_cycles(point.speed_hz, point.end_hz, t_imp, dur_s) + shaft_ph0
        amp *= (1 + MODULATION_DEPTH * np.cos(sh)) / (1 + MODULATION_DEPTH)
    elif defect.defect == "ball":  # the ball passes through the load zone once per cage turn
        o = bearing_orders(b.balls, b.ball_diameter_mm, b.pitch_diameter_mm, b.contact_angle_deg)
        cg = 2 * np.pi * _phase_cycles(o.ftf * point.speed_hz, o.ftf * point.end_hz, t_imp, dur_s) + shaft_ph0
        amp *= (1 + MODULATION_DEPTH * np.cos(cg)) / (1 + MODULATION_DEPTH)
    if defect.stage >= 4:
        amp *= rng.uniform(0.4, 1.6, size=amp.size)
    # impacts at fractional sample positions (linear split), then the exact sampled damped sine
    pos = t_imp * fs_hz + n_pre
    k = np.floor(pos).astype(np.int64)
    frac = pos - k
    drive = np.zeros(n_pre + n + 1)
    np.add.at(drive, k, amp * (1 - frac))
    np.add.at(drive, k + 1, amp * frac)
    y = ringing(drive[:-1], ring, fs_hz)[n_pre:]
    kin_hz = order * point.mean_speed_hz
    truth = {
        "bearing": defect.bearing,
        "defect": defect.defect,
        "order": order,
        "kinematic_hz": kin_hz,
        "defect_hz": kin_hz * (1 - defect.slip_frac),
        "impulse_g": defect.impulse_g,
        "stage": defect.stage,
        "slip_frac": defect.slip_frac,
        "jitter_frac": defect.jitter_frac,
        "ring_hz": ring.freq_hz,
        "ring_damping": ring.damping,
        "impacts": int(np.sum((t_imp >= 0))),
    }
    if defect.stage >= 2 and defect.tone_mm_s > 0:
        name = {"outer": "BPFO", "inner": "BPFI", "ball": "2xBSF", "cage": "FTF"}[defect.defect]
        ph = rng.uniform(0, 2 * np.pi)
        harmonics = {1: 1.0} if defect.stage == 2 else {1: 1.0, 2: 0.6, 3: 0.4, 4: 0.3}
        for h, rel in harmonics.items():
            tones.append(_Tone(f"{h}x{name}" if h > 1 else name, "bearing", h * f0, h * f1, h * ph,
                               vel_rms_mm_s=defect.tone_mm_s * rel))
        if defect.stage >= 3 and defect.defect in ("inner", "ball"):
            if defect.defect == "inner":
                sb0, sb1, sb_name = point.speed_hz, point.end_hz, "1X"
            else:
                o = bearing_orders(b.balls, b.ball_diameter_mm, b.pitch_diameter_mm, b.contact_angle_deg)
                sb0, sb1, sb_name = o.ftf * point.speed_hz, o.ftf * point.end_hz, "FTF"
            for sgn in (-1, 1):
                tones.append(_Tone(f"{name}{'+' if sgn > 0 else '-'}{sb_name}", "bearing_sideband",
                                   f0 + sgn * sb0, f1 + sgn * sb1, ph + sgn,
                                   vel_rms_mm_s=0.4 * defect.tone_mm_s))
    if defect.stage >= 4:
        floor_rms.append(0.25 * defect.impulse_g * G_MS2)
    return y, truth


# ───────────────────────────── sensor ─────────────────────────────


def _sensor(x: np.ndarray, faults: tuple[SensorFault, ...], fs_hz: float, seed) -> tuple[np.ndarray, list]:
    truth = []
    n = x.size
    for i, sf in enumerate(faults):
        rng = _rng(seed, f"sensor:{i}:{sf.kind}")
        lvl = sf.level_g * G_MS2
        info: dict = {"kind": sf.kind, "level_g": sf.level_g}
        if sf.kind == "flatline":
            x = np.full(n, lvl)
        elif sf.kind == "bias_drift":
            x = x + lvl * (1.0 + np.arange(n) / n)
        elif sf.kind == "clipping":
            info["clipped_fraction"] = float(np.mean(np.abs(x) >= lvl))
            x = np.clip(x, -lvl, lvl)
        elif sf.kind == "dropout":
            lost = int(sf.level_g * n)
            n_blocks = int(rng.integers(1, 4))
            sizes = np.full(n_blocks, lost // n_blocks)
            starts = np.sort(rng.choice(n - lost, size=n_blocks, replace=False))
            x = x.copy()
            off = 0
            spans = []
            for s, size in zip(starts, sizes):
                a = int(s + off)
                x[a : a + size] = 0.0
                spans.append([a, a + int(size)])
                off += size
            info["spans"] = spans
        elif sf.kind == "intermittent":
            x = x.copy()
            n_events = int(rng.integers(3, 9))
            spans = []
            for _ in range(n_events):
                length = int(rng.uniform(0.005, 0.05) * fs_hz)
                a = int(rng.integers(0, max(1, n - length)))
                x[a : a + length] = 0.0
                sign = rng.choice([-1.0, 1.0])
                x[a] = sign * lvl
                if a + length < n:
                    x[a + length] = -sign * lvl
                spans.append([a, a + length])
            info["spans"] = sorted(spans)
        truth.append(info)
    return x, truth


# ───────────────────────────── the simulator ─────────────────────────────


def synthesize(
    machine: SimMachine,
    point: OperatingPoint,
    faults: Faults,
    fs_hz: float,
    n_samples: int,
    t0_s: float = 0.0,
    seed: int | tuple[int, ...] = 0,
) -> tuple[np.ndarray, dict]:
    """One capture of acceleration (m/s², float64) and its ground truth.

    Parameters
    ----------
    machine, point, faults
        What vibrates, at what speed, with which faults.
    fs_hz, n_samples
        Sample rate and capture length.
    t0_s
        Start time (only recorded in the ground truth; the signal does not
        depend on it).
    seed
        Integer or tuple of integers; the same seed gives the same samples.

    Returns
    -------
    accel_ms2, truth
        ``truth`` holds every tone put in (name, family, mean frequency,
        acceleration and velocity r.m.s. after the structural resonance),
        bearing defects (kinematic and actual impact rate), cavitation,
        sensor faults, speed and line frequency.
    """
    if not fs_hz > 0:
        raise ValueError(f"fs_hz must be > 0, got {fs_hz!r}")
    if int(n_samples) < 16:
        raise ValueError(f"n_samples must be >= 16, got {n_samples!r}")
    n = int(n_samples)
    dur_s = n / fs_hz
    t_s = np.arange(n) / fs_hz
    nyq = fs_hz / 2
    x = np.zeros(n)
    truth: dict = {
        "t0_s": t0_s,
        "fs_hz": fs_hz,
        "n_samples": n,
        "running": point.running,
        "speed_hz": point.mean_speed_hz if point.running else 0.0,
        "speed_start_hz": point.speed_hz if point.running else 0.0,
        "speed_end_hz": point.end_hz if point.running else 0.0,
        "line_hz": point.line_hz,
        "faults": faults.active(),
        "tones": [],
        "bearings": [],
        "cavitation_g": 0.0,
        "floor_mm_s": 0.0,
        "sensor": [],
        # the machine's natural frequencies (true properties, not faults): the structure's mode, the ringing
        "resonances_hz": ([machine.structure.freq_hz] if machine.structure is not None else []) + [machine.ring.freq_hz],
    }
    tones: list[_Tone] = []
    floor_rms_ms2: list[float] = []  # white-ish broadband parts (accel r.m.s.)
    structure = machine.structure
    if point.running:
        rng = _rng(seed, "shaft")
        theta0 = rng.uniform(0, 2 * np.pi)
        s0, s1 = point.speed_hz, point.end_hz
        for order, ph in sorted(_order_phasors(machine, faults).items()):
            if abs(ph) > 0 and order * max(s0, s1) < nyq:
                tones.append(_Tone(_order_label(order), "shaft", order * s0, order * s1,
                                   order * theta0 + float(np.angle(ph)), vel_rms_mm_s=abs(ph)))
        if machine.vanes:
            for h, v in enumerate(machine.vane_pass_mm_s, start=1):
                f = h * machine.vanes
                if v > 0 and f * max(s0, s1) < nyq:
                    tones.append(_Tone("VP" if h == 1 else f"{h}xVP", "vane_pass", f * s0, f * s1,
                                       f * theta0 + 0.7 * h, vel_rms_mm_s=v))
        rng_e = _rng(seed, "line")
        psi0 = rng_e.uniform(0, 2 * np.pi)
        line0 = point.line_hz
        line1 = point.line_hz * (s1 / s0)  # a VFD's output follows the speed ramp
        for h, v in enumerate(machine.line_mm_s, start=1):
            if v > 0 and h * max(line0, line1) < nyq:
                tones.append(_Tone(f"{h}xLF", "line", h * line0, h * line1, h * psi0, vel_rms_mm_s=v))
        if machine.rotor_bars and machine.rotor_bar_g > 0:
            nb = machine.rotor_bars
            a = machine.rotor_bar_g * G_MS2
            if nb * max(s0, s1) + 2 * line1 < nyq:
                tones.append(_Tone("RBP", "rotor_bar", nb * s0, nb * s1, nb * theta0, accel_rms_ms2=a))
                for sgn in (-1, 1):
                    tones.append(_Tone(f"RBP{'+' if sgn > 0 else '-'}2LF", "rotor_bar",
                                       nb * s0 + sgn * 2 * line0, nb * s1 + sgn * 2 * line1,
                                       nb * theta0 + sgn * 2 * psi0,
                                       accel_rms_ms2=a * machine.rotor_bar_sideband_ratio))
        if machine.belt_ratio > 0 and faults.belt_wear_mm_s > 0:
            br = machine.belt_ratio
            belt0 = _rng(seed, "belt").uniform(0, 2 * np.pi)  # the belt's own angle: not locked to the shaft
            for h, rel in BELT_ORDERS.items():
                tones.append(_Tone(f"{h:g}xBelt", "belt", h * br * s0, h * br * s1,
                                   h * belt0, vel_rms_mm_s=faults.belt_wear_mm_s * rel))
        for d in faults.bearings:
            if d.impulse_g <= 0 and d.tone_mm_s <= 0:
                continue
            y, bt = _bearing(d, machine, point, fs_hz, n, seed, tones, floor_rms_ms2)
            x += y
            truth["bearings"].append(bt)
        # broadband parts, shaped in the frequency domain and passed through the structure
        f_hz = np.fft.rfftfreq(n, 1.0 / fs_hz)
        spec = np.zeros(f_hz.size, dtype=np.complex128)
        floor_v = machine.floor_mm_s + LOOSENESS_FLOOR_RATIO * faults.looseness_mm_s
        truth["floor_mm_s"] = floor_v
        if floor_v > 0:  # velocity-flat floor (acceleration ∝ f) over FLOOR_BAND_HZ
            rng_f = _rng(seed, "floor")
            band = (f_hz >= FLOOR_BAND_HZ[0]) & (f_hz <= min(FLOOR_BAND_HZ[1], nyq * 0.999))
            z = rng_f.standard_normal(f_hz.size) + 1j * rng_f.standard_normal(f_hz.size)
            vel = np.where(band, z, 0.0)
            vel *= floor_v * 1e-3 / _rfft_scale_rms(vel, n)
            spec += vel * (2j * np.pi * f_hz)
        if floor_rms_ms2:  # bearing stage 4: raised floor, white over 500 Hz…0.4·fs
            rng_b = _rng(seed, "bearing_floor")
            band = (f_hz >= 500.0) & (f_hz <= 0.4 * fs_hz)
            z = np.where(band, rng_b.standard_normal(f_hz.size) + 1j * rng_b.standard_normal(f_hz.size), 0.0)
            spec += z * (float(np.sqrt(np.sum(np.square(floor_rms_ms2)))) / _rfft_scale_rms(z, n))
        if faults.cavitation_g > 0:
            rng_c = _rng(seed, "cavitation")
            gate = np.zeros(n)
            n_bursts = max(1, int(rng_c.poisson(CAVITATION_BURSTS_PER_S * dur_s)))
            for _ in range(n_bursts):
                length = max(8, int(rng_c.uniform(*CAVITATION_BURST_S) * fs_hz))
                a0 = int(rng_c.integers(0, max(1, n - length)))
                gate[a0 : a0 + length] += np.hanning(length)[: n - a0]
            cz = np.fft.rfft(rng_c.standard_normal(n) * gate)
            band = (f_hz >= CAVITATION_BAND_HZ[0]) & (f_hz <= min(CAVITATION_BAND_HZ[1], 0.45 * fs_hz))
            cz = np.where(band, cz, 0.0)
            spec += cz * (faults.cavitation_g * G_MS2 / _rfft_scale_rms(cz, n))
            truth["cavitation_g"] = faults.cavitation_g
            truth["cavitation_band_hz"] = [CAVITATION_BAND_HZ[0], min(CAVITATION_BAND_HZ[1], 0.45 * fs_hz)]
            truth["cavitation_bursts"] = n_bursts
        if np.any(spec):
            if structure is not None:
                spec *= structure.response(f_hz)
            x += np.fft.irfft(spec, n)
        truth["tones"] = _add_tones(x, tones, t_s, dur_s, structure)
    if machine.noise_g > 0:
        x += _rng(seed, "noise").standard_normal(n) * (machine.noise_g * G_MS2)
    x, truth["sensor"] = _sensor(x, faults.sensor, fs_hz, seed)
    full = machine.full_scale_g * G_MS2
    truth["full_scale_ms2"] = full
    truth["clipped"] = bool(np.any(np.abs(x) >= full))
    x = np.clip(x, -full, full)
    return x, truth


__all__ = [
    "BEARING_DEFECTS",
    "BearingDefect",
    "Faults",
    "OperatingPoint",
    "Resonance",
    "SENSOR_FAULTS",
    "SensorFault",
    "SimBearing",
    "SimMachine",
    "ringing",
    "synthesize",
]
