"""Peak accounting: every significant peak gets exactly one label and its reason (pure functions).

The pass follows an analyst's order of work (common practice):

1. **Shaft harmonics.** The fundamental of each shaft is refined by a
   weighted least-squares fit over its harmonic family,
   f₀ = Σ wₕ·h·fₕ / Σ wₕ·h² (wₕ = linear height of harmonic h above the
   floor), so that high harmonics line up; peaks at n×X (and at half orders
   n+½, a looseness sign) are labelled with the shaft.
2. **Forcing frequencies** of the train — vane / blade pass, gear mesh,
   belt rate and their harmonics — take precedence over the bare n×X label
   when they coincide (a 6X peak on a 6-vane pump is "vane pass").
3. **Line-frequency family** 1…4 × line frequency (2×LF is twice the
   supply frequency).
4. **Rotor-bar pass** and its ±2×LF sidebands; pole-pass sidebands ±f_p
   around 1X.
5. **Bearing tones** (kinematic or as found by the envelope analysis), their
   harmonics, and sidebands.
6. **Sidebands** at ±1X / ±2X of a labelled carrier, and **intermodulation**
   (sum or difference of two labelled tones).
7. Everything else is **unexplained** and classed against *every* shaft:
   sub-synchronous (below the slowest shaft's 1X), synchronous (an integer
   order of some shaft beyond the harmonics searched) or non-synchronous.
   Harmonic families and equal sideband spacings among the unexplained are
   reported.

Tolerances: a peak matches a tone when |f − f_tone| ≤ max(r·f, 1.5 lines)
with r = 0.4 % for shaft-locked tones (0.5 % for a 0.2 % speed ramp across
ten harmonics), the tone's own tolerance for slipping tones (bearings, belts
± 2 %, Randall & Antoni 2011 §2.1); of several matches the closest, relative
to its tolerance, wins.

The floor side (:func:`floor_regions`, :func:`find_humps`) looks at the
running-median floor of :func:`agent.spectra.noise_floor`: its level per
region (compared with a baseline when one is given) and humps that stand
above the floor's broad trend — a structural resonance, which amplifies
any peak riding on it.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import ndimage

from agent.model import STANDARD_GRAVITY_MS2, Peak
from agent.spectra import Spectrum, noise_floor

#: label categories, in the order the pass assigns them
CATEGORIES = (
    "shaft", "forcing", "line", "rotor_bar", "pole_pass", "bearing", "sideband", "intermod", "unexplained",
)
#: classes of an unexplained peak
UNEXPLAINED_CLASSES = ("sub_synchronous", "synchronous", "non_synchronous")
#: families of expected tones treated as forcing frequencies (shaft-locked)
FORCING_FAMILIES = ("vane_pass", "blade_pass", "gear_mesh", "belt")
#: relative tolerance of shaft-locked tones after refinement
SHAFT_TOL = 0.004
#: tolerance in lines (interpolated peaks are good to a fraction of a line; leakage and ramps widen it)
LINE_TOL = 1.5
#: members of a family among the unexplained must stand this high above the floor
FAMILY_MIN_HEIGHT_DB = 10.0
#: line-frequency harmonics labelled
LINE_HARMONICS = (1, 2, 3, 4)

AMPLIFIED_CAUTION = (
    "sits on a resonance hump: its amplitude is amplified by the structure; judge its severity "
    "with that in mind (a stop or coast-down test would confirm the resonance)"
)


@dataclass(frozen=True, slots=True)
class AccountedPeak:
    """One peak and the one label it was given, with the reason.

    ``amp`` is r.m.s. in ``AccountedSpectrum.unit``; ``order`` is the
    frequency as a multiple of the reference shaft speed; ``shaft`` names
    the shaft a shaft-locked label refers to; ``klass`` is set only for
    unexplained peaks.
    """

    freq_hz: float
    amp: float
    height_db: float
    label: str
    category: str
    reason: str
    order: float | None = None
    shaft: str = ""
    family: str = ""
    harmonic: float | None = None
    klass: str = ""
    on_hump: bool = False

    def to_json(self, amp_scale: float = 1.0) -> dict:
        return {
            "freq_hz": round(self.freq_hz, 4),
            "cpm": round(self.freq_hz * 60.0, 1),
            "order": None if self.order is None else round(self.order, 3),
            "amp": round(self.amp * amp_scale, 5),
            "height_db": round(self.height_db, 1),
            "label": self.label,
            "category": self.category,
            "class": self.klass,
            "shaft": self.shaft,
            "reason": self.reason,
            "on_hump": self.on_hump,
        }


@dataclass(frozen=True, slots=True)
class PeakFamily:
    """A harmonic family or an equally spaced sideband set found among the peaks.

    ``kind`` is "harmonics" (``base_hz`` = fundamental) or "sidebands"
    (``base_hz`` = spacing, ``carrier_hz`` = centre).
    """

    kind: str
    base_hz: float
    members_hz: tuple[float, ...]
    energy: float
    order: float | None = None
    carrier_hz: float | None = None
    note: str = ""

    def to_json(self) -> dict:
        return {
            "kind": self.kind,
            "base_hz": round(self.base_hz, 4),
            "order": None if self.order is None else round(self.order, 3),
            "carrier_hz": None if self.carrier_hz is None else round(self.carrier_hz, 4),
            "members_hz": [round(f, 3) for f in self.members_hz],
            "note": self.note,
        }


@dataclass(frozen=True, slots=True)
class FloorRegion:
    """Broadband floor level of one frequency region (r.m.s. of the median floor in the band).

    ``level`` is in ``unit``; ``delta_db`` compares with ``baseline`` when one was given.
    The running median of a periodogram sits a little below its mean (about
    1.6 dB for one average), so compare a floor only with another floor.
    """

    name: str
    f_lo_hz: float
    f_hi_hz: float
    level: float
    unit: str
    baseline: float | None = None

    @property
    def delta_db(self) -> float | None:
        if self.baseline is None or self.baseline <= 0 or self.level <= 0:
            return None
        return 20.0 * math.log10(self.level / self.baseline)

    def to_json(self) -> dict:
        d = self.delta_db
        return {
            "name": self.name,
            "f_lo_hz": round(self.f_lo_hz, 2),
            "f_hi_hz": round(self.f_hi_hz, 2),
            "level": round(self.level, 6),
            "unit": self.unit,
            "baseline": None if self.baseline is None else round(self.baseline, 6),
            "delta_db": None if d is None else round(d, 1),
        }


@dataclass(frozen=True, slots=True)
class Hump:
    """A hump in the noise floor (a resonance) and the peaks riding on it.

    ``excess_db`` is the hump's height above the floor's broad trend;
    ``q`` ≈ centre / half-power width (damping ratio ζ ≈ 1/(2Q)).
    """

    center_hz: float
    f_lo_hz: float
    f_hi_hz: float
    excess_db: float
    q: float
    peaks_hz: tuple[float, ...] = ()
    caution: str = AMPLIFIED_CAUTION

    def to_json(self) -> dict:
        return {
            "center_hz": round(self.center_hz, 2),
            "f_lo_hz": round(self.f_lo_hz, 2),
            "f_hi_hz": round(self.f_hi_hz, 2),
            "excess_db": round(self.excess_db, 1),
            "q": round(self.q, 1),
            "peaks_hz": [round(f, 2) for f in self.peaks_hz],
            "caution": self.caution,
        }


@dataclass(frozen=True, slots=True)
class AccountedSpectrum:
    """The result of the accounting pass over one spectrum."""

    peaks: tuple[AccountedPeak, ...]  # ascending frequency
    unit: str
    speed_hz: float | None  # refined reference-shaft speed (None: not running / unknown)
    shaft_speeds_hz: tuple[tuple[str, float], ...] = ()
    energy_explained_fraction: float = 0.0  # Σ amp² of labelled peaks / Σ amp² of all peaks
    tonal_fraction: float | None = None  # Σ amp² of all peaks / total power of the spectrum (same band)
    families: tuple[PeakFamily, ...] = ()
    suggestions: tuple[str, ...] = ()
    floor_regions: tuple[FloorRegion, ...] = ()
    humps: tuple[Hump, ...] = ()
    line_hz: float | None = None
    bin_width_hz: float = 0.0

    # ── look-ups used by the rules ──
    def shaft_hz(self, shaft: str = "") -> float | None:
        if not self.shaft_speeds_hz:
            return None
        if not shaft:
            return self.shaft_speeds_hz[0][1]
        return dict(self.shaft_speeds_hz).get(shaft)

    def with_category(self, *categories: str) -> tuple[AccountedPeak, ...]:
        return tuple(p for p in self.peaks if p.category in categories)

    def harmonic_amp(self, n: float, shaft: str = "") -> float:
        """Amplitude at n×X of ``shaft`` (reference shaft by default), 0 when no peak is there.

        Counts any label that sits at that order (a 6X that is vane pass too).
        """
        f1 = self.shaft_hz(shaft)
        if not f1:
            return 0.0
        target = n * f1
        tol = max(SHAFT_TOL * target, LINE_TOL * self.bin_width_hz)
        best = 0.0
        for p in self.peaks:
            if abs(p.freq_hz - target) <= tol and p.category in ("shaft", "forcing"):
                best = max(best, p.amp)
        return best

    def labelled(self, label: str) -> AccountedPeak | None:
        for p in self.peaks:
            if p.label == label:
                return p
        return None

    def to_json(self, amp_scale: float = 1.0) -> dict:
        return {
            "unit": self.unit,
            "speed_hz": None if self.speed_hz is None else round(self.speed_hz, 4),
            "shaft_speeds_hz": {n: round(f, 4) for n, f in self.shaft_speeds_hz},
            "energy_explained_fraction": round(self.energy_explained_fraction, 4),
            "tonal_fraction": None if self.tonal_fraction is None else round(self.tonal_fraction, 4),
            "peaks": [p.to_json(amp_scale) for p in self.peaks],
            "families": [f.to_json() for f in self.families],
            "suggestions": list(self.suggestions),
            "floor_regions": [r.to_json() for r in self.floor_regions],
            "humps": [h.to_json() for h in self.humps],
        }


@dataclass(slots=True)
class _Work:
    peak: Peak
    label: str = ""
    category: str = ""
    reason: str = ""
    shaft: str = ""
    family: str = ""
    harmonic: float | None = None
    klass: str = ""
    score: float = math.inf  # distance / tolerance of the current label (lower is better)


def _tol(f_hz: float, bin_hz: float, rel: float = SHAFT_TOL) -> float:
    return max(rel * abs(f_hz), LINE_TOL * bin_hz, 1e-9)


def _weight(p: Peak) -> float:
    return 10.0 ** (min(p.height_db, 40.0) / 10.0)


def refine_fundamental(
    peaks: Sequence[Peak], f0_hz: float, bin_width_hz: float, *, max_harmonic: int = 20,
    exclude_hz: Sequence[float] = (),
) -> tuple[float, int]:
    """Refine a shaft's fundamental by weighted least squares over its harmonics.

    Harmonics 1…3 are matched first within ±1 % (or 1.5 lines), the fit
    repeated, then harmonics up to ``max_harmonic`` within ±0.4 %.
    f₀ = Σ wₕ·h·fₕ / Σ wₕ·h², wₕ = linear height above floor (the variance
    of fₕ/h falls as h²·SNR). Peaks within tolerance of ``exclude_hz``
    (line-frequency family) are left out. Returns (f₀, harmonics used).
    """
    if not f0_hz > 0:
        raise ValueError(f"f0_hz must be > 0, got {f0_hz!r}")
    f0 = float(f0_hz)
    used = 0
    for h_max, rel in ((3, 0.01), (max_harmonic, SHAFT_TOL), (max_harmonic, SHAFT_TOL)):
        num = den = 0.0
        used = 0
        for h in range(1, h_max + 1):
            target = h * f0
            tol = _tol(target, bin_width_hz, rel)
            best = None
            for p in peaks:
                if abs(p.freq_hz - target) <= tol and (best is None or p.amp > best.amp):
                    best = p
            if best is None:
                continue
            if any(abs(best.freq_hz - x) <= _tol(x, bin_width_hz) for x in exclude_hz):
                continue
            w = _weight(best)
            num += w * h * best.freq_hz
            den += w * h * h
            used += 1
        if den > 0:
            f0 = num / den
    return f0, used


def _get(tone: Any, name: str, default=None):
    return tone.get(name, default) if _is_mapping(type(tone)) else getattr(tone, name, default)


@functools.lru_cache(maxsize=16)
def _is_mapping(cls: type) -> bool:
    return issubclass(cls, Mapping)  # once per type: an ABC check per look-up costs more than the look-up


def _shaft_ratios(expected: Sequence[Any], shaft_ratios: Mapping[str, float] | None) -> dict[str, float]:
    if shaft_ratios:
        return {str(k): float(v) for k, v in shaft_ratios.items()}
    ratios: dict[str, float] = {}
    for t in expected:
        if _get(t, "family") == "shaft":
            name = _get(t, "shaft", "") or ""
            order = float(_get(t, "order"))
            label = str(_get(t, "name", ""))
            if label.startswith("1X"):
                ratios.setdefault(name, order)
    return ratios or {"": 1.0}


def account_peaks(
    peaks: Sequence[Peak],
    speed_hz: float | None,
    expected: Sequence[Any] = (),
    *,
    unit: str = "mm/s",
    bin_width_hz: float = 0.0,
    line_hz: float | None = None,
    shaft_ratios: Mapping[str, float] | None = None,
    bearing_tones: Sequence[Any] = (),
    max_harmonic: int = 20,
    spectrum: Spectrum | None = None,
    floor: np.ndarray | None = None,
    floor_spectrum: Spectrum | None = None,
    hump_spectrum: Spectrum | None = None,
    baseline_floor: Mapping[str, float] | None = None,
) -> AccountedSpectrum:
    """Give every peak one label with its reason; see the module text for the order of work.

    Parameters
    ----------
    peaks
        From :func:`agent.spectra.find_peaks` (amplitudes r.m.s. in ``unit``).
    speed_hz
        Reference-shaft speed (from the speed estimate); None or 0 when the
        machine is stopped or the speed is unknown (only line-frequency and
        bearing-independent labels are then possible).
    expected
        Expected tones of the train (``agent.kinematics.expected_frequencies``):
        objects or mappings with ``name``, ``family``, ``freq_hz``, ``order``
        (relative to the reference shaft), ``tolerance_hz`` and ``shaft``.
        Shaft-locked tones are moved to the refined speed.
    line_hz
        Supply frequency; adds the line family when the expected tones lack it.
    shaft_ratios
        Shaft name → speed ratio to the reference; taken from the "1X" tones
        of ``expected`` when not given.
    bearing_tones
        Extra bearing tones (e.g. a defect fundamental found in the envelope),
        same fields as ``expected``; their harmonics 2…4 are matched too.
    spectrum, floor
        The spectrum the peaks came from and its floor, for the tonal fraction
        and the humps.
    hump_spectrum
        A well-averaged spectrum of a few Hz per line for :func:`find_humps`
        (default: ``spectrum``).
    floor_spectrum, baseline_floor
        Spectrum for the floor regions (the acceleration spectrum reaches the
        high-frequency region best) and the baseline's levels per region name.
    """
    bin_hz = float(bin_width_hz or (spectrum.bin_width_hz if spectrum is not None else 0.0))
    work = [_Work(p) for p in sorted(peaks, key=lambda p: p.freq_hz)]
    ratios = _shaft_ratios(expected, shaft_ratios)
    ref = next((n for n, r in ratios.items() if abs(r - 1.0) < 1e-9), next(iter(ratios)))
    lines: list[tuple[str, float, float]] = []  # (label, f, tol)
    lf = line_hz
    for t in expected:
        if _get(t, "family") == "line":
            lines.append((str(_get(t, "name")), float(_get(t, "freq_hz")), float(_get(t, "tolerance_hz"))))
            if lf is None and str(_get(t, "name")) == "LF":
                lf = float(_get(t, "freq_hz"))
    if lf:
        have = {round(f, 6) for _, f, _ in lines}
        for k in LINE_HARMONICS:
            if round(k * lf, 6) not in have:
                lines.append(("LF" if k == 1 else f"{k}xLF", k * lf, max(0.1, LINE_TOL * bin_hz)))
    lines = [(("LF" if n == "LF" else n), f, tol) for n, f, tol in lines]

    running = bool(speed_hz) and speed_hz > 0
    f_ref = None
    shaft_speeds: list[tuple[str, float]] = []
    if running:
        f_ref, _ = refine_fundamental([w.peak for w in work], float(speed_hz), bin_hz,
                                      max_harmonic=max_harmonic, exclude_hz=[f for _, f, _ in lines])
        # a refinement that moved more than 2 % is not trusted (a wrong family was fitted)
        if abs(f_ref - speed_hz) > 0.02 * speed_hz:
            f_ref = float(speed_hz)
        for name, r in sorted(ratios.items(), key=lambda kv: (kv[0] != ref, kv[0])):
            f1 = f_ref * r
            if name != ref:
                f1, _ = refine_fundamental([w.peak for w in work], f1, bin_hz, max_harmonic=max_harmonic)
                if abs(f1 - f_ref * r) > 0.02 * f_ref * r:
                    f1 = f_ref * r
            shaft_speeds.append((name, f1))

    def offer(w: _Work, f_tone: float, tol: float, label: str, category: str, reason: str, **kw) -> None:
        d = abs(w.peak.freq_hz - f_tone)
        if d <= tol and d / tol < w.score:
            w.label, w.category, w.reason, w.score = label, category, reason, d / tol
            w.shaft = kw.get("shaft", "")
            w.family = kw.get("family", category)
            w.harmonic = kw.get("harmonic")

    def sname(name: str) -> str:
        return f" {name}" if name and len(shaft_speeds) > 1 else ""

    # 1. shaft harmonics and half orders
    for name, f1 in shaft_speeds:
        for w in work:
            n = w.peak.freq_hz / f1
            h = round(n)
            if 1 <= h <= max_harmonic:
                offer(w, h * f1, _tol(h * f1, bin_hz), f"{h}X{sname(name)}", "shaft",
                      f"{h} × running speed of {name or 'the shaft'} ({f1:.3f} Hz)", shaft=name, harmonic=float(h))
            hh = math.floor(n) + 0.5
            if 0.5 <= hh <= 10.5:
                offer(w, hh * f1, _tol(hh * f1, bin_hz) * 0.8, f"{hh:g}X{sname(name)}", "shaft",
                      f"half order {hh:g} × running speed of {name or 'the shaft'}", shaft=name,
                      harmonic=hh, family="half_order")
    # 2. forcing frequencies (they win over a bare n×X at the same place)
    forcing = []
    for t in expected:
        fam = _get(t, "family")
        if fam in FORCING_FAMILIES and running:
            order = float(_get(t, "order"))
            f = order * f_ref
            tol = max(float(_get(t, "tolerance_hz", 0.0)), _tol(f, bin_hz))
            forcing.append((str(_get(t, "name")), fam, f, tol, order, _get(t, "shaft", "")))
    for w in work:
        for name, fam, f, tol, order, shaft in forcing:
            d = abs(w.peak.freq_hz - f)
            if d <= tol:
                w.score = math.inf  # forcing beats a coincident shaft harmonic
                offer(w, f, tol, name, "forcing", f"{name}: {order:g} × running speed ({fam.replace('_', ' ')})",
                      shaft=shaft or "", family=fam)
    # 3. line family
    for w in work:
        if w.category == "forcing":
            continue
        for name, f, tol in lines:
            k = round(f / lf) if lf else 1
            offer(w, f, tol, name, "line", f"{k} × line frequency {lf:g} Hz" if lf else name, family="line")
    # 4. rotor bar, pole pass (and any other motor tones of the kinematics)
    a1_ref = max((w.peak.amp for w in work if w.category == "shaft" and w.harmonic == 1.0
                  and w.shaft == (shaft_speeds[0][0] if shaft_speeds else "")), default=0.0)
    bars = min((round(float(_get(t, "order"))) for t in expected
                if _get(t, "family") == "rotor_bar" and "LF" not in str(_get(t, "name"))), default=0)
    for t in expected:
        fam = _get(t, "family")
        if fam not in ("rotor_bar", "pole_pass"):
            continue
        f = float(_get(t, "freq_hz"))
        if running and fam == "rotor_bar" and bars:
            f += bars * (f_ref - speed_hz)  # rotor-bar pass follows the refined speed; ±2×LF does not move
        tol = max(float(_get(t, "tolerance_hz", 0.0)), _tol(f, bin_hz))
        reason = {"rotor_bar": "rotor-bar pass (bars × motor speed) or its ±2×LF sideband",
                  "pole_pass": "pole pass frequency (poles × slip frequency) or a pole-pass sideband of 1X"}[fam]
        name = str(_get(t, "name"))
        for w in work:
            if w.category in ("forcing",):
                continue
            if fam == "pole_pass" and name.startswith("1X") and w.peak.amp >= a1_ref:
                continue  # a modulation sideband of 1X is weaker than 1X itself
            offer(w, f, tol, name, fam, reason, family=fam)
    # 5. bearing tones and their harmonics
    btones = []
    for t in expected:
        if _get(t, "family") == "bearing":
            btones.append((str(_get(t, "name")), float(_get(t, "freq_hz")), float(_get(t, "tolerance_hz"))))
    for t in bearing_tones:
        name, f = str(_get(t, "name")), float(_get(t, "freq_hz"))
        tol = float(_get(t, "tolerance_hz", 0.0) or 0.0) or _tol(f, bin_hz, 0.01)
        for m in range(1, 5):
            btones.append((name if m == 1 else f"{m}x{name}", m * f, max(tol, _tol(m * f, bin_hz, 0.005))))
    for w in work:
        if w.category:
            continue
        for name, f, tol in btones:
            offer(w, f, tol, name, "bearing", f"bearing defect tone {name}", family="bearing")
    # 6. sidebands of labelled carriers (±1X, ±2X of the carrier's shaft)
    carriers = [w for w in work if w.category in ("forcing", "rotor_bar", "bearing")]
    for w in work:
        if w.category:
            continue
        for c in carriers:
            f1 = dict(shaft_speeds).get(c.shaft, f_ref) if running else None
            if not f1 or w.peak.amp >= c.peak.amp:  # a sideband is weaker than its carrier
                continue
            for k in (1, 2):
                for sgn, txt in ((1, "+"), (-1, "-")):
                    f = c.peak.freq_hz + sgn * k * f1
                    offer(w, f, _tol(f, bin_hz) * 1.5, f"{c.label}{txt}{k if k > 1 else ''}X", "sideband",
                          f"sideband of {c.label} spaced {k}X", family=c.family)
    # 7. intermodulation: sum or difference of two labelled tones
    strong = sorted((w for w in work if w.category and w.category != "sideband"),
                    key=lambda w: -w.peak.amp)[:12]
    for w in work:
        if w.category:
            continue
        for i, a in enumerate(strong):
            for b in strong[i + 1:]:
                if w.peak.amp > min(a.peak.amp, b.peak.amp):
                    continue  # a product of modulation is weaker than both of its parents
                for f, txt in ((a.peak.freq_hz + b.peak.freq_hz, f"{a.label}+{b.label}"),
                               (abs(a.peak.freq_hz - b.peak.freq_hz), f"{a.label}-{b.label}"
                                if a.peak.freq_hz > b.peak.freq_hz else f"{b.label}-{a.label}")):
                    offer(w, f, _tol(f, bin_hz), txt, "intermod",
                          "sum or difference of two labelled tones (intermodulation)", family="intermod")
    # 8. unexplained: classify against every shaft
    slowest = min((f for _, f in shaft_speeds), default=None)
    for w in work:
        if w.category:
            continue
        f = w.peak.freq_hz
        w.category, w.label, w.family = "unexplained", "unexplained", "unexplained"
        if not running:
            w.klass = "non_synchronous"
            w.reason = "no running speed to relate it to"
            continue
        sync = None
        for name, f1 in shaft_speeds:
            h = round(f / f1)
            if h >= 1 and abs(f - h * f1) <= min(_tol(f, bin_hz), 0.05 * f1):  # beyond ~12X·(1/0.4 %) no telling
                sync = (name, h)
                break
        orders = ", ".join(f"{f / f1:.2f}X{(' ' + n) if n else ''}" for n, f1 in shaft_speeds)
        if sync is not None:
            w.klass, w.shaft = "synchronous", sync[0]
            w.reason = f"integer order {sync[1]}X of {sync[0] or 'the shaft'}, beyond the harmonics searched"
        elif f < slowest * (1 - SHAFT_TOL):
            w.klass = "sub_synchronous"
            w.reason = f"below running speed ({orders})"
        else:
            w.klass = "non_synchronous"
            w.reason = f"not an integer order of any shaft ({orders})"
        w.label = f"unexplained {w.klass.replace('_', '-')}"

    out = []
    for w in work:
        p = w.peak
        out.append(AccountedPeak(
            freq_hz=p.freq_hz, amp=p.amp, height_db=p.height_db, label=w.label, category=w.category,
            reason=w.reason, order=(p.freq_hz / f_ref) if f_ref else None, shaft=w.shaft,
            family=w.family, harmonic=w.harmonic, klass=w.klass,
        ))
    soft = [p for p in out if p.category in ("pole_pass", "intermod", "sideband") or p.family == "half_order"]
    # sub-synchronous bearing labels (the cage, FTF family) are doubtful in a plain spectrum: a belt family
    # falls there too, so they take part in the family search as if unexplained
    doubtful = [p for p in out if p.category == "bearing" and p.order is not None and p.order < 0.95]
    families = _families([p for p in out if p.category == "unexplained"] + doubtful, f_ref, lf, bin_hz,
                         shaft_speeds, soft)
    humps: tuple[Hump, ...] = ()
    tonal = None
    if spectrum is not None:
        humps = find_humps(hump_spectrum or spectrum, None, [p.freq_hz for p in out])
        if humps:
            out = [_mark_hump(p, humps) for p in out]
        lo = min((p.freq_hz for p in out), default=0.0)
        hi = max((p.freq_hz for p in out), default=0.0)
        if hi > lo:
            sel = (spectrum.f_hz >= lo - 3 * bin_hz) & (spectrum.f_hz <= hi + 3 * bin_hz)
            total = float(spectrum.power[sel].sum() / spectrum.enbw_bins)
            if total > 0:
                tonal = min(1.0, sum(p.amp**2 for p in out) / total)
    regions: tuple[FloorRegion, ...] = ()
    if floor_spectrum is not None:
        regions = floor_regions(floor_spectrum, f_ref, baseline=baseline_floor)
    total_e = sum(p.amp**2 for p in out)
    explained = sum(p.amp**2 for p in out if p.category != "unexplained")
    acc = AccountedSpectrum(
        peaks=tuple(out),
        unit=unit,
        speed_hz=f_ref,
        shaft_speeds_hz=tuple(shaft_speeds),
        energy_explained_fraction=(explained / total_e) if total_e > 0 else 1.0,
        tonal_fraction=tonal,
        families=families,
        floor_regions=regions,
        humps=humps,
        line_hz=lf,
        bin_width_hz=bin_hz,
    )
    return _with_suggestions(acc, expected)


def _mark_hump(p: AccountedPeak, humps: Sequence[Hump]) -> AccountedPeak:
    for h in humps:
        if h.f_lo_hz * 0.97 <= p.freq_hz <= h.f_hi_hz * 1.03:
            from dataclasses import replace

            return replace(p, on_hump=True)
    return p


def _families(unexpl: Sequence[AccountedPeak], f_ref, lf, bin_hz, shaft_speeds,
              soft: Sequence[AccountedPeak] = ()) -> tuple[PeakFamily, ...]:
    """Harmonic families and equally spaced sets among the unexplained peaks.

    ``soft`` peaks (labels of low certainty: sidebands, pole-pass sidebands,
    intermodulation, half orders) may support a harmonic family as higher
    members, but a family needs its fundamental and one harmonic unexplained.
    """
    fams: list[PeakFamily] = []
    free = sorted((p for p in unexpl if p.height_db >= FAMILY_MIN_HEIGHT_DB), key=lambda p: p.freq_hz)
    support = [p for p in soft if p.height_db >= FAMILY_MIN_HEIGHT_DB]
    used: set[float] = set()
    # harmonic families: a fundamental and at least two of its harmonics 2…8
    cands = []
    for p in free:
        members = [p]
        n_free = 1
        for k in range(2, 9):
            target = k * p.freq_hz
            m = [q for q in free if abs(q.freq_hz - target) <= _tol(target, bin_hz, 0.01)]
            ms = [q for q in support if abs(q.freq_hz - target) <= _tol(target, bin_hz, 0.01)]
            if m:
                members.append(max(m, key=lambda q: q.amp))
                n_free += 1
            elif ms:
                members.append(max(ms, key=lambda q: q.amp))
        if len(members) >= 3 and n_free >= 2:
            cands.append((sum(q.amp**2 for q in members), p, members))
    for energy, p, members in sorted(cands, key=lambda c: -c[0]):
        if any(q.freq_hz in used for q in members):
            continue
        used.update(q.freq_hz for q in members)
        order = p.freq_hz / f_ref if f_ref else None
        note = _spacing_note(p.freq_hz, f_ref, lf, bin_hz, shaft_speeds)
        fams.append(PeakFamily("harmonics", p.freq_hz, tuple(q.freq_hz for q in members), energy, order,
                               note=f"harmonic family at {p.freq_hz:.2f} Hz"
                               + (f" ({order:.3f}X)" if order else "") + (f"; {note}" if note else "")))
    # equal spacings: at least three peaks c − s, c, c + s (or more) not already in a family
    rest = [p for p in free if p.freq_hz not in used]
    best = []
    for i, a in enumerate(rest):
        for b in rest[i + 1:]:
            s = b.freq_hz - a.freq_hz
            if s <= 3 * bin_hz or s > 0.25 * a.freq_hz:
                continue
            members = [a, b]
            f = b.freq_hz + s
            while True:
                m = [q for q in rest if abs(q.freq_hz - f) <= _tol(f, bin_hz, 0.002) * 1.5]
                if not m:
                    break
                members.append(m[0])
                f += s
            if len(members) >= 3:
                best.append((sum(q.amp**2 for q in members), s, members))
    for energy, s, members in sorted(best, key=lambda c: -c[0]):
        if any(q.freq_hz in used for q in members):
            continue
        used.update(q.freq_hz for q in members)
        carrier = max(members, key=lambda q: q.amp).freq_hz
        note = _spacing_note(s, f_ref, lf, bin_hz, shaft_speeds)
        fams.append(PeakFamily("sidebands", s, tuple(q.freq_hz for q in members), energy,
                               (s / f_ref) if f_ref else None, carrier_hz=carrier,
                               note=f"peaks spaced {s:.2f} Hz around {carrier:.1f} Hz" + (f"; {note}" if note else "")))
    return tuple(fams)


def _spacing_note(s: float, f_ref, lf, bin_hz, shaft_speeds) -> str:
    for name, f1 in shaft_speeds:
        if abs(s - f1) <= _tol(f1, bin_hz, 0.01):
            return f"spacing equals 1X{(' of ' + name) if name else ''}"
    if lf and abs(s - 2 * lf) <= _tol(2 * lf, bin_hz, 0.005):
        return "spacing equals twice line frequency"
    if f_ref and s < f_ref:
        return f"sub-synchronous ({s / f_ref:.3f}X)"
    return ""


def _with_suggestions(acc: AccountedSpectrum, expected: Sequence[Any]) -> AccountedSpectrum:
    """Suggestions for the technician: strong synchronous families no forcing tone explains."""
    from dataclasses import replace

    out: list[str] = []
    f1 = acc.speed_hz
    if f1:
        top = max((p.amp for p in acc.peaks), default=0.0)
        a1 = acc.harmonic_amp(1)
        configured = {round(float(_get(t, "order")), 3) for t in expected if _get(t, "family") in FORCING_FAMILIES}
        for n in range(3, 41):
            if any(abs(n - c) < 0.01 or (c > 0 and abs(n / c - round(n / c)) < 0.01) for c in configured):
                continue
            pn = [p for p in acc.peaks if p.category in ("shaft", "unexplained") and p.order is not None
                  and abs(p.order - n) <= max(SHAFT_TOL * n, LINE_TOL * acc.bin_width_hz / f1)]
            if not pn:
                continue
            an = max(p.amp for p in pn)
            nb = max(acc.harmonic_amp(n - 1), acc.harmonic_amp(n + 1))
            if an < 0.25 * max(a1, 1e-12) and an < 0.2 * top:
                continue
            if an < 2.0 * nb:
                continue
            twice = acc.harmonic_amp(2 * n)
            fam = f"{n}X" + (f", {2 * n}X" if twice > 0 else "")
            out.append(
                f"strong {n}X family ({fam}): a {n}-vane impeller or {n}-blade fan? "
                f"If so, set machine.vanes or machine.blades = {n} in the config."
            )
    for fam in acc.families:
        if fam.kind == "harmonics" and fam.order is not None and fam.order < 1.0:
            out.append(f"sub-synchronous family at {fam.base_hz:.2f} Hz ({fam.order:.3f}X): a belt? "
                       "If the drive has belts, give their sheave diameters and length in the config.")
        elif fam.kind == "harmonics":
            out.append(f"non-synchronous family at {fam.base_hz:.2f} Hz"
                       + (f" ({fam.order:.3f}X)" if fam.order else "")
                       + ": a bearing tone? Give the bearing geometry in the config.")
    return replace(acc, suggestions=tuple(out))


# ───────────────────────────── floor ─────────────────────────────


def region_edges(speed_hz: float | None, fmax_hz: float) -> tuple[tuple[str, float, float], ...]:
    """Named floor regions: below 1X, 1X…10X, 10X…1 kHz, and octaves from 1 kHz up to ``fmax_hz``."""
    out = []
    lo = 1000.0
    if speed_hz:
        out += [("sub-synchronous", 0.2 * speed_hz, 0.95 * speed_hz),
                ("1X-10X", 0.95 * speed_hz, 10.5 * speed_hz)]
        if 10.5 * speed_hz < lo:
            out.append(("10X-1kHz", 10.5 * speed_hz, lo))
        lo = max(lo, 10.5 * speed_hz)
    f = lo
    while f < fmax_hz * 0.99:
        hi = min(2 * f, fmax_hz)
        out.append((f"{f / 1000:g}-{hi / 1000:.3g} kHz", f, hi))
        f = hi
    return tuple(out)


def floor_regions(
    spec: Spectrum,
    speed_hz: float | None,
    *,
    floor: np.ndarray | None = None,
    baseline: Mapping[str, float] | None = None,
    fmax_hz: float | None = None,
) -> tuple[FloorRegion, ...]:
    """Broadband floor per region (band r.m.s. of the running-median floor)."""
    fl = noise_floor(spec) if floor is None else floor
    top = min(spec.fmax_hz, fmax_hz or spec.fmax_hz)
    positive = spec.power > 0
    out = []
    for name, lo, hi in region_edges(speed_hz, top):
        band = slice(*np.searchsorted(spec.f_hz, (lo, hi), side="left"))  # lo <= f < hi (f ascending)
        sel = positive[band]
        if not np.any(sel):
            continue
        level = float(np.sqrt(fl[band][sel].sum() / spec.enbw_bins))
        base = None if baseline is None else baseline.get(name)
        out.append(FloorRegion(name, float(lo), float(hi), level, spec.unit, base))
    return tuple(out)


def hf_floor_densities(regions: Sequence[FloorRegion], f_min_hz: float = 999.0) -> list[tuple[FloorRegion, float]]:
    """The acceleration floor regions from ``f_min_hz`` up (the octaves above 1 kHz), each with its
    level as a density in g/√Hz (octaves differ in width), in frequency order. Velocity regions are left out.
    """
    out = []
    for r in regions:
        if r.f_lo_hz >= f_min_hz and r.f_hi_hz > r.f_lo_hz and r.unit in ("m/s2", "m/s²"):
            out.append((r, r.level / STANDARD_GRAVITY_MS2 / math.sqrt(r.f_hi_hz - r.f_lo_hz)))
    return out


def floor_spread(densities: Sequence[float]) -> float:
    """Median ÷ highest of the high-frequency floor densities: near 1 when the floor is raised evenly
    across the octaves, small when one band (a ringing resonance) stands out; 0 without data."""
    d = sorted(densities)
    return d[len(d) // 2] / d[-1] if d and d[-1] > 0 else 0.0


def find_humps(
    spec: Spectrum,
    floor: np.ndarray | None = None,
    peak_freqs_hz: Sequence[float] = (),
    *,
    min_excess_db: float = 5.0,
    trend_octaves: float = 2.0,
    min_width_lines: float = 4.0,
    min_q: float = 2.0,
    median_lines: int = 5,
    fmin_hz: float | None = None,
) -> tuple[Hump, ...]:
    """Humps of the floor above its broad trend (resonances), with the peaks riding on them.

    Best on a well-averaged spectrum of moderate resolution (a few Hz per
    line). ``floor`` defaults to a running median over ``median_lines``
    lines after masking the tones (lines 10 dB above a 21-line median, then
    6 dB above a 9-line median, with their neighbours), narrow enough to
    keep a hump of a few percent width. The trend is a running median of
    the log floor over ``trend_octaves`` on a log-frequency axis, so a hump
    narrower than about half that (a resonance with Q above ~3) stands out;
    a hump counts when it rises ``min_excess_db`` above the trend and both
    of its flanks rise gradually (a step in the floor is not a hump). ``q``
    is centre ÷ the width at half the hump's height in dB (close to the
    half-power width for a hump of about 6 dB).
    """
    f = spec.f_hz
    if floor is None:  # a narrow median keeps humps a few percent wide
        power = spec.power.copy()
        grow = 4 if spec.window == "blackmanharris" else 2
        idx = np.arange(power.size)
        for size, ratio in ((21, 10.0), (9, 4.0)):  # strong tones first (two may sit close), then the rest
            med = ndimage.median_filter(power, size=size, mode="nearest")
            # each tone line and its ``grow`` neighbours either side (a binary dilation, ``grow`` iterations)
            keep = ~ndimage.maximum_filter1d(power > ratio * med, size=2 * grow + 1, mode="constant", cval=0)
            if np.count_nonzero(keep) > 16:
                lp = np.log(np.maximum(power, 1e-300))
                power = np.exp(np.interp(idx, idx[keep], lp[keep]))
        masked = Spectrum(spec.f_hz, power, spec.quantity, spec.unit, spec.window, spec.bin_width_hz,
                          spec.enbw_bins, spec.n_averages, spec.nperseg)
        floor = noise_floor(masked, width_hz=median_lines * spec.bin_width_hz)
    valid = (spec.power > 0) & (f > max(fmin_hz or 0.0, 8 * spec.bin_width_hz))
    if np.count_nonzero(valid) < 32:
        return ()
    fv = f[valid]
    lv = 10 * np.log10(np.maximum(floor[valid], 1e-300))
    # log-frequency grid, 48 points per octave
    n_oct = math.log2(fv[-1] / fv[0])
    grid = fv[0] * 2.0 ** (np.arange(int(n_oct * 48) + 1) / 48.0)
    lg = np.interp(grid, fv, lv)
    lg = ndimage.median_filter(lg, size=3, mode="nearest")  # steady the median floor itself
    size = max(5, int(trend_octaves * 48)) | 1
    trend = ndimage.median_filter(lg, size=size, mode="nearest")
    ex = lg - trend
    humps = []
    above = ex >= min_excess_db
    i = 0
    while i < above.size:
        if not above[i]:
            i += 1
            continue
        j = i
        while j + 1 < above.size and above[j + 1]:
            j += 1
        if i > 0 and j < above.size - 1:  # not at an edge of the analysed range
            k = i + int(np.argmax(ex[i:j + 1]))
            top = ex[k]
            # width at half the hump's height (in dB) around k: robust to a ragged top
            a = k
            while a > 0 and ex[a - 1] >= top / 2:
                a -= 1
            b = k
            while b < ex.size - 1 and ex[b + 1] >= top / 2:
                b += 1
            width = max(grid[b] - grid[a], grid[k] * (2 ** (1 / 48) - 1))
            # a resonance rises and falls gradually on both sides (a step in the floor does not)
            foot_l = k
            while foot_l > 0 and ex[foot_l - 1] > 1.0:
                foot_l -= 1
            foot_r = k
            while foot_r < ex.size - 1 and ex[foot_r + 1] > 1.0:
                foot_r += 1
            if grid[j] - grid[i] < min_width_lines * spec.bin_width_hz or k - foot_l < 3 or foot_r - k < 3:
                i = j + 1
                continue
            if grid[k] / width < min_q:  # broader than a structural resonance: a floor shape
                i = j + 1
                continue
            lo_hz, hi_hz = float(grid[max(i - 1, 0)]), float(grid[min(j + 1, grid.size - 1)])
            riding = tuple(float(p) for p in peak_freqs_hz if 0.97 * lo_hz <= p <= 1.03 * hi_hz)
            humps.append(Hump(float(grid[k]), lo_hz, hi_hz, float(top), float(grid[k] / width), riding))
        i = j + 1
    return tuple(humps)


__all__ = [
    "AMPLIFIED_CAUTION",
    "AccountedPeak",
    "AccountedSpectrum",
    "CATEGORIES",
    "FloorRegion",
    "Hump",
    "PeakFamily",
    "UNEXPLAINED_CLASSES",
    "account_peaks",
    "find_humps",
    "floor_regions",
    "refine_fundamental",
    "region_edges",
]
