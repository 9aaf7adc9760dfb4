"""The nouns passed between pipeline stages: frozen dataclasses, no I/O.

Units are in the field names (SI inside: m/s², Hz, s; mm/s only where named).
Arrays are made read-only on construction so a stage cannot change what
another stage holds.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass, field

import numpy as np

STANDARD_GRAVITY_MS2 = 9.80665  # ISO 80000-3 standard acceleration of free fall


def _readonly(arr, dtype=np.float64) -> np.ndarray:
    out = np.array(arr, dtype=dtype, copy=True)
    out.setflags(write=False)
    return out


@dataclass(frozen=True, slots=True)
class Capture:
    """One block of accelerometer samples from one channel.

    ``accel_ms2`` is acceleration in m/s²; ``t0_utc_s`` the UTC epoch time of
    the first sample; ``seq`` the source's capture counter (gaps show lost
    captures); ``flags`` are the source's own remarks ("input_overflow",
    "gap", "clipped_at_source", ...).
    """

    accel_ms2: np.ndarray
    fs_hz: float
    t0_utc_s: float = 0.0
    channel: str = "ch0"
    source_id: str = "unknown"
    seq: int = 0
    flags: frozenset[str] = frozenset()
    full_scale_ms2: float | None = None  # input range in m/s², when the source knows it
    bias_v: float | None = None  # IEPE bias voltage, when the source can measure it

    def __post_init__(self) -> None:
        arr = _readonly(self.accel_ms2)
        if arr.ndim != 1:
            raise ValueError(f"Capture.accel_ms2 must be 1-D, got shape {arr.shape}")
        if not self.fs_hz > 0:
            raise ValueError(f"Capture.fs_hz must be > 0, got {self.fs_hz!r}")
        object.__setattr__(self, "accel_ms2", arr)
        object.__setattr__(self, "flags", frozenset(self.flags))

    @property
    def n_samples(self) -> int:
        return int(self.accel_ms2.size)

    @property
    def duration_s(self) -> float:
        return self.n_samples / self.fs_hz


class Severity(enum.IntEnum):
    """How bad a finding is; ordered so that max() gives the worst."""

    INFO = 0
    WATCH = 1
    ALERT = 2
    DANGER = 3


class MachineState(str, enum.Enum):
    """The one state per machine the operator sees."""

    LEARNING = "learning"
    NORMAL = "normal"
    ALERT = "alert"
    DANGER = "danger"
    SENSOR_FAULT = "sensor_fault"
    STOPPED = "stopped"
    OFFLINE = "offline"


@dataclass(frozen=True, slots=True)
class Peak:
    """One spectral peak: interpolated frequency and amplitude.

    ``amp`` is in the unit and basis of the spectrum it came from
    (see ``Spectrum.unit`` / ``Spectrum.basis``); ``height_db`` is its height
    above the local noise floor.
    """

    freq_hz: float
    amp: float
    height_db: float
    bin_idx: int
    label: str = ""
    family: str = ""
    order: float | None = None


@dataclass(frozen=True, slots=True)
class Finding:
    """A fault hypothesis with its evidence, ready for advice and publishing."""

    code: str
    confidence: float
    severity: Severity = Severity.INFO
    title: str = ""
    evidence: tuple[dict, ...] = ()
    component: str = ""  # e.g. a bearing name, "motor", "pump"
    stage: int | None = None
    action: str = ""
    urgency: str = ""  # "act_now" | "within_days" | "plan" | "watch"
    confirm: tuple[str, ...] = ()
    extra: dict = field(default_factory=dict)

    def to_json(self) -> dict:
        return {
            "code": self.code,
            "confidence": round(float(self.confidence), 3),
            "severity": self.severity.name.lower(),
            "title": self.title,
            "component": self.component,
            "stage": self.stage,
            "evidence": list(self.evidence),
            "action": self.action,
            "urgency": self.urgency,
            "confirm": list(self.confirm),
            **({"bearing": self.extra["bearing"]} if "bearing" in self.extra else {}),
        }
