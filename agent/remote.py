"""Remote requests over MQTT: the agent's handler and the analyst's CLI.

Requests go to ``<base>/req/<cmd>``; replies to a topic under ``<base>/res/``.

* MQTT 5: the request carries the *Response Topic* and *Correlation Data*
  properties; the reply is published to that topic with the same
  correlation data (and ``correlation_id`` echoed in the JSON if given).
* MQTT 3.1.1 (no properties): put ``"reply_to": "<base>/res/<token>"`` and
  ``"correlation_id": "<string>"`` into the request JSON; the reply carries
  the same ``correlation_id``.

A reply topic outside ``<base>/res/`` is refused (the agent is not a relay);
such requests, and requests without any reply topic, are answered on
``<base>/res/errors``.

Commands (payload = JSON object, at most ``MAX_REQUEST_BYTES``; unknown keys
are errors):

============  ==========================================  ==============================
cmd           fields                                      result
============  ==========================================  ==============================
list          limit? (1..1000)                            snapshots (newest last)
get           snapshot_id                                 files: name, size, sha256, chunks
chunk         snapshot_id, file, index                    data_b64, sha256 of the chunk, file_sha256
snapshot      —                                           snapshot_id of a new snapshot
ack           alarm_id?, note?, by?                       alarms acknowledged
mode          mode (monitor|learn|maintenance), duration_s   mode, until_utc_s
feedback      snapshot_id, found, done, finding_code?,    stored file, relearn started?
              confirmed?, relearn?, by?
============  ==========================================  ==============================

Every reply: ``{"schema": 1, "ok": true, "cmd": ..., "result": {...}}`` or
``{"schema": 1, "ok": false, "cmd": ..., "error": {"code": ..., "message": ...}}``.
A bad request changes nothing.
"""

from __future__ import annotations

import argparse
import base64
import hashlib
import json
import os
import re
import sys
import threading
import time
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Mapping, Protocol

from agent.errors import RequestError, StoreError
from agent.mqtt import Inbound, Topics, encode
from agent.store import SNAPSHOT_ID, Store

MAX_REQUEST_BYTES = 4096
CHUNK_BYTES = 48 * 1024  # 64 KiB once base64-encoded
MODES = ("monitor", "learn", "maintenance")
MAINTENANCE_MAX_S = 7 * 86400
_TOKEN = re.compile(r"^[A-Za-z0-9_-]{1,64}$")
_CORR = re.compile(r"^[\x20-\x7e]{1,128}$")
_ALARM = re.compile(r"^[A-Za-z0-9_.:-]{1,64}$")

_COMMON = {"reply_to": str, "correlation_id": str, "schema": int}
SCHEMAS: dict[str, dict[str, tuple[type | tuple, bool]]] = {
    # field: (type, required)
    "list": {"limit": (int, False)},
    "get": {"snapshot_id": (str, True)},
    "chunk": {"snapshot_id": (str, True), "file": (str, True), "index": (int, True)},
    "snapshot": {},
    "ack": {"alarm_id": (str, False), "note": (str, False), "by": (str, False)},
    "mode": {"mode": (str, True), "duration_s": ((int, float), False)},
    "feedback": {"snapshot_id": (str, True), "found": (str, True), "done": (str, True),
                 "finding_code": (str, False), "confirmed": (bool, False),
                 "relearn": (bool, False), "by": (str, False)},
}


class Controls(Protocol):
    """What the daemon lets a remote request do (the daemon implements this)."""

    def take_snapshot(self) -> str: ...
    def ack_alarm(self, alarm_id: str | None, note: str, by: str) -> list[str]: ...
    def set_mode(self, mode: str, duration_s: float | None) -> dict: ...
    def feedback_recorded(self, snapshot_id: str, record: dict) -> bool: ...


@dataclass
class BasicControls:
    """A plain implementation of :class:`Controls` (mode with expiry, open alarms).

    The daemon may use it as its state holder or provide its own.
    ``snapshot_fn`` takes a snapshot now and returns its id; ``relearn_fn``
    starts a relearn of the baseline.
    """

    snapshot_fn: Callable[[], str]
    relearn_fn: Callable[[], None] | None = None
    ack_fn: Callable[[str], None] | None = None  # e.g. unpin the alarm's snapshot
    clock: Callable[[], float] = time.time
    mode: str = "monitor"
    mode_until_utc_s: float | None = None

    def __post_init__(self) -> None:
        self.open_alarms: dict[str, dict] = {}
        self.acked: dict[str, dict] = {}
        self.feedback: list[dict] = []

    def current_mode(self) -> str:
        if self.mode_until_utc_s is not None and self.clock() >= self.mode_until_utc_s:
            self.mode, self.mode_until_utc_s = "monitor", None
        return self.mode

    def take_snapshot(self) -> str:
        return self.snapshot_fn()

    def ack_alarm(self, alarm_id, note, by):
        ids = [alarm_id] if alarm_id is not None else list(self.open_alarms)
        unknown = [a for a in ids if a not in self.open_alarms]
        if unknown:
            raise RequestError("unknown_alarm", f"no open alarm {unknown[0]!r}")
        for a in ids:
            self.acked[a] = {**self.open_alarms.pop(a), "note": note, "by": by,
                             "acked_utc_s": self.clock()}
            if self.ack_fn is not None:
                self.ack_fn(a)
        return ids

    def set_mode(self, mode, duration_s):
        self.mode = mode
        self.mode_until_utc_s = None if duration_s is None else self.clock() + duration_s
        return {"mode": mode, "until_utc_s": self.mode_until_utc_s}

    def feedback_recorded(self, snapshot_id, record):
        self.feedback.append(record)
        if record.get("relearn") and self.relearn_fn is not None:
            self.relearn_fn()
            return True
        return False


class RateLimit:
    """Token bucket: ``rate_per_s`` sustained, ``burst`` at once."""

    def __init__(self, rate_per_s: float = 20.0, burst: int = 40):
        self.rate, self.burst = float(rate_per_s), float(burst)
        self.tokens, self.t = float(burst), None

    def allow(self, now_s: float) -> bool:
        if self.t is not None:
            self.tokens = min(self.burst, self.tokens + (now_s - self.t) * self.rate)
        self.t = now_s
        if self.tokens >= 1.0:
            self.tokens -= 1.0
            return True
        return False


@dataclass(frozen=True, slots=True)
class Reply:
    topic: str
    payload: bytes
    correlation_data: bytes | None


def _sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 16), b""):
            h.update(block)
    return h.hexdigest()


class RequestHandler:
    """Validate one request and carry it out; always produce exactly one reply."""

    def __init__(self, topics: Topics, store: Store, controls: Controls, *,
                 rate: RateLimit | None = None, clock=time.time, monotonic=time.monotonic):
        self.topics = topics
        self.store = store
        self.controls = controls
        self.rate = rate or RateLimit()
        self._clock = clock
        self._monotonic = monotonic
        self.counters = {"requests": 0, "errors": 0}
        self._sha_cache: dict[tuple[str, str, int, int], str] = {}

    @property
    def error_topic(self) -> str:
        return self.topics.reply_prefix + "errors"

    def handle(self, req: Inbound) -> Reply:
        self.counters["requests"] += 1
        reply_topic, corr_id, corr = self.error_topic, None, req.correlation_data
        cmd = req.cmd
        try:
            reply_topic = self._reply_topic(req.response_topic)
        except RequestError:
            pass
        try:
            if len(req.payload) > MAX_REQUEST_BYTES:
                raise RequestError("too_large", f"request is {len(req.payload)} bytes; "
                                   f"limit {MAX_REQUEST_BYTES}")
            try:
                body = json.loads(req.payload.decode("utf-8")) if req.payload.strip() else {}
            except (UnicodeDecodeError, json.JSONDecodeError) as exc:
                raise RequestError("bad_json", f"request is not UTF-8 JSON: {exc}") from None
            if not isinstance(body, dict):
                raise RequestError("not_object", "request must be a JSON object")
            cid = body.get("correlation_id")
            if isinstance(cid, str) and _CORR.match(cid):
                corr_id = cid
            reply_topic = self._reply_topic(req.response_topic or body.get("reply_to"))
            if not self.rate.allow(self._monotonic()):
                raise RequestError("rate_limited", "too many requests; slow down")
            if cmd not in SCHEMAS:
                raise RequestError("unknown_command",
                                   f"{cmd!r}; known: {', '.join(sorted(SCHEMAS))}")
            args = self._check(cmd, body)
            result = getattr(self, f"_do_{cmd}")(args)
            out = {"schema": 1, "ok": True, "cmd": cmd, "t_utc_s": round(self._clock(), 3),
                   "result": result}
        except RequestError as exc:
            self.counters["errors"] += 1
            msg = str(exc).split(": ", 1)[-1]
            out = {"schema": 1, "ok": False, "cmd": cmd, "t_utc_s": round(self._clock(), 3),
                   "error": {"code": exc.code, "message": msg}}
        except StoreError as exc:
            self.counters["errors"] += 1
            out = {"schema": 1, "ok": False, "cmd": cmd, "t_utc_s": round(self._clock(), 3),
                   "error": {"code": "store_error", "message": str(exc)}}
        if corr_id is not None:
            out["correlation_id"] = corr_id
        return Reply(reply_topic, encode(out), corr)

    def _reply_topic(self, topic: Any) -> str:
        if topic is None:
            raise RequestError("no_reply_topic", "give a response topic (MQTT 5) or "
                               f"'reply_to' under {self.topics.reply_prefix}")
        if not isinstance(topic, str):
            raise RequestError("bad_reply_topic", "reply topic must be a string")
        head = self.topics.reply_prefix
        if not topic.startswith(head) or not _TOKEN.match(topic[len(head):]) \
                or topic == self.error_topic:
            raise RequestError("bad_reply_topic",
                               f"reply topic must be {head}<token> (letters, digits, _ -)")
        return topic

    @staticmethod
    def _check(cmd: str, body: dict) -> dict:
        schema = SCHEMAS[cmd]
        for key, value in body.items():
            if key in _COMMON:
                if not isinstance(value, _COMMON[key]) or isinstance(value, bool):
                    raise RequestError("bad_value", f"{key} must be {_COMMON[key].__name__}")
                continue
            if key not in schema:
                raise RequestError("unknown_field", f"{cmd}: unknown field {key!r}")
            tp = schema[key][0]
            ok = isinstance(value, tp) and (tp is bool or not isinstance(value, bool))
            if not ok:
                name = tp.__name__ if isinstance(tp, type) else "number"
                raise RequestError("bad_value", f"{cmd}.{key} must be {name}")
            if isinstance(value, str) and len(value) > 1000:
                raise RequestError("bad_value", f"{cmd}.{key} longer than 1000 characters")
        if body.get("schema", 1) != 1:
            raise RequestError("bad_value", f"schema {body['schema']} not supported (1)")
        for key, (_, required) in schema.items():
            if required and key not in body:
                raise RequestError("missing_field", f"{cmd}: {key!r} is required")
        return {k: v for k, v in body.items() if k in schema}

    def _snapshot_dir(self, sid: str) -> Path:
        if not SNAPSHOT_ID.match(sid):
            raise RequestError("bad_value", "snapshot_id is not a snapshot id")
        d = self.store.resolve(sid)
        if d is None:
            raise RequestError("unknown_snapshot", f"no snapshot {sid!r}")
        return d

    # -- commands ---------------------------------------------------------------
    def _do_list(self, a: dict) -> dict:
        limit = a.get("limit", 100)
        if not 1 <= limit <= 1000:
            raise RequestError("bad_value", "list.limit must be 1..1000")
        snaps = self.store.list_snapshots()[-limit:]
        return {"snapshots": [{"snapshot_id": s.snapshot_id, "t_utc_s": s.t_utc_s,
                               "reason": s.reason, "size_bytes": s.size_bytes,
                               "files": list(s.files), "pinned": s.pinned} for s in snaps]}

    def _file_sha(self, path: Path) -> str:
        st = path.stat()
        key = (str(path), path.name, st.st_size, st.st_mtime_ns)
        if key not in self._sha_cache:
            if len(self._sha_cache) > 256:
                self._sha_cache.clear()
            self._sha_cache[key] = _sha256_file(path)
        return self._sha_cache[key]

    def _do_get(self, a: dict) -> dict:
        d = self._snapshot_dir(a["snapshot_id"])
        files = []
        for name in sorted(os.listdir(d)):
            p = self.store.snapshot_file(a["snapshot_id"], name)
            if p is None:
                continue
            size = p.stat().st_size
            files.append({"name": name, "size_bytes": size, "sha256": self._file_sha(p),
                          "chunks": max(1, -(-size // CHUNK_BYTES))})
        return {"snapshot_id": a["snapshot_id"], "chunk_bytes": CHUNK_BYTES, "files": files}

    def _do_chunk(self, a: dict) -> dict:
        self._snapshot_dir(a["snapshot_id"])
        p = self.store.snapshot_file(a["snapshot_id"], a["file"])
        if p is None:
            raise RequestError("unknown_file", f"snapshot has no file {a['file']!r}")
        size = p.stat().st_size
        n = max(1, -(-size // CHUNK_BYTES))
        i = a["index"]
        if not 0 <= i < n:
            raise RequestError("bad_value", f"chunk.index must be 0..{n - 1}")
        with open(p, "rb") as fh:
            fh.seek(i * CHUNK_BYTES)
            data = fh.read(CHUNK_BYTES)
        return {"snapshot_id": a["snapshot_id"], "file": a["file"], "index": i, "n_chunks": n,
                "offset": i * CHUNK_BYTES, "size_bytes": len(data),
                "sha256": hashlib.sha256(data).hexdigest(), "file_sha256": self._file_sha(p),
                "data_b64": base64.b64encode(data).decode("ascii")}

    def _do_snapshot(self, a: dict) -> dict:
        return {"snapshot_id": self.controls.take_snapshot()}

    def _do_ack(self, a: dict) -> dict:
        alarm = a.get("alarm_id")
        if alarm is not None and not _ALARM.match(alarm):
            raise RequestError("bad_value", "ack.alarm_id has characters not allowed")
        return {"acked": self.controls.ack_alarm(alarm, a.get("note", ""), a.get("by", ""))}

    def _do_mode(self, a: dict) -> dict:
        mode, dur = a["mode"], a.get("duration_s")
        if mode not in MODES:
            raise RequestError("bad_value", f"mode must be one of {', '.join(MODES)}")
        if mode == "maintenance":
            if dur is None:
                raise RequestError("missing_field", "mode maintenance needs duration_s")
            if not 60 <= dur <= MAINTENANCE_MAX_S:
                raise RequestError("bad_value", f"duration_s must be 60..{MAINTENANCE_MAX_S}")
        elif dur is not None and not 60 <= dur <= 30 * 86400:
            raise RequestError("bad_value", "duration_s must be 60..2592000")
        return self.controls.set_mode(mode, None if dur is None else float(dur))

    def _do_feedback(self, a: dict) -> dict:
        self._snapshot_dir(a["snapshot_id"])
        record = {"schema": 1, "t_utc_s": round(self._clock(), 3), **a}
        try:
            name = self.store.add_feedback(a["snapshot_id"], record)
        except KeyError:
            raise RequestError("unknown_snapshot", f"no snapshot {a['snapshot_id']!r}") from None
        relearn = self.controls.feedback_recorded(a["snapshot_id"], record)
        return {"snapshot_id": a["snapshot_id"], "stored": name, "relearn_started": bool(relearn)}


class RemoteService:
    """Takes requests from an :class:`~agent.mqtt.MqttLink` and publishes the replies."""

    def __init__(self, link, handler: RequestHandler):
        self.link, self.handler = link, handler
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def serve_pending(self, timeout_s: float = 0.0) -> int:
        """Answer the requests waiting now (block up to ``timeout_s`` for the first)."""
        import queue
        n = 0
        while True:
            try:
                req = self.link.requests.get(timeout=timeout_s) if n == 0 and timeout_s > 0 \
                    else self.link.requests.get_nowait()
            except queue.Empty:
                return n
            r = self.handler.handle(req)
            self.link.reply(r.topic, r.payload, correlation_data=r.correlation_data)
            n += 1

    def start(self) -> None:
        def run():
            while not self._stop.is_set():
                self.serve_pending(0.2)
        self._thread = threading.Thread(target=run, name="remote-requests", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(5)


# ==========================================================================
# analyst side: skidvib remote ...
# ==========================================================================
class RemoteClient:
    """Sends one request at a time and waits for its reply (MQTT 5 or 3.1.1)."""

    def __init__(self, host: str, port: int, topics: Topics, *, username: str | None = None,
                 password: str | None = None, cafile: str | None = None,
                 certfile: str | None = None, keyfile: str | None = None,
                 protocol: str = "5", timeout_s: float = 10.0):
        import queue

        import paho.mqtt.client as paho

        self.topics, self.timeout_s, self.protocol = topics, timeout_s, protocol
        self.reply_topic = topics.reply_prefix + "cli-" + uuid.uuid4().hex[:12]
        self._replies: queue.SimpleQueue = queue.SimpleQueue()
        self._ready = threading.Event()
        proto = paho.MQTTv5 if protocol == "5" else paho.MQTTv311
        self._paho = paho
        c = paho.Client(paho.CallbackAPIVersion.VERSION2, protocol=proto)
        if username:
            c.username_pw_set(username, password)
        if cafile or certfile:
            c.tls_set(ca_certs=cafile, certfile=certfile, keyfile=keyfile)
        self._refused = ""

        def on_connect(cl, ud, flags, rc, props):
            if rc.is_failure:
                self._refused = rc.getName()
                self._ready.set()
                return
            cl.subscribe(self.reply_topic, qos=1)

        c.on_connect = on_connect
        c.on_subscribe = lambda cl, ud, mid, rcs, props: self._ready.set()
        c.on_message = lambda cl, ud, msg: self._replies.put(msg)
        c.connect(host, port, keepalive=30)
        c.loop_start()
        self.client = c
        if not self._ready.wait(timeout_s) or self._refused:
            self.close()
            raise ConnectionError(f"broker {host}:{port}: "
                                  f"{self._refused or 'no answer to connect/subscribe'}")

    def request(self, cmd: str, fields: Mapping[str, Any] | None = None) -> dict:
        import queue

        from paho.mqtt.packettypes import PacketTypes
        from paho.mqtt.properties import Properties

        corr = uuid.uuid4().hex
        body = dict(fields or {})
        props = None
        if self.protocol == "5":
            props = Properties(PacketTypes.PUBLISH)
            props.ResponseTopic = self.reply_topic
            props.CorrelationData = corr.encode()
        else:
            body.update(reply_to=self.reply_topic, correlation_id=corr)
        self.client.publish(f"{self.topics.base}/req/{cmd}", json.dumps(body), qos=1,
                            properties=props)
        deadline = time.monotonic() + self.timeout_s
        while True:
            left = deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError(f"no reply to {cmd!r} within {self.timeout_s} s")
            try:
                msg = self._replies.get(timeout=left)
            except queue.Empty:
                continue
            rep = json.loads(msg.payload)
            got = getattr(getattr(msg, "properties", None), "CorrelationData", None)
            if (got is not None and got == corr.encode()) or rep.get("correlation_id") == corr:
                return rep

    def pull(self, snapshot_id: str, out_dir: str | os.PathLike) -> dict:
        """Fetch every file of a snapshot, checking each chunk and each file by SHA-256."""
        man = self.request("get", {"snapshot_id": snapshot_id})
        if not man.get("ok"):
            return man
        dest = Path(out_dir) / man["result"]["snapshot_id"]
        dest.mkdir(parents=True, exist_ok=True)
        written = []
        for f in man["result"]["files"]:
            h = hashlib.sha256()
            tmp = dest / f".part-{f['name']}"
            with open(tmp, "wb") as fh:
                for i in range(f["chunks"]):
                    rep = self.request("chunk", {"snapshot_id": snapshot_id, "file": f["name"],
                                                 "index": i})
                    if not rep.get("ok"):
                        tmp.unlink(missing_ok=True)
                        return rep
                    data = base64.b64decode(rep["result"]["data_b64"])
                    if hashlib.sha256(data).hexdigest() != rep["result"]["sha256"]:
                        tmp.unlink(missing_ok=True)
                        return {"ok": False, "error": {"code": "checksum",
                                "message": f"{f['name']} chunk {i}: SHA-256 mismatch"}}
                    h.update(data)
                    fh.write(data)
            if h.hexdigest() != f["sha256"]:
                tmp.unlink(missing_ok=True)
                return {"ok": False, "error": {"code": "checksum",
                        "message": f"{f['name']}: SHA-256 of the whole file does not match"}}
            os.replace(tmp, dest / f["name"])
            written.append({"name": f["name"], "size_bytes": f["size_bytes"],
                            "sha256": f["sha256"]})
        return {"ok": True, "result": {"dir": str(dest), "files": written}}

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def build_parser(p: argparse.ArgumentParser | None = None) -> argparse.ArgumentParser:
    p = p or argparse.ArgumentParser(prog="skidvib remote",
                                     description="Talk to a running agent over MQTT.")
    p.add_argument("--broker", required=True, metavar="HOST:PORT")
    p.add_argument("--prefix", default="skidvib")
    p.add_argument("--site", required=True, help="site level of the topic tree")
    p.add_argument("--asset", required=True, help="asset level of the topic tree")
    p.add_argument("--user")
    p.add_argument("--password-file")
    p.add_argument("--cafile")
    p.add_argument("--cert")
    p.add_argument("--key")
    p.add_argument("--protocol", choices=("5", "3.1.1"), default="5")
    p.add_argument("--timeout-s", type=float, default=10.0)
    sub = p.add_subparsers(dest="remote_cmd", required=True)
    sub.add_parser("list", help="list stored snapshots")
    pull = sub.add_parser("pull", help="fetch a snapshot, verified by SHA-256")
    pull.add_argument("snapshot_id")
    pull.add_argument("-o", "--out", required=True, metavar="DIR")
    sub.add_parser("snapshot", help="take a snapshot now")
    ack = sub.add_parser("ack", help="acknowledge open alarms (or one)")
    ack.add_argument("--alarm-id")
    ack.add_argument("--note", default="")
    ack.add_argument("--by", default="")
    mode = sub.add_parser("mode", help="monitor | learn | maintenance")
    mode.add_argument("mode", choices=MODES)
    mode.add_argument("--duration-s", type=float)
    fb = sub.add_parser("feedback", help="record what maintenance found and did")
    fb.add_argument("snapshot_id")
    fb.add_argument("--found", required=True)
    fb.add_argument("--done", required=True)
    fb.add_argument("--finding-code")
    fb.add_argument("--confirmed", action="store_true")
    fb.add_argument("--relearn", action="store_true")
    fb.add_argument("--by", default="")
    return p


def run(args: argparse.Namespace) -> int:
    """Exit codes: 0 ok, 1 the agent answered with an error, 3 no connection/no reply."""
    host, _, port = args.broker.rpartition(":")
    if not host or not port.isdigit():
        print(f"--broker {args.broker!r}: expected HOST:PORT", file=sys.stderr)
        return 2
    password = None
    if args.password_file:
        password = Path(args.password_file).read_text().rstrip("\r\n")
    try:
        topics = Topics(args.prefix, args.site, args.asset)
    except ValueError as exc:
        print(f"topic: {exc}", file=sys.stderr)
        return 2
    try:
        cli = RemoteClient(host, int(port), topics, username=args.user, password=password,
                           cafile=args.cafile, certfile=args.cert, keyfile=args.key,
                           protocol=args.protocol, timeout_s=args.timeout_s)
    except (ConnectionError, OSError) as exc:
        print(f"cannot connect: {exc}", file=sys.stderr)
        return 3
    try:
        c = args.remote_cmd
        if c == "pull":
            rep = cli.pull(args.snapshot_id, args.out)
        elif c == "ack":
            f = {"note": args.note, "by": args.by}
            if args.alarm_id:
                f["alarm_id"] = args.alarm_id
            rep = cli.request("ack", f)
        elif c == "mode":
            f = {"mode": args.mode}
            if args.duration_s is not None:
                f["duration_s"] = args.duration_s
            rep = cli.request("mode", f)
        elif c == "feedback":
            f = {"snapshot_id": args.snapshot_id, "found": args.found, "done": args.done,
                 "confirmed": args.confirmed, "relearn": args.relearn, "by": args.by}
            if args.finding_code:
                f["finding_code"] = args.finding_code
            rep = cli.request("feedback", f)
        else:
            rep = cli.request(c, {})
    except TimeoutError as exc:
        print(str(exc), file=sys.stderr)
        return 3
    finally:
        cli.close()
    if not rep.get("ok"):
        err = rep.get("error", {})
        print(f"error {err.get('code')}: {err.get('message')}", file=sys.stderr)
        return 1
    print(json.dumps(rep["result"], indent=1))
    return 0


def main(argv: list[str] | None = None) -> int:
    return run(build_parser().parse_args(argv))


if __name__ == "__main__":
    raise SystemExit(main())
