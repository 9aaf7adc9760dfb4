"""The CWRU records keep their bearing calls through the full diagnosis.

Ground truth: the CWRU Bearing Data Center's fault labels (manifest.csv) and
the benchmark verdicts of W. A. Smith, R. B. Randall, MSSP 64-65 (2015)
100-131 (smith_randall_2015_table.csv, Y = clearly diagnosable). Every
Y-rated record that the bearing stage calls correctly must still have that
bearing finding on top after all the other rules have had their say: no
shaft, electrical, hydraulic or floor finding may outrank it.
"""

from __future__ import annotations

import csv
from pathlib import Path

import pytest

pytest.importorskip("agent.bearings", reason="the bearing stage is not in this tree yet")
pytest.importorskip("agent.speed", reason="the speed stage is not in this tree yet")

from agent.config import parse_config  # noqa: E402
from agent.pipeline import analyse_capture  # noqa: E402
from agent.recordings import read_recording  # noqa: E402
from tests.conftest import SHARED_DATA  # noqa: E402

#: Y records the bearing stage itself does not call (see tests/test_bearings_cwru.py): nothing to keep
KNOWN_BEARING_MISSES = {"197"}
TRUTH = {"inner race": "bearing_inner_race", "ball": "bearing_rolling_element"}

#: the CWRU rig: 2 hp induction motor, 60 Hz supply (US), 6205-2RS drive-end bearing
#: (9 balls, 0.3126 in, pitch 1.537 in; PROVENANCE.md)
RIG = {
    "machine": {
        "speed_rpm": [1650.0, 1850.0], "line_hz": 60.0, "poles": 4, "power_kw": 1.5,
        "bearings": [{"name": "motor drive end", "balls": 9, "ball_diameter_mm": 7.94004,
                      "pitch_diameter_mm": 39.0398, "contact_angle_deg": 0.0}],
    },
}


def _records() -> list[tuple[str, Path, float, str]]:
    if SHARED_DATA is None:
        return []
    data = SHARED_DATA / "bearings"
    lines = [ln for ln in (data / "smith_randall_2015_table.csv").read_text().splitlines() if not ln.startswith("#")]
    ypn = {r["record"]: r["derived_best_DE_YPN"] for r in csv.DictReader(lines)}
    out = []
    for row in csv.DictReader((data / "manifest.csv").read_text().splitlines()):
        rec = Path(row["file"]).stem
        if row["dataset"] != "CWRU" or ypn.get(rec) != "Y" or rec in KNOWN_BEARING_MISSES:
            continue
        truth = "bearing_outer_race" if row["fault_type"].startswith("outer") else TRUTH[row["fault_type"]]
        out.append((rec, data / row["file"], float(row["fs_hz"]), truth))
    return out


RECORDS = _records()


@pytest.mark.skipif(not RECORDS, reason="shared reference data (../shared/data/bearings) is not present")
@pytest.mark.parametrize("record", RECORDS, ids=[r[0] for r in RECORDS])
def test_y_rated_bearing_fault_is_the_top_finding(record):
    from scipy.io import whosmat

    rec, path, fs, truth = record
    channel = next(n for n, _, _ in whosmat(str(path)) if n.endswith("_DE_time"))
    r = read_recording(path, channel=channel, fs_hz=fs, units="g")
    cfg = parse_config({"source": {"fs_hz": fs, "capture_s": min(60.0, r.accel_ms2.size / fs)}, **RIG})
    a = analyse_capture(r.to_capture(), cfg)
    codes = [(f.code, f.confidence) for f in a.findings]
    assert a.findings and a.findings[0].code == truth, f"{rec}: truth {truth}, findings {codes}"
    assert a.findings[0].urgency in ("act_now", "within_days", "plan", "watch") and a.findings[0].action
