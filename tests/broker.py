"""A real Mosquitto broker for tests: own config, own port, own PKI.

Started from the Debian package (``/usr/sbin/mosquitto``); nothing is mocked.
The broker gets

* a plain listener on a free localhost port (password + ACL),
* optionally a mutual-TLS listener (CA, server and client certificates made
  here with the ``openssl`` command),
* a password file written with ``mosquitto_passwd -b`` and an ACL file,
* optional persistence in its own directory (so a restart keeps sessions).

Helpers stop (SIGTERM), kill (SIGKILL), pause (SIGSTOP), resume (SIGCONT)
and restart it on the same port. Facts this relies on (mosquitto 2.0.11):
port 0 is not allowed, so a free port is reserved from the kernel first;
as root the broker drops to user ``mosquitto`` before reading the password
and ACL files, so ``user root`` is written when the tests run as root.
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path

MOSQUITTO = shutil.which("mosquitto") or "/usr/sbin/mosquitto"

#: users known to the test broker and their passwords
USERS = {
    "agent": "agent-pw",      # the edge agent: read/write its own tree
    "analyst": "analyst-pw",  # may send requests and read everything
    "hmi": "hmi-pw",          # read only
    "intruder": "intruder-pw",  # may log in, has no topic rights
}

PREFIX = "skv"


def acl_text(prefix: str = PREFIX) -> str:
    return (
        f"user agent\n"
        f"topic readwrite {prefix}/#\n"
        f"\n"
        f"user analyst\n"
        f"topic read {prefix}/#\n"
        f"topic write {prefix}/+/+/req/#\n"
        f"\n"
        f"user hmi\n"
        f"topic read {prefix}/#\n"
    )


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def mosquitto_available() -> bool:
    return Path(MOSQUITTO).exists() and shutil.which("mosquitto_passwd") is not None


@dataclass
class Pki:
    """Files of a small certificate authority made for one test session."""

    dir: Path
    ca_crt: Path
    server_crt: Path
    server_key: Path
    client_crt: Path
    client_key: Path
    other_ca_crt: Path  # a CA that signed nothing the broker uses


def _openssl(*args: str, cwd: Path) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True,
                   stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)


def make_pki(directory: Path) -> Pki:
    """CA + server cert (SAN localhost, 127.0.0.1) + client cert, and an unrelated CA."""
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]
    _openssl("req", "-x509", *ec, "-days", "2", "-keyout", "ca.key", "-out", "ca.crt",
             "-subj", "/CN=skidvib-test-ca", cwd=d)
    _openssl("req", "-x509", *ec, "-days", "2", "-keyout", "other-ca.key", "-out",
             "other-ca.crt", "-subj", "/CN=someone-else-ca", cwd=d)
    (d / "server.ext").write_text(
        "subjectAltName=DNS:localhost,IP:127.0.0.1\nextendedKeyUsage=serverAuth\n")
    (d / "client.ext").write_text("extendedKeyUsage=clientAuth\n")
    for name, cn in (("server", "localhost"), ("client", "agent")):
        _openssl("req", *ec, "-keyout", f"{name}.key", "-out", f"{name}.csr",
                 "-subj", f"/CN={cn}", cwd=d)
        _openssl("x509", "-req", "-in", f"{name}.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
                 "-CAcreateserial", "-days", "2", "-out", f"{name}.crt",
                 "-extfile", f"{name}.ext", cwd=d)
    return Pki(d, d / "ca.crt", d / "server.crt", d / "server.key", d / "client.crt",
               d / "client.key", d / "other-ca.crt")


@dataclass
class Broker:
    """One mosquitto process with a generated configuration."""

    dir: Path
    pki: Pki | None = None
    persistence: bool = False
    port: int = field(default_factory=free_port)
    tls_port: int | None = None
    proc: subprocess.Popen | None = None
    host: str = "127.0.0.1"

    def __post_init__(self) -> None:
        self.dir = Path(self.dir)
        self.dir.mkdir(parents=True, exist_ok=True)
        if self.pki is not None and self.tls_port is None:
            self.tls_port = free_port()
        self._write_files()

    # -- files -------------------------------------------------------------
    def _write_files(self) -> None:
        pw = self.dir / "passwd"
        pw.write_text("")
        pw.chmod(0o600)
        for user, password in USERS.items():
            subprocess.run(["mosquitto_passwd", "-b", str(pw), user, password], check=True,
                           stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        (self.dir / "acl").write_text(acl_text())
        lines = []
        if os.geteuid() == 0:
            lines.append("user root")
        lines += [
            "per_listener_settings false",
            "allow_anonymous false",
            f"password_file {pw}",
            f"acl_file {self.dir / 'acl'}",
            "log_dest stdout",
            "log_type error",
            "log_type warning",
            "log_type notice",
        ]
        if self.persistence:
            (self.dir / "db").mkdir(exist_ok=True)
            lines += ["persistence true", f"persistence_location {self.dir / 'db'}/",
                      "autosave_interval 1"]
        else:
            lines.append("persistence false")
        lines += ["", f"listener {self.port} 127.0.0.1"]
        if self.pki is not None:
            lines += [
                "", f"listener {self.tls_port} 127.0.0.1",
                f"cafile {self.pki.ca_crt}",
                f"certfile {self.pki.server_crt}",
                f"keyfile {self.pki.server_key}",
                "require_certificate true",
            ]
        (self.dir / "mosquitto.conf").write_text("\n".join(lines) + "\n")

    # -- process control ---------------------------------------------------
    def start(self, timeout_s: float = 5.0) -> "Broker":
        assert self.proc is None or self.proc.poll() is not None, "broker already running"
        log = open(self.dir / "mosquitto.log", "ab")
        self.proc = subprocess.Popen([MOSQUITTO, "-c", str(self.dir / "mosquitto.conf")],
                                     stdout=log, stderr=subprocess.STDOUT)
        log.close()
        deadline = time.monotonic() + timeout_s
        ports = [self.port] + ([self.tls_port] if self.tls_port else [])
        for port in ports:
            while True:
                if self.proc.poll() is not None:
                    raise RuntimeError(f"mosquitto exited with {self.proc.returncode}: "
                                       f"{(self.dir / 'mosquitto.log').read_text()[-2000:]}")
                try:
                    with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                        break
                except OSError:
                    if time.monotonic() > deadline:
                        raise RuntimeError(f"mosquitto did not listen on {port}") from None
                    time.sleep(0.02)
        return self

    def _signal(self, sig: int) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(sig)

    def stop(self) -> None:
        """SIGTERM and wait (mosquitto saves its persistence file on the way out)."""
        if self.proc is not None and self.proc.poll() is None:
            self._signal(signal.SIGCONT)
            self._signal(signal.SIGTERM)
            self.proc.wait(timeout=10)

    def kill(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self._signal(signal.SIGKILL)
            self.proc.wait(timeout=10)

    def pause(self) -> None:
        self._signal(signal.SIGSTOP)

    def resume(self) -> None:
        self._signal(signal.SIGCONT)

    def restart(self) -> "Broker":
        self.stop()
        return self.start()

    @property
    def running(self) -> bool:
        return self.proc is not None and self.proc.poll() is None

    def log_text(self) -> str:
        p = self.dir / "mosquitto.log"
        return p.read_text(errors="replace") if p.exists() else ""


class Subscriber:
    """An independent paho client that records what arrives (for assertions).

    ``clean=False`` gives a persistent session, so messages queued by the
    broker while this client was away are delivered after it reconnects.
    """

    def __init__(self, broker: "Broker", topic: str, user: str = "hmi", *,
                 client_id: str | None = None, clean: bool = True, qos: int = 1):
        import queue
        import paho.mqtt.client as mqtt

        self.topic = topic
        self.messages: "queue.SimpleQueue" = queue.SimpleQueue()
        self.connected = __import__("threading").Event()
        self.client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2,
                                  client_id=client_id or f"sub-{os.getpid()}-{id(self)}",
                                  clean_session=clean, protocol=mqtt.MQTTv311)
        self.client.username_pw_set(user, USERS[user])
        self.client.reconnect_delay_set(0.1, 0.5)

        def on_connect(client, userdata, flags, rc, props):
            if not rc.is_failure:
                client.subscribe(topic, qos=qos)
                self.connected.set()

        def on_disconnect(client, userdata, flags, rc, props):
            self.connected.clear()

        def on_message(client, userdata, msg):
            self.messages.put(msg)

        self.client.on_connect = on_connect
        self.client.on_disconnect = on_disconnect
        self.client.on_message = on_message
        self.client.connect_async(broker.host, broker.port, keepalive=5)
        self.client.loop_start()
        if not self.connected.wait(5):
            raise RuntimeError("test subscriber did not connect")
        time.sleep(0.1)  # let the SUBACK land

    def collect(self, n: int | None = None, timeout_s: float = 5.0, topic: str | None = None):
        """Messages until ``n`` have arrived (matching ``topic`` if given) or the timeout."""
        import queue
        out = []
        deadline = time.monotonic() + timeout_s
        while n is None or len(out) < n:
            left = deadline - time.monotonic()
            if left <= 0:
                break
            try:
                msg = self.messages.get(timeout=left)
            except queue.Empty:
                break
            if topic is None or msg.topic == topic:
                out.append(msg)
        return out

    def collect_until(self, done, timeout_s: float = 10.0):
        """Messages until ``done(list_so_far)`` is true or the timeout."""
        import queue
        out = []
        deadline = time.monotonic() + timeout_s
        while not done(out):
            left = deadline - time.monotonic()
            if left <= 0:
                break
            try:
                out.append(self.messages.get(timeout=left))
            except queue.Empty:
                break
        return out

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()


def mosquitto_sub(broker: "Broker", topic: str, count: int, timeout_s: float = 5,
                  user: str = "hmi") -> subprocess.Popen:
    """Start ``mosquitto_sub -v`` (topic and payload per line); read its stdout later."""
    return subprocess.Popen(
        ["mosquitto_sub", "-h", broker.host, "-p", str(broker.port), "-u", user,
         "-P", USERS[user], "-t", topic, "-v", "-C", str(count), "-W", str(int(timeout_s)),
         "-q", "1", "-V", "mqttv311"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
