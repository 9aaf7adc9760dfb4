"""SVG plots for the analyst's report (matplotlib, imported only here).

The daemon never imports this module: plotting is for ``skidvib report``,
``replay`` and ``demo`` only. Style: grey scale for the normal, one accent
colour for what is abnormal (unexplained peaks, alarm levels, alarm states),
text kept as text in the SVG so labels can be searched and tested.
"""

from __future__ import annotations

import io

import numpy as np

ACCENT = "#c0392b"
INK = "#222222"
MID = "#777777"
LIGHT = "#bbbbbb"


def _plt():
    try:
        import matplotlib
    except ImportError:
        from agent.errors import MissingExtra

        raise MissingExtra(
            "HTML reports need matplotlib, which is not installed: pip install -e '.[report]' "
            "(or pip install 'skidvib[report]')"
        ) from None

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    plt.rcParams.update(
        {
            "svg.fonttype": "none",
            "svg.hashsalt": "skidvib",  # deterministic ids
            "font.size": 8,
            "axes.edgecolor": MID,
            "axes.labelcolor": INK,
            "xtick.color": INK,
            "ytick.color": INK,
            "axes.grid": True,
            "grid.color": "#e4e4e4",
            "grid.linewidth": 0.6,
            "axes.spines.top": False,
            "axes.spines.right": False,
        }
    )
    return plt


def _svg(fig) -> str:
    buf = io.StringIO()
    fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None})
    import matplotlib.pyplot as plt

    plt.close(fig)
    text = buf.getvalue()
    return text[text.index("<svg") :]


def spectrum_svg(f_hz, amp, peaks, *, unit: str, title: str, log: bool, fmax_hz: float) -> str:
    """Spectrum with every peak marked and named; ``peaks`` = [(freq_hz, amp, label, unexplained)]."""
    plt = _plt()
    fig, ax = plt.subplots(figsize=(9.0, 3.4))
    sel = f_hz <= fmax_hz
    ax.plot(f_hz[sel], amp[sel], color=INK, linewidth=0.7)
    if log:
        ax.set_yscale("log")
        positive = amp[sel][amp[sel] > 0]
        if positive.size:
            ax.set_ylim(max(positive.min(), positive.max() * 1e-5), positive.max() * 3)
    for f, a, label, unexplained in peaks:
        if f > fmax_hz:
            continue
        color = ACCENT if unexplained else MID
        ax.plot([f], [a], marker="v", color=color, markersize=4)
        ax.annotate(label, (f, a), xytext=(0, 4), textcoords="offset points", rotation=90,
                    fontsize=6.5, color=ACCENT if unexplained else INK, ha="center", va="bottom")
    ax.set_xlim(0, fmax_hz)
    ax.set_xlabel("frequency, Hz")
    ax.set_ylabel(unit)
    ax.set_title(title, loc="left", fontsize=9)
    return _svg(fig)


def orders_svg(orders, amp, peaks, *, unit: str, title: str, max_order: float = 12.0) -> str:
    plt = _plt()
    fig, ax = plt.subplots(figsize=(9.0, 3.0))
    sel = orders <= max_order
    ax.plot(orders[sel], amp[sel], color=INK, linewidth=0.7)
    ax.set_xticks(np.arange(0, max_order + 1, 1.0))
    ax.grid(True, axis="x", color=LIGHT, linewidth=0.8)
    for o, a, label, unexplained in peaks:
        if o <= max_order:
            ax.annotate(label, (o, a), xytext=(0, 3), textcoords="offset points", rotation=90, fontsize=6.5,
                        color=ACCENT if unexplained else INK, ha="center", va="bottom")
    ax.set_xlim(0, max_order)
    ax.set_xlabel("order (× running speed)")
    ax.set_ylabel(unit)
    ax.set_title(title, loc="left", fontsize=9)
    return _svg(fig)


def envelope_svg(f_hz, amp, markers, *, unit: str, title: str, fmax_hz: float) -> str:
    """Envelope spectrum with tone markers: ``markers`` = [(freq_hz, label, found)]."""
    plt = _plt()
    fig, ax = plt.subplots(figsize=(9.0, 3.0))
    sel = f_hz <= fmax_hz
    ax.plot(f_hz[sel], amp[sel], color=INK, linewidth=0.7)
    top = float(amp[sel].max()) if np.any(sel) else 1.0
    for f, label, found in markers:
        if f <= fmax_hz:
            ax.axvline(f, color=ACCENT if found else LIGHT, linewidth=0.8, linestyle="-" if found else "--")
            ax.text(f, top * 0.97, label, rotation=90, fontsize=6.5, va="top", ha="right",
                    color=ACCENT if found else MID)
    ax.set_xlim(0, fmax_hz)
    ax.set_xlabel("frequency, Hz")
    ax.set_ylabel(unit)
    ax.set_title(title, loc="left", fontsize=9)
    return _svg(fig)


def waveform_svg(t_s, x, *, unit: str, title: str) -> str:
    plt = _plt()
    fig, ax = plt.subplots(figsize=(9.0, 2.6))
    ax.plot(t_s, x, color=INK, linewidth=0.4)
    ax.set_xlabel("time, s")
    ax.set_ylabel(unit)
    ax.set_title(title, loc="left", fontsize=9)
    return _svg(fig)


def trend_svg(t_utc_s, series: dict, *, levels: dict, states, title: str, unit: str) -> str:
    """Trend lines (grey shades), alert/danger levels (accent) and state changes (markers)."""
    import datetime as dt

    plt = _plt()
    fig, ax = plt.subplots(figsize=(9.0, 3.0))
    times = [dt.datetime.fromtimestamp(t, dt.timezone.utc) for t in t_utc_s]
    shades = [INK, MID, LIGHT, "#999999"]
    styles = ["-", "-", "--", ":"]
    for i, (name, values) in enumerate(series.items()):
        ax.plot(times, values, color=shades[i % 4], linestyle=styles[i % 4], linewidth=0.9, label=name)
    for name, value in levels.items():
        ax.axhline(value, color=ACCENT, linewidth=0.8, linestyle="--" if "alert" in name else "-")
        ax.text(times[0] if times else 0, value, f" {name}", color=ACCENT, fontsize=6.5, va="bottom")
    for t, state in states:
        ax.axvline(dt.datetime.fromtimestamp(t, dt.timezone.utc), color=ACCENT if state in ("alert", "danger", "sensor_fault") else LIGHT,
                   linewidth=0.6, linestyle=":")
    if series:
        ax.legend(loc="upper left", fontsize=6.5, frameon=False)
    ax.set_ylabel(unit)
    ax.set_title(title, loc="left", fontsize=9)
    fig.autofmt_xdate()
    return _svg(fig)
