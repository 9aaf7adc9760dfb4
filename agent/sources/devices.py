"""``skidvib devices``: the sound devices and serial ports this box can see.

Prints what the config needs: for ``[source.soundcard]`` the device index
and name, input channels and default sample rate; for ``[source.serial]``
the port path (prefer the stable ``/dev/serial/by-id/...`` link) with its
USB identity. Hardware libraries are imported here only; a missing
PortAudio is reported, not raised.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path


@dataclass(frozen=True, slots=True)
class SoundDevice:
    index: int
    name: str
    hostapi: str
    max_input_channels: int
    default_samplerate: float


@dataclass(frozen=True, slots=True)
class SerialPort:
    device: str
    stable_path: str  # /dev/serial/by-id/... link to it, or "" when there is none
    description: str
    hwid: str


def sound_devices() -> tuple[tuple[SoundDevice, ...], str]:
    """(capture-capable devices, problem text or '')."""
    try:
        import sounddevice as sd
    except OSError as exc:
        return (), f"PortAudio not available ({exc}); install the Debian package libportaudio2"
    try:
        devs = sd.query_devices()
        apis = sd.query_hostapis()
    except Exception as exc:  # noqa: BLE001 - PortAudio errors vary by host API
        return (), f"PortAudio could not list devices: {exc}"
    out = []
    for d in devs:
        if d["max_input_channels"] < 1:
            continue
        out.append(
            SoundDevice(
                index=int(d["index"]),
                name=str(d["name"]),
                hostapi=str(apis[d["hostapi"]]["name"]),
                max_input_channels=int(d["max_input_channels"]),
                default_samplerate=float(d["default_samplerate"]),
            )
        )
    return tuple(out), ""


def serial_ports(by_id_dir: str = "/dev/serial/by-id") -> tuple[SerialPort, ...]:
    from serial.tools import list_ports

    links: dict[str, str] = {}
    d = Path(by_id_dir)
    if d.is_dir():
        for link in sorted(d.iterdir()):
            links[os.path.realpath(link)] = str(link)
    out = []
    for p in sorted(list_ports.comports(), key=lambda p: p.device):
        out.append(
            SerialPort(
                device=p.device,
                stable_path=links.get(os.path.realpath(p.device), ""),
                description=str(p.description or ""),
                hwid=str(p.hwid or ""),
            )
        )
    return tuple(out)


def format_devices(sounds: tuple[SoundDevice, ...], sound_problem: str, ports: tuple[SerialPort, ...]) -> str:
    lines = ["Sound devices with inputs  ([source.soundcard] device = index or name):"]
    if sound_problem:
        lines.append(f"  (none listed: {sound_problem})")
    elif not sounds:
        lines.append("  (none found)")
    for s in sounds:
        lines.append(
            f"  {s.index:>3}  {s.name!r:40}  {s.hostapi}, {s.max_input_channels} in, "
            f"default {s.default_samplerate:g} Hz"
        )
    lines.append("")
    lines.append("Serial ports  ([source.serial] port = path; prefer the /dev/serial/by-id link):")
    if not ports:
        lines.append("  (none found)")
    for p in ports:
        stable = f"  stable: {p.stable_path}" if p.stable_path else ""
        lines.append(f"  {p.device}  {p.description}  [{p.hwid}]{stable}")
    lines.append("  (test URLs work too, e.g. port = \"loop://\")")
    return "\n".join(lines)


def list_devices() -> str:
    """The text ``skidvib devices`` prints."""
    sounds, problem = sound_devices()
    return format_devices(sounds, problem, serial_ports())


def cmd_devices(args) -> int:
    print(list_devices())
    return 0
