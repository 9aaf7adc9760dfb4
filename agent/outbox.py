"""Durable outbox: every QoS 1 message is on disk before it is sent.

A message is written to an SQLite table (WAL journal) by :meth:`Outbox.enqueue`
and removed only by :meth:`Outbox.ack`, which the MQTT link calls when the
broker's PUBACK for it arrives. A broker outage or an agent restart therefore
loses nothing; after a restart the link sends every row again from the oldest,
so delivery is at-least-once, in enqueue order, and each payload carries a
message id (``id``) by which a receiver drops duplicates.

Durability: ``synchronous=FULL``. In WAL mode NORMAL can lose the last
transactions on power loss (they are durable only after a checkpoint); an
alert that was "queued" must survive the box losing power, and the write rate
(a few rows per capture) is far below what FULL costs on an SD card.

Bound and shed policy (``max_bytes``, counted as topic + payload bytes):

1. Messages with a ``replace_key`` (retained state, health) supersede any
   older unsent message with the same key — only the latest matters.
2. When a new message does not fit, the oldest *sheddable* rows
   (``Kind.PERIODIC``: measurements, health) are deleted first.
3. A new periodic message that still does not fit is dropped (counted).
4. If only kept rows remain (``Kind.KEPT``: events/alerts, findings, state),
   the oldest kept rows are deleted, and an *overflow notice* takes the place
   of the first one in the queue: one event that says how many were dropped
   and the ids of the first and last. Alerts are thus never lost silently;
   the receiver sees the gap at the point in time where it happened.

Cost per message does not grow with the queue: the queued row count and
byte total are kept in memory (counted once from the file at open, updated
only after a transaction commits, counted again after a failed write), and
every lookup a write makes (replaced key, oldest sheddable row, overflow
notice) goes through an index. :meth:`Outbox.enqueue_many` writes several
messages (one capture's) in one transaction: one disk sync for all of them,
all or none on disk, same order and policy as enqueueing them one by one.
The outbox assumes it is the only writer of its file (one agent per state
directory).

Corruption: on open the file gets ``PRAGMA quick_check``; a file that fails
it (or is not a database) is renamed ``<name>.corrupt-<time>`` and a new one
is started; :attr:`Outbox.recovered_from` tells the caller what was set aside.
"""

from __future__ import annotations

import enum
import json
import os
import sqlite3
import threading
import time
import uuid
from dataclasses import dataclass
from pathlib import Path

from agent.errors import StoreError

SCHEMA_VERSION = 1
OVERFLOW_TOPIC_SUFFIX = "events"


class Kind(enum.IntEnum):
    """What may be shed when the outbox is full (lower is shed first)."""

    PERIODIC = 0  # measurements, health: superseded by the next one
    KEPT = 1  # events/alerts, findings, state: never dropped silently


@dataclass(frozen=True, slots=True)
class OutMessage:
    seq: int
    msg_id: str
    topic: str
    payload: bytes
    qos: int
    retain: bool
    kind: Kind
    created_utc_s: float


@dataclass(frozen=True, slots=True)
class OutboxStats:
    depth: int
    bytes: int
    max_bytes: int
    shed_periodic: int
    shed_kept: int
    dropped_new: int


@dataclass(frozen=True, slots=True)
class NewMessage:
    """One message for :meth:`Outbox.enqueue_many` (the arguments of :meth:`Outbox.enqueue`)."""

    topic: str
    payload: bytes
    kind: Kind
    msg_id: str = ""  # "" = a new id
    qos: int = 1
    retain: bool = False
    replace_key: str | None = None


@dataclass(slots=True)
class _Totals:
    """Rows and bytes (topic + payload) in the queue."""

    depth: int
    bytes: int


#: rows fetched at a time while looking for the oldest sheddable ones
SHED_CHUNK_ROWS = 64


def new_message_id() -> str:
    """A unique, sortable-enough id for receivers to drop duplicates."""
    return uuid.uuid4().hex


def _open_db(path: Path) -> sqlite3.Connection:
    db = sqlite3.connect(str(path), isolation_level=None, check_same_thread=False,
                         timeout=10)
    db.execute("PRAGMA journal_mode=WAL")
    db.execute("PRAGMA synchronous=FULL")
    return db


def _checked_bound(max_bytes: int) -> int:
    if max_bytes < 4096:
        raise ValueError(f"outbox max_bytes must be >= 4096, got {max_bytes}")
    return int(max_bytes)


class Outbox:
    """An on-disk FIFO of messages waiting for the broker's acknowledgement.

    Thread-safe (one connection behind a lock); callers never hold it while
    calling into paho, so there is no lock-order problem with paho's threads.
    """

    def __init__(self, path: str | os.PathLike, max_bytes: int = 16 * 1024 * 1024,
                 *, overflow_topic: str = "", clock=time.time):
        self.path = Path(path)
        self.max_bytes = _checked_bound(max_bytes)
        self.overflow_topic = overflow_topic
        self._clock = clock
        self._lock = threading.Lock()
        self.recovered_from: Path | None = None
        self._sent_watermark = 0  # rows with seq <= this were handed to the link
        self.path.parent.mkdir(parents=True, exist_ok=True)
        try:
            self._db = self._open_checked()
            self._totals = self._count_totals()
        except sqlite3.Error as exc:  # e.g. disk I/O error on a new file
            raise StoreError(f"outbox {self.path}: cannot open: {exc}") from exc

    # -- open / integrity -------------------------------------------------
    def _open_checked(self) -> sqlite3.Connection:
        if self.path.exists():
            try:
                db = _open_db(self.path)
                ok = db.execute("PRAGMA quick_check").fetchone()[0]
                if ok != "ok":
                    raise sqlite3.DatabaseError(ok)
                self._create(db)
                return db
            except sqlite3.DatabaseError:
                try:
                    db.close()
                except Exception:
                    pass
                stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime(self._clock()))
                bad = self.path.with_name(f"{self.path.name}.corrupt-{stamp}")
                os.replace(self.path, bad)
                for ext in ("-wal", "-shm"):
                    side = self.path.with_name(self.path.name + ext)
                    if side.exists():
                        os.replace(side, bad.with_name(bad.name + ext))
                self.recovered_from = bad
        db = _open_db(self.path)
        self._create(db)
        return db

    @staticmethod
    def _create(db: sqlite3.Connection) -> None:
        # the indexes (added to files of the same schema version when opened) keep every
        # lookup of a write independent of the queue's depth
        db.executescript(
            """
            CREATE TABLE IF NOT EXISTS outbox (
                seq INTEGER PRIMARY KEY AUTOINCREMENT,
                msg_id TEXT NOT NULL,
                topic TEXT NOT NULL,
                payload BLOB NOT NULL,
                qos INTEGER NOT NULL,
                retain INTEGER NOT NULL,
                kind INTEGER NOT NULL,
                replace_key TEXT,
                size INTEGER NOT NULL,
                created_utc_s REAL NOT NULL,
                overflow INTEGER NOT NULL DEFAULT 0
            );
            CREATE INDEX IF NOT EXISTS outbox_kind ON outbox (kind, seq);
            CREATE INDEX IF NOT EXISTS outbox_replace ON outbox (replace_key)
                WHERE replace_key IS NOT NULL;
            CREATE INDEX IF NOT EXISTS outbox_overflow ON outbox (seq) WHERE overflow = 1;
            CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value);
            """
        )
        db.execute("INSERT OR IGNORE INTO meta VALUES ('schema', ?)", (SCHEMA_VERSION,))
        for k in ("shed_periodic", "shed_kept", "dropped_new"):
            db.execute("INSERT OR IGNORE INTO meta VALUES (?, 0)", (k,))

    def _count_totals(self) -> _Totals:
        """Rows and bytes as the file has them (at open, and after a write failed)."""
        depth, used = self._db.execute(
            "SELECT COUNT(*), COALESCE(SUM(size), 0) FROM outbox").fetchone()
        return _Totals(depth, used)

    def close(self) -> None:
        with self._lock:
            self._db.close()

    def set_max_bytes(self, max_bytes: int) -> None:
        """A new bound (a config reload); the next enqueue sheds to it by the usual policy."""
        bound = _checked_bound(max_bytes)
        with self._lock:
            self.max_bytes = bound

    # -- writing ----------------------------------------------------------
    def enqueue(self, topic: str, payload: bytes, *, kind: Kind, msg_id: str | None = None,
                qos: int = 1, retain: bool = False, replace_key: str | None = None) -> int | None:
        """Store one message; returns its sequence number, or None if it was shed.

        Raises :class:`StoreError` if the disk refuses the write.
        """
        return self.enqueue_many([NewMessage(topic, payload, kind, msg_id or "", qos, retain,
                                             replace_key)])[0]

    def enqueue_many(self, messages: list[NewMessage]) -> list[int | None]:
        """Store several messages in one transaction (one disk sync), in list order.

        Each is handled as :meth:`enqueue` would (replace key, shedding, dropping);
        returns their sequence numbers (None where one was shed). On return all are on
        disk; on :class:`StoreError` none is. A bad message (qos, size) raises
        ``ValueError`` before anything is written.
        """
        rows = [self._row(m) for m in messages]
        if not rows:
            return []
        with self._lock:
            try:
                return self._transaction(lambda db, tot: [self._insert(db, tot, *r) for r in rows])
            except sqlite3.Error as exc:
                raise StoreError(f"outbox {self.path}: cannot write: {exc}") from exc

    def _row(self, m: NewMessage) -> tuple:
        """(message, payload bytes, msg_id, size) after checking qos and size."""
        if m.qos not in (0, 1, 2):
            raise ValueError(f"qos must be 0, 1 or 2, got {m.qos!r}")
        payload = bytes(m.payload)
        size = len(m.topic.encode()) + len(payload)
        if size > self.max_bytes // 4:
            raise ValueError(f"message of {size} bytes is larger than a quarter of the "
                             f"outbox ({self.max_bytes} bytes)")
        return m, payload, m.msg_id or new_message_id(), size

    def _transaction(self, work):
        """``work(db, totals)`` in one write transaction; the totals change only once it commits.

        After any failure the totals are counted from the file again: whether a failed
        COMMIT left the rows or not, the file is the truth. Call with the lock held.
        """
        db = self._db
        if self._totals is None:
            self._totals = self._count_totals()
        tot = _Totals(self._totals.depth, self._totals.bytes)
        db.execute("BEGIN IMMEDIATE")
        try:
            result = work(db, tot)
            db.execute("COMMIT")
        except BaseException:
            self._totals = None
            if db.in_transaction:  # SQLite has already rolled back after e.g. SQLITE_FULL
                db.execute("ROLLBACK")
            raise
        self._totals = tot
        return result

    def _insert(self, db, tot: _Totals, m: NewMessage, payload: bytes, msg_id: str,
                size: int) -> int | None:
        """The bound and shed policy (module docstring) for one new message."""
        if m.replace_key is not None:
            where = "WHERE replace_key = ? AND seq > ?", (m.replace_key, self._sent_watermark)
            n, freed = db.execute("SELECT COUNT(*), COALESCE(SUM(size), 0) FROM outbox "
                                  + where[0], where[1]).fetchone()
            if n:
                db.execute("DELETE FROM outbox " + where[0], where[1])
                tot.depth -= n
                tot.bytes -= freed
        need = tot.bytes + size - self.max_bytes
        if need > 0:
            need -= self._shed(db, tot, Kind.PERIODIC, need)
        if need > 0 and m.kind == Kind.PERIODIC:
            self._bump(db, "dropped_new", 1)
            return None
        if need > 0:
            self._shed(db, tot, Kind.KEPT, need)
        cur = db.execute(
            "INSERT INTO outbox (msg_id, topic, payload, qos, retain, kind, replace_key,"
            " size, created_utc_s) VALUES (?,?,?,?,?,?,?,?,?)",
            (msg_id, m.topic, payload, m.qos, int(m.retain), int(m.kind), m.replace_key, size,
             self._clock()))
        tot.depth += 1
        tot.bytes += size
        return cur.lastrowid

    def _shed(self, db, tot: _Totals, kind: Kind, need: int) -> int:
        """Delete the oldest unsent rows of ``kind`` until ``need`` bytes are free; return the
        bytes deleted (for kept rows an overflow notice then takes some back)."""
        freed = 0
        dropped: list[tuple] = []
        after = self._sent_watermark
        while freed < need:
            rows = db.execute(
                "SELECT seq, msg_id, size, created_utc_s FROM outbox WHERE kind = ?"
                " AND overflow = 0 AND seq > ? ORDER BY seq LIMIT ?",
                (int(kind), after, SHED_CHUNK_ROWS)).fetchall()
            if not rows:
                break
            for seq, msg_id, size, created in rows:
                if freed >= need:
                    break
                db.execute("DELETE FROM outbox WHERE seq = ?", (seq,))
                freed += size
                dropped.append((seq, msg_id, created))
            after = rows[-1][0]
        if not dropped:
            return 0
        tot.depth -= len(dropped)
        tot.bytes -= freed
        if kind == Kind.PERIODIC:
            self._bump(db, "shed_periodic", len(dropped))
            return freed
        self._bump(db, "shed_kept", len(dropped))
        self._note_overflow(db, tot, dropped)
        return freed

    def _note_overflow(self, db, tot: _Totals, dropped: list[tuple]) -> None:
        """Write (or extend) the overflow notice in the place of the first dropped row."""
        row = db.execute("SELECT seq, payload, size FROM outbox WHERE overflow = 1 AND seq > ?"
                         " ORDER BY seq LIMIT 1", (self._sent_watermark,)).fetchone()
        now = self._clock()
        if row is not None and row[0] < dropped[0][0]:
            seq, old_body, old_size = row
            note = json.loads(old_body)
            note["dropped_count"] += len(dropped)
            note["last_dropped_id"] = dropped[-1][1]
            note["last_dropped_utc_s"] = dropped[-1][2]
            body = json.dumps(note, separators=(",", ":")).encode()
            size = len(self.overflow_topic) + len(body)
            # a new id: a receiver that saw the earlier version must not drop this one
            db.execute("UPDATE outbox SET payload = ?, size = ?, msg_id = ? WHERE seq = ?",
                       (body, size, new_message_id(), seq))
            tot.bytes += size - old_size
            return
        msg_id = new_message_id()
        note = overflow_payload(msg_id, now, len(dropped), dropped[0][1], dropped[0][2],
                                dropped[-1][1], dropped[-1][2])
        body = json.dumps(note, separators=(",", ":")).encode()
        size = len(self.overflow_topic) + len(body)
        db.execute(
            "INSERT INTO outbox (seq, msg_id, topic, payload, qos, retain, kind, replace_key,"
            " size, created_utc_s, overflow) VALUES (?,?,?,?,1,0,?,NULL,?,?,1)",
            (dropped[0][0], msg_id, self.overflow_topic, body, int(Kind.KEPT), size, now))
        tot.depth += 1
        tot.bytes += size

    @staticmethod
    def _bump(db, key: str, n: int) -> None:
        db.execute("UPDATE meta SET value = value + ? WHERE key = ?", (n, key))

    # -- reading / acknowledging ------------------------------------------
    def peek(self, after_seq: int = 0, limit: int = 20) -> list[OutMessage]:
        """The oldest ``limit`` messages with ``seq > after_seq``, in order."""
        with self._lock:
            rows = self._db.execute(
                "SELECT seq, msg_id, topic, payload, qos, retain, kind, created_utc_s"
                " FROM outbox WHERE seq > ? ORDER BY seq LIMIT ?", (after_seq, limit)).fetchall()
        return [OutMessage(r[0], r[1], r[2], bytes(r[3]), r[4], bool(r[5]), Kind(r[6]), r[7])
                for r in rows]

    def mark_sent(self, seq: int) -> None:
        """The link handed ``seq`` to the client: never shed or rewrite it from now on."""
        with self._lock:
            self._sent_watermark = max(self._sent_watermark, seq)

    def reset_sent(self) -> None:
        """Forget what was handed out (a new client object resends from the oldest)."""
        with self._lock:
            self._sent_watermark = 0

    def ack(self, seq: int, msg_id: str | None = None) -> bool:
        """The broker acknowledged ``seq``: delete it. Returns False if it was already gone
        (or, with ``msg_id``, the row at ``seq`` now holds another message)."""

        def delete(db, tot: _Totals) -> bool:
            if msg_id is None:
                row = db.execute("SELECT size FROM outbox WHERE seq = ?", (seq,)).fetchone()
            else:
                row = db.execute("SELECT size FROM outbox WHERE seq = ? AND msg_id = ?",
                                 (seq, msg_id)).fetchone()
            if row is None:
                return False
            db.execute("DELETE FROM outbox WHERE seq = ?", (seq,))
            tot.depth -= 1
            tot.bytes -= row[0]
            return True

        with self._lock:
            try:
                return self._transaction(delete)
            except sqlite3.Error as exc:
                raise StoreError(f"outbox {self.path}: cannot delete: {exc}") from exc

    def stats(self) -> OutboxStats:
        with self._lock:
            try:
                if self._totals is None:
                    self._totals = self._count_totals()
                meta = dict(self._db.execute("SELECT key, value FROM meta").fetchall())
            except sqlite3.Error as exc:
                raise StoreError(f"outbox {self.path}: cannot read: {exc}") from exc
            tot = self._totals
        return OutboxStats(tot.depth, tot.bytes, self.max_bytes, int(meta["shed_periodic"]),
                           int(meta["shed_kept"]), int(meta["dropped_new"]))


def overflow_payload(msg_id: str, t_utc_s: float, count: int, first_id: str,
                     first_utc_s: float, last_id: str, last_utc_s: float) -> dict:
    """The event that stands in for kept messages the full outbox had to drop."""
    return {
        "schema": 1,
        "id": msg_id,
        "t_utc_s": round(t_utc_s, 3),
        "type": "outbox_overflow",
        "dropped_count": count,
        "first_dropped_id": first_id,
        "first_dropped_utc_s": round(first_utc_s, 3),
        "last_dropped_id": last_id,
        "last_dropped_utc_s": round(last_utc_s, 3),
    }
