"""`skidvib analyze` end to end, in human and JSON form."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from agent.recordings import write_wav_with_sidecar
from tests.conftest import tone

ROOT = Path(__file__).resolve().parents[1]


def run(*args):
    return subprocess.run([sys.executable, "-m", "agent", *map(str, args)], capture_output=True, text=True, cwd=ROOT)


def test_analyze_json_has_documented_keys(tmp_path):
    fs, n = 25600.0, 65536
    # 1X at 24.6 Hz of 2.0 mm/s r.m.s. velocity → acceleration r.m.s. = 2π·f·v
    f1 = 24.6
    acc = tone(fs, f1, 2 * np.pi * f1 * 0.002, n) + np.random.default_rng(0).normal(0, 0.01, n)
    p = tmp_path / "demo.wav"
    write_wav_with_sidecar(p, acc, fs, {"channel": "pump DE"})
    res = run("analyze", p, "-c", ROOT / "config/demo-skid.toml", "--json")
    assert res.returncode == 0, res.stderr
    doc = json.loads(res.stdout)
    assert doc["fs_hz"] == fs and doc["duration_s"] == pytest.approx(2.56)
    ov = doc["overall"]
    assert {"vel_rms_mm_s", "acc_rms_g", "crest_factor", "kurtosis", "iso_zone"} <= set(ov)
    assert ov["vel_rms_mm_s"] == pytest.approx(2.0, rel=0.02)
    assert ov["iso_zone"] == "B"  # 1.4 < 2.0 <= 2.8 mm/s, group 2 rigid (ISO 20816-3 Annex A, from memory)
    top = doc["peaks"][0]
    assert top["freq_hz"] == pytest.approx(f1, abs=0.02) and top["unit"] == "mm/s rms"
    assert top["amp"] == pytest.approx(2.0, rel=0.02)
    human = run("analyze", p, "-c", ROOT / "config/demo-skid.toml")
    assert human.returncode == 0 and "zone B" in human.stdout and "mm/s r.m.s." in human.stdout
    assert "lockout/tagout" in human.stdout


def test_analyze_real_cwru_record(shared_data):
    res = run("analyze", shared_data / "bearings/cwru/12k_drive_end/105.mat", "--channel", "X105_DE_time",
              "--fs", "12000", "--units", "g", "--json")
    assert res.returncode == 0, res.stderr
    doc = json.loads(res.stdout)
    # Smith & Randall 2015, Table B1: kurtosis of record 105 drive end = 5.40
    assert doc["overall"]["kurtosis"] == pytest.approx(5.40, abs=0.05)


def test_analyze_bad_file_exit_code(tmp_path):
    p = tmp_path / "broken.wav"
    p.write_bytes(b"RIFF\x00\x00")
    res = run("analyze", p)
    assert res.returncode == 3 and "broken.wav" in res.stderr and "Traceback" not in res.stderr
