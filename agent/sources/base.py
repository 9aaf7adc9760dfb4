"""The one small interface every acquisition source implements.

A source hands out whole captures: ``read(timeout_s)`` returns one
:class:`~agent.model.Capture` per channel, all covering the same time span.
Hardware errors are translated here, at the edge, into
:class:`~agent.errors.SourceUnavailable` / :class:`~agent.errors.SourceStalled`.
"""

from __future__ import annotations

import abc

from agent.model import Capture


class Source(abc.ABC):
    """Base class of all sources (sound card, serial ADC, replay, simulator)."""

    #: registry name, e.g. "soundcard"
    kind: str = ""

    @abc.abstractmethod
    def open(self) -> None:
        """Acquire the device/file. Raises SourceUnavailable."""

    @abc.abstractmethod
    def read(self, timeout_s: float) -> tuple[Capture, ...]:
        """Block until one capture per channel is complete, or raise SourceStalled.

        Raises ``StopIteration``-like :class:`EndOfSource` when a finite
        source (a replay) has nothing more.
        """

    @abc.abstractmethod
    def close(self) -> None:
        """Release the device. Safe to call more than once."""

    def describe(self) -> dict:
        """Facts for logs and health: kind, device, fs_hz, channels."""
        return {"kind": self.kind}

    def __enter__(self) -> "Source":
        self.open()
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class EndOfSource(Exception):
    """A finite source (replay) has delivered everything it has."""
