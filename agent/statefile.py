"""Versioned JSON state files written so that a power cut leaves the old or the new file, never half of one.

This is an edge module (it touches the disk). Writing: a temporary file in
the same directory, ``flush`` + ``os.fsync``, ``os.replace`` over the target
(atomic on POSIX), then ``fsync`` of the directory so the rename itself is
durable. Reading checks the file's format name and version; anything else is
:class:`~agent.errors.IncompatibleStateFile`, which the caller reports and
answers by :func:`set_aside` and starting afresh.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from agent.errors import IncompatibleStateFile, StoreError


def write_atomic(path: str | os.PathLike, data: bytes) -> None:
    """Replace ``path`` with ``data`` atomically and durably (creating its folder); StoreError on failure.

    The writing itself is :func:`agent.store.write_atomic` (temporary file,
    fsync, ``os.replace``, fsync of the folder).
    """
    from agent.store import write_atomic as _store_write_atomic

    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StoreError(f"cannot write state file {path}: {exc.strerror or exc}") from exc
    _store_write_atomic(path, data)


def dump_json_state(fmt: str, version: int, body: dict) -> bytes:
    """Canonical bytes of a state file: sorted keys, no NaN, trailing newline."""
    doc = {"format": fmt, "version": int(version), **body}
    return (json.dumps(doc, sort_keys=True, allow_nan=False, separators=(",", ":")) + "\n").encode()


def write_json_state(path: str | os.PathLike, fmt: str, version: int, body: dict) -> None:
    """Write ``body`` as a versioned JSON state file, atomically."""
    write_atomic(path, dump_json_state(fmt, version, body))


def read_json_state(path: str | os.PathLike, fmt: str, version: int) -> dict | None:
    """The body of a state file, None when there is none.

    Raises IncompatibleStateFile (naming the file and the problem) when it is
    unreadable, not JSON, of another format, or of another version.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        return None
    except OSError as exc:
        raise IncompatibleStateFile(f"state file {path} cannot be read: {exc.strerror or exc}") from exc
    try:
        doc = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise IncompatibleStateFile(f"state file {path} is not valid JSON (damaged?): {exc}") from exc
    if not isinstance(doc, dict) or doc.get("format") != fmt:
        got = doc.get("format") if isinstance(doc, dict) else type(doc).__name__
        raise IncompatibleStateFile(f"state file {path} is not a {fmt!r} file (format {got!r})")
    if doc.get("version") != version:
        raise IncompatibleStateFile(
            f"state file {path} has format version {doc.get('version')!r}; this agent reads version {version}"
        )
    return doc


def set_aside(path: str | os.PathLike) -> Path:
    """Rename an unusable state file to ``<name>.bad<n>`` (first free n) and return the new path."""
    path = Path(path)
    n = 1
    while True:
        target = path.with_name(f"{path.name}.bad{n}")
        if not target.exists():
            break
        n += 1
    try:
        os.replace(path, target)
    except OSError as exc:
        raise StoreError(f"cannot set aside state file {path}: {exc.strerror or exc}") from exc
    return target
