"""State directory: trend rows and downsampling, atomic snapshots, ids never used as paths,
retention that spares pinned snapshots, a full disk that corrupts nothing."""

from __future__ import annotations

import hashlib
import json
import os
import subprocess

import numpy as np
import pytest
from scipy.io import wavfile

from agent.errors import StoreError
from agent.store import SNAPSHOT_ID, Store

T0 = 1_796_169_600.0  # 2026-12-02T00:00:00Z


def _snap(store: Store, t: float, reason: str = "scheduled", n: int = 4096) -> str:
    rng = np.random.default_rng(int(t) % 1000)
    x = rng.normal(0, 3.0, n)
    f = np.linspace(0, 1000, 257)
    return store.save_snapshot(t_utc_s=t, reason=reason, waveform_ms2=x, fs_hz=2048.0,
                               spectra={"f_hz": f, "accel_ms2": np.abs(rng.normal(size=257))},
                               analysis={"state": "normal", "vel_rms_mm_s": 1.5,
                                         "nan_value": float("nan")})


def _digest(d) -> dict:
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(d.iterdir())}


def test_snapshot_round_trip(tmp_path):
    st = Store(tmp_path)
    x = np.random.default_rng(1).normal(0, 3.0, 10_000)
    sid = st.save_snapshot(t_utc_s=T0 + 0.25, reason="state_change", waveform_ms2=x,
                           fs_hz=25600.0, spectra={"f_hz": np.arange(5.0)},
                           analysis={"state": "alert"})
    assert sid == "20261202T000000250Z-state_change" and SNAPSHOT_ID.match(sid)
    d = tmp_path / "snapshots" / sid
    assert sorted(os.listdir(d)) == ["analysis.json", "spectra.npz", "waveform.wav"]
    fs, y = wavfile.read(d / "waveform.wav")  # scipy reads IEEE-float WAV back as float32
    assert fs == 25600 and y.dtype == np.float32
    np.testing.assert_array_equal(y, x.astype(np.float32))
    with np.load(d / "spectra.npz", allow_pickle=False) as z:
        np.testing.assert_array_equal(z["f_hz"], np.arange(5.0))
    doc = json.loads((d / "analysis.json").read_text())
    assert doc["analysis"]["state"] == "alert" and doc["fs_hz"] == 25600.0
    info = st.list_snapshots()[0]
    assert info.t_utc_s == pytest.approx(T0 + 0.25) and info.reason == "state_change"
    assert _snap(st, T0 + 0.25, "state_change").endswith("state_change-2")  # same ms: unique
    assert st.add_feedback(sid, {"found": "loose foot"}) == "feedback-1.json"
    assert st.snapshot_file(sid, "feedback-1.json") is not None


def test_nan_in_analysis_becomes_null(tmp_path):
    st = Store(tmp_path)
    sid = _snap(st, T0)
    doc = json.loads(st.snapshot_file(sid, "analysis.json").read_text())
    assert doc["analysis"]["nan_value"] is None


@pytest.mark.parametrize("bad", ["../trend.sqlite", "/etc/passwd", "..", "",
                                 "20261202T000000000Z-scheduled/../../x",
                                 "20261202T000000000Z-Scheduled", 42, None,
                                 "20261202T000000001Z-scheduled"])  # well-formed, absent
def test_snapshot_ids_never_paths(tmp_path, bad):
    st = Store(tmp_path)
    sid = _snap(st, T0)
    assert st.resolve(bad) is None
    assert st.snapshot_file(bad, "analysis.json") is None
    assert st.snapshot_file(sid, "../../trend.sqlite") is None
    assert st.snapshot_file(sid, "waveform.wav") is not None


def test_retention_keeps_pinned(tmp_path):
    st = Store(tmp_path, max_count=3)
    ids = [_snap(st, T0 + 60 * i) for i in range(6)]
    st.pin(ids[0], "alarm-1")
    deleted = st.prune()
    assert deleted == ids[1:4]
    assert [s.snapshot_id for s in st.list_snapshots()] == [ids[0]] + ids[4:]
    st.unpin_alarm("alarm-1")
    _snap(st, T0 + 600)
    assert st.prune() == [ids[0]]  # the alarm closed: oldest goes first again
    # by bytes: each snapshot is the same size
    size = st.list_snapshots()[0].size_bytes
    st2 = Store(tmp_path / "b", max_bytes=int(2.5 * size))
    ids2 = [_snap(st2, T0 + i) for i in range(4)]
    assert st2.prune() == ids2[:2]


def test_leftover_tmp_removed_on_open(tmp_path):
    st = Store(tmp_path)
    (tmp_path / "snapshots" / ".tmp-20261202T000000000Z-x").mkdir()
    st.close()
    Store(tmp_path)
    assert not list((tmp_path / "snapshots").glob(".tmp-*"))


def test_trend_downsampling(tmp_path):
    st = Store(tmp_path, raw_keep_s=14 * 86400, hourly_keep_s=400 * 86400)
    now = T0
    old = now - 20 * 86400  # older than 14 days: folded into hourly rows
    old_hour = old - old % 3600
    vals = []
    for i in range(120):  # one capture a minute for two hours
        v = 1.0 + 0.01 * i
        vals.append(v)
        st.add_trend(old_hour + 60 * i, "normal", 24.5, {"vel_rms_mm_s": v})
    st.add_trend(now - 3600, "alert", 24.6, {"vel_rms_mm_s": 7.0})  # recent: kept raw
    st.add_trend(now - 500 * 86400, "normal", 24.0, {"vel_rms_mm_s": 1.0})
    folded, gone = st.downsample(now)
    assert folded == 121
    rows = st.trend()
    hourly = [r for r in rows if r.level == 1]
    # the 500-day-old capture became an hourly row and was then deleted as too old
    assert gone == 1 and len(hourly) == 2
    assert [r.n for r in hourly] == [60, 60]
    # mean and max per hour, checked with numpy
    assert hourly[0].features["vel_rms_mm_s"] == pytest.approx(np.mean(vals[:60]))
    assert hourly[1].features_max["vel_rms_mm_s"] == pytest.approx(np.max(vals[60:]))
    raw = [r for r in rows if r.level == 0]
    assert len(raw) == 1 and raw[0].state == "alert"


def test_bad_snapshot_arguments(tmp_path):
    st = Store(tmp_path)
    with pytest.raises(ValueError, match="reason"):
        _snap(st, T0, reason="../evil")
    with pytest.raises(ValueError, match="integer sample rate"):
        st.save_snapshot(t_utc_s=T0, reason="x", waveform_ms2=np.zeros(8), fs_hz=100.5,
                         spectra={}, analysis={})
    with pytest.raises(ValueError, match="identifier"):
        st.save_snapshot(t_utc_s=T0, reason="x", waveform_ms2=np.zeros(8), fs_hz=100,
                         spectra={"../a": np.zeros(2)}, analysis={})


@pytest.fixture
def small_disk(tmp_path):
    """A 1 MiB tmpfs (needs root / CAP_SYS_ADMIN; skipped otherwise)."""
    mnt = tmp_path / "disk"
    mnt.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1m", "tmpfs", str(mnt)],
                       capture_output=True)
    if r.returncode != 0:
        pytest.skip("cannot mount a small tmpfs here (needs root): " + r.stderr.decode()[:80])
    yield mnt
    subprocess.run(["umount", "-l", str(mnt)], check=False)


def test_disk_full_raises_and_corrupts_nothing(small_disk):
    st = Store(small_disk / "state")
    first = _snap(st, T0)
    before = _digest(small_disk / "state" / "snapshots" / first)
    filler = small_disk / "filler"
    with open(filler, "wb", buffering=0) as fh:  # eat the rest of the disk
        try:
            while True:
                fh.write(b"\0" * 65536)
        except OSError:
            pass
    with pytest.raises(StoreError, match="disk full"):
        _snap(st, T0 + 60, n=100_000)
    assert st.errors == 1 and "disk full" in st.last_error
    assert [s.snapshot_id for s in st.list_snapshots()] == [first]
    assert not list((small_disk / "state" / "snapshots").glob(".tmp-*"))
    assert _digest(small_disk / "state" / "snapshots" / first) == before
    with pytest.raises(StoreError):
        st.add_feedback(first, {"found": "x" * 200_000})
    assert _digest(small_disk / "state" / "snapshots" / first) == before
    filler.unlink()  # space again: the store carries on
    assert _snap(st, T0 + 120) in [s.snapshot_id for s in st.list_snapshots()]
