"""The state directory: trend database, snapshots, alarm pins.

Layout of ``state_dir``::

    trend.sqlite          one row per capture (WAL), downsampled with age; alarm pins
    outbox.sqlite         the MQTT outbox (agent/outbox.py)
    snapshots/<id>/       waveform.wav    raw acceleration, m/s², WAV IEEE float32
                          spectra.npz     named arrays (allow_pickle=False to read)
                          analysis.json   the full analysis of that capture
                          feedback-N.json maintenance findings recorded later (remote)
    snapshots/.tmp-<id>/  a snapshot being written (removed on start if left over)

Snapshots are written into a temporary folder, each file fsync'd, and the
folder renamed into place (``os.replace``), so a reader sees either the whole
snapshot or none of it. A snapshot id (``20261202T003614123Z-state_change``)
is checked against :data:`SNAPSHOT_ID` and then looked up among the folders
that exist; it is never joined to a path as given.

Retention keeps at most ``max_count`` snapshots and ``max_bytes`` bytes,
deleting the oldest first, but never one pinned to an open alarm.

A full disk (or any OSError while writing) raises :class:`StoreError`;
whatever was half-written is removed, what was stored before is untouched.
"""

from __future__ import annotations

import calendar
import errno
import io
import json
import math
import os
import re
import shutil
import sqlite3
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from agent.errors import StoreError

SNAPSHOT_ID = re.compile(r"^\d{8}T\d{9}Z-[a-z][a-z0-9_]{0,31}(?:-\d{1,4})?$")
SNAPSHOT_FILES = ("waveform.wav", "spectra.npz", "analysis.json")
_FEEDBACK = re.compile(r"^feedback-\d{1,4}\.json$")
TREND_SCHEMA = 1


@dataclass(frozen=True, slots=True)
class SnapshotInfo:
    snapshot_id: str
    t_utc_s: float
    reason: str
    size_bytes: int
    files: tuple[str, ...]
    pinned: bool


@dataclass(frozen=True, slots=True)
class TrendRow:
    t_utc_s: float
    level: int  # 0 = one capture, 1 = hourly aggregate
    n: int  # captures in the row
    state: str
    speed_hz: float | None
    features: dict  # means for level 1
    features_max: dict  # maxima for level 1 (same as features for level 0)


def _oserror(what: str, exc: OSError) -> StoreError:
    if exc.errno == errno.ENOSPC:
        return StoreError(f"{what}: disk full (no space left on device)")
    return StoreError(f"{what}: {exc.strerror or exc}")


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_file(path: Path, data: bytes) -> None:
    with open(path, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())


def write_atomic(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` via a temporary file, fsync and rename."""
    tmp = path.with_name(f".tmp-{path.name}")
    try:
        _write_file(tmp, data)
        os.replace(tmp, path)
        _fsync_dir(path.parent)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise _oserror(f"cannot write {path.name}", exc) from exc


def wav_float32_bytes(samples: np.ndarray, fs_hz: float) -> bytes:
    """A mono WAV file (WAVE_FORMAT_IEEE_FLOAT, 32 bit) of ``samples`` as-is."""
    from scipy.io import wavfile

    x = np.ascontiguousarray(samples, dtype=np.float32)
    if x.ndim != 1:
        raise ValueError(f"waveform must be 1-D, got shape {x.shape}")
    rate = int(round(fs_hz))
    if rate <= 0 or abs(rate - fs_hz) > 1e-6 * fs_hz:
        raise ValueError(f"WAV needs an integer sample rate, got {fs_hz!r} Hz")
    buf = io.BytesIO()
    wavfile.write(buf, rate, x)
    return buf.getvalue()


def _json_safe(value: Any) -> Any:
    if isinstance(value, Mapping):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    if isinstance(value, np.ndarray):
        return _json_safe(value.tolist())
    if isinstance(value, (bool, str)) or value is None:
        return value
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(value) else None
    if hasattr(value, "to_json"):
        return _json_safe(value.to_json())
    if hasattr(value, "value"):  # enums
        return _json_safe(value.value)
    return str(value)


def json_bytes(obj: Any) -> bytes:
    return json.dumps(_json_safe(obj), indent=1, allow_nan=False, sort_keys=True).encode()


def store_limits(st) -> dict:
    """:meth:`Store.set_limits` arguments from a ``StoreConfig``."""
    return {"max_count": st.snapshot_max_count, "max_bytes": int(st.snapshot_max_mb * 1024 * 1024),
            "raw_keep_s": st.trend_raw_days * 86400.0, "hourly_keep_s": st.trend_hourly_days * 86400.0}


class Store:
    """Trend DB + snapshot folders under one state directory."""

    def __init__(self, state_dir: str | os.PathLike, *, max_count: int = 500,
                 max_bytes: int = 500 * 1024 * 1024, raw_keep_s: float = 14 * 86400,
                 hourly_keep_s: float = 400 * 86400, clock=time.time):
        self.state_dir = Path(state_dir)
        self.snap_dir = self.state_dir / "snapshots"
        self._lock = threading.RLock()
        self.set_limits(max_count=max_count, max_bytes=max_bytes, raw_keep_s=raw_keep_s,
                        hourly_keep_s=hourly_keep_s)
        self._clock = clock
        self.errors = 0
        self.last_error = ""
        try:
            self.snap_dir.mkdir(parents=True, exist_ok=True)
            for left in self.snap_dir.glob(".tmp-*"):
                shutil.rmtree(left, ignore_errors=True)
            self._db = sqlite3.connect(str(self.state_dir / "trend.sqlite"),
                                       isolation_level=None, check_same_thread=False, timeout=10)
            self._db.execute("PRAGMA journal_mode=WAL")
            # NORMAL in WAL: a power cut may lose the last trend rows, never corrupt the file
            self._db.execute("PRAGMA synchronous=NORMAL")
            self._db.executescript(
                """
                CREATE TABLE IF NOT EXISTS trend (
                    t_utc_s REAL NOT NULL, level INTEGER NOT NULL, n INTEGER NOT NULL,
                    state TEXT NOT NULL, speed_hz REAL, features TEXT NOT NULL,
                    features_max TEXT);
                CREATE INDEX IF NOT EXISTS trend_t ON trend (level, t_utc_s);
                CREATE TABLE IF NOT EXISTS pins (snapshot_id TEXT NOT NULL,
                    alarm_id TEXT NOT NULL, PRIMARY KEY (snapshot_id, alarm_id));
                CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value);
                """)
            self._db.execute("INSERT OR IGNORE INTO meta VALUES ('schema', ?)", (TREND_SCHEMA,))
        except OSError as exc:
            raise _oserror(f"state_dir {self.state_dir}", exc) from exc
        except sqlite3.Error as exc:
            raise StoreError(f"trend database in {self.state_dir}: {exc}") from exc

    @classmethod
    def from_config(cls, cfg, clock=time.time) -> "Store":
        """The store of an ``AgentConfig`` (state_dir relative to the config file)."""
        from agent.config import resolve_path

        return cls(resolve_path(cfg, cfg.store.state_dir), **store_limits(cfg.store), clock=clock)

    def set_limits(self, *, max_count: int, max_bytes: int, raw_keep_s: float,
                   hourly_keep_s: float) -> None:
        """Snapshot retention (count, bytes) and trend ages (s); also on a config reload,
        applied by the next prune / downsample."""
        if max_count < 1 or max_bytes < 1:
            raise ValueError("store max_count and max_bytes must be >= 1")
        with self._lock:
            self.max_count = int(max_count)
            self.max_bytes = int(max_bytes)
            self.raw_keep_s = float(raw_keep_s)
            self.hourly_keep_s = float(hourly_keep_s)

    @property
    def outbox_path(self) -> Path:
        return self.state_dir / "outbox.sqlite"

    def close(self) -> None:
        self._db.close()

    def _fail(self, exc: StoreError) -> StoreError:
        self.errors += 1
        self.last_error = str(exc)
        return exc

    # -- trend --------------------------------------------------------------
    def add_trend(self, t_utc_s: float, state: str, speed_hz: float | None,
                  features: Mapping[str, float]) -> None:
        body = json.dumps(_json_safe(dict(features)), separators=(",", ":"))
        state = str(getattr(state, "value", state))
        speed = None if speed_hz is None or not math.isfinite(speed_hz) else float(speed_hz)
        try:
            with self._lock:
                self._db.execute("INSERT INTO trend VALUES (?, 0, 1, ?, ?, ?, NULL)",
                                 (float(t_utc_s), state, speed, body))
        except sqlite3.Error as exc:
            raise self._fail(StoreError(f"trend database: cannot write: {exc}")) from exc

    def trend(self, since_utc_s: float = -math.inf, until_utc_s: float = math.inf) -> list[TrendRow]:
        with self._lock:
            rows = self._db.execute(
                "SELECT t_utc_s, level, n, state, speed_hz, features, features_max FROM trend"
                " WHERE t_utc_s >= ? AND t_utc_s <= ? ORDER BY t_utc_s, level",
                (max(since_utc_s, -1e300), min(until_utc_s, 1e300))).fetchall()
        out = []
        for t, level, n, state, speed, feats, fmax in rows:
            f = json.loads(feats)
            out.append(TrendRow(t, level, n, state, speed, f, json.loads(fmax) if fmax else f))
        return out

    def downsample(self, now_utc_s: float | None = None) -> tuple[int, int]:
        """Fold captures older than ``raw_keep_s`` into hourly rows (mean and max per
        feature, one row per hour and state); delete hourly rows older than
        ``hourly_keep_s``. Returns (captures folded, hourly rows deleted)."""
        now = self._clock() if now_utc_s is None else now_utc_s
        cut = now - self.raw_keep_s
        try:
            with self._lock:
                db = self._db
                db.execute("BEGIN IMMEDIATE")
                try:
                    rows = db.execute("SELECT t_utc_s, state, speed_hz, features FROM trend"
                                      " WHERE level = 0 AND t_utc_s < ?", (cut,)).fetchall()
                    groups: dict[tuple[int, str], list] = {}
                    for t, state, speed, feats in rows:
                        groups.setdefault((int(t // 3600), state), []).append(
                            (speed, json.loads(feats)))
                    for (hour, state), items in sorted(groups.items()):
                        speeds = [s for s, _ in items if s is not None]
                        keys = sorted({k for _, f in items for k in f})
                        mean, peak = {}, {}
                        for k in keys:
                            vals = [f[k] for _, f in items
                                    if isinstance(f.get(k), (int, float)) and f[k] is not None]
                            if vals:
                                mean[k] = float(np.mean(vals))
                                peak[k] = float(np.max(vals))
                        db.execute("INSERT INTO trend VALUES (?, 1, ?, ?, ?, ?, ?)",
                                   (hour * 3600.0, len(items), state,
                                    float(np.mean(speeds)) if speeds else None,
                                    json.dumps(mean), json.dumps(peak)))
                    db.execute("DELETE FROM trend WHERE level = 0 AND t_utc_s < ?", (cut,))
                    gone = db.execute("DELETE FROM trend WHERE level = 1 AND t_utc_s < ?",
                                      (now - self.hourly_keep_s,)).rowcount
                    db.execute("COMMIT")
                except BaseException:
                    if db.in_transaction:  # SQLite may have rolled back already (disk full)
                        db.execute("ROLLBACK")
                    raise
        except sqlite3.Error as exc:
            raise self._fail(StoreError(f"trend database: cannot downsample: {exc}")) from exc
        return len(rows), gone

    # -- snapshots ------------------------------------------------------------
    def _new_id(self, t_utc_s: float, reason: str) -> str:
        if not re.fullmatch(r"[a-z][a-z0-9_]{0,31}", reason):
            raise ValueError(f"snapshot reason {reason!r} must be 1-32 of a-z, 0-9, _ "
                             "starting with a letter")
        ms = int(round((t_utc_s % 1) * 1000)) % 1000
        stamp = time.strftime("%Y%m%dT%H%M%S", time.gmtime(int(t_utc_s))) + f"{ms:03d}Z"
        base = f"{stamp}-{reason}"
        existing = set(self._ids())
        sid, k = base, 1
        while sid in existing:
            k += 1
            sid = f"{base}-{k}"
        return sid

    def _ids(self) -> list[str]:
        try:
            names = os.listdir(self.snap_dir)
        except OSError:
            return []
        return sorted(n for n in names if SNAPSHOT_ID.match(n))

    def resolve(self, snapshot_id: Any) -> Path | None:
        """The folder of an existing snapshot, or None. The id is matched against the
        folders that exist; the returned path is built from the stored name."""
        if not isinstance(snapshot_id, str) or not SNAPSHOT_ID.match(snapshot_id):
            return None
        for name in self._ids():
            if name == snapshot_id:
                return self.snap_dir / name
        return None

    def save_snapshot(self, *, t_utc_s: float, reason: str, waveform_ms2: np.ndarray,
                      fs_hz: float, spectra: Mapping[str, np.ndarray],
                      analysis: Mapping[str, Any]) -> str:
        """Write one snapshot atomically; returns its id. Raises StoreError (disk full...)."""
        wav = wav_float32_bytes(waveform_ms2, fs_hz)
        arrays = {}
        for k, v in spectra.items():
            if not re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]{0,63}", k):
                raise ValueError(f"spectrum name {k!r} is not a plain identifier")
            arr = np.asarray(v)
            if arr.dtype == object:
                raise ValueError(f"spectrum {k!r} must be numeric (no object arrays)")
            arrays[k] = arr
        buf = io.BytesIO()
        np.savez_compressed(buf, **arrays)
        with self._lock:
            sid = self._new_id(t_utc_s, reason)
            doc = {"schema": 1, "snapshot_id": sid, "t_utc_s": float(t_utc_s), "reason": reason,
                   "fs_hz": float(fs_hz), "n_samples": int(np.asarray(waveform_ms2).size),
                   "waveform_unit": "m/s^2", "analysis": analysis}
            tmp = self.snap_dir / f".tmp-{sid}"
            try:
                tmp.mkdir()
                _write_file(tmp / "waveform.wav", wav)
                _write_file(tmp / "spectra.npz", buf.getvalue())
                _write_file(tmp / "analysis.json", json_bytes(doc))
                _fsync_dir(tmp)
                os.replace(tmp, self.snap_dir / sid)
                _fsync_dir(self.snap_dir)
            except OSError as exc:
                shutil.rmtree(tmp, ignore_errors=True)
                raise self._fail(_oserror(f"snapshot {sid}", exc)) from exc
        return sid

    def _info(self, sid: str, pinned: set[str]) -> SnapshotInfo:
        d = self.snap_dir / sid
        files, size = [], 0
        for f in sorted(os.listdir(d)):
            st = os.stat(d / f)
            files.append(f)
            size += st.st_size
        stamp, _, reason = sid.partition("-")
        t = calendar.timegm(time.strptime(stamp[:15], "%Y%m%dT%H%M%S")) + int(stamp[15:18]) / 1000.0
        reason = reason.rsplit("-", 1)[0] if re.search(r"-\d+$", reason) else reason
        return SnapshotInfo(sid, t, reason, size, tuple(files), sid in pinned)

    def list_snapshots(self) -> list[SnapshotInfo]:
        """All snapshots, oldest first."""
        with self._lock:
            pinned = self.pinned_ids()
            out = []
            for sid in self._ids():
                try:
                    out.append(self._info(sid, pinned))
                except OSError:
                    continue  # deleted meanwhile
            return out

    def snapshot_file(self, snapshot_id: Any, name: Any) -> Path | None:
        """Path of one file of one snapshot, or None if either is unknown."""
        d = self.resolve(snapshot_id)
        if d is None or not isinstance(name, str):
            return None
        if name not in SNAPSHOT_FILES and not _FEEDBACK.match(name):
            return None
        for f in os.listdir(d):
            if f == name:
                return d / f
        return None

    def add_feedback(self, snapshot_id: str, record: Mapping[str, Any]) -> str:
        """Store a maintenance finding beside the snapshot it refers to; returns the file name."""
        with self._lock:
            d = self.resolve(snapshot_id)
            if d is None:
                raise KeyError(snapshot_id)
            n = 1 + sum(1 for f in os.listdir(d) if _FEEDBACK.match(f))
            name = f"feedback-{n}.json"
            try:
                write_atomic(d / name, json_bytes(dict(record)))
            except StoreError as exc:
                raise self._fail(exc) from exc
            return name

    # -- pins and retention ---------------------------------------------------
    def _sql(self, what: str, sql: str, args: tuple = ()) -> list:
        """Run one statement; a database error (disk full, locked) becomes a StoreError."""
        try:
            with self._lock:
                return self._db.execute(sql, args).fetchall()
        except sqlite3.Error as exc:
            raise self._fail(StoreError(f"trend database: cannot {what}: {exc}")) from exc

    def pin(self, snapshot_id: str, alarm_id: str) -> None:
        """Keep ``snapshot_id`` while ``alarm_id`` is open."""
        self._sql("pin a snapshot", "INSERT OR IGNORE INTO pins VALUES (?, ?)", (snapshot_id, alarm_id))

    def unpin_alarm(self, alarm_id: str) -> None:
        self._sql("unpin a snapshot", "DELETE FROM pins WHERE alarm_id = ?", (alarm_id,))

    def pinned_ids(self) -> set[str]:
        return {r[0] for r in self._sql("read pins", "SELECT snapshot_id FROM pins")}

    def prune(self) -> list[str]:
        """Delete the oldest unpinned snapshots beyond ``max_count`` / ``max_bytes``."""
        deleted = []
        with self._lock:
            infos = self.list_snapshots()
            count = len(infos)
            total = sum(i.size_bytes for i in infos)
            for info in infos:
                if count <= self.max_count and total <= self.max_bytes:
                    break
                if info.pinned:
                    continue
                shutil.rmtree(self.snap_dir / info.snapshot_id, ignore_errors=True)
                count -= 1
                total -= info.size_bytes
                deleted.append(info.snapshot_id)
        return deleted

    def disk_usage(self) -> dict:
        try:
            du = shutil.disk_usage(self.state_dir)
        except OSError:
            return {"disk_free_bytes": None}
        snaps = self.list_snapshots()
        return {"disk_free_bytes": du.free, "disk_total_bytes": du.total,
                "snapshots_count": len(snaps),
                "snapshots_bytes": sum(s.size_bytes for s in snaps),
                "store_errors_count": self.errors, "store_last_error": self.last_error}
