"""The feature set of one capture: named scalar levels, each with its unit in its name.

A :class:`FeatureVector` is what the baseline learns and the alarm engine
judges. :func:`build_features` collects it from what the pipeline already
produced — the velocity and acceleration spectra (:mod:`agent.spectra`), the
time-waveform metrics, the order levels and the envelope / bearing-tone
levels — and is tolerant of the optional parts being absent.

Names and units
---------------
``*_mm_s``  velocity r.m.s., mm/s         ``*_g``   acceleration r.m.s. (or peak when named so), g
``*_db``    a level in decibels           ``crest_factor``, ``kurtosis``: dimensionless

Examples: ``vel_rms_mm_s`` (ISO band), ``acc_rms_g``, ``acc_peak_g``,
``crest_factor``, ``kurtosis``, ``order_1x_mm_s``, ``order_0.5x_mm_s``,
``band_2xlf_mm_s``, ``band_<name>_mm_s``, ``env_band_g``, ``bpfo_<bearing>_g``,
``floor_hf_db`` (median noise floor of the acceleration spectrum in the
region, as a density in dB re 1 g²/Hz).
"""

from __future__ import annotations

import math
import types
from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from agent.model import STANDARD_GRAVITY_MS2

if TYPE_CHECKING:  # the spectral core (scipy) is imported only when features are built
    from agent.spectra import Spectrum

AMPLITUDE = "amplitude"
DECIBEL = "db"
DIMENSIONLESS = "dimensionless"
_AMPLITUDE_SUFFIXES = ("_mm_s", "_g", "_um", "_ms2")
_DIMENSIONLESS_NAMES = ("crest_factor", "kurtosis")


def feature_kind(name: str) -> str:
    """"amplitude", "db" or "dimensionless" from a feature's name; ValueError if the unit is unknown."""
    if name.endswith("_db"):
        return DECIBEL
    if name.endswith(_AMPLITUDE_SUFFIXES):
        return AMPLITUDE
    if name in _DIMENSIONLESS_NAMES or name.endswith(_DIMENSIONLESS_NAMES):
        return DIMENSIONLESS
    raise ValueError(
        f"feature name {name!r} carries no known unit; end it with one of "
        f"{_AMPLITUDE_SUFFIXES + ('_db',)} or name a dimensionless metric {_DIMENSIONLESS_NAMES}"
    )


@dataclass(frozen=True, slots=True)
class FeatureVector:
    """Feature name → value for one capture (read-only, names sorted)."""

    values: Mapping[str, float]

    def __post_init__(self) -> None:
        clean: dict[str, float] = {}
        for name in sorted(self.values):
            v = self.values[name]
            feature_kind(name)
            if isinstance(v, bool) or not isinstance(v, (int, float, np.floating, np.integer)):
                raise TypeError(f"feature {name!r} must be a number, got {type(v).__name__}")
            v = float(v)
            if not math.isfinite(v):
                raise ValueError(f"feature {name!r} is not finite: {v!r}")
            if feature_kind(name) != DECIBEL and v < 0:
                raise ValueError(f"feature {name!r} must be >= 0, got {v!r}")
            clean[name] = v
        object.__setattr__(self, "values", types.MappingProxyType(clean))

    def __getitem__(self, name: str) -> float:
        return self.values[name]

    def __contains__(self, name: object) -> bool:
        return name in self.values

    def __len__(self) -> int:
        return len(self.values)

    def names(self) -> tuple[str, ...]:
        return tuple(self.values)

    def to_dict(self) -> dict[str, float]:
        return dict(self.values)

    def replace(self, **changes: float) -> "FeatureVector":
        d = dict(self.values)
        d.update(changes)
        return FeatureVector(d)


def order_feature_name(order: float) -> str:
    """``order_1x_mm_s`` for order 1, ``order_0.5x_mm_s`` for 0.5 (velocity r.m.s.)."""
    return f"order_{float(order):g}x_mm_s"


def _g(value_ms2: float) -> float:
    return float(value_ms2) / STANDARD_GRAVITY_MS2


def _time_features(tm: Mapping[str, float]) -> dict[str, float]:
    out: dict[str, float] = {}
    for name, v in tm.items():
        if v is None:
            continue
        if name.endswith("_ms2"):
            out[name[: -len("_ms2")] + "_g"] = _g(v)
            continue
        try:
            feature_kind(name)
        except ValueError:
            continue  # a metric without a unit (e.g. "skewness") is not used for alarms
        out[name] = float(v)
    return out


def _named_levels(levels: Mapping[str, float], what: str) -> dict[str, float]:
    out: dict[str, float] = {}
    for name, v in levels.items():
        if v is None:
            continue
        if not isinstance(name, str) or not name:
            raise ValueError(f"{what} level names must be non-empty strings, got {name!r}")
        if name.endswith("_ms2"):
            out[name[: -len("_ms2")] + "_g"] = _g(v)
        elif name.endswith(("_g", "_mm_s", "_db")):
            out[name] = float(v)
        else:
            out[name + "_g"] = float(v)  # envelope and bearing-tone levels are in g by convention
    return out


def build_features(
    vel: Spectrum | None = None,
    acc: Spectrum | None = None,
    time_metrics: Mapping[str, float] | None = None,
    order_levels: Mapping[float, float] | None = None,
    envelope_levels: Mapping[str, float] | None = None,
    *,
    iso_band_hz: tuple[float, float] = (10.0, 1000.0),
    line_hz: float | None = 50.0,
    bands_hz: Mapping[str, tuple[float, float]] | None = None,
    floor_regions_hz: Mapping[str, tuple[float, float]] | None = None,
    acc_floor: np.ndarray | None = None,
) -> FeatureVector:
    """The feature vector of one capture from what the pipeline produced.

    Parameters
    ----------
    vel : velocity spectrum (mm/s), from :func:`agent.spectra.velocity_spectrum`.
    acc : acceleration spectrum (m/s²), from :func:`agent.spectra.accel_spectrum`.
    time_metrics : time-waveform metrics; names ending ``_ms2`` are converted
        to g (``acc_rms_ms2`` → ``acc_rms_g``); ``crest_factor``, ``kurtosis``,
        ``vel_rms_mm_s`` and any ``*_g`` / ``*_mm_s`` pass through; names
        without a unit are left out.
    order_levels : order (multiple of running speed) → velocity r.m.s., mm/s.
    envelope_levels : name → level; in g unless the name ends ``_ms2``
        (converted) or ``_db``; a name without a unit suffix gets ``_g``.
    iso_band_hz : band of the overall velocity when ``time_metrics`` has no
        ``vel_rms_mm_s`` (ISO 20816-3: 10–1000 Hz above 600 r/min).
    line_hz : mains frequency for the twice-line-frequency band (None: left out).
    bands_hz : extra named velocity bands, name → (lo, hi) Hz → ``band_<name>_mm_s``.
    floor_regions_hz : name → (lo, hi) Hz → ``floor_<name>_db``; default
        "lf" 10 Hz–1 kHz and "hf" 1 kHz–f_max of the acceleration spectrum.
    acc_floor : ``noise_floor(acc)`` when the caller has it already.

    Every part is optional; a part not given adds no features.
    """
    from agent.spectra import band_rms, noise_floor

    feats: dict[str, float] = {}
    if vel is not None:
        if vel.quantity != "velocity":
            raise ValueError(f"vel must be a velocity spectrum, got {vel.quantity!r}")
        lo, hi = iso_band_hz
        feats["vel_rms_mm_s"] = band_rms(vel, lo, min(hi, vel.fmax_hz))
        if line_hz is not None:
            if not line_hz > 0:
                raise ValueError(f"line_hz must be > 0 or None, got {line_hz!r}")
            half = max(1.0, 3 * vel.bin_width_hz)
            f2 = 2.0 * line_hz
            if f2 + half <= vel.fmax_hz:
                feats["band_2xlf_mm_s"] = band_rms(vel, f2 - half, f2 + half)
        for name, (blo, bhi) in (bands_hz or {}).items():
            if not 0 <= blo < bhi:
                raise ValueError(f"band {name!r}: need 0 <= lo < hi, got ({blo}, {bhi})")
            if blo < vel.fmax_hz:
                feats[f"band_{name}_mm_s"] = band_rms(vel, blo, min(bhi, vel.fmax_hz))
    if acc is not None:
        if acc.quantity != "acceleration":
            raise ValueError(f"acc must be an acceleration spectrum, got {acc.quantity!r}")
        feats["acc_rms_g"] = _g(math.sqrt(float(acc.power.sum()) / acc.enbw_bins))
        regions = floor_regions_hz
        if regions is None:
            regions = {"lf": (10.0, 1000.0), "hf": (1000.0, acc.fmax_hz)}
        floor = noise_floor(acc) if acc_floor is None else acc_floor
        for name, (rlo, rhi) in regions.items():
            sel = (acc.f_hz >= rlo) & (acc.f_hz <= rhi)
            if rlo >= rhi or not sel.any():
                continue
            dens_g2_hz = float(np.median(floor[sel])) / acc.bin_width_hz / STANDARD_GRAVITY_MS2**2
            feats[f"floor_{name}_db"] = 10.0 * math.log10(max(dens_g2_hz, 1e-30))
    if time_metrics:
        feats.update(_time_features(time_metrics))
    if order_levels:
        for order, v in order_levels.items():
            if v is None:
                continue
            if isinstance(order, str):
                feats[order if order.endswith("_mm_s") else order + "_mm_s"] = float(v)
            else:
                if not float(order) > 0:
                    raise ValueError(f"order must be > 0, got {order!r}")
                feats[order_feature_name(order)] = float(v)
    if envelope_levels:
        feats.update(_named_levels(envelope_levels, "envelope"))
    return FeatureVector(feats)


def features_from_analysis(analysis, line_hz: float | None = 50.0) -> FeatureVector:
    """The feature vector of a :class:`agent.pipeline.Analysis`.

    Uses its spectra and overall levels, the order levels of its speed view
    (``analysis.speed.order_levels``, velocity r.m.s. mm/s; orders whose band
    is off the spectrum are left out) and envelope levels from
    ``analysis.extras["envelope_levels_g"]`` (name → g) when the envelope
    stage puts them there.
    """
    o = analysis.overall
    tm = {"vel_rms_mm_s": o.vel_rms_mm_s, "acc_rms_g": o.acc_rms_g, "acc_peak_g": o.acc_peak_g,
          "crest_factor": o.crest_factor, "kurtosis": o.kurtosis}
    extras = getattr(analysis, "extras", None) or {}
    orders = None
    sv = getattr(analysis, "speed", None)
    lv = getattr(sv, "order_levels", None) if sv is not None else None
    if lv is not None and getattr(sv.speed, "found", False):
        if lv.quantity != "velocity" or lv.unit != "mm/s":
            raise ValueError(f"order levels must be velocity in mm/s, got {lv.quantity} in {lv.unit}")
        orders = {k: v for k, v in lv.as_dict().items() if math.isfinite(v)}
    return build_features(analysis.vel, analysis.acc, tm, orders, extras.get("envelope_levels_g"),
                          iso_band_hz=o.iso_band_hz, line_hz=line_hz, acc_floor=getattr(analysis, "acc_floor", None))


_PLAIN = {
    "vel_rms_mm_s": "overall velocity",
    "acc_rms_g": "overall acceleration",
    "acc_peak_g": "peak acceleration",
    "crest_factor": "crest factor (impacting)",
    "kurtosis": "kurtosis (impacting)",
    "band_2xlf_mm_s": "twice-line-frequency vibration",
    "env_band_g": "bearing envelope band",
    "floor_hf_db": "high-frequency noise floor",
    "floor_lf_db": "low-frequency noise floor",
}


def feature_label(name: str) -> str:
    """Plain words for a feature name, for operators: ``order_1x_mm_s`` → ``1X vibration``."""
    if name in _PLAIN:
        return _PLAIN[name]
    if name.startswith("order_") and name.endswith("x_mm_s"):
        return f"{name[len('order_'):-len('x_mm_s')].upper()}X vibration"
    for tone in ("bpfo", "bpfi", "bsf", "ftf"):
        if name.startswith(tone + "_") and name.endswith("_g"):
            return f"{tone.upper()} tone of bearing {name[len(tone) + 1:-2].replace('_', ' ')}"
    if name.startswith("band_") and name.endswith("_mm_s"):
        return f"band {name[5:-5].replace('_', ' ')}"
    return name.replace("_", " ")
