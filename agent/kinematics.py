"""Expected frequencies of the machine train (pure functions).

Rolling-element bearing tones use the standard kinematic formulas for a
rotating inner ring and a fixed outer ring, rolling without slip
(R. B. Randall, J. Antoni, "Rolling element bearing diagnostics — a
tutorial", MSSP 25(2), 2011, eqs. 1–4):

* FTF  = (f_r/2)·(1 − (d/D)·cos φ)
* BPFO = (N·f_r/2)·(1 − (d/D)·cos φ)
* BPFI = (N·f_r/2)·(1 + (d/D)·cos φ)
* BSF  = (D/(2d))·f_r·(1 − ((d/D)·cos φ)²)   (a rolling-element defect
  usually shows at 2×BSF, striking both races once per spin)
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field


@dataclass(frozen=True, slots=True)
class BearingOrders:
    """Bearing defect frequencies as multiples of shaft speed (orders)."""

    ftf: float
    bsf: float
    bpfo: float
    bpfi: float

    def as_dict(self) -> dict[str, float]:
        return {"ftf": self.ftf, "bsf": self.bsf, "bpfo": self.bpfo, "bpfi": self.bpfi}


def bearing_orders(
    balls: int, ball_diameter_mm: float, pitch_diameter_mm: float, contact_angle_deg: float = 0.0
) -> BearingOrders:
    """FTF, BSF, BPFO, BPFI per unit shaft speed from bearing geometry."""
    if balls < 3:
        raise ValueError(f"balls must be >= 3, got {balls}")
    if not 0 < ball_diameter_mm < pitch_diameter_mm:
        raise ValueError(
            f"need 0 < ball_diameter_mm < pitch_diameter_mm, got {ball_diameter_mm}, {pitch_diameter_mm}"
        )
    if not 0 <= contact_angle_deg < 90:
        raise ValueError(f"contact_angle_deg must be in [0, 90), got {contact_angle_deg}")
    r = ball_diameter_mm / pitch_diameter_mm * math.cos(math.radians(contact_angle_deg))
    ftf = 0.5 * (1 - r)
    return BearingOrders(
        ftf=ftf,
        bsf=pitch_diameter_mm / (2 * ball_diameter_mm) * (1 - r * r),
        bpfo=balls * ftf,
        bpfi=0.5 * balls * (1 + r),
    )


def bearing_orders_given(ftf: float, bsf: float, bpfo: float, bpfi: float) -> BearingOrders:
    """Bearing multipliers given directly (from a bearing maker's table)."""
    for name, v in (("ftf", ftf), ("bsf", bsf), ("bpfo", bpfo), ("bpfi", bpfi)):
        if not v > 0:
            raise ValueError(f"bearing multiplier {name} must be > 0, got {v!r}")
    return BearingOrders(ftf=float(ftf), bsf=float(bsf), bpfo=float(bpfo), bpfi=float(bpfi))


# ------------------------------------------------------------------ machine train
#
# The train is described by plain dataclasses: shafts (with what they carry:
# vanes, blades, bearings), links between shafts (direct coupling, belt,
# gear pair), and the motor. Each shaft's speed is a fixed ratio of the
# reference shaft's (the one whose speed is measured; usually the motor).
#
# Formulas (common practice / textbook kinematics):
# * belt drive:  n_driven = n_driver · d_driver / d_driven (no creep)
#   belt rate    f_belt = π · d · n / L  (any sheave: π·d·n is the belt's
#   linear speed; d and L in the same unit)
# * gear pair:   n_driven = n_driver · z_driver / z_driven;
#   gear mesh    GMF = z · n of either gear
# * vane / blade pass = number of vanes (blades) × shaft speed
# * synchronous speed n_s = 2·f/p (Hz), slip s = (n_s − n)/n_s,
#   slip frequency f_s = n_s − n, pole pass = p · f_s
# * rotor bar pass RBPF = bars × motor speed, sidebands ± 2·f_line


@dataclass(frozen=True, slots=True)
class BearingSpec:
    """A rolling-element bearing on a shaft: its name and its multipliers."""

    name: str
    orders: BearingOrders


@dataclass(frozen=True, slots=True)
class Shaft:
    """One shaft of the train and the forcing elements it carries."""

    name: str
    vanes: int = 0
    blades: int = 0
    bearings: tuple[BearingSpec, ...] = ()


@dataclass(frozen=True, slots=True)
class Coupling:
    """Direct coupling: both shafts turn at the same speed."""

    driver: str
    driven: str


@dataclass(frozen=True, slots=True)
class Belt:
    """Belt drive between two sheaves (diameters in mm; length in mm, optional)."""

    driver: str
    driven: str
    driver_diameter_mm: float
    driven_diameter_mm: float
    length_mm: float | None = None


@dataclass(frozen=True, slots=True)
class GearPair:
    """Two meshing gears with their tooth counts."""

    driver: str
    driven: str
    driver_teeth: int
    driven_teeth: int


@dataclass(frozen=True, slots=True)
class Motor:
    """The driving induction motor; ``shaft`` names its shaft in the train."""

    shaft: str
    poles: int | None = None
    line_hz: float | None = None
    rotor_bars: int | None = None
    variable_speed: bool = False


Link = Coupling | Belt | GearPair


@dataclass(frozen=True, slots=True)
class ExpectedTone:
    """A frequency the train is expected to produce at the current speed.

    ``order`` is relative to the reference shaft; a peak within
    ``tolerance_hz`` of ``freq_hz`` may carry this tone's ``name``.
    """

    name: str
    family: str
    freq_hz: float
    order: float
    tolerance_hz: float
    shaft: str = ""

    def to_json(self) -> dict:
        return {
            "name": self.name,
            "family": self.family,
            "freq_hz": round(self.freq_hz, 4),
            "order": round(self.order, 4),
            "tolerance_hz": round(self.tolerance_hz, 4),
            "shaft": self.shaft,
        }


def _link_ratio(link: Link) -> float:
    """Speed of the driven shaft ÷ speed of the driver."""
    if isinstance(link, Coupling):
        return 1.0
    if isinstance(link, Belt):
        return link.driver_diameter_mm / link.driven_diameter_mm
    if isinstance(link, GearPair):
        return link.driver_teeth / link.driven_teeth
    raise TypeError(f"unknown link type {type(link).__name__}")


def _check_link(link: Link) -> None:
    if link.driver == link.driven:
        raise ValueError(f"link joins shaft {link.driver!r} to itself")
    if isinstance(link, Belt):
        for name in ("driver_diameter_mm", "driven_diameter_mm"):
            v = getattr(link, name)
            if not v > 0:
                raise ValueError(f"belt {link.driver}->{link.driven}: {name} must be > 0, got {v!r}")
        if link.length_mm is not None:
            if not link.length_mm > 0:
                raise ValueError(f"belt {link.driver}->{link.driven}: length_mm must be > 0, got {link.length_mm!r}")
            # an open belt must at least wrap both sheaves: L > π·(d1 + d2)/2
            wrap = math.pi * (link.driver_diameter_mm + link.driven_diameter_mm) / 2
            if link.length_mm <= wrap:
                raise ValueError(
                    f"belt {link.driver}->{link.driven}: length {link.length_mm} mm cannot wrap sheaves "
                    f"of {link.driver_diameter_mm} and {link.driven_diameter_mm} mm (needs > {wrap:.0f} mm)"
                )
    if isinstance(link, GearPair):
        for name in ("driver_teeth", "driven_teeth"):
            v = getattr(link, name)
            if int(v) != v or v < 1:
                raise ValueError(f"gear {link.driver}->{link.driven}: {name} must be a positive integer, got {v!r}")


@dataclass(frozen=True, slots=True)
class MachineTrain:
    """Shafts, the links between them and the motor; ``reference`` is the
    shaft whose speed is measured (the motor's, unless told otherwise).

    Construction checks the train: unique shaft names, links naming known
    shafts, every shaft reachable from the reference, and loops consistent.
    ``ratios`` holds each shaft's speed ÷ reference speed.
    """

    shafts: tuple[Shaft, ...]
    links: tuple[Link, ...] = ()
    motor: Motor | None = None
    reference: str = ""
    ratios: dict = field(default=None, init=False, compare=False)  # filled in __post_init__

    def __post_init__(self) -> None:
        if not self.shafts:
            raise ValueError("a machine train needs at least one shaft")
        names = [s.name for s in self.shafts]
        dup = {n for n in names if names.count(n) > 1}
        if dup:
            raise ValueError(f"shaft names must be unique; repeated: {sorted(dup)}")
        ref = self.reference or (self.motor.shaft if self.motor else names[0])
        if ref not in names:
            raise ValueError(f"reference shaft {ref!r} is not one of the shafts {names}")
        if self.motor is not None:
            if self.motor.shaft not in names:
                raise ValueError(f"motor shaft {self.motor.shaft!r} is not one of the shafts {names}")
            if self.motor.poles is not None and (self.motor.poles < 2 or self.motor.poles % 2):
                raise ValueError(f"motor poles must be an even number >= 2, got {self.motor.poles!r}")
            if self.motor.line_hz is not None and not self.motor.line_hz > 0:
                raise ValueError(f"motor line_hz must be > 0, got {self.motor.line_hz!r}")
            if self.motor.rotor_bars is not None and self.motor.rotor_bars < 1:
                raise ValueError(f"motor rotor_bars must be >= 1, got {self.motor.rotor_bars!r}")
        for s in self.shafts:
            if s.vanes < 0 or s.blades < 0:
                raise ValueError(f"shaft {s.name!r}: vanes/blades must be >= 0")
        for link in self.links:
            _check_link(link)
            for end in (link.driver, link.driven):
                if end not in names:
                    raise ValueError(f"link {link.driver}->{link.driven} names unknown shaft {end!r}")
        ratios = {ref: 1.0}
        pending = list(self.links)
        changed = True
        while pending and changed:
            changed = False
            for link in list(pending):
                r = _link_ratio(link)
                a, b = link.driver, link.driven
                if a in ratios and b in ratios:
                    if not math.isclose(ratios[b], ratios[a] * r, rel_tol=1e-6):
                        raise ValueError(
                            f"link {a}->{b} gives ratio {ratios[a] * r:.6g}, but the train already "
                            f"fixes {b} at {ratios[b]:.6g}"
                        )
                elif a in ratios:
                    ratios[b] = ratios[a] * r
                elif b in ratios:
                    ratios[a] = ratios[b] / r
                else:
                    continue
                pending.remove(link)
                changed = True
        missing = [n for n in names if n not in ratios]
        if missing:
            raise ValueError(f"shafts {missing} are not linked to the reference shaft {ref!r}")
        object.__setattr__(self, "reference", ref)
        object.__setattr__(self, "ratios", ratios)

    def shaft(self, name: str) -> Shaft:
        for s in self.shafts:
            if s.name == name:
                return s
        raise KeyError(name)

    def forcing_orders(self) -> tuple[float, ...]:
        """Synchronous forcing orders of the reference shaft (vane/blade pass,
        gear mesh), for :func:`agent.speed.estimate_speed`."""
        out = []
        for s in self.shafts:
            r = self.ratios[s.name]
            for n in (s.vanes, s.blades):
                if n:
                    out.append(n * r)
        for link in self.links:
            if isinstance(link, GearPair):
                out.append(link.driver_teeth * self.ratios[link.driver])
        return tuple(sorted(set(round(o, 9) for o in out)))


def _tone(name, family, f, speed_hz, tol_rel, tol_abs, shaft="") -> ExpectedTone:
    return ExpectedTone(
        name=name,
        family=family,
        freq_hz=float(f),
        order=float(f / speed_hz),
        tolerance_hz=float(max(tol_rel * f, tol_abs)),
        shaft=shaft,
    )


def expected_frequencies(
    train: MachineTrain,
    speed_hz: float,
    *,
    harmonics: int = 10,
    forcing_harmonics: int = 3,
    bearing_harmonics: int = 3,
    resolution_hz: float = 0.0,
    shaft_tolerance: float = 0.005,
    bearing_tolerance: float = 0.02,
    fmax_hz: float | None = None,
) -> tuple[ExpectedTone, ...]:
    """Every frequency the train should produce with the reference shaft at ``speed_hz``.

    Shaft harmonics come first (they win ties in :func:`agent.orders.label_peaks`),
    then forcing frequencies, the line family, motor tones and bearing tones.
    Tolerances: ± max(``shaft_tolerance`` × f, 1.5 × ``resolution_hz``)
    for shaft-locked tones; bearing tones and belt rate ± ``bearing_tolerance``
    (rolling elements and belts slip 1–2 %; Randall & Antoni 2011); line
    family ± max(0.1 Hz, 1.5 lines). Tones above ``fmax_hz`` are left out.
    """
    if not speed_hz > 0:
        raise ValueError(f"speed_hz must be > 0, got {speed_hz!r}")
    res = 1.5 * resolution_hz
    tones: list[ExpectedTone] = []
    many = len(train.shafts) > 1

    def label(base: str, shaft: str) -> str:
        return f"{base} {shaft}" if many else base

    for s in train.shafts:
        f1 = speed_hz * train.ratios[s.name]
        for h in range(1, harmonics + 1):
            tones.append(_tone(label(f"{h}X", s.name), "shaft", h * f1, speed_hz, shaft_tolerance, res, s.name))
        for count, what, fam in ((s.vanes, "vane pass", "vane_pass"), (s.blades, "blade pass", "blade_pass")):
            if count:
                for m in range(1, forcing_harmonics + 1):
                    nm = what if m == 1 else f"{m}x {what}"
                    tones.append(_tone(label(nm, s.name), fam, m * count * f1, speed_hz, shaft_tolerance, res, s.name))
    for link in train.links:
        if isinstance(link, GearPair):
            gmf = link.driver_teeth * speed_hz * train.ratios[link.driver]
            for m in range(1, forcing_harmonics + 1):
                nm = "gear mesh" if m == 1 else f"{m}x gear mesh"
                tones.append(_tone(f"{nm} {link.driver}-{link.driven}", "gear_mesh", m * gmf, speed_hz,
                                   shaft_tolerance, res, link.driver))
        if isinstance(link, Belt) and link.length_mm:
            n_driver = speed_hz * train.ratios[link.driver]
            f_belt = math.pi * link.driver_diameter_mm * n_driver / link.length_mm
            for m in range(1, forcing_harmonics + 1):
                nm = "belt rate" if m == 1 else f"{m}x belt rate"
                tones.append(_tone(f"{nm} {link.driver}-{link.driven}", "belt", m * f_belt, speed_hz,
                                   bearing_tolerance, res, link.driver))
    m_ = train.motor
    if m_ is not None and m_.line_hz:
        lf = m_.line_hz
        tol_lf = max(0.1, res)
        tones.append(ExpectedTone("LF", "line", lf, lf / speed_hz, tol_lf, m_.shaft))
        tones.append(ExpectedTone("2xLF", "line", 2 * lf, 2 * lf / speed_hz, tol_lf, m_.shaft))
        f_m = speed_hz * train.ratios[m_.shaft]
        if m_.rotor_bars:
            rbpf = m_.rotor_bars * f_m
            tones.append(_tone("RBPF", "rotor_bar", rbpf, speed_hz, shaft_tolerance, res, m_.shaft))
            for sgn, txt in ((-1, "-"), (1, "+")):
                tones.append(_tone(f"RBPF{txt}2xLF", "rotor_bar", rbpf + sgn * 2 * lf, speed_hz,
                                   shaft_tolerance, res, m_.shaft))
        if m_.poles and not m_.variable_speed:
            n_s = 2.0 * lf / m_.poles
            f_slip = n_s - f_m
            if f_slip > 0:
                fp = m_.poles * f_slip
                tones.append(_tone("pole pass", "pole_pass", fp, speed_hz, 0.05, res, m_.shaft))
                for sgn, txt in ((-1, "-"), (1, "+")):
                    tones.append(_tone(f"1X{txt}pole pass", "pole_pass", f_m + sgn * fp, speed_hz,
                                       shaft_tolerance, res, m_.shaft))
    for s in train.shafts:
        f1 = speed_hz * train.ratios[s.name]
        for b in s.bearings:
            bname = f"{s.name} {b.name}" if many else b.name
            for key, base in (("bpfo", "BPFO"), ("bpfi", "BPFI"), ("bsf", "BSF"), ("ftf", "FTF")):
                mult = getattr(b.orders, key)
                for m in range(1, bearing_harmonics + 1):
                    nm = base if m == 1 else f"{m}x{base}"
                    tones.append(_tone(f"{nm} {bname}", "bearing", m * mult * f1, speed_hz,
                                       bearing_tolerance, res, s.name))
    if fmax_hz is not None:
        tones = [t for t in tones if t.freq_hz <= fmax_hz]
    return tuple(tones)


def train_from_config(machine) -> MachineTrain:
    """The machine train described by a ``[machine]`` config section.

    ``machine`` is an :class:`agent.config.MachineConfig` (duck-typed, so this
    module does not import the config): the reference shaft carries
    ``vanes``, ``blades`` and the motor (``poles``, ``line_hz``,
    ``rotor_bars``, ``drive``); ``shafts`` add further shafts, linked by
    ``couplings``, ``belts`` and ``gears``; each bearing sits on its
    ``shaft`` ('' = the reference shaft) with multipliers from its geometry,
    or from ``bpfo``/``bpfi``/``bsf``/``ftf`` where those are given (> 0). Raises ValueError naming the
    problem when the train is inconsistent.
    """
    ref = machine.reference_shaft or "motor"
    extra = {s.name: s for s in machine.shafts}
    ref_vanes, ref_blades = machine.vanes, machine.blades
    if ref in extra:
        ref_vanes = ref_vanes or extra[ref].vanes
        ref_blades = ref_blades or extra[ref].blades
    bearings: dict[str, list[BearingSpec]] = {}
    names = [ref] + [n for n in extra if n != ref]
    for b in machine.bearings:
        shaft = b.shaft or ref
        if shaft not in names:
            raise ValueError(f"bearing {b.name!r} sits on unknown shaft {shaft!r}; shafts are {names}")
        orders = bearing_orders(b.balls, b.ball_diameter_mm, b.pitch_diameter_mm, b.contact_angle_deg)
        # multipliers given directly (a bearing maker's table) replace the geometry's
        given = {k: float(getattr(b, k, 0.0) or 0.0) for k in ("ftf", "bsf", "bpfo", "bpfi")}
        if any(v > 0 for v in given.values()):
            merged = {k: (v if v > 0 else getattr(orders, k)) for k, v in given.items()}
            orders = bearing_orders_given(**merged)
        bearings.setdefault(shaft, []).append(BearingSpec(b.name, orders))
    shafts = [Shaft(ref, vanes=ref_vanes, blades=ref_blades, bearings=tuple(bearings.get(ref, ())))]
    for n, s in extra.items():
        if n == ref:
            continue
        shafts.append(Shaft(n, vanes=s.vanes, blades=s.blades, bearings=tuple(bearings.get(n, ()))))
    links: list[Link] = [Coupling(c.driver, c.driven) for c in machine.couplings]
    links += [
        Belt(b.driver, b.driven, b.driver_diameter_mm, b.driven_diameter_mm, b.length_mm or None)
        for b in machine.belts
    ]
    links += [GearPair(g.driver, g.driven, g.driver_teeth, g.driven_teeth) for g in machine.gears]
    motor = Motor(
        shaft=ref,
        poles=machine.poles or None,
        line_hz=machine.line_hz,
        rotor_bars=machine.rotor_bars or None,
        variable_speed=getattr(machine, "drive", "line") == "vfd",
    )
    return MachineTrain(shafts=tuple(shafts), links=tuple(links), motor=motor, reference=ref)
