"""Acquisition sources and their registry (lazy imports of hardware libraries).

``SOURCES`` maps a config ``source.kind`` to (module, class). Modules are
imported only when that source is opened, so a box without PortAudio can
still run the serial, replay and simulator sources.
"""

from __future__ import annotations

import importlib

from agent.sources.base import EndOfSource, Source

SOURCES: dict[str, tuple[str, str]] = {
    "replay": ("agent.sources.replay", "ReplaySource"),
    "serial": ("agent.sources.serial_adc", "SerialSource"),
    "soundcard": ("agent.sources.soundcard", "SoundCardSource"),
    "synthetic": ("agent.sources.synthetic", "SyntheticSource"),
}


def source_class(kind: str) -> type[Source]:
    """The Source subclass registered as ``kind``."""
    try:
        module_name, class_name = SOURCES[kind]
    except KeyError:
        raise ValueError(f"unknown source kind {kind!r}; known: {sorted(SOURCES)}") from None
    return getattr(importlib.import_module(module_name), class_name)


def build_source(cfg) -> Source:
    """The configured source, not yet opened: ``source_class(kind).from_config(cfg)``.

    Every registered class offers ``from_config(cfg: AgentConfig)``.
    """
    return source_class(cfg.source.kind).from_config(cfg)


def stall_timeout_s(cfg) -> float:
    """The read timeout for the configured source (hardware sources have their own key)."""
    kind = cfg.source.kind
    if kind in ("soundcard", "serial"):
        return float(getattr(cfg.source, kind).stall_timeout_s)
    return max(5.0, 2.0 * cfg.source.capture_s)


__all__ = ["SOURCES", "EndOfSource", "Source", "build_source", "source_class", "stall_timeout_s"]
