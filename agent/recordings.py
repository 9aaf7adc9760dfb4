"""Read recordings from files into acceleration in m/s² (an edge module: file I/O).

Formats: WAV (int16/int24/int32/float32, via ``scipy.io.wavfile``), CSV/TXT
(one column, time + value, or several columns chosen with ``channel``),
NumPy ``.npy``/``.npz`` and MATLAB ``.mat`` (v4–v7.2 via ``scipy.io.loadmat``;
struct fields addressed as ``var.field``). A sidecar ``<stem>.json`` beside
the file may give ``fs_hz``, ``units``, ``scale``, ``channel``,
``t0_utc_s``/``start_utc`` and ``sensitivity_mv_per_g``; explicit arguments
win over the sidecar, the sidecar over what the file says.

Units: ``g`` (× 9.80665 m/s², the standard gravity of ISO 80000-3),
``m/s2``, ``mm/s`` (velocity; differentiated to acceleration in the
frequency domain) and ``V`` (needs ``sensitivity_mv_per_g``).
"""

from __future__ import annotations

import io
import struct
import warnings
import json
import math
import zipfile
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

import numpy as np

from agent.errors import InputError
from agent.model import STANDARD_GRAVITY_MS2, Capture

UNITS = ("g", "m/s2", "mm/s", "V")
FORMATS = {".wav": "wav", ".csv": "csv", ".txt": "csv", ".tsv": "csv", ".npy": "npy", ".npz": "npz", ".mat": "mat"}
MAX_FILE_BYTES = 2 * 1024**3


@dataclass(frozen=True, slots=True)
class Recording:
    """One channel of a recording, converted to acceleration in m/s²."""

    accel_ms2: np.ndarray
    fs_hz: float
    path: str
    channel: str
    units_in_file: str
    t0_utc_s: float = 0.0
    meta: dict = field(default_factory=dict)

    def __post_init__(self) -> None:
        arr = np.array(self.accel_ms2, dtype=np.float64, copy=True)
        arr.setflags(write=False)
        object.__setattr__(self, "accel_ms2", arr)

    @property
    def n_samples(self) -> int:
        return int(self.accel_ms2.size)

    @property
    def duration_s(self) -> float:
        return self.n_samples / self.fs_hz

    def to_capture(self, source_id: str = "file", seq: int = 0) -> Capture:
        return Capture(
            accel_ms2=self.accel_ms2,
            fs_hz=self.fs_hz,
            t0_utc_s=self.t0_utc_s,
            channel=self.channel,
            source_id=source_id,
            seq=seq,
        )


def _fail(path: Path, msg: str) -> InputError:
    return InputError(f"{path}: {msg}")


def _read_sidecar(path: Path) -> dict:
    side = path.with_suffix(".json")
    if not side.is_file() or side == path:
        return {}
    try:
        data = json.loads(side.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise InputError(f"{side}: sidecar is not valid JSON ({exc})") from exc
    if not isinstance(data, dict):
        raise InputError(f"{side}: sidecar must be a JSON object")
    return data


def _parse_time(value) -> float:
    if isinstance(value, (int, float)):
        return float(value)
    if isinstance(value, str):
        return datetime.fromisoformat(value.replace("Z", "+00:00")).timestamp()
    raise ValueError(f"bad time {value!r}")


def _pick_column(path: Path, arr: np.ndarray, channel: str | None, names: list[str] | None = None) -> tuple[np.ndarray, str]:
    """1-D data from a 1-D or 2-D array (samples × channels)."""
    if arr.ndim == 1:
        return arr, channel or "0"
    if arr.ndim != 2:
        raise _fail(path, f"expected 1-D or 2-D data, got shape {arr.shape}")
    if arr.shape[0] < arr.shape[1]:
        arr = arr.T
    n_ch = arr.shape[1]
    if n_ch == 1:
        return arr[:, 0], channel or (names[0] if names else "0")
    if channel is None:
        listed = ", ".join(names) if names else f"0..{n_ch - 1}"
        raise _fail(path, f"{n_ch} channels; choose one with --channel ({listed})")
    if names and channel in names:
        return arr[:, names.index(channel)], channel
    try:
        idx = int(channel)
    except ValueError:
        raise _fail(path, f"no channel {channel!r}; available: {', '.join(names or map(str, range(n_ch)))}") from None
    if not 0 <= idx < n_ch:
        raise _fail(path, f"channel index {idx} out of range 0..{n_ch - 1}")
    return arr[:, idx], str(idx)


def _read_wav(path: Path, channel: str | None):
    from scipy.io import wavfile

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", wavfile.WavFileWarning)
            fs, data = wavfile.read(str(path), mmap=False)
    except (ValueError, EOFError, OSError, IndexError, KeyError, struct.error, wavfile.WavFileWarning,
            ArithmeticError, UnboundLocalError, MemoryError) as exc:
        # ArithmeticError: a header with 0 channels; UnboundLocalError: scipy on a mangled fmt chunk
        raise _fail(path, f"not a readable WAV file ({type(exc).__name__}: {exc})") from exc
    if np.issubdtype(data.dtype, np.integer):
        info = np.iinfo(data.dtype)
        if data.dtype == np.uint8:
            data = (data.astype(np.float64) - 128.0) / 128.0
        else:
            # 24-bit files come back left-justified in int32: scaling by the int32 range is right for both
            data = data.astype(np.float64) / float(-info.min)
        scale_note = "fraction of full scale"
    else:
        data = data.astype(np.float64)
        scale_note = "as stored"
    x, ch = _pick_column(path, np.asarray(data), channel)
    return x, float(fs), ch, {"wav_values": scale_note}


def _read_csv(path: Path, channel: str | None, fs_hz: float | None):
    try:
        text = path.read_text(encoding="utf-8", errors="strict")
    except UnicodeDecodeError as exc:
        raise _fail(path, "not a text file (is it mislabelled?)") from exc
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise _fail(path, "no data rows")
    head = lines[0]
    delim = next((d for d in (",", "\t", ";") if d in head), None)
    def split(ln: str) -> list[str]:
        return ln.split(delim) if delim and delim != " " else ln.split()
    names = None
    first = [c.strip() for c in split(lines[0])]
    try:
        [float(c) for c in first]
    except ValueError:
        names = first
        lines = lines[1:]
    if not lines:
        raise _fail(path, "a header but no data rows")
    rows = []
    for i, ln in enumerate(lines, start=2 if names else 1):
        cells = split(ln)
        try:
            rows.append([float(c) for c in cells])
        except ValueError:
            raise _fail(path, f"row {i}: not a number in {ln[:60]!r}") from None
    width = {len(r) for r in rows}
    if len(width) != 1:
        raise _fail(path, f"rows have different numbers of columns {sorted(width)} (truncated file?)")
    arr = np.array(rows, dtype=np.float64)
    meta: dict = {}
    fs = None
    if arr.shape[1] == 2 and channel is None:
        t = arr[:, 0]
        dt = np.diff(t)
        if dt.size and np.all(dt > 0) and np.allclose(dt, dt.mean(), rtol=1e-3):
            fs = 1.0 / float(dt.mean())
            meta["time_column"] = names[0] if names else "0"
            x = arr[:, 1]
            return x, fs, (names[1] if names else "1"), meta
    x, ch = _pick_column(path, arr, channel, names)
    return x, fs, ch, meta


def _check_npy_header(path: Path, fh, stored_bytes: int, name: str = "") -> None:
    """Refuse an .npy header that declares more data than the file holds (no huge allocation)."""
    what = f" array {name!r}" if name else ""
    try:
        fmt = np.lib.format
        version = fmt.read_magic(fh)
        read = fmt.read_array_header_1_0 if version == (1, 0) else fmt.read_array_header_2_0
        shape, _, dtype = read(fh)
    except (ValueError, OSError, EOFError, SyntaxError, TypeError) as exc:
        raise _fail(path, f"not a readable .npy{what} header ({exc})") from exc
    declared = int(np.prod(shape, dtype=object)) * dtype.itemsize
    if declared > stored_bytes:
        raise _fail(path, f"npy{what} header declares shape {shape} ({declared} bytes) but only "
                    f"{stored_bytes} bytes are stored (truncated or corrupt file)")


def _read_npy(path: Path, channel: str | None):
    try:
        with open(path, "rb") as fh:
            _check_npy_header(path, fh, path.stat().st_size)
        arr = np.load(str(path), allow_pickle=False)
    except (ValueError, OSError, EOFError) as exc:
        raise _fail(path, f"not a readable .npy file ({exc})") from exc
    if not np.issubdtype(arr.dtype, np.number) or np.iscomplexobj(arr):
        raise _fail(path, f"holds {arr.dtype}, not real numbers")
    x, ch = _pick_column(path, arr.astype(np.float64), channel)
    return x, None, ch, {}


def _read_npz(path: Path, channel: str | None):
    try:
        with zipfile.ZipFile(path) as zf:
            for info in zf.infolist():
                if info.filename.endswith(".npy"):
                    with zf.open(info) as fh:
                        _check_npy_header(path, fh, info.file_size, info.filename[:-4])
        with np.load(str(path), allow_pickle=False) as z:
            data = {k: z[k] for k in z.files}
    except (ValueError, OSError, EOFError, zipfile.BadZipFile) as exc:
        raise _fail(path, f"not a readable .npz file ({exc})") from exc
    fs = None
    for key in ("fs_hz", "fs", "sample_rate_hz"):
        if key in data and data[key].size == 1:
            fs = float(data[key].ravel()[0])
    arrays = {k: v for k, v in data.items() if v.size > 1 and np.issubdtype(v.dtype, np.number)}
    return _choose_named(path, arrays, channel) + (fs,)


def _choose_named(path: Path, arrays: dict, channel: str | None):
    if not arrays:
        raise _fail(path, "no numeric arrays inside")
    if channel is None:
        if len(arrays) > 1:
            raise _fail(path, f"several arrays; choose one with --channel ({', '.join(sorted(arrays))})")
        channel = next(iter(arrays))
    if channel not in arrays:
        raise _fail(path, f"no variable {channel!r}; available: {', '.join(sorted(arrays))}")
    if np.iscomplexobj(arrays[channel]):
        raise _fail(path, f"variable {channel!r} holds complex numbers, not samples")
    arr = np.asarray(arrays[channel], dtype=np.float64)
    x, _ = _pick_column(path, np.squeeze(arr) if arr.ndim > 1 and 1 in arr.shape else arr, None)
    return x, channel


def _mat_arrays(obj, prefix: str, out: dict) -> None:
    """Flatten numeric arrays, struct fields as ``var.field``."""
    if isinstance(obj, np.ndarray) and obj.dtype.names:
        for name in obj.dtype.names:
            try:
                _mat_arrays(obj[name].squeeze()[()] if obj[name].size == 1 else obj[name], f"{prefix}.{name}", out)
            except (IndexError, ValueError):
                continue
    elif isinstance(obj, np.ndarray) and obj.dtype == object:
        if obj.size == 1:
            _mat_arrays(obj.ravel()[0], prefix, out)
    elif isinstance(obj, np.ndarray) and np.issubdtype(obj.dtype, np.number):
        out[prefix] = obj
    elif hasattr(obj, "_fieldnames"):
        for name in obj._fieldnames:
            _mat_arrays(getattr(obj, name), f"{prefix}.{name}", out)


def _read_mat(path: Path, channel: str | None):
    from scipy.io import loadmat
    from scipy.io.matlab import MatReadError

    try:
        mat = loadmat(str(path), squeeze_me=False, struct_as_record=True)
    except (MatReadError, ValueError, OSError, EOFError, TypeError, NotImplementedError, IndexError,
            KeyError, struct.error, ArithmeticError, MemoryError, UnicodeDecodeError) as exc:
        # IndexError: scipy on a file cut inside its header; MemoryError: a lying element size
        hint = " (MATLAB v7.3/HDF5 files are not supported; save with -v7)" if "HDF" in str(exc) else ""
        raise _fail(path, f"not a readable .mat file ({exc}){hint}") from exc
    arrays: dict = {}
    for k, v in mat.items():
        if not k.startswith("__"):
            _mat_arrays(v, k, arrays)
    scalars = {k: float(v.ravel()[0]) for k, v in arrays.items() if v.size == 1}
    series = {k: v for k, v in arrays.items() if v.size > 1}
    x, ch = _choose_named(path, series, channel)
    meta = {"scalars": scalars} if scalars else {}
    fs = None
    for k, v in scalars.items():
        if k.lower() in ("fs", "fs_hz", "sample_rate", "samplerate", "sr"):
            fs = v
    return x, fs, ch, meta


def _sniff_format(path: Path) -> str:
    """Guess a format from the first bytes (for files without a known suffix)."""
    with path.open("rb") as fh:
        head = fh.read(512)
    if head.startswith(b"RIFF") or head.startswith(b"RIFX"):
        return "wav"
    if head.startswith(b"\x93NUMPY"):
        return "npy"
    if head.startswith(b"PK"):
        return "npz"
    if head.startswith(b"MATLAB"):
        return "mat"
    try:
        head.decode("utf-8")
    except UnicodeDecodeError:
        raise InputError(f"{path}: unknown binary format; give --format") from None
    return "csv"


def to_accel_ms2(x: np.ndarray, units: str, fs_hz: float, sensitivity_mv_per_g: float | None = None) -> np.ndarray:
    """Convert samples in ``units`` to acceleration in m/s²."""
    if units == "g":
        return x * STANDARD_GRAVITY_MS2
    if units == "m/s2":
        return x.astype(np.float64, copy=True)
    if units == "V":
        if not sensitivity_mv_per_g:
            raise ValueError("units 'V' need sensitivity_mv_per_g")
        return x * (1000.0 / sensitivity_mv_per_g) * STANDARD_GRAVITY_MS2
    if units == "mm/s":
        n = x.size
        spec = np.fft.rfft(x - x.mean())
        f = np.fft.rfftfreq(n, 1.0 / fs_hz)
        return np.fft.irfft(spec * (2j * np.pi * f), n) / 1000.0
    raise ValueError(f"units must be one of {UNITS}, got {units!r}")


def read_recording(
    path: str | Path,
    *,
    channel: str | None = None,
    fs_hz: float | None = None,
    units: str | None = None,
    sensitivity_mv_per_g: float | None = None,
    fmt: str | None = None,
) -> Recording:
    """Read one channel of a recording as acceleration (m/s²). Raises InputError.

    ``fmt`` forces a format ("wav", "csv", "npy", "npz", "mat"); otherwise it
    comes from the suffix, or from the file's first bytes when the suffix is
    not a known one.
    """
    p = Path(path)
    if not p.exists():
        raise InputError(f"{p}: no such file")
    if not p.is_file():
        raise InputError(f"{p}: not a file")
    size = p.stat().st_size
    if size == 0:
        raise InputError(f"{p}: file is empty")
    if size > MAX_FILE_BYTES:
        raise InputError(f"{p}: {size} bytes is larger than the {MAX_FILE_BYTES} byte limit")
    kind = fmt or FORMATS.get(p.suffix.lower()) or _sniff_format(p)
    if kind not in FORMATS.values():
        raise InputError(f"{p}: unknown format {kind!r}; known: {', '.join(sorted(set(FORMATS.values())))}")
    side = _read_sidecar(p)
    channel = channel if channel is not None else side.get("channel_var")
    if kind == "wav":
        x, fs_file, ch, meta = _read_wav(p, channel)
    elif kind == "csv":
        x, fs_file, ch, meta = _read_csv(p, channel, fs_hz)
    elif kind == "npy":
        x, fs_file, ch, meta = _read_npy(p, channel)
    elif kind == "npz":
        x, ch, fs_file = _read_npz(p, channel)
        meta = {}
    else:
        x, fs_file, ch, meta = _read_mat(p, channel)
    meta = {**meta, "sidecar": side} if side else meta

    fs = fs_hz or side.get("fs_hz") or fs_file
    if not fs:
        raise InputError(f"{p}: the sample rate is not in the file; give it with --fs (Hz) or a sidecar JSON")
    try:
        fs = float(fs)
    except (TypeError, ValueError):
        raise InputError(f"{p}: sample rate {fs!r} is not a number") from None
    if not (math.isfinite(fs) and fs > 0):
        raise InputError(f"{p}: sample rate {fs!r} must be a positive number")
    u = units or side.get("units")
    if u is None:
        raise InputError(f"{p}: units are not in the file; give them with --units ({', '.join(UNITS)}) or a sidecar JSON")
    if u not in UNITS:
        raise InputError(f"{p}: units {u!r} not understood; use one of {', '.join(UNITS)}")
    x = np.asarray(x, dtype=np.float64).ravel()
    if x.size < 64:
        raise InputError(f"{p}: only {x.size} samples; need at least 64 (truncated file?)")
    bad = int(np.count_nonzero(~np.isfinite(x)))
    if bad:
        raise InputError(f"{p}: {bad} of {x.size} samples are NaN or infinite")
    scale = side.get("scale", 1.0)
    if not isinstance(scale, (int, float)) or not math.isfinite(scale) or scale == 0:
        raise InputError(f"{p}: sidecar 'scale' must be a non-zero number, got {scale!r}")
    sens = sensitivity_mv_per_g or side.get("sensitivity_mv_per_g")
    try:
        acc = to_accel_ms2(x * float(scale), u, fs, sens)
    except ValueError as exc:
        raise InputError(f"{p}: {exc}; give --sensitivity-mv-per-g") from exc
    t0 = 0.0
    for key in ("t0_utc_s", "start_utc"):
        if key in side:
            try:
                t0 = _parse_time(side[key])
            except (ValueError, TypeError):
                raise InputError(f"{p}: sidecar {key} {side[key]!r} is not a time") from None
    return Recording(
        accel_ms2=acc,
        fs_hz=fs,
        path=str(p),
        channel=str(side.get("channel", ch)),
        units_in_file=u,
        t0_utc_s=t0,
        meta=meta,
    )


def write_wav_with_sidecar(path: str | Path, accel_ms2: np.ndarray, fs_hz: float, sidecar: dict) -> None:
    """Write float32 WAV (m/s²) and ``<stem>.json`` (fs_hz, units and the given facts)."""
    from scipy.io import wavfile

    p = Path(path)
    buf = io.BytesIO()
    wavfile.write(buf, int(round(fs_hz)), np.asarray(accel_ms2, dtype=np.float32))
    p.write_bytes(buf.getvalue())
    meta = {"fs_hz": float(fs_hz), "units": "m/s2", **sidecar}
    p.with_suffix(".json").write_text(json.dumps(meta, indent=1, sort_keys=True), encoding="utf-8")
