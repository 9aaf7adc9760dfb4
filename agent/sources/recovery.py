"""Reopen a source that vanished or stalled, with exponential back-off."""

from __future__ import annotations

import time
from typing import Callable

from agent.errors import SourceUnavailable
from agent.sources.base import Source


def backoff_delays(initial_s: float = 0.5, max_s: float = 30.0, factor: float = 2.0):
    """0.5, 1, 2, 4, ... s capped at ``max_s`` (an endless generator)."""
    if not (initial_s > 0 and max_s >= initial_s and factor >= 1.0):
        raise ValueError(f"bad back-off: initial_s={initial_s}, max_s={max_s}, factor={factor}")
    delay = initial_s
    while True:
        yield delay
        delay = min(delay * factor, max_s)


def reopen_with_backoff(
    source: Source,
    *,
    initial_s: float = 0.5,
    max_s: float = 30.0,
    factor: float = 2.0,
    max_attempts: int | None = None,
    sleep: Callable[[float], None] = time.sleep,
    on_retry: Callable[[int, float, Exception], None] | None = None,
) -> int:
    """Close ``source`` and open it again until it opens; returns the attempts used.

    Waits ``initial_s``, then twice as long each failure, capped at ``max_s``.
    After ``max_attempts`` failures the last :class:`SourceUnavailable` is
    raised (None = keep trying). ``on_retry(attempt, delay_s, error)`` is
    called before each wait (for logs and health counters).
    """
    source.close()
    attempt = 0
    for delay in backoff_delays(initial_s, max_s, factor):
        attempt += 1
        try:
            source.open()
            return attempt
        except SourceUnavailable as exc:
            if max_attempts is not None and attempt >= max_attempts:
                raise
            if on_retry is not None:
                on_retry(attempt, delay, exc)
            sleep(delay)
    raise AssertionError("unreachable")  # pragma: no cover
