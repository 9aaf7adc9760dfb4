"""Bad input thrown at every reader (hypothesis): config loader, recording readers, the
remote request handler. Each must either work or raise the documented error
(``ConfigError`` / ``InputError``, or answer with an error reply) within a bounded
time, and must not write anything anywhere.

Example counts are kept modest so the whole file runs in well under a minute;
``FUZZ_SCALE=10`` in the environment multiplies them for a longer campaign.
"""

from __future__ import annotations

import copy
import io
import json
import os
import struct
import sys
import tomllib
import zipfile
from pathlib import Path

import numpy as np
import pytest

pytest.importorskip("paho.mqtt.client", reason="paho-mqtt is a runtime dependency; run the suite in the project .venv (tests/setup-machine.sh)")
from hypothesis import HealthCheck, given, settings, strategies as st
from scipy.io import savemat, wavfile

from agent.config import load_config, parse_config
from agent.errors import ConfigError, InputError
from agent.mqtt import Inbound, Topics
from agent.recordings import read_recording
from agent.remote import BasicControls, RateLimit, RequestHandler
from agent.store import Store

ROOT = Path(__file__).resolve().parents[1]
SCALE = int(os.environ.get("FUZZ_SCALE", "1"))
FUZZ = settings(max_examples=150 * SCALE, deadline=2000, derandomize=True,
                suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])

DEMO = tomllib.loads((ROOT / "config" / "demo-skid.toml").read_text())

# ───────────────────────────── config ─────────────────────────────
toml_scalars = st.one_of(
    st.booleans(), st.integers(-2**63, 2**63 - 1), st.floats(allow_nan=True, allow_infinity=True),
    st.text(max_size=20), st.sampled_from(["", "../../etc", "C:\\x", "\x00", "auto", "serial",
                                           "replay", "synthetic", "soundcard"]))
toml_values = st.recursive(
    toml_scalars,
    lambda kids: st.one_of(st.lists(kids, max_size=4),
                           st.dictionaries(st.text(max_size=12), kids, max_size=4)),
    max_leaves=12)


def _paths(d, prefix=()):
    for k, v in d.items():
        yield prefix + (k,)
        if isinstance(v, dict):
            yield from _paths(v, prefix + (k,))


DEMO_PATHS = sorted(_paths(DEMO))


def _parse_or_config_error(doc) -> None:
    try:
        cfg = parse_config(doc, "fuzz.toml")
    except ConfigError as exc:
        assert exc.problems and all(isinstance(p, str) and p for p in exc.problems)
        return
    assert cfg.source.fs_hz > 0  # a config that passed is usable


@FUZZ
@given(doc=st.dictionaries(st.text(max_size=12), toml_values, max_size=6))
def test_config_random_documents(doc):
    _parse_or_config_error(doc)


@FUZZ
@given(edits=st.lists(st.tuples(st.sampled_from(DEMO_PATHS), toml_values, st.booleans()),
                      min_size=1, max_size=4))
def test_config_demo_with_random_edits(edits):
    """The shipped demo config with values replaced or keys deleted at random places."""
    doc = copy.deepcopy(DEMO)
    for path, value, delete in edits:
        node = doc
        for k in path[:-1]:
            node = node.get(k) if isinstance(node, dict) else None
            if not isinstance(node, dict):
                break
        else:
            if delete:
                node.pop(path[-1], None)
            else:
                node[path[-1]] = value
    _parse_or_config_error(doc)


@FUZZ
@given(data=st.binary(max_size=300) | st.text(max_size=300).map(str.encode))
def test_config_random_toml_bytes(tmp_path_factory, data):
    p = tmp_path_factory.mktemp("cfg") / "x.toml"
    p.write_bytes(data)
    try:
        cfg = load_config(p)
    except ConfigError as exc:
        assert exc.problems
        return
    assert cfg.source.fs_hz > 0  # e.g. an empty file: every default


def test_config_truncated_demo_text(tmp_path):
    text = (ROOT / "config" / "demo-skid.toml").read_bytes()
    for cut in range(0, len(text), max(1, len(text) // 200)):
        p = tmp_path / "cut.toml"
        p.write_bytes(text[:cut])
        try:
            load_config(p)
        except ConfigError:
            pass


# ───────────────────────────── recordings ─────────────────────────────
FS = 2048


def _wav(dtype=np.float32) -> bytes:
    x = (np.sin(np.arange(4096) * 0.1) * 0.5).astype(np.float64)
    if np.issubdtype(np.dtype(dtype), np.integer):
        x = x * np.iinfo(dtype).max
    buf = io.BytesIO()
    wavfile.write(buf, FS, x.astype(dtype))
    return buf.getvalue()


def _npy(arr) -> bytes:
    buf = io.BytesIO()
    np.save(buf, arr)
    return buf.getvalue()


def _npz() -> bytes:
    buf = io.BytesIO()
    np.savez(buf, x=np.arange(4096.0), fs_hz=np.array(2048.0))
    return buf.getvalue()


def _mat() -> bytes:
    buf = io.BytesIO()
    savemat(buf, {"acc": np.arange(4096.0), "fs": 2048.0, "s": {"a": np.arange(100.0)}})
    return buf.getvalue()


def _csv() -> bytes:
    return ("t,acc\n" + "\n".join(f"{i / FS:.6f},{np.sin(i * 0.1):.6f}" for i in range(400))).encode()


GOOD = {".wav": _wav(), ".npy": _npy(np.arange(4096.0)), ".npz": _npz(), ".mat": _mat(),
        ".csv": _csv()}


def _wav_header_lie(kind: str) -> bytes:
    """A WAV whose header states something impossible."""
    b = bytearray(_wav(np.int16))
    if kind == "huge_data":  # data chunk claims 4 GiB
        i = b.index(b"data")
        b[i + 4:i + 8] = struct.pack("<I", 0xFFFFFFF0)
    elif kind == "zero_rate":
        b[24:28] = struct.pack("<I", 0)
    elif kind == "zero_channels":
        b[22:24] = struct.pack("<H", 0)
    elif kind == "odd_bits":
        b[34:36] = struct.pack("<H", 7)
    elif kind == "huge_riff":
        b[4:8] = struct.pack("<I", 0xFFFFFFFF)
    elif kind == "huge_fmt":
        b[16:20] = struct.pack("<I", 0x7FFFFFFF)
    return bytes(b)


def _npy_header_lie(shape: str) -> bytes:
    """An .npy whose header declares a huge or negative shape over a few bytes of data."""
    head = "{'descr': '<f8', 'fortran_order': False, 'shape': %s, }" % shape
    head = head.ljust(118) + "\n"
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(head)) + head.encode() + b"\0" * 64


LIES = [(f"lie_{k}.wav", _wav_header_lie(k)) for k in
        ("huge_data", "zero_rate", "zero_channels", "odd_bits", "huge_riff", "huge_fmt")] + [
    (f"lie_{i}.npy", _npy_header_lie(s)) for i, s in
    enumerate(("(10000000000000,)", "(-5,)", "(4096, 4096, 4096)", "()", "(2**64,)"))] + [
    ("nan.csv", b"nan\ninf\n" * 100), ("inf.npy", _npy(np.full(4096, np.inf))),
    ("obj.npy", b"\x93NUMPY\x01\x00v\x00{'descr': '|O', 'fortran_order': False, 'shape': (3,), }"
     + b" " * 50 + b"\n" + b"\x80\x04N." * 3),
    ("str.npy", _npy(np.array(["a", "b"] * 100))),
    ("cplx.npy", _npy(np.arange(4096) * (1 + 1j))), ("cplx.mat", None),
    ("bomb.npz", None),  # filled below
    ("hdr_only.csv", b"a,b,c\n"), ("ragged.csv", b"1,2\n3\n4,5,6\n" * 30),
    ("v73.mat", b"MATLAB 7.3 MAT-file, Platform: GLNXA64, Created on: x HDF5 schema 1.00 .".ljust(128) + b"\x89HDF\r\n"),
    ("noext", b"\x00\x01\x02garbage"), ("empty.wav", b""),
    ("cut_header.mat", _mat()[:len(_mat()) // 512]),  # found by FUZZ_SCALE=10: IndexError in scipy
]


def _zip_bomb() -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as z:
        hdr = _npy(np.zeros(1))[:128]
        z.writestr("x.npy", hdr.replace(b"(1,)", b"(99999999999,)".ljust(4)) + b"\0" * 1000)
    return buf.getvalue()


def _cplx_mat() -> bytes:
    buf = io.BytesIO()
    savemat(buf, {"acc": np.arange(4096.0) * 1j, "fs": 2048.0})
    return buf.getvalue()


LIES = [(n, (_zip_bomb() if n.endswith(".npz") else _cplx_mat()) if b is None else b)
        for n, b in LIES]


def _read_or_input_error(path: Path) -> None:
    try:
        rec = read_recording(path, fs_hz=None, units="g")
    except InputError as exc:
        assert str(path.name) in str(exc) or str(path) in str(exc)
        return
    assert rec.fs_hz > 0 and np.all(np.isfinite(rec.accel_ms2)) and rec.n_samples >= 64


def _listing(d: Path) -> list:
    return sorted((str(p.relative_to(d)), p.stat().st_size) for p in d.rglob("*"))


@pytest.mark.filterwarnings("error")  # a warning would be a silent wrong result
@pytest.mark.parametrize("name,data", LIES, ids=[n for n, _ in LIES])
def test_recordings_that_lie_in_their_headers(tmp_path, name, data):
    p = tmp_path / name
    p.write_bytes(data)
    before = _listing(tmp_path)
    _read_or_input_error(p)
    assert _listing(tmp_path) == before


@FUZZ
@given(ext=st.sampled_from(sorted(GOOD)), cut=st.floats(0.0, 1.0),
       flips=st.lists(st.tuples(st.floats(0.0, 1.0), st.integers(0, 255)), max_size=6))
def test_recordings_truncated_and_corrupted(tmp_path_factory, ext, cut, flips):
    d = tmp_path_factory.mktemp("rec")
    b = bytearray(GOOD[ext])
    for pos, val in flips:
        b[int(pos * (len(b) - 1))] = val
    b = b[:max(1, int(cut * len(b)))]
    p = d / f"x{ext}"
    p.write_bytes(bytes(b))
    before = _listing(d)
    _read_or_input_error(p)
    assert _listing(d) == before


# ───────────────────────────── remote requests ─────────────────────────────
TOPICS = Topics("skv", "plant1", "p-201")
RES = TOPICS.reply_prefix
TRAVERSAL = ["..", "../..", "../../trend.sqlite", "/etc/passwd", "..\\..\\x", "%2e%2e%2f",
             "snapshots/../../x", "x\x00.wav", "\u2025/\u2025", "waveform.wav/../../../x",
             "~root", "$(id)", "`id`", "|id", ";id", "20261202T000000000Z-x/../..",
             "20261202T000000000Z-scheduled\n", "./waveform.wav", "WAVEFORM.WAV", "a" * 5000,
             "feedback-1.json/..", "feedback-99999.json", "file:///etc/passwd", "\\\\host\\share"]
values = st.one_of(st.sampled_from(TRAVERSAL), st.text(max_size=40), st.integers(-2**70, 2**70),
                   st.floats(), st.booleans(), st.none(), st.lists(st.integers(), max_size=3),
                   st.dictionaries(st.text(max_size=5), st.integers(), max_size=2))
FIELDS = ["snapshot_id", "file", "index", "limit", "mode", "duration_s", "alarm_id", "note",
          "by", "found", "done", "finding_code", "confirmed", "relearn", "reply_to",
          "correlation_id", "schema"]
commands = st.sampled_from(["list", "get", "chunk", "snapshot", "ack", "mode", "feedback",
                            "frobnicate", "", "../x", "LIST", "list/../get"])
bodies = st.one_of(
    st.dictionaries(st.sampled_from(FIELDS) | st.text(max_size=8), values, max_size=5).map(
        lambda d: json.dumps(d, allow_nan=True).encode()),
    st.binary(max_size=200), st.just(b"x" * 5000), st.just(b"[]"), st.just(b"null"),
    st.just(b'{"a":' * 2000 + b"1" + b"}" * 2000))
topics = st.one_of(st.none(), st.sampled_from([RES + "ok", RES + "errors", RES + "../x",
                                               "skv/plant1/p-201/state", RES, RES + "a/b",
                                               RES + "#", RES + "+"]), st.text(max_size=30))


class _Recorder:
    """Audit hook: every path the process opens while ``on`` is set."""

    on = False
    opened: list = []

    @classmethod
    def hook(cls, event, args):
        if cls.on and event == "open":
            cls.opened.append(args[0])


sys.addaudithook(_Recorder.hook)


@pytest.fixture(scope="module")
def handler_env(tmp_path_factory):
    d = tmp_path_factory.mktemp("remote")
    store = Store(d / "state")
    sid = store.save_snapshot(t_utc_s=1_796_169_600.0, reason="scheduled",
                              waveform_ms2=np.zeros(256), fs_hz=2048.0,
                              spectra={"f_hz": np.arange(10.0)}, analysis={})
    calls = []
    controls = BasicControls(snapshot_fn=lambda: calls.append("snap") or sid,
                             relearn_fn=lambda: calls.append("relearn"),
                             ack_fn=lambda a: calls.append(("ack", a)))
    controls.open_alarms["alert-1"] = {"state": "alert"}
    h = RequestHandler(TOPICS, store, controls, rate=RateLimit(1e9, 10**9))
    return store, sid, controls, h, calls, d


def _state(store, controls):
    snaps = [(s.snapshot_id, s.files, s.size_bytes) for s in store.list_snapshots()]
    return snaps, controls.mode, dict(controls.open_alarms), len(controls.feedback)


@FUZZ
@given(cmd=commands, body=bodies, topic=topics, corr=st.none() | st.binary(max_size=20))
def test_request_handler_always_one_reply_no_harm(handler_env, cmd, body, topic, corr):
    store, sid, controls, h, calls, d = handler_env
    before = _state(store, controls)
    n_calls = len(calls)
    _Recorder.opened.clear()
    _Recorder.on = True
    try:
        reply = h.handle(Inbound(cmd, body, topic, corr, "5"))
    finally:
        _Recorder.on = False
    out = json.loads(reply.payload)
    assert reply.topic.startswith(RES) and reply.topic[len(RES):].replace("-", "").replace("_", "").isalnum()
    assert reply.correlation_data == corr
    assert set(out) >= {"schema", "ok", "cmd"}
    snap_dir = (store.snap_dir / sid).resolve()
    for p in _Recorder.opened:  # only files of the existing snapshot were opened
        if isinstance(p, (str, bytes, os.PathLike)):
            assert Path(os.fsdecode(p)).resolve().parent == snap_dir, p
    if not out["ok"]:
        assert out["error"]["code"] and out["error"]["message"]
        assert _state(store, controls) == before and len(calls) == n_calls


@pytest.mark.parametrize("bad", TRAVERSAL)
def test_traversal_corpus_never_leaves_the_snapshot(handler_env, bad):
    store, sid, controls, h, calls, d = handler_env
    secret = d / "secret.txt"
    secret.write_text("do not serve")
    before = _state(store, controls)
    for cmd, body in (("get", {"snapshot_id": bad}),
                      ("chunk", {"snapshot_id": bad, "file": "waveform.wav", "index": 0}),
                      ("chunk", {"snapshot_id": sid, "file": bad, "index": 0}),
                      ("feedback", {"snapshot_id": bad, "found": "x", "done": "y"}),
                      ("ack", {"alarm_id": bad})):
        _Recorder.opened.clear()
        _Recorder.on = True
        try:
            r = h.handle(Inbound(cmd, json.dumps(body).encode(), RES + "t", None, "5"))
        finally:
            _Recorder.on = False
        out = json.loads(r.payload)
        assert out["ok"] is False, (cmd, body, out)
        assert b"do not serve" not in r.payload
        assert not _Recorder.opened, _Recorder.opened  # a refused request opens nothing
    assert _state(store, controls) == before


# ───────────────────────────── static check of the request path ─────────────────────────────
FORBIDDEN_CALLS = {"eval", "exec", "compile", "__import__", "system", "popen", "spawnl", "spawnv",
                   "execv", "execl", "run", "Popen", "call", "check_call", "check_output",
                   "getoutput", "loads_pickle", "load_pickle", "unpickle"}
FORBIDDEN_MODULES = {"subprocess", "pickle", "shelve", "marshal", "shlex", "pty", "commands"}


def _request_path_functions():
    """The request handler's methods and the Store methods they can reach."""
    import ast
    import inspect
    import textwrap

    from agent import remote, store

    handler = ast.parse(textwrap.dedent(inspect.getsource(remote.RequestHandler)))
    funcs = {n.name: n for n in ast.walk(handler) if isinstance(n, ast.FunctionDef)}
    store_src = ast.parse(textwrap.dedent(inspect.getsource(store.Store)))
    store_funcs = {n.name: n for n in ast.walk(store_src) if isinstance(n, ast.FunctionDef)}
    reach, todo = {}, [("handler", k) for k in funcs]
    while todo:
        owner, name = todo.pop()
        if (owner, name) in reach:
            continue
        node = (funcs if owner == "handler" else store_funcs).get(name)
        if node is None:
            continue
        reach[(owner, name)] = node
        for call in (c for c in ast.walk(node) if isinstance(c, ast.Call)):
            f = call.func
            if isinstance(f, ast.Attribute) and isinstance(f.value, ast.Attribute) \
                    and f.value.attr == "store":
                todo.append(("store", f.attr))
            elif isinstance(f, ast.Attribute) and isinstance(f.value, ast.Name) and f.value.id == "self":
                todo.append((owner, f.attr))
    return reach


def test_request_path_has_no_shell_eval_or_request_built_paths():
    import ast

    from agent import remote

    reach = _request_path_functions()
    assert ("handler", "handle") in reach and ("store", "resolve") in reach  # the walk works
    mod_imports = {a.name.split(".")[0] for n in ast.walk(ast.parse(Path(remote.__file__).read_text()))
                   if isinstance(n, (ast.Import, ast.ImportFrom))
                   for a in (n.names if isinstance(n, ast.Import) else [ast.alias(n.module or "")])}
    assert not mod_imports & FORBIDDEN_MODULES, mod_imports & FORBIDDEN_MODULES
    for (owner, name), node in reach.items():
        for call in (c for c in ast.walk(node) if isinstance(c, ast.Call)):
            f = call.func
            fname = f.id if isinstance(f, ast.Name) else f.attr if isinstance(f, ast.Attribute) else ""
            assert fname not in FORBIDDEN_CALLS, f"{owner}.{name} calls {fname}"
            if fname == "open" and owner == "handler":
                # the handler opens only a path the store found among existing files
                arg = call.args[0]
                assert isinstance(arg, ast.Name), ast.unparse(call)
                src = ast.unparse(node)
                assert f"{arg.id} = self.store.snapshot_file(" in src or \
                    f"def {name}(self, {arg.id}: Path)" in src, f"{owner}.{name}: {ast.unparse(call)}"
            if fname == "load":  # numpy loads only without pickle
                kws = {k.arg: ast.unparse(k.value) for k in call.keywords}
                assert kws.get("allow_pickle", "False") == "False", ast.unparse(call)
