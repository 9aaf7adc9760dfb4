"""Baseline learning, robust statistics, and the baseline file (atomic, versioned)."""

from __future__ import annotations

import json
import math
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
from scipy import stats as sps

from agent.baseline import (
    FORMAT_VERSION,
    LEARNING,
    READY,
    BaselineConfig,
    Baselines,
    BaselineStore,
    from_log,
    learn,
    relearn,
    reservoir_add,
    robust_stats,
    to_log,
)
from agent.errors import IncompatibleStateFile, StoreError
from agent.featureset import FeatureVector

ROOT = Path(__file__).resolve().parents[1]


def fv(**kw) -> FeatureVector:
    return FeatureVector(kw)


def lognormal_run(n, seed, sigma=0.05, t0=1.7e9, dt=600.0):
    rng = np.random.default_rng(seed)
    return [
        (t0 + i * dt, fv(vel_rms_mm_s=1.4 * math.exp(rng.normal(0, sigma)),
                         acc_rms_g=0.06 * math.exp(rng.normal(0, sigma)),
                         floor_hf_db=-63.0 + rng.normal(0, 0.5)))
        for i in range(n)
    ]


# ---------------------------------------------------------------- statistics

def test_robust_stats_match_numpy_and_scipy():
    rng = np.random.default_rng(3)
    x = np.exp(rng.normal(np.log(2.0), 0.1, 500))
    st = robust_stats("vel_rms_mm_s", x)
    assert st.median == pytest.approx(np.median(x))
    # scipy.stats.median_abs_deviation(scale="normal") is MAD/Φ⁻¹(3/4) = 1.4826·MAD
    assert st.spread_log == pytest.approx(sps.median_abs_deviation(np.log(x), scale="normal"), rel=1e-4)
    assert st.p05 == pytest.approx(np.percentile(x, 5)) and st.p95 == pytest.approx(np.percentile(x, 95))
    # a log-normal sample with σ = 0.1: the MAD-based spread estimates σ (sampling error ~ 0.1·1.17/√500 ≈ 5 %)
    assert st.spread_log == pytest.approx(0.1, rel=0.15)


def test_decibel_features_use_the_amplitude_log_scale():
    # +6.0206 dB is a doubling in amplitude (20·log10 2): on the log scale both are ln 2
    assert to_log("floor_hf_db", 20 * math.log10(2)) == pytest.approx(math.log(2))
    assert to_log("acc_rms_g", 2.0) == pytest.approx(math.log(2))
    assert from_log("floor_hf_db", to_log("floor_hf_db", -63.2)) == pytest.approx(-63.2)


def test_reservoir_is_bounded_uniform_and_deterministic():
    size = 256
    res = ()
    for i in range(20000):
        res = reservoir_add(res, i, float(i), size, "x")
    assert len(res) == size
    again = ()
    for i in range(20000):
        again = reservoir_add(again, i, float(i), size, "x")
    assert res == again  # deterministic: no clock, no global random state
    # uniform over 0..19999: mean 9999.5, sd of the mean of 256 draws ≈ 5773/16 = 361
    assert abs(np.mean(res) - 9999.5) < 4 * 361
    counts, _ = np.histogram(res, bins=4, range=(0, 20000))
    assert counts.min() > 40  # every quarter of the stream is represented (expected 64 each)


# ---------------------------------------------------------------- learning

def test_state_is_learning_until_n_captures_then_ready():
    cfg = BaselineConfig(learn_captures=50)
    b = Baselines()
    assert b.status("speed0") == LEARNING
    for i, (t, v) in enumerate(lognormal_run(50, 1)):
        assert b.status("speed0") == LEARNING
        b = learn(b, "speed0", v, t, cfg, label="any rpm")
    sb = b.get("speed0")
    assert sb.ready and sb.status == READY and sb.n_captures == 50
    assert sb.samples == {}  # the reservoir is dropped once the statistics are frozen
    assert set(sb.stats) == {"vel_rms_mm_s", "acc_rms_g", "floor_hf_db"}
    assert sb.stats["vel_rms_mm_s"].median == pytest.approx(1.4, rel=0.05)
    # a ready baseline does not move any more
    assert learn(b, "speed0", fv(vel_rms_mm_s=99.0), 2e9, cfg) is b
    assert b.status("speed1") == LEARNING  # other operating states learn on their own


def test_learn_hours_also_required():
    cfg = BaselineConfig(learn_captures=20, learn_hours=10.0)
    b = Baselines()
    run = lognormal_run(70, 2, dt=600.0)  # 10 h span reached at capture 61
    for i, (t, v) in enumerate(run):
        b = learn(b, "speed0", v, t, cfg)
        if (t - run[0][0]) < 10 * 3600:
            assert not b.get("speed0").ready, i
    assert b.get("speed0").ready
    assert b.get("speed0").n_captures == 61


def test_rare_feature_gets_no_statistics():
    cfg = BaselineConfig(learn_captures=20)
    b = Baselines()
    for i, (t, v) in enumerate(lognormal_run(20, 4)):
        if i < 3:
            v = v.replace(bpfo_de_g=0.001)
        b = learn(b, "speed0", v, t, cfg)
    assert "bpfo_de_g" not in b.get("speed0").stats


def test_learn_rejects_missing_key():
    with pytest.raises(ValueError, match="operating-state key"):
        learn(Baselines(), "", fv(vel_rms_mm_s=1.0), 0.0, BaselineConfig())


@pytest.mark.parametrize("kw", [{"learn_captures": 2}, {"learn_hours": -1.0}, {"reservoir_size": 4},
                                {"min_feature_fraction": 0.0}])
def test_config_validation(kw):
    with pytest.raises(ValueError):
        BaselineConfig(**kw)


# ---------------------------------------------------------------- file

def ready_baselines(n=40, seed=5) -> Baselines:
    b = Baselines()
    cfg = BaselineConfig(learn_captures=n)
    for t, v in lognormal_run(n, seed):
        b = learn(b, "speed0", v, t, cfg)
    for t, v in lognormal_run(n // 2, seed + 1):
        b = learn(b, "speed1", v, t, cfg)  # still learning: samples are stored too
    return b


def test_json_round_trip_is_exact(tmp_path):
    b = ready_baselines()
    store = BaselineStore(tmp_path)
    store.save(b)
    back = store.load_strict()
    assert back == b
    assert back.get("speed1").samples == b.get("speed1").samples
    doc = json.loads(store.path.read_text())
    assert doc["format"] == "skidvib-baseline" and doc["version"] == FORMAT_VERSION
    store.save(back)
    assert store.path.read_bytes() == store.path.read_bytes()  # same content → same bytes


def test_no_file_is_learning(tmp_path):
    b, problem = BaselineStore(tmp_path / "state").load()
    assert b == Baselines() and problem is None


def test_version_mismatch_reported_and_set_aside(tmp_path):
    store = BaselineStore(tmp_path)
    store.save(ready_baselines())
    doc = json.loads(store.path.read_text())
    doc["version"] = 99
    store.path.write_text(json.dumps(doc))
    with pytest.raises(IncompatibleStateFile, match=r"version 99; this agent reads version 1"):
        store.load_strict()
    b, problem = store.load()
    assert b == Baselines()  # learning restarts
    assert "version 99" in problem and "set aside as baseline.json.bad1" in problem
    assert (tmp_path / "baseline.json.bad1").exists() and not store.path.exists()


@pytest.mark.parametrize("content", [b"{\"format\": \"skidvib-baseline\", \"vers", b"\x00\xff\x00",
                                     b"[1, 2]", b'{"format": "skidvib-baseline", "version": 1, "states": 3}',
                                     b'{"format": "something-else", "version": 1}'])
def test_damaged_file_never_crashes(tmp_path, content):
    store = BaselineStore(tmp_path)
    store.path.write_bytes(content)
    with pytest.raises(IncompatibleStateFile, match=str(store.path).replace("\\", "\\\\")[-20:]):
        store.load_strict()
    b, problem = store.load()
    assert b == Baselines() and "learning restarts" in problem


def test_unwritable_state_dir_is_store_error(tmp_path):
    blocker = tmp_path / "state"
    blocker.write_text("a file where the state directory should be")
    with pytest.raises(StoreError, match="cannot write"):
        BaselineStore(blocker).save(Baselines())


def test_relearn_archives_the_old_baseline(tmp_path):
    store = BaselineStore(tmp_path)
    b = ready_baselines()
    store.save(b)
    old_bytes = store.path.read_bytes()
    new = store.relearn(b, t_utc_s=1.7e9)
    archived = list((tmp_path / "archive").iterdir())
    assert len(archived) == 1 and archived[0].read_bytes() == old_bytes
    assert archived[0].name == "baseline-20231114T221320Z-g0.json"  # 1.7e9 s = 2023-11-14 22:13:20 UTC
    assert new.generation == 1 and new.states == {}
    assert store.load_strict() == new
    # relearn of one state keeps the others
    one = relearn(b, "speed1")
    assert set(one.states) == {"speed0"}


_WRITER = textwrap.dedent(
    """
    import sys
    from agent.baseline import Baselines, StateBaseline, BaselineStore, to_bytes
    from agent.statefile import write_atomic
    store = BaselineStore(sys.argv[1])

    def blob(gen):
        # 40 features x 2000 samples, about 0.7 MB, so that most of the loop is spent writing
        samples = {f"f{j}_mm_s": tuple(float(gen * 1000 + j) + k / 8 for k in range(2000)) for j in range(40)}
        sb = StateBaseline(key="speed0", n_captures=gen, seen={k: gen for k in samples}, samples=samples)
        return to_bytes(Baselines(states={"speed0": sb}, generation=gen))

    blobs = [blob(g) for g in (1, 2)]  # BaselineStore.save() is write_atomic(path, to_bytes(b))
    store.save(Baselines(generation=0))
    print("first", flush=True)
    i = 0
    while True:
        write_atomic(store.path, blobs[i % 2])
        i += 1
    """
)


def test_baseline_file_survives_kill_9_during_write(tmp_path):
    """A writer saving in a loop is SIGKILLed at random (seeded) moments: the file is old or new, never torn."""
    rng = np.random.default_rng(20261202)
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    generations = []
    killed_mid_write = 0
    for trial in range(60):  # at least 10 kills, more until 3 have landed mid-write (timing varies)
        if trial >= 10 and killed_mid_write >= 3:
            break
        proc = subprocess.Popen([sys.executable, "-c", _WRITER, str(tmp_path)], stdout=subprocess.PIPE, env=env)
        try:
            assert proc.stdout.readline().strip() == b"first"
            time.sleep(float(rng.uniform(0.0, 0.2)))
            os.kill(proc.pid, signal.SIGKILL)
        finally:
            proc.wait(timeout=30)
        assert proc.returncode == -signal.SIGKILL
        b = BaselineStore(tmp_path).load_strict()  # must parse: old or new, never corrupt
        sb = b.get("speed0")
        if b.generation == 0:
            assert sb is None
        else:
            assert sb.n_captures == b.generation
            for name, s in sb.samples.items():  # every value belongs to the same generation
                j = int(name[1:].split("_")[0])
                assert s[0] == b.generation * 1000 + j and len(s) == 2000
        generations.append(b.generation)
        leftovers = list(tmp_path.glob(".tmp-baseline.json"))
        killed_mid_write += bool(leftovers)
        for p in leftovers:
            p.unlink()
    assert killed_mid_write >= 3  # the kill did land during writes (a temporary file was left behind)
    assert len(set(generations)) > 1  # kills landed at different points of the write cycle
