"""The systemd service: unit checks, the sd_notify protocol on real sockets, the install scripts.

Protocol facts checked here come from systemd's ``sd_notify(3)`` and
``sd_watchdog_enabled(3)`` manual pages: one AF_UNIX datagram of
newline-separated KEY=VALUE lines; ``@name`` is an abstract socket; the
watchdog is pinged every half of WATCHDOG_USEC and only by the process named in
WATCHDOG_PID (when set); systemd reads the sender's PID from SCM_CREDENTIALS,
which the kernel attaches when the receiver sets SO_PASSCRED (``unix(7)``).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import socket
import struct
import subprocess
import sys
import threading
import time
import uuid
from pathlib import Path

import pytest

from agent.sdnotify import Notifier, WatchdogGate

ROOT = Path(__file__).resolve().parents[1]
UNIT = ROOT / "systemd" / "skidvib.service"
INSTALL = ROOT / "systemd" / "install.sh"
UNINSTALL = ROOT / "systemd" / "uninstall.sh"

SYSTEMD_ANALYZE = shutil.which("systemd-analyze")
needs_analyze = pytest.mark.skipif(
    SYSTEMD_ANALYZE is None,
    reason="systemd-analyze not found (Debian package 'systemd'; .ci/run installs it)",
)


# --------------------------------------------------------------------------- helpers


class Receiver:
    """A notify socket as systemd binds it: AF_UNIX datagram with SO_PASSCRED."""

    def __init__(self, address: str):
        self.address = address
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_PASSCRED, 1)
        bind_to = b"\0" + address[1:].encode() if address.startswith("@") else address
        self.sock.bind(bind_to)
        self.messages: list[tuple[float, int, dict[str, str]]] = []

    def drain(self, wait_s: float = 0.2, max_s: float = 10.0) -> list[tuple[float, int, dict[str, str]]]:
        """Collect datagrams until none arrives for ``wait_s`` or ``max_s`` have passed."""
        new = []
        creds_size = struct.calcsize("3i")  # struct ucred: pid, uid, gid (unix(7))
        end_s = time.monotonic() + max_s
        while True:
            left_s = end_s - time.monotonic()
            if left_s <= 0:
                break
            self.sock.settimeout(min(wait_s, left_s))
            try:
                data, ancdata, _flags, _addr = self.sock.recvmsg(4096, socket.CMSG_SPACE(creds_size))
            except (TimeoutError, socket.timeout):
                break
            t = time.monotonic()
            pid = None
            for level, kind, payload in ancdata:
                if level == socket.SOL_SOCKET and kind == socket.SCM_CREDENTIALS:
                    pid = struct.unpack("3i", payload[:creds_size])[0]
            fields = dict(line.split("=", 1) for line in data.decode().splitlines() if line)
            new.append((t, pid, fields))
        self.messages.extend(new)
        return new

    def close(self) -> None:
        self.sock.close()


@pytest.fixture(params=["path", "abstract"])
def receiver(request, tmp_path):
    if request.param == "path":
        address = str(tmp_path / "notify.sock")
    else:
        address = f"@skidvib-test-{uuid.uuid4().hex}"
    rx = Receiver(address)
    yield rx
    rx.close()


def _keys(messages, key):
    return [m for m in messages if key in m[2]]


# --------------------------------------------------------------------------- Notifier


def test_without_notify_socket_everything_is_a_quiet_no_op():
    n = Notifier.from_env({"WATCHDOG_USEC": "30000000"})
    assert not n.enabled
    assert n.watchdog_interval_s is None  # nothing to ping even if a watchdog is set
    assert n.ready("x") is False and n.status("x") is False
    assert n.watchdog() is False and n.stopping() is False and n.reloading() is False
    assert (n.n_sent, n.n_failed) == (0, 0)
    gate = WatchdogGate(n)
    gate.progress()
    assert not gate.enabled and gate.maybe_ping(100.0) is False


@pytest.mark.parametrize(
    ("usec", "pid", "expected_s"),
    [
        ("30000000", None, 15.0),  # WatchdogSec=30 -> ping every 15 s (half, sd_watchdog_enabled(3))
        ("2000000", "self", 1.0),
        ("2000000", "other", None),  # WATCHDOG_PID names another process
        ("0", None, None),
        ("-5", None, None),
        ("abc", None, None),
        ("", None, None),
    ],
)
def test_watchdog_interval_is_half_of_watchdog_usec(usec, pid, expected_s):
    env = {"NOTIFY_SOCKET": "/run/systemd/notify", "WATCHDOG_USEC": usec}
    if pid == "self":
        env["WATCHDOG_PID"] = str(os.getpid())
    elif pid == "other":
        env["WATCHDOG_PID"] = str(os.getpid() + 1)
    assert Notifier.from_env(env).watchdog_interval_s == expected_s


def test_ready_once_status_and_stopping_reach_the_socket(receiver):
    n = Notifier.from_env({"NOTIFY_SOCKET": receiver.address})
    assert n.ready("starting: waiting for first capture")
    assert n.ready("again") is False  # READY=1 is sent once per start
    assert n.status("running; zone A; last capture 2026-12-02T00:00:00Z")
    assert n.status("two\nlines")
    assert n.stopping("stopping: SIGTERM")
    got = receiver.drain()
    assert [m[2] for m in got] == [
        {"READY": "1", "STATUS": "starting: waiting for first capture"},
        {"STATUS": "running; zone A; last capture 2026-12-02T00:00:00Z"},
        {"STATUS": "two lines"},  # one line: systemctl status shows one line
        {"STOPPING": "1", "STATUS": "stopping: SIGTERM"},
    ]
    assert all(pid == os.getpid() for _, pid, _ in got)  # what NotifyAccess=main checks
    assert (n.n_sent, n.n_failed) == (4, 0)
    n.close()


def test_reload_sends_reloading_then_ready_again(receiver):
    n = Notifier.from_env({"NOTIFY_SOCKET": receiver.address})
    n.ready()
    before_usec = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
    n.reloading()
    after_usec = time.clock_gettime_ns(time.CLOCK_MONOTONIC) // 1000
    assert n.ready("config reloaded")
    got = [m[2] for m in receiver.drain()]
    assert got[0] == {"READY": "1"}
    assert got[1]["RELOADING"] == "1"
    # MONOTONIC_USEC is CLOCK_MONOTONIC in microseconds (sd_notify(3), Type=notify-reload)
    assert before_usec <= int(got[1]["MONOTONIC_USEC"]) <= after_usec
    assert got[2] == {"READY": "1", "STATUS": "config reloaded"}


@pytest.mark.parametrize("address", ["/nonexistent-dir/notify.sock", "@", "vsock:2:999"])
def test_send_failures_are_counted_never_raised(address):
    n = Notifier.from_env({"NOTIFY_SOCKET": address, "WATCHDOG_USEC": "2000000"})
    assert n.ready() is False
    assert n.watchdog() is False
    assert n.status("x") is False
    assert (n.n_sent, n.n_failed) == (0, 3)
    assert address in n.last_error


def test_sending_recovers_when_the_socket_appears(tmp_path):
    address = str(tmp_path / "late.sock")
    n = Notifier.from_env({"NOTIFY_SOCKET": address})
    assert n.status("early") is False
    rx = Receiver(address)
    try:
        assert n.status("late")
        assert [m[2] for m in rx.drain()] == [{"STATUS": "late"}]
        assert (n.n_sent, n.n_failed) == (1, 1)
    finally:
        rx.close()


# --------------------------------------------------------------------------- WatchdogGate


def test_gate_pings_at_the_interval_while_progressing_and_stops_when_stuck(receiver):
    # WATCHDOG_USEC = 2 s -> interval 1 s. Simulated clock, real datagrams.
    n = Notifier.from_env({"NOTIFY_SOCKET": receiver.address, "WATCHDOG_USEC": "2000000"})
    gate = WatchdogGate(n)
    assert gate.interval_s == 1.0 and gate.max_wait_s == 1.0
    step_s = 0.3
    ping_times = []
    t = 0.0
    while t < 10.0:  # a healthy loop: one unit of progress every 0.3 s
        t = round(t + step_s, 9)
        gate.progress()
        if gate.maybe_ping(t):
            ping_times.append(t)
    gaps = [b - a for a, b in zip(ping_times, ping_times[1:])]
    assert ping_times[0] == step_s  # the first progress is reported at once
    # never more often than the interval, never later than interval + one loop step,
    # and always within WATCHDOG_USEC, the deadline systemd enforces
    assert all(1.0 <= g <= 1.0 + step_s + 1e-9 for g in gaps), gaps
    assert max(gaps) < 2.0
    # by hand: first progress pings; then the first step at or after last + 1 s
    assert ping_times == pytest.approx([0.3, 1.5, 2.7, 3.9, 5.1, 6.3, 7.5, 8.7, 9.9])
    n_healthy = len(ping_times)

    # stuck after the progress at t = 10.2: that progress still earns one ping,
    # due at 9.9 + 1 s; after it, calling maybe_ping for 10 s sends nothing
    assert t == pytest.approx(10.2)
    sent = [t + 0.1 * k for k in range(1, 101) if gate.maybe_ping(t + 0.1 * k)]
    assert sent == pytest.approx([11.0])
    got = receiver.drain()
    assert len(_keys(got, "WATCHDOG")) == n_healthy + 1 == gate.n_pings
    assert all(m[2] == {"WATCHDOG": "1"} for m in got)

    # progress again -> pings again
    gate.progress()
    assert gate.maybe_ping(t + 20.0)
    assert len(receiver.drain()) == 1


def test_idle_wait_keeps_the_watchdog_fed_and_stops_on_request(receiver):
    n = Notifier.from_env({"NOTIFY_SOCKET": receiver.address, "WATCHDOG_USEC": "200000"})
    gate = WatchdogGate(n)  # interval 0.1 s
    t0 = time.monotonic()
    assert gate.idle(0.45) is False
    elapsed_s = time.monotonic() - t0
    assert 0.45 <= elapsed_s < 2.0
    got = receiver.drain()
    # slices of 0.1 s: a ping after each due slice, i.e. about 4 in 0.45 s
    assert 3 <= len(got) <= 5 and all(m[2] == {"WATCHDOG": "1"} for m in got)

    stop = threading.Event()
    threading.Timer(0.15, stop.set).start()  # what a SIGTERM handler would do
    t0 = time.monotonic()
    assert gate.idle(30.0, stop) is True
    assert time.monotonic() - t0 < 5.0  # returned early, not after 30 s
    assert gate.idle(0.0, stop) is True  # already set

    off = WatchdogGate(Notifier.from_env({}))  # no watchdog: one plain sleep
    assert off.max_wait_s == float("inf") and off.idle(0.01) is False


def test_watchdog_pid_mismatch_sends_no_pings(receiver):
    n = Notifier.from_env(
        {
            "NOTIFY_SOCKET": receiver.address,
            "WATCHDOG_USEC": "2000000",
            "WATCHDOG_PID": str(os.getpid() + 1),
        }
    )
    gate = WatchdogGate(n)
    assert not gate.enabled
    n.ready()
    for k in range(50):
        gate.progress()
        assert gate.maybe_ping(float(k)) is False
    got = receiver.drain()
    assert [m[2] for m in got] == [{"READY": "1"}]


CHILD = r"""
import json, signal, sys, time
from agent.sdnotify import Notifier, WatchdogGate

progress_s, = map(float, sys.argv[1:])
stop = []
signal.signal(signal.SIGTERM, lambda *a: stop.append(1))
n = Notifier.from_env()
gate = WatchdogGate(n)
sent = []
n.ready("running")
n.ready("running again")          # must not be sent twice
end = time.monotonic() + progress_s
while time.monotonic() < end:     # healthy main loop
    time.sleep(0.01)
    gate.progress()
    now = time.monotonic()
    if gate.maybe_ping(now):
        sent.append(now)
n.status("stuck")
while not stop:                    # stuck: no progress recorded any more
    time.sleep(0.01)
    now = time.monotonic()
    if gate.maybe_ping(now):
        sent.append(now)
n.stopping("stopping")
print(json.dumps({"sent": sent, "failed": n.n_failed}))
"""


def test_daemon_like_process_end_to_end(receiver):
    """A separate process: READY once, WATCHDOG at the period, none when stuck, STOPPING."""
    watchdog_usec = 1_000_000  # interval 0.5 s
    progress_s = 2.0
    env = dict(os.environ)
    env.update(NOTIFY_SOCKET=receiver.address, WATCHDOG_USEC=str(watchdog_usec))
    env.pop("WATCHDOG_PID", None)
    child = subprocess.Popen(
        [sys.executable, "-c", CHILD, str(progress_s)],
        env=env, cwd=ROOT, stdout=subprocess.PIPE, text=True,
    )
    try:
        msgs = []
        deadline = time.monotonic() + 30.0
        while not any(m[2].get("STATUS") == "stuck" for m in msgs):
            assert time.monotonic() < deadline, "child never reported being stuck"
            msgs += receiver.drain(0.05)
        msgs += receiver.drain(1.2, max_s=1.2)  # > 2 intervals of a stuck loop
        child.send_signal(signal.SIGTERM)
        out, _ = child.communicate(timeout=20)
        assert child.returncode == 0
        msgs += receiver.drain(0.2)
    finally:
        if child.poll() is None:
            child.kill()
            child.wait()
    report = json.loads(out)
    assert report["failed"] == 0
    assert all(pid == child.pid for _, pid, _ in msgs)  # what NotifyAccess=main checks
    fields = [m[2] for m in msgs]
    assert fields[0] == {"READY": "1", "STATUS": "running"}
    assert len([f for f in fields if "READY" in f]) == 1
    assert fields[-1] == {"STOPPING": "1", "STATUS": "stopping"}
    # every keep-alive the child sent arrived, in order with the other messages
    n_pings = len([f for f in fields if f.get("WATCHDOG") == "1"])
    assert n_pings == len(report["sent"])
    # ~2.0 s / 0.5 s: the first right after start-up, then one per interval
    assert 3 <= n_pings <= 5, report["sent"]
    sent = report["sent"]
    gaps = [b - a for a, b in zip(sent, sent[1:])]
    # never more often than the interval (exact: the gate uses the same clock);
    # never later than WATCHDOG_USEC, after which systemd would kill the service
    assert min(gaps) >= 0.5 and max(gaps) < watchdog_usec / 1e6, gaps
    # stuck: the progress made just before may still earn one ping; then none
    i_stuck = fields.index({"STATUS": "stuck"})
    assert len([f for f in fields[i_stuck:] if "WATCHDOG" in f]) <= 1


# --------------------------------------------------------------------------- the unit


def _directives(text: str) -> list[tuple[str, str]]:
    out = []
    for line in text.splitlines():
        s = line.strip()
        if s and not s.startswith(("#", ";", "[")):
            key, _, value = s.partition("=")
            out.append((key, value))
    return out


def test_unit_has_the_required_settings_and_avoids_the_known_breakers():
    pairs = _directives(UNIT.read_text())
    d = {}
    for key, value in pairs:
        d.setdefault(key, []).append(value)
    assert d["Type"] == ["notify"] and d["NotifyAccess"] == ["main"]
    assert d["Restart"] == ["on-failure"]
    assert d["RestartPreventExitStatus"] == ["2"]  # ConfigError exit code (agent/errors.py)
    assert int(d["WatchdogSec"][0]) > 0
    assert d["ExecStart"] == ["/opt/skidvib/venv/bin/skidvib run -c /etc/skidvib/skidvib.toml"]
    assert d["ExecReload"] == ["/bin/kill -HUP $MAINPID"]
    assert d["StateDirectory"] == ["skidvib"] and d["ConfigurationDirectory"] == ["skidvib"]
    assert d["SupplementaryGroups"] == ["audio dialout"]
    # Breakers measured on this stack (see the comments in the unit)
    assert "MemoryDenyWriteExecute" not in d
    assert not any("@resources" in v for v in d["SystemCallFilter"])
    # the crash-loop guard must not stop a watchdog-kill cycle:
    # gap between starts >= WatchdogSec + RestartSec > StartLimitIntervalSec / (Burst - 1)
    gap_s = int(d["WatchdogSec"][0]) + int(d["RestartSec"][0])
    assert gap_s > int(d["StartLimitIntervalSec"][0]) / (int(d["StartLimitBurst"][0]) - 1)


def test_every_setting_of_the_unit_is_explained_by_a_comment():
    paragraph_has_comment = False
    unexplained = []
    for line in UNIT.read_text().splitlines():
        s = line.strip()
        if not s or s.startswith("["):
            paragraph_has_comment = False
        elif s.startswith("#"):
            paragraph_has_comment = True
        elif not paragraph_has_comment and not s.startswith(("Description=", "WantedBy=")):
            unexplained.append(s)
    assert unexplained == []


def _unit_copy(tmp_path: Path, text: str | None = None) -> Path:
    """The unit with ExecStart/ExecReload pointing at programs present here (verify checks them)."""
    text = UNIT.read_text() if text is None else text
    true_exe = shutil.which("true")
    kill_exe = shutil.which("kill") or "/bin/kill"
    text = text.replace("/opt/skidvib/venv/bin/skidvib", true_exe)
    text = text.replace("/bin/kill", kill_exe)
    path = tmp_path / "skidvib.service"
    path.write_text(text)
    return path


def _analyze(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run(
        [SYSTEMD_ANALYZE, *args], capture_output=True, text=True, timeout=60
    )


@needs_analyze
def test_systemd_analyze_verify_passes(tmp_path):
    res = _analyze("verify", "--man=no", str(_unit_copy(tmp_path)))
    assert res.returncode == 0, res.stdout + res.stderr
    assert "skidvib.service" not in res.stdout + res.stderr  # no warning about our unit


@needs_analyze
def test_systemd_analyze_verify_catches_a_broken_unit(tmp_path):
    broken = UNIT.read_text().replace("WatchdogSec=60", "WatchdogSec=sixty")
    broken = broken.replace("ProtectSystem=strict", "ProtectSytem=strict")
    res = _analyze("verify", "--man=no", str(_unit_copy(tmp_path, broken)))
    # systemd 252 only warns (rc 0) for these, which is why the good unit's
    # check above also requires silence
    assert "Unknown key 'ProtectSytem'" in res.stderr
    assert "sixty" in res.stderr
    missing = UNIT.read_text().replace("/bin/kill", "/nonexistent/kill")
    path = tmp_path / "m" / "skidvib.service"
    path.parent.mkdir()
    path.write_text(missing.replace("/opt/skidvib/venv/bin/skidvib", shutil.which("true")))
    res = _analyze("verify", "--man=no", str(path))
    assert res.returncode != 0 and "/nonexistent/kill" in res.stderr


SECURITY_RE = re.compile(r"Overall exposure level for skidvib\.service: (\d+\.\d+) (\w+)")


@needs_analyze
def test_systemd_analyze_security_exposure_is_ok_or_better(tmp_path):
    # --threshold is on a 0-100 scale: 25 means exposure 2.5 (EDGE-FACTS, tried on systemd 252)
    res = _analyze("security", "--offline=yes", "--threshold=25", str(_unit_copy(tmp_path)))
    m = SECURITY_RE.search(res.stdout)
    assert m, res.stdout + res.stderr
    exposure, level = float(m.group(1)), m.group(2)
    print(f"systemd-analyze security: exposure {exposure} {level}")
    assert res.returncode == 0, res.stdout[-2000:]
    assert exposure <= 2.5
    assert level in {"PERFECT", "SAFE", "OK"}


@needs_analyze
def test_systemd_analyze_security_gate_rejects_an_unhardened_unit(tmp_path):
    bare = "[Service]\nType=notify\nExecStart=/opt/skidvib/venv/bin/skidvib run\n"
    res = _analyze("security", "--offline=yes", "--threshold=25", str(_unit_copy(tmp_path, bare)))
    m = SECURITY_RE.search(res.stdout)
    assert m and float(m.group(1)) > 2.5
    assert res.returncode != 0


# --------------------------------------------------------------------------- install / uninstall


def _run(script: Path, *args: str) -> subprocess.CompletedProcess:
    res = subprocess.run(
        ["bash", str(script), *args], capture_output=True, text=True, timeout=60
    )
    assert res.returncode == 0, res.stdout + res.stderr
    return res


def test_install_twice_into_a_temporary_root_then_uninstall(tmp_path):
    root = tmp_path / "root"
    example = tmp_path / "example.toml"
    example.write_text("# example config\n")
    args = ("--root", str(root), "--no-venv", "--config", str(example), "--prefix", "/srv/skv")

    _run(INSTALL, *args)
    unit = root / "etc/systemd/system/skidvib.service"
    config = root / "etc/skidvib/skidvib.toml"
    assert config.read_text() == "# example config\n"
    assert "ExecStart=/srv/skv/venv/bin/skidvib run -c /etc/skidvib/skidvib.toml" in unit.read_text()
    assert (unit.stat().st_mode & 0o777) == 0o644
    if shutil.which("systemctl"):
        link = root / "etc/systemd/system/multi-user.target.wants/skidvib.service"
        assert link.is_symlink()

    config.write_text("# edited on site\n")
    second = _run(INSTALL, *args)
    assert "kept existing config" in second.stdout
    assert config.read_text() == "# edited on site\n"  # never overwritten
    assert "up to date" in second.stdout
    assert not (root / "srv/skv/venv").exists()  # --no-venv

    state = root / "var/lib/private/skidvib"
    state.mkdir(parents=True)
    (state / "baseline.npz").write_bytes(b"x")
    _run(UNINSTALL, "--root", str(root), "--prefix", "/srv/skv")
    _run(UNINSTALL, "--root", str(root), "--prefix", "/srv/skv")  # idempotent too
    assert not unit.exists()
    assert config.exists() and (state / "baseline.npz").exists()  # kept without --purge
    _run(UNINSTALL, "--root", str(root), "--purge")
    assert not config.exists() and not state.exists()


def test_default_config_is_the_template_writing_to_the_state_directory(tmp_path):
    root = tmp_path / "root"
    _run(INSTALL, "--root", str(root), "--no-venv", "--no-systemctl")
    config = root / "etc/skidvib/skidvib.toml"
    text = config.read_text()
    assert 'state_dir = "/var/lib/skidvib"' in text  # StateDirectory=skidvib, the only writable place
    template = (ROOT / "config/template.toml").read_text()
    assert len(text.splitlines()) == len(template.splitlines())  # only that value changed
    res = subprocess.run(
        [sys.executable, "-m", "agent", "check-config", str(config)],
        capture_output=True, text=True, timeout=60, cwd=ROOT,
    )
    assert res.returncode == 0, res.stdout + res.stderr
    assert "/var/lib/skidvib" in res.stdout


def test_install_rejects_bad_options(tmp_path):
    res = subprocess.run(
        ["bash", str(INSTALL), "--root", str(tmp_path), "--prefix", "relative/dir"],
        capture_output=True, text=True, timeout=60,
    )
    assert res.returncode != 0 and "absolute" in res.stderr
    res = subprocess.run(
        ["bash", str(INSTALL), "--frobnicate"], capture_output=True, text=True, timeout=60
    )
    assert res.returncode != 0 and "--frobnicate" in res.stderr


# --------------------------------------------------------------------------- the daemon's watchdog feed


class _ControlledSource:
    """A source whose reads follow a script: a capture, a hang until released, or a bug."""

    kind = "controlled"

    def __init__(self, cfg, script):
        self.cfg, self.script = cfg, list(script)
        self.in_read = threading.Event()
        self.release = threading.Event()

    def open(self):
        pass

    def close(self):
        pass

    def describe(self):
        return {"kind": self.kind}

    def read(self, timeout_s):
        from agent.demo import demo_signal
        from agent.errors import SourceStalled
        from agent.model import Capture

        step = self.script.pop(0) if self.script else "hang"
        if step == "hang":  # a driver that never returns (until the test lets go)
            self.in_read.set()
            self.release.wait(60)
            raise SourceStalled("released by the test")
        if step == "bug":
            raise RuntimeError("a bug in the source")
        fs_hz, n = self.cfg.source.fs_hz, self.cfg.source.n_samples
        return (Capture(demo_signal(fs_hz, n, seed=1), fs_hz, t0_utc_s=1.8e9, channel="pump DE",
                        source_id="controlled", seq=1),)


def _daemon_config(tmp_path):
    from agent.config import load_config

    text = (ROOT / "config/demo-skid.toml").read_text()
    text = re.sub(r'(?m)^state_dir = ".*"', f'state_dir = "{tmp_path / "state"}"', text)
    text = re.sub(r"(?m)^interval_s = .*", "interval_s = 2.56", text)
    path = tmp_path / "agent.toml"
    path.write_text(text)
    return load_config(path)


def test_acquisition_counts_as_hung_only_after_a_read_overruns_its_timeout(tmp_path):
    import queue

    from agent.daemon import BEAT_SLACK_S, BEAT_SLICE_S, Acquisition, Health

    cfg = _daemon_config(tmp_path)
    src = _ControlledSource(cfg, ["hang"])
    clock = [1000.0]
    acq = Acquisition(cfg, queue.Queue(2), Health(started_mono_s=0.0),
                      source_factory=lambda c: src, mono=lambda: clock[0])
    assert not acq.is_hung(clock[0])  # not started yet
    acq.start()
    try:
        assert src.in_read.wait(10)
        limit_s = acq.read_timeout_s + BEAT_SLICE_S + BEAT_SLACK_S
        assert acq.beat_mono == 1000.0
        assert not acq.is_hung(1000.0 + limit_s - 0.01)
        assert acq.is_hung(1000.0 + limit_s + 0.01)  # stuck in read past its own timeout
        clock[0] = 2000.0
        src.release.set()  # the read returns (as SourceStalled): the loop is alive again
        deadline = time.monotonic() + 10
        while acq.beat_mono != 2000.0:
            assert time.monotonic() < deadline
            time.sleep(0.01)
        assert not acq.is_hung(2000.0)
    finally:
        acq.stop_event.set()
        src.release.set()
        acq.join(10)
    assert acq.ended.is_set() and not acq.is_hung(1e9)  # a clean stop is not a hang


@pytest.mark.filterwarnings("ignore::pytest.PytestUnhandledThreadExceptionWarning")
def test_daemon_stops_feeding_the_watchdog_when_acquisition_dies(tmp_path, monkeypatch):
    from agent.daemon import Daemon

    cfg = _daemon_config(tmp_path)
    src = _ControlledSource(cfg, ["capture", "bug"])
    address = str(tmp_path / "notify.sock")
    rx = Receiver(address)
    monkeypatch.setenv("NOTIFY_SOCKET", address)
    monkeypatch.setenv("WATCHDOG_USEC", "200000")  # interval 0.1 s
    monkeypatch.delenv("WATCHDOG_PID", raising=False)
    d = Daemon(cfg, source_factory=lambda c: src, use_mqtt=False)
    runner = threading.Thread(target=d.run, name="daemon-under-test")
    runner.start()
    try:
        msgs = []
        deadline = time.monotonic() + 30
        while getattr(d, "acq", None) is None or d.acq.is_alive():
            assert time.monotonic() < deadline, "acquisition never hit the scripted bug"
            msgs += rx.drain(0.05)
        msgs += rx.drain(0.3)  # whatever was in flight when it died
        alive_pings = len(_keys(msgs, "WATCHDOG"))
        after = rx.drain(1.0, max_s=1.0)  # 10 intervals with a dead acquisition
    finally:
        d.stop_event.set()
        runner.join(30)
        rx.close()
    assert not runner.is_alive()
    assert [m[2] for m in msgs][0] == {"READY": "1", "STATUS": "starting: waiting for the first capture"}
    assert alive_pings >= 3  # fed while analysing and waiting (~2.6 s at 0.1 s)
    assert _keys(after, "WATCHDOG") == []  # the main loop idles, but no keep-alive
    assert d.health.captures_done == 1


# --------------------------------------------------------------------------- `skidvib run` as systemd runs it


def test_run_with_an_invalid_config_exits_2_which_the_unit_does_not_restart(tmp_path):
    bad = tmp_path / "skidvib.toml"
    bad.write_text((ROOT / "config/template.toml").read_text() + "\n[asset.nonsense]\n")
    res = subprocess.run([sys.executable, "-m", "agent", "run", "-c", str(bad)],
                         capture_output=True, text=True, timeout=60, cwd=ROOT)
    assert res.returncode == 2, res.stderr  # RestartPreventExitStatus=2 in the unit
    assert "nonsense" in res.stderr  # the journal names the problem
    unit_values = dict(_directives(UNIT.read_text()))
    assert unit_values["RestartPreventExitStatus"] == str(res.returncode)


def test_run_process_speaks_the_notify_protocol(tmp_path):
    from agent.sources import SOURCES

    if "synthetic" not in SOURCES:
        pytest.skip("the synthetic source is not registered yet")
    text = (ROOT / "config/demo-skid.toml").read_text()
    text = re.sub(r'(?m)^state_dir = ".*"', 'state_dir = "state"', text)
    text = text.replace('scenario = "../replay/scenarios/demo.toml"',
                        f'scenario = "{ROOT / "replay/scenarios/demo.toml"}"')
    text = re.sub(r"(?m)^interval_s = .*", "interval_s = 3.0", text)
    config = tmp_path / "skidvib.toml"
    config.write_text(text)
    rx = Receiver(str(tmp_path / "notify.sock"))
    env = dict(os.environ, NOTIFY_SOCKET=rx.address, WATCHDOG_USEC="2000000")
    env.pop("WATCHDOG_PID", None)
    p = subprocess.Popen([sys.executable, "-m", "agent", "run", "-c", str(config), "--no-mqtt"],
                         env=env, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    try:
        msgs = []
        deadline = time.monotonic() + 60
        while not any("WATCHDOG" in m[2] for m in msgs) or not any(
            "STATUS" in m[2] and "READY" not in m[2] for m in msgs
        ):
            assert p.poll() is None, p.stderr.read()[-2000:]
            assert time.monotonic() < deadline, "no keep-alive or status from skidvib run"
            msgs += rx.drain(0.1, max_s=1.0)
        p.send_signal(signal.SIGTERM)
        rc = p.wait(30)
        msgs += rx.drain(0.2)
    finally:
        if p.poll() is None:
            p.kill()
            p.wait()
        rx.close()
    assert rc == 0
    assert all(pid == p.pid for _, pid, _ in msgs)  # NotifyAccess=main
    assert "READY" in msgs[0][2] and len(_keys(msgs, "READY")) == 1
    assert msgs[-1][2].get("STOPPING") == "1"
