"""Strict config: every shipped file loads; every kind of mistake is reported with its key."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from agent.config import changed_keys, default_config, load_config, parse_config, with_keys_from
from agent.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("path", sorted((ROOT / "config").glob("*.toml")), ids=lambda p: p.name)
def test_every_shipped_config_loads(path):
    cfg = load_config(path)
    assert cfg.path == str(path)


def test_demo_config_values():
    cfg = load_config(ROOT / "config" / "demo-skid.toml")
    assert cfg.asset.tag == "P-201"
    assert cfg.machine.poles == 4 and cfg.machine.vanes == 6
    assert cfg.machine.bearings[0].name == "pump drive end"
    assert cfg.source.n_samples == 65536


def problems(data) -> tuple[str, ...]:
    with pytest.raises(ConfigError) as info:
        parse_config(data, "site.toml")
    assert "site.toml" in str(info.value)
    return info.value.problems


def test_all_problems_reported_at_once_with_dotted_keys():
    found = problems(
        {
            "mqtt": {"prot": 1883, "port": "1883"},
            "machine": {"speed_rpm": [3600.0, 600.0], "line_hz": 55},
            "source": {"fs_hz": 25600, "capture_s": 2.56},
            "analysis": {"fmax_hz": 20000.0},
        }
    )
    text = "\n".join(found)
    assert "mqtt.prot: unknown key (did you mean 'port'?)" in text
    assert "mqtt.port: expected an integer, got str '1883'" in text
    assert "machine.line_hz: 55" in text and "50.0, 60.0" in text
    assert "machine.speed_rpm" in text and "increasing" in text
    assert "analysis.fmax_hz: 20000.0 is above the Nyquist frequency 12800.0" in text


def test_range_and_table_errors():
    found = problems({"source": {"fs_hz": 10.0}, "asset": "P-1", "nonsense": {}})
    text = "\n".join(found)
    assert "source.fs_hz: 10.0 out of range" in text
    assert "asset: expected a table" in text
    assert "nonsense: unknown key" in text


def test_bearing_geometry_checked():
    found = problems({"machine": {"bearings": [{"name": "a", "balls": 9, "ball_diameter_mm": 40.0, "pitch_diameter_mm": 39.0}]}})
    assert any("ball_diameter_mm 40.0 must be smaller than pitch_diameter_mm 39.0" in p for p in found)
    found = problems({"machine": {"bearings": [{"balls": 9}]}})
    assert any("machine.bearings[0].name: required key is missing" in p for p in found)


def test_inconsistent_combinations():
    text = "\n".join(problems({"source": {"kind": "serial", "interval_s": 1.0, "capture_s": 2.0}, "alarms": {"alert_ratio": 3.0, "danger_ratio": 2.0}}))
    assert "source.serial.port: required" in text
    assert "source.interval_s: 1.0 is shorter than source.capture_s 2.0" in text
    assert "alarms.danger_ratio" in text


def test_toml_syntax_and_missing_file(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[machine]\nline_hz = 50\nline_hz = 60\n")
    with pytest.raises(ConfigError, match="TOML syntax.*line 3"):
        load_config(bad)
    with pytest.raises(ConfigError, match="cannot read file"):
        load_config(tmp_path / "missing.toml")


def test_check_config_command_exit_codes(tmp_path):
    ok = subprocess.run([sys.executable, "-m", "agent", "check-config", str(ROOT / "config/demo-skid.toml")],
                        capture_output=True, text=True, cwd=ROOT)
    assert ok.returncode == 0 and "configuration is valid" in ok.stdout and "P-201" in ok.stdout
    bad = tmp_path / "bad.toml"
    bad.write_text('[mqtt]\nport = "1883"\nhots = "x"\n')
    res = subprocess.run([sys.executable, "-m", "agent", "check-config", str(bad)], capture_output=True, text=True, cwd=ROOT)
    assert res.returncode == 2
    assert "mqtt.port" in res.stderr and "mqtt.hots: unknown key (did you mean 'host'?)" in res.stderr


def test_changed_keys_and_with_keys_from():
    import dataclasses as dc

    a = default_config()
    b = dc.replace(a, mqtt=dc.replace(a.mqtt, host="broker", outbox_max_mb=2.0),
                   store=dc.replace(a.store, state_dir="s2"),
                   source=dc.replace(a.source, synthetic=dc.replace(a.source.synthetic, seed=5)),
                   machine=dc.replace(a.machine, speed_rpm=(500.0, 1500.0)))
    assert changed_keys(a, a) == ()
    assert changed_keys(a, b) == ("source.synthetic.seed", "machine.speed_rpm", "store.state_dir",
                                  "mqtt.host", "mqtt.outbox_max_mb")
    c = with_keys_from(b, a, ["mqtt.host", "store.state_dir", "source.synthetic.seed"])
    assert c.mqtt.host == a.mqtt.host and c.mqtt.outbox_max_mb == 2.0
    assert c.store.state_dir == "state" and c.source.synthetic.seed == 1
    assert changed_keys(a, c) == ("machine.speed_rpm", "mqtt.outbox_max_mb")
