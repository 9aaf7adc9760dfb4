"""Sound-card source (sounddevice / PortAudio), calibrated to m/s².

The PortAudio callback only copies the block and its overflow flag into a
bounded queue; when the queue is full the block is dropped and the next
block carries "dropped before me", so the capture it lands in is flagged
"gap". ``read()`` assembles captures of ``n_samples`` per channel (a stereo
input gives two captures per read). A callback that stops (device stalled,
callback thread dead, PulseAudio source with no data) is caught by a
watchdog: no block within ``timeout_s`` → :class:`SourceStalled`. Streams
are closed with ``abort()``, never ``stop()`` (``stop()`` waits for pending
buffers and blocks forever on a source that delivers nothing).

``sounddevice`` is imported inside :meth:`open`, so a box without PortAudio
still runs the other sources. PortAudio reads the ALSA configuration when
sounddevice is first imported; set ``PULSE_SERVER``/``ALSA_CONFIG_PATH``
before that.

Sound-card inputs are AC-coupled (a series capacitor, high-pass corner of a
few hertz): amplitude and phase below ~10 Hz are wrong and the IEPE bias
cannot be seen (``bias_v`` is None). See ``docs/acquisition.md``.
"""

from __future__ import annotations

import queue
import threading
import time
from typing import Callable

import numpy as np

from agent.errors import SourceStalled, SourceUnavailable
from agent.model import Capture
from agent.sources.assembly import BlockAssembler, RateCheck, calibrated_captures, channel_names_for
from agent.sources.base import Source
from agent.sources.calibration import Calibration


def parse_device(device: str | int | None) -> str | int | None:
    """Config text → sounddevice device: "3" → 3, "pulse" → "pulse", "" → None (default)."""
    if device is None or isinstance(device, int):
        return device
    text = str(device).strip()
    if text in ("", "default"):
        return None
    return int(text) if text.isdigit() else text


class SoundCardSource(Source):
    kind = "soundcard"

    def __init__(
        self,
        device: str | int | None = None,
        *,
        fs_hz: float,
        n_samples: int,
        channels: int = 1,
        blocksize: int = 0,
        full_scale_v: float = 1.0,
        sensitivity_mv_per_g: float = 100.0,
        conditioner_gain: float = 1.0,
        channel_names: tuple[str, ...] | None = None,
        source_id: str = "soundcard",
        queue_blocks: int = 256,
        latency: str | float = "high",
        fs_tolerance: float = 0.02,
        stall_timeout_s: float | None = None,
        idle_flush_s: float = 1.0,
        clock: Callable[[], float] = time.time,
    ):
        self.device = parse_device(device)
        self.fs_hz = float(fs_hz)
        self.n_samples = int(n_samples)
        self.channels = int(channels)
        if self.channels < 1:
            raise ValueError(f"channels must be >= 1, got {channels}")
        self.blocksize = int(blocksize)
        self.calibration = Calibration(
            full_scale_counts=1.0,
            full_scale_v=full_scale_v,
            sensitivity_mv_per_g=sensitivity_mv_per_g,
            conditioner_gain=conditioner_gain,
        )
        self.channel_names = channel_names_for(self.channels, channel_names)
        self.source_id = source_id
        self.latency = latency
        self.fs_tolerance = float(fs_tolerance)
        self.stall_timeout_s = stall_timeout_s
        self.idle_flush_s = float(idle_flush_s)
        self._last_return: float | None = None
        self.flushes = 0
        self._clock = clock
        self._queue: queue.Queue = queue.Queue(maxsize=int(queue_blocks))
        self._stream = None
        self._lock = threading.Lock()
        self._asm = BlockAssembler(self.n_samples, self.channels, self.fs_hz)
        self._rate = RateCheck()
        self._seq = 0
        self._pending_drops = 0
        # health counters
        self.blocks = 0
        self.dropped_blocks = 0
        self.overflows = 0
        self.stalls = 0
        self.opens = 0

    # ── the PortAudio callback: copy + flags into the queue, nothing else ──
    def _callback(self, indata, frames, time_info, status) -> None:
        overflow = bool(status.input_overflow) if status else False
        try:
            self._queue.put_nowait((indata.copy(), overflow, self._pending_drops))
            self._pending_drops = 0
        except queue.Full:
            self._pending_drops += 1
            self.dropped_blocks += 1

    @classmethod
    def from_config(cls, cfg) -> "SoundCardSource":
        """Build from an :class:`agent.config.AgentConfig` (``[source]``, ``[source.soundcard]``, ``[sensor]``)."""
        from agent.sources.serial_adc import default_channel_names

        src, sc, sen = cfg.source, cfg.source.soundcard, cfg.sensor
        return cls(
            sc.device,
            fs_hz=src.fs_hz,
            n_samples=src.n_samples,
            channels=sc.channels,
            blocksize=sc.blocksize,
            full_scale_v=sc.full_scale_v,
            sensitivity_mv_per_g=sen.sensitivity_mv_per_g,
            conditioner_gain=sen.conditioner_gain,
            channel_names=tuple(sc.channel_names) or default_channel_names(src.channel, sc.channels),
            source_id=f"soundcard:{sc.device}",
            queue_blocks=sc.queue_blocks,
            stall_timeout_s=sc.stall_timeout_s,
        )

    # ── Source interface ──
    def open(self) -> None:
        with self._lock:
            if self._stream is not None:
                return
            try:
                import sounddevice as sd
            except OSError as exc:  # PortAudio library missing
                raise SourceUnavailable(f"sound card: {exc} (install libportaudio2)") from exc
            try:
                stream = sd.InputStream(
                    samplerate=self.fs_hz,
                    blocksize=self.blocksize,
                    device=self.device,
                    channels=self.channels,
                    dtype="float32",
                    latency=self.latency,
                    callback=self._callback,
                )
                stream.start()
            except (sd.PortAudioError, ValueError, OSError) as exc:
                raise SourceUnavailable(
                    f"sound device {self.device if self.device is not None else 'default'!r} "
                    f"({self.channels} ch at {self.fs_hz:g} Hz) cannot be opened: {exc}"
                ) from exc
            self._stream = stream
            self.opens += 1
            self._asm.reset()
            self._rate.restart()
            self._drain()
            self._last_return = None

    def close(self) -> None:
        with self._lock:
            stream, self._stream = self._stream, None
        if stream is None:
            return
        try:
            stream.abort()  # not stop(): it blocks forever when no data comes
        except Exception:  # noqa: BLE001 - a dead device may fail any way; we close regardless
            pass
        try:
            stream.close()
        except Exception:  # noqa: BLE001
            pass

    def describe(self) -> dict:
        return {
            "kind": self.kind,
            "device": self.device,
            "fs_hz": self.fs_hz,
            "channels": self.channels,
            "blocks": self.blocks,
            "dropped_blocks": self.dropped_blocks,
            "overflows": self.overflows,
            "stalls": self.stalls,
            "opens": self.opens,
            "measured_fs_hz": self._rate.measured_fs_hz,
        }

    def read(self, timeout_s: float) -> tuple[Capture, ...]:
        """Next capture per channel; SourceStalled after ``timeout_s`` without a block.

        Back-to-back reads give contiguous captures; after a pause longer than
        ``idle_flush_s`` the blocks that piled up (and any drops while the
        queue was full) are thrown away and the capture starts fresh.
        """
        if self._stream is None:
            raise SourceUnavailable(f"sound device {self.device!r} is not open")
        if self.stall_timeout_s is not None:
            timeout_s = min(timeout_s, self.stall_timeout_s)
        if self._last_return is not None and self._clock() - self._last_return > self.idle_flush_s:
            self._pending_drops = 0
            self._drain()
            self._asm.reset()
            self._rate.restart()
            self.flushes += 1
        while True:
            got = self._asm.pop()
            if got is not None:
                caps = self._captures(*got)
                self._last_return = self._clock()
                return caps
            try:
                block, overflow, drops = self._queue.get(timeout=timeout_s)
            except queue.Empty:
                self.stalls += 1
                self.close()
                raise SourceStalled(
                    f"sound device {self.device!r}: no audio block for {timeout_s:g} s"
                ) from None
            self.ingest_block(block, overflow, drops, self._clock())

    def ingest_block(self, block: np.ndarray, overflow: bool, dropped_before: int, arrival_s: float) -> None:
        """Add one block from the queue to the capture in progress (also used in tests)."""
        self.blocks += 1
        flags = ()
        if overflow:
            self.overflows += 1
            flags = ("input_overflow",)
        if dropped_before:
            self._rate.restart()
        self._asm.add(block, arrival_s, flags=flags, gap_before=dropped_before > 0)
        self._rate.add(len(block), arrival_s)

    # ── internals ──
    def _drain(self) -> None:
        while True:
            try:
                self._queue.get_nowait()
            except queue.Empty:
                return

    def _captures(self, data: np.ndarray, t0_s: float, flags: frozenset[str]) -> tuple[Capture, ...]:
        caps = calibrated_captures(
            data, t0_s, flags, calibration=self.calibration, channel_names=self.channel_names,
            fs_hz=self.fs_hz, measured_fs_hz=self._rate.measured_fs_hz, fs_tolerance=self.fs_tolerance,
            source_id=self.source_id, seq=self._seq,
        )
        self._seq += 1
        return caps
