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
    "synthetic": ("agent.sources.synthetic", "SyntheticSource"),
}


def source_class(kind: str) -> type[Source]:
    """The Source subclass registered as ``kind``."""
    try:
        module_name, class_name = SOURCES[kind]
    except KeyError:
        raise ValueError(f"unknown source kind {kind!r}; known: {sorted(SOURCES)}") from None
    return getattr(importlib.import_module(module_name), class_name)


__all__ = ["SOURCES", "EndOfSource", "Source", "source_class"]
