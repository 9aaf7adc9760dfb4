"""Serial ADC source: a microcontroller streaming frames over a (USB) serial port.

The port is opened with pyserial's ``serial_for_url`` so a device path
(``/dev/serial/by-id/...``), ``loop://`` and other pyserial URLs all work.
Frames (binary, see :mod:`agent.sources.serial_frames` and
``docs/serial-frames.md``) or text lines are parsed incrementally and
assembled into captures of ``n_samples`` per channel, calibrated to m/s².

Edge rules: pyserial's ``SerialException``/``OSError`` become
:class:`SourceUnavailable` (port vanished, USB unplugged); no samples for
``timeout_s`` become :class:`SourceStalled`. The parser (and its sequence
counter) survive ``close()``/``open()``, so frames lost while the port was
away are counted when the stream comes back.
"""

from __future__ import annotations

import time
from typing import Callable

import numpy as np

from agent.errors import SourceStalled, SourceUnavailable
from agent.model import Capture
from agent.sources.assembly import BlockAssembler, RateCheck, calibrated_captures, channel_names_for
from agent.sources.base import Source
from agent.sources.calibration import Calibration
from agent.sources.serial_frames import FMT_INT16, FMT_INT24, FULL_SCALE_COUNTS, FrameParser, TextLineParser


def default_channel_names(first: str, channels: int) -> tuple[str, ...]:
    """``source.channel`` for the first input, then ch1, ch2, ..."""
    return (first,) + tuple(f"ch{i}" for i in range(1, channels))


class SerialSource(Source):
    kind = "serial"

    def __init__(
        self,
        port: str,
        *,
        fs_hz: float,
        n_samples: int,
        channels: int = 1,
        baud: int = 921600,
        mode: str = "binary",
        sample_format: int = FMT_INT16,
        text_full_scale_counts: float = 32768.0,
        full_scale_v: float = 2.5,
        sensitivity_mv_per_g: float = 100.0,
        conditioner_gain: float = 1.0,
        dc_coupled: bool = False,
        channel_names: tuple[str, ...] | None = None,
        source_id: str = "serial",
        fs_tolerance: float = 0.02,
        max_frame_samples: int = 1024,
        stall_timeout_s: float | None = None,
        idle_flush_s: float = 1.0,
        read_chunk: int = 4096,
        clock: Callable[[], float] = time.time,
    ):
        if mode not in ("binary", "text"):
            raise ValueError(f"mode must be 'binary' or 'text', got {mode!r}")
        if not port:
            raise ValueError("serial port is empty: set source.serial.port")
        self.port = port
        self.fs_hz = float(fs_hz)
        self.n_samples = int(n_samples)
        self.channels = int(channels)
        self.baud = int(baud)
        self.mode = mode
        counts = FULL_SCALE_COUNTS[sample_format] if mode == "binary" else float(text_full_scale_counts)
        self.calibration = Calibration(
            full_scale_counts=float(counts),
            full_scale_v=full_scale_v,
            sensitivity_mv_per_g=sensitivity_mv_per_g,
            conditioner_gain=conditioner_gain,
            dc_coupled=dc_coupled,
        )
        self.channel_names = channel_names_for(self.channels, channel_names)
        self.source_id = source_id
        self.fs_tolerance = float(fs_tolerance)
        self.read_chunk = int(read_chunk)
        self.stall_timeout_s = stall_timeout_s
        self.idle_flush_s = float(idle_flush_s)
        self._clock = clock
        self._last_return: float | None = None
        self.flushes = 0
        self._ser = None
        self._seq = 0
        self.parser = (
            FrameParser(max_samples=int(max_frame_samples), channels=self.channels)
            if mode == "binary" else TextLineParser(channels=self.channels)
        )
        self._asm = BlockAssembler(self.n_samples, self.channels, self.fs_hz)
        self._rate = RateCheck()
        self.opens = 0
        self.wrong_channel_frames = 0
        self.format_changes = 0
        self._sample_format: int | None = sample_format if mode == "binary" else None

    @classmethod
    def from_config(cls, cfg) -> "SerialSource":
        """Build from an :class:`agent.config.AgentConfig` (``[source]``, ``[source.serial]``, ``[sensor]``)."""
        src, sc, sen = cfg.source, cfg.source.serial, cfg.sensor
        names = tuple(sc.channel_names) or default_channel_names(src.channel, sc.channels)
        return cls(
            sc.port,
            fs_hz=src.fs_hz,
            n_samples=src.n_samples,
            channels=sc.channels,
            baud=sc.baud,
            mode=sc.mode,
            sample_format=FMT_INT24 if sc.sample_format == "int24" else FMT_INT16,
            text_full_scale_counts=sc.text_full_scale_counts,
            full_scale_v=sc.full_scale_v,
            sensitivity_mv_per_g=sen.sensitivity_mv_per_g,
            conditioner_gain=sen.conditioner_gain,
            dc_coupled=sc.dc_coupled,
            channel_names=names,
            source_id=f"serial:{sc.port}",
            max_frame_samples=sc.max_frame_samples,
            stall_timeout_s=sc.stall_timeout_s,
        )

    # ── Source interface ──
    def open(self) -> None:
        if self._ser is not None:
            return
        import serial  # pyserial; imported here so the module loads without it

        try:
            self._ser = serial.serial_for_url(self.port, baudrate=self.baud, timeout=0.05)
        except (serial.SerialException, OSError, ValueError) as exc:
            raise SourceUnavailable(f"serial port {self.port!r} cannot be opened: {exc}") from exc
        self.opens += 1
        # bytes from before a reconnect cannot be joined to new ones
        self.parser.drop_partial()
        self._rate.restart()
        self._last_return = None  # opening emptied the input buffer: nothing stale to flush

    def close(self) -> None:
        ser, self._ser = self._ser, None
        if ser is not None:
            try:
                ser.close()
            except Exception:  # noqa: BLE001 - closing a vanished port may fail any way
                pass

    def describe(self) -> dict:
        d = {
            "kind": self.kind,
            "device": self.port,
            "fs_hz": self.fs_hz,
            "channels": self.channels,
            "mode": self.mode,
            "opens": self.opens,
            "measured_fs_hz": self._rate.measured_fs_hz,
        }
        d.update(self.parser.counters())
        return d

    def read(self, timeout_s: float) -> tuple[Capture, ...]:
        """Next capture per channel; SourceStalled after ``timeout_s`` without samples.

        Captures follow on from each other when read back to back; after a
        pause longer than ``idle_flush_s`` (the daemon reads once per
        ``source.interval_s``) what piled up meanwhile is thrown away and the
        capture starts with fresh samples, so it holds no stale data and no gap.
        """
        if self._ser is None:
            raise SourceUnavailable(f"serial port {self.port!r} is not open")
        import serial

        if self.stall_timeout_s is not None:
            timeout_s = min(timeout_s, self.stall_timeout_s)
        last_data = self._clock()
        if self._last_return is not None and last_data - self._last_return > self.idle_flush_s:
            self._flush_stale()
        while True:
            got = self._asm.pop()
            if got is not None:
                caps = self._captures(*got)
                self._last_return = self._clock()
                return caps
            try:
                data = self._ser.read(self.read_chunk)
            except (serial.SerialException, OSError) as exc:
                self.close()
                raise SourceUnavailable(f"serial port {self.port!r} failed: {exc}") from exc
            now = self._clock()
            if self._ingest(data, now):
                last_data = now
            elif now - last_data > timeout_s:
                raise SourceStalled(f"serial port {self.port!r}: no samples for {now - last_data:.1f} s")

    # ── internals ──
    def _flush_stale(self) -> None:
        import serial

        try:
            self._ser.reset_input_buffer()
        except (serial.SerialException, OSError) as exc:
            self.close()
            raise SourceUnavailable(f"serial port {self.port!r} failed: {exc}") from exc
        self.parser.restart()
        self._asm.reset()
        self._rate.restart()
        self.flushes += 1

    def _ingest(self, data: bytes, now: float) -> bool:
        if not data:
            return False
        if self.mode == "text":
            rows = self.parser.feed(data)
            if rows.shape[0] == 0:
                return False
            self._asm.add(rows, now)
            self._rate.add(rows.shape[0], now)
            return True
        got = False
        for fr in self.parser.feed(data):
            if fr.channels != self.channels:
                self.wrong_channel_frames += 1
                continue
            if fr.sample_format != self._sample_format:
                # the board changed format: rescale from the frame's own format
                self.format_changes += 1
                self._sample_format = fr.sample_format
                self.calibration = Calibration(
                    full_scale_counts=float(FULL_SCALE_COUNTS[fr.sample_format]),
                    full_scale_v=self.calibration.full_scale_v,
                    sensitivity_mv_per_g=self.calibration.sensitivity_mv_per_g,
                    conditioner_gain=self.calibration.conditioner_gain,
                    dc_coupled=self.calibration.dc_coupled,
                )
            flags = ("adc_overrun",) if fr.adc_overrun else ()
            if fr.lost_before:
                self._rate.restart()
            self._asm.add(fr.samples, now, flags=flags, gap_before=fr.lost_before > 0)
            self._rate.add(fr.n, now)
            got = True
        return got

    def _captures(self, counts: np.ndarray, t0_s: float, flags: frozenset[str]) -> tuple[Capture, ...]:
        caps = calibrated_captures(
            counts, t0_s, flags, calibration=self.calibration, channel_names=self.channel_names,
            fs_hz=self.fs_hz, measured_fs_hz=self._rate.measured_fs_hz, fs_tolerance=self.fs_tolerance,
            source_id=self.source_id, seq=self._seq,
        )
        self._seq += 1
        return caps
