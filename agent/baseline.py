"""Baseline: what is normal for this machine, learned per operating state.

For each operating state (key from :mod:`agent.opstate`) the agent collects
a learning period of steady, good-quality captures — at least
``learn_captures`` captures spanning at least ``learn_hours`` — and then
freezes robust statistics of every feature:

* the median (robust centre);
* the spread of the log level, σ_log = 1.4826·MAD(ln x) (MAD scaled to a
  normal standard deviation; F. R. Hampel, JASA 69, 1974). Amplitudes are
  positive and right-skewed, so spreads are taken on their logarithm and an
  alarm level becomes a factor on the median; decibel features are turned
  into the same natural-log amplitude scale (x·ln10/20);
* the 5th and 95th percentiles (for reports).

Memory stays bounded: each feature keeps a reservoir of at most
``reservoir_size`` samples (J. S. Vitter, "Random sampling with a
reservoir", ACM TOMS 11(1), 1985, algorithm R), with replacement indices from
a fixed hash of the sample count so the result is the same on every run.

A state whose learning has not finished is *learning*, never *normal*.
``relearn`` starts learning again (after maintenance); the store archives
the old file first. Pure functions up to :class:`BaselineStore`, the edge.
"""

from __future__ import annotations

import math
import time
import types
import zlib
from collections.abc import Mapping
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from agent.errors import IncompatibleStateFile
from agent.featureset import DECIBEL, FeatureVector, feature_kind
from agent.statefile import read_json_state, set_aside, write_atomic, dump_json_state

FORMAT = "skidvib-baseline"
FORMAT_VERSION = 1
LEARNING = "learning"
READY = "ready"
MAD_TO_SIGMA = 1.4826  # 1/Φ⁻¹(3/4): MAD of a normal sample → its standard deviation
_TINY = 1e-12


def to_log(name: str, value: float) -> float:
    """A feature value on the natural-log amplitude scale (dB → x·ln10/20)."""
    if feature_kind(name) == DECIBEL:
        return float(value) * math.log(10.0) / 20.0
    return math.log(max(float(value), _TINY))


def from_log(name: str, value_log: float) -> float:
    """Inverse of :func:`to_log`."""
    if feature_kind(name) == DECIBEL:
        return float(value_log) * 20.0 / math.log(10.0)
    return math.exp(value_log)


@dataclass(frozen=True, slots=True)
class BaselineConfig:
    """Learning period and memory bound.

    Learning of a state finishes when it has ``learn_captures`` usable
    captures AND they span ``learn_hours`` (0 = no time requirement).
    A feature seen in fewer than ``min_feature_fraction`` of those captures
    gets no statistics (it is judged by absolute limits only).
    """

    learn_captures: int = 100
    learn_hours: float = 0.0
    reservoir_size: int = 256
    min_feature_fraction: float = 0.5

    def __post_init__(self) -> None:
        if not isinstance(self.learn_captures, int) or not 3 <= self.learn_captures <= 100_000:
            raise ValueError(f"learn_captures must be an integer in [3, 100000], got {self.learn_captures!r}")
        if not (isinstance(self.learn_hours, (int, float)) and 0 <= self.learn_hours <= 24 * 365):
            raise ValueError(f"learn_hours must be in [0, 8760], got {self.learn_hours!r}")
        if not isinstance(self.reservoir_size, int) or not 16 <= self.reservoir_size <= 65536:
            raise ValueError(f"reservoir_size must be an integer in [16, 65536], got {self.reservoir_size!r}")
        if not 0 < self.min_feature_fraction <= 1:
            raise ValueError(f"min_feature_fraction must be in (0, 1], got {self.min_feature_fraction!r}")


@dataclass(frozen=True, slots=True)
class FeatureStats:
    """Robust statistics of one feature in one operating state."""

    n: int
    median: float  # in the feature's unit
    median_log: float  # on the log-amplitude scale of to_log()
    spread_log: float  # 1.4826·MAD of the log values
    p05: float
    p95: float

    def to_json(self) -> dict:
        return {k: getattr(self, k) for k in ("n", "median", "median_log", "spread_log", "p05", "p95")}

    @classmethod
    def from_json(cls, d: dict) -> "FeatureStats":
        return cls(int(d["n"]), float(d["median"]), float(d["median_log"]), float(d["spread_log"]),
                   float(d["p05"]), float(d["p95"]))


def robust_stats(name: str, values) -> FeatureStats:
    """Median, log-scale MAD spread and 5/95 % percentiles of a feature's samples."""
    x = np.asarray(values, dtype=np.float64)
    if x.ndim != 1 or x.size == 0:
        raise ValueError(f"need a non-empty 1-D sample for {name!r}")
    logs = np.array([to_log(name, v) for v in x])
    med_log = float(np.median(logs))
    spread = MAD_TO_SIGMA * float(np.median(np.abs(logs - med_log)))
    p05, p95 = np.percentile(x, [5.0, 95.0])
    return FeatureStats(int(x.size), float(np.median(x)), med_log, spread, float(p05), float(p95))


def _slot(count: int, name: str) -> int:
    """Deterministic pseudo-random integer in [0, count) (splitmix64 of count and a name hash)."""
    z = (count * 0x9E3779B97F4A7C15 + zlib.crc32(name.encode())) & 0xFFFFFFFFFFFFFFFF
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & 0xFFFFFFFFFFFFFFFF
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & 0xFFFFFFFFFFFFFFFF
    z ^= z >> 31
    return int(z % count)


def reservoir_add(sample: tuple[float, ...], seen: int, value: float, size: int, name: str) -> tuple[float, ...]:
    """Algorithm R: ``sample`` holds a uniform sample of the first ``seen`` values; add one more."""
    if len(sample) < size:
        return sample + (float(value),)
    j = _slot(seen + 1, name)
    if j < size:
        return sample[:j] + (float(value),) + sample[j + 1 :]
    return sample


def _frozen(d: Mapping) -> Mapping:
    return types.MappingProxyType(dict(sorted(d.items())))


@dataclass(frozen=True, slots=True)
class StateBaseline:
    """Baseline of one operating state: learning (collecting) or ready (frozen statistics)."""

    key: str
    label: str = ""
    status: str = LEARNING
    n_captures: int = 0
    t_first_utc_s: float | None = None
    t_last_utc_s: float | None = None
    t_ready_utc_s: float | None = None
    seen: Mapping[str, int] = field(default_factory=dict)
    samples: Mapping[str, tuple[float, ...]] = field(default_factory=dict)
    stats: Mapping[str, FeatureStats] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.status not in (LEARNING, READY):
            raise ValueError(f"status must be {LEARNING!r} or {READY!r}, got {self.status!r}")
        for name in ("seen", "samples", "stats"):
            object.__setattr__(self, name, _frozen(getattr(self, name)))

    @property
    def ready(self) -> bool:
        return self.status == READY

    def progress(self, cfg: BaselineConfig) -> float:
        """Fraction of the learning period done, 0–1."""
        if self.ready:
            return 1.0
        f = self.n_captures / cfg.learn_captures
        if cfg.learn_hours > 0 and self.t_first_utc_s is not None:
            f = min(f, (self.t_last_utc_s - self.t_first_utc_s) / (cfg.learn_hours * 3600.0))
        return float(min(1.0, f))

    def to_json(self) -> dict:
        return {
            "key": self.key,
            "label": self.label,
            "status": self.status,
            "n_captures": self.n_captures,
            "t_first_utc_s": self.t_first_utc_s,
            "t_last_utc_s": self.t_last_utc_s,
            "t_ready_utc_s": self.t_ready_utc_s,
            "seen": dict(self.seen),
            "samples": {k: list(v) for k, v in self.samples.items()},
            "stats": {k: v.to_json() for k, v in self.stats.items()},
        }

    @classmethod
    def from_json(cls, d: dict) -> "StateBaseline":
        def opt(v):
            return None if v is None else float(v)

        return cls(
            key=str(d["key"]),
            label=str(d["label"]),
            status=str(d["status"]),
            n_captures=int(d["n_captures"]),
            t_first_utc_s=opt(d["t_first_utc_s"]),
            t_last_utc_s=opt(d["t_last_utc_s"]),
            t_ready_utc_s=opt(d["t_ready_utc_s"]),
            seen={str(k): int(v) for k, v in d["seen"].items()},
            samples={str(k): tuple(float(x) for x in v) for k, v in d["samples"].items()},
            stats={str(k): FeatureStats.from_json(v) for k, v in d["stats"].items()},
        )


@dataclass(frozen=True, slots=True)
class Baselines:
    """All operating states' baselines; ``generation`` counts relearns."""

    states: Mapping[str, StateBaseline] = field(default_factory=dict)
    generation: int = 0

    def __post_init__(self) -> None:
        object.__setattr__(self, "states", _frozen(self.states))

    def get(self, key: str) -> StateBaseline | None:
        return self.states.get(key)

    def status(self, key: str) -> str:
        """"ready" or "learning" (a state never seen is learning)."""
        b = self.states.get(key)
        return READY if b is not None and b.ready else LEARNING

    def to_json(self) -> dict:
        return {"generation": self.generation, "states": {k: v.to_json() for k, v in self.states.items()}}

    @classmethod
    def from_json(cls, d: dict) -> "Baselines":
        return cls(states={str(k): StateBaseline.from_json(v) for k, v in d["states"].items()},
                   generation=int(d["generation"]))


def _finish(b: StateBaseline, cfg: BaselineConfig) -> StateBaseline:
    need = max(1, int(math.ceil(cfg.min_feature_fraction * b.n_captures)))
    stats = {name: robust_stats(name, s) for name, s in b.samples.items() if b.seen.get(name, 0) >= need}
    return replace(b, status=READY, t_ready_utc_s=b.t_last_utc_s, samples={}, stats=stats)


def learn(
    baselines: Baselines, key: str, fv: FeatureVector, t_utc_s: float, cfg: BaselineConfig, *, label: str = ""
) -> Baselines:
    """Add one usable capture to the learning of state ``key``; a ready state is left as it is."""
    if not key:
        raise ValueError("an operating-state key is needed to learn (stopped/transient captures are not learned)")
    if not math.isfinite(t_utc_s):
        raise ValueError(f"t_utc_s must be finite, got {t_utc_s!r}")
    b = baselines.states.get(key) or StateBaseline(key=key, label=label)
    if b.ready:
        return baselines
    seen = dict(b.seen)
    samples = dict(b.samples)
    for name, v in fv.values.items():
        n = seen.get(name, 0)
        samples[name] = reservoir_add(samples.get(name, ()), n, v, cfg.reservoir_size, name)
        seen[name] = n + 1
    b = replace(
        b,
        label=b.label or label,
        n_captures=b.n_captures + 1,
        t_first_utc_s=t_utc_s if b.t_first_utc_s is None else b.t_first_utc_s,
        t_last_utc_s=t_utc_s,
        seen=seen,
        samples=samples,
    )
    span_h = (b.t_last_utc_s - b.t_first_utc_s) / 3600.0
    if b.n_captures >= cfg.learn_captures and span_h >= cfg.learn_hours:
        b = _finish(b, cfg)
    states = dict(baselines.states)
    states[key] = b
    return replace(baselines, states=states)


def relearn(baselines: Baselines, key: str | None = None) -> Baselines:
    """Forget the baseline of ``key`` (all states when None) so learning starts again."""
    states = {} if key is None else {k: v for k, v in baselines.states.items() if k != key}
    return Baselines(states=states, generation=baselines.generation + 1)


def to_bytes(baselines: Baselines) -> bytes:
    return dump_json_state(FORMAT, FORMAT_VERSION, baselines.to_json())


def from_document(doc: dict, where: str = "baseline") -> Baselines:
    """Baselines from a parsed, version-checked document; IncompatibleStateFile if its content is malformed."""
    try:
        return Baselines.from_json(doc)
    except (KeyError, TypeError, ValueError, AttributeError) as exc:
        raise IncompatibleStateFile(f"{where}: malformed content ({type(exc).__name__}: {exc})") from exc


class BaselineStore:
    """The baseline file in the state directory (the edge: disk I/O only).

    ``baseline.json`` is written atomically; ``archive/`` keeps the baselines
    replaced by a relearn, named by UTC time and generation.
    """

    FILENAME = "baseline.json"

    def __init__(self, state_dir: str | Path):
        self.state_dir = Path(state_dir)
        self.path = self.state_dir / self.FILENAME
        self.archive_dir = self.state_dir / "archive"

    def load_strict(self) -> Baselines:
        """The stored baselines (empty when there is no file); IncompatibleStateFile when unusable."""
        doc = read_json_state(self.path, FORMAT, FORMAT_VERSION)
        if doc is None:
            return Baselines()
        return from_document(doc, str(self.path))

    def load(self) -> tuple[Baselines, str | None]:
        """The stored baselines, or fresh ones and the problem found.

        An incompatible or damaged file is renamed aside (``baseline.json.bad<n>``)
        and learning restarts; the returned message says what happened.
        """
        try:
            return self.load_strict(), None
        except IncompatibleStateFile as exc:
            moved = set_aside(self.path)
            return Baselines(), f"{exc}; set aside as {moved.name}, learning restarts"

    def save(self, baselines: Baselines) -> None:
        write_atomic(self.path, to_bytes(baselines))

    def archive(self, t_utc_s: float | None = None) -> Path | None:
        """Copy the current file into ``archive/`` (None when there is none); returns the copy's path."""
        if not self.path.exists():
            return None
        data = self.path.read_bytes()
        if t_utc_s is None:
            t_utc_s = time.time()
        stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime(t_utc_s))
        gen = "x"
        try:
            gen = str(self.load_strict().generation)
        except IncompatibleStateFile:
            pass
        target = self.archive_dir / f"baseline-{stamp}-g{gen}.json"
        n = 1
        while target.exists():
            target = self.archive_dir / f"baseline-{stamp}-g{gen}-{n}.json"
            n += 1
        write_atomic(target, data)
        return target

    def relearn(self, baselines: Baselines, key: str | None = None, t_utc_s: float | None = None) -> Baselines:
        """Archive the stored file, forget ``key`` (or all), save and return the new baselines."""
        self.archive(t_utc_s)
        new = relearn(baselines, key)
        self.save(new)
        return new
