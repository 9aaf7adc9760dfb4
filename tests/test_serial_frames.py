"""Serial ADC frame format: CRC, round trips, resync, counters, property-based fuzzing."""

from __future__ import annotations

import binascii

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from agent.sources.serial_frames import (
    FMT_INT16,
    FMT_INT24,
    SYNC,
    FrameParser,
    TextLineParser,
    crc16_ccitt_false,
    encode_frame,
)


def test_crc_check_value_from_the_crc_catalogue():
    # "Catalogue of parametrised CRC algorithms" (reveng), CRC-16/IBM-3740 a.k.a. CCITT-FALSE:
    # width 16, poly 0x1021, init 0xFFFF, refin/refout false, xorout 0, check 0x29B1
    assert crc16_ccitt_false(b"123456789") == 0x29B1
    assert binascii.crc_hqx(b"123456789", 0xFFFF) == 0x29B1


def test_frame_layout_by_hand():
    # one int16 sample 0x0102 on one channel, seq 0x0304: bytes as docs/serial-frames.md lays out
    fr = encode_frame(0x0304, np.array([0x0102]), FMT_INT16, status=1)
    body = bytes([1, 1, 0x04, 0x03, 1, 1, 1, 0, 0x02, 0x01])
    assert fr == SYNC + body + crc16_ccitt_false(body).to_bytes(2, "little")


def test_int24_sign_extension_round_trip():
    x = np.array([[-8388608, 8388607], [-1, 0], [123456, -654321]])
    (f,) = FrameParser().feed(encode_frame(9, x, FMT_INT24))
    np.testing.assert_array_equal(f.samples, x)
    assert f.channels == 2 and f.n == 3 and f.sample_format == FMT_INT24


def test_encoder_rejects_out_of_range():
    with pytest.raises(ValueError, match="int16"):
        encode_frame(0, np.array([40000]), FMT_INT16)
    with pytest.raises(ValueError, match="channel count"):
        encode_frame(0, np.zeros((4, 9), dtype=int))
    with pytest.raises(ValueError, match="integer"):
        encode_frame(0, np.zeros(4))


def _frames(n_frames, ch=2, n=32, fmt=FMT_INT16, seq0=0):
    rng = np.random.default_rng(seq0 + 1)
    lim = 32768 if fmt == FMT_INT16 else 8388608
    data = [rng.integers(-lim, lim, (n, ch)) for _ in range(n_frames)]
    return data, [encode_frame((seq0 + i) & 0xFFFF, d, fmt) for i, d in enumerate(data)]


def test_stream_with_loss_corruption_and_noise():
    # 50 frames: #10 dropped, #20 one byte flipped, 37 bytes of noise before #30 →
    # 48 recovered, crc_errors=1, gaps=2, lost=2 (the same case as EDGE-FACTS §5)
    data, frames = _frames(50)
    noise = np.random.default_rng(3).integers(0, 256, 37, dtype=np.uint8).tobytes()
    stream = b""
    for i, fr in enumerate(frames):
        if i == 10:
            continue
        if i == 20:
            fr = fr[:30] + bytes([fr[30] ^ 0x40]) + fr[31:]
        if i == 30:
            stream += noise
        stream += fr
    p = FrameParser()
    got = p.feed(stream)
    assert [f.seq for f in got] == [i for i in range(50) if i not in (10, 20)]
    for f in got:
        np.testing.assert_array_equal(f.samples, data[f.seq])
    assert (p.crc_errors, p.gaps, p.lost_frames) == (1, 2, 2)
    assert got[10].lost_before == 1  # frame 11 follows the dropped 10


def test_sequence_wraps_mod_65536():
    _, frames = _frames(4, seq0=65534)  # 65534, 65535, 0, 1
    p = FrameParser()
    got = p.feed(frames[0] + frames[1] + frames[3])
    assert [f.seq for f in got] == [65534, 65535, 1]
    assert (p.gaps, p.lost_frames) == (1, 1)


def test_truncated_frame_then_good_frame():
    _, frames = _frames(3)
    p = FrameParser()
    got = p.feed(frames[0] + frames[1][:25] + frames[2])
    assert [f.seq for f in got] == [0, 2]
    assert p.lost_frames == 1
    assert p.pending_bytes == 0


def test_implausible_header_advances_one_byte():
    _, frames = _frames(1)
    junk = SYNC + bytes([7, 1, 0, 0, 1, 0, 1, 0])  # version 7: not a frame
    p = FrameParser()
    got = p.feed(junk + frames[0])
    assert len(got) == 1 and p.bad_headers == 1
    assert p.resync_bytes == len(junk)


# ── property-based fuzzing ──

frame_specs = st.lists(
    st.tuples(
        st.sampled_from([FMT_INT16, FMT_INT24]),
        st.integers(1, 4),  # channels
        st.integers(1, 64),  # samples per channel
        st.integers(0, 2**31 - 1),  # data seed
    ),
    min_size=1,
    max_size=12,
)


def _build(specs, seq0):
    frames, arrays = [], []
    for i, (fmt, ch, n, seed) in enumerate(specs):
        lim = 32768 if fmt == FMT_INT16 else 8388608
        arr = np.random.default_rng(seed).integers(-lim, lim, (n, ch))
        arrays.append(arr)
        frames.append(encode_frame((seq0 + i) & 0xFFFF, arr, fmt))
    return frames, arrays


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(specs=frame_specs, seq0=st.integers(0, 65535), cuts=st.lists(st.integers(0, 10**6), max_size=20))
def test_round_trip_with_arbitrary_splits(specs, seq0, cuts):
    frames, arrays = _build(specs, seq0)
    stream = b"".join(frames)
    points = sorted({c % (len(stream) + 1) for c in cuts})
    p = FrameParser()
    got = []
    prev = 0
    for c in points + [len(stream)]:
        got += p.feed(stream[prev:c])
        prev = c
    assert len(got) == len(frames)
    for f, arr, i in zip(got, arrays, range(len(frames))):
        assert f.seq == (seq0 + i) & 0xFFFF
        np.testing.assert_array_equal(f.samples, arr)
    assert (p.crc_errors, p.gaps, p.lost_frames, p.resync_bytes) == (0, 0, 0, 0)


@settings(max_examples=300, deadline=None)
@given(blob=st.binary(max_size=4000), cuts=st.lists(st.integers(0, 4000), max_size=10))
def test_random_bytes_never_crash_and_buffer_stays_bounded(blob, cuts):
    p = FrameParser()
    prev = 0
    for c in sorted(set(c % (len(blob) + 1) for c in cuts)) + [len(blob)]:
        for f in p.feed(blob[prev:c]):
            assert 1 <= f.n <= 4096 and 1 <= f.channels <= 8
        prev = c
    # nothing is held back except a possible frame in progress (≤ one maximal frame)
    assert p.pending_bytes <= 10 + 4096 * 8 * 3 + 2
    assert p.resync_bytes + p.pending_bytes <= len(blob)


@settings(max_examples=200, deadline=None)
@given(
    specs=frame_specs,
    noise=st.lists(st.binary(max_size=40), min_size=12, max_size=12),
    drop=st.sets(st.integers(0, 11)),
    flip=st.sets(st.integers(0, 11)),
)
def test_intact_frames_survive_garbage_between_them(specs, noise, drop, flip):
    """Noise between frames, dropped frames and corrupted frames: every intact frame that
    follows clean bytes is recovered bit-exact; counted losses match what was removed."""
    frames, arrays = _build(specs, 0)
    stream = b""
    sent = []
    for i, fr in enumerate(frames):
        # noise must not end in a half sync word or contain a valid frame: strip A5 bytes
        stream += noise[i].replace(b"\xa5", b"\x00")
        if i in drop:
            continue
        if i in flip:
            fr = fr[:-1] + bytes([fr[-1] ^ 0xFF])  # bad CRC
        else:
            sent.append(i)
        stream += fr
    p = FrameParser()
    # a false sync inside a corrupted frame may claim a long frame and make the parser wait;
    # trailing zero bytes (no sync) flush that wait, as the continuing stream does live
    got = p.feed(stream) + p.feed(bytes(10 + 4096 * 8 * 3 + 2))
    assert [f.seq for f in got] == sent
    for f in got:
        np.testing.assert_array_equal(f.samples, arrays[f.seq])
    if sent:
        # losses before the first good frame are invisible; after it every missing one is counted
        assert p.lost_frames == (sent[-1] - sent[0] + 1) - len(sent)
    assert p.crc_errors >= len([i for i in flip if i not in drop and i < len(frames)])


def test_text_lines_multi_channel_and_bad_lines():
    p = TextLineParser()
    rows = p.feed(b"1,2\r\n3, 4\n# comment\n\nx,5\n6 7 8\n9,10")
    np.testing.assert_array_equal(rows, [[1, 2], [3, 4]])
    assert p.bad_lines == 2 and p.channels == 2
    rows = p.feed(b"\n-11,12.5\n")
    np.testing.assert_array_equal(rows, [[9, 10], [-11, 12.5]])


def test_text_single_channel_and_overlong_line():
    p = TextLineParser(channels=1, max_line_bytes=16)
    assert p.feed(b"5\n-6\n").ravel().tolist() == [5.0, -6.0]
    assert p.feed(b"1" * 40).shape == (0, 1)
    assert p.bad_lines == 1
    assert p.feed(b"\n7\n").ravel().tolist() == [7.0]


@settings(max_examples=200, deadline=None)
@given(blob=st.binary(max_size=2000))
def test_text_parser_never_crashes(blob):
    p = TextLineParser(channels=2)
    rows = p.feed(blob)
    assert rows.ndim == 2 and rows.shape[1] == 2
    assert np.all(np.isfinite(rows))
