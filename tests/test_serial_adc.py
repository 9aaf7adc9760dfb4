"""Serial ADC source over pyserial's loop:// and over a real pty pair made by socat."""

from __future__ import annotations

import json
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from agent.errors import SourceStalled, SourceUnavailable
from agent.model import STANDARD_GRAVITY_MS2
from agent.sources import SOURCES, source_class
from agent.sources.recovery import backoff_delays, reopen_with_backoff
from agent.sources.serial_adc import SerialSource
from agent.sources.serial_frames import FMT_INT24, encode_frame

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(Path(__file__).resolve().parent))
import adc_writer  # noqa: E402


def test_registry_names_the_hardware_sources():
    assert SOURCES["serial"] == ("agent.sources.serial_adc", "SerialSource")
    assert SOURCES["soundcard"] == ("agent.sources.soundcard", "SoundCardSource")
    assert source_class("serial") is SerialSource


def _loop_source(**kw) -> SerialSource:
    args = dict(fs_hz=1000.0, n_samples=100, channels=2, full_scale_v=2.5, sensitivity_mv_per_g=100.0)
    args.update(kw)
    src = SerialSource("loop://", **args)
    src.open()
    return src


def test_loop_binary_captures_calibrated_and_gap_flagged():
    src = _loop_source()
    rng = np.random.default_rng(1)
    blocks = [rng.integers(-20000, 20000, (25, 2)) for _ in range(12)]
    for seq, b in enumerate(blocks):
        if seq == 6:  # lost on the wire: falls in the 2nd capture
            continue
        src._ser.write(encode_frame(seq, b))
    c1 = src.read(1.0)
    c2 = src.read(1.0)
    # int16 count → volts: 2.5 V / 32768; 100 mV/g; g_n = 9.80665 m/s² (ISO 80000-3)
    ms2_per_count = 2.5 / 32768 * 1000.0 / 100.0 * STANDARD_GRAVITY_MS2
    want = np.concatenate(blocks[:4])
    np.testing.assert_allclose(c1[0].accel_ms2, want[:, 0] * ms2_per_count, rtol=1e-15)
    np.testing.assert_allclose(c1[1].accel_ms2, want[:, 1] * ms2_per_count, rtol=1e-15)
    assert [c.channel for c in c1] == ["ch0", "ch1"]
    assert c1[0].flags == frozenset() and c2[0].flags == frozenset({"gap"})
    assert c1[0].full_scale_ms2 == pytest.approx(2.5 * 10 * STANDARD_GRAVITY_MS2)
    assert (c1[0].seq, c2[0].seq) == (0, 1)
    assert src.describe()["lost_frames"] == 1
    src.close()
    src.close()


def test_loop_int24_and_rails_flag_clipping():
    src = _loop_source(channels=1, n_samples=4, sample_format=FMT_INT24)
    src._ser.write(encode_frame(0, np.array([0, 8388607, -5, 3]), FMT_INT24))
    (cap,) = src.read(1.0)
    assert "clipped_at_source" in cap.flags
    assert cap.accel_ms2[1] == pytest.approx(8388607 / 8388608 * 2.5 * 10 * STANDARD_GRAVITY_MS2)


def test_loop_text_mode_and_dc_coupled_bias():
    # DC-coupled board: counts ride on the bias; 1000 counts of 32768 × 2.5 V = 76.3 mV mean
    src = _loop_source(mode="text", channels=1, n_samples=6, dc_coupled=True, text_full_scale_counts=32768)
    src._ser.write(b"1000\n1010\nbad line\n990\n1000\n1010\n990\n")
    (cap,) = src.read(1.0)
    assert cap.bias_v == pytest.approx(1000 * 2.5 / 32768)
    assert cap.full_scale_ms2 is None
    np.testing.assert_allclose(cap.accel_ms2[:2], np.array([0, 10]) * 2.5 / 32768 * 10 * STANDARD_GRAVITY_MS2,
                               atol=1e-12)
    assert src.parser.bad_lines == 1


def test_loop_stall_raises_source_stalled():
    src = _loop_source()
    t = time.monotonic()
    with pytest.raises(SourceStalled, match="no samples"):
        src.read(0.3)
    assert 0.25 < time.monotonic() - t < 2.0


def test_bad_port_is_unavailable_and_backoff_gives_up():
    src = SerialSource("/nonexistent/ttyUSB9", fs_hz=1000, n_samples=10)
    with pytest.raises(SourceUnavailable, match="ttyUSB9"):
        src.open()
    waits = []
    with pytest.raises(SourceUnavailable):
        reopen_with_backoff(src, initial_s=0.5, max_s=2.0, max_attempts=5, sleep=waits.append)
    assert waits == [0.5, 1.0, 2.0, 2.0]
    with pytest.raises(ValueError, match="empty"):
        SerialSource("", fs_hz=1000, n_samples=10)


def test_backoff_sequence():
    gen = backoff_delays(0.25, 3.0)
    assert [next(gen) for _ in range(6)] == [0.25, 0.5, 1.0, 2.0, 3.0, 3.0]


# ── a real pty pair: socat + a writer process at the real rate ──


def _start_socat(d: Path) -> subprocess.Popen:
    a, b = d / "ttyA", d / "ttyB"
    for p in (a, b):
        if p.is_symlink():
            p.unlink()
    proc = subprocess.Popen(
        ["socat", f"pty,raw,echo=0,link={a}", f"pty,raw,echo=0,link={b}"],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )
    deadline = time.monotonic() + 5
    while not (a.exists() and b.exists()):
        assert time.monotonic() < deadline, "socat did not create the pty pair"
        time.sleep(0.01)
    return proc


@pytest.mark.slow
def test_pty_stream_with_faults_and_unplug(tmp_path):
    if shutil.which("socat") is None:
        pytest.skip("needs the Debian package socat")
    socat = _start_socat(tmp_path)
    fs, n_cap = adc_writer.FS_HZ, 800  # captures of 0.1 s = 10 frames
    ms2_per_count = 2.5 / 32768 * 1000.0 / 100.0 * STANDARD_GRAVITY_MS2
    src = SerialSource(str(tmp_path / "ttyB"), fs_hz=fs, n_samples=n_cap, channels=2, full_scale_v=2.5,
                       sensitivity_mv_per_g=100.0, baud=921600)
    src.open()
    log = tmp_path / "writer.json"
    writer = subprocess.Popen([sys.executable, str(ROOT / "tests" / "adc_writer.py"), str(tmp_path / "ttyA"),
                               str(log)])
    caps = []
    errors = {"unavailable": 0, "stalled": 0}
    t0 = time.monotonic()
    plug = {"socat": socat}

    def unplug_and_replug():  # the outside world: USB cable out for 0.6 s, then back
        time.sleep(1.5)
        plug["socat"].send_signal(signal.SIGTERM)
        plug["socat"].wait(5)
        plug["killed_at"] = time.time()
        time.sleep(0.6)
        plug["socat"] = _start_socat(tmp_path)

    hand = threading.Thread(target=unplug_and_replug)
    hand.start()
    try:
        while writer.poll() is None or src.parser.pending_bytes:
            try:
                caps.append(src.read(0.5))
            except SourceUnavailable:
                errors["unavailable"] += 1
                reopen_with_backoff(src, initial_s=0.05, max_s=0.2, max_attempts=100)
                plug["reopened_at"] = time.time()
            except SourceStalled:
                errors["stalled"] += 1
                if writer.poll() is not None:
                    break
            assert time.monotonic() - t0 < 30
    finally:
        hand.join(10)
        writer.wait(10)
        src.close()
        plug["socat"].terminate()
        plug["socat"].wait(5)
    killed_at, reopened_at = plug["killed_at"], plug["reopened_at"]
    wlog = json.loads(log.read_text())
    assert errors["unavailable"] >= 1, "the unplug was not seen"

    # identify every frame-sized chunk of every capture by its exact samples
    lookup = {adc_writer.frame_samples(s).tobytes(): s for s in range(adc_writer.FRAMES + 100)}
    received = []
    for pair in caps:
        counts = np.column_stack([c.accel_ms2 / ms2_per_count for c in pair])
        assert np.max(np.abs(counts - np.round(counts))) < 1e-9
        counts = np.round(counts).astype(np.int64)
        seqs = []
        for k in range(0, n_cap, adc_writer.N):
            chunk = counts[k : k + adc_writer.N]
            seq = lookup.get(chunk.tobytes())
            assert seq is not None, "a chunk of a capture is not an intact frame (not bit-exact)"
            seqs.append(seq)
        contiguous = all(b == a + 1 for a, b in zip(seqs, seqs[1:]))
        assert ("gap" in pair[0].flags) == (not contiguous), (seqs, pair[0].flags)
        received += seqs
    assert received == sorted(received) and len(set(received)) == len(received)
    bad = set(wlog["bad"])
    assert not bad & set(received), "a corrupted, truncated or skipped frame was delivered"
    # every frame between the first and the last good one is either delivered or counted lost
    p = src.parser
    first = received[0]
    assert p.frames + p.lost_frames == p.last_seq - first + 1
    assert p.crc_errors >= 3 and p.gaps >= 4
    # frames written intact while the port was up arrive, except those in flight at the unplug
    # and those written before the reader reopened (opening a port flushes its input buffer)
    missing_ok = [s for s in wlog["ok"] if s not in received and s <= received[-1]]
    near_unplug = [s for s in missing_ok if killed_at - 0.3 < wlog["t"][str(s)] < reopened_at + 0.05]
    assert missing_ok == near_unplug, missing_ok
    print(
        f"\npty run: {len(caps)} captures, frames ok={p.frames} lost={p.lost_frames} gaps={p.gaps} "
        f"crc_errors={p.crc_errors} bad_headers={p.bad_headers} resync_bytes={p.resync_bytes} "
        f"writer lost while unplugged={len(wlog['lost'])} intact-but-in-flight={len(missing_ok)} "
        f"unavailable={errors['unavailable']} stalled={errors['stalled']} opens={src.opens}"
    )


def test_serial_from_config_and_validation():
    from agent.config import parse_config
    from agent.errors import ConfigError
    from agent.sources import build_source

    cfg = parse_config({
        "source": {"kind": "serial", "fs_hz": 1000.0, "capture_s": 0.25,
                   "serial": {"port": "loop://", "channels": 2, "sample_format": "int24",
                              "channel_names": ["motor NDE", "motor DE"], "full_scale_v": 5.0}},
        "sensor": {"sensitivity_mv_per_g": 10.0},
    })
    src = build_source(cfg)
    assert isinstance(src, SerialSource) and src.channel_names == ("motor NDE", "motor DE")
    # int24: 8388608 counts = 5 V; 10 mV/g → 500 g full scale
    assert src.calibration.full_scale_ms2 == pytest.approx(500 * STANDARD_GRAVITY_MS2)
    src.open()
    # (loop:// holds at most 4096 bytes: keep what is written small)
    src._ser.write(encode_frame(0, np.full((250, 2), 8388), FMT_INT24))
    caps = src.read(1.0)
    assert caps[0].accel_ms2[0] == pytest.approx(8388 / 8388608 * 500 * STANDARD_GRAVITY_MS2)
    with pytest.raises(ConfigError) as err:
        parse_config({"source": {"kind": "serial",
                                 "serial": {"port": "x", "channels": 9, "mode": "ascii", "max_frame_samples": 0}}})
    text = str(err.value)
    assert "source.serial.channels" in text and "source.serial.mode" in text
    assert "source.serial.max_frame_samples" in text


def test_pause_between_reads_starts_a_fresh_capture():
    # the daemon reads once per interval: what piles up meanwhile is stale, not a gap
    clock = {"t": 1000.0 - time.monotonic()}
    src = _loop_source(channels=1, n_samples=50, clock=lambda: clock["t"] + time.monotonic())
    blocks = [np.full(25, k) for k in range(10)]
    for seq in range(3):
        src._ser.write(encode_frame(seq, blocks[seq]))
    (c1,) = src.read(1.0)
    src._ser.write(encode_frame(3, blocks[3]))  # stale: arrived while nobody read
    clock["t"] += 60.0  # a minute later; frames 4..6 were lost in an overflowing buffer
    later = encode_frame(7, blocks[7]) + encode_frame(8, blocks[8])
    threading.Timer(0.1, src._ser.write, args=(later,)).start()
    t_read = clock["t"] + time.monotonic()
    (c2,) = src.read(2.0)
    assert c1.flags == c2.flags == frozenset()
    assert src.flushes == 1 and src.parser.lost_frames == 0
    assert np.unique(c2.accel_ms2 / src.calibration.ms2_per_count).tolist() == [7, 8]
    assert t_read < c2.t0_utc_s + 50 / 1000.0 < t_read + 1.0


@pytest.mark.slow
def test_daemon_runs_on_the_serial_source(tmp_path):
    """`skidvib run` with source.kind = "serial" against a pty fed at the real rate."""
    if shutil.which("socat") is None:
        pytest.skip("needs the Debian package socat")
    socat = _start_socat(tmp_path)
    cfg = tmp_path / "agent.toml"
    cfg.write_text(
        '[asset]\ntag = "T-1"\n'
        '[source]\nkind = "serial"\nfs_hz = 8000.0\ncapture_s = 1.0\ninterval_s = 1.0\nchannel = "pump DE"\n'
        f'[source.serial]\nport = "{tmp_path / "ttyB"}"\nchannels = 2\nfull_scale_v = 2.5\nstall_timeout_s = 3.0\n'
        '[store]\nstate_dir = "state"\n'
    )
    writer = subprocess.Popen([sys.executable, str(ROOT / "tests" / "adc_writer.py"), "--clean",
                               str(tmp_path / "ttyA"), "20"])
    try:
        res = subprocess.run([sys.executable, "-m", "agent", "run", "-c", str(cfg), "--no-mqtt",
                              "--max-captures", "3"], cwd=ROOT, capture_output=True, text=True, timeout=60)
    finally:
        writer.kill()
        writer.wait(5)
        socat.terminate()
        socat.wait(5)
    assert res.returncode == 0, res.stderr[-3000:]
    captures = [ln for ln in res.stderr.splitlines() if "event=capture " in ln]
    assert len(captures) == 3, res.stderr[-3000:]
    assert "event=source_open" in res.stderr and "kind=serial" in res.stderr
    assert not any("sensor_fault" in ln for ln in captures), res.stderr[-3000:]
