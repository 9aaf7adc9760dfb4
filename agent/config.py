"""Strict TOML configuration → frozen :class:`AgentConfig`.

Every check is made here, once, at start-up (or reload): unknown keys
(with a "did you mean" hint), wrong types, values out of range and
inconsistent combinations are all collected and reported together, each
with the file, the dotted key, the bad value and what is allowed.

The schema is the dataclasses below. A field's ``metadata`` may carry:

* ``range=(lo, hi)`` inclusive numeric bounds (None for open),
* ``choices=(...)`` allowed values,
* ``help="..."`` shown in ``check-config`` messages.

Sections: asset, source, sensor, machine, analysis, baseline, alarms,
store, mqtt.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import re
import tomllib
import typing
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from agent.errors import ConfigError


def _f(default: Any = dataclasses.MISSING, *, range=None, choices=None, help="", factory=None):
    meta = {"range": range, "choices": choices, "help": help}
    if factory is not None:
        return field(default_factory=factory, metadata=meta)
    return field(default=default, metadata=meta)


# ───────────────────────────── sections ─────────────────────────────


@dataclass(frozen=True, slots=True)
class AssetConfig:
    site: str = _f("unnamed site", help="plant or site name")
    name: str = _f("unnamed machine", help="machine name shown to operators")
    tag: str = _f("M-1", help="machine tag, used in MQTT topics and file names")
    description: str = _f("")


@dataclass(frozen=True, slots=True)
class SyntheticSourceConfig:
    scenario: str = _f("", help="scenario file for the simulator ('' = steady healthy machine)")
    seed: int = _f(1, range=(0, 2**63 - 1), help="seed of the simulator's random streams")
    time_scale: float = _f(1.0, range=(0.001, 1e6), help="scenario seconds per real second when run live")


@dataclass(frozen=True, slots=True)
class ReplaySourceConfig:
    paths: tuple[str, ...] = _f(factory=tuple, help="recordings or folders to replay")
    loop: bool = _f(False)


@dataclass(frozen=True, slots=True)
class SoundcardSourceConfig:
    device: str = _f("default", help="device name (substring) or index as text; see `skidvib devices`")
    channels: int = _f(1, range=(1, 2), help="2 = both inputs of a stereo card, one capture each")
    channel_names: tuple[str, ...] = _f(factory=tuple, help="one per channel; empty = source.channel, ch1")
    blocksize: int = _f(0, range=(0, 65536), help="0 lets PortAudio choose")
    full_scale_v: float = _f(1.0, range=(1e-3, 100.0), help="input voltage at digital full scale")
    stall_timeout_s: float = _f(5.0, range=(0.1, 600.0), help="no audio block for this long = stalled")
    queue_blocks: int = _f(256, range=(4, 65536), help="audio blocks buffered between callback and reader")


@dataclass(frozen=True, slots=True)
class SerialSourceConfig:
    port: str = _f("", help="serial device or pyserial URL, e.g. /dev/serial/by-id/...")
    baud: int = _f(921600, range=(1200, 12_000_000))
    mode: str = _f("binary", choices=("binary", "text"), help="binary frames (docs/serial-frames.md) or text lines")
    channels: int = _f(1, range=(1, 8))
    channel_names: tuple[str, ...] = _f(factory=tuple, help="one per channel; empty = source.channel, ch1, ...")
    sample_format: str = _f("int16", choices=("int16", "int24"), help="binary mode: the board's sample format")
    max_frame_samples: int = _f(1024, range=(1, 4096), help="binary mode: largest samples per channel in a frame")
    text_full_scale_counts: float = _f(32768.0, range=(1.0, 2.0**31), help="text mode: counts at full scale")
    dc_coupled: bool = _f(False, help="the ADC sees the IEPE bias (DC path): report it and remove the mean")
    full_scale_v: float = _f(2.5, range=(1e-3, 100.0), help="input voltage at digital full scale")
    stall_timeout_s: float = _f(5.0, range=(0.1, 600.0), help="no samples for this long = stalled")


@dataclass(frozen=True, slots=True)
class SourceConfig:
    kind: str = _f("synthetic", choices=("synthetic", "replay", "soundcard", "serial"))
    fs_hz: float = _f(25600.0, range=(1000.0, 200_000.0), help="sample rate")
    capture_s: float = _f(2.56, range=(0.25, 60.0), help="length of one capture")
    interval_s: float = _f(60.0, range=(1.0, 86400.0), help="time between capture starts")
    channel: str = _f("ch0", help="measurement point name, e.g. 'pump DE horizontal'")
    synthetic: SyntheticSourceConfig = _f(factory=SyntheticSourceConfig)
    replay: ReplaySourceConfig = _f(factory=ReplaySourceConfig)
    soundcard: SoundcardSourceConfig = _f(factory=SoundcardSourceConfig)
    serial: SerialSourceConfig = _f(factory=SerialSourceConfig)

    @property
    def n_samples(self) -> int:
        return int(round(self.fs_hz * self.capture_s))


@dataclass(frozen=True, slots=True)
class SensorConfig:
    sensitivity_mv_per_g: float = _f(100.0, range=(0.01, 100_000.0))
    conditioner_gain: float = _f(1.0, range=(1e-3, 1000.0))
    full_scale_g: float = _f(50.0, range=(0.1, 10_000.0), help="sensor range; beyond this is overload")
    bias_v: tuple[float, float] = _f((8.0, 14.0), help="healthy IEPE bias window [low, high] volts")
    max_rms_g: float = _f(20.0, range=(0.01, 10_000.0), help="r.m.s. above this is implausible (sensor fault)")
    min_rms_g: float = _f(1e-4, range=(0.0, 10.0), help="r.m.s. below this is a dead channel")


@dataclass(frozen=True, slots=True)
class BearingConfig:
    name: str = _f(help="e.g. 'pump drive end'")
    balls: int = _f(range=(3, 100))
    ball_diameter_mm: float = _f(range=(0.1, 500.0))
    pitch_diameter_mm: float = _f(range=(1.0, 5000.0))
    contact_angle_deg: float = _f(0.0, range=(0.0, 60.0))
    shaft: str = _f("", help="shaft the bearing sits on ('' = the reference shaft)")
    bpfo: float = _f(0.0, range=(0.0, 200.0), help="BPFO as a multiple of shaft speed; 0 = from the geometry")
    bpfi: float = _f(0.0, range=(0.0, 200.0), help="BPFI as a multiple of shaft speed; 0 = from the geometry")
    bsf: float = _f(0.0, range=(0.0, 100.0), help="BSF (one spin, not 2×BSF) per shaft turn; 0 = from the geometry")
    ftf: float = _f(0.0, range=(0.0, 1.0), help="FTF (cage) as a multiple of shaft speed; 0 = from the geometry")


@dataclass(frozen=True, slots=True)
class ShaftConfig:
    name: str = _f(help="shaft name, e.g. 'pump' or 'fan'")
    vanes: int = _f(0, range=(0, 64), help="impeller vanes on this shaft (0 = none)")
    blades: int = _f(0, range=(0, 128), help="fan blades on this shaft (0 = none)")


@dataclass(frozen=True, slots=True)
class CouplingConfig:
    driver: str = _f(help="driving shaft name")
    driven: str = _f(help="driven shaft name (same speed)")


@dataclass(frozen=True, slots=True)
class BeltConfig:
    driver: str = _f(help="driving shaft name")
    driven: str = _f(help="driven shaft name")
    driver_diameter_mm: float = _f(range=(1.0, 10_000.0), help="driver sheave pitch diameter")
    driven_diameter_mm: float = _f(range=(1.0, 10_000.0), help="driven sheave pitch diameter")
    length_mm: float = _f(0.0, range=(0.0, 100_000.0), help="belt pitch length (0 = unknown: no belt rate)")


@dataclass(frozen=True, slots=True)
class GearConfig:
    driver: str = _f(help="driving shaft name")
    driven: str = _f(help="driven shaft name")
    driver_teeth: int = _f(range=(1, 10_000))
    driven_teeth: int = _f(range=(1, 10_000))


@dataclass(frozen=True, slots=True)
class MachineConfig:
    speed_rpm: tuple[float, float] = _f((600.0, 3600.0), help="[low, high] running-speed search range")
    line_hz: float = _f(50.0, choices=(50.0, 60.0))
    poles: int = _f(0, range=(0, 48), help="motor poles; 0 = not an induction motor / unknown")
    rotor_bars: int = _f(0, range=(0, 500))
    vanes: int = _f(0, range=(0, 64), help="pump impeller vanes (0 = none)")
    blades: int = _f(0, range=(0, 128), help="fan blades (0 = none)")
    power_kw: float = _f(37.0, range=(0.1, 100_000.0))
    iso_group: int = _f(2, choices=(1, 2), help="ISO 20816-3 group: 1 > 300 kW, 2 = 15-300 kW")
    support: str = _f("rigid", choices=("rigid", "flexible"))
    bearings: tuple[BearingConfig, ...] = _f(factory=tuple)
    drive: str = _f("line", choices=("line", "vfd"),
                    help="'line' = motor on the mains (speed just below 120·f/p); 'vfd' = variable-speed drive")
    reference_shaft: str = _f("motor", help="shaft whose speed is measured; vanes/blades/rotor_bars above sit on it")
    shafts: tuple[ShaftConfig, ...] = _f(factory=tuple, help="other shafts of the train")
    couplings: tuple[CouplingConfig, ...] = _f(factory=tuple)
    belts: tuple[BeltConfig, ...] = _f(factory=tuple)
    gears: tuple[GearConfig, ...] = _f(factory=tuple)


@dataclass(frozen=True, slots=True)
class AnalysisConfig:
    window: str = _f("hann", choices=("hann", "flattop", "rectangular"))
    lines: int = _f(0, range=(0, 1 << 20), help="resolution lines (nperseg/2); 0 = auto")
    overlap: float = _f(0.5, range=(0.0, 0.9))
    fmax_hz: float = _f(0.0, range=(0.0, 100_000.0), help="highest frequency analysed; 0 = 0.4·fs")
    amplitude_basis: str = _f("rms", choices=("rms", "peak"))
    iso_band_hz: tuple[float, float] = _f((0.0, 0.0), help="[low, high]; (0, 0) = from speed range")
    peak_min_height_db: float = _f(6.0, range=(0.0, 60.0))
    max_peaks: int = _f(40, range=(1, 1000))
    envelope_band_hz: tuple[float, float] = _f(
        (0.0, 0.0), help="[low, high] demodulation band for bearing envelopes; (0, 0) = chosen by the kurtogram"
    )
    bearing_slip_tol: float = _f(
        0.02, range=(0.005, 0.1), help="± fraction around each bearing defect frequency searched (slip)"
    )


@dataclass(frozen=True, slots=True)
class BaselineConfig:
    learn_captures: int = _f(100, range=(3, 100_000), help="steady captures per operating state to learn its normal")
    learn_hours: float = _f(0.0, range=(0.0, 10_000.0), help="also require this many hours; 0 = off")
    speed_bin_edges_rpm: tuple[float, ...] = _f(factory=tuple, help="speed bin edges; empty = one bin")
    reservoir_size: int = _f(256, range=(16, 65_536), help="samples kept per feature while learning")
    stopped_vel_mm_s: float = _f(0.2, range=(0.0, 100.0), help="overall velocity below this = stopped")
    min_running_rpm: float = _f(60.0, range=(0.0, 100_000.0), help="a found speed below this = stopped")
    speed_tol_frac: float = _f(0.02, range=(0.0, 1.0),
                               help="speed change (fraction) that marks a capture as transient")
    speed_tol_rpm: float = _f(10.0, range=(0.0, 10_000.0), help="... or this many rpm, whichever is larger")


@dataclass(frozen=True, slots=True)
class AlarmsConfig:
    alert_ratio: float = _f(2.0, range=(1.05, 100.0),
                            help="a doubling (×2, common practice) is an alert for any feature of ordinary scatter")
    danger_ratio: float = _f(4.0, range=(1.1, 1000.0), help="danger at this × baseline (amplitude)")
    min_alert_ratio: float = _f(1.5, range=(1.01, 100.0), help="an alert level is never closer to normal than this")
    k_spread: float = _f(4.0, range=(1.0, 20.0), help="statistical alert level: median × exp(k · spread)")
    min_spread_log: float = _f(0.02, range=(0.0, 1.0), help="floor on a feature's learned log spread")
    min_level_mm_s: float = _f(0.01, range=(0.0, 100.0), help="no velocity alarm below this level")
    min_level_g: float = _f(0.001, range=(0.0, 100.0), help="no acceleration alarm below this level")
    persistence_n: int = _f(2, range=(1, 100), help="n exceedances ...")
    persistence_m: int = _f(3, range=(1, 100), help="... within the last m captures raise a level")
    hysteresis: float = _f(0.8, range=(0.1, 0.99), help="a level clears below this × the level")
    latch: bool = _f(False, help="keep raised levels until acknowledged")
    rate_ratio: float = _f(1.5, range=(0.0, 100.0), help="rate-of-change alarm on a rise by this factor; 0 = off")
    rate_window: int = _f(12, range=(6, 10_000), help="captures the rate-of-change alarm looks back")
    use_iso_zones: bool = _f(True)
    iso_alert_zone: str = _f("C", choices=("B", "C", "D"), help="ISO 20816-3 zone that raises an alert")
    iso_danger_zone: str = _f("D", choices=("B", "C", "D"), help="ISO 20816-3 zone that raises danger")


@dataclass(frozen=True, slots=True)
class StoreConfig:
    state_dir: str = _f("state", help="folder for trend DB, baselines, snapshots, outbox")
    snapshot_max_count: int = _f(500, range=(1, 1_000_000))
    snapshot_max_mb: float = _f(500.0, range=(1.0, 1_000_000.0))
    snapshot_every_h: float = _f(24.0, range=(0.0, 10_000.0), help="scheduled reference snapshot; 0 = off")
    health_every_s: float = _f(60.0, range=(1.0, 86_400.0), help="how often the agent publishes its health")
    trend_raw_days: float = _f(14.0, range=(1.0, 3650.0),
                               help="keep one trend row per capture this long, then hourly rows")
    trend_hourly_days: float = _f(400.0, range=(1.0, 36500.0),
                                  help="keep hourly trend rows this long")


@dataclass(frozen=True, slots=True)
class MqttConfig:
    enabled: bool = _f(True)
    host: str = _f("127.0.0.1")
    port: int = _f(1883, range=(1, 65535))
    prefix: str = _f("skidvib", help="topic prefix")
    client_id: str = _f("")
    keepalive_s: int = _f(30, range=(5, 3600))
    username: str = _f("")
    password_file: str = _f("", help="file holding the password (keep it out of this file)")
    tls_ca: str = _f("")
    tls_cert: str = _f("")
    tls_key: str = _f("")
    site: str = _f("", help="site level of the topic tree ('' = asset.site made topic-safe)")
    protocol: str = _f("auto", choices=("auto", "5", "3.1.1"),
                       help="MQTT version: auto tries 5 and falls back to 3.1.1")
    outbox_max_mb: float = _f(16.0, range=(0.1, 10_000.0),
                              help="bound of the on-disk outbox; measurements are shed first")


@dataclass(frozen=True, slots=True)
class AgentConfig:
    asset: AssetConfig = _f(factory=AssetConfig)
    source: SourceConfig = _f(factory=SourceConfig)
    sensor: SensorConfig = _f(factory=SensorConfig)
    machine: MachineConfig = _f(factory=MachineConfig)
    analysis: AnalysisConfig = _f(factory=AnalysisConfig)
    baseline: BaselineConfig = _f(factory=BaselineConfig)
    alarms: AlarmsConfig = _f(factory=AlarmsConfig)
    store: StoreConfig = _f(factory=StoreConfig)
    mqtt: MqttConfig = _f(factory=MqttConfig)
    path: str = field(default="", metadata={"internal": True})


# ───────────────────────────── loader ─────────────────────────────


def _type_name(tp: Any) -> str:
    origin = typing.get_origin(tp)
    if origin is tuple:
        args = typing.get_args(tp)
        if len(args) == 2 and args[1] is Ellipsis:
            return f"list of {_type_name(args[0])}"
        return f"list of {len(args)} {'/'.join(sorted({_type_name(a) for a in args}))}"
    if dataclasses.is_dataclass(tp):
        return "table"
    return {float: "number", int: "integer", str: "string", bool: "true/false"}.get(tp, str(tp))


def _convert(tp: Any, value: Any, key: str, meta: dict, errors: list[str]) -> Any:
    """Check and convert one value; append problems to ``errors``; return value or None."""
    origin = typing.get_origin(tp)
    if dataclasses.is_dataclass(tp):
        if not isinstance(value, dict):
            errors.append(f"{key}: expected a table, got {type(value).__name__} {value!r}")
            return None
        return _build(tp, value, key, errors)
    if origin is tuple:
        args = typing.get_args(tp)
        if not isinstance(value, list):
            errors.append(f"{key}: expected {_type_name(tp)}, got {type(value).__name__} {value!r}")
            return None
        if len(args) == 2 and args[1] is Ellipsis:
            items = [_convert(args[0], v, f"{key}[{i}]", meta, errors) for i, v in enumerate(value)]
        else:
            if len(value) != len(args):
                errors.append(f"{key}: expected {_type_name(tp)}, got {len(value)} values {value!r}")
                return None
            items = [_convert(a, v, f"{key}[{i}]", meta, errors) for i, (a, v) in enumerate(zip(args, value))]
        if any(i is None for i in items):
            return None
        return tuple(items)
    if tp is bool:
        if not isinstance(value, bool):
            errors.append(f"{key}: expected true or false, got {value!r}")
            return None
        return value
    if tp is int:
        if isinstance(value, bool) or not isinstance(value, int):
            errors.append(f"{key}: expected an integer, got {type(value).__name__} {value!r}")
            return None
    elif tp is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            errors.append(f"{key}: expected a number, got {type(value).__name__} {value!r}")
            return None
        value = float(value)
        if not math.isfinite(value):
            errors.append(f"{key}: expected a finite number, got {value!r}")
            return None
    elif tp is str:
        if not isinstance(value, str):
            errors.append(f"{key}: expected a string, got {type(value).__name__} {value!r}")
            return None
    rng = meta.get("range")
    if rng is not None and isinstance(value, (int, float)):
        lo, hi = rng
        if (lo is not None and value < lo) or (hi is not None and value > hi):
            errors.append(f"{key}: {value!r} out of range [{lo}, {hi}]")
            return None
    choices = meta.get("choices")
    if choices is not None and value not in choices:
        errors.append(f"{key}: {value!r} is not allowed; choose one of {', '.join(map(repr, choices))}")
        return None
    return value


def _build(cls: type, data: dict, prefix: str, errors: list[str]) -> Any:
    hints = typing.get_type_hints(cls)
    fields = {f.name: f for f in dataclasses.fields(cls) if not f.metadata.get("internal")}
    kwargs: dict[str, Any] = {}
    for key, value in data.items():
        dotted = f"{prefix}.{key}" if prefix else key
        if key not in fields:
            hint = difflib.get_close_matches(key, list(fields), n=1)
            extra = f" (did you mean '{hint[0]}'?)" if hint else ""
            allowed = ", ".join(sorted(fields))
            errors.append(f"{dotted}: unknown key{extra}; allowed here: {allowed}")
            continue
        conv = _convert(hints[key], value, dotted, dict(fields[key].metadata), errors)
        if conv is not None:
            kwargs[key] = conv
    missing = [
        n for n, f in fields.items()
        if n not in data and f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING
    ]
    for n in missing:
        errors.append(f"{prefix + '.' if prefix else ''}{n}: required key is missing")
    if missing or any(k not in kwargs for k in data if k in fields):
        # a problem inside this table: build what we can with defaults so checks go on
        try:
            return cls(**kwargs)
        except TypeError:
            return None
    return cls(**kwargs)


def _cross_checks(cfg: AgentConfig, errors: list[str]) -> None:
    src, mach, ana = cfg.source, cfg.machine, cfg.analysis
    lo, hi = mach.speed_rpm
    if lo <= 0 or hi <= lo:
        errors.append(f"machine.speed_rpm: [{lo}, {hi}] must be increasing and above 0")
    if abs(src.fs_hz - round(src.fs_hz)) > 1e-6 * src.fs_hz:
        errors.append(f"source.fs_hz: {src.fs_hz} must be a whole number of Hz (snapshots are WAV files)")
    nyquist = src.fs_hz / 2
    if ana.fmax_hz and ana.fmax_hz > nyquist:
        errors.append(f"analysis.fmax_hz: {ana.fmax_hz} is above the Nyquist frequency {nyquist} (source.fs_hz/2)")
    if ana.lines and 2 * ana.lines > src.n_samples:
        errors.append(
            f"analysis.lines: {ana.lines} needs {2 * ana.lines} samples per segment but a capture has "
            f"{src.n_samples} (source.fs_hz × source.capture_s)"
        )
    blo, bhi = ana.iso_band_hz
    if (blo, bhi) != (0.0, 0.0) and not (0 < blo < bhi <= nyquist):
        errors.append(f"analysis.iso_band_hz: [{blo}, {bhi}] must satisfy 0 < low < high <= {nyquist}")
    elo, ehi = ana.envelope_band_hz
    if (elo, ehi) != (0.0, 0.0) and not (0 <= elo < ehi <= nyquist):
        errors.append(
            f"analysis.envelope_band_hz: [{elo}, {ehi}] must satisfy 0 <= low < high <= {nyquist} (source.fs_hz/2)"
        )
    if src.interval_s < src.capture_s:
        errors.append(f"source.interval_s: {src.interval_s} is shorter than source.capture_s {src.capture_s}")
    if cfg.alarms.danger_ratio <= cfg.alarms.alert_ratio:
        errors.append(
            f"alarms.danger_ratio: {cfg.alarms.danger_ratio} must be above alarms.alert_ratio {cfg.alarms.alert_ratio}"
        )
    if cfg.alarms.persistence_n > cfg.alarms.persistence_m:
        errors.append(
            f"alarms.persistence_n: {cfg.alarms.persistence_n} must not exceed alarms.persistence_m "
            f"{cfg.alarms.persistence_m}"
        )
    if cfg.alarms.min_alert_ratio > cfg.alarms.alert_ratio:
        errors.append(f"alarms.min_alert_ratio: {cfg.alarms.min_alert_ratio} must not exceed alarms.alert_ratio "
                      f"{cfg.alarms.alert_ratio}")
    if 0 < cfg.alarms.rate_ratio <= 1:
        errors.append(f"alarms.rate_ratio: {cfg.alarms.rate_ratio} must be 0 (off) or above 1")
    if cfg.alarms.iso_danger_zone < cfg.alarms.iso_alert_zone:
        errors.append(f"alarms.iso_danger_zone: {cfg.alarms.iso_danger_zone!r} must not be below "
                      f"alarms.iso_alert_zone {cfg.alarms.iso_alert_zone!r}")
    if any(e <= 0 for e in cfg.baseline.speed_bin_edges_rpm):
        errors.append(f"baseline.speed_bin_edges_rpm: {list(cfg.baseline.speed_bin_edges_rpm)} must be above 0")
    names = [b.name for b in mach.bearings]
    for i, b in enumerate(mach.bearings):
        if b.ball_diameter_mm >= b.pitch_diameter_mm:
            errors.append(
                f"machine.bearings[{i}]: ball_diameter_mm {b.ball_diameter_mm} must be smaller than "
                f"pitch_diameter_mm {b.pitch_diameter_mm}"
            )
        if names.count(b.name) > 1:
            errors.append(f"machine.bearings[{i}].name: {b.name!r} is used more than once")
    if mach.poles % 2:
        errors.append(f"machine.poles: {mach.poles} must be even (0 = unknown)")
    if mach.drive == "line" and mach.poles:
        sync_rpm = 120.0 * mach.line_hz / mach.poles
        if hi < sync_rpm * 0.92 or lo >= sync_rpm:
            errors.append(
                f"machine.speed_rpm: [{lo:g}, {hi:g}] does not cover the line-fed {mach.poles}-pole speed just "
                f"below {sync_rpm:g} r/min (120·{mach.line_hz:g}/{mach.poles}); widen it or set machine.drive = 'vfd'"
            )
    if not any(e is None for e in (mach.shafts, mach.couplings, mach.belts, mach.gears, mach.bearings)):
        from agent.kinematics import train_from_config

        try:
            train_from_config(mach)
        except ValueError as exc:
            errors.append(f"machine (train): {exc}")
    edges = cfg.baseline.speed_bin_edges_rpm
    if list(edges) != sorted(set(edges)):
        errors.append(f"baseline.speed_bin_edges_rpm: {list(edges)} must be strictly increasing")
    for sub in ("soundcard", "serial"):
        sc = getattr(src, sub)
        if sc.channel_names and len(sc.channel_names) != sc.channels:
            errors.append(
                f"source.{sub}.channel_names: {len(sc.channel_names)} names for {sc.channels} channels "
                f"(source.{sub}.channels)"
            )
    blo_v, bhi_v = cfg.sensor.bias_v
    if not 0 <= blo_v < bhi_v:
        errors.append(f"sensor.bias_v: [{blo_v}, {bhi_v}] must be [low, high] with 0 <= low < high")
    if cfg.sensor.min_rms_g >= cfg.sensor.max_rms_g:
        errors.append(f"sensor.min_rms_g: {cfg.sensor.min_rms_g} must be below sensor.max_rms_g {cfg.sensor.max_rms_g}")
    if src.kind == "serial" and not src.serial.port:
        errors.append("source.serial.port: required when source.kind = 'serial'")
    if src.kind == "replay" and not src.replay.paths:
        errors.append("source.replay.paths: at least one path is required when source.kind = 'replay'")
    if bool(cfg.mqtt.tls_cert) != bool(cfg.mqtt.tls_key):
        errors.append("mqtt.tls_cert / mqtt.tls_key: give both or neither")
    if cfg.store.trend_hourly_days < cfg.store.trend_raw_days:
        errors.append(f"store.trend_hourly_days {cfg.store.trend_hourly_days} must be >= "
                      f"store.trend_raw_days {cfg.store.trend_raw_days}")
    for key, value in (("mqtt.prefix", cfg.mqtt.prefix), ("mqtt.site", cfg.mqtt.site)):
        if value and not all(re.fullmatch(r"[A-Za-z0-9_.-]{1,64}", part)
                             for part in value.split("/")):
            errors.append(f"{key}: {value!r} may hold only letters, digits, '_', '.', '-' "
                          "(and '/' between levels in the prefix); no '+', '#' or spaces")


def parse_config(data: dict, path: str = "<config>") -> AgentConfig:
    """Validate a parsed TOML document; raise ConfigError listing every problem."""
    errors: list[str] = []
    cfg = _build(AgentConfig, data, "", errors)
    if cfg is not None and not errors:
        _cross_checks(cfg, errors)
    elif cfg is not None:
        try:
            _cross_checks(cfg, errors)
        except Exception:  # partial config: cross-checks are best effort
            pass
    if errors or cfg is None:
        raise ConfigError(path, errors or ["configuration could not be read"])
    return dataclasses.replace(cfg, path=str(path))


def read_toml(path: str | Path, what: str = "file") -> dict:
    """Parse a TOML file; unreadable files, non-UTF-8 text and syntax errors raise ConfigError."""
    p = Path(path)
    try:
        raw = p.read_bytes()
    except OSError as exc:
        raise ConfigError(str(p), [f"cannot read {what}: {exc.strerror or exc}"]) from exc
    try:
        return tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise ConfigError(str(p), [f"not UTF-8 text: {exc}"]) from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(str(p), [f"TOML syntax: {exc}"]) from exc


def load_config(path: str | Path) -> AgentConfig:
    """Read and validate a TOML config file. Raises ConfigError."""
    return parse_config(read_toml(path), str(path))


def default_config() -> AgentConfig:
    """All defaults (a 4-pole 50 Hz motor-driven pump, simulator source)."""
    return AgentConfig()


def iso_band_hz(cfg: AgentConfig) -> tuple[float, float]:
    """ISO 20816-3 measurement band: 10-1000 Hz, or 2-1000 Hz below 600 r/min (from memory)."""
    lo, hi = cfg.analysis.iso_band_hz
    if (lo, hi) != (0.0, 0.0):
        return lo, hi
    low_speed = cfg.machine.speed_rpm[0] < 600.0
    return (2.0 if low_speed else 10.0), min(1000.0, cfg.source.fs_hz / 2.56)


def resolve_path(cfg: AgentConfig, value: str) -> Path:
    """A path from the config: relative paths are relative to the config file's folder."""
    p = Path(value).expanduser()
    if p.is_absolute() or not cfg.path:
        return p
    return Path(cfg.path).resolve().parent / p


def summary(cfg: AgentConfig) -> str:
    """A short human summary of the effective configuration."""
    s, m, a = cfg.source, cfg.machine, cfg.analysis
    lines = [
        f"asset      {cfg.asset.site} / {cfg.asset.name} [{cfg.asset.tag}]",
        f"source     {s.kind}, {s.fs_hz:g} Hz, {s.capture_s:g} s captures every {s.interval_s:g} s, point '{s.channel}'",
        f"machine    {m.speed_rpm[0]:g}-{m.speed_rpm[1]:g} r/min, {m.drive} drive, line {m.line_hz:g} Hz, "
        f"poles {m.poles or 'n/a'}, "
        f"vanes {m.vanes}, blades {m.blades}, ISO 20816-3 group {m.iso_group} {m.support}",
        f"bearings   {', '.join(b.name for b in m.bearings) or 'none configured'}",
        f"train      {m.reference_shaft}" + "".join(f", {s.name}" for s in m.shafts)
        + f" ({len(m.couplings)} couplings, {len(m.belts)} belts, {len(m.gears)} gear pairs)",
        f"analysis   {a.window} window, lines {a.lines or 'auto'}, overlap {a.overlap:g}, ISO band "
        f"{iso_band_hz(cfg)[0]:g}-{iso_band_hz(cfg)[1]:g} Hz",
        f"store      {cfg.store.state_dir}",
        f"mqtt       {'on' if cfg.mqtt.enabled else 'off'} {cfg.mqtt.host}:{cfg.mqtt.port} prefix '{cfg.mqtt.prefix}'",
    ]
    return "\n".join(lines)



def changed_keys(old: AgentConfig, new: AgentConfig) -> tuple[str, ...]:
    """Dotted keys whose values differ (``"mqtt.host"``, ``"source.synthetic.seed"``), in
    schema order; a list of tables (``machine.bearings``) counts as one key."""
    keys: list[str] = []

    def walk(a: Any, b: Any, prefix: str) -> None:
        for f in dataclasses.fields(a):
            if f.metadata.get("internal"):
                continue
            x, y = getattr(a, f.name), getattr(b, f.name)
            if dataclasses.is_dataclass(x):
                walk(x, y, f"{prefix}{f.name}.")
            elif x != y:
                keys.append(prefix + f.name)

    walk(old, new, "")
    return tuple(keys)


def with_keys_from(cfg: AgentConfig, source: AgentConfig, keys: typing.Iterable[str]) -> AgentConfig:
    """``cfg`` with each dotted key of ``keys`` set to its value in ``source``."""

    def put(obj: Any, src: Any, names: list[str]) -> Any:
        head, rest = names[0], names[1:]
        value = put(getattr(obj, head), getattr(src, head), rest) if rest else getattr(src, head)
        return dataclasses.replace(obj, **{head: value})

    for key in keys:
        cfg = put(cfg, source, key.split("."))
    return cfg


__all__ = [
    "AgentConfig",
    "AnalysisConfig",
    "AlarmsConfig",
    "AssetConfig",
    "BaselineConfig",
    "BearingConfig",
    "BeltConfig",
    "CouplingConfig",
    "GearConfig",
    "ShaftConfig",
    "MachineConfig",
    "MqttConfig",
    "SensorConfig",
    "SourceConfig",
    "StoreConfig",
    "changed_keys",
    "default_config",
    "iso_band_hz",
    "load_config",
    "parse_config",
    "resolve_path",
    "summary",
    "with_keys_from",
]
