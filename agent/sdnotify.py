"""Service-manager edge: tells systemd that the agent is ready, what it is doing, and that it is alive.

A pure-Python client of the ``sd_notify`` protocol (no libsystemd): one
``AF_UNIX`` ``SOCK_DGRAM`` datagram of newline-separated ``KEY=VALUE`` lines to
the socket named in ``$NOTIFY_SOCKET`` (a path, or ``@name`` for a Linux
abstract socket). When ``$NOTIFY_SOCKET`` is unset (run by hand, in tests, in
replay) every call is a cheap no-op. A send never raises: failures are counted
in :attr:`Notifier.n_failed` for the health report, because losing the service
manager must not stop the monitoring.

The watchdog keep-alive is tied to real progress of the main loop. No thread
ever pings: :class:`WatchdogGate` sends ``WATCHDOG=1`` only when the main loop
has recorded progress since the last ping, and at most once per half of
``$WATCHDOG_USEC``. A loop stuck in a read, an analysis or a publish stops
recording progress, so the pings stop and systemd kills and restarts the
service after ``WatchdogSec=``.

How the daemon uses it (all calls from the main thread)::

    from agent.sdnotify import Notifier, WatchdogGate

    notifier = Notifier.from_env()            # reads NOTIFY_SOCKET, WATCHDOG_USEC, WATCHDOG_PID
    gate = WatchdogGate(notifier)             # interval = notifier.watchdog_interval_s

    # start-up: config loaded (a ConfigError exits 2 before this), store opened.
    # Do not wait for the sensor: a missing device is weather, handled in the loop.
    notifier.ready("starting: waiting for first capture")

    while not stop_event.is_set():            # threading.Event set by the SIGTERM handler
        try:
            captures = source.read(timeout_s)     # bounded: raises SourceStalled
            gate.progress()                       # a capture was acquired
            result = analyse(captures)
            gate.progress()                       # ... and analysed
            save_and_publish(result)
            notifier.status(f"{state}; last capture {utc_iso}")
        except AgentError:                        # weather: counted, loop goes on
            gate.progress()                       # the loop itself is alive
            gate.idle(back_off_s, stop_event)     # back-off wait, watchdog fed
        gate.maybe_ping(time.monotonic())
        # waiting for the next capture: a timed wait that returns is progress
        # (a hang is not), so wait in slices of at most gate.max_wait_s:
        gate.idle(seconds_to_next_capture, stop_event)   # True if stop_event was set

    notifier.stopping()                       # on SIGTERM, before closing the edges

    # on SIGHUP (``systemctl reload``), in the main loop, not in the handler:
    notifier.reloading()
    ...  # re-read config; on ConfigError keep the old one and log it
    notifier.ready("running; config reloaded")

Rule of thumb for ``WatchdogSec=`` (common practice): a ping is sent at the
first progress after half the watchdog time, so every blocking step of the loop
(one read, one analysis, one sleep slice) must finish well within half of
``WatchdogSec=``.

References: systemd ``sd_notify(3)`` and ``sd_watchdog_enabled(3)`` manual pages.
"""

from __future__ import annotations

import math
import os
import socket
import threading
import time
from collections.abc import Mapping

_MAX_STATUS_CHARS = 200


class Notifier:
    """Sender of ``sd_notify`` messages to the service manager.

    Parameters
    ----------
    address : str or None
        The ``$NOTIFY_SOCKET`` value: an absolute path, or ``@name`` for an
        abstract socket. ``None`` makes every call a no-op.
    watchdog_usec : int or None
        The ``$WATCHDOG_USEC`` value in microseconds, ``None`` when the
        watchdog is not enabled.
    watchdog_pid : int or None
        The ``$WATCHDOG_PID`` value. When set and different from this
        process's PID the watchdog is meant for another process, so it is off.
    """

    def __init__(
        self,
        address: str | None,
        watchdog_usec: int | None = None,
        watchdog_pid: int | None = None,
    ):
        self.address = address or None
        self.watchdog_usec = watchdog_usec if watchdog_usec and watchdog_usec > 0 else None
        self.watchdog_pid = watchdog_pid
        self.n_sent = 0
        self.n_failed = 0
        self.last_error: str | None = None
        self._sock: socket.socket | None = None
        self._ready = False

    @classmethod
    def from_env(cls, environ: Mapping[str, str] = os.environ) -> "Notifier":
        """Build from ``NOTIFY_SOCKET``, ``WATCHDOG_USEC`` and ``WATCHDOG_PID``.

        Unparsable watchdog values switch the watchdog off (as libsystemd does).
        """
        address = environ.get("NOTIFY_SOCKET") or None
        return cls(
            address,
            watchdog_usec=_positive_int(environ.get("WATCHDOG_USEC")),
            watchdog_pid=_positive_int(environ.get("WATCHDOG_PID")),
        )

    @property
    def enabled(self) -> bool:
        """True when a notify socket was given."""
        return self.address is not None

    @property
    def watchdog_interval_s(self) -> float | None:
        """Seconds between keep-alives (half of ``WATCHDOG_USEC``), or ``None``.

        ``None`` when there is no notify socket, no watchdog, or the watchdog
        names another process in ``WATCHDOG_PID``.
        """
        if self.address is None or self.watchdog_usec is None:
            return None
        if self.watchdog_pid is not None and self.watchdog_pid != os.getpid():
            return None
        return self.watchdog_usec / 2e6

    def ready(self, status: str | None = None) -> bool:
        """Send ``READY=1`` (with an optional status line) once per start or reload."""
        if self._ready:
            return False
        self._ready = True
        return self._send("READY=1", status)

    def status(self, text: str) -> bool:
        """Send a one-line ``STATUS=`` shown by ``systemctl status``."""
        return self._send(None, text)

    def watchdog(self) -> bool:
        """Send one ``WATCHDOG=1`` keep-alive (normally through :class:`WatchdogGate`)."""
        return self._send("WATCHDOG=1", None)

    def stopping(self, status: str | None = None) -> bool:
        """Send ``STOPPING=1``: shutdown has begun."""
        return self._send("STOPPING=1", status)

    def reloading(self, status: str | None = None) -> bool:
        """Send ``RELOADING=1``; call :meth:`ready` again when the reload is done.

        ``MONOTONIC_USEC`` is included as newer systemd requires for
        ``Type=notify-reload``; older versions ignore it.
        """
        self._ready = False
        usec = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
        return self._send(f"RELOADING=1\nMONOTONIC_USEC={usec}", status)

    def close(self) -> None:
        """Close the socket. Safe to call more than once; a later send reopens it."""
        if self._sock is not None:
            self._sock.close()
            self._sock = None

    def _send(self, head: str | None, status: str | None) -> bool:
        if self.address is None:
            return False
        lines = [head] if head else []
        if status is not None:
            lines.append("STATUS=" + _one_line(status))
        payload = ("\n".join(lines) + "\n").encode("utf-8", "replace")
        try:
            if self._sock is None:
                self._sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC)
            self._sock.sendto(payload, _sockaddr(self.address))
        except (OSError, ValueError) as exc:
            self.n_failed += 1
            self.last_error = f"notify socket {self.address}: {exc}"
            self.close()
            return False
        self.n_sent += 1
        return True


class WatchdogGate:
    """Sends watchdog keep-alives only while the main loop makes progress.

    Parameters
    ----------
    notifier : Notifier
        Where the keep-alives go.
    interval_s : float or None
        Least time between keep-alives; default
        ``notifier.watchdog_interval_s``. ``None`` disables the gate.
    """

    def __init__(self, notifier: Notifier, interval_s: float | None = None):
        self.notifier = notifier
        self.interval_s = notifier.watchdog_interval_s if interval_s is None else interval_s
        self.n_pings = 0
        self._progressed = False
        self._last_ping_s = -math.inf

    @property
    def enabled(self) -> bool:
        """True when keep-alives are expected by the service manager."""
        return self.interval_s is not None

    @property
    def max_wait_s(self) -> float:
        """Longest slice the loop may sleep without checking in (``inf`` when off)."""
        return math.inf if self.interval_s is None else self.interval_s

    def progress(self) -> None:
        """Record that the main loop finished a real unit of work."""
        self._progressed = True

    def idle(self, wait_s: float, stop: threading.Event | None = None) -> bool:
        """Wait up to ``wait_s`` seconds in slices of at most :attr:`max_wait_s`.

        After each slice the wait counts as progress and a keep-alive is sent
        when due. Returns True as soon as ``stop`` is set, False when the time
        is up.
        """
        end_s = time.monotonic() + max(0.0, wait_s)
        while True:
            left_s = end_s - time.monotonic()
            if left_s <= 0:
                return bool(stop is not None and stop.is_set())
            slice_s = min(left_s, self.max_wait_s)
            if stop is not None:
                if stop.wait(slice_s):
                    return True
            else:
                time.sleep(slice_s)
            self.progress()
            self.maybe_ping(time.monotonic())

    def maybe_ping(self, now_monotonic_s: float) -> bool:
        """Send ``WATCHDOG=1`` if progress was recorded and the interval has passed.

        ``now_monotonic_s`` is ``time.monotonic()``. Returns True if a
        keep-alive was sent.
        """
        if self.interval_s is None or not self._progressed:
            return False
        if now_monotonic_s - self._last_ping_s < self.interval_s:
            return False
        self._progressed = False
        self._last_ping_s = now_monotonic_s
        self.n_pings += 1
        return self.notifier.watchdog()


def _positive_int(text: str | None) -> int | None:
    try:
        value = int(text) if text is not None else None
    except ValueError:
        return None
    return value if value is not None and value > 0 else None


def _one_line(text: str) -> str:
    flat = " ".join(str(text).split())
    return flat[:_MAX_STATUS_CHARS]


def _sockaddr(address: str) -> str | bytes:
    if address.startswith("/"):
        return address
    if address.startswith("@") and len(address) > 1:
        return b"\0" + address[1:].encode("utf-8")
    raise ValueError("unsupported address (need a path or @abstract name)")
