"""``python -m agent.bench [--quick] [--out FILE]``: what the agent costs on this box.

Prints (and with ``--out`` writes as Markdown) a dated table of:

* **analysis** — CPU time of one :func:`agent.monitor.monitor_step` (the
  daemon's and replay's whole per-capture path) on a 65 536-sample capture at
  25 600 Hz and 51 200 Hz, median and inter-quartile range over repeated
  captures; the ratio to a bare ``numpy.fft.rfft`` of the same samples (the
  floor set by the libraries); the real-time factor (capture duration ÷
  analysis time, one core); and a per-stage breakdown. Stages are found, not
  listed: every function that the monitor step, the pipeline and the speed
  view call from another ``agent`` module is timed in place while the step
  runs, so stages that land later show up by themselves.
* **daemon** — the monitoring service (:class:`agent.daemon.Daemon`, the
  ``skidvib run`` code, no broker) in a child process fed fast from
  recordings: resident memory after 1 000 captures and growth over a
  simulated 24-hour soak (captures stamped 60 s apart), against a bare
  ``python -c "import numpy, scipy.signal"`` process;
* **start-up** — process start to the first capture logged, against the
  same bare import;
* **storage** — durable outbox enqueue rate (wall, and CPU per message) with
  the queue near empty and 20 000 deep, one message per transaction and one
  capture's messages per transaction (as the service queues them); the
  drain-with-ack rate; trend database insert rate;
* **replay** — the demo scenario's replay speed (× real time), when the
  replay command is present.

Times are CPU time of the benchmark process (``time.process_time``: the
analysing thread plus any helper threads a stage starts, such as a
multi-worker FFT), which stays honest on a shared, busy machine; wall times
are printed beside them.
Figures are printed, never asserted: targets are checked by reading them.
"""

from __future__ import annotations

import argparse
import datetime as dt
import importlib
import json
import os
import platform
import re
import statistics
import subprocess
import sys
import tempfile
import time
import types
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
DEMO_CONFIG = ROOT / "config" / "demo-skid.toml"
N_SAMPLES = 65536
RATES_HZ = (25600.0, 51200.0)
#: the issue's targets on a 2-core box
TARGET_ANALYSIS_MS = 30.0
TARGET_FFT_RATIO = 20.0
TARGET_RSS_RATIO = 1.3
TARGET_SOAK_GROWTH_MB = 5.0
TARGET_START_RATIO = 1.5
TARGET_OUTBOX_MSG_S = 1000.0
TARGET_ENVELOPE_MS = 40.0  # issue 5: envelope analysis with band selection, one 65 536-sample capture
BARE_IMPORT = "import numpy, scipy.signal"
#: modules whose own helpers are stages too (the monitor step's top levels); in every
#: other loaded ``agent`` module only the functions it imports from another are wrapped
STAGE_NAMESPACES = ("agent.monitor", "agent.pipeline", "agent.orders", "agent.bearings", "agent.envelope", "agent.diagnose")
#: modules whose functions are never stages (configuration, data types, errors)
NOT_STAGES = ("agent.config", "agent.model", "agent.errors", "agent.bench")
#: the step itself (timed as the total), and set-up helpers the bench calls outside the step
NOT_STAGE_NAMES = ("monitor_step", "initial_state")


# ───────────────────────────────────────────────────────────── figures


@dataclass(frozen=True, slots=True)
class Stats:
    """Median and spread of repeated measurements (same unit as the samples)."""

    median: float
    q1: float
    q3: float
    lo: float
    hi: float
    n: int

    @classmethod
    def of(cls, xs) -> "Stats":
        xs = sorted(float(x) for x in xs)
        if not xs:
            raise ValueError("no measurements")
        if len(xs) >= 4:
            q1, _, q3 = statistics.quantiles(xs, n=4)
        else:
            q1, q3 = xs[0], xs[-1]
        return cls(statistics.median(xs), q1, q3, xs[0], xs[-1], len(xs))

    def text(self, fmt: str = "{:.2f}") -> str:
        return f"{fmt.format(self.median)} [{fmt.format(self.q1)}–{fmt.format(self.q3)}]"


@dataclass
class Report:
    """Lines of the printed table plus the machine-readable figures."""

    quick: bool
    lines: list[str] = field(default_factory=list)
    figures: dict = field(default_factory=dict)

    def add(self, line: str = "") -> None:
        print(line, flush=True)
        self.lines.append(line)

    def table(self, header: tuple[str, ...], rows: list[tuple]) -> None:
        self.add("| " + " | ".join(header) + " |")
        self.add("|" + "|".join("---" for _ in header) + "|")
        for r in rows:
            self.add("| " + " | ".join(str(c) for c in r) + " |")
        self.add()


def _meets(ok: bool | None) -> str:
    return "n/a" if ok is None else ("met" if ok else "NOT met")


# ───────────────────────────────────────────────────────────── machine


def machine_description() -> dict:
    """nproc, CPU model, RAM, Python/numpy/scipy versions, load, BLAS hints."""
    import numpy
    import scipy

    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem_gib = None
    try:
        m = re.search(r"MemTotal:\s+(\d+) kB", Path("/proc/meminfo").read_text())
        mem_gib = round(int(m.group(1)) / 1024**2, 1) if m else None
    except OSError:
        pass
    try:
        load = os.getloadavg()
    except OSError:
        load = (float("nan"),) * 3
    return {
        "date_utc": dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
        "nproc": os.cpu_count(),
        "cpu": cpu,
        "ram_gib": mem_gib,
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "machine": platform.machine(),
        "load_avg": tuple(round(v, 2) for v in load),
        "openblas_coretype": os.environ.get("OPENBLAS_CORETYPE", ""),
    }


# ───────────────────────────────────────────────────────────── captures


def bench_captures(fs_hz: float, n_samples: int = N_SAMPLES, count: int = 6, t0_utc_s: float = 1.767e9,
                   interval_s: float = 60.0):
    """Captures of the demo pump (agent.demo's signal, different seeds), stamped ``interval_s`` apart."""
    from agent.demo import demo_signal
    from agent.model import Capture

    return [
        Capture(accel_ms2=demo_signal(fs_hz, n_samples, seed=201 + i), fs_hz=fs_hz,
                t0_utc_s=t0_utc_s + i * interval_s, channel="pump DE horizontal", source_id="bench", seq=i)
        for i in range(count)
    ]


def bench_config(fs_hz: float):
    """The demo config, at ``fs_hz`` (capture length follows: N_SAMPLES / fs)."""
    import dataclasses

    from agent.config import load_config

    cfg = load_config(DEMO_CONFIG)
    src = dataclasses.replace(cfg.source, fs_hz=fs_hz, capture_s=N_SAMPLES / fs_hz)
    return dataclasses.replace(cfg, source=src)


# ───────────────────────────────────────────────────────────── stage timing


class StageTimer:
    """Wraps the cross-module functions called by the monitor step and records their CPU time.

    Every function a loaded ``agent`` module imported from another ``agent``
    module (and, in ``STAGE_NAMESPACES``, its own helpers too) is replaced,
    in that namespace only, by a wrapper that adds its CPU time (``process_time``) to the
    path of enclosing stages. :meth:`restore` puts the originals back.
    """

    def __init__(self) -> None:
        self.times: dict[tuple[str, ...], list[float]] = {}
        self._stack: list[str] = []
        self._saved: list[tuple[types.ModuleType, str, object]] = []
        self._round: dict[tuple[str, ...], float] = {}

    def install(self) -> None:
        for modname in STAGE_NAMESPACES:
            try:
                importlib.import_module(modname)
            except ImportError:
                continue
        for modname, mod in sorted(sys.modules.items()):
            if not modname.startswith("agent.") or modname in NOT_STAGES or mod is None:
                continue
            own_helpers = modname in STAGE_NAMESPACES
            for name, obj in list(vars(mod).items()):
                if not isinstance(obj, types.FunctionType):
                    continue
                home = getattr(obj, "__module__", "") or ""
                if not home.startswith("agent.") or home in NOT_STAGES or name in NOT_STAGE_NAMES:
                    continue
                if home == modname and not own_helpers:
                    continue
                self._saved.append((mod, name, obj))
                setattr(mod, name, self._wrap(obj, f"{home.removeprefix('agent.')}.{name}"))

    def restore(self) -> None:
        for mod, name, obj in reversed(self._saved):
            setattr(mod, name, obj)
        self._saved.clear()

    def _wrap(self, fn, label: str):
        timer = self

        def stage(*args, **kwargs):
            timer._stack.append(label)
            path = tuple(timer._stack)
            t0 = time.process_time()
            try:
                return fn(*args, **kwargs)
            finally:
                timer._round[path] = timer._round.get(path, 0.0) + time.process_time() - t0
                timer._stack.pop()

        stage.__wrapped__ = fn
        return stage

    def start_round(self) -> None:
        self._round = {}

    def end_round(self, paths_seen: set) -> None:
        for path, t in self._round.items():
            self.times.setdefault(path, []).append(t)
            paths_seen.add(path)


def _cpu_and_wall(fn, repeats: int) -> tuple[list[float], list[float]]:
    cpu, wall = [], []
    for _ in range(repeats):
        c0, w0 = time.process_time(), time.perf_counter()
        fn()
        cpu.append(time.process_time() - c0)
        wall.append(time.perf_counter() - w0)
    return cpu, wall


def bench_analysis(rep: Report, fs_hz: float, repeats: int, warmup: int) -> dict:
    """Time monitor_step (state carried on, as in the daemon) and a bare rfft of the same samples."""
    import dataclasses

    import numpy as np

    from agent.monitor import initial_state, monitor_step

    cfg = bench_config(fs_hz)
    caps = bench_captures(fs_hz, count=6)
    ms = initial_state(cfg, caps[0].t0_utc_s)
    i = 0

    def step():
        nonlocal ms, i
        cap = dataclasses.replace(caps[i % len(caps)], t0_utc_s=caps[0].t0_utc_s + 60.0 * i, seq=i)
        _, ms = monitor_step(ms, (cap,), cfg)
        i += 1

    for _ in range(warmup):
        step()
    x = caps[0].accel_ms2
    np.fft.rfft(x)
    cpu, wall, fft_cpu = [], [], []
    for _ in range(repeats):
        # the floor is timed between the steps, so both see the same load on a shared machine
        fft_cpu += _cpu_and_wall(lambda: np.fft.rfft(x), 5)[0]
        c, w = _cpu_and_wall(step, 1)
        cpu += c
        wall += w

    timer = StageTimer()
    timer.install()
    seen: set = set()
    try:
        for _ in range(max(5, repeats // 2)):
            timer.start_round()
            t0 = time.process_time()
            step()
            timer._round[("(total)",)] = time.process_time() - t0
            timer.end_round(seen)
    finally:
        timer.restore()

    total = Stats.of(cpu)
    fft = Stats.of(fft_cpu)
    duration_s = N_SAMPLES / fs_hz
    out = {
        "fs_hz": fs_hz,
        "n_samples": N_SAMPLES,
        "captures_timed": total.n,
        "analysis_cpu_ms": _ms(total),
        "real_time_factor_best": duration_s / total.lo,
        "analysis_wall_ms": _ms(Stats.of(wall)),
        "rfft_cpu_ms": _ms(fft),
        "fft_ratio": total.median / fft.median,
        "real_time_factor": duration_s / total.median,
        "state_after": ms.state.value,
        "captures_done": ms.n_captures,
        "stages": {},
    }
    n_rounds = len(timer.times.get(("(total)",), [])) or 1
    for path, ts in sorted(timer.times.items(), key=lambda kv: kv[0]):
        if path == ("(total)",):
            continue
        ts = ts + [0.0] * (n_rounds - len(ts))  # a stage skipped in a round took no time there
        out["stages"][" > ".join(path)] = _ms(Stats.of(ts))
    return out


def _ms(s: Stats) -> dict:
    return {"median": s.median * 1e3, "q1": s.q1 * 1e3, "q3": s.q3 * 1e3, "min": s.lo * 1e3, "max": s.hi * 1e3,
            "n": s.n}


def _fmt_ms(d: dict, digits: int = 2) -> str:
    f = f"{{:.{digits}f}}"
    return f"{f.format(d['median'])} [{f.format(d['q1'])}–{f.format(d['q3'])}]"


def report_analysis(rep: Report, results: list[dict]) -> None:
    rep.add("## Analysis per capture (monitor_step, one core)")
    rep.add()
    rep.add("CPU time of the process (all its threads), median [inter-quartile range] and minimum in ms; "
            f"{results[0]['captures_timed']} captures per rate, state carried from capture to capture "
            f"(state after the run: {results[0]['state_after']}, {results[0]['captures_done']} captures).")
    rep.add()
    rows = []
    for r in results:
        ms_med = r["analysis_cpu_ms"]["median"]
        rows.append((
            f"{r['fs_hz']:.0f} Hz × {r['n_samples']} ({r['n_samples'] / r['fs_hz']:.2f} s)",
            _fmt_ms(r["analysis_cpu_ms"]),
            f"{r['analysis_cpu_ms']['min']:.2f}",
            _fmt_ms(r["analysis_wall_ms"]),
            _fmt_ms(r["rfft_cpu_ms"], 3),
            f"{r['fft_ratio']:.1f}× ({_meets(r['fft_ratio'] <= TARGET_FFT_RATIO)})",
            f"{r['real_time_factor']:.0f}; best {r['real_time_factor_best']:.0f} ({_meets(ms_med <= TARGET_ANALYSIS_MS)})",
        ))
    rep.table(("capture", "analysis CPU ms", "min", "wall ms", "bare rfft ms", f"÷ rfft (≤ {TARGET_FFT_RATIO:g}×)",
               f"real-time factor (≤ {TARGET_ANALYSIS_MS:g} ms)"), rows)
    rep.add("### Per-stage breakdown (CPU ms, median [IQR]; nested stages indented, inclusive of their children)")
    rep.add()
    keys = sorted({k for r in results for k in r["stages"]},
                  key=lambda k: _stage_order(k, results[0]["stages"]))
    rows = []
    for k in keys:
        parts = k.split(" > ")
        if len(parts) > 6:
            continue
        name = "  " * (len(parts) - 1) + ("└ " if len(parts) > 1 else "") + parts[-1]
        cells = [r["stages"].get(k) for r in results]
        least_ms = 0.05 if len(parts) <= 3 else 0.5  # deep stages only when they weigh
        if all(c is None or c["median"] < least_ms for c in cells):
            continue
        rows.append((f"`{name}`",) + tuple("–" if c is None else _fmt_ms(c) for c in cells))
    rep.table(("stage",) + tuple(f"{r['fs_hz']:.0f} Hz" for r in results), rows)


def _stage_order(key: str, stages: dict) -> tuple:
    """Depth-first: parents before children, bigger stages first within a parent."""
    parts = key.split(" > ")
    out = []
    for d in range(1, len(parts) + 1):
        k = " > ".join(parts[:d])
        med = stages.get(k, {"median": 0.0})["median"]
        out.append((-med, parts[d - 1]))
    return tuple(out)


# ───────────────────────────────────────────────────────────── envelope


def bench_envelope(fs_hz: float, repeats: int) -> dict:
    """Envelope analysis with band selection alone: :func:`agent.envelope.envelope_spectrum` on a demo capture.

    Two searches: the bands the bearing stage asks the kurtogram for (above
    and at least as wide as 4 × the demo bearings' highest defect tone, up
    to 0.45 fs, as :func:`agent.bearings.envelope_views` does), and the
    function's defaults (every band from fs/512 wide, whole spectrum).
    """
    import numpy as np

    from agent.bearings import FMAX_FRACTION, specs_by_shaft
    from agent.demo import demo_signal
    from agent.envelope import envelope_spectrum

    x = demo_signal(fs_hz, N_SAMPLES, seed=201)
    speed_hz = 1476.0 / 60.0  # demo_signal's pump speed
    top_hz = speed_hz * max(max(b.orders.bpfi, b.orders.bpfo, 2 * b.orders.bsf) * ratio
                            for ratio, specs in specs_by_shaft(bench_config(fs_hz).machine).values() for b in specs)
    fmax = FMAX_FRACTION * fs_hz
    fmin = min(4.0 * top_hz, 0.25 * fmax)
    searches = {
        "bearing stage's bands": lambda: envelope_spectrum(x, fs_hz, fmin_hz=fmin, fmax_hz=fmax,
                                                           min_bandwidth_hz=min(4.0 * top_hz, 0.5 * (fmax - fmin))),
        "every band (defaults)": lambda: envelope_spectrum(x, fs_hz),
    }
    out = {}
    for name, fn in searches.items():
        es = fn()  # warm-up (FFT plans, window cache)
        cpu, wall = _cpu_and_wall(fn, repeats)
        out[name] = {"cpu_ms": _ms(Stats.of(cpu)), "cpu_p90_ms": float(np.percentile(cpu, 90)) * 1e3,
                     "wall_ms": _ms(Stats.of(wall)), "wall_p90_ms": float(np.percentile(wall, 90)) * 1e3,
                     "band_hz": es.band_hz}
    return {"fs_hz": fs_hz, "n_samples": N_SAMPLES, "repeats": repeats, "searches": out}


def report_envelope(rep: Report, fig: dict) -> None:
    rep.add("### Envelope analysis with band selection (issue 5)")
    rep.add()
    rep.add(f"`agent.envelope.envelope_spectrum` alone (cepstrum pre-whitening, fast kurtogram, squared envelope "
            f"spectrum) on one {fig['n_samples']}-sample demo capture at {fig['fs_hz']:.0f} Hz, {fig['repeats']} runs; "
            f"p90 = 90th percentile.")
    rep.add()
    rows = [(name, f"{r['band_hz'][0]:.0f}–{r['band_hz'][1]:.0f} Hz", _fmt_ms(r["cpu_ms"]), f"{r['cpu_p90_ms']:.2f}",
             _fmt_ms(r["wall_ms"]), f"{r['wall_p90_ms']:.2f}", _meets(r["cpu_p90_ms"] <= TARGET_ENVELOPE_MS))
            for name, r in fig["searches"].items()]
    rep.table(("kurtogram search", "band chosen", "CPU ms median [IQR]", "CPU p90", "wall ms median [IQR]",
               "wall p90", f"p90 ≤ {TARGET_ENVELOPE_MS:g} ms"), rows)


# ───────────────────────────────────────────────────────────── processes


def _status_kb(pid: int | str) -> dict[str, int]:
    out = {}
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith(("VmHWM", "VmRSS")):
                k, v = line.split(":", 1)
                out[k] = int(v.split()[0])
    except (OSError, ValueError):
        pass
    return out


def _cpu_s(pid: int) -> float | None:
    """User + system CPU time of a live process (all its threads), from /proc."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
        return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    except (OSError, ValueError, IndexError):
        return None


def _child_env() -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    return env


def bare_import(runs: int) -> dict:
    """Wall time and peak RSS of ``python -c "import numpy, scipy.signal"``."""
    code = (BARE_IMPORT + "; import os, sys; t = os.times(); sys.stdout.write(open('/proc/self/status').read()"
            " + f'CPU: {t.user + t.system}\\n')")
    walls, cpus, hwm, rss = [], [], [], []
    for _ in range(runs):
        t0 = time.perf_counter()
        p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=_child_env(), check=True)
        walls.append(time.perf_counter() - t0)
        st = dict(re.findall(r"^(VmHWM|VmRSS):\s+(\d+) kB", p.stdout, re.M))
        hwm.append(int(st["VmHWM"]))
        rss.append(int(st["VmRSS"]))
        cpus.append(float(re.search(r"^CPU: (\S+)", p.stdout, re.M).group(1)))
    return {"start_s": Stats.of(walls), "cpu_s": Stats.of(cpus), "hwm_kb": max(hwm), "rss_kb": statistics.median(rss)}


def _write_recordings(folder: Path, fs_hz: float, count: int, fmt: str = "npy") -> list[Path]:
    """Bench captures as float32 .npy files (the file source) or WAV + sidecar (the replay source)."""
    import numpy as np

    from agent.recordings import write_wav_with_sidecar

    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for cap in bench_captures(fs_hz, count=count):
        p = folder / f"capture-{cap.seq:03d}.{fmt}"
        if fmt == "npy":
            np.save(p, cap.accel_ms2.astype(np.float32))
        else:
            write_wav_with_sidecar(p, cap.accel_ms2, fs_hz, {"channel": cap.channel, "t0_utc_s": cap.t0_utc_s})
        paths.append(p)
    return paths


def _bench_config_file(folder: Path, interval_s: float = 60.0) -> Path:
    """The demo config with its state directory in ``folder`` and MQTT off."""
    text = DEMO_CONFIG.read_text(encoding="utf-8")
    text = re.sub(r'(?m)^state_dir = .*$', f'state_dir = {json.dumps(str(folder / "state"))}', text)
    text = re.sub(r'(?m)^scenario = .*$', f'scenario = {json.dumps(str(DEMO_CONFIG.parent / ".." / "replay" / "scenarios" / "demo.toml"))}', text)
    text = re.sub(r'(?m)^interval_s = .*$', f"interval_s = {interval_s}", text)
    text = re.sub(r'(?m)^enabled = true', "enabled = false", text)
    p = folder / "bench.toml"
    p.write_text(text, encoding="utf-8")
    return p


class _FileSource:
    """Captures from .npy files in turn, stamped ``interval_s`` apart (a fast, simulated timeline)."""

    kind = "bench"

    def __init__(self, paths, fs_hz: float, t0_utc_s: float, interval_s: float, channel: str):
        self.paths, self.fs_hz, self.t0, self.interval_s, self.channel = list(paths), fs_hz, t0_utc_s, interval_s, channel
        self.i = 0
        #: back-pressure: read only when the service can take a capture (no reads wasted on drops)
        self.ready = lambda: True

    def open(self) -> None:
        pass

    def close(self) -> None:
        pass

    def describe(self) -> dict:
        return {"kind": self.kind, "files": len(self.paths)}

    def read(self, timeout_s: float):
        import numpy as np

        from agent.model import Capture

        deadline = time.monotonic() + timeout_s
        while not self.ready() and time.monotonic() < deadline:
            time.sleep(0.001)
        x = np.load(self.paths[self.i % len(self.paths)]).astype(np.float64)
        cap = Capture(accel_ms2=x, fs_hz=self.fs_hz, t0_utc_s=self.t0 + self.i * self.interval_s,
                      channel=self.channel, source_id="bench", seq=self.i)
        self.i += 1
        return (cap,)

    def now(self) -> float:
        """The simulated wall clock: the time of the capture being analysed."""
        return self.t0 + max(0, self.i - 1) * self.interval_s


def daemon_child(config: str, recordings: str, captures: int, pace_s: float) -> int:
    """Entry of the child process: the monitoring service on a fast file source, no broker.

    The captures' timeline steps 60 s per capture (a day = 1 440 captures);
    acquisition reads every ``pace_s`` real seconds (the config's interval is
    a live-source setting, at least 1 s, so it is shortened here) and only
    when the service's bounded queue has room, so the soak runs as fast as
    the service analyses, stores and logs.
    """
    import dataclasses

    from agent.config import load_config
    from agent.daemon import Daemon

    cfg = load_config(config)
    paths = sorted(Path(recordings).glob("*.npy"))
    src = _FileSource(paths, cfg.source.fs_hz, 1.767e9, 60.0, cfg.source.channel)
    cfg = dataclasses.replace(cfg, source=dataclasses.replace(cfg.source, interval_s=pace_s))
    d = Daemon(cfg, source_factory=lambda _cfg: src, use_mqtt=False, max_captures=captures, wall=src.now)
    src.ready = lambda: not d.queue.full()
    d.install_signal_handlers()
    return d.run()


def run_daemon_soak(folder: Path, captures: int, marks: tuple[int, ...], pace_s: float = 0.0) -> dict:
    """Run the daemon child for ``captures`` captures; RSS (kB) when each mark is passed, and peak."""
    recs = folder / "recordings"
    _write_recordings(recs, 25600.0, 6)
    cfg = _bench_config_file(folder)
    cmd = [sys.executable, "-m", "agent.bench", "--daemon-child", str(cfg), str(recs), str(captures), str(pace_s)]
    t0 = time.perf_counter()
    p = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=_child_env())
    at: dict[int, dict] = {}
    count = 0
    first_capture_s = None
    dropped = 0
    peak = {"VmHWM": 0, "VmRSS": 0}
    assert p.stderr is not None
    for line in p.stderr:
        if " event=capture " in line:
            count += 1
            if first_capture_s is None:
                first_capture_s = time.perf_counter() - t0
            if count in marks:
                at[count] = {**_status_kb(p.pid), "cpu_s": _cpu_s(p.pid)}
        elif "event=capture_dropped" in line:
            dropped += 1
        elif "level=error" in line:
            print("  daemon:", line.strip(), file=sys.stderr)
        if count >= captures - 1:
            st = _status_kb(p.pid)
            if st:
                peak = st
    rc = p.wait()
    wall = time.perf_counter() - t0
    return {"rc": rc, "captures": count, "dropped": dropped, "at": at, "last": peak, "wall_s": wall,
            "first_capture_s": first_capture_s}


def startup_time(folder: Path, runs: int) -> dict:
    """Process start → first capture logged, ``skidvib run`` on a replay source when there is one."""
    from agent.sources import SOURCES

    recs = folder / "recordings"
    _write_recordings(recs, 25600.0, 2, "npy" if "replay" not in SOURCES else "wav")
    walls, cpus = [], []
    how = ""
    for k in range(runs):
        sub = folder / f"start{k}"
        sub.mkdir(parents=True, exist_ok=True)
        cfgp = _bench_config_file(sub)
        if "replay" in SOURCES:
            text = cfgp.read_text(encoding="utf-8")
            text = re.sub(r'(?m)^kind = "synthetic"', 'kind = "replay"', text)
            text += f"\n[source.replay]\npaths = [{json.dumps(str(recs))}]\nloop = true\n"
            cfgp.write_text(text, encoding="utf-8")
            cmd = [sys.executable, "-m", "agent", "run", "-c", str(cfgp), "--no-mqtt", "--max-captures", "1"]
            how = "`skidvib run --no-mqtt` on a replay source"
        else:
            cmd = [sys.executable, "-m", "agent.bench", "--daemon-child", str(cfgp), str(recs), "1", "1.0"]
            how = "the service (Daemon) on a file source, no broker"
        t0 = time.perf_counter()
        p = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, env=_child_env())
        assert p.stderr is not None
        got = cpu = None
        for line in p.stderr:
            if got is None and " event=capture " in line:
                got, cpu = time.perf_counter() - t0, _cpu_s(p.pid)
        p.wait()
        if got is None:
            raise RuntimeError(f"start-up run gave no capture (exit {p.returncode}): {' '.join(cmd)}")
        walls.append(got)
        if cpu is not None:
            cpus.append(cpu)
    return {"start_s": Stats.of(walls), "cpu_s": Stats.of(cpus) if cpus else None, "how": how}


def report_processes(rep: Report, quick: bool) -> None:
    runs = 2 if quick else 7
    bare = bare_import(runs)
    rep.add("## Service: memory and start-up")
    rep.add()
    captures = 24 if quick else 1500
    marks = (8, 20) if quick else (100, 1000, 1440)
    captures = marks[-1] + 1 if not quick else captures
    with tempfile.TemporaryDirectory(prefix="skidvib-bench-") as tmp:
        tmpp = Path(tmp)
        soak = run_daemon_soak(tmpp / "soak", captures, marks)
        start = startup_time(tmpp / "start", runs)
    bare_hwm_mb = bare["hwm_kb"] / 1024
    rows = [("bare `python -c \"import numpy, scipy.signal\"`", f"{bare_hwm_mb:.1f}", "1.00", "")]
    fig = {"bare_hwm_mb": bare_hwm_mb, "bare_start_s": bare["start_s"].median}
    first = marks[0]
    for m in marks:
        st = soak["at"].get(m)
        if not st:
            continue
        rss = st["VmRSS"] / 1024
        rows.append((f"service after {m} captures ({m / 1440:.2f} simulated days)", f"{rss:.1f} (peak {st['VmHWM'] / 1024:.1f})",
                     f"{rss / bare_hwm_mb:.2f}", ""))
    key = 1000 if 1000 in soak["at"] else marks[-1]
    ratio = None
    if key in soak["at"]:
        ratio = soak["at"][key]["VmRSS"] / 1024 / bare_hwm_mb
        fig["service_rss_mb"] = soak["at"][key]["VmRSS"] / 1024
        fig["service_hwm_mb"] = soak["at"][key]["VmHWM"] / 1024
        fig["rss_ratio"] = ratio
    rep.table(("process", "resident MB (VmRSS; peak VmHWM)", "÷ bare import", ""), rows)
    growth = None
    if first in soak["at"] and marks[-1] in soak["at"]:
        growth = (soak["at"][marks[-1]]["VmRSS"] - soak["at"][first]["VmRSS"]) / 1024
        fig["soak_growth_mb"] = growth
    rep.add(f"- Service RSS after {key} captures ÷ bare import peak: "
            f"{'n/a' if ratio is None else f'{ratio:.2f}'} (target ≤ {TARGET_RSS_RATIO}: {_meets(None if ratio is None else ratio <= TARGET_RSS_RATIO)})")
    rep.add(f"- Growth from capture {first} to {marks[-1]} "
            f"({(marks[-1] - first) / 1440 * 24:.1f} simulated hours): "
            f"{'n/a' if growth is None else f'{growth:+.1f} MB'} (target ≤ {TARGET_SOAK_GROWTH_MB:g} MB: "
            f"{_meets(None if growth is None else growth <= TARGET_SOAK_GROWTH_MB)})")
    a, b = soak["at"].get(first, {}), soak["at"].get(marks[-1], {})
    if a.get("cpu_s") is not None and b.get("cpu_s") is not None:
        per = (b["cpu_s"] - a["cpu_s"]) / (marks[-1] - first)
        fig["service_cpu_ms_per_capture"] = per * 1e3
        rep.add(f"- Service CPU per capture from capture {first} to {marks[-1]} (all threads: acquisition, analysis, "
                f"trend row, logs, snapshots on state changes): {per * 1e3:.1f} ms")
    rep.add(f"- Soak run: {soak['captures']} captures in {soak['wall_s']:.0f} s wall "
            f"({soak['captures'] / soak['wall_s']:.1f} captures/s; {soak['dropped']} dropped by the bounded queue), "
            f"exit code {soak['rc']}")
    s_ratio = start["start_s"].median / bare["start_s"].median
    fig.update(start_s=start["start_s"].median, start_ratio=s_ratio, soak_captures=soak["captures"])
    rep.add(f"- Start-up to the first capture logged ({start['how']}), wall: {start['start_s'].text('{:.2f}')} s; "
            f"bare import {bare['start_s'].text('{:.2f}')} s; ratio {s_ratio:.2f} "
            f"(target ≤ {TARGET_START_RATIO}: {_meets(s_ratio <= TARGET_START_RATIO)})")
    if start["cpu_s"] is not None:
        c_ratio = start["cpu_s"].median / bare["cpu_s"].median
        fig.update(start_cpu_s=start["cpu_s"].median, start_cpu_ratio=c_ratio)
        rep.add(f"- The same in CPU time of the process (steadier on a busy machine): {start['cpu_s'].text('{:.2f}')} s; "
                f"bare import {bare['cpu_s'].text('{:.2f}')} s; ratio {c_ratio:.2f} "
                f"(target ≤ {TARGET_START_RATIO}: {_meets(c_ratio <= TARGET_START_RATIO)})")
    rep.add()
    rep.figures["service"] = fig


# ───────────────────────────────────────────────────────────── storage


#: queued messages for the "deep queue" figures: a 16 MiB outbox holds about this many
#: measurements after a long broker outage
OUTBOX_DEEP = 20_000
#: messages one capture queues when its state changes: state, measurements, event, findings
CAPTURE_MESSAGES = 4


def _capture_messages(i: int) -> list:
    """One capture's worth of outbox rows, sized like the service's."""
    from agent.outbox import Kind, NewMessage

    meas = json.dumps({"schema": 1, "id": "0" * 32, "t_utc_s": 1.767e9 + i, "capture_seq": i, "state": "normal",
                       "values": {"vel_rms_mm_s": 1.234, "acc_rms_g": 0.0123, "speed_hz": 24.6}}).encode()
    state = json.dumps({"schema": 1, "t_utc_s": 1.767e9 + i, "state": "alert", "reason": "1X up 8 dB"}).encode()
    event = json.dumps({"schema": 1, "t_utc_s": 1.767e9 + i, "type": "state_change", "detail": {"x": "y" * 200}}).encode()
    base = "skidvib/bench/p-1/"
    return [NewMessage(base + "state", state, Kind.KEPT, replace_key="state"),
            NewMessage(base + "measurements", meas, Kind.PERIODIC),
            NewMessage(base + "events", event, Kind.KEPT),
            NewMessage(base + "findings", event, Kind.KEPT, replace_key="findings")][:CAPTURE_MESSAGES]


def _enqueue_rates(ob, n: int, batch: bool) -> tuple[float, float]:
    """(messages per wall second, CPU µs per message) of ``n`` durable enqueues, one message
    per transaction or one capture's messages per transaction."""
    msgs = [m for i in range(-(-n // CAPTURE_MESSAGES)) for m in _capture_messages(i)][:n]
    w0, c0 = time.perf_counter(), time.process_time()
    if batch:
        for k in range(0, n, CAPTURE_MESSAGES):
            ob.enqueue_many(msgs[k:k + CAPTURE_MESSAGES])
    else:
        for m in msgs:
            ob.enqueue(m.topic, m.payload, kind=m.kind, replace_key=m.replace_key)
    wall, cpu = time.perf_counter() - w0, time.process_time() - c0
    return n / wall, 1e6 * cpu / n


def bench_outbox(folder: Path, n: int) -> dict:
    """Durable enqueue rate with the queue near empty and ``OUTBOX_DEEP`` deep, one message or
    one capture's messages per transaction; then the drain (peek, mark sent, ack) rate."""
    from agent.outbox import Outbox

    def fresh(name: str) -> Outbox:
        return Outbox(folder / name, max_bytes=64 * 1024 * 1024, overflow_topic="skidvib/bench/p-1/events")

    fig: dict = {"n": n, "deep_queue": OUTBOX_DEEP, "capture_messages": CAPTURE_MESSAGES}
    ob = fresh("single.sqlite")
    fig["enqueue_msg_s"], fig["enqueue_cpu_us"] = _enqueue_rates(ob, n, batch=False)
    t0 = time.perf_counter()
    drained, after = 0, 0
    while batch := ob.peek(after, limit=20):
        for m in batch:
            ob.mark_sent(m.seq)
            ob.ack(m.seq, m.msg_id)
            after = m.seq
            drained += 1
    fig["drain_msg_s"] = drained / (time.perf_counter() - t0)
    ob.close()
    ob = fresh("batch.sqlite")
    fig["batch_msg_s"], fig["batch_cpu_us"] = _enqueue_rates(ob, n, batch=True)
    ob.close()
    ob = fresh("deep.sqlite")
    for i in range(0, OUTBOX_DEEP, 500):  # a long outage's backlog, written fast (not timed)
        ob.enqueue_many([m for k in range(i, i + 500, 2) for m in _capture_messages(k)[1:3]])
    fig["deep_filled"] = ob.stats().depth
    fig["enqueue_deep_msg_s"], fig["enqueue_deep_cpu_us"] = _enqueue_rates(ob, n, batch=False)
    fig["batch_deep_msg_s"], fig["batch_deep_cpu_us"] = _enqueue_rates(ob, n, batch=True)
    ob.close()
    return fig


def fsync_latency(folder: Path, n: int) -> Stats:
    """Seconds per ``os.fsync`` of a small append: the floor under every durable transaction."""
    path = folder / "fsync-probe"
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o600)
    ts = []
    try:
        for _ in range(n):
            os.write(fd, b"x" * 300)
            t0 = time.perf_counter()
            os.fsync(fd)
            ts.append(time.perf_counter() - t0)
    finally:
        os.close(fd)
        path.unlink()
    return Stats.of(ts)


def bench_trend(folder: Path, n: int) -> dict:
    from agent.store import Store

    st = Store(folder / "state")
    feats = {"vel_rms_mm_s": 1.234, "acc_rms_g": 0.0123, "acc_peak_g": 0.05, "crest_factor": 4.1, "kurtosis": 3.1}
    t0 = time.perf_counter()
    for i in range(n):
        st.add_trend(1.767e9 + 60.0 * i, "normal", 24.6, feats)
    dt_s = time.perf_counter() - t0
    st.close()
    return {"n": n, "insert_rows_s": n / dt_s}


def report_storage(rep: Report, quick: bool) -> None:
    n = 300 if quick else 3000
    with tempfile.TemporaryDirectory(prefix="skidvib-bench-") as tmp:
        fsync = fsync_latency(Path(tmp), 50 if quick else 200)
        ob = bench_outbox(Path(tmp), n)
        tr = bench_trend(Path(tmp), n)
    rep.add("## Storage (SQLite on the temporary directory's disk)")
    rep.add()
    outbox_rows = []
    capture = f"one capture ({CAPTURE_MESSAGES} messages) per transaction"
    for key, per, depth in (("enqueue", "one message per transaction", "near empty"),
                            ("enqueue_deep", "one message per transaction", f"{ob['deep_filled']} deep"),
                            ("batch", capture, "near empty"),
                            ("batch_deep", capture, f"{ob['deep_filled']} deep")):
        rate = ob[f"{key}_msg_s"]
        outbox_rows.append((f"outbox durable enqueue (synchronous=FULL, WAL), {per}, queue {depth}",
                            f"{rate:.0f} msg/s ({ob[f'{key}_cpu_us']:.0f} µs CPU/msg)",
                            f"≥ {TARGET_OUTBOX_MSG_S:g}: {_meets(rate >= TARGET_OUTBOX_MSG_S)}"))
    rep.table(("what", "rate", "target"), [
        *outbox_rows,
        ("outbox drain (peek 20, mark sent, ack each)", f"{ob['drain_msg_s']:.0f} msg/s",
         f"≥ {TARGET_OUTBOX_MSG_S:g}: {_meets(ob['drain_msg_s'] >= TARGET_OUTBOX_MSG_S)}"),
        (f"trend database insert, {n} rows", f"{tr['insert_rows_s']:.0f} rows/s", "(one row per capture)"),
        ("disk: one `fsync` of a 300-byte append (median [IQR])", f"{_fmt_ms(_ms(fsync), 2)} ms",
         f"→ at most {1 / fsync.median:.0f} synced transactions/s"),
    ])
    rep.figures["storage"] = {**{f"outbox_{k}": v for k, v in ob.items()}, **{f"trend_{k}": v for k, v in tr.items()},
                              "fsync_ms": _ms(fsync)}


# ───────────────────────────────────────────────────────────── replay


def report_replay(rep: Report, quick: bool) -> None:
    rep.add("## Replay of the demo scenario")
    rep.add()
    try:
        importlib.import_module("agent.replay_cmd")
    except ImportError:
        rep.add("Replay command not present in this build: not measured.")
        rep.add()
        return
    try:
        fig = _replay_figures(quick)
    except Exception as exc:  # report, do not hide: the other figures still stand
        rep.add(f"Replay not measured: {type(exc).__name__}: {exc}")
        rep.add()
        return
    rep.add(f"- First {fig['captures']} of the demo scenario's {fig['of']} captures (simulated, then replayed "
            f"from WAV through the monitor step): {fig['wall_s']:.1f} s wall, {fig['cpu_s']:.1f} s CPU "
            f"({fig['ms_per_capture_cpu']:.1f} ms CPU per capture, reading included)")
    rep.add(f"- {fig['signal_factor']:.0f}× real time of the signals by wall time, {fig['signal_factor_cpu']:.0f}× by CPU "
            f"time; {fig['timeline_factor']:.0f}× the scenario's timeline (captures {fig['timeline_gap_s']:.0f} s apart)"
            if "timeline_gap_s" in fig else
            f"- {fig['signal_factor']:.0f}× real time of the signals by wall time, {fig['signal_factor_cpu']:.0f}× by CPU "
            f"time; {fig['timeline_factor']:.0f}× the scenario's timeline")
    rep.add()
    rep.figures["replay"] = fig


def _replay_figures(quick: bool) -> dict:
    """Simulate the first captures of the demo scenario, then replay them through the monitor step."""
    from agent.config import load_config
    from agent.replay_cmd import run_replay
    from agent.scenario import find_scenario, load_scenario
    from agent.simulate_cmd import simulate
    from agent.sources.replay import ReplaySource

    scen = load_scenario(find_scenario("demo"))
    n = 12 if quick else 300
    with tempfile.TemporaryDirectory(prefix="skidvib-bench-") as tmp:
        rec = Path(tmp) / "rec"
        simulate(scen, rec, limit=n, jobs=2)
        cfg = load_config(DEMO_CONFIG)
        src = ReplaySource([rec])
        src.open()
        c0 = time.process_time()
        res = run_replay(src, cfg)
        cpu = time.process_time() - c0
    return {"captures": len(res.steps), "of": scen.n_captures, "wall_s": res.wall_s, "cpu_s": cpu,
            "signal_factor": res.signal_factor, "signal_factor_cpu": res.signal_s / cpu,
            "timeline_factor": res.timeline_s / res.wall_s, "ms_per_capture_cpu": 1e3 * cpu / len(res.steps)}


# ───────────────────────────────────────────────────────────── main


def run(quick: bool = False, out: str | None = None) -> Report:
    rep = Report(quick=quick)
    m = machine_description()
    rep.figures["machine"] = m
    rep.add(f"# skidvib benchmark — {m['date_utc']}{' (quick run)' if quick else ''}")
    rep.add()
    rep.add(f"Machine: {m['nproc']} CPUs, {m['cpu']}, {m['ram_gib']} GiB RAM, {m['machine']}; "
            f"Python {m['python']}, numpy {m['numpy']}, scipy {m['scipy']}; "
            f"load average at start {m['load_avg'][0]:.2f}"
            + (f"; OPENBLAS_CORETYPE={m['openblas_coretype']}" if m["openblas_coretype"] else ""))
    rep.add()
    repeats, warmup = (5, 2) if quick else (40, 35)
    results = [bench_analysis(rep, fs, repeats, warmup) for fs in RATES_HZ]
    rep.figures["analysis"] = results
    report_analysis(rep, results)
    rep.figures["envelope"] = fig = bench_envelope(RATES_HZ[0], 5 if quick else 50)
    report_envelope(rep, fig)
    report_processes(rep, quick)
    report_storage(rep, quick)
    report_replay(rep, quick)
    if out:
        Path(out).write_text("\n".join(rep.lines) + "\n", encoding="utf-8")
    return rep


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m agent.bench", description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="few repetitions, short soak (a smoke run)")
    ap.add_argument("--out", help="also write the table (Markdown) to this file")
    ap.add_argument("--json", help="also write the figures as JSON to this file")
    ap.add_argument("--daemon-child", nargs=4, metavar=("CONFIG", "RECORDINGS", "CAPTURES", "PACE_S"),
                    help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    # as the skidvib command does (agent.cli.main): the figures are those of the service
    from agent.allocator import keep_freed_memory

    keep_freed_memory()
    if args.daemon_child:
        cfg, recs, n, pace = args.daemon_child
        return daemon_child(cfg, recs, int(n), float(pace))
    rep = run(quick=args.quick, out=args.out)
    if args.json:
        Path(args.json).write_text(json.dumps(rep.figures, indent=2, default=str) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
