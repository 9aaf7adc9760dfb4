"""Assessment: alarm levels per feature and the alarm engine (health assessment).

Levels of a feature in an operating state with a ready baseline
----------------------------------------------------------------
Let m be the baseline median and σ the log-scale spread (see
:mod:`agent.baseline`). Then

* **alert** = m · max(exp(k·σ), ``min_alert_ratio``) — the statistical
  level (median + k·spread, taken on the log scale so that it is a factor on
  the median), never closer than ×1.5 to normal (so a very steady feature
  does not alarm on changes nobody would act on). For a feature of ordinary
  scatter this is at most the common-practice ratio ×2 (+6 dB; REFERENCES
  §9), so a doubling is an alert. We did *not* take the higher of ×2 and the
  statistical level: that would put a 2× step right on the limit and detect
  it only half of the time. Where the feature's own scatter puts exp(k·σ)
  above ×2, the statistical level is kept (anything lower would cry wolf) and
  the feature is flagged ``noisy`` — also when a doubling sits less than 2σ
  above its alert level: a doubling of such a feature cannot be told from its
  normal scatter within the persistence window every time.
* **danger** = m · max(``danger_ratio``, alert factor · danger_ratio/alert_ratio)
  (common practice ×4, +12 dB; twice the alert factor for a noisy feature).
* Amplitude features never alarm below ``min_level_mm_s`` / ``min_level_g``
  (levels at the noise floor of the measurement mean nothing).

Absolute limits: the overall velocity ``vel_rms_mm_s`` is also judged
against ISO 20816-3 zones (the table in :mod:`agent.features`, values from memory): by
default zone C → alert, zone D → danger. They apply from the first running
capture, also while a baseline is still being learned. The lower of the
absolute and relative level rules.

Alarm logic per feature (OPC UA Part 9 B.1.5 on-delay/deadband ideas)
---------------------------------------------------------------------
* persistence: a level is raised when at least N of the last M usable
  captures exceed it (default 2 of 3);
* hysteresis: a raised level clears after N consecutive captures below
  ``hysteresis`` × the level (default 0.8, in amplitude: −1.9 dB for a
  decibel feature);
* rate of change: over the last ``rate_window`` usable captures of one
  operating state (the history restarts when the state changes, after a
  stop and after a transient capture), the median
  of the newest three above the median of the oldest three by a factor of at
  least max(``rate_ratio``, exp(k·σ·√2)), and above the baseline median,
  counts as an alert exceedance;
* latch: with ``latch`` on, a raised level stays shown until acknowledged;
* stop: when the machine is confirmed stopped (a second stopped capture in a
  row: one alone may be a misread speed), every feature's live level, persistence
  count and history restart (a latched level stays), so the first captures
  after a restart — a start-up transient, or a repaired machine — are not
  shown at the alarm level from before the stop; a fault still there is
  raised again by the usual N of M judged captures.

The machine state is the worst feature state (alert/danger), else normal,
or learning while the operating state has no finished baseline; sensor_fault
when the quality gate failed (never a machine alarm), stopped when stopped.
Every change is an :class:`AlarmEvent` (time, scope, feature, value, level,
reason). All time comes from the capture timestamp; the engine state is a
plain value that serialises to JSON and back exactly.
"""

from __future__ import annotations

import math
import statistics
import types
from collections.abc import Mapping
from dataclasses import dataclass, field, replace

from agent.baseline import Baselines, BaselineConfig, FeatureStats, from_log, learn, to_log
from agent.errors import IncompatibleStateFile
from agent.featureset import AMPLITUDE, FeatureVector, feature_kind, feature_label
from agent.features import ISO20816_3_VELOCITY_MM_S, iso_zone
from agent.model import MachineState
from agent.opstate import STOPPED, OperatingState, OpStateConfig

NORMAL, ALERT, DANGER = 0, 1, 2
LEVEL_NAMES = ("normal", "alert", "danger")
ISO_FEATURE = "vel_rms_mm_s"
ZONES = ("A", "B", "C", "D")
ENGINE_FORMAT = "skidvib-alarm-engine"
ENGINE_VERSION = 1


@dataclass(frozen=True, slots=True)
class AlarmConfig:
    """Alarm settings (``[alarms]``; ISO group/support come from ``[machine]``)."""

    alert_ratio: float = 2.0  # common practice, ×2 = +6 dB
    danger_ratio: float = 4.0  # common practice, ×4 = +12 dB
    min_alert_ratio: float = 1.5
    k_spread: float = 4.0
    min_spread_log: float = 0.02  # floor on σ_log (2 %), for features steadier than their estimate
    min_level_mm_s: float = 0.01
    min_level_g: float = 0.001
    persistence_n: int = 2
    persistence_m: int = 3
    hysteresis: float = 0.8
    latch: bool = False
    rate_ratio: float = 1.5  # 0 switches the rate-of-change alarm off
    rate_window: int = 12
    use_iso_zones: bool = True
    iso_group: int = 2
    iso_support: str = "rigid"
    iso_alert_zone: str = "C"
    iso_danger_zone: str = "D"

    def __post_init__(self) -> None:
        def num(name, lo, hi=math.inf, lo_open=False):
            v = getattr(self, name)
            ok = isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)
            ok = ok and (v > lo if lo_open else v >= lo) and v <= hi
            if not ok:
                raise ValueError(f"{name} must be a number in {'(' if lo_open else '['}{lo}, {hi}], got {v!r}")

        num("min_alert_ratio", 1.0, lo_open=True)
        num("alert_ratio", self.min_alert_ratio)
        num("danger_ratio", self.alert_ratio, lo_open=True)
        num("k_spread", 0.0, lo_open=True)
        num("min_spread_log", 0.0)
        num("min_level_mm_s", 0.0)
        num("min_level_g", 0.0)
        num("hysteresis", 0.0, 1.0, lo_open=True)
        num("rate_ratio", 0.0)
        if 0 < self.rate_ratio <= 1:
            raise ValueError(f"rate_ratio must be 0 (off) or > 1, got {self.rate_ratio!r}")
        for name in ("persistence_n", "persistence_m", "rate_window"):
            if not isinstance(getattr(self, name), int) or getattr(self, name) < 1:
                raise ValueError(f"{name} must be an integer >= 1, got {getattr(self, name)!r}")
        if self.persistence_n > self.persistence_m:
            raise ValueError(f"persistence_n ({self.persistence_n}) must be <= persistence_m ({self.persistence_m})")
        if self.rate_window < 6:
            raise ValueError(f"rate_window must be >= 6 captures, got {self.rate_window}")
        if (self.iso_group, self.iso_support) not in ISO20816_3_VELOCITY_MM_S:
            raise ValueError(f"no ISO 20816-3 limits for iso_group={self.iso_group!r}, "
                             f"iso_support={self.iso_support!r}; have {sorted(ISO20816_3_VELOCITY_MM_S)}")
        if self.iso_alert_zone not in ZONES[1:] or self.iso_danger_zone not in ZONES[1:]:
            raise ValueError(f"iso zones must be one of {ZONES[1:]}, got {self.iso_alert_zone!r}, {self.iso_danger_zone!r}")
        if ZONES.index(self.iso_danger_zone) < ZONES.index(self.iso_alert_zone):
            raise ValueError("iso_danger_zone must not be below iso_alert_zone")


@dataclass(frozen=True, slots=True)
class Levels:
    """Alert and danger level of one feature (feature unit), with where each came from."""

    alert: float | None
    danger: float | None
    alert_source: str = ""
    danger_source: str = ""
    noisy: bool = False


def _min_level(name: str, cfg: AlarmConfig) -> float:
    if feature_kind(name) != AMPLITUDE:
        return -math.inf
    if name.endswith("_mm_s"):
        return cfg.min_level_mm_s
    if name.endswith("_g"):
        return cfg.min_level_g
    return 0.0


def _zone_edge(zone: str, edges: tuple[float, float, float]) -> float:
    return edges[ZONES.index(zone) - 1]


def feature_levels(name: str, stats: FeatureStats | None, cfg: AlarmConfig) -> Levels:
    """Alert/danger levels of feature ``name`` from its baseline ``stats`` (None: absolute limits only)."""
    alert = danger = None
    a_src = d_src = ""
    noisy = False
    if stats is not None:
        sigma = max(stats.spread_log, cfg.min_spread_log)
        stat_factor = math.exp(cfg.k_spread * sigma)
        a_fac = max(stat_factor, cfg.min_alert_ratio)
        noisy = math.log(cfg.alert_ratio / a_fac) < 2.0 * sigma
        d_fac = max(cfg.danger_ratio, a_fac * cfg.danger_ratio / cfg.alert_ratio)
        floor = _min_level(name, cfg)
        alert = max(from_log(name, stats.median_log + math.log(a_fac)), floor)
        danger = max(from_log(name, stats.median_log + math.log(d_fac)), floor)
        a_src = f"×{a_fac:.2f} baseline"
        d_src = f"×{d_fac:g} baseline"
    if cfg.use_iso_zones and name == ISO_FEATURE:
        edges = ISO20816_3_VELOCITY_MM_S[(cfg.iso_group, cfg.iso_support)]
        ia = _zone_edge(cfg.iso_alert_zone, edges)
        idg = _zone_edge(cfg.iso_danger_zone, edges)
        src = f"ISO 20816-3 group {cfg.iso_group} {cfg.iso_support}"
        if alert is None or ia < alert:
            alert, a_src = ia, f"{src} zone {cfg.iso_alert_zone}"
        if danger is None or idg < danger:
            danger, d_src = idg, f"{src} zone {cfg.iso_danger_zone}"
    return Levels(alert, danger, a_src, d_src, noisy)


@dataclass(frozen=True, slots=True)
class FeatureAlarm:
    """Alarm state of one feature (a plain, serialisable value)."""

    level: int = NORMAL  # live level after persistence and hysteresis
    latched: int = NORMAL  # highest level since the last acknowledgement (latch mode)
    recent: tuple[int, ...] = ()  # raw exceedance levels of the last M usable captures
    below: int = 0  # consecutive captures below the clearing level
    history: tuple[float, ...] = ()  # log values of the last rate_window usable captures
    since_utc_s: float | None = None

    def shown(self, cfg: AlarmConfig) -> int:
        return max(self.level, self.latched) if cfg.latch else self.level

    def to_json(self) -> dict:
        return {"level": self.level, "latched": self.latched, "recent": list(self.recent), "below": self.below,
                "history": list(self.history), "since_utc_s": self.since_utc_s}

    @classmethod
    def from_json(cls, d: dict) -> "FeatureAlarm":
        return cls(int(d["level"]), int(d["latched"]), tuple(int(x) for x in d["recent"]), int(d["below"]),
                   tuple(float(x) for x in d["history"]),
                   None if d["since_utc_s"] is None else float(d["since_utc_s"]))


@dataclass(frozen=True, slots=True)
class AlarmEvent:
    """One change of state: of a feature (scope "feature") or of the machine (scope "machine")."""

    t_utc_s: float
    scope: str
    old: str
    new: str
    feature: str = ""
    value: float | None = None
    level: float | None = None
    reason: str = ""

    def to_json(self) -> dict:
        return {"t_utc_s": self.t_utc_s, "scope": self.scope, "old": self.old, "new": self.new,
                "feature": self.feature, "value": self.value, "level": self.level, "reason": self.reason}


@dataclass(frozen=True, slots=True)
class EngineState:
    """Everything the engine remembers between captures."""

    machine: MachineState = MachineState.LEARNING
    since_utc_s: float | None = None
    features: Mapping[str, FeatureAlarm] = field(default_factory=dict)
    op_previous: OperatingState | None = None
    reason: str = ""
    history_key: str = ""  # operating state of the rate-of-change histories (cleared when it changes)

    def __post_init__(self) -> None:
        object.__setattr__(self, "features", types.MappingProxyType(dict(sorted(self.features.items()))))

    def to_json(self) -> dict:
        op = self.op_previous
        return {
            "format": ENGINE_FORMAT,
            "version": ENGINE_VERSION,
            "machine": self.machine.value,
            "since_utc_s": self.since_utc_s,
            "reason": self.reason,
            "history_key": self.history_key,
            "features": {k: v.to_json() for k, v in self.features.items()},
            "op_previous": None if op is None else {
                "mode": op.mode, "transient": op.transient, "speed_hz": op.speed_hz, "speed_bin": op.speed_bin,
                "load_bin": op.load_bin, "key": op.key, "label": op.label, "reason": op.reason},
        }

    @classmethod
    def from_json(cls, d: dict) -> "EngineState":
        """Restore a saved engine state; IncompatibleStateFile if it is of another format/version or malformed."""
        if not isinstance(d, dict) or d.get("format") != ENGINE_FORMAT:
            raise IncompatibleStateFile(f"not an alarm-engine state (format {d.get('format') if isinstance(d, dict) else None!r})")
        if d.get("version") != ENGINE_VERSION:
            raise IncompatibleStateFile(
                f"alarm-engine state has version {d.get('version')!r}; this agent reads version {ENGINE_VERSION}")
        try:
            op = d["op_previous"]
            return cls(
                machine=MachineState(d["machine"]),
                since_utc_s=None if d["since_utc_s"] is None else float(d["since_utc_s"]),
                features={str(k): FeatureAlarm.from_json(v) for k, v in d["features"].items()},
                op_previous=None if op is None else OperatingState(**op),
                reason=str(d["reason"]),
                history_key=str(d["history_key"]),
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise IncompatibleStateFile(f"alarm-engine state is malformed ({type(exc).__name__}: {exc})") from exc


@dataclass(frozen=True, slots=True)
class FeatureAssessment:
    name: str
    value: float
    state: str
    alert: float | None
    danger: float | None
    ratio: float | None  # value / baseline median (amplitude scale), None without a baseline
    reason: str


@dataclass(frozen=True, slots=True)
class Assessment:
    """The verdict on one capture."""

    t_utc_s: float
    machine: MachineState
    reason: str
    op: OperatingState | None
    baseline_status: str  # "ready", "learning" or "" (not running)
    learning_progress: float
    iso_zone: str | None
    features: tuple[FeatureAssessment, ...]
    events: tuple[AlarmEvent, ...]


def _rate_exceeded(history: tuple[float, ...], stats: FeatureStats | None, cfg: AlarmConfig) -> tuple[bool, float]:
    if cfg.rate_ratio == 0 or stats is None or len(history) < cfg.rate_window:
        return False, 0.0
    old = statistics.median(history[:3])
    new = statistics.median(history[-3:])
    sigma = max(stats.spread_log, cfg.min_spread_log)
    need = max(math.log(cfg.rate_ratio), cfg.k_spread * sigma * math.sqrt(2.0))
    return (new - old) >= need and new > stats.median_log, math.exp(new - old)


def _clear_level(name: str, level: float, cfg: AlarmConfig) -> float:
    """``hysteresis`` × ``level`` in amplitude (for a dB feature: level + 20·log10(hysteresis))."""
    return from_log(name, to_log(name, level) + math.log(cfg.hysteresis))


def _update_feature(fa: FeatureAlarm, name: str, value: float, lv: Levels, stats: FeatureStats | None,
                    t_s: float, cfg: AlarmConfig) -> tuple[FeatureAlarm, str]:
    """One usable capture through one feature's alarm machine; returns the new state and the reason."""
    history = fa.history
    if stats is not None:
        history = (history + (to_log(name, value),))[-cfg.rate_window:]
    rate_hit, rate_fac = _rate_exceeded(history, stats, cfg)
    raw = NORMAL
    if lv.alert is not None and value > lv.alert:
        raw = ALERT
    if rate_hit:
        raw = max(raw, ALERT)
    if lv.danger is not None and value > lv.danger:
        raw = DANGER
    recent = (fa.recent + (raw,))[-cfg.persistence_m:]
    level = fa.level
    reason = ""
    for s in (DANGER, ALERT):
        if s > level and sum(1 for r in recent if r >= s) >= cfg.persistence_n:
            level = s
            lim = lv.danger if s == DANGER else lv.alert
            src = lv.danger_source if s == DANGER else lv.alert_source
            if s == ALERT and rate_hit and not (lv.alert is not None and value > lv.alert):
                reason = f"rising ×{rate_fac:.2f} over {cfg.rate_window} captures"
            else:
                reason = f"{value:.4g} above {LEVEL_NAMES[s]} level {lim:.4g} ({src}) in " \
                         f"{sum(1 for r in recent if r >= s)} of the last {len(recent)} captures"
            break
    below = fa.below
    if level == fa.level and level > NORMAL:
        lim = lv.danger if level == DANGER else lv.alert
        clear_at = None if lim is None else _clear_level(name, lim, cfg)
        if clear_at is None or (value < clear_at and not (level == ALERT and rate_hit)):
            below += 1
        else:
            below = 0
        if below >= cfg.persistence_n:
            new = NORMAL
            if level == DANGER and lv.alert is not None and value >= _clear_level(name, lv.alert, cfg):
                new = ALERT
            reason = (f"{value:.4g} below {cfg.hysteresis:g}× {LEVEL_NAMES[level]} level"
                      + ("" if lim is None else f" {lim:.4g}") + f" for {below} captures")
            level, below = new, 0
            recent = ()
    else:
        below = 0
    latched = max(fa.latched, level) if cfg.latch else NORMAL
    since = fa.since_utc_s if level == fa.level else t_s
    return FeatureAlarm(level, latched, recent, below, history, since), reason


def _worst(features: Mapping[str, FeatureAlarm], cfg: AlarmConfig) -> tuple[int, str]:
    worst, who = NORMAL, ""
    for name, fa in features.items():
        s = fa.shown(cfg)
        if s > ALERT and feature_kind(name) != AMPLITUDE:
            # a noise-floor rise, crest factor or kurtosis alone is an early sign, not a reason to stop
            # the machine: the machine state goes to danger only on an amplitude (our own rule)
            s = ALERT
        if s > worst:
            worst, who = s, name
    return worst, who


def _overall(features: Mapping[str, FeatureAlarm], ready: bool, cfg: AlarmConfig) -> tuple[MachineState, str, str]:
    worst, who = _worst(features, cfg)
    if worst == DANGER:
        return MachineState.DANGER, who, f"{feature_label(who)} at danger level ({who})"
    if worst == ALERT:
        return MachineState.ALERT, who, f"{feature_label(who)} at alert level ({who})"
    if ready:
        return MachineState.NORMAL, "", "all features within their levels"
    return MachineState.LEARNING, "", "learning what is normal for this operating state"


def step(
    engine: EngineState,
    baselines: Baselines,
    fv: FeatureVector | None,
    op: OperatingState,
    t_utc_s: float,
    cfg: AlarmConfig,
    bcfg: BaselineConfig,
    *,
    quality_ok: bool = True,
    quality_problems: tuple[str, ...] = (),
) -> tuple[EngineState, Baselines, Assessment]:
    """Judge one capture, learn from it when it is usable, and return the new engine state and baselines.

    ``op`` comes from :func:`agent.opstate.classify`; ``quality_ok`` from the
    quality gate (a failed capture gives sensor_fault and touches nothing else).
    """
    if not math.isfinite(t_utc_s):
        raise ValueError(f"t_utc_s must be finite, got {t_utc_s!r}")
    events: list[AlarmEvent] = []
    feats = dict(engine.features)
    f_out: list[FeatureAssessment] = []
    base_status = ""
    progress = 0.0
    zone = None
    worst_name = ""
    history_key = engine.history_key

    if not quality_ok:
        machine = MachineState.SENSOR_FAULT
        reason = "sensor or data problem: " + (", ".join(quality_problems) or "quality gate failed")
        new_op = engine.op_previous
    elif op.mode == STOPPED:
        machine, reason, new_op = MachineState.STOPPED, f"machine stopped ({op.reason})", op
        history_key = ""
        # nothing is judged while stopped, and what runs after a confirmed stop (two stopped captures
        # in a row: a repair, a start-up; one alone may be a misread speed) is judged afresh: each
        # feature's live alarm restarts (on-delay and hysteresis count again); a latched alarm stays
        # shown until acknowledged
        confirmed = engine.op_previous is not None and engine.op_previous.mode == STOPPED
        for name, fa in engine.features.items() if confirmed else ():
            fresh = FeatureAlarm(latched=fa.latched)
            if fresh != fa:
                feats[name] = fresh
                if fresh.shown(cfg) != fa.shown(cfg):
                    events.append(AlarmEvent(t_utc_s, "feature", LEVEL_NAMES[fa.shown(cfg)],
                                             LEVEL_NAMES[fresh.shown(cfg)], name, None, None,
                                             "machine stopped: judged afresh when it runs again"))
    else:
        new_op = op
        sb = baselines.get(op.key) if op.key else None
        ready = sb is not None and sb.ready
        base_status = "ready" if ready else "learning"
        progress = 1.0 if ready else (0.0 if sb is None else sb.progress(bcfg))
        if fv is not None and ISO_FEATURE in fv:
            zone = iso_zone(fv[ISO_FEATURE], cfg.iso_group, cfg.iso_support)
        if op.usable and fv is not None:
            if op.key != history_key:  # another operating state: a rise against the last one's values means nothing
                feats = {k: replace(v, history=()) for k, v in feats.items()}
                history_key = op.key
            for name, value in fv.values.items():
                stats = sb.stats.get(name) if ready else None
                lv = feature_levels(name, stats, cfg)
                old = feats.get(name, FeatureAlarm())
                new, why = _update_feature(old, name, value, lv, stats, t_utc_s, cfg)
                feats[name] = new
                if new.shown(cfg) != old.shown(cfg):
                    lim = lv.danger if new.shown(cfg) == DANGER else lv.alert
                    events.append(AlarmEvent(t_utc_s, "feature", LEVEL_NAMES[old.shown(cfg)],
                                             LEVEL_NAMES[new.shown(cfg)], name, value, lim,
                                             why or "latched until acknowledged"))
                ratio = None
                if stats is not None:
                    ratio = math.exp(to_log(name, value) - stats.median_log)
                f_out.append(FeatureAssessment(name, value, LEVEL_NAMES[new.shown(cfg)], lv.alert, lv.danger,
                                               ratio, why))
            baselines_next = learn(baselines, op.key, fv, t_utc_s, bcfg, label=op.label) if not ready else baselines
        else:
            baselines_next = baselines
        machine, worst_name, reason = _overall(feats, ready, cfg)
        if not op.usable:
            history_key = ""  # conditions changed (start, speed change): rates restart after it
            reason += f" (capture not judged: {op.reason})"
        baselines = baselines_next

    if machine != engine.machine:
        fa_val = lvl = None
        for fa in f_out:
            if fa.name == worst_name:
                fa_val = fa.value
                lvl = fa.danger if machine == MachineState.DANGER else fa.alert
        events.append(AlarmEvent(t_utc_s, "machine", engine.machine.value, machine.value, worst_name,
                                 fa_val, lvl, reason))
    since = engine.since_utc_s if machine == engine.machine else t_utc_s
    engine = EngineState(machine, since, feats, new_op, reason, history_key)
    return engine, baselines, Assessment(t_utc_s, machine, reason, op if quality_ok else None, base_status,
                                         progress, zone, tuple(f_out), tuple(events))


def acknowledge(engine: EngineState, t_utc_s: float, cfg: AlarmConfig, feature: str | None = None
                ) -> tuple[EngineState, tuple[AlarmEvent, ...]]:
    """Acknowledge latched alarms (of one feature, or all): each falls back to its live level."""
    feats = dict(engine.features)
    events = []
    for name, fa in engine.features.items():
        if feature is not None and name != feature:
            continue
        if fa.latched != fa.level:
            new = replace(fa, latched=fa.level)
            feats[name] = new
            if new.shown(cfg) != fa.shown(cfg):
                events.append(AlarmEvent(t_utc_s, "feature", LEVEL_NAMES[fa.shown(cfg)], LEVEL_NAMES[new.shown(cfg)],
                                         name, None, None, "acknowledged"))
    machine = engine.machine
    reason = engine.reason
    if machine in (MachineState.ALERT, MachineState.DANGER):
        worst, who = _worst(feats, cfg)
        if worst == NORMAL:
            machine, reason = MachineState.NORMAL, "acknowledged; all features within their levels"
        else:
            machine = MachineState.DANGER if worst == DANGER else MachineState.ALERT
            reason = f"{feature_label(who)} at {LEVEL_NAMES[worst]} level ({who})"
        if machine != engine.machine:
            events.append(AlarmEvent(t_utc_s, "machine", engine.machine.value, machine.value, who, None, None,
                                     "acknowledged"))
    since = engine.since_utc_s if machine == engine.machine else t_utc_s
    return replace(engine, machine=machine, since_utc_s=since, features=feats, reason=reason), tuple(events)


def reset_alarms(engine: EngineState, t_utc_s: float, reason: str = "relearn") -> tuple[EngineState, tuple[AlarmEvent, ...]]:
    """Clear every feature's alarm state (after a relearn): the machine goes back to learning."""
    events = []
    if engine.machine != MachineState.LEARNING:
        events.append(AlarmEvent(t_utc_s, "machine", engine.machine.value, MachineState.LEARNING.value,
                                 reason=reason))
    return EngineState(MachineState.LEARNING, t_utc_s, {}, engine.op_previous, reason, ""), tuple(events)


def settings(cfg) -> tuple[OpStateConfig, BaselineConfig, AlarmConfig]:
    """Operating-state, baseline and alarm settings from an :class:`agent.config.AgentConfig`."""
    b, al, m = cfg.baseline, cfg.alarms, cfg.machine
    op = OpStateConfig(speed_bin_edges_rpm=tuple(b.speed_bin_edges_rpm), stopped_vel_mm_s=b.stopped_vel_mm_s,
                       min_running_rpm=b.min_running_rpm, speed_tol_frac=b.speed_tol_frac,
                       speed_tol_rpm=b.speed_tol_rpm)
    bc = BaselineConfig(learn_captures=b.learn_captures, learn_hours=b.learn_hours, reservoir_size=b.reservoir_size)
    ac = AlarmConfig(alert_ratio=al.alert_ratio, danger_ratio=al.danger_ratio, min_alert_ratio=al.min_alert_ratio,
                     k_spread=al.k_spread, min_spread_log=al.min_spread_log, min_level_mm_s=al.min_level_mm_s,
                     min_level_g=al.min_level_g, persistence_n=al.persistence_n, persistence_m=al.persistence_m,
                     hysteresis=al.hysteresis, latch=al.latch, rate_ratio=al.rate_ratio, rate_window=al.rate_window,
                     use_iso_zones=al.use_iso_zones, iso_group=m.iso_group, iso_support=m.support,
                     iso_alert_zone=al.iso_alert_zone, iso_danger_zone=al.iso_danger_zone)
    return op, bc, ac


def judge_analysis(engine: EngineState, baselines: Baselines, analysis, cfg, *, quality_ok: bool = True,
                   quality_problems: tuple[str, ...] = ()) -> tuple[EngineState, Baselines, Assessment]:
    """One :class:`agent.pipeline.Analysis` through operating state, learning and alarms (for the monitor step).

    The speed and its span within the capture come from the analysis' speed
    view (``analysis.speed``). Without a speed stage at all, speed bins cannot
    be told apart and the machine is treated as one operating state.
    """
    from agent.featureset import features_from_analysis
    from agent.opstate import classify

    op_cfg, b_cfg, a_cfg = settings(cfg)
    sv = getattr(analysis, "speed", None)
    speed_hz = span_hz = None
    if sv is None:
        # no speed stage: speed bins cannot be told apart, and a change of speed would look like a
        # rise, so the rate-of-change alarm is off too
        op_cfg = replace(op_cfg, speed_bin_edges_rpm=())
        a_cfg = replace(a_cfg, rate_ratio=0.0)
    elif sv.speed.found:
        speed_hz = sv.speed.speed_hz
        if sv.profile is not None:
            span_hz = sv.profile.span_hz
    fv = features_from_analysis(analysis, cfg.machine.line_hz)
    op = classify(fv[ISO_FEATURE], speed_hz, op_cfg, previous=engine.op_previous, speed_span_hz=span_hz)
    return step(engine, baselines, fv, op, analysis.capture.t0_utc_s, a_cfg, b_cfg,
                quality_ok=quality_ok, quality_problems=quality_problems)
