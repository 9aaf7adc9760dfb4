"""The analyst's report: valid, self-contained HTML; every peak label is in the plot; renders in Chromium."""

from __future__ import annotations

import re
import shutil
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import pytest

from agent.config import load_config
from agent.demo import demo_signal
from agent.recordings import write_wav_with_sidecar

ROOT = Path(__file__).resolve().parents[1]
VOID = {"meta", "br", "img", "input", "link", "hr", "col", "area", "base", "embed", "source", "wbr"}


class Checker(HTMLParser):
    """Checks tag balance and collects ids, external references and text."""

    def __init__(self):
        super().__init__()
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.ids: set[str] = set()
        self.external: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        for k, v in attrs:
            if k == "id":
                self.ids.add(v)
            if k in ("src", "href", "xlink:href") and v and re.match(r"^(https?:)?//", v):
                self.external.append(v)
        if tag not in VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag, attrs):
        self.handle_starttag(tag, attrs)
        if tag not in VOID:
            self.stack.pop()

    def handle_endtag(self, tag):
        if tag in VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"unbalanced </{tag}> (open: {self.stack[-3:]})")
            return
        self.stack.pop()

    def handle_data(self, data):
        self.text.append(data)


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    d = tmp_path_factory.mktemp("report")
    cfg = load_config(ROOT / "config/demo-skid.toml")
    rec = d / "p201.wav"
    write_wav_with_sidecar(rec, demo_signal(cfg.source.fs_hz, cfg.source.n_samples), cfg.source.fs_hz, {"channel": "pump DE"})
    out = d / "report.html"
    res = subprocess.run([sys.executable, "-m", "agent", "report", str(rec), "-c", str(ROOT / "config/demo-skid.toml"), "-o", str(out)],
                         capture_output=True, text=True, cwd=ROOT)
    assert res.returncode == 0, res.stderr
    return out


def test_report_is_valid_and_self_contained(report):
    text = report.read_text(encoding="utf-8")
    chk = Checker()
    chk.feed(text)
    chk.close()
    assert chk.errors == []
    assert chk.stack == [] or chk.stack == ["html"] or not [t for t in chk.stack if t not in ("html", "body")]
    assert chk.external == [], "the report must not fetch anything"
    assert not re.search(r"<(script|link|img)[^>]+(src|href)=", text)
    for section in ("summary", "findings", "spectrum", "orders", "envelope", "waveform", "peaks", "facts"):
        assert section in chk.ids
    assert "lockout/tagout" in text


def test_every_peak_table_label_appears_in_the_spectrum_plot(report):
    text = report.read_text(encoding="utf-8")
    table = text[text.index("id='peaks'"):]
    labels = set(re.findall(r"<td class='l'>([^<]+)</td></tr>", table.split("id='facts'")[0]))
    assert labels, "peak table is empty"
    spectrum = text[text.index("id='spectrum'"):text.index("id='waveform'")]
    for label in labels:
        assert label in spectrum, f"label {label!r} missing from the spectrum plot"


def test_report_renders_in_headless_chromium(report, tmp_path):
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if exe is None:
        pytest.skip("chromium is not installed (tests/setup-machine.sh installs it)")
    png = tmp_path / "shot.png"
    dom = subprocess.run(
        [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={tmp_path / 'profile'}",
         "--dump-dom", report.as_uri()],
        capture_output=True, text=True, timeout=120,
    )
    assert dom.returncode == 0, dom.stderr[-500:]
    assert "Vibration report" in dom.stdout and "id=\"peaks\"" in dom.stdout and "<svg" in dom.stdout
    shot = subprocess.run(
        [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={tmp_path / 'profile2'}",
         f"--screenshot={png}", "--window-size=1100,1600", report.as_uri()],
        capture_output=True, text=True, timeout=120,
    )
    assert shot.returncode == 0 and png.is_file(), shot.stderr[-500:]
    import matplotlib.image as mpimg

    img = mpimg.imread(png)
    grey = img[..., :3].mean(axis=2)
    assert grey.std() > 0.05, "screenshot looks blank"
    assert (grey < 0.5).mean() > 0.005, "no dark ink on the page"


def test_daemon_modules_never_import_the_plotting_library():
    # the report's plotting library must not weigh on the running service
    code = ("import sys, agent.daemon, agent.monitor, agent.pipeline, agent.cli, agent.mqtt, agent.store, agent.remote;"
            "bad=[m for m in sys.modules if m.split('.')[0]=='matplotlib' or m in ('agent.plots','agent.report')];"
            "print(bad); sys.exit(1 if bad else 0)")
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT)
    assert res.returncode == 0, res.stdout + res.stderr


def test_trend_command_and_report_from_a_snapshot(tmp_path):
    import numpy as np

    from agent.store import Store

    state = tmp_path / "state"
    store = Store(state)
    t0 = 1_800_000_000.0
    for i in range(6):
        st = "normal" if i < 4 else "alert"
        store.add_trend(t0 + 60 * i, st, 24.6, {"vel_rms_mm_s": 1.0 + i, "acc_rms_g": 0.1, "crest_factor": 3.0, "kurtosis": 3.1})
    cfg_text = (ROOT / "config/demo-skid.toml").read_text().replace('state_dir = "../demo-out/state"', f'state_dir = "{state}"')
    cfgp = tmp_path / "c.toml"
    cfgp.write_text(cfg_text)
    x = demo_signal(25600.0, 65536)
    sid = store.save_snapshot(t_utc_s=t0 + 240, reason="state_change", waveform_ms2=x, fs_hz=25600.0,
                              spectra={"f_hz": np.arange(4.0)},
                              analysis={"state": {"state": "alert", "since_utc_s": t0 + 240, "reason": "1X up",
                                                  "action": "plan balancing", "urgency": "within_days"},
                                        "findings": []})
    store.close()
    res = subprocess.run([sys.executable, "-m", "agent", "trend", "-c", str(cfgp), "--feature", "vel_rms_mm_s"],
                         capture_output=True, text=True, cwd=ROOT)
    assert res.returncode == 0, res.stderr
    rows = [ln for ln in res.stdout.splitlines()[2:] if ln.strip()]
    assert len(rows) == 6 and rows[-1].split()[2] == "alert" and float(rows[-1].split()[-1]) == 6.0
    out = tmp_path / "snap.html"
    res = subprocess.run([sys.executable, "-m", "agent", "report", str(state / "snapshots" / sid), "-c", str(cfgp), "-o", str(out)],
                         capture_output=True, text=True, cwd=ROOT)
    assert res.returncode == 0, res.stderr
    page = out.read_text()
    assert "id='trend'" in page and "alert (zone C)" in page and "plan balancing" in page


def test_without_matplotlib_reports_fail_with_a_clear_error():
    """The service's base install has no matplotlib: a report then names the extra to install."""
    import subprocess
    import sys

    code = ("import sys; sys.modules['matplotlib'] = None\n"
            "from agent.errors import MissingExtra\n"
            "from agent.plots import _plt\n"
            "try:\n    _plt()\nexcept MissingExtra as exc:\n    print('missing:', exc)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=60,
                         cwd=str(Path(__file__).resolve().parents[1]))
    assert out.returncode == 0, out.stderr
    assert out.stdout.startswith("missing: HTML reports need matplotlib") and "[report]" in out.stdout
