"""``skidvib trend``: the trend history from a state directory, printed or plotted.

Reads the trend database read-only (the service may be writing it; SQLite in
WAL mode lets a reader see a consistent snapshot), so it is safe to run on a
live box.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import re
import sqlite3
from dataclasses import dataclass
from pathlib import Path

from agent.errors import InputError


@dataclass(frozen=True, slots=True)
class TrendPoint:
    t_utc_s: float
    state: str
    speed_hz: float | None
    features: dict
    n_captures: int  # 1 for a single capture, more for an hourly row


def parse_since(text: str | None, now_utc_s: float) -> float:
    """'7d', '12h', '30m' (before now) or an ISO date/time (UTC); None → everything."""
    if not text:
        return -math.inf
    m = re.fullmatch(r"(\d+(?:\.\d+)?)([dhm])", text.strip())
    if m:
        return now_utc_s - float(m.group(1)) * {"d": 86400, "h": 3600, "m": 60}[m.group(2)]
    try:
        t = dt.datetime.fromisoformat(text.strip().replace("Z", "+00:00"))
    except ValueError:
        raise InputError(f"--since {text!r}: give e.g. 7d, 12h or 2026-11-30T08:00") from None
    if t.tzinfo is None:
        t = t.replace(tzinfo=dt.timezone.utc)
    return t.timestamp()


def read_trend(state_dir: str | Path, since_utc_s: float = -math.inf) -> list[TrendPoint]:
    """All trend rows (single captures and hourly folds) at or after ``since_utc_s``, in time order."""
    db = Path(state_dir) / "trend.sqlite"
    if not db.is_file():
        raise InputError(f"{db}: no trend database (has the service run with this state_dir?)")
    try:
        con = sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5)
        try:
            rows = con.execute(
                "SELECT t_utc_s, state, speed_hz, features, n FROM trend WHERE t_utc_s >= ? ORDER BY t_utc_s, level",
                (max(since_utc_s, -1e300),),
            ).fetchall()
        finally:
            con.close()
    except sqlite3.Error as exc:
        raise InputError(f"{db}: cannot read the trend database ({exc})") from exc
    out = []
    for t, state, speed, feats, n in rows:
        try:
            f = json.loads(feats)
        except (TypeError, ValueError):
            f = {}
        out.append(TrendPoint(float(t), str(state), speed, f if isinstance(f, dict) else {}, int(n)))
    return out


def trend_table(points: list[TrendPoint], features: list[str]) -> str:
    head = f"{'time (UTC)':<20} {'state':<13} {'speed r/min':>11} " + " ".join(f"{f:>16}" for f in features)
    lines = [head, "-" * len(head)]
    for p in points:
        t = dt.datetime.fromtimestamp(p.t_utc_s, dt.timezone.utc).strftime("%Y-%m-%d %H:%M:%S")
        rpm = f"{p.speed_hz * 60:11.0f}" if p.speed_hz else f"{'-':>11}"
        vals = " ".join(f"{p.features[f]:16.4g}" if isinstance(p.features.get(f), (int, float)) else f"{'-':>16}"
                        for f in features)
        lines.append(f"{t:<20} {p.state:<13} {rpm} {vals}" + (f"  (hourly, {p.n_captures})" if p.n_captures > 1 else ""))
    return "\n".join(lines)


def trend_html(points: list[TrendPoint], features: list[str], cfg) -> str:
    """A small self-contained page with the trend plot (uses the report's plotting module)."""
    import html

    from agent import plots
    from agent.features import ISO20816_3_VELOCITY_MM_S

    t = [p.t_utc_s for p in points]
    series = {f: [p.features.get(f, float("nan")) for p in points] for f in features}
    states, last = [], None
    for p in points:
        if p.state != last:
            states.append((p.t_utc_s, p.state))
            last = p.state
    levels = {}
    if features == ["vel_rms_mm_s"]:
        _, bc, cd = ISO20816_3_VELOCITY_MM_S[(cfg.machine.iso_group, cfg.machine.support)]
        levels = {"alert (zone C)": bc, "danger (zone D)": cd}
    svg = plots.trend_svg(t, series, levels=levels, states=states, title="Trend", unit=", ".join(features))
    title = html.escape(f"Trend {cfg.asset.tag}")
    return f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{title}</title></head><body>{svg}</body></html>"
