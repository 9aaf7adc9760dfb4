"""Averaged spectra, noise floor and peak picking (pure functions).

Conventions
-----------
* A :class:`Spectrum` holds a *power spectrum* in "tone r.m.s.² per line"
  scaling (``scipy.signal.welch(..., scaling="spectrum")``): a pure tone
  centred on a line reads its r.m.s.² on that line. Band r.m.s. values are
  the sum of lines divided by the window's equivalent noise bandwidth in
  lines (ENBW), which makes Parseval hold for any window.
* Averaging is Welch's method (P. D. Welch, IEEE Trans. Audio
  Electroacoust. 15(2), 1967): segments with overlap, windowed, |FFT|²
  averaged; each segment's mean is removed.
* Window figures (coherent gain, ENBW, scalloping loss) follow
  F. J. Harris, Proc. IEEE 66(1), 1978, computed for periodic windows.
* Velocity is acceleration divided by j·2πf, line by line, with every line
  below ``f_low_hz`` set to zero (an ideal high-pass) so the 1/f² rise of
  low-frequency noise — the integration "ski slope" — cannot dominate.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from scipy import fft, ndimage, signal

from agent.model import Peak

#: windows of the analysis spectra; "blackmanharris" (4-term, side lobes below −92 dB; Harris 1978)
#: is the floor spectrum's, for levels between tones
WINDOWS = ("hann", "flattop", "rectangular", "blackmanharris")
#: samples per FFT batch in :func:`_segment_abs2` (256 kB of float64)
_BLOCK_SAMPLES = 1 << 15
#: half-width of the main lobe in lines, for summing a tone's power
_LOBE_HALF_LINES = {"hann": 2, "flattop": 5, "rectangular": 1}


def make_window(name: str, n: int) -> np.ndarray:
    """Periodic (DFT-even) window of length ``n``; see Harris 1978, §II."""
    return _window(name, int(n)).copy()


@functools.lru_cache(maxsize=8)
def _window(name: str, n: int) -> np.ndarray:
    """The shared, read-only window behind :func:`make_window` and the plans."""
    if name not in WINDOWS:
        raise ValueError(f"window must be one of {WINDOWS}, got {name!r}")
    if n < 4:
        raise ValueError(f"window length must be >= 4, got {n}")
    w = np.ones(n) if name == "rectangular" else signal.get_window(name, n, fftbins=True)
    w.setflags(write=False)
    return w


@dataclass(frozen=True, slots=True)
class WindowFigures:
    """Harris (1978) figures of merit of a window of ``n`` points."""

    name: str
    n: int
    coherent_gain: float  # Σw/N
    enbw_bins: float  # N·Σw²/(Σw)²
    scallop_loss_db: float  # loss for a tone half a line off centre

    @property
    def amplitude_correction(self) -> float:
        return 1.0 / self.coherent_gain


@functools.lru_cache(maxsize=64)
def window_figures(name: str, n: int = 1024) -> WindowFigures:
    """Coherent gain, ENBW (lines) and scalloping loss (dB) of a window (memoised: plans are rebuilt often)."""
    w = _window(name, int(n))
    cg = w.sum() / n
    enbw = n * np.sum(w**2) / w.sum() ** 2
    k = np.arange(n)
    half_bin = abs(np.sum(w * np.exp(-1j * np.pi * k / n)))
    sl_db = -20.0 * np.log10(half_bin / w.sum())
    return WindowFigures(name, n, float(cg), float(enbw), float(sl_db))


@dataclass(frozen=True, slots=True)
class SpectrumPlan:
    """Set-up for averaged spectra, built once and reused (like ShortTimeFFT)."""

    fs_hz: float
    nperseg: int
    noverlap: int
    window: str
    win: np.ndarray
    f_hz: np.ndarray
    figures: WindowFigures

    @property
    def bin_width_hz(self) -> float:
        return self.fs_hz / self.nperseg

    @property
    def lines(self) -> int:
        return self.nperseg // 2

    @classmethod
    def build(
        cls,
        fs_hz: float,
        n_samples: int,
        *,
        window: str = "hann",
        lines: int | None = None,
        overlap: float = 0.5,
    ) -> "SpectrumPlan":
        """A plan for ``n_samples`` at ``fs_hz`` with ``lines`` resolution lines.

        ``lines`` = nperseg/2; None uses the largest power of two that still
        gives a whole segment (a single average, finest resolution).
        """
        if not fs_hz > 0:
            raise ValueError(f"fs_hz must be > 0, got {fs_hz!r}")
        if not 0.0 <= overlap < 1.0:
            raise ValueError(f"overlap must be in [0, 1), got {overlap!r}")
        if n_samples < 8:
            raise ValueError(f"need at least 8 samples, got {n_samples}")
        if lines is None:
            nperseg = 1 << int(np.floor(np.log2(n_samples)))
        else:
            nperseg = int(2 * lines)
            if nperseg > n_samples:
                nperseg = 1 << int(np.floor(np.log2(n_samples)))
        noverlap = int(round(overlap * nperseg))
        return _plan(cls, float(fs_hz), nperseg, noverlap, window)

    @classmethod
    def with_segments(cls, fs_hz: float, nperseg: int, noverlap: int, *, window: str = "hann") -> "SpectrumPlan":
        """A plan with exactly ``nperseg`` samples per segment (odd allowed) and ``noverlap`` shared."""
        if not fs_hz > 0:
            raise ValueError(f"fs_hz must be > 0, got {fs_hz!r}")
        if not 0 <= noverlap < nperseg:
            raise ValueError(f"need 0 <= noverlap < nperseg, got {noverlap}, {nperseg}")
        return _plan(cls, float(fs_hz), int(nperseg), int(noverlap), window)


@functools.lru_cache(maxsize=8)
def _plan(cls, fs_hz: float, nperseg: int, noverlap: int, window: str) -> SpectrumPlan:
    """Plans are immutable (read-only arrays), so one per set-up is built and shared.

    About five are used for every capture (quality gate, analysis, speed,
    speed-profile frames, order tracking); the cache is kept that small so
    it costs little memory.
    """
    win = _window(window, nperseg)
    f_hz = np.fft.rfftfreq(nperseg, 1.0 / fs_hz)
    f_hz.setflags(write=False)
    return cls(fs_hz, nperseg, noverlap, window, win, f_hz, window_figures(window, nperseg))


@dataclass(frozen=True, slots=True)
class Spectrum:
    """An averaged power spectrum (tone r.m.s.² per line).

    ``quantity`` is "acceleration" (``unit`` "m/s2") or "velocity" (``unit``
    "mm/s"); amplitudes are read with :meth:`amplitude` on an r.m.s. or peak
    basis. ``enbw_bins`` converts sums of lines to band power.
    """

    f_hz: np.ndarray
    power: np.ndarray
    quantity: str
    unit: str
    window: str
    bin_width_hz: float
    enbw_bins: float
    n_averages: int
    nperseg: int

    def __post_init__(self) -> None:
        for name in ("f_hz", "power"):
            arr = np.array(getattr(self, name), dtype=np.float64, copy=True)
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)

    def amplitude(self, basis: str = "rms") -> np.ndarray:
        """Line amplitudes; ``basis`` "rms" or "peak" (peak = √2·r.m.s., for tones)."""
        rms = np.sqrt(self.power)
        if basis == "rms":
            return rms
        if basis == "peak":
            return rms * np.sqrt(2.0)
        raise ValueError(f"basis must be 'rms' or 'peak', got {basis!r}")

    @property
    def fmax_hz(self) -> float:
        return float(self.f_hz[-1])


def _segment_abs2(accel_ms2: np.ndarray, plan: SpectrumPlan, n_lines: int | None = None) -> np.ndarray:
    """|FFT|² of every windowed, mean-removed segment (rows), unscaled; the lowest ``n_lines`` lines only if given."""
    x = np.asarray(accel_ms2, dtype=np.float64)
    if x.ndim != 1:
        raise ValueError(f"accel_ms2 must be 1-D, got shape {x.shape}")
    if x.size < plan.nperseg:
        raise ValueError(f"{x.size} samples is shorter than one segment ({plan.nperseg})")
    step = plan.nperseg - plan.noverlap
    n_seg = 1 + (x.size - plan.nperseg) // step
    seg = sliding_window_view(x, plan.nperseg)[::step][:n_seg]  # a view: no copy yet
    all_lines = plan.nperseg // 2 + 1
    keep = all_lines if n_lines is None else max(1, min(int(n_lines), all_lines))
    out = np.empty((n_seg, keep))
    # a few segments at a time, so each block's copies stay in the processor's cache
    # (many short overlapping segments are several times the capture's size)
    rows = max(1, _BLOCK_SAMPLES // plan.nperseg)
    for a in range(0, n_seg, rows):
        block = seg[a : a + rows]
        block = block - block.mean(axis=1, keepdims=True)
        block *= plan.win
        # scipy.fft: the same pocketfft as numpy.fft, faster on the rows of a 2-D array
        spec = fft.rfft(block, axis=1)[:, :keep]
        np.multiply(spec.real, spec.real, out=out[a : a + rows])
        out[a : a + rows] += spec.imag**2
    return out


def _scale_power(power: np.ndarray, plan: SpectrumPlan) -> np.ndarray:
    """|FFT|² (last axis, from 0 Hz) → tone r.m.s.² per line, in place: one-sided, window gain removed."""
    power *= 2.0 / plan.win.sum() ** 2
    power[..., 0] /= 2.0
    if plan.nperseg % 2 == 0 and power.shape[-1] == plan.nperseg // 2 + 1:
        power[..., -1] /= 2.0  # the Nyquist line, when kept
    return power


def _spectrum(power: np.ndarray, plan: SpectrumPlan, n_averages: int) -> Spectrum:
    return Spectrum(
        f_hz=plan.f_hz,
        power=power,
        quantity="acceleration",
        unit="m/s2",
        window=plan.window,
        bin_width_hz=plan.bin_width_hz,
        enbw_bins=plan.figures.enbw_bins,
        n_averages=int(n_averages),
        nperseg=plan.nperseg,
    )


def accel_spectrum(accel_ms2: np.ndarray, plan: SpectrumPlan) -> Spectrum:
    """Welch-averaged acceleration power spectrum, m/s² r.m.s.² per line."""
    abs2 = _segment_abs2(accel_ms2, plan)
    return _spectrum(_scale_power(abs2.mean(axis=0), plan), plan, abs2.shape[0])


@dataclass(frozen=True, slots=True, eq=False)
class CaptureSpectra:
    """The Welch acceleration spectra of one capture, each computed once and shared by the stages.

    Every stage asks with its own plan (:meth:`accel`); plans that cut the
    capture into the same segments with the same window (same sample rate,
    window, segment length, and step when there is more than one segment)
    give the same spectrum, which is computed on the first request only.
    Made for one capture (the monitor step's or one analysis) and passed
    along with it; ``accel_ms2`` is read-only.
    """

    accel_ms2: np.ndarray
    fs_hz: float
    _done: dict = field(default_factory=dict, repr=False)

    def __post_init__(self) -> None:
        x = np.asarray(self.accel_ms2, dtype=np.float64)
        if x.flags.writeable:
            x = x.copy()
            x.setflags(write=False)
        object.__setattr__(self, "accel_ms2", x)

    @classmethod
    def of(cls, capture) -> "CaptureSpectra":
        """For a :class:`agent.model.Capture`."""
        return cls(capture.accel_ms2, capture.fs_hz)

    def of_samples(self, accel_ms2) -> "CaptureSpectra":
        """Itself, after checking that ``accel_ms2`` are its samples (``ValueError`` otherwise)."""
        x = np.asarray(accel_ms2)
        if x is not self.accel_ms2 and not (x.shape == self.accel_ms2.shape and np.array_equal(x, self.accel_ms2)):
            raise ValueError("these spectra belong to other samples")
        return self

    def accel(self, plan: SpectrumPlan) -> Spectrum:
        """``accel_spectrum(self.accel_ms2, plan)``, computed once per segmentation."""
        if plan.fs_hz != self.fs_hz:
            raise ValueError(f"plan for {plan.fs_hz:g} Hz, capture sampled at {self.fs_hz:g} Hz")
        n = self.accel_ms2.size
        step = plan.nperseg - plan.noverlap
        single = n < plan.nperseg + step  # one segment: the step does not matter
        key = (plan.fs_hz, plan.window, plan.nperseg, 0 if single else step)
        spec = self._done.get(key)
        if spec is None:
            spec = self._done[key] = accel_spectrum(self.accel_ms2, plan)
        return spec


def segment_powers(accel_ms2: np.ndarray, plan: SpectrumPlan, n_lines: int | None = None) -> np.ndarray:
    """The acceleration power of each segment of ``plan`` on its own (rows; tone r.m.s.² per line).

    Segment *i* starts at sample i·(nperseg − noverlap); row *i* equals the
    power of ``accel_spectrum`` of that slice alone, computed in batches of
    FFTs. ``n_lines`` keeps only the lowest lines (0 Hz up), when only those
    are read. Read-only.
    """
    powers = _scale_power(_segment_abs2(accel_ms2, plan, n_lines), plan)
    powers.setflags(write=False)
    return powers


def segment_spectra(accel_ms2: np.ndarray, plan: SpectrumPlan, n_lines: int | None = None) -> tuple[Spectrum, ...]:
    """:func:`segment_powers` as one :class:`Spectrum` per segment (no averaging)."""
    powers = segment_powers(accel_ms2, plan, n_lines)
    f_hz = plan.f_hz[: powers.shape[1]]
    return tuple(
        Spectrum(f_hz=f_hz, power=row, quantity="acceleration", unit="m/s2", window=plan.window,
                 bin_width_hz=plan.bin_width_hz, enbw_bins=plan.figures.enbw_bins, n_averages=1,
                 nperseg=plan.nperseg)
        for row in powers
    )


def velocity_spectrum(acc: Spectrum, f_low_hz: float) -> Spectrum:
    """Velocity spectrum in mm/s from an acceleration spectrum (÷ 2πf per line).

    Lines below ``f_low_hz`` are set to zero (ideal high-pass at the
    integration; common practice to keep the 1/f rise out of the result).
    """
    if acc.quantity != "acceleration":
        raise ValueError(f"expected an acceleration spectrum, got {acc.quantity!r}")
    if not f_low_hz > 0:
        raise ValueError(f"f_low_hz must be > 0, got {f_low_hz!r}")
    f = acc.f_hz
    power = np.zeros_like(acc.power)
    keep = f >= f_low_hz
    n_low = int(np.count_nonzero(~keep))
    if not keep[:n_low].any():  # ascending lines (every spectrum here): the kept ones are one slice
        keep = slice(n_low, None)
    power[keep] = acc.power[keep] / (2.0 * np.pi * f[keep]) ** 2 * 1e6
    return Spectrum(
        f_hz=f,
        power=power,
        quantity="velocity",
        unit="mm/s",
        window=acc.window,
        bin_width_hz=acc.bin_width_hz,
        enbw_bins=acc.enbw_bins,
        n_averages=acc.n_averages,
        nperseg=acc.nperseg,
    )


def band_rms(spec: Spectrum, f_lo_hz: float, f_hi_hz: float) -> float:
    """r.m.s. of the lines with centre in [f_lo_hz, f_hi_hz], in the spectrum's unit.

    Sum of lines ÷ ENBW (lines): Parseval for a windowed, averaged spectrum.
    """
    if f_hi_hz < f_lo_hz:
        raise ValueError(f"band reversed: {f_lo_hz} > {f_hi_hz}")
    sel = (spec.f_hz >= f_lo_hz) & (spec.f_hz <= f_hi_hz)
    return float(np.sqrt(spec.power[sel].sum() / spec.enbw_bins))


def _floor_width_lines(spec: Spectrum, width_hz: float | None) -> int:
    """Width of the running median in lines (odd): ``width_hz``, or 2 % of the span and at least 15 lines."""
    if width_hz is None:
        width_lines = max(15, int(0.02 * spec.power.size))
    else:
        width_lines = max(5, int(round(width_hz / spec.bin_width_hz)))
    return width_lines | 1


def noise_floor(spec: Spectrum, width_hz: float | None = None) -> np.ndarray:
    """Local noise floor (power per line) by a running median of log power.

    The median over a window of lines ignores discrete peaks (they occupy
    only a few lines), so it follows the broadband floor and resonance humps.
    ``width_hz`` defaults to 2 % of the span, at least 15 lines.
    """
    width_lines = _floor_width_lines(spec, width_hz)
    power = spec.power
    weight = None
    if spec.quantity == "velocity":
        # the velocity floor falls as 1/f²: take the median on acceleration (flat-ish), convert back
        weight = _omega2(spec)
        power = power * weight
    floor = np.zeros_like(power)
    positive = np.flatnonzero(power > 0)
    if positive.size == 0:
        return floor
    start = int(positive[0])  # lines cut away (below a high-pass) stay out of the median
    tiny = max(float(power.max()) * 1e-16, 1e-30)
    logp = np.log10(np.maximum(power[start:], tiny))
    floor[start:] = 10.0 ** ndimage.median_filter(logp, size=width_lines, mode="nearest")
    if weight is not None:
        floor = _to_velocity(floor, spec, weight)
    return floor


def _omega2(spec: Spectrum) -> np.ndarray:
    """(2πf)² per line: velocity power × this = acceleration power (× 10⁶ for mm/s)."""
    return (2 * np.pi * spec.f_hz) ** 2


def _to_velocity(floor: np.ndarray, vel: Spectrum, weight: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore"):
        return np.where(vel.power > 0, floor / np.where(weight > 0, weight, np.inf), 0.0)


def velocity_floor(vel: Spectrum, acc: Spectrum, acc_floor: np.ndarray, width_hz: float | None = None) -> np.ndarray:
    """``noise_floor(vel)`` for ``vel = velocity_spectrum(acc, f_low)``, from ``acc_floor = noise_floor(acc, width_hz)``.

    The velocity floor takes its running median on vel·(2πf)² = acc·10⁶,
    so away from the high-pass cut it is the acceleration floor converted;
    only the lines within half a window of the cut, where the median window
    is cut short, are computed again. Equal to ``noise_floor(vel, width_hz)``
    to rounding; when lines sit at the floor's clipping level (below 10⁻¹⁶
    of the largest) that is computed directly instead.
    """
    if vel.quantity != "velocity" or acc.quantity != "acceleration":
        raise ValueError(f"need a velocity and an acceleration spectrum, got {vel.quantity!r}, {acc.quantity!r}")
    n = vel.power.size
    if acc.power.size != n or np.shape(acc_floor) != (n,) or not np.array_equal(vel.f_hz, acc.f_hz):
        raise ValueError("vel, acc and acc_floor must be on the same lines")
    width_lines = _floor_width_lines(vel, width_hz)
    half = width_lines // 2
    weight = _omega2(vel)
    power = vel.power * weight
    positive = np.flatnonzero(power > 0)
    if positive.size == 0:
        return np.zeros_like(power)
    start = int(positive[0])
    tail = start + half  # from here on every median window lies above the cut
    tiny_v = max(float(power.max()) * 1e-16, 1e-30)
    tiny_a = max(float(acc.power.max()) * 1e-16, 1e-30)
    if tail >= n or np.any(power[start:] < tiny_v) or np.any(acc.power[start:] < tiny_a):
        return noise_floor(vel, width_hz)
    floor = np.zeros_like(power)
    head = np.log10(power[start : start + 2 * half])  # all the head's median windows reach
    floor[start:tail] = 10.0 ** ndimage.median_filter(head, size=width_lines, mode="nearest")[:half]
    floor[tail:] = acc_floor[tail:] * 1e6  # mm/s from m/s
    return _to_velocity(floor, vel, weight)


@functools.lru_cache(maxsize=64)
def noise_threshold_db(n_averages: int, false_alarm_per_line: float = 1e-5) -> float:
    """Height above the median floor that noise alone exceeds with the given probability per line.

    The power of an averaged line of Gaussian noise is χ² with 2·K degrees of
    freedom (K = averages; Welch 1967), so a peak must clear the
    (1 − p) quantile relative to the median to count as real.
    """
    from scipy.stats import chi2

    dof = 2 * max(1, int(n_averages))
    return float(10 * np.log10(chi2.ppf(1 - false_alarm_per_line, dof) / chi2.median(dof)))


def _drop_leakage_skirts(idx: np.ndarray, logp_db: np.ndarray, window: str, margin_db: float = 6.0) -> np.ndarray:
    """Remove local maxima that lie within a stronger peak's leakage skirt (strongest first)."""
    env = leakage_envelope_db(window).tolist()
    reach = len(env)  # a stronger peak's skirt is looked at up to reach − 1 lines away
    order = idx[np.argsort(-logp_db[idx])]
    kept: dict[int, list[tuple[int, float]]] = {}  # kept peaks (line, level) by blocks of ``reach`` lines
    for k, level in zip(order.tolist(), logp_db[order].tolist()):
        b = k // reach
        if any(abs(j - k) < reach and level < lj + env[abs(j - k)] + margin_db
               for bb in (b - 1, b, b + 1) for j, lj in kept.get(bb, ())):
            continue
        kept.setdefault(b, []).append((k, level))
    return np.sort(np.array([k for block in kept.values() for k, _ in block], dtype=int))


def _offsets(p_km: np.ndarray, p_k: np.ndarray, p_kp: np.ndarray, inner: np.ndarray, window: str) -> np.ndarray:
    """Fractional-line offsets of tones peaking at lines of power ``p_k`` (neighbours ``p_km``, ``p_kp``).

    Hann: Grandke's two-line estimator δ = (2α−1)/(α+1), α = |X[k±1]|/|X[k]|
    (T. Grandke, IEEE Trans. Instrum. Meas. 32(2), 1983), exact for one tone
    apart from the leakage of the negative-frequency image. Other windows:
    parabola through the log amplitudes of three lines (quadratic
    interpolation; Smith & Serra 1987), bias below 0.1 line for flat-top.
    0 where the line has no neighbour on both sides (``inner`` False) or no power.
    """
    a_km, a_k, a_kp = np.sqrt(p_km), np.sqrt(p_k), np.sqrt(p_kp)
    ok = inner & (a_k > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        if window == "hann":
            up = a_kp >= a_km
            alpha = np.where(up, a_kp, a_km) / a_k
            delta = (2 * alpha - 1) / (alpha + 1)
            delta = np.where(up, delta, -delta)
        else:
            lm, l0, lp = (np.log(np.maximum(a, 1e-300)) for a in (a_km, a_k, a_kp))
            den = lm - 2 * l0 + lp
            delta = np.clip(0.5 * (lm - lp) / den, -0.5, 0.5)
            ok &= den < 0
    return np.where(ok, delta, 0.0)


def _tones(powers: np.ndarray, rows: np.ndarray, ks: np.ndarray, *, bin_width_hz: float, enbw_bins: float,
           window: str, f_hz: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(freq_hz, r.m.s.) of the tone peaking at line ``ks[i]`` of row ``rows[i]`` of ``powers`` (see tone_at).

    ``f_hz`` (the lines' frequencies) for a velocity spectrum, whose lobe is
    summed on acceleration and converted at the interpolated frequency.
    """
    n = powers.shape[1]
    half = _LOBE_HALF_LINES.get(window, 2)
    inner = (ks > 0) & (ks < n - 1)
    km, kp = np.clip(ks - 1, 0, n - 1), np.clip(ks + 1, 0, n - 1)
    f = (ks + _offsets(powers[rows, km], powers[rows, ks], powers[rows, kp], inner, window)) * bin_width_hz
    # main-lobe sums, each as np.sum of its slice: whole lobes in one gather, lobes cut by an end one by one
    lobe_sum = np.empty(ks.size)
    whole = (ks >= half) & (ks + half < n)
    lobe = ks[whole, None] + np.arange(-half, half + 1)
    lines = powers[rows[whole, None], lobe]
    if f_hz is not None:
        lines = lines * (2 * np.pi * f_hz[lobe]) ** 2
    lobe_sum[whole] = lines.sum(axis=1)
    for i in np.flatnonzero(~whole):
        lo, hi = max(0, int(ks[i]) - half), min(n, int(ks[i]) + half + 1)
        part = powers[rows[i], lo:hi]
        lobe_sum[i] = np.sum(part if f_hz is None else part * (2 * np.pi * f_hz[lo:hi]) ** 2)
    if f_hz is None:
        return f, np.sqrt(lobe_sum / enbw_bins)
    with np.errstate(divide="ignore", invalid="ignore"):
        return f, np.where(f > 0, np.sqrt(lobe_sum / enbw_bins) / (2 * np.pi * f), 0.0)


def tones_at(spec: Spectrum, ks) -> tuple[np.ndarray, np.ndarray]:
    """:func:`tone_at` at each line of ``ks``, in one pass: (freq_hz, r.m.s. amplitude) arrays."""
    ks = np.asarray(ks, dtype=np.intp).reshape(-1)
    return _tones(spec.power[None, :], np.zeros_like(ks), ks, bin_width_hz=spec.bin_width_hz,
                  enbw_bins=spec.enbw_bins, window=spec.window,
                  f_hz=spec.f_hz if spec.quantity == "velocity" else None)


def tone_at(spec: Spectrum, k: int) -> tuple[float, float]:
    """Interpolated (freq_hz, r.m.s. amplitude) of the tone peaking at line ``k``.

    Frequency from the fractional-line offset (Grandke's estimator for Hann,
    a parabola on log amplitude otherwise). Amplitude is the power summed
    over the window's main lobe ÷ ENBW, which removes the scalloping loss;
    for a velocity spectrum the sum is made on acceleration and converted
    at the interpolated frequency.
    """
    f, amp = tones_at(spec, [k])
    return float(f[0]), float(amp[0])


def tones_at_rows(
    powers: np.ndarray, ks: np.ndarray, *, bin_width_hz: float, enbw_bins: float, window: str = "hann"
) -> tuple[np.ndarray, np.ndarray]:
    """:func:`tone_at` for acceleration power rows, line ``ks[i]`` of row *i*: (freq_hz, r.m.s. amplitude)."""
    powers = np.asarray(powers, dtype=np.float64)
    ks = np.asarray(ks, dtype=np.intp)
    return _tones(powers, np.arange(powers.shape[0]), ks, bin_width_hz=bin_width_hz, enbw_bins=enbw_bins,
                  window=window)


@functools.lru_cache(maxsize=8)
def leakage_envelope_db(window: str, max_lines: int = 64) -> np.ndarray:
    """Worst-case leakage of a tone ``d`` lines away, dB re its peak, d = 0..max_lines.

    From the window's own transform (zero-padded DFT, 32 points per line),
    taking the maximum over the tone's possible offsets within a line.
    """
    n, pad = 256, 32
    w = make_window(window, n)
    mag = np.abs(np.fft.rfft(w, n * pad))
    mag /= mag[0]
    env = np.empty(max_lines + 1)
    for d in range(max_lines + 1):
        lo, hi = max(0, (d * pad) - pad // 2), d * pad + pad // 2 + 1
        env[d] = mag[lo:hi].max()
    env = np.maximum.accumulate(env[::-1])[::-1]  # monotone non-increasing
    return 20 * np.log10(np.maximum(env, 1e-12))


def find_peaks(
    spec: Spectrum,
    floor: np.ndarray | None = None,
    *,
    min_height_db: float = 6.0,
    fmin_hz: float = 0.0,
    fmax_hz: float | None = None,
    max_peaks: int | None = None,
    false_alarm_per_line: float | None = 1e-5,
) -> tuple[Peak, ...]:
    """Peaks standing above the local floor, strongest first.

    A peak must clear ``min_height_db`` and, unless ``false_alarm_per_line``
    is None, the height that averaged noise alone would reach with that
    probability per line (:func:`noise_threshold_db`). Works on log power,
    so small peaks on a low floor are found as well as large ones. Each peak
    gets an interpolated frequency and amplitude (see :func:`tone_at`);
    amplitude is r.m.s. in the spectrum's unit.
    """
    if floor is None:
        floor = noise_floor(spec)
    if false_alarm_per_line is not None:
        min_height_db = max(min_height_db, noise_threshold_db(spec.n_averages, false_alarm_per_line))
    half = _LOBE_HALF_LINES.get(spec.window, 2)
    tiny = 1e-300
    logp = 10 * np.log10(np.maximum(spec.power, tiny))
    logf = 10 * np.log10(np.maximum(floor, tiny))
    # local maxima of a sampled curve lie at least 2 lines apart: a distance of 2 selects nothing more
    idx, _ = signal.find_peaks(logp, distance=half) if half > 2 else signal.find_peaks(logp)
    fmax = spec.fmax_hz if fmax_hz is None else fmax_hz
    idx = idx[(spec.power[idx] > 0) & (floor[idx] > 0)]
    idx = idx[logp[idx] - logf[idx] >= min_height_db]
    idx = _drop_leakage_skirts(idx, logp, spec.window)
    f, amp = tones_at(spec, idx)
    height = logp[idx] - logf[idx]
    out = [
        Peak(freq_hz=float(f[i]), amp=float(amp[i]), height_db=float(height[i]), bin_idx=int(idx[i]))
        for i in np.flatnonzero((f >= fmin_hz) & (f <= fmax))
    ]
    out.sort(key=lambda p: -p.amp)
    if max_peaks is not None:
        out = out[:max_peaks]
    return tuple(out)
