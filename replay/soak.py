"""Soak: many hours of simulated operation replayed fast through the daemon and a real broker.

The daemon runs as in service (acquisition thread, store, outbox, MQTT link, housekeeping,
health) but on a simulated clock: every capture advances both its monotonic and its wall
clock by ``--interval-s``, so an hour of operation costs a few seconds and the hourly
housekeeping, the health messages and the daily snapshot happen as they would. Captures
are the demo pump signal; every ``--episode-every`` captures a three-capture danger
episode, every ``--fault-every`` captures a stalled sensor (sensor_fault, then recovery).

Printed at intervals: simulated hours, captures, resident memory (RSS), open file
handles, threads, the daemon's error counters, outbox depth, warning/error log lines.
At the end: events sent vs. received by an independent subscriber (must be equal).

    python replay/soak.py --hours 24            # needs mosquitto (Debian package)
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import os
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from agent.config import load_config  # noqa: E402
from agent.daemon import Daemon  # noqa: E402
from agent.demo import demo_signal  # noqa: E402
from agent.errors import SourceStalled  # noqa: E402
from agent.model import Capture  # noqa: E402
from agent.sources.base import EndOfSource, Source  # noqa: E402

T0 = 1_796_169_600.0  # 2026-12-02T00:00:00Z


class SimClock:
    def __init__(self):
        self.t = 0.0

    def mono(self) -> float:
        return self.t

    def wall(self) -> float:
        return T0 + self.t


class SoakSource(Source):
    """Demo-pump captures on a simulated clock; danger episodes and sensor stalls on schedule."""

    kind = "soak"

    def __init__(self, cfg, n: int, clock: SimClock, interval_s: float, room, *,
                 episode_every: int, fault_every: int):
        self.cfg, self.n, self.clock, self.interval_s, self.room = cfg, n, clock, interval_s, room
        self.episode_every, self.fault_every = episode_every, fault_every
        self.i = 0
        self.stalls = 0
        self.episodes = 0

    def open(self):
        pass

    def close(self):
        pass

    def read(self, timeout_s):
        while not self.room():  # pace by the analysis: never make the daemon drop a capture
            time.sleep(0.002)
        if self.i >= self.n:
            raise EndOfSource()
        self.i += 1
        self.clock.t += self.interval_s
        k = self.i
        if self.fault_every and k % self.fault_every == 0:
            self.stalls += 1
            raise SourceStalled(f"no data for {timeout_s:.0f} s (soak fault {self.stalls})")
        phase = k % self.episode_every if self.episode_every else -1
        factor = 2.5 if 0 < phase <= 3 else 1.0
        if phase == 1:
            self.episodes += 1
        fs, n = self.cfg.source.fs_hz, self.cfg.source.n_samples
        x = demo_signal(fs, n, seed=k % 50) * factor
        return (Capture(x, fs, t0_utc_s=self.clock.wall(), channel="pump DE", source_id="soak", seq=k),)


class LineCounter:
    """Stands in for stderr: counts the daemon's warning and error lines, keeps the last few."""

    def __init__(self, echo=None):
        self.warnings = 0
        self.n_errors = 0
        self.tail: list[str] = []
        self.echo = echo
        self._buf = ""

    def write(self, s):
        self._buf += s
        while "\n" in self._buf:
            line, self._buf = self._buf.split("\n", 1)
            if line.startswith("level=warning"):
                self.warnings += 1
            elif line.startswith("level=error"):
                self.n_errors += 1
            if not line.startswith("level=info"):
                self.tail = (self.tail + [line])[-20:]
            if self.echo:
                self.echo.write(line + "\n")
        return len(s)

    def flush(self):
        pass


def rss_kib() -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    return -1


def open_fds() -> int:
    return len(os.listdir("/proc/self/fd"))


def write_config(state_dir: Path, port: int, pw_file: Path) -> Path:
    text = (ROOT / "config" / "demo-skid.toml").read_text()
    text = text.replace('state_dir = "../demo-out/state"', f'state_dir = "{state_dir}"')
    text = text.replace('prefix = "skidvib"', f'prefix = "skv"\nsite = "plant1"\nusername = "agent"\n'
                                              f'password_file = "{pw_file}"')
    text = text.replace("port = 1883", f"port = {port}")
    p = state_dir.parent / "soak.toml"
    p.write_text(text)
    return p


def run_soak(captures: int, workdir: Path, broker, *, interval_s: float = 60.0, report_every: int = 100,
             episode_every: int = 240, fault_every: int = 500, out=sys.stdout, quiet_log: bool = True) -> dict:
    """Run the daemon for ``captures`` simulated captures against ``broker`` (tests/broker.py)."""
    from tests.broker import USERS, Subscriber

    workdir.mkdir(parents=True, exist_ok=True)
    pw = workdir / "agent.pw"
    pw.write_text(USERS["agent"] + "\n")
    cfg = load_config(write_config(workdir / "state", broker.port, pw))
    cfg = dataclasses.replace(
        cfg, source=dataclasses.replace(cfg.source, interval_s=interval_s),
        store=dataclasses.replace(cfg.store, health_every_s=600.0, trend_raw_days=1.0, snapshot_max_count=50),
        mqtt=dataclasses.replace(cfg.mqtt, keepalive_s=10))
    clock = SimClock()
    sub = Subscriber(broker, "skv/plant1/#")
    received = {"events": set(), "measurements": 0, "health": 0}

    d: Daemon | None = None
    src = SoakSource(cfg, captures, clock, interval_s, lambda: d is not None and d.queue.empty(),
                     episode_every=episode_every, fault_every=fault_every)
    d = Daemon(cfg, source_factory=lambda c: src, mono=clock.mono, wall=clock.wall)
    sent_events = [0]
    orig_publish = d._publish

    def counting_publish(result, snapshot_id):
        sent_events[0] += len(result.events)
        orig_publish(result, snapshot_id)

    d._publish = counting_publish
    log = LineCounter(None if quiet_log else sys.stderr)
    old_err = sys.stderr
    sys.stderr = log
    samples = []
    t_real0 = time.monotonic()
    stop = threading.Event()

    def drain():
        while not stop.is_set():
            for m in sub.collect(None, 0.2):
                kind = m.topic.rsplit("/", 1)[-1]
                if kind == "events":
                    received["events"].add(json.loads(m.payload)["id"])
                elif kind in received:
                    received[kind] += 1

    drainer = threading.Thread(target=drain, daemon=True)
    drainer.start()

    def sample():
        h = d.health
        depth = d.link.outbox.stats().depth if d.link is not None else -1
        row = {"sim_h": round(clock.t / 3600.0, 2), "captures": h.captures_done, "rss_kib": rss_kib(),
               "fds": open_fds(), "threads": threading.active_count(), "source_errors": h.source_errors,
               "store_errors": h.store_errors, "publish_errors": h.publish_errors,
               "dropped": h.captures_dropped, "outbox_depth": depth, "log_warnings": log.warnings,
               "log_errors": log.n_errors, "real_s": round(time.monotonic() - t_real0, 1)}
        samples.append(row)
        print(" ".join(f"{k}={v}" for k, v in row.items()), file=out, flush=True)

    runner = threading.Thread(target=d.run, name="daemon")
    try:
        runner.start()
        next_report = report_every
        while runner.is_alive():
            runner.join(0.2)
            if d.health.captures_done >= next_report:
                sample()
                next_report += report_every
        sample()
    finally:
        sys.stderr = old_err
    deadline = time.monotonic() + 15
    while len(received["events"]) < sent_events[0] and time.monotonic() < deadline:
        time.sleep(0.1)
    stop.set()
    drainer.join(2)
    sub.close()
    result = {"samples": samples, "events_sent": sent_events[0], "events_received": len(received["events"]),
              "measurements_received": received["measurements"], "health_received": received["health"],
              "episodes": src.episodes, "stalls": src.stalls, "log_tail": log.tail,
              "clock_jumps": d.health.clock_jumps, "captures": d.health.captures_done}
    print(f"events sent {result['events_sent']} received {result['events_received']}; "
          f"measurements received {result['measurements_received']}; danger episodes {src.episodes}, "
          f"sensor stalls {src.stalls}", file=out, flush=True)
    return result


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--hours", type=float, default=24.0, help="simulated hours of operation")
    ap.add_argument("--interval-s", type=float, default=60.0, help="simulated time between captures")
    ap.add_argument("--report-every", type=int, default=120, help="captures between printed samples")
    ap.add_argument("--episode-every", type=int, default=240)
    ap.add_argument("--fault-every", type=int, default=500)
    ap.add_argument("--log", action="store_true", help="echo the daemon's log to stderr")
    a = ap.parse_args(argv)
    from tests.broker import Broker, mosquitto_available

    if not mosquitto_available():
        print("mosquitto is not installed (Debian packages mosquitto, mosquitto-clients)", file=sys.stderr)
        return 2
    captures = int(round(a.hours * 3600.0 / a.interval_s))
    with tempfile.TemporaryDirectory(prefix="skidvib-soak-") as tmp:
        b = Broker(Path(tmp) / "broker", persistence=False).start()
        try:
            r = run_soak(captures, Path(tmp) / "agent", b, interval_s=a.interval_s, report_every=a.report_every,
                         episode_every=a.episode_every, fault_every=a.fault_every, quiet_log=not a.log)
        finally:
            b.kill()
    s0, s1 = r["samples"][0], r["samples"][-1]
    print(f"RSS {s0['rss_kib']} -> {s1['rss_kib']} KiB (max {max(s['rss_kib'] for s in r['samples'])}); "
          f"fds {s0['fds']} -> {s1['fds']}; threads {s0['threads']} -> {s1['threads']}; "
          f"log warnings {s1['log_warnings']} errors {s1['log_errors']}")
    for line in r["log_tail"][-5:]:
        print("  last non-info log line:", line)
    ok = r["events_sent"] == r["events_received"] and s1["log_errors"] == 0 and s1["store_errors"] == 0 \
        and s1["publish_errors"] == 0
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
