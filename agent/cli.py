"""Command line: ``skidvib <command>`` (argparse).

Exit codes: 0 ok, 1 runtime error, 2 configuration error (the service
manager does not restart on 2), 3 bad input file.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from agent import __version__
from agent.allocator import keep_freed_memory
from agent.errors import AgentError, ConfigError, InputError

EXIT_OK, EXIT_ERROR, EXIT_CONFIG, EXIT_INPUT = 0, 1, 2, 3

SAFETY_NOTE = (
    "Decision support only, not a machinery protection (trip) system. Work on running machinery only "
    "with guards in place and under the site's lockout/tagout procedure; have advice confirmed by a "
    "qualified person; local codes and licensed practice prevail."
)


def _load_cfg(path: str | None):
    from agent.config import default_config, load_config

    return load_config(path) if path else default_config()


def cmd_check_config(args) -> int:
    from agent.config import load_config, summary

    cfg = load_config(args.config)
    print(f"{args.config}: configuration is valid")
    print(summary(cfg))
    return EXIT_OK


def cmd_analyze(args) -> int:
    from agent.pipeline import analyse_capture, analysis_to_json
    from agent.recordings import read_recording
    from agent.report_text import analysis_text

    cfg = _load_cfg(args.config)
    rec = read_recording(
        args.recording,
        channel=args.channel,
        fs_hz=args.fs,
        units=args.units,
        sensitivity_mv_per_g=args.sensitivity_mv_per_g,
        fmt=args.format,
    )
    analysis = analyse_capture(rec.to_capture(), cfg)
    if args.json:
        doc = analysis_to_json(analysis, cfg, orders=args.orders)
        doc = {"recording": rec.path, "units_in_file": rec.units_in_file, **doc}
        json.dump(doc, sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        print(analysis_text(analysis, cfg, rec, orders=args.orders))
    return EXIT_OK


def cmd_report(args) -> int:
    from agent.report import write_report

    cfg = _load_cfg(args.config)
    read_args = {k: v for k, v in (("channel", args.channel), ("fs_hz", args.fs), ("units", args.units)) if v is not None}
    out = write_report(args.target, cfg, args.out, **read_args)
    print(f"report written to {out}")
    return EXIT_OK


def cmd_run(args) -> int:
    from agent.daemon import run_daemon

    return run_daemon(args.config, max_captures=args.max_captures, no_mqtt=args.no_mqtt)


def cmd_trend(args) -> int:
    import time

    from agent.config import resolve_path
    from agent.trend import parse_since, read_trend, trend_html, trend_table

    cfg = _load_cfg(args.config)
    state_dir = resolve_path(cfg, cfg.store.state_dir)
    points = read_trend(state_dir, parse_since(args.since, time.time()))
    features = args.feature or ["vel_rms_mm_s", "acc_rms_g", "crest_factor", "kurtosis"]
    if args.html:
        Path(args.html).write_text(trend_html(points, features, cfg), encoding="utf-8")
        print(f"trend plot written to {args.html} ({len(points)} rows)")
    else:
        print(trend_table(points, features))
    return EXIT_OK


def cmd_demo(args) -> int:
    from agent.demo import run_demo

    return run_demo(args.out)


def cmd_devices(args) -> int:
    from agent.sources.devices import cmd_devices as run

    return run(args)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="skidvib", description="Vibration monitoring agent for one machine.")
    p.add_argument("--version", action="version", version=f"skidvib {__version__}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    s = sub.add_parser("check-config", help="validate a config file and print its summary")
    s.add_argument("config", help="TOML config file")
    s.set_defaults(func=cmd_check_config)

    s = sub.add_parser("analyze", help="analyse one recording and print levels, zone and peaks")
    s.add_argument("recording", help="WAV, CSV/TXT, NPY, NPZ or MAT file")
    s.add_argument("-c", "--config", help="config file (machine, analysis settings)")
    s.add_argument("--json", action="store_true", help="print one JSON document")
    s.add_argument("--orders", action="store_true", help="add the order view (levels at 0.5X, 1X ... 10X, forcing orders)")
    s.add_argument("--channel", help="variable/column name or index to read")
    s.add_argument("--fs", type=float, help="sample rate in Hz, when the file does not say")
    s.add_argument("--units", choices=("g", "m/s2", "mm/s", "V"), help="units of the samples")
    s.add_argument("--sensitivity-mv-per-g", type=float, help="sensor sensitivity, for --units V")
    s.add_argument("--format", choices=("wav", "csv", "npy", "npz", "mat"), help="force the file format")
    s.set_defaults(func=cmd_analyze)

    s = sub.add_parser("run", help="run the monitoring service (as systemd does)")
    s.add_argument("-c", "--config", required=True, help="config file")
    s.add_argument("--no-mqtt", action="store_true", help="do not connect to a broker (store only)")
    s.add_argument("--max-captures", type=int, help="stop after this many captures (for trials)")
    s.set_defaults(func=cmd_run)

    s = sub.add_parser("report", help="write a self-contained HTML report of a snapshot or recording")
    s.add_argument("target", help="snapshot folder or recording file")
    s.add_argument("-c", "--config", help="config file")
    s.add_argument("-o", "--out", default="report.html", help="output HTML file")
    s.add_argument("--channel", help="variable/column to read from a recording")
    s.add_argument("--fs", type=float, help="sample rate in Hz, when the file does not say")
    s.add_argument("--units", choices=("g", "m/s2", "mm/s", "V"), help="units of the samples")
    s.set_defaults(func=cmd_report)

    s = sub.add_parser("trend", help="print or plot the trend history of the state directory")
    s.add_argument("-c", "--config", required=True, help="config file (gives store.state_dir)")
    s.add_argument("--feature", action="append", help="feature to show (repeatable), e.g. vel_rms_mm_s")
    s.add_argument("--since", help="7d, 12h, 30m or an ISO date/time (UTC)")
    s.add_argument("--html", help="write a plot to this HTML file instead of printing")
    s.set_defaults(func=cmd_trend)

    s = sub.add_parser("devices", help="list sound devices and serial ports for the config")
    s.set_defaults(func=cmd_devices)

    s = sub.add_parser("demo", help="run the invented demo skid on the simulator (no hardware)")
    s.add_argument("-o", "--out", default="demo-out", help="folder for the demo's outputs")
    s.set_defaults(func=cmd_demo)

    from agent import remote

    s = sub.add_parser("remote", help="talk to a running agent over MQTT: list | pull | snapshot "
                       "| ack | mode | feedback")
    remote.build_parser(s)
    s.set_defaults(func=remote.run)

    from agent import replay_cmd, simulate_cmd

    simulate_cmd.add_parser(sub)
    replay_cmd.add_parser(sub)
    return p


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    keep_freed_memory()  # every command analyses captures: no page faults per capture
    try:
        return int(args.func(args) or 0)
    except ConfigError as exc:
        print(f"skidvib: {exc}", file=sys.stderr)
        return EXIT_CONFIG
    except InputError as exc:
        print(f"skidvib: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except AgentError as exc:
        print(f"skidvib: {exc}", file=sys.stderr)
        return EXIT_ERROR
    except BrokenPipeError:
        return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
