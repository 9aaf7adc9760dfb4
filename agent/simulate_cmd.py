"""``skidvib simulate SCENARIO -o DIR``: write a scenario's captures as recordings.

Each capture becomes ``<tag>_<UTC start>.wav`` (float32 samples in m/s²)
and a sidecar ``<same name>.json`` (written by
:func:`agent.recordings.write_wav_with_sidecar`, read back by
:func:`agent.recordings.read_recording`)::

    {"format": "skidvib-recording", "version": 1, "fs_hz": 25600.0, "units": "m/s2",
     "channel": "...", "start_utc": "2026-03-02T06:00:00Z", "t0_utc_s": ..., "n_samples": ...,
     "source": "simulator", "scenario": "...", "full_scale_ms2": ..., "ground_truth": {...}}

The folder also gets ``scenario.json`` (the story: events with times) and
``agent.toml`` (a configuration matching the simulated machine, for
``skidvib replay DIR -c DIR/agent.toml``). The same scenario and seed give
byte-identical files.
"""

from __future__ import annotations

import argparse
import json
import os
from pathlib import Path
from typing import TYPE_CHECKING

from agent.errors import InputError

if TYPE_CHECKING:  # the command line imports this module to build its parser: keep it light
    from agent.scenario import Scenario

RECORDING_FORMAT = "skidvib-recording"
RECORDING_VERSION = 1


def recording_name(scenario: Scenario, t0_utc_s: float) -> str:
    from agent.scenario import utc_text

    stamp = utc_text(t0_utc_s).replace("-", "").replace(":", "")
    safe_tag = "".join(c if c.isalnum() or c in "-_" else "-" for c in scenario.tag) or "sim"
    return f"{safe_tag}_{stamp}"


def _json_default(obj):
    import numpy as np

    if isinstance(obj, (np.floating, np.integer)):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def dumps(obj) -> str:
    return json.dumps(obj, indent=1, sort_keys=True, default=_json_default) + "\n"


def _write_capture(scenario: Scenario, i: int, out_dir: Path) -> str:
    from agent.recordings import write_wav_with_sidecar
    from agent.scenario import utc_text

    x, truth, t0 = scenario.capture(i)
    name = recording_name(scenario, t0)
    meta = {
        "format": RECORDING_FORMAT,
        "version": RECORDING_VERSION,
        "fs_hz": scenario.fs_hz,
        "units": "m/s2",
        "channel": scenario.channel,
        "start_utc": utc_text(t0),
        "t0_utc_s": t0,
        "n_samples": int(x.size),
        "source": "simulator",
        "scenario": scenario.name,
        "seq": i,
        "full_scale_ms2": truth["full_scale_ms2"],
        "ground_truth": truth,
    }
    if scenario.fs_hz != int(scenario.fs_hz):
        raise InputError(f"scenario {scenario.name!r}: WAV needs an integer sample rate, got {scenario.fs_hz}")
    # plain JSON types only (numpy scalars converted), then the shared WAV + sidecar writer
    write_wav_with_sidecar(out_dir / f"{name}.wav", x, scenario.fs_hz, json.loads(dumps(meta)))
    return name


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(a) for a in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} as TOML")


def to_toml(data: dict) -> str:
    """A small TOML writer for plain nested tables and arrays of tables (config files)."""
    lines: list[str] = []

    def table(d: dict, prefix: str) -> None:
        scalars = {k: v for k, v in d.items() if not isinstance(v, dict) and not _is_table_list(v)}
        if prefix and (scalars or not d):
            lines.append(f"[{prefix}]")
        for k, v in scalars.items():
            lines.append(f"{k} = {_toml_value(v)}")
        if scalars:
            lines.append("")
        for k, v in d.items():
            key = f"{prefix}.{k}" if prefix else k
            if isinstance(v, dict):
                table(v, key)
            elif _is_table_list(v):
                for item in v:
                    lines.append(f"[[{key}]]")
                    for kk, vv in item.items():
                        lines.append(f"{kk} = {_toml_value(vv)}")
                    lines.append("")

    table(data, "")
    return "\n".join(lines).rstrip() + "\n"


def _is_table_list(v) -> bool:
    return isinstance(v, list) and bool(v) and all(isinstance(a, dict) for a in v)


def simulate(scenario: Scenario, out_dir: str | Path, *, limit: int | None = None, jobs: int = 1,
             progress=None) -> list[Path]:
    """Write the scenario's captures (all, or the first ``limit``) into ``out_dir``; returns the WAV paths."""
    from concurrent.futures import ProcessPoolExecutor

    from agent.scenario import utc_text

    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(f"{out}: cannot create output folder: {exc.strerror or exc}") from exc
    n = scenario.n_captures if limit is None else min(limit, scenario.n_captures)
    names: list[str] = []
    if jobs > 1 and n > 1:
        with ProcessPoolExecutor(max_workers=jobs) as pool:
            for k, name in enumerate(pool.map(_write_capture, [scenario] * n, range(n), [out] * n, chunksize=4)):
                names.append(name)
                if progress:
                    progress(k + 1, n)
    else:
        for i in range(n):
            names.append(_write_capture(scenario, i, out))
            if progress:
                progress(i + 1, n)
    story = {
        "scenario": scenario.name,
        "title": scenario.title,
        "start_utc": utc_text(scenario.start_utc_s),
        "days": scenario.duration_s / 86400.0,
        "captures": n,
        "capture_s": scenario.capture_s,
        "fs_hz": scenario.fs_hz,
        "events": scenario.events(),
        "recordings": [f"{nm}.wav" for nm in names],
    }
    (out / "scenario.json").write_text(dumps(story), encoding="utf-8")
    (out / "agent.toml").write_text(
        f"# configuration for the simulated machine of scenario {scenario.name!r}\n" + to_toml(scenario.agent_config()),
        encoding="utf-8",
    )
    return [out / f"{nm}.wav" for nm in names]


def add_parser(sub) -> argparse.ArgumentParser:
    p = sub.add_parser("simulate", help="write a simulator scenario's captures as WAV + JSON recordings")
    p.add_argument("scenario", help="scenario TOML file, or a name in replay/scenarios (e.g. demo)")
    p.add_argument("-o", "--out", required=True, help="output folder")
    p.add_argument("--limit", type=int, default=None, help="write only the first N captures")
    p.add_argument("-j", "--jobs", type=int, default=min(4, os.cpu_count() or 1), help="parallel workers")
    p.set_defaults(func=run)
    return p


def run(args) -> int:
    from agent.scenario import find_scenario, load_scenario

    scenario = load_scenario(find_scenario(args.scenario))
    paths = simulate(scenario, args.out, limit=args.limit, jobs=max(1, args.jobs))
    print(f"{len(paths)} recordings of scenario '{scenario.name}' written to {args.out}")
    print(f"  story: {Path(args.out) / 'scenario.json'}   config: {Path(args.out) / 'agent.toml'}")
    return 0

