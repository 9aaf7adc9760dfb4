"""Reading recordings: every format, units, sidecars and clear errors for bad files."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.io import savemat, wavfile

from agent.errors import InputError
from agent.model import STANDARD_GRAVITY_MS2
from agent.recordings import read_recording, write_wav_with_sidecar
from tests.conftest import tone

FS = 8192.0
N = 8192


def sig():
    return tone(FS, 100.0, 0.5, N)


def test_wav_int16_int32_float32(tmp_path):
    x = sig() / 2  # within ±1
    for dtype, scale in ((np.int16, 32767), (np.int32, 2**31 - 1), (np.float32, 1.0)):
        p = tmp_path / f"x_{np.dtype(dtype).name}.wav"
        wavfile.write(p, int(FS), (x * scale).astype(dtype))
        rec = read_recording(p, units="m/s2")
        assert rec.fs_hz == FS
        np.testing.assert_allclose(rec.accel_ms2, x, atol=1e-4)


def test_wav_24bit(tmp_path):
    # 24-bit PCM: scipy returns it left-justified in int32, so the full-scale fraction is kept.
    x = sig() / 2
    ints = np.round(x * (2**23 - 1)).astype(np.int32)
    raw = b"".join(int(v).to_bytes(4, "little", signed=True)[:3] for v in ints)
    p = tmp_path / "x24.wav"
    import struct
    fmt = struct.pack("<HHIIHH", 1, 1, int(FS), int(FS) * 3, 3, 24)
    body = b"WAVE" + b"fmt " + struct.pack("<I", len(fmt)) + fmt + b"data" + struct.pack("<I", len(raw)) + raw
    p.write_bytes(b"RIFF" + struct.pack("<I", len(body)) + body)
    rec = read_recording(p, units="g")
    np.testing.assert_allclose(rec.accel_ms2, x * STANDARD_GRAVITY_MS2, atol=1e-5)


def test_sidecar_gives_fs_units_and_time(tmp_path):
    p = tmp_path / "cap.wav"
    write_wav_with_sidecar(p, sig(), FS, {"channel": "pump DE", "start_utc": "2026-01-05T10:00:00Z"})
    rec = read_recording(p)
    assert rec.units_in_file == "m/s2" and rec.channel == "pump DE"
    assert rec.t0_utc_s == pytest.approx(1767607200.0)


def test_csv_one_column_and_time_value(tmp_path):
    x = sig()
    p1 = tmp_path / "one.csv"
    p1.write_text("\n".join(f"{v:.9f}" for v in x))
    rec = read_recording(p1, fs_hz=FS, units="g")
    np.testing.assert_allclose(rec.accel_ms2, x * STANDARD_GRAVITY_MS2, rtol=1e-6, atol=1e-8)
    p2 = tmp_path / "tv.csv"
    t = np.arange(N) / FS
    p2.write_text("time_s,accel_g\n" + "\n".join(f"{a:.9f},{b:.9f}" for a, b in zip(t, x)))
    rec = read_recording(p2, units="g")
    assert rec.fs_hz == pytest.approx(FS, rel=1e-6)
    assert rec.channel == "accel_g"


def test_npy_npz_and_mat_with_struct(tmp_path):
    x = sig()
    np.save(tmp_path / "a.npy", x)
    assert read_recording(tmp_path / "a.npy", fs_hz=FS, units="m/s2").n_samples == N
    np.savez(tmp_path / "b.npz", accel=x, fs_hz=np.array(FS))
    assert read_recording(tmp_path / "b.npz", units="m/s2").fs_hz == FS
    savemat(tmp_path / "c.mat", {"run": {"de": x, "fe": x * 2}, "RPM": 1797.0})
    rec = read_recording(tmp_path / "c.mat", channel="run.fe", fs_hz=FS, units="g")
    np.testing.assert_allclose(rec.accel_ms2, 2 * x * STANDARD_GRAVITY_MS2)
    with pytest.raises(InputError, match="choose one with --channel"):
        read_recording(tmp_path / "c.mat", fs_hz=FS, units="g")


def test_velocity_units_are_differentiated(tmp_path):
    # a 50 Hz velocity of 10 mm/s amplitude is an acceleration of 2π·50·0.010 m/s² amplitude
    t = np.arange(N) / FS
    v = 10.0 * np.sin(2 * np.pi * 50.0 * t)
    np.save(tmp_path / "v.npy", v)
    rec = read_recording(tmp_path / "v.npy", fs_hz=FS, units="mm/s")
    assert np.max(np.abs(rec.accel_ms2)) == pytest.approx(2 * np.pi * 50 * 0.010, rel=1e-3)


def test_volts_need_sensitivity(tmp_path):
    np.save(tmp_path / "v.npy", np.ones(128) * 0.1)
    with pytest.raises(InputError, match="sensitivity"):
        read_recording(tmp_path / "v.npy", fs_hz=FS, units="V")
    rec = read_recording(tmp_path / "v.npy", fs_hz=FS, units="V", sensitivity_mv_per_g=100.0)
    assert rec.accel_ms2[0] == pytest.approx(STANDARD_GRAVITY_MS2)  # 0.1 V at 100 mV/g = 1 g


@pytest.mark.parametrize(
    "name,content,match",
    [
        ("empty.wav", b"", "empty"),
        ("trunc.wav", b"RIFF\x24\x00\x00\x00WAVEfmt ", "not a readable WAV"),
        ("text.wav", b"hello world, not audio", "not a readable WAV"),
        ("bad.npy", b"\x93NUMPY garbage", "not a readable .npy"),
        ("bad.mat", b"MATLAB 5.0 MAT-file garbage" + b"\x00" * 200, "not a readable .mat"),
        ("bad.csv", b"1.0\n2.0\nabc\n", "row 3: not a number"),
        ("ragged.csv", b"1,2\n3,4\n5\n", "different numbers of columns"),
        ("x.xyz", b"\x00\x01\x02\xff\xfe", "unknown binary format"),
    ],
)
def test_bad_files_give_clear_errors(tmp_path, name, content, match):
    p = tmp_path / name
    p.write_bytes(content)
    with pytest.raises(InputError, match=match) as info:
        read_recording(p, fs_hz=FS, units="g")
    assert name in str(info.value)


def test_nan_and_short_and_missing_facts(tmp_path):
    x = sig()
    x[10] = np.nan
    np.save(tmp_path / "nan.npy", x)
    with pytest.raises(InputError, match="1 of 8192 samples are NaN"):
        read_recording(tmp_path / "nan.npy", fs_hz=FS, units="g")
    np.save(tmp_path / "short.npy", np.ones(10))
    with pytest.raises(InputError, match="only 10 samples"):
        read_recording(tmp_path / "short.npy", fs_hz=FS, units="g")
    np.save(tmp_path / "ok.npy", sig())
    with pytest.raises(InputError, match="--fs"):
        read_recording(tmp_path / "ok.npy", units="g")
    with pytest.raises(InputError, match="--units"):
        read_recording(tmp_path / "ok.npy", fs_hz=FS)
    (tmp_path / "ok.json").write_text("{not json")
    with pytest.raises(InputError, match="sidecar is not valid JSON"):
        read_recording(tmp_path / "ok.npy", fs_hz=FS, units="g")
    with pytest.raises(InputError, match="no such file"):
        read_recording(tmp_path / "nope.wav")
    json.dumps({})
