"""MQTT to the plant: topic tree, payload builders, and the link to the broker.

Topic tree (``<base>`` = ``<prefix>/<site>/<asset>``; see docs/mqtt.md)::

    <base>/availability   "online" / "offline"      retained, QoS 1; the will sets "offline"
    <base>/state          machine state for the HMI  retained, QoS 1 (outbox, latest wins)
    <base>/measurements   one per capture            QoS 1 (outbox, shed first when full)
    <base>/events         state changes, new findings, outbox overflow   QoS 1 (outbox, kept)
    <base>/findings       current findings in detail retained, QoS 1 (outbox, kept)
    <base>/health         the agent's own health     retained, QoS 1 (outbox, shed first)
    <base>/req/<cmd>      requests to the agent      (remote.py)
    <base>/res/<token>    replies from the agent     QoS 1, not durable

The payload builders are pure functions (dicts in, dicts out); :func:`encode`
makes compact JSON bytes. :class:`MqttLink` is the only code that talks to
paho: its callbacks run on paho's network thread and only put events into a
queue; one sender thread does every ``publish()`` and all outbox bookkeeping
(paho calls ``on_publish`` while holding its own lock, so a lock shared
between a callback and a publisher deadlocks).
"""

from __future__ import annotations

import json
import logging
import math
import queue
import re
import ssl
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping, Sequence

import paho.mqtt.client as paho
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from agent.errors import PublishError, StoreError
from agent.outbox import Kind, NewMessage, Outbox, new_message_id

log = logging.getLogger("agent.mqtt")

SCHEMA = 1
ONLINE = b"online"
OFFLINE = b"offline"

#: unit suffixes accepted in measurement keys (units in the names, always)
UNIT_SUFFIXES = ("_hz", "_rpm", "_cpm", "_mm_s", "_ms2", "_g", "_db", "_s", "_pct",
                 "_ratio", "_count", "_v", "_degc", "_um")

#: dimensionless quantities: the name says what it is, there is no unit to add
DIMENSIONLESS = ("crest_factor", "kurtosis", "skewness", "confidence", "iso_zone")

_LEVEL = re.compile(r"^[A-Za-z0-9_.-]{1,64}$")
_CMD = re.compile(r"^[a-z][a-z_]{0,31}$")


# --------------------------------------------------------------------------
# topics
# --------------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class Topics:
    """The agent's topic tree under ``<prefix>/<site>/<asset>``."""

    prefix: str
    site: str
    asset: str

    def __post_init__(self) -> None:
        for part in self.prefix.split("/") + [self.site, self.asset]:
            if not _LEVEL.match(part):
                raise ValueError(f"MQTT topic level {part!r} must be 1-64 characters of "
                                 f"letters, digits, '_', '.', '-' (no '/', '+', '#')")

    @property
    def base(self) -> str:
        return f"{self.prefix}/{self.site}/{self.asset}"

    availability = property(lambda self: f"{self.base}/availability")
    state = property(lambda self: f"{self.base}/state")
    measurements = property(lambda self: f"{self.base}/measurements")
    events = property(lambda self: f"{self.base}/events")
    findings = property(lambda self: f"{self.base}/findings")
    health = property(lambda self: f"{self.base}/health")
    requests = property(lambda self: f"{self.base}/req/+")
    reply_prefix = property(lambda self: f"{self.base}/res/")

    def request_command(self, topic: str) -> str | None:
        """``"list"`` for ``<base>/req/list``; None for anything else."""
        head = f"{self.base}/req/"
        if not topic.startswith(head):
            return None
        cmd = topic[len(head):]
        return cmd if _CMD.match(cmd) else None


# --------------------------------------------------------------------------
# pure payload builders
# --------------------------------------------------------------------------
def _clean(value: Any) -> Any:
    """JSON-safe copy: non-finite floats become None, tuples lists, numpy scalars floats."""
    if isinstance(value, Mapping):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, int):
        return int(value)
    try:
        f = float(value)
    except (TypeError, ValueError):
        return str(value)
    return f if math.isfinite(f) else None


def encode(payload: Mapping[str, Any]) -> bytes:
    """Compact UTF-8 JSON; NaN/inf become null (JSON has no NaN)."""
    return json.dumps(_clean(payload), separators=(",", ":"), allow_nan=False,
                      ensure_ascii=False).encode()


def _t(t_utc_s: float) -> float:
    return round(float(t_utc_s), 3)


def state_payload(state: str, since_utc_s: float, reason: str, action: str, urgency: str,
                  *, t_utc_s: float, mode: str = "monitor", severity: str = "") -> dict:
    """Small retained message for the HMI: what state, since when, why, what to do."""
    state = getattr(state, "value", state)
    return {"schema": SCHEMA, "t_utc_s": _t(t_utc_s), "state": str(state),
            "since_utc_s": _t(since_utc_s), "reason": reason, "action": action,
            "urgency": urgency, "severity": severity, "mode": mode}


def measurements_payload(values: Mapping[str, float], *, t_utc_s: float, capture_seq: int,
                         state: str, msg_id: str | None = None) -> dict:
    """One capture's levels. Every key ends in a unit suffix (``UNIT_SUFFIXES``) or is a
    dimensionless quantity named in ``DIMENSIONLESS``."""
    for key in values:
        if not key.endswith(UNIT_SUFFIXES) and key not in DIMENSIONLESS:
            raise ValueError(f"measurement key {key!r} has no unit suffix "
                             f"(one of {', '.join(UNIT_SUFFIXES)})")
    return {"schema": SCHEMA, "id": msg_id or new_message_id(), "t_utc_s": _t(t_utc_s),
            "capture_seq": int(capture_seq), "state": str(getattr(state, "value", state)),
            "values": dict(values)}


def event_payload(event: str, *, t_utc_s: float, state: str, previous_state: str = "",
                  severity: str = "", title: str = "", finding_code: str = "",
                  snapshot_id: str = "", msg_id: str | None = None,
                  detail: Mapping[str, Any] | None = None) -> dict:
    """One event: ``state_change``, ``new_finding``, ``alarm_ack``, ``mode_change`` ..."""
    return {"schema": SCHEMA, "id": msg_id or new_message_id(), "t_utc_s": _t(t_utc_s),
            "type": event, "state": str(getattr(state, "value", state)),
            "previous_state": str(getattr(previous_state, "value", previous_state)),
            "severity": severity, "title": title, "finding_code": finding_code,
            "snapshot_id": snapshot_id, "detail": dict(detail or {})}


def findings_payload(findings: Sequence[Any], *, t_utc_s: float, state: str,
                     msg_id: str | None = None) -> dict:
    """The current findings in full (``Finding.to_json()`` or plain dicts)."""
    items = [f.to_json() if hasattr(f, "to_json") else dict(f) for f in findings]
    return {"schema": SCHEMA, "id": msg_id or new_message_id(), "t_utc_s": _t(t_utc_s),
            "state": str(getattr(state, "value", state)), "findings": items}


def health_payload(values: Mapping[str, Any], *, t_utc_s: float) -> dict:
    """The agent's own health (uptime_s, captures_done_count, outbox_depth_count, ...)."""
    return {"schema": SCHEMA, "t_utc_s": _t(t_utc_s), **dict(values)}


# --------------------------------------------------------------------------
# the link
# --------------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class MqttSettings:
    """Everything the link needs; built from the ``[mqtt]`` config section."""

    host: str
    port: int = 1883
    client_id: str = ""
    keepalive_s: int = 15
    username: str | None = None
    password_file: str | None = None  # the password lives in its own file, not the TOML
    tls_ca_file: str | None = None
    tls_cert_file: str | None = None
    tls_key_file: str | None = None
    protocol: str = "auto"  # "auto" (5, falling back to 3.1.1) | "5" | "3.1.1"
    prefix: str = "skidvib"
    site: str = "site"
    asset: str = "asset"
    window: int = 10  # our in-flight window; kept below paho's max_inflight (20)
    max_queued: int = 100  # paho's own queue bound (it also holds replies)
    reconnect_min_s: float = 1.0
    reconnect_max_s: float = 60.0
    requests_max: int = 32  # inbound request queue bound

    def __post_init__(self) -> None:
        if not 1 <= self.port <= 65535:
            raise ValueError(f"mqtt port {self.port} out of range 1..65535")
        if not 1 <= self.keepalive_s <= 3600:  # the config asks for >= 5; tests use less
            raise ValueError(f"mqtt keepalive_s {self.keepalive_s} out of range 1..3600")
        if self.protocol not in ("auto", "5", "3.1.1"):
            raise ValueError(f"mqtt protocol {self.protocol!r} not one of auto, 5, 3.1.1")
        if not 1 <= self.window <= 20:
            raise ValueError(f"mqtt window {self.window} out of range 1..20")
        if (self.tls_cert_file is None) != (self.tls_key_file is None):
            raise ValueError("mqtt tls_cert_file and tls_key_file go together")

    @property
    def topics(self) -> Topics:
        return Topics(self.prefix, self.site, self.asset)


def topic_level(name: str) -> str:
    """A free-text name (site, tag) made into one safe topic level: ``"Plant 3 / North"``
    → ``"plant_3_north"``."""
    slug = re.sub(r"[^a-z0-9_.-]+", "_", name.strip().lower()).strip("_")
    return slug[:64] or "unnamed"


def settings_from_config(cfg) -> MqttSettings:
    """:class:`MqttSettings` from an ``AgentConfig`` (its ``mqtt`` and ``asset`` sections)."""
    from agent.config import resolve_path

    m, a = cfg.mqtt, cfg.asset

    def file(v: str) -> str | None:
        return str(resolve_path(cfg, v)) if v else None

    return MqttSettings(
        host=m.host, port=m.port, client_id=m.client_id or f"skidvib-{topic_level(a.tag)}",
        keepalive_s=m.keepalive_s, username=m.username or None,
        password_file=file(m.password_file), tls_ca_file=file(m.tls_ca),
        tls_cert_file=file(m.tls_cert), tls_key_file=file(m.tls_key), protocol=m.protocol,
        prefix=m.prefix, site=m.site or topic_level(a.site), asset=topic_level(a.tag))


@dataclass(frozen=True, slots=True)
class Outgoing:
    """One durable message for :meth:`MqttLink.send_many`, on ``<base>/<suffix>``."""

    suffix: str
    payload: Mapping[str, Any]
    kind: Kind
    retain: bool = False
    replace_key: str | None = None


@dataclass(frozen=True, slots=True)
class Inbound:
    """A request as it arrived: command from the topic, raw payload, MQTT 5 reply fields."""

    cmd: str
    payload: bytes
    response_topic: str | None
    correlation_data: bytes | None
    protocol: str


def read_password(path: str | None) -> str | None:
    if path is None:
        return None
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise PublishError(f"mqtt password file {path}: {exc.strerror or exc}") from exc
    pw = text.rstrip("\r\n")
    if not pw:
        raise PublishError(f"mqtt password file {path} is empty")
    return pw


class MqttLink:
    """Connection to the broker, durable delivery from the outbox, requests in.

    Use: ``link.start()``; ``link.send(...)`` to queue durable messages;
    ``link.reply(...)`` for non-durable replies; ``link.requests`` is a
    bounded queue of :class:`Inbound`; ``link.stop()`` flushes, publishes
    "offline" and disconnects.
    """

    def __init__(self, settings: MqttSettings, outbox: Outbox, *, clock=time.time):
        self.settings = settings
        self.topics = settings.topics
        self.outbox = outbox
        self._clock = clock
        self._password = read_password(settings.password_file)
        self._events: queue.SimpleQueue = queue.SimpleQueue()
        self.requests: queue.Queue[Inbound] = queue.Queue(maxsize=settings.requests_max)
        self._direct: queue.Queue[tuple] = queue.Queue(maxsize=64)  # replies, outbox bypass
        self._protocol = "3.1.1" if settings.protocol == "3.1.1" else "5"
        self._client: paho.Client | None = None
        self._thread: threading.Thread | None = None
        self._connected = threading.Event()
        self._stopped = threading.Event()
        self._inflight: dict[int, tuple[int, str]] = {}  # mid -> (seq, msg_id)
        self._direct_inflight: set[int] = set()
        self._unacked: list[tuple[int, str]] = []  # acknowledged, but the delete failed (disk full)
        self._last_seq = 0
        self.counters = {"connects": 0, "disconnects": 0, "published": 0, "acked": 0,
                         "rejected": 0, "replies_dropped": 0, "requests_dropped": 0,
                         "connect_failures": 0, "outbox_bypassed": 0}
        self.last_error = ""

    # -- public API -------------------------------------------------------
    @property
    def connected(self) -> bool:
        return self._connected.is_set()

    @property
    def protocol(self) -> str:
        return self._protocol

    def wait_connected(self, timeout_s: float) -> bool:
        return self._connected.wait(timeout_s)

    def start(self) -> None:
        if self._thread is not None:
            raise RuntimeError("MqttLink already started")
        self._thread = threading.Thread(target=self._run, name="mqtt-sender", daemon=True)
        self._thread.start()

    def send(self, suffix: str, payload: Mapping[str, Any], *, kind: Kind,
             retain: bool = False, replace_key: str | None = None) -> int | None:
        """Queue a durable QoS 1 message on ``<base>/<suffix>``; returns the outbox seq."""
        return self.send_many([Outgoing(suffix, payload, kind, retain, replace_key)])[0]

    def send_many(self, messages: Sequence[Outgoing]) -> list[int | None]:
        """Queue several durable QoS 1 messages (one capture's) in one outbox transaction:
        one disk sync, all or none on disk, sent in list order. Returns their outbox seqs."""
        rows = [NewMessage(f"{self.topics.base}/{m.suffix}", encode(m.payload), m.kind,
                           msg_id=str(m.payload.get("id") or new_message_id()), qos=1,
                           retain=m.retain, replace_key=m.replace_key) for m in messages]
        try:
            seqs = self.outbox.enqueue_many(rows)
        except StoreError:
            # the disk refuses (full): while connected, publish without the on-disk
            # guarantee rather than not at all; otherwise the caller counts the loss
            if not self.connected:
                raise
            for r in rows:
                if not self._put_direct(r.topic, r.payload, None, r.retain):
                    raise
                self.counters["outbox_bypassed"] += 1
            return [None] * len(rows)
        self._events.put(("wake",))
        return seqs

    def _put_direct(self, topic: str, body: bytes, corr: bytes | None, retain: bool) -> bool:
        try:
            self._direct.put_nowait((topic, bytes(body), corr, retain))
        except queue.Full:
            return False
        self._events.put(("wake",))
        return True

    def reply(self, topic: str, payload: bytes, *, correlation_data: bytes | None = None) -> bool:
        """Publish a reply now (QoS 1, not durable). False if it had to be dropped."""
        if not self.connected or not self._put_direct(topic, payload, correlation_data, False):
            self.counters["replies_dropped"] += 1
            return False
        return True

    def stop(self, timeout_s: float = 5.0) -> None:
        """Flush the outbox (up to ``timeout_s``), publish "offline", disconnect."""
        if self._thread is None:
            return
        self._events.put(("stop", time.monotonic() + timeout_s))
        self._thread.join(timeout_s + 5)
        self._thread = None

    def health(self) -> dict:
        st = self.outbox.stats()
        return {"mqtt_connected": self.connected, "mqtt_protocol": self._protocol,
                "mqtt_last_error": self.last_error,
                "outbox_depth_count": st.depth, "outbox_bytes": st.bytes,
                "outbox_shed_periodic_count": st.shed_periodic,
                "outbox_shed_kept_count": st.shed_kept,
                **{f"mqtt_{k}_count": v for k, v in self.counters.items()}}

    # -- paho client ------------------------------------------------------
    def _make_client(self) -> paho.Client:
        s = self.settings
        proto = paho.MQTTv5 if self._protocol == "5" else paho.MQTTv311
        kwargs = {} if proto == paho.MQTTv5 else {"clean_session": True}
        c = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id=s.client_id,
                        protocol=proto, **kwargs)
        if s.username is not None:
            c.username_pw_set(s.username, self._password)
        if s.tls_ca_file or s.tls_cert_file:
            try:
                c.tls_set(ca_certs=s.tls_ca_file, certfile=s.tls_cert_file,
                          keyfile=s.tls_key_file, cert_reqs=ssl.CERT_REQUIRED)
            except (OSError, ssl.SSLError, ValueError) as exc:
                raise PublishError(f"mqtt TLS files: {exc}") from exc
        c.will_set(self.topics.availability, OFFLINE, qos=1, retain=True)
        c.max_inflight_messages_set(20)
        c.max_queued_messages_set(s.max_queued)
        c.reconnect_delay_set(s.reconnect_min_s, s.reconnect_max_s)
        ev = self._events
        c.on_connect = lambda cl, ud, flags, rc, props: ev.put(("connect", rc))
        c.on_disconnect = lambda cl, ud, flags, rc, props: ev.put(("disconnect", rc))
        c.on_publish = lambda cl, ud, mid, rc, props: ev.put(("puback", mid, rc))
        c.on_message = self._on_message
        c.on_subscribe = lambda cl, ud, mid, rcs, props: None
        return c

    def _on_message(self, client, userdata, msg) -> None:  # paho's thread: queue only
        cmd = self.topics.request_command(msg.topic)
        if cmd is None:
            return
        props = getattr(msg, "properties", None)
        rt = getattr(props, "ResponseTopic", None) if props is not None else None
        cd = getattr(props, "CorrelationData", None) if props is not None else None
        try:
            self.requests.put_nowait(Inbound(cmd, bytes(msg.payload), rt, cd, self._protocol))
        except queue.Full:
            self.counters["requests_dropped"] += 1

    # -- sender thread ----------------------------------------------------
    def _run(self) -> None:
        delay = self.settings.reconnect_min_s
        deadline = None
        while True:
            if self._client is None:
                try:
                    self._client = self._make_client()
                    self._client.connect(self.settings.host, self.settings.port,
                                         keepalive=self.settings.keepalive_s)
                    self._client.loop_start()
                    delay = self.settings.reconnect_min_s
                except PublishError as exc:
                    self.last_error = str(exc)
                    log.error("event=mqtt_config_error error=%r", self.last_error)
                    self._client = None
                except (OSError, ValueError) as exc:
                    self.counters["connect_failures"] += 1
                    self.last_error = f"connect {self.settings.host}:{self.settings.port}: {exc}"
                    log.warning("event=mqtt_connect_failed error=%r retry_s=%.1f",
                                self.last_error, delay)
                    self._client = None
            try:
                ev = self._events.get(timeout=delay if self._client is None else 0.5)
            except queue.Empty:
                ev = None
            if self._client is None:
                delay = min(delay * 2, self.settings.reconnect_max_s)
            while ev is not None:
                if ev[0] == "stop":
                    deadline = ev[1]
                else:
                    self._handle(ev)
                try:
                    ev = self._events.get_nowait()
                except queue.Empty:
                    ev = None
            self._pump()
            if deadline is not None:
                if self._finish(deadline):
                    return

    def _handle(self, ev: tuple) -> None:
        kind = ev[0]
        if kind == "connect":
            rc = ev[1]
            if rc.is_failure:
                self.counters["connect_failures"] += 1
                self.last_error = f"broker refused connection: {rc.getName()}"
                log.warning("event=mqtt_refused reason=%r", rc.getName())
                if (self.settings.protocol == "auto" and self._protocol == "5"
                        and rc.value in (1, 0x84)):
                    self._fallback_311()
                return
            self.counters["connects"] += 1
            self.last_error = ""
            self._connected.set()
            c = self._client
            c.subscribe(self.topics.requests, qos=1)
            c.publish(self.topics.availability, ONLINE, qos=1, retain=True)
            log.info("event=mqtt_connected broker=%s:%d protocol=%s", self.settings.host,
                     self.settings.port, self._protocol)
        elif kind == "disconnect":
            if self._connected.is_set():
                self.counters["disconnects"] += 1
                log.warning("event=mqtt_disconnected reason=%r", ev[1].getName())
            self._connected.clear()
            if not self.last_error.startswith("broker refused"):
                self.last_error = f"disconnected: {ev[1].getName()}"
        elif kind == "puback":
            mid, rc = ev[1], ev[2]
            if mid in self._direct_inflight:
                self._direct_inflight.discard(mid)
                return
            entry = self._inflight.pop(mid, None)
            if entry is None:
                return
            seq, msg_id = entry
            if rc is not None and getattr(rc, "is_failure", False):
                # e.g. MQTT 5 "Not authorized": retrying would never succeed
                self.counters["rejected"] += 1
                self.last_error = f"broker rejected message {msg_id}: {rc.getName()}"
                log.error("event=mqtt_publish_rejected id=%s reason=%r", msg_id, rc.getName())
            else:
                self.counters["acked"] += 1
            self._ack(seq, msg_id)

    def _ack(self, seq: int, msg_id: str) -> None:
        """Delete an acknowledged row; on a full disk (a DELETE needs journal space too)
        keep it for a later try instead of ending this thread. A row whose delete never
        succeeds is sent again after a restart: a duplicate by id, never a loss."""
        try:
            self.outbox.ack(seq, msg_id)
        except StoreError as exc:
            self.last_error = str(exc)
            if len(self._unacked) < 10_000:
                self._unacked.append((seq, msg_id))
            return
        while self._unacked:  # a delete worked: the disk has room again
            s, m = self._unacked[0]
            try:
                self.outbox.ack(s, m)
            except StoreError:
                return
            self._unacked.pop(0)

    def _fallback_311(self) -> None:
        log.warning("event=mqtt_fallback protocol=3.1.1")
        self._protocol = "3.1.1"
        self._drop_client()

    def _drop_client(self) -> None:
        c, self._client = self._client, None
        self._connected.clear()
        if c is not None:
            c.disconnect()
            c.loop_stop()
        # a new client object has a new mid space: resend from the oldest row
        self._inflight.clear()
        self._direct_inflight.clear()
        self._last_seq = 0
        self.outbox.reset_sent()

    def _props(self, msg_id: str | None = None, correlation: bytes | None = None):
        if self._protocol != "5":
            return None
        p = Properties(PacketTypes.PUBLISH)
        if msg_id:
            p.UserProperty = ("msg_id", msg_id)
        if correlation:
            p.CorrelationData = correlation
        return p

    def _pump(self) -> None:
        c = self._client
        if c is None or not self._connected.is_set():
            return
        while True:
            try:
                topic, body, corr, retain = self._direct.get_nowait()
            except queue.Empty:
                break
            info = c.publish(topic, body, qos=1, retain=retain,
                             properties=self._props(correlation=corr))
            if info.rc == paho.MQTT_ERR_SUCCESS:
                self._direct_inflight.add(info.mid)
            else:
                self.counters["replies_dropped"] += 1
        room = self.settings.window - len(self._inflight)
        while room > 0 and self._connected.is_set():
            rows = self.outbox.peek(self._last_seq, room)
            if not rows:
                break
            for r in rows:
                info = c.publish(r.topic, r.payload, qos=r.qos, retain=r.retain,
                                 properties=self._props(msg_id=r.msg_id))
                # NO_CONN: paho keeps a QoS 1 message and sends it after reconnecting
                if info.rc not in (paho.MQTT_ERR_SUCCESS, paho.MQTT_ERR_NO_CONN):
                    log.warning("event=mqtt_publish_deferred rc=%s", paho.error_string(info.rc))
                    return
                self._inflight[info.mid] = (r.seq, r.msg_id)
                self._last_seq = r.seq
                self.outbox.mark_sent(r.seq)
                self.counters["published"] += 1
                room -= 1

    def _finish(self, deadline: float) -> bool:
        """Shutdown step; True when done (outbox empty and offline sent, or deadline)."""
        c = self._client
        if c is not None and self._connected.is_set() and time.monotonic() < deadline:
            if self.outbox.stats().depth > 0 or self._direct_inflight:
                return False
        if c is not None:
            if self._connected.is_set():
                info = c.publish(self.topics.availability, OFFLINE, qos=1, retain=True)
                end = time.monotonic() + max(0.5, deadline - time.monotonic())
                while time.monotonic() < end:
                    try:
                        if info.is_published():
                            break
                    except (RuntimeError, ValueError):  # rc != success: cannot be waited for
                        break
                    time.sleep(0.01)
            c.disconnect()
            c.loop_stop()
        self._client = None
        self._connected.clear()
        self._stopped.set()
        return True
