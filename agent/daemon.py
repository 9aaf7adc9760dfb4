"""``skidvib run``: the unattended monitoring loop (the imperative shell).

Threads
-------
* **acquisition** — opens the configured source (re-opening with back-off
  when it vanishes), reads one capture every ``source.interval_s`` and puts
  it into a bounded queue. When analysis falls behind, the newest capture is
  dropped and counted: acquisition never waits for analysis or the network.
* **main** — takes captures from the queue, runs :func:`agent.monitor.monitor_step`
  (the same code path as replay), stores the trend row and snapshots,
  queues MQTT messages into the durable outbox, answers remote requests,
  feeds the service watchdog only when real progress was made, and handles
  SIGTERM/SIGINT (stop: finish the current write, flush, publish offline)
  and SIGHUP (reload the config; an invalid one is rejected, the old kept;
  see :meth:`Daemon._reload` for what applies live and what needs a restart).
* **MQTT** — paho's network thread and the link's sender (agent/mqtt.py).

Error policy: a ``ConfigError`` at start stops with exit code 2; any other
``AgentError`` in the loop (source, store, publish trouble) is counted,
logged and reported in the health message while monitoring goes on; any
other exception is a bug and ends the process for systemd to restart.

Logs: one event per line on stderr (``key=value``), for journald.
"""

from __future__ import annotations

import dataclasses
import json
import os
import queue
import signal
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from agent.config import AgentConfig, changed_keys, load_config, with_keys_from
from agent.errors import AgentError, ConfigError, SourceError, StoreError
from agent.model import Capture, MachineState
from agent.monitor import CaptureResult, MonitorState, initial_state, monitor_step, source_problem_step

QUEUE_CAPTURES = 2
SAVE_EVERY_CAPTURES = 10
BEAT_SLICE_S = 1.0   # longest single wait of the acquisition loop (heartbeat period)
BEAT_SLACK_S = 5.0   # scheduling slack before a silent acquisition counts as hung
#: the wall clock moved this much against the monotonic clock: a clock jump (NTP step, RTC reset)
CLOCK_JUMP_S = 60.0
#: after a clock jump, age-based retention (trend downsampling) waits this long (monotonic) for the
#: clock to settle, so rows are never folded or deleted by a clock that is wrong for a while
HOUSEKEEPING_HOLD_S = 86400.0
BAD_STATES = (MachineState.ALERT, MachineState.DANGER)


def log_event(event: str, level: str = "info", stream=None, **fields: Any) -> None:
    """One structured line: ``level=info event=capture seq=12 state=normal``."""
    parts = [f"level={level}", f"event={event}"]
    for k, v in fields.items():
        if isinstance(v, float):
            v = f"{v:.3f}" if abs(v) >= 1e4 else f"{v:.4g}"  # timestamps and rates keep their digits
        text = str(v)
        if not text or any(c in text for c in ' ="\n'):
            text = json.dumps(text)
        parts.append(f"{k}={text}")
    print(" ".join(parts), file=stream or sys.stderr, flush=True)


@dataclass
class Health:
    """Counters and gauges about the agent itself (published on ``<base>/health``)."""

    started_mono_s: float
    captures_done: int = 0
    captures_dropped: int = 0
    source_errors: int = 0
    store_errors: int = 0
    publish_errors: int = 0
    reloads: int = 0
    reload_failures: int = 0
    snapshots: int = 0
    clock_jumps: int = 0
    last_error: str = ""
    storage_problem: str = ""  # the last store/outbox write failure; "" once writes succeed again
    restart_needed_keys: tuple[str, ...] = ()  # changed config keys a reload could not apply
    last_capture_utc_s: float = 0.0
    extra: dict = field(default_factory=dict)

    def values(self, now_mono_s: float) -> dict:
        return {
            "uptime_s": round(now_mono_s - self.started_mono_s, 1),
            "captures_done_count": self.captures_done,
            "captures_dropped_count": self.captures_dropped,
            "source_errors_count": self.source_errors,
            "store_errors_count": self.store_errors,
            "publish_errors_count": self.publish_errors,
            "reloads_count": self.reloads,
            "reload_failures_count": self.reload_failures,
            "snapshots_count": self.snapshots,
            "clock_jumps_count": self.clock_jumps,
            "last_capture_utc_s": self.last_capture_utc_s,
            "last_error": self.last_error,
            "storage_problem": self.storage_problem,
            "restart_needed": bool(self.restart_needed_keys),
            "restart_needed_keys": list(self.restart_needed_keys),
            **self.extra,
        }


def open_source(cfg: AgentConfig):
    """The configured source, built by its registry entry (hardware libraries imported lazily)."""
    from agent.sources import source_class

    cls = source_class(cfg.source.kind)
    return cls.from_config(cfg)


class Acquisition(threading.Thread):
    """Reads captures on schedule into a bounded queue; never blocks on the consumer."""

    def __init__(self, cfg: AgentConfig, out: queue.Queue, health: Health, *,
                 source_factory: Callable[[AgentConfig], Any] = open_source,
                 mono: Callable[[], float] = time.monotonic, wall: Callable[[], float] = time.time):
        super().__init__(name="acquisition", daemon=True)
        self.cfg, self.out, self.health = cfg, out, health
        self.source_factory, self.mono, self.wall = source_factory, mono, wall
        self.stop_event = threading.Event()
        self.ended = threading.Event()
        self.read_timeout_s = max(2.0 * cfg.source.capture_s + 5.0, 10.0)
        #: monotonic time the loop last came back from a read or a wait slice
        self.beat_mono = mono()

    def is_hung(self, now_mono_s: float) -> bool:
        """True when the thread died of a bug or has not come back from a read in time.

        Every wait is sliced (at most ``BEAT_SLICE_S``), so the only long
        silence allowed is one read, which the source bounds by ``read_timeout_s``.
        """
        if self.ended.is_set():
            return False
        if not self.is_alive():
            return self.ident is not None  # started, then ended without `ended`: a bug
        return now_mono_s - self.beat_mono > self.read_timeout_s + BEAT_SLICE_S + BEAT_SLACK_S

    def _wait(self, wait_s: float) -> bool:
        """``stop_event.wait`` in slices that keep the heartbeat fresh; True if stopped."""
        left_s = max(0.0, wait_s)
        while left_s > 0:
            step_s = min(left_s, BEAT_SLICE_S)
            if self.stop_event.wait(step_s):
                return True
            left_s -= step_s
            self.beat_mono = self.mono()
        return self.stop_event.is_set()

    def _put(self, item) -> None:
        if item[0] != "captures":  # the end of a replay and source problems are never dropped
            while not self.stop_event.is_set():
                try:
                    self.out.put(item, timeout=0.5)
                    return
                except queue.Full:
                    continue
            return
        try:
            self.out.put_nowait(item)
        except queue.Full:
            self.health.captures_dropped += 1
            log_event("capture_dropped", "warning", reason="analysis is behind", dropped=self.health.captures_dropped)

    def run(self) -> None:
        from agent.sources import EndOfSource

        src = None
        backoff_s = 0.5
        next_t = self.mono()
        interval = self.cfg.source.interval_s
        timeout_s = self.read_timeout_s
        while not self.stop_event.is_set():
            self.beat_mono = self.mono()
            try:
                if src is None:
                    src = self.source_factory(self.cfg)
                    src.open()
                    log_event("source_open", **{k: v for k, v in src.describe().items() if isinstance(v, (str, int, float))})
                    backoff_s = 0.5
                caps = src.read(timeout_s)
                self._put(("captures", tuple(caps)))
            except EndOfSource:
                self._put(("end", None))
                break
            except SourceError as exc:
                self.health.source_errors += 1
                self.health.last_error = str(exc)
                log_event("source_error", "warning", error=str(exc), kind=type(exc).__name__)
                self._put(("source_problem", str(exc)))
                if src is not None:
                    src.close()
                    src = None
                if self._wait(backoff_s):
                    break
                backoff_s = min(backoff_s * 2, 60.0)
                continue
            next_t += interval
            now = self.mono()
            if next_t < now:  # we are late (slow source): do not try to catch up in a burst
                next_t = now
            if self._wait(next_t - now):
                break
        if src is not None:
            src.close()
        self.ended.set()


class Daemon:
    """The monitoring service for one machine."""

    def __init__(self, cfg: AgentConfig, *, source_factory=open_source, use_mqtt: bool | None = None,
                 mono: Callable[[], float] = time.monotonic, wall: Callable[[], float] = time.time,
                 max_captures: int | None = None):
        self.cfg = cfg
        self.source_factory = source_factory
        self.mono, self.wall = mono, wall
        self.max_captures = max_captures
        self.mqtt_from_config = use_mqtt is None  # else forced on or off (tests, --no-mqtt)
        self.use_mqtt = cfg.mqtt.enabled if use_mqtt is None else use_mqtt
        self.health = Health(started_mono_s=mono())
        self.stop_event = threading.Event()
        self.reload_event = threading.Event()
        self.snapshot_event = threading.Event()
        self.pending: queue.SimpleQueue = queue.SimpleQueue()  # ("ack", id) / ("relearn", None) from requests
        self.last_lock = threading.Lock()  # last_result / last_captures, read by the request thread
        self.queue: queue.Queue = queue.Queue(maxsize=QUEUE_CAPTURES)
        self.ms: MonitorState = initial_state(cfg, wall())
        self.last_result: CaptureResult | None = None
        self.last_captures: tuple[Capture, ...] = ()
        self.store = None
        self.link = None
        self.remote = None
        self.controls = None
        self.open_alarm_id: str | None = None
        self.next_scheduled_snapshot_mono = mono() + cfg.store.snapshot_every_h * 3600.0
        self.next_health_mono = 0.0
        self.last_state_published: tuple | None = None
        self.next_housekeeping_mono = mono() + 3600.0
        self.housekeeping_hold_until_mono = 0.0
        self._wall_minus_mono = wall() - mono()

    # ── edges ──
    def _open_edges(self) -> None:
        from agent.store import Store

        self.store = Store.from_config(self.cfg, clock=self.wall)
        self._restore_state(self.store.state_dir)
        if self.use_mqtt:
            self._open_mqtt()

    def _open_mqtt(self) -> None:
        from agent.mqtt import MqttLink, settings_from_config
        from agent.outbox import Outbox
        from agent.remote import BasicControls, RemoteService, RequestHandler

        settings = settings_from_config(self.cfg)
        outbox = Outbox(self.store.outbox_path, max_bytes=int(self.cfg.mqtt.outbox_max_mb * 1024 * 1024),
                        overflow_topic=f"{settings.topics.base}/events")
        self.link = MqttLink(settings, outbox, clock=self.wall)
        self.controls = BasicControls(snapshot_fn=self._snapshot_now, relearn_fn=self._relearn, clock=self.wall,
                                      ack_fn=self._alarm_acknowledged)
        self.controls.mode = self.ms.mode  # a restored mode (e.g. maintenance) carries over
        self._register_open_alarm(self.ms.state.value, self.ms.since_utc_s, "")  # a restored open alarm can be acked
        self.remote = RemoteService(self.link, RequestHandler(settings.topics, self.store, self.controls, clock=self.wall))
        self.link.start()
        log_event("mqtt_start", host=settings.host, port=settings.port, base=settings.topics.base)

    def _state_file(self, state_dir: Path) -> Path:
        return state_dir / "monitor.json"

    def _restore_state(self, state_dir: Path) -> None:
        p = self._state_file(state_dir)
        try:
            doc = json.loads(p.read_text(encoding="utf-8"))
            self.ms = dataclasses.replace(
                self.ms,
                state=MachineState(doc["state"]),
                since_utc_s=float(doc["since_utc_s"]),
                reason=str(doc.get("reason", "")),
                mode=str(doc.get("mode", "monitor")),
                finding_codes=tuple(doc.get("finding_codes", ())),
                # finding spells ("shown without a break") are not carried over: the agent did not
                # watch the machine while it was down, so a spell starts again after a restart
            )
            alarm_id = doc.get("open_alarm_id")
            if isinstance(alarm_id, str) and self.ms.state in BAD_STATES:
                self.open_alarm_id = alarm_id
            log_event("state_restored", state=self.ms.state.value)
        except FileNotFoundError:
            pass
        except (OSError, ValueError, KeyError, TypeError) as exc:
            log_event("state_file_ignored", "warning", file=str(p), error=str(exc))
        self._restore_alarm_state(state_dir)

    def _restore_alarm_state(self, state_dir: Path) -> None:
        """Learned baselines and the alarm engine; an incompatible file is set aside and learning restarts."""
        from agent.assess import EngineState
        from agent.baseline import BaselineStore
        from agent.errors import IncompatibleStateFile

        try:
            baselines, problem = BaselineStore(state_dir).load()
        except StoreError as exc:
            self._count_store_error(exc)
            return
        if problem:
            log_event("baseline_set_aside", "warning", problem=problem)
        engine = None
        p = state_dir / "alarms.json"
        try:
            engine = EngineState.from_json(json.loads(p.read_text(encoding="utf-8")))
        except FileNotFoundError:
            pass
        except (OSError, ValueError, IncompatibleStateFile) as exc:
            log_event("state_file_ignored", "warning", file=str(p), error=str(exc))
        self.ms = dataclasses.replace(self.ms, baselines=baselines, engine=engine)

    def _save_state(self) -> None:
        from agent.store import json_bytes, write_atomic

        try:
            doc = {**self.ms.to_json(), "open_alarm_id": self.open_alarm_id}
            write_atomic(self._state_file(self.store.state_dir), json_bytes(doc))
            if self.ms.baselines is not None:
                from agent.baseline import BaselineStore

                BaselineStore(self.store.state_dir).save(self.ms.baselines)
            if self.ms.engine is not None:
                write_atomic(self.store.state_dir / "alarms.json", json_bytes(self.ms.engine.to_json()))
        except StoreError as exc:
            self._count_store_error(exc)

    def _count_store_error(self, exc: Exception) -> None:
        self.health.store_errors += 1
        self.health.last_error = str(exc)
        self.health.storage_problem = str(exc)
        log_event("store_error", "warning", error=str(exc))

    # ── remote controls ──
    def _snapshot_now(self) -> str:
        """Called for a remote 'snapshot' request (on the request thread): take it from the last capture."""
        with self.last_lock:
            result, caps = self.last_result, self.last_captures
        if result is None or not caps:
            from agent.errors import RequestError

            raise RequestError("no_capture", "no capture has been taken yet")
        return self._save_snapshot(result, caps, "on_request")

    def _register_open_alarm(self, state: str, t_utc_s: float, snapshot_id: str) -> None:
        if self.controls is not None and self.open_alarm_id is not None:
            self.controls.open_alarms[self.open_alarm_id] = {"state": state, "t_utc_s": t_utc_s,
                                                             "snapshot_id": snapshot_id}

    def _alarm_acknowledged(self, alarm_id: str) -> None:
        """An operator acknowledged the alarm (request thread): handled by the main loop."""
        self.pending.put(("ack", alarm_id))

    def _relearn(self) -> None:
        """A relearn was requested (request thread): handled by the main loop."""
        log_event("relearn_requested")
        self.pending.put(("relearn", None))

    def _apply_pending(self) -> None:
        """Requests from the remote thread, applied between captures so no state update is lost."""
        while True:
            try:
                what, arg = self.pending.get_nowait()
            except queue.Empty:
                return
            if what == "ack":
                self._apply_ack(arg)
            elif what == "relearn":
                self._apply_relearn()

    def _apply_ack(self, alarm_id: str) -> None:
        """The snapshot may age out now; latched feature alarms fall back to their live level."""
        try:
            self.store.unpin_alarm(alarm_id)
        except StoreError as exc:
            self._count_store_error(exc)
        if self.open_alarm_id == alarm_id:
            self.open_alarm_id = None
        if self.ms.engine is not None:
            from agent.assess import acknowledge, settings

            engine, _ = acknowledge(self.ms.engine, self.wall(), settings(self.cfg)[2])
            self.ms = dataclasses.replace(self.ms, engine=engine)
        log_event("alarm_acknowledged", alarm_id=alarm_id)

    def _apply_relearn(self) -> None:
        """Archive the learned baseline and start learning afresh (after maintenance)."""
        if self.store is not None:
            from agent.baseline import BaselineStore

            bs = BaselineStore(self.store.state_dir)
            try:
                archived = bs.archive(self.wall())
                if archived is not None:
                    log_event("baseline_archived", file=str(archived))
                bs.path.unlink(missing_ok=True)  # a restart must not bring the old baseline back
                (self.store.state_dir / "alarms.json").unlink(missing_ok=True)
            except (StoreError, OSError) as exc:
                self._count_store_error(exc)
        self.ms = dataclasses.replace(self.ms, baselines=None, engine=None)
        self._save_state()
        log_event("relearn_started")

    # ── the work ──
    def _save_snapshot(self, result: CaptureResult, caps: tuple[Capture, ...], reason: str) -> str:
        a = result.analysis
        spectra = {}
        if a is not None:
            spectra = {"f_hz": a.acc.f_hz, "acc_power_ms2sq": a.acc.power, "vel_power_mm_s_sq": a.vel.power}
        sid = self.store.save_snapshot(t_utc_s=result.t_utc_s, reason=reason, waveform_ms2=caps[0].accel_ms2,
                                       fs_hz=caps[0].fs_hz, spectra=spectra, analysis=result.to_json())
        self.health.snapshots += 1
        self.store.prune()
        log_event("snapshot", id=sid, reason=reason)
        return sid

    def _publish(self, result: CaptureResult, snapshot_id: str) -> None:
        """One capture's messages (state if it changed, measurements, events, findings),
        queued in one outbox transaction: one disk sync, all or none."""
        if self.link is None:
            return
        from agent import mqtt as m
        from agent.outbox import Kind

        t = result.t_utc_s
        mode = self.ms.mode
        out: list[m.Outgoing] = []
        try:
            shown = (result.state, result.reason, mode)
            if shown != self.last_state_published:
                self.last_state_published = shown
                out.append(m.Outgoing("state", m.state_payload(
                    result.state, result.since_utc_s, result.reason, result.action, result.urgency,
                    t_utc_s=t, mode=mode), Kind.KEPT, retain=True, replace_key="state"))
            values = {k: v for k, v in result.features.items() if k.endswith(m.UNIT_SUFFIXES) or k in m.DIMENSIONLESS}
            if result.speed_hz:
                values["speed_hz"] = result.speed_hz
                values["speed_rpm"] = result.speed_hz * 60.0
            if values:
                out.append(m.Outgoing("measurements", m.measurements_payload(
                    values, t_utc_s=t, capture_seq=result.seq, state=result.state), Kind.PERIODIC))
            for ev in result.events:
                out.append(m.Outgoing("events", m.event_payload(
                    ev["event"], t_utc_s=t, state=result.state, previous_state=ev.get("previous_state", ""),
                    severity=ev.get("severity", ""), title=ev.get("title", ev.get("reason", "")),
                    finding_code=ev.get("code", ""), snapshot_id=snapshot_id, detail=ev), Kind.KEPT))
            if result.events:
                out.append(m.Outgoing("findings", m.findings_payload(result.findings, t_utc_s=t, state=result.state),
                                      Kind.KEPT, retain=True, replace_key="findings"))
            if out:
                self._send_capture(out)
        except (AgentError, ValueError) as exc:
            self.health.publish_errors += 1
            self.health.last_error = str(exc)
            if isinstance(exc, StoreError):  # the outbox could not write
                self.health.storage_problem = str(exc)
            log_event("publish_error", "warning", error=str(exc))

    def _send_capture(self, out: list) -> None:
        """Queue ``out`` together; if one of them can never be queued (``ValueError``: larger
        than a quarter of the outbox) queue the others one by one, then raise for it."""
        try:
            self.link.send_many(out)
            return
        except ValueError as exc:
            bad = exc
        for o in out:
            try:
                self.link.send_many([o])
            except ValueError as exc:
                bad = exc
        raise bad

    def _publish_health(self, now_mono: float) -> None:
        if self.link is None or now_mono < self.next_health_mono:
            return
        from agent import mqtt as m
        from agent.outbox import Kind

        self.next_health_mono = now_mono + self.cfg.store.health_every_s
        extra = {}
        try:
            st = self.link.outbox.stats()
            extra["outbox_depth_count"] = st.depth
            extra["outbox_bytes_count"] = st.bytes
            extra["outbox_shed_periodic_count"] = st.shed_periodic
            extra["outbox_shed_kept_count"] = st.shed_kept
            extra["outbox_dropped_new_count"] = st.dropped_new
            extra["outbox_bypassed_count"] = self.link.counters.get("outbox_bypassed", 0)
            extra["mqtt_rejected_count"] = self.link.counters.get("rejected", 0)
            du = self.store.disk_usage()
            # the daemon counts store errors and snapshots itself; keep the store's figures apart
            extra.update({("stored_" + k if k.startswith("snapshots_") else k): v for k, v in du.items()
                          if isinstance(v, (int, float)) and k != "store_errors_count"})
        except (AgentError, OSError, AttributeError) as exc:
            extra["health_note"] = str(exc)
        self.health.extra = extra
        try:
            self.link.send("health", m.health_payload(self.health.values(now_mono), t_utc_s=self.wall()),
                           kind=Kind.PERIODIC, retain=True, replace_key="health")
        except AgentError as exc:
            self.health.publish_errors += 1
            self.health.last_error = str(exc)

    def _check_clock(self) -> None:
        """Notice a wall-clock jump (the monotonic clock is the reference) and hold retention."""
        now_mono = self.mono()
        offset = self.wall() - now_mono
        jump_s = offset - self._wall_minus_mono
        if abs(jump_s) > CLOCK_JUMP_S:
            self.health.clock_jumps += 1
            self.housekeeping_hold_until_mono = now_mono + HOUSEKEEPING_HOLD_S
            log_event("clock_jump", "warning", delta_s=jump_s, housekeeping_hold_s=HOUSEKEEPING_HOLD_S)
        self._wall_minus_mono = offset

    def _housekeeping(self, now_mono: float) -> None:
        """Hourly: fold old trend rows into hourly rows, apply snapshot retention (not while
        the wall clock is settling after a jump: ages measured by it would be wrong)."""
        if self.store is None or now_mono < self.next_housekeeping_mono:
            return
        if now_mono < self.housekeeping_hold_until_mono:
            return
        self.next_housekeeping_mono = now_mono + 3600.0
        try:
            merged, deleted = self.store.downsample(self.wall())
            self.store.prune()
            log_event("housekeeping", trend_rows_merged=merged, trend_rows_deleted=deleted)
        except StoreError as exc:
            self._count_store_error(exc)

    def _handle_result(self, result: CaptureResult, caps: tuple[Capture, ...]) -> None:
        snapshot_id = ""
        if self.store is not None:
            try:
                if result.seq >= 0:  # every capture, a sensor-fault one too (its levels are NaN)
                    self.store.add_trend(result.t_utc_s, result.state.value, result.speed_hz, result.features)
                    self.health.storage_problem = ""  # writes work (again)
            except StoreError as exc:
                self._count_store_error(exc)
            due = self.mono() >= self.next_scheduled_snapshot_mono and self.cfg.store.snapshot_every_h > 0
            reason = "state_change" if result.state_changed else ("scheduled" if due else "")
            if self.snapshot_event.is_set():
                reason = reason or "on_request"
                self.snapshot_event.clear()
            if reason and caps:
                try:
                    snapshot_id = self._save_snapshot(result, caps, reason)
                    if reason == "scheduled":
                        self.next_scheduled_snapshot_mono = self.mono() + self.cfg.store.snapshot_every_h * 3600.0
                    if result.state in BAD_STATES and result.state_changed:
                        # one alarm id per episode (alert → danger → alert is one episode)
                        if self.open_alarm_id is None:
                            self.open_alarm_id = f"{result.state.value}-{int(result.t_utc_s)}"
                        self.store.pin(snapshot_id, self.open_alarm_id)
                        self._register_open_alarm(result.state.value, result.t_utc_s, snapshot_id)
                except StoreError as exc:
                    self._count_store_error(exc)
            if result.state not in BAD_STATES and self.open_alarm_id and result.state_changed:
                try:
                    self.store.unpin_alarm(self.open_alarm_id)
                except StoreError as exc:
                    self._count_store_error(exc)
                if self.controls is not None:
                    self.controls.open_alarms.pop(self.open_alarm_id, None)
                self.open_alarm_id = None
            # state changes at once; otherwise every SAVE_EVERY captures, so a crash while
            # learning loses at most that much of the learned baseline
            if result.state_changed or self.health.captures_done % SAVE_EVERY_CAPTURES == 0:
                self._save_state()
        self._publish(result, snapshot_id)

    def _process(self, item) -> bool:
        """Handle one queue item; False when the source has ended."""
        kind, payload = item
        self._check_clock()
        now_utc = self.wall()
        if kind == "end":
            log_event("source_end")
            return False
        if kind == "source_problem":
            result, self.ms = source_problem_step(self.ms, now_utc, payload)
            if result.state_changed:
                log_event("state", state=result.state.value, reason=result.reason)
            self._handle_result(result, ())
            return True
        caps: tuple[Capture, ...] = payload
        if self.controls is not None:
            mode = self.controls.current_mode()
            if mode == "learn":  # "learn" = forget the baseline and learn afresh, then monitor as usual
                self._apply_relearn()
                self.controls.mode, self.controls.mode_until_utc_s = "monitor", None
                mode = "monitor"
            if mode != self.ms.mode:
                self.ms = dataclasses.replace(self.ms, mode=mode)
                log_event("mode", mode=mode)
        result, self.ms = monitor_step(self.ms, caps, self.cfg)
        with self.last_lock:
            self.last_result, self.last_captures = result, caps
        self.health.captures_done += 1
        self.health.last_capture_utc_s = result.t_utc_s
        log_event("capture", seq=result.seq, state=result.state.value,
                  vel_rms_mm_s=result.features.get("vel_rms_mm_s", float("nan")),
                  speed_hz=result.speed_hz if result.speed_hz else "n/a")
        if result.state_changed:
            log_event("state", state=result.state.value, previous=result.previous_state.value, reason=result.reason)
        self._handle_result(result, caps)
        return True

    def _reload(self) -> None:
        """SIGHUP: read the config again and apply what can change while running.

        Live: source (acquisition restarts), sensor, machine, analysis, baseline, alarms
        (the next capture uses them), asset name and description, the store's retention,
        snapshot schedule and health period, and ``mqtt.outbox_max_mb``. Read only at
        start: ``store.state_dir``, the rest of ``[mqtt]`` and, with MQTT on, the asset
        tag and site (they name the topic tree). Those keep their running values; they
        are named in one warning line, in health (``restart_needed_keys``) and in the
        service status until a restart, or until a reload puts them back.
        """
        self.reload_event.clear()
        try:
            new = load_config(self.cfg.path)
        except ConfigError as exc:
            self.health.reload_failures += 1
            self.health.last_error = "reload rejected: " + "; ".join(exc.problems)
            log_event("reload_rejected", "error", problems="; ".join(exc.problems))
            return
        self.health.reloads += 1
        changed = changed_keys(self.cfg, new)
        pending = tuple(k for k in changed if self._needs_restart(k))
        applied = tuple(k for k in changed if k not in pending)
        self.cfg = with_keys_from(new, self.cfg, pending)
        self.health.restart_needed_keys = pending
        self._apply_live(applied)
        # health goes out at once (reloads_count, restart_needed), then every health_every_s
        self.next_health_mono = 0.0
        log_event("reload", applied=",".join(applied) or "none")
        if pending:
            sections = dict.fromkeys(k.split(".")[0] for k in pending)  # in order, once each
            log_event("reload_restart_needed", "warning", sections=",".join(sections), keys=",".join(pending),
                      note="changed in the file, not applied: restart the service to apply")

    def _needs_restart(self, key: str) -> bool:
        """True for a config key that is read only when the service starts."""
        if key == "store.state_dir":
            return True
        if key == "mqtt.enabled":
            return self.mqtt_from_config
        if not self.use_mqtt:
            return False
        if key.startswith("mqtt."):
            return key != "mqtt.outbox_max_mb"
        # the topic tree's asset level and the default client id; the site level unless set in [mqtt]
        return key == "asset.tag" or (key == "asset.site" and not self.cfg.mqtt.site)

    def _apply_live(self, keys: tuple[str, ...]) -> None:
        """Carry the reloaded values of ``keys`` (already in ``self.cfg``) into the running parts."""
        from agent.store import store_limits

        now = self.mono()
        st = self.cfg.store
        if self.store is not None and any(k.startswith(("store.snapshot_max", "store.trend_")) for k in keys):
            self.store.set_limits(**store_limits(st))
        if "store.snapshot_every_h" in keys:
            self.next_scheduled_snapshot_mono = now + st.snapshot_every_h * 3600.0
        if "mqtt.outbox_max_mb" in keys and self.link is not None:
            self.link.outbox.set_max_bytes(int(self.cfg.mqtt.outbox_max_mb * 1024 * 1024))
        # the sources copy the sensor's calibration when they are built: a new one needs a new source
        if any(k.startswith(("source.", "sensor.")) for k in keys):
            self._restart_acquisition()

    def status_text(self) -> str:
        """The one-line service status (systemd STATUS=)."""
        text = f"{self.ms.state.value}; {self.health.captures_done} captures"
        if self.health.restart_needed_keys:
            text += "; restart needed for " + ", ".join(self.health.restart_needed_keys)
        return text

    def _restart_acquisition(self) -> None:
        if getattr(self, "acq", None) is not None:
            self.acq.stop_event.set()
            self.acq.join(10)
        self.acq = Acquisition(self.cfg, self.queue, self.health, source_factory=self.source_factory,
                               mono=self.mono, wall=self.wall)
        self.acq.start()

    def install_signal_handlers(self) -> None:
        signal.signal(signal.SIGTERM, lambda *_: self.stop_event.set())
        signal.signal(signal.SIGINT, lambda *_: self.stop_event.set())
        signal.signal(signal.SIGHUP, lambda *_: self.reload_event.set())

    def run(self) -> int:
        from agent.sdnotify import Notifier, WatchdogGate

        notifier = Notifier.from_env()
        gate = WatchdogGate(notifier)
        self._open_edges()
        log_event("start", asset=self.cfg.asset.tag, source=self.cfg.source.kind, pid=os.getpid())
        notifier.ready("starting: waiting for the first capture")
        self.acq = None
        self._restart_acquisition()
        if self.remote is not None:
            self.remote.start()
        try:
            while not self.stop_event.is_set():
                self._apply_pending()
                if self.reload_event.is_set():
                    notifier.reloading()
                    self._reload()
                    notifier.ready("config reloaded; " + self.status_text())
                try:
                    item = self.queue.get(timeout=min(1.0, gate.max_wait_s))
                except queue.Empty:
                    # waiting for the next capture is progress only while acquisition
                    # is not hung (or dead); otherwise the pings stop and systemd restarts us
                    if self.acq is None or not self.acq.is_hung(self.mono()):
                        gate.progress()
                    gate.maybe_ping(self.mono())
                    self._publish_health(self.mono())
                    continue
                gate.progress()
                if not self._process(item):
                    break
                gate.progress()
                gate.maybe_ping(self.mono())
                self._publish_health(self.mono())
                self._housekeeping(self.mono())
                notifier.status(self.status_text())
                if self.max_captures is not None and self.health.captures_done >= self.max_captures:
                    break
        finally:
            notifier.stopping("stopping")
            self.shutdown()
        return 0

    def shutdown(self) -> None:
        log_event("stopping", captures=self.health.captures_done)
        if getattr(self, "acq", None) is not None:
            self.acq.stop_event.set()
            self.acq.join(10)
        if self.remote is not None:
            self.remote.stop()
        if self.store is not None:
            self._save_state()
        if self.link is not None:
            self.next_health_mono = 0.0  # a last health message on the way out
            self._publish_health(self.mono())
            self.link.stop(timeout_s=5.0)
        if self.store is not None:
            self.store.close()
        log_event("stopped")


def run_daemon(config_path: str, *, max_captures: int | None = None, no_mqtt: bool = False) -> int:
    cfg = load_config(config_path)  # ConfigError → exit 2 in the CLI
    d = Daemon(cfg, use_mqtt=False if no_mqtt else None, max_captures=max_captures)
    d.install_signal_handlers()
    return d.run()
