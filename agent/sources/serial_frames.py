"""Frames of a serial ADC stream: encoder and incremental parsers (pure, no I/O).

Binary frame, format version 1 (all integers little-endian; full spec with a
firmware example in ``docs/serial-frames.md``)::

    offset  size  field
    0       2     sync word A5 5A
    2       1     format version (1)
    3       1     sample format: 1 = int16, 2 = int24 (3 bytes, two's complement)
    4       2     sequence counter, u16, +1 per frame, wraps 65535 → 0
    6       1     channel count (1..8)
    7       1     status bits: bit 0 = ADC overrun at the source; others 0
    8       2     samples per channel n (1..4096)
    10      k     n × channels samples, interleaved (ch0, ch1, ch0, ch1, ...)
    10+k    2     CRC-16/CCITT-FALSE over bytes 2 .. 9+k (everything after the sync word)

CRC-16/CCITT-FALSE: poly 0x1021, init 0xFFFF, no reflection, no final XOR;
check value 0x29B1 for ASCII "123456789" (R. Williams / G. Cook, "Catalogue
of parametrised CRC algorithms"). In Python ``binascii.crc_hqx(data, 0xFFFF)``.

The parser resynchronises after garbage: it searches for the sync word, and
on an implausible header or a bad CRC it advances one byte (not a whole
frame), so a false sync inside sample data cannot hide a real frame. Lost
frames are counted from the sequence counter (mod 2**16).

The text mode is for hobby boards: one line per sample instant, one integer
(or decimal) count per channel, separated by commas or blanks.
"""

from __future__ import annotations

import binascii
from dataclasses import dataclass, field

import numpy as np

SYNC = b"\xa5\x5a"
FORMAT_VERSION = 1
FMT_INT16 = 1
FMT_INT24 = 2
SAMPLE_BYTES = {FMT_INT16: 2, FMT_INT24: 3}
#: counts at digital full scale for each sample format
FULL_SCALE_COUNTS = {FMT_INT16: 32768, FMT_INT24: 8388608}
FORMAT_NAMES = {FMT_INT16: "int16", FMT_INT24: "int24"}
HEADER_BYTES = 10
CRC_BYTES = 2
MAX_CHANNELS = 8
MAX_SAMPLES = 4096
STATUS_ADC_OVERRUN = 0x01


def crc16_ccitt_false(data: bytes) -> int:
    """CRC-16/CCITT-FALSE (poly 0x1021, init 0xFFFF); 0x29B1 for b"123456789"."""
    return binascii.crc_hqx(data, 0xFFFF)


@dataclass(frozen=True, slots=True)
class Frame:
    """One decoded binary frame; ``samples`` is int32, shape (n, channels)."""

    seq: int
    sample_format: int
    samples: np.ndarray
    status: int = 0
    lost_before: int = 0  # frames missing between the previous good frame and this one

    @property
    def channels(self) -> int:
        return int(self.samples.shape[1])

    @property
    def n(self) -> int:
        return int(self.samples.shape[0])

    @property
    def adc_overrun(self) -> bool:
        return bool(self.status & STATUS_ADC_OVERRUN)


def encode_frame(seq: int, samples: np.ndarray, sample_format: int = FMT_INT16, status: int = 0) -> bytes:
    """Bytes of one frame; ``samples`` integer counts, shape (n,) or (n, channels)."""
    arr = np.asarray(samples)
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or not np.issubdtype(arr.dtype, np.integer):
        raise ValueError(f"samples must be integer counts of shape (n,) or (n, ch), got {arr.dtype} {arr.shape}")
    n, ch = arr.shape
    if not 1 <= n <= MAX_SAMPLES:
        raise ValueError(f"samples per channel must be 1..{MAX_SAMPLES}, got {n}")
    if not 1 <= ch <= MAX_CHANNELS:
        raise ValueError(f"channel count must be 1..{MAX_CHANNELS}, got {ch}")
    if sample_format not in SAMPLE_BYTES:
        raise ValueError(f"sample_format must be one of {sorted(SAMPLE_BYTES)}, got {sample_format!r}")
    if not 0 <= status <= 0xFF:
        raise ValueError(f"status must be 0..255, got {status}")
    fs = FULL_SCALE_COUNTS[sample_format]
    if arr.min() < -fs or arr.max() > fs - 1:
        raise ValueError(f"samples out of {FORMAT_NAMES[sample_format]} range [{-fs}, {fs - 1}]")
    flat = arr.astype("<i4").reshape(-1)
    if sample_format == FMT_INT16:
        payload = flat.astype("<i2").tobytes()
    else:
        payload = flat.view(np.uint8).reshape(-1, 4)[:, :3].tobytes()
    header = bytes([FORMAT_VERSION, sample_format]) + int(seq & 0xFFFF).to_bytes(2, "little")
    header += bytes([ch, status]) + n.to_bytes(2, "little")
    body = header + payload
    return SYNC + body + crc16_ccitt_false(body).to_bytes(2, "little")


def _decode_samples(payload: bytes, sample_format: int, n: int, ch: int) -> np.ndarray:
    if sample_format == FMT_INT16:
        flat = np.frombuffer(payload, dtype="<i2").astype(np.int32)
    else:
        b = np.frombuffer(payload, dtype=np.uint8).reshape(-1, 3).astype(np.int32)
        flat = b[:, 0] | (b[:, 1] << 8) | (b[:, 2] << 16)
        flat = np.where(flat & 0x800000, flat - 0x1000000, flat)
    out = flat.reshape(n, ch)
    out.setflags(write=False)
    return out


@dataclass(slots=True)
class FrameParser:
    """Incremental binary frame parser: ``feed(bytes) -> list[Frame]``.

    Keeps a partial frame across calls. A false sync with a plausible header
    makes the parser wait for at most one maximal frame before its CRC fails;
    ``max_samples`` and ``channels`` (the board's known set-up) keep that short. Health counters: ``frames`` good
    frames, ``crc_errors``, ``bad_headers`` (false syncs with an implausible
    header), ``resync_bytes`` (bytes discarded while looking for a frame),
    ``gaps`` (places where the sequence counter jumped) and ``lost_frames``
    (frames missing, from the counter, mod 2**16).
    """

    max_samples: int = MAX_SAMPLES
    max_channels: int = MAX_CHANNELS
    channels: int | None = None  # when set, a header with another channel count is implausible
    frames: int = 0
    crc_errors: int = 0
    bad_headers: int = 0
    resync_bytes: int = 0
    gaps: int = 0
    lost_frames: int = 0
    last_seq: int | None = None
    _buf: bytearray = field(default_factory=bytearray)

    @property
    def pending_bytes(self) -> int:
        return len(self._buf)

    def counters(self) -> dict[str, int]:
        return {
            "frames": self.frames,
            "crc_errors": self.crc_errors,
            "bad_headers": self.bad_headers,
            "resync_bytes": self.resync_bytes,
            "gaps": self.gaps,
            "lost_frames": self.lost_frames,
        }

    def drop_partial(self) -> int:
        """Forget buffered bytes (after a reconnect); they count as resync bytes."""
        n = len(self._buf)
        self.resync_bytes += n
        self._buf.clear()
        return n

    def restart(self) -> None:
        """Start afresh on purpose (stale data thrown away): no partial frame, no sequence history."""
        self._buf.clear()
        self.last_seq = None

    def _skip(self, n: int) -> None:
        del self._buf[:n]
        self.resync_bytes += n

    def feed(self, data: bytes) -> list[Frame]:
        buf = self._buf
        buf += data
        out: list[Frame] = []
        while True:
            i = buf.find(SYNC)
            if i < 0:
                # keep a possible first half of the sync word
                keep = 1 if buf[-1:] == SYNC[:1] else 0
                self._skip(len(buf) - keep)
                return out
            if i:
                self._skip(i)
            if len(buf) < HEADER_BYTES:
                return out
            version, fmt = buf[2], buf[3]
            ch = buf[6]
            n = int.from_bytes(buf[8:10], "little")
            if (
                version != FORMAT_VERSION
                or fmt not in SAMPLE_BYTES
                or not 1 <= ch <= self.max_channels
                or (self.channels is not None and ch != self.channels)
                or not 1 <= n <= self.max_samples
            ):
                self.bad_headers += 1
                self._skip(1)
                continue
            total = HEADER_BYTES + n * ch * SAMPLE_BYTES[fmt] + CRC_BYTES
            if len(buf) < total:
                return out
            body = bytes(buf[2 : total - CRC_BYTES])
            crc = int.from_bytes(buf[total - CRC_BYTES : total], "little")
            if crc16_ccitt_false(body) != crc:
                self.crc_errors += 1
                self._skip(1)
                continue
            seq = int.from_bytes(buf[4:6], "little")
            lost = 0
            if self.last_seq is not None:
                lost = (seq - self.last_seq - 1) & 0xFFFF
                if lost:
                    self.gaps += 1
                    self.lost_frames += lost
            self.last_seq = seq
            self.frames += 1
            samples = _decode_samples(body[HEADER_BYTES - 2 :], fmt, n, ch)
            out.append(Frame(seq=seq, sample_format=fmt, samples=samples, status=buf[7], lost_before=lost))
            del buf[:total]


@dataclass(slots=True)
class TextLineParser:
    """Incremental text parser: one line per sample instant, counts per channel.

    Values are separated by commas and/or blanks; ``\\r\\n`` or ``\\n`` ends a
    line; blank lines and lines starting with ``#`` are ignored. The channel
    count is ``channels`` if given, else that of the first good line. Lines
    with a wrong count or a non-number, and over-long lines, are counted in
    ``bad_lines`` and skipped.
    """

    channels: int | None = None
    max_line_bytes: int = 256
    lines: int = 0
    bad_lines: int = 0
    resync_bytes: int = 0
    _buf: bytearray = field(default_factory=bytearray)

    def counters(self) -> dict[str, int]:
        return {"lines": self.lines, "bad_lines": self.bad_lines, "resync_bytes": self.resync_bytes}

    def drop_partial(self) -> int:
        n = len(self._buf)
        self.resync_bytes += n
        self._buf.clear()
        return n

    def restart(self) -> None:
        self._buf.clear()

    def feed(self, data: bytes) -> np.ndarray:
        """Rows parsed from complete lines: float64 array of shape (rows, channels)."""
        buf = self._buf
        buf += data
        rows: list[list[float]] = []
        start = 0
        while True:
            j = buf.find(b"\n", start)
            if j < 0:
                break
            line = bytes(buf[start:j])
            start = j + 1
            row = self._parse_line(line)
            if row is not None:
                rows.append(row)
        del buf[:start]
        if len(buf) > self.max_line_bytes:
            self.bad_lines += 1
            self.resync_bytes += len(buf)
            buf.clear()
        ch = self.channels or 1
        if not rows:
            return np.zeros((0, ch))
        return np.array(rows, dtype=np.float64).reshape(len(rows), ch)

    def _parse_line(self, line: bytes) -> list[float] | None:
        text = line.strip()
        if not text or text.startswith(b"#"):
            return None
        if len(text) > self.max_line_bytes:
            self.bad_lines += 1
            return None
        try:
            values = [float(v) for v in text.replace(b",", b" ").split()]
        except ValueError:
            self.bad_lines += 1
            return None
        if not values or not all(np.isfinite(values)):
            self.bad_lines += 1
            return None
        if self.channels is None:
            self.channels = len(values)
        if len(values) != self.channels:
            self.bad_lines += 1
            return None
        self.lines += 1
        return values
