"""Operating state (state detection): stopped / starting / running, speed bin, load bin.

A baseline is only meaningful for one operating state: a pump at 1480 r/min
and the same pump at 1100 r/min on its drive are two different "normals".
:func:`classify` turns the speed estimate and the overall level of one
capture into an :class:`OperatingState`; its ``key`` names the baseline it
belongs to. Captures taken while the speed moves (run-up, run-down, a drive
ramping) are marked transient and are used neither for learning nor for
alarms.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

STOPPED = "stopped"
STARTING = "starting"
RUNNING = "running"
MODES = (STOPPED, STARTING, RUNNING)


@dataclass(frozen=True, slots=True)
class OpStateConfig:
    """How operating states are told apart.

    ``speed_bin_edges_rpm``: increasing edges splitting running speed into
    bins (e.g. bands of a variable-speed drive); empty = one bin.
    ``stopped_vel_mm_s``: overall velocity r.m.s. below which the machine is
    taken as stopped, whatever the speed estimate says. ``min_running_rpm``:
    a found speed below this is stopped too. ``speed_tol_frac`` and
    ``speed_tol_rpm``: a speed change since the last capture, or a speed span
    within the capture, above max(frac·speed, rpm) marks a transient.
    ``load_bin_edges``: optional edges of a load proxy (unit as configured,
    e.g. % or kW); empty = load not used.
    """

    speed_bin_edges_rpm: tuple[float, ...] = ()
    stopped_vel_mm_s: float = 0.2
    min_running_rpm: float = 60.0
    speed_tol_frac: float = 0.02
    speed_tol_rpm: float = 10.0
    load_bin_edges: tuple[float, ...] = ()

    def __post_init__(self) -> None:
        for name in ("speed_bin_edges_rpm", "load_bin_edges"):
            edges = tuple(float(e) for e in getattr(self, name))
            if any(not math.isfinite(e) for e in edges) or any(b <= a for a, b in zip(edges, edges[1:])):
                raise ValueError(f"{name} must be finite and strictly increasing, got {edges}")
            object.__setattr__(self, name, edges)
        if any(e <= 0 for e in self.speed_bin_edges_rpm):
            raise ValueError(f"speed_bin_edges_rpm must be > 0, got {self.speed_bin_edges_rpm}")
        for name in ("stopped_vel_mm_s", "min_running_rpm", "speed_tol_frac", "speed_tol_rpm"):
            v = getattr(self, name)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v >= 0):
                raise ValueError(f"{name} must be a finite number >= 0, got {v!r}")


@dataclass(frozen=True, slots=True)
class OperatingState:
    """The operating state of one capture.

    ``mode`` is "stopped", "starting" or "running"; ``transient`` is True for
    captures not to be used for learning or alarms (a start, a speed change,
    a running machine whose speed is unknown while bins are configured);
    ``key`` names the baseline ("speed0", "speed2-load1"), empty when stopped.
    """

    mode: str
    transient: bool
    speed_hz: float | None
    speed_bin: int | None
    load_bin: int | None
    key: str
    label: str
    reason: str

    @property
    def usable(self) -> bool:
        """True when the capture may be learned from and alarmed on."""
        return self.mode == RUNNING and not self.transient and bool(self.key)

    @property
    def speed_rpm(self) -> float | None:
        return None if self.speed_hz is None else self.speed_hz * 60.0


def bin_index(value: float, edges: tuple[float, ...]) -> int:
    """Index of the bin holding ``value``: 0 below edges[0], len(edges) above the last."""
    i = 0
    for e in edges:
        if value >= e:
            i += 1
    return i


def _bin_label(i: int, edges: tuple[float, ...], unit: str) -> str:
    if not edges:
        return f"any {unit}"
    if i == 0:
        return f"< {edges[0]:g} {unit}"
    if i == len(edges):
        return f">= {edges[-1]:g} {unit}"
    return f"{edges[i - 1]:g}-{edges[i]:g} {unit}"


def classify(
    vel_rms_mm_s: float,
    speed_hz: float | None,
    cfg: OpStateConfig,
    *,
    previous: OperatingState | None = None,
    speed_span_hz: float | None = None,
    load: float | None = None,
) -> OperatingState:
    """Operating state of one capture.

    Parameters
    ----------
    vel_rms_mm_s : overall velocity r.m.s. of the capture, mm/s.
    speed_hz : running speed estimate, Hz (None when no speed was found).
    cfg : the thresholds and bin edges.
    previous : the state of the previous capture (None at start-up).
    speed_span_hz : max − min speed seen within the capture, Hz (None if unknown).
    load : load proxy value (None if not measured).
    """
    if not (math.isfinite(vel_rms_mm_s) and vel_rms_mm_s >= 0):
        raise ValueError(f"vel_rms_mm_s must be finite and >= 0, got {vel_rms_mm_s!r}")
    if speed_hz is not None and not (math.isfinite(speed_hz) and speed_hz >= 0):
        raise ValueError(f"speed_hz must be finite and >= 0 or None, got {speed_hz!r}")
    if speed_hz is None and vel_rms_mm_s < cfg.stopped_vel_mm_s:
        # quiet and no rotation found; a quiet machine whose speed is found is running
        # (bearing tones live above the velocity band)
        return OperatingState(STOPPED, False, speed_hz, None, None, "", "stopped",
                              f"no running speed found and overall {vel_rms_mm_s:.3g} mm/s below "
                              f"{cfg.stopped_vel_mm_s:g} mm/s")
    if speed_hz is not None and speed_hz * 60.0 < cfg.min_running_rpm:
        return OperatingState(STOPPED, False, speed_hz, None, None, "", "stopped",
                              f"speed {speed_hz * 60:.0f} rpm below {cfg.min_running_rpm:g} rpm")

    load_bin = None
    if cfg.load_bin_edges and load is not None:
        load_bin = bin_index(load, cfg.load_bin_edges)
    if speed_hz is None:
        if cfg.speed_bin_edges_rpm:
            return OperatingState(RUNNING, True, None, None, load_bin, "", "speed unknown",
                                  "running but no speed found; speed bins are configured")
        speed_bin = 0
    else:
        speed_bin = bin_index(speed_hz * 60.0, cfg.speed_bin_edges_rpm)
    key = f"speed{speed_bin}"
    label = _bin_label(speed_bin, cfg.speed_bin_edges_rpm, "rpm")
    if load_bin is not None:
        key += f"-load{load_bin}"
        label += f", load {_bin_label(load_bin, cfg.load_bin_edges, '')}".rstrip()

    def tol_hz(f_hz: float) -> float:
        return max(cfg.speed_tol_frac * f_hz, cfg.speed_tol_rpm / 60.0)

    if previous is None or previous.mode == STOPPED:
        return OperatingState(STARTING, True, speed_hz, speed_bin, load_bin, key, label,
                              "first running capture" if previous is None else "started from stopped")
    if speed_hz is not None and speed_span_hz is not None and speed_span_hz > tol_hz(speed_hz):
        return OperatingState(RUNNING, True, speed_hz, speed_bin, load_bin, key, label,
                              f"speed moved {speed_span_hz * 60:.0f} rpm within the capture")
    if speed_hz is not None and previous.speed_hz is not None:
        d = abs(speed_hz - previous.speed_hz)
        if d > tol_hz(speed_hz):
            return OperatingState(RUNNING, True, speed_hz, speed_bin, load_bin, key, label,
                                  f"speed changed {d * 60:.0f} rpm since the last capture")
    if load_bin is None and cfg.load_bin_edges:
        return OperatingState(RUNNING, True, speed_hz, speed_bin, None, "", label,
                              "load proxy configured but not measured")
    return OperatingState(RUNNING, False, speed_hz, speed_bin, load_bin, key, label, "steady")
