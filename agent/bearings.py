"""Rolling-element bearing diagnosis from envelope and plain spectra (pure functions).

For each configured bearing the squared envelope spectrum (SES, see
:mod:`agent.envelope`) is searched for the defect families of R. B. Randall,
J. Antoni, "Rolling element bearing diagnostics — a tutorial", MSSP 25(2),
2011, §2 and §4.4:

* outer race — harmonics of BPFO, no modulation;
* inner race — harmonics of BPFI with sidebands at ±1X (the defect passes
  through the load zone once per turn);
* rolling element — harmonics of 2×BSF (or BSF) with sidebands at ±FTF;
* cage — harmonics of FTF.

A fundamental is searched within ± ``slip_tol`` of its kinematic value
(1-2 % slip, Randall & Antoni 2011 §2.1); its harmonics are then looked up
at whole multiples of the frequency found, to within a line or two. A peak's
height is measured in dB above the local floor of the SES (running median,
so discrete lines do not raise it). Lines at whole multiples of the shaft
speed are skipped: bearing tones are not synchronous, and 1X harmonics in the
envelope (looseness, rubs, electrical modulation) would otherwise pose as a
defect family.

Two envelope views are searched (:func:`envelope_views`): the band chosen by
the fast kurtogram and the whole band above ``fmin``, both after cepstrum
pre-whitening; the stronger evidence wins. Each view is searched line by
line (sharp tones) and after averaging the power over ``slip_tol`` of the
defect frequency, which gathers tones smeared by random slip — typical of
rolling-element defects — into one hump.

Scores, thresholds and the stage model are our choices (common practice
where so marked), stated here:

* a harmonic counts when it stands ``min_height_db`` (8 dB) above the floor;
  in the SES of Gaussian noise a line's magnitude is Rayleigh-distributed,
  so it stands c = 8 dB above the median with probability 2^(-c²), c² =
  10^0.8, i.e. about 1.3 % (computed);
* family score = Σ over harmonics of the height above threshold (each
  capped at 15 dB), plus half the same for sidebands; one family member
  alone counts only if 8 dB above threshold, else its score is cut to 30 %;
  cage (FTF) scores are halved, as slip, line-frequency and load-zone
  modulation also live in that region of the envelope and cage defects are
  rare; confidence = 1 − exp(−score/20);
* families compete: the one with the strongest harmonics (Σ height ÷
  harmonic number) wins, its lines are set aside and the others re-scored,
  so that no family borrows another's lines through a slip-shifted
  fundamental (the 3rd BSF harmonic lies 1.4 % from 2×BPFO on a 6205);
* bearings compete the same way (:func:`diagnose_bearings`): the bearing
  whose leading family is strongest keeps its lines once it is called; the
  others are re-scored with those lines set to the floor, so one defect is
  not reported again on a second bearing whose tones happen to meet its
  harmonics (on the demo skid 2 × motor BPFI lies 1 % from 3 × pump BPFO);
* stage (common practice): 1 defect only in the envelope; 2 a defect tone
  also in the velocity spectrum; 3 harmonics there and, for inner race and
  rolling element, sidebands; 4 the high-frequency floor raised broadly,
  across the octaves, not only where the impacts ring a resonance
  (:func:`with_floor_stage`, from the diagnosis stage's floor regions).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy import ndimage

from agent.envelope import EnvelopeSpectrum, envelope_from_spectrum, envelope_spectrum, signal_spectrum
from agent.kinematics import BearingSpec, bearing_orders, train_from_config
from agent.model import Finding, Severity
from agent.spectra import CaptureSpectra, Spectrum, SpectrumPlan, accel_spectrum, noise_floor, velocity_spectrum

#: finding codes, one per defect
CODES = {
    "outer": "bearing_outer_race",
    "inner": "bearing_inner_race",
    "ball": "bearing_rolling_element",
    "cage": "bearing_cage",
}
#: code of an unassigned non-synchronous envelope family (no geometry configured)
UNASSIGNED_CODE = "bearing_tone_unassigned"

#: a capture must hold at least this many periods of the slowest race/rolling-element tone
MIN_DEFECT_PERIODS = 20

#: highest demodulated frequency as a fraction of fs (anti-alias filters roll off above ~0.45 fs)
FMAX_FRACTION = 0.45

_LABEL = {"outer": "BPFO", "inner": "BPFI", "ball": "2xBSF", "ball1": "BSF", "cage": "FTF"}


def _harmonic_label(defect: str, k: int) -> str:
    """'BPFO', '3xBPFO'; the 2×BSF family is labelled in BSF multiples ('4xBSF')."""
    if defect == "ball":
        return f"{2 * k}xBSF"
    base = _LABEL[defect]
    return f"{k}x{base}" if k > 1 else base


def spec_from_geometry(
    name: str, balls: int, ball_diameter_mm: float, pitch_diameter_mm: float, contact_angle_deg: float = 0.0
) -> BearingSpec:
    """A bearing to watch from its geometry (kinematic orders: :func:`agent.kinematics.bearing_orders`)."""
    return BearingSpec(name, bearing_orders(balls, ball_diameter_mm, pitch_diameter_mm, contact_angle_deg))


@dataclass(frozen=True, slots=True)
class BearingSettings:
    """Detector settings (all general; none depends on a particular machine)."""

    slip_tol: float = 0.02  # ± fraction around each kinematic fundamental
    n_harmonics: int = 5
    min_height_db: float = 8.0  # a harmonic/sideband counts above this height over the floor
    call_confidence: float = 0.5  # a defect is called at or above this confidence
    report_confidence: float = 0.5  # findings below this are not returned (scores keep them)
    band_hz: tuple[float, float] | None = None  # fixed demodulation band (None = kurtogram)
    fmin_hz: float | None = None  # lowest demodulation frequency (None = 4× highest defect tone)
    sync_tol: float = 0.004  # skip lines within this fraction (and 1.5 lines) of n×1X
    line_hz: float | None = None  # supply frequency: its harmonics are skipped too (None = unknown)

    def __post_init__(self) -> None:
        if not 0.0 < self.slip_tol <= 0.1:
            raise ValueError(f"slip_tol must be in (0, 0.1], got {self.slip_tol!r}")
        if not 1 <= self.n_harmonics <= 20:
            raise ValueError(f"n_harmonics must be in [1, 20], got {self.n_harmonics!r}")
        if not 0.0 < self.report_confidence <= self.call_confidence < 1.0:
            raise ValueError("need 0 < report_confidence <= call_confidence < 1")


@dataclass(frozen=True, slots=True)
class DefectScore:
    """Evidence for one defect of one bearing."""

    bearing: str
    defect: str  # "outer" | "inner" | "ball" | "cage"
    fundamental_hz: float
    harmonics_found: int
    sidebands_found: int
    score: float
    confidence: float
    evidence: tuple[dict, ...]
    view: str  # which envelope spectrum gave it
    rank: float = 0.0  # Σ harmonic heights above threshold ÷ harmonic number (uncapped), to rank families


# ---------------------------------------------------------------------------
# helpers on one SES


def _height_db(ses: EnvelopeSpectrum, width_hz: float, smooth_lines: int = 1, n_lines: int | None = None) -> np.ndarray:
    """Height of every SES line above a running-median floor, dB (20·log10 of amplitude).

    ``smooth_lines`` > 1 first averages the power over that many lines, which
    gathers a tone smeared by random slip (rolling elements) into one hump.
    ``n_lines`` returns the first ``n_lines`` heights only, computed from the
    lines they depend on (the smoothing, and the block medians on either
    side of each line): the same values as those of the whole spectrum.
    """
    a = np.asarray(ses.amplitude)
    df = ses.bin_width_hz
    w = max(15, int(round(width_hz / df)))
    step = max(1, w // 2)  # block medians every w/2 lines, interpolated: the median floor at a fraction of the cost
    half = w // 2
    n = a.size if n_lines is None else min(a.size, int(n_lines))
    # heights of lines < n read the log amplitudes of lines < n + step + half (the block median past them);
    # the medians past that, where the cut stands in for the spectrum's end, are not read
    need = n + step + half
    cut = need + smooth_lines // 2 + 1  # ... and the smoothing reads half its width further
    if cut < a.size:
        part = a[:cut]
        if smooth_lines > 1:
            part = np.sqrt(np.maximum(ndimage.uniform_filter1d(part * part, smooth_lines, mode="nearest"), 0.0))
        part = part[:need]
        # the whole spectrum's clip level (below) is at most 2e-12 × its largest line (smoothing does not
        # raise the largest power); above that no line is clipped and the logarithms are the same
        if float(part.min()) > max(2e-12 * float(a.max()), 1e-300):
            return _heights_above_floor(np.log10(part), n, step, half)
    if smooth_lines > 1:
        a = np.sqrt(np.maximum(ndimage.uniform_filter1d(a * a, smooth_lines, mode="nearest"), 0.0))
    tiny = max(float(a.max()) * 1e-12, 1e-300)
    return _heights_above_floor(np.log10(np.maximum(a, tiny)), n, step, half)


def _heights_above_floor(la: np.ndarray, n: int, step: int, half: int) -> np.ndarray:
    """20·(``la`` − floor) dB for the first ``n`` lines; floor = medians of 2·``half`` + 1 lines every ``step``.

    ``la`` is log10 of the amplitude; the medians, taken at every ``step``-th
    line (edge lines repeated beyond the ends), are interpolated linearly.
    """
    padded = np.concatenate((np.full(half, la[0]), la, np.full(half, la[-1])))  # edge lines repeated
    centres = np.arange(0, la.size, step)
    # rows of 2·half + 1 lines about each centre, a strided view of ``padded``
    win = np.lib.stride_tricks.as_strided(padded, (centres.size, 2 * half + 1), (step * padded.strides[0],
                                                                                   padded.strides[0]), writeable=False)
    # the middle of 2·half + 1 sorted values is the median (np.partition: same value, ~5× quicker than np.median)
    medians = np.partition(win, half, axis=1)[:, half]
    floor = np.interp(np.arange(n), centres, medians)
    h = 20.0 * (la[:n] - floor)
    h[0] = 0.0
    return h


def _multiples_mask(f_hz: np.ndarray, base_hz: float, tol: float, df: float) -> np.ndarray:
    """True for lines within ``tol`` (and 1.5 lines) of a whole multiple of ``base_hz``."""
    n = np.round(f_hz / base_hz)
    dist_hz = np.abs(f_hz - n * base_hz)
    return (n >= 1) & (dist_hz <= np.maximum(tol * n * base_hz, 1.5 * df))


def _sync_mask(f_hz: np.ndarray, speed_hz: float, settings: "BearingSettings", df: float) -> np.ndarray:
    """Lines that are not bearing tones: n×1X and, when the supply frequency is known, n×LF.

    Line-frequency harmonics modulate the envelope of electrical machines
    (magnetic forces at 2×LF); the mask is narrow (0.1 %, 1.5 lines) since
    the supply frequency is held closely.
    """
    mask = _multiples_mask(f_hz, speed_hz, settings.sync_tol, df)
    if settings.line_hz:
        mask |= _multiples_mask(f_hz, settings.line_hz, 0.001, df)
    return mask


def _line_near(h: np.ndarray, df: float, f_hz: float, half_lines: int) -> tuple[int, float]:
    """Index and height of the highest line within ± ``half_lines`` of ``f_hz``."""
    k = int(round(f_hz / df))
    lo, hi = max(1, k - half_lines), min(h.size, k + half_lines + 1)
    if lo >= hi:
        return -1, -np.inf
    i = lo + int(np.argmax(h[lo:hi]))
    return i, float(h[i])


@dataclass(frozen=True, slots=True)
class _Combs:
    """Harmonic combs of several defect fundamentals on one SES's lines (:func:`_combs`, :func:`_families`).

    Row ``d`` is one fundamental. Rows with fewer candidates repeat their
    last one, which never wins over the original (the first best counts).
    """

    f0_hz: np.ndarray  # (D,) kinematic fundamentals, Hz
    cand_hz: np.ndarray  # (D, C) candidate fundamentals within ±tol, four per line
    ks: np.ndarray  # (K,) harmonic numbers 1 … n_harmonics
    n_ks: np.ndarray  # (D,) harmonics searched: those below the view's top frequency, ks[:n_ks]
    idx: np.ndarray  # (D, C, K) the line nearest k × candidate, within 1 … n_lines − 2
    half_lines: np.ndarray  # (D, K) half-width, lines, of the window each harmonic's line is taken from


def _combs(df: float, f0_hz: list[float], tol: float, n_harm: int, fmax_hz: float, n_lines: int) -> _Combs:
    """Candidate fundamentals within ±``tol`` of each of ``f0_hz`` and where their harmonics fall.

    Lines are ``df`` Hz apart; harmonics are searched up to ``n_harm``, below
    ``fmax_hz`` at the top of the slip band; ``n_lines`` is the length of the
    height spectra the combs are laid on. They depend on the view and the
    defects only, so they serve every search of those defects on that view.
    """
    ks = np.arange(1, n_harm + 1)
    grids = []
    for f0 in f0_hz:
        lo, hi = f0 * (1 - tol), f0 * (1 + tol)
        lines = np.arange(math.floor(lo / df), math.ceil(hi / df) + 1) * df
        grids.append(np.linspace(lines[0], lines[-1], 4 * lines.size))  # finer than the lines: harmonics land right
    cand = np.empty((len(grids), max(g.size for g in grids)))
    for row, g in zip(cand, grids):
        row[: g.size], row[g.size :] = g, g[-1]
    n_ks = np.array([int(np.count_nonzero(ks * f0 * (1 + tol) < fmax_hz)) for f0 in f0_hz])
    idx = np.rint(cand[:, :, None] * ks[None, None, :] / df).astype(int)
    idx = np.minimum(np.maximum(idx, 1), n_lines - 2)
    half = 1 + (ks[None, :] * (cand[:, 1:2] - cand[:, :1]) / df + 0.5).astype(int)  # the grid's spread at k
    return _Combs(np.asarray(f0_hz, dtype=np.float64), cand, ks, n_ks, idx, half)


def _families(
    h: np.ndarray, df: float, combs: _Combs, rows: list[tuple[int, int, float]]
) -> list[tuple[float, list[tuple[int, float, float]]]]:
    """Best fundamental of each comb searched, by its harmonics, and those harmonics.

    ``h`` holds height spectra (dB), one a row, lines ``df`` Hz apart; each
    of ``rows`` is (row of ``h``, row of ``combs``, threshold dB). A
    candidate's total is Σ over harmonics k of min(max(height − threshold,
    0), 15)/k, the height being the highest of the three lines about k ×
    candidate (weight 1/k: the fundamental must carry weight of its own);
    the first best candidate wins. Each harmonic's line is then the highest
    within the comb's spread at that order. Returns (fundamental_hz, [(k,
    freq_hz, height_db), ...]) per row, in order.
    """
    out: list = [None] * len(rows)
    hr, dr, thr = (np.array(col) for col in zip(*rows))
    for nk in np.unique(combs.n_ks[dr]):  # rows summing as many harmonics: the same sums as one by one
        sel = np.flatnonzero(combs.n_ks[dr] == nk)
        if nk == 0:
            for r in sel:
                out[r] = (float(combs.f0_hz[dr[r]]), [])
            continue
        ks, hrow, drow = combs.ks[:nk], hr[sel], dr[sel]
        rh = hrow[:, None, None]
        idx = combs.idx[drow, :, :nk]  # (R, C, nk)
        hh = np.maximum(np.maximum(h[rh, idx - 1], h[rh, idx]), h[rh, idx + 1])
        credit = np.minimum(np.maximum(hh - thr[sel, None, None], 0.0), 15.0)
        total = (credit / ks).sum(axis=2) + 1e-6 * hh[:, :, 0]
        best = combs.cand_hz[drow, np.argmax(total, axis=1)]  # (R,)
        lines, heights = _lines_near(h, df, hrow, ks[None, :] * best[:, None], combs.half_lines[drow, :nk])
        for j, r in enumerate(sel):
            out[r] = (float(best[j]), [(int(k), int(i) * df, float(hk)) for k, i, hk in zip(ks, lines[j], heights[j])])
    return out


def _lines_near(
    h: np.ndarray, df: float, rows: np.ndarray, f_hz: np.ndarray, half_lines: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_line_near` for many frequencies at once: ``f_hz[r, k]`` in the height spectrum ``h[rows[r]]``.

    Returns the line indices (−1 where the window holds no line) and heights.
    """
    n = h.shape[1]
    k = np.rint(f_hz / df).astype(int)
    lo = np.maximum(1, k - half_lines)
    hi = np.minimum(n, k + half_lines + 1)
    cols = lo[..., None] + np.arange(max(1, int((hi - lo).max())))
    vals = np.where(cols < hi[..., None], h[rows[:, None, None], np.minimum(cols, n - 1)], -np.inf)  # −inf off it
    j = np.argmax(vals, axis=2)  # the first highest line of each window, as np.argmax on the window
    return np.where(lo < hi, lo + j, -1), np.take_along_axis(vals, j[..., None], axis=2)[..., 0]


def _sidebands(
    h: np.ndarray, df: float, harmonics: list[tuple[int, float, float]], spacing_hz: float, thr: float
) -> list[tuple[int, str, float, float]]:
    """Sidebands (harmonic k, "-"/"+", freq, height) at ±spacing around the harmonics found (height ≥ thr)."""
    out = []
    for k, f, hk in harmonics:
        if hk < thr:
            continue
        for sign, tag in ((-1, "-"), (1, "+")):
            fs = f + sign * spacing_hz
            if fs <= 0:
                continue
            i, hs = _line_near(h, df, fs, max(1, int(round(0.005 * fs / df))))
            out.append((int(k), tag, i * df, hs))
    return out


# ---------------------------------------------------------------------------
# scoring


def _score_defect(
    name: str,
    defect: str,
    family: tuple[float, list[tuple[int, float, float]]],
    df: float,
    h: np.ndarray,
    thr: float,
    speed_hz: float,
    ftf_order: float,
    view: str,
    sigma_scale: float = 1.0,
) -> DefectScore:
    """Score one defect family found in the height spectrum ``h`` (lines ``df`` Hz apart; count above ``thr`` dB).

    ``family`` is the fundamental and harmonics :func:`_families` found.
    Credits are dB above ``thr`` times ``sigma_scale``: a smoothed spectrum
    fluctuates √(M/1.5) times less than single lines, so a dB of it counts
    that many times more (same credit for the same number of standard
    deviations).
    """
    scale = sigma_scale
    f0, harms = family
    score = 0.0
    rank = 0.0
    evidence = []
    n_h = 0
    for k, f, hk in harms:
        if hk >= thr:
            n_h += 1
            score += min(scale * (hk - thr), 15.0)
            rank += scale * (hk - thr) / k
            evidence.append(
                {"freq_hz": round(float(f), 3), "label": _harmonic_label(defect, k),
                 "height_db": round(hk, 1), "spectrum": f"envelope ({view})"}
            )
    n_sb = 0
    if defect in ("inner", "ball", "ball1") and n_h:
        spacing = speed_hz if defect == "inner" else ftf_order * speed_hz
        sb_label = "1X" if defect == "inner" else "FTF"
        for k, tag, f, hs in _sidebands(h, df, [x for x in harms if x[0] <= 3], spacing, thr):
            if hs >= thr:
                n_sb += 1
                score += 0.5 * min(scale * (hs - thr), 15.0)
                evidence.append(
                    {"freq_hz": round(float(f), 3), "label": f"{_harmonic_label(defect, k)} {tag}{sb_label} sideband",
                     "height_db": round(hs, 1), "spectrum": f"envelope ({view})"}
                )
    # a lone line is weak evidence: at least two family members or one very strong fundamental
    h1 = harms[0][2] if harms else -np.inf
    if n_h < 2 and not (n_h == 1 and scale * (h1 - thr) >= 8.0):
        score *= 0.3
    if defect == "cage":
        # the FTF region of the envelope holds slip, line-frequency and looseness
        # modulation too; cage defects are rare: ask for twice the evidence
        score *= 0.5
    conf = 1.0 - math.exp(-score / 20.0)
    return DefectScore(name, "ball" if defect == "ball1" else defect, f0, n_h, n_sb, score, conf,
                       tuple(evidence), view, rank)


def envelope_views(
    accel: np.ndarray,
    fs_hz: float,
    max_defect_hz: float,
    settings: BearingSettings = BearingSettings(),
) -> tuple[EnvelopeSpectrum, ...]:
    """The envelope spectra the detector looks at.

    With a configured band: that band only. Otherwise two views of the
    pre-whitened signal: the band chosen by the kurtogram, and the whole band
    from ``fmin`` to ``FMAX_FRACTION``·fs (below the anti-alias filter's edge).
    """
    if settings.band_hz is not None:
        return (envelope_spectrum(accel, fs_hz, settings.band_hz),)
    fmax = FMAX_FRACTION * fs_hz
    fmin = settings.fmin_hz if settings.fmin_hz is not None else min(4.0 * max_defect_hz, 0.25 * fmax)
    min_bw = min(4.0 * max_defect_hz, 0.5 * (fmax - fmin))
    spec = signal_spectrum(accel, fs_hz, whiten=True)  # one pre-whitened spectrum for both views
    n = np.asarray(accel).size
    full = envelope_from_spectrum(spec, n, fs_hz, (fmin, fmax), prewhitened=True)
    try:
        kg = envelope_from_spectrum(spec, n, fs_hz, prewhitened=True, fmin_hz=fmin, min_bandwidth_hz=min_bw,
                                    fmax_hz=fmax)
    except ValueError:
        return (full,)  # capture too short for any kurtogram band of that width: the full band only
    return (kg, full)


def score_bearing(
    spec: BearingSpec,
    views: tuple[EnvelopeSpectrum, ...],
    speed_hz: float,
    settings: BearingSettings = BearingSettings(),
    heights_cache: dict | None = None,
) -> dict[str, DefectScore]:
    """Best score per defect of one bearing over the envelope views.

    Each view is searched twice: line by line (sharp tones) and after
    averaging the power over ``slip_tol`` of the defect frequency (tones
    smeared by random slip, typical of rolling-element defects; Randall &
    Antoni 2011 §2.1). An average of M independent lines fluctuates as
    1/√M (χ² statistics), so the smoothed search uses the threshold
    10·log10(1 + 8/√(M/1.5)) dB (Hann lines overlap: M/1.5 independent);
    the factor 8 makes it meet the sharp 8 dB threshold at one line and
    sit above the 99.9th percentile of smoothed noise-only SES lines
    measured on the healthy records (about 4 dB at M = 29).

    Heights and masks cover only the lines the search can read
    (:func:`_lines_searched`), from 0 Hz. ``heights_cache`` (a dict the
    caller keeps while ``views`` live) shares the line heights between
    bearings scored on the same views: they depend only on the view, the
    floor width and the smoothing, not on the bearing.
    """
    o = spec.orders
    defects = {"outer": o.bpfo, "inner": o.bpfi, "ball": 2 * o.bsf, "ball1": o.bsf, "cage": o.ftf}
    top_order = max(defects.values())
    prepared = []
    for ses in views:
        df = ses.bin_width_hz
        width = max(0.5 * speed_hz, 10 * df)
        n = _lines_searched(ses, top_order, speed_hz, settings)  # the search reads no line above these
        sync = _sync_mask(ses.f_hz[:n], speed_hz, settings, df)
        view = f"{ses.band_source} {ses.band_hz[0]:.0f}-{ses.band_hz[1]:.0f} Hz"
        prepared.append((ses, sync, view, width, n))

    cache: dict = {} if heights_cache is None else heights_cache

    def heights(i: int, m: int) -> np.ndarray:
        ses, _, _, width, n = prepared[i]
        w = width if m == 1 else min(max(width, 10 * m * ses.bin_width_hz), 2 * speed_hz)
        key = (id(ses), w, m)
        if key not in cache or cache[key].size < n:
            h = _height_db(ses, w, smooth_lines=m, n_lines=n)
            h.setflags(write=False)  # shared: never changed in place
            cache[key] = h
        return cache[key][:n]  # the first n heights are the same however many were computed

    names = list(defects)
    combs: list[_Combs] = []  # per view, every defect: the same in every round
    for ses, _, _, _, n in prepared:
        fmax = min(float(ses.f_hz[-1]), 0.8 * (ses.band_hz[1] - ses.band_hz[0]))
        combs.append(_combs(ses.bin_width_hz, [defects[d] * speed_hz for d in names], settings.slip_tol,
                            settings.n_harmonics, fmax, n))

    def run(remaining, masks):
        best: dict[str, DefectScore] = {}
        for i, ((ses, sync, view, width, n), mask) in enumerate(zip(prepared, masks)):
            df = ses.bin_width_hz
            searches = []  # (defect, smoothing lines, threshold dB, credit scale): line by line, then smoothed
            for defect in remaining:
                m = int(round(settings.slip_tol * defects[defect] * speed_hz / df)) | 1
                searches.append((defect, 1, settings.min_height_db, 1.0))
                if m >= 3:
                    m_eff = math.sqrt(m / 1.5)
                    searches.append((defect, m, 10 * math.log10(1 + 8.0 / m_eff), m_eff))
            smoothing = sorted({m for _, m, _, _ in searches})
            h = np.where(mask, 0.0, np.stack([heights(i, m) for m in smoothing]))  # a row per smoothing
            rows = [(smoothing.index(m), names.index(d), thr) for d, m, thr, _ in searches]
            for (defect, m, thr, sig), (hrow, _, _), fam in zip(searches, rows, _families(h, df, combs[i], rows)):
                sc = _score_defect(spec.name, defect, fam, df, h[hrow], thr, speed_hz, o.ftf, view, sig)
                if sc.defect not in best or sc.score > best[sc.defect].score:
                    best[sc.defect] = sc
        return best

    # explain away: the family with the strongest harmonics wins; its lines
    # (harmonics and their 1X/FTF sidebands) are masked and the rest re-scored,
    # so a family cannot borrow another's lines through a slip-shifted fundamental
    masks = [p[1].copy() for p in prepared]
    remaining = list(names)
    out: dict[str, DefectScore] = {}
    while remaining:
        best = run(remaining, masks)
        win = max(best.values(), key=lambda d: (d.rank, d.score))
        out[win.defect] = win
        remaining = [n for n in remaining if (n[:4] if n.startswith("ball") else n) != win.defect]
        if win.confidence < settings.report_confidence:
            out.update({d: sc for d, sc in best.items() if d not in out})
            break
        for (ses, _, _, _, n), mask in zip(prepared, masks):
            mask |= _family_mask(ses.f_hz, win, speed_hz, o.ftf * speed_hz)[:n]
    return out


def _lines_searched(ses: EnvelopeSpectrum, top_order: float, speed_hz: float, settings: BearingSettings) -> int:
    """How many lines of ``ses`` (from 0 Hz) the family search of one bearing can read.

    The comb (:func:`_combs`, :func:`_families`) reads up to ``n_harmonics`` × the highest
    fundamental searched, ``top_order`` × ``speed_hz`` × (1 + ``slip_tol``),
    plus about a line per harmonic order (its grid) and a few (the window
    around each harmonic); :func:`_sidebands` reads ±1X (≥ FTF) about the
    first three harmonics within 0.5 %. The bound keeps 1 % and eight lines
    spare; with fewer lines in the view, all of them.
    """
    f_top_hz = settings.n_harmonics * top_order * speed_hz * (1 + settings.slip_tol) + speed_hz
    return min(ses.f_hz.size, int(1.01 * f_top_hz / ses.bin_width_hz) + 2 * settings.n_harmonics + 8)


def _family_mask(f_hz: np.ndarray, win: DefectScore, speed_hz: float, ftf_hz: float, *, rel_half: float = 0.003,
                 top_hz: float | None = None, max_half_hz: float = np.inf) -> np.ndarray:
    """Lines of a winning family: all harmonics of its fundamental (up to ``top_hz``) and their sidebands.

    Each line ± max(2.5 lines, ``rel_half`` × its frequency), at most ± ``max_half_hz``.
    """
    df = float(f_hz[1] - f_hz[0])
    f0 = win.fundamental_hz
    ks = np.arange(1, int(min(f_hz[-1], top_hz or np.inf) / f0) + 1)
    centres = [ks * f0]
    spacing = speed_hz if win.defect == "inner" else ftf_hz if win.defect == "ball" else 0.0
    if spacing:
        centres += [ks * f0 - spacing, ks * f0 + spacing]
    c = np.concatenate(centres)
    c = c[(c > 0) & (c < f_hz[-1])]
    half = np.minimum(np.maximum(2.5 * df, rel_half * c), max_half_hz)
    lo = np.clip(np.floor((c - half) / df).astype(int), 0, f_hz.size)
    hi = np.clip(np.ceil((c + half) / df).astype(int) + 1, 0, f_hz.size)
    # lines [lo, hi) of every centre: +1 at each start, −1 at each end; covered where the running sum is > 0
    edges = np.zeros(f_hz.size + 1, dtype=np.int64)
    np.add.at(edges, lo, 1)
    np.add.at(edges, hi, -1)
    return np.cumsum(edges[:-1]) > 0


def _spectrum_stage(
    score: DefectScore,
    staging: tuple[Spectrum, np.ndarray] | None,
    speed_hz: float,
    ftf_hz: float,
    settings: BearingSettings,
) -> tuple[int, list[dict]]:
    """Stage 1-3 (common practice) and the velocity-spectrum evidence (``staging``: :func:`_staging_lines`).

    Stage 4 needs the capture's high-frequency floor: :func:`with_floor_stage`.
    """
    if staging is None:
        return 1, []
    vel, h = staging
    df = vel.bin_width_hz
    f0 = score.fundamental_hz
    found, ev = 0, []
    for k in range(1, 4):
        if k * f0 >= vel.fmax_hz:
            break
        i, hk = _line_near(h, df, k * f0, 1 + int(round(0.005 * k * f0 / df)))
        if hk >= settings.min_height_db:
            found += 1
            ev.append({"freq_hz": round(float(i * df), 2), "label": _harmonic_label(score.defect, k),
                       "height_db": round(hk, 1), "spectrum": "velocity"})
    if found == 0:
        return 1, ev
    spacing = speed_hz if score.defect == "inner" else ftf_hz if score.defect == "ball" else 0.0
    sb = 0
    if spacing:
        for s in (-1, 1):
            _, hs = _line_near(h, df, f0 + s * spacing, 1 + int(round(0.005 * f0 / df)))
            sb += hs >= settings.min_height_db
    if found >= 2 and (sb or not spacing):
        return 3, ev
    return 2, ev


def _staging_lines(
    accel_ms2: np.ndarray, fs_hz: float, speed_hz: float, settings: BearingSettings,
    spectra: CaptureSpectra | None = None,
) -> tuple[Spectrum, np.ndarray] | None:
    """The velocity spectrum (up to 16 384 lines) a finding's stage is judged on, and its lines' height
    above the noise floor, dB (shaft and supply harmonics set to 0). None below 256 samples.
    ``spectra``: the capture's shared spectra (the acceleration spectrum is then not recomputed).
    """
    if accel_ms2.size < 256:
        return None
    plan = SpectrumPlan.build(fs_hz, accel_ms2.size, lines=min(1 << 14, accel_ms2.size // 4))
    acc = accel_spectrum(accel_ms2, plan) if spectra is None else spectra.of_samples(accel_ms2).accel(plan)
    vel = velocity_spectrum(acc, f_low_hz=max(0.3 * speed_hz, plan.bin_width_hz))
    logp = 10 * np.log10(np.maximum(vel.power, 1e-300))
    h = logp - 10 * np.log10(np.maximum(noise_floor(vel), 1e-300))
    # shaft harmonics are not bearing tones, even where they fall on one
    return vel, np.where(_sync_mask(vel.f_hz, speed_hz, settings, vel.bin_width_hz), 0.0, h)


def diagnose_bearings(
    accel_ms2: np.ndarray,
    fs_hz: float,
    speed_hz: float,
    bearings: tuple[BearingSpec, ...],
    settings: BearingSettings = BearingSettings(),
    *,
    spectra: CaptureSpectra | None = None,
) -> tuple[Finding, ...]:
    """Bearing findings for one capture (one finding per bearing at most).

    ``accel_ms2`` may be angle-resampled (``fs_hz`` then in samples per
    revolution and ``speed_hz`` = 1). With no bearings configured, returns
    :func:`unassigned_tones` findings instead. ``spectra``: the same samples'
    :class:`agent.spectra.CaptureSpectra`, to share the acceleration spectrum.
    """
    x = np.asarray(accel_ms2, dtype=np.float64)
    if not speed_hz > 0:
        raise ValueError(f"speed_hz must be > 0, got {speed_hz!r}")
    if x.ndim != 1:
        raise ValueError(f"accel_ms2 must be 1-D, got shape {x.shape}")
    slowest = min((min(b.orders.bpfo, b.orders.bpfi, 2 * b.orders.bsf) for b in bearings), default=1.0)
    if x.size / fs_hz * slowest * speed_hz < MIN_DEFECT_PERIODS:
        return ()  # too few impacts in the capture to show a family: no verdict either way
    if not bearings:
        views = envelope_views(x, fs_hz, 10.0 * speed_hz, settings)
        return unassigned_tones(views, speed_hz, settings)
    max_defect = max(max(b.orders.bpfi, b.orders.bpfo, 2 * b.orders.bsf) for b in bearings) * speed_hz
    views = envelope_views(x, fs_hz, max_defect, settings)
    staging = None  # the velocity spectrum's lines for staging, made when a finding first needs them
    findings = []
    heights: dict = {}  # line heights per view, shared by the bearings (the views live until we return)
    all_scores = [score_bearing(b, views, speed_hz, settings, heights) for b in bearings]
    # explain away across bearings: the lines of a called family are its own; a weaker family of
    # another bearing is re-scored without them (harmonics of different bearings' tones can meet:
    # 2 × 4.96X lies 1 % from 3 × 3.25X, within a smoothed view's reach)
    order = sorted(range(len(bearings)), key=lambda i: _top_strength(all_scores[i]), reverse=True)
    claims: list[np.ndarray] | None = None
    for n, i in enumerate(order):
        if claims is not None and next(iter(all_scores[i].values())).confidence >= settings.report_confidence:
            kept = tuple(_lines_at_floor(ses, c, max(0.5 * speed_hz, 10 * ses.bin_width_hz))
                         for ses, c in zip(views, claims))
            all_scores[i] = score_bearing(bearings[i], kept, speed_hz, settings, {})
        win = next(iter(all_scores[i].values()))
        if win.confidence >= settings.call_confidence and n + 1 < len(order):
            own = [_claimed_lines(ses.f_hz, win, speed_hz, bearings[i].orders.ftf * speed_hz, max_defect, settings)
                   for ses in views]
            claims = own if claims is None else [c | m for c, m in zip(claims, own)]
    for b, scores in zip(bearings, all_scores):
        top = next(iter(scores.values()))  # the family that explains most
        if top.confidence < settings.report_confidence:
            continue
        if staging is None:
            staging = _staging_lines(x, fs_hz, speed_hz, settings, spectra)
        stage, vel_ev = _spectrum_stage(top, staging, speed_hz, b.orders.ftf * speed_hz, settings)
        others = {d: round(s.confidence, 3) for d, s in scores.items()}
        called = top.confidence >= settings.call_confidence
        findings.append(
            Finding(
                code=CODES[top.defect],
                confidence=round(top.confidence, 3),
                severity=Severity.ALERT if called and stage >= 3 else Severity.WATCH if called else Severity.INFO,
                title=_title(b.name, top.defect, called, top.fundamental_hz, top.fundamental_hz / speed_hz, stage),
                evidence=top.evidence + tuple(vel_ev),
                component=b.name,
                stage=stage,
                extra={"bearing": b.name, "scores": others, "view": top.view, "called": called,
                       "defect": top.defect, "fundamental": top.fundamental_hz,
                       "order": round(top.fundamental_hz / speed_hz, 4)},
            )
        )
    return tuple(findings)


def _top_strength(scores: dict[str, DefectScore]) -> tuple[float, float]:
    """(rank, score) of a bearing's leading family: the order in which bearings claim their lines."""
    top = next(iter(scores.values()))
    return top.rank, top.score


def _claimed_lines(f_hz: np.ndarray, win: DefectScore, speed_hz: float, ftf_hz: float, max_defect_hz: float,
                   settings: BearingSettings) -> np.ndarray:
    """Lines a called family keeps from the other bearings: its harmonics and their sidebands, with their skirts.

    Each line is claimed ± half the slip tolerance (1 % by default) of its
    frequency, the spread random slip gives a defect tone (Randall & Antoni
    2011, §2.1), at least ± 2.5 lines and at most ± a quarter of the
    fundamental; harmonics are claimed up to ``n_harmonics`` + 1 times the
    fastest defect tone searched, beyond which no family is scored.
    """
    return _family_mask(f_hz, win, speed_hz, ftf_hz, rel_half=0.5 * settings.slip_tol,
                        top_hz=(settings.n_harmonics + 1) * max_defect_hz, max_half_hz=0.25 * win.fundamental_hz)


def _lines_at_floor(ses: EnvelopeSpectrum, mask: np.ndarray, width_hz: float) -> EnvelopeSpectrum:
    """``ses`` with the ``mask``-ed lines set to the median of the unmasked lines within ± ``width_hz``.

    The lines a stronger family claimed then read as floor (height about 0 dB)
    in the sharp and in the smoothed views alike; the median floor of the
    other lines is left as it was (zeros would pull it down).
    """
    idx = np.flatnonzero(mask)
    if idx.size == 0:
        return ses
    a = np.array(ses.amplitude)
    src = ses.amplitude
    w = max(15, int(round(width_hz / ses.bin_width_hz)))
    cut = np.flatnonzero(np.diff(idx) > 1)
    for lo, hi in zip(np.r_[idx[0], idx[cut + 1]], np.r_[idx[cut], idx[-1]] + 1):
        a0, b0 = max(0, lo - w), min(a.size, hi + w)
        near = src[a0:b0][~mask[a0:b0]]
        a[lo:hi] = float(np.median(near)) if near.size else 0.0
    return replace(ses, amplitude=a)


#: stage 4 (the agent's own settings, set on the simulator's bearing stages, 2026-12): the median
#: high-frequency octave density ÷ the highest one (:func:`agent.peaks.floor_spread`) — a defect's
#: impacts ringing a resonance give 0.22-0.42, a floor raised broadly 0.65-0.72, a healthy flat
#: floor about 0.5 — and the median density in g/√Hz, at least the level the cavitation rule takes
#: as a surely raised floor without a baseline (healthy demo skid 2.6e-5, stage 3 6e-4-9.5e-4,
#: stage 4 2.5e-3-4e-3)
STAGE4_SPREAD = 0.55
STAGE4_DENSITY_G_RTHZ = 6e-4
#: a floor raised evenly across every octave is flow noise (cavitation: 0.88-1 on the simulator,
#: agent.diagnose.CAVITATION_SPREAD) rather than spreading bearing damage: no stage 4 from it
STAGE4_SPREAD_MAX = 0.85


def with_floor_stage(findings: tuple[Finding, ...], regions) -> tuple[Finding, ...]:
    """Findings with a called stage-3 bearing defect raised to stage 4 when the high-frequency
    floor is raised broadly (common practice: in the last stage the discrete tones sink into a raised
    broadband floor as the damage spreads). ``regions``: :class:`agent.peaks.FloorRegion` of the
    capture's acceleration floor spectrum.
    """
    from agent.peaks import floor_spread, hf_floor_densities

    dens = [d for _, d in hf_floor_densities(regions)]
    if len(dens) < 3:
        return findings  # too few octaves to tell a resonance from a broad rise
    spread = floor_spread(dens)
    mid = sorted(dens)[len(dens) // 2]
    if not STAGE4_SPREAD <= spread < STAGE4_SPREAD_MAX or mid < STAGE4_DENSITY_G_RTHZ:
        return findings
    out = []
    for f in findings:
        if f.code in CODES.values() and f.stage == 3 and f.extra.get("called"):
            x = f.extra
            f = replace(
                f, stage=4,
                title=_title(x["bearing"], x["defect"], True, x["fundamental"], x["order"], 4),
                evidence=f.evidence + ({"metric": "high-frequency floor, median octave, g/√Hz",
                                        "value": float(f"{mid:.3g}")},
                                       {"metric": "median octave ÷ highest (1 = raised evenly)",
                                        "value": round(spread, 2)}),
            )
        out.append(f)
    return tuple(out)


def _title(name: str, defect: str, called: bool, f0_hz: float, order: float, stage: int) -> str:
    what = {"outer": "outer race", "inner": "inner race", "ball": "rolling element", "cage": "cage"}[defect]
    return (f"{name}: {'' if called else 'possible '}{what} defect "
            f"({_LABEL[defect]} {f0_hz:.2f} Hz, {order:.3f}× shaft speed), stage {stage}")


def unassigned_tones(
    views: tuple[EnvelopeSpectrum, ...],
    speed_hz: float,
    settings: BearingSettings = BearingSettings(),
    *,
    min_order: float = 1.0,
    max_order: float = 15.0,
) -> tuple[Finding, ...]:
    """Non-synchronous harmonic families in the envelope (no geometry known).

    Every line ``min_height_db`` + 4 dB above the floor between
    ``min_order`` and ``max_order`` × shaft speed, not at a whole multiple of
    1X, is tried as a fundamental; a family needs the fundamental and at
    least two harmonics. The default ``min_order`` of 1 leaves out cage
    tones (FTF < 1X), which the envelope also shows from slip and load-zone
    modulation; confidence is capped at 0.6 since the defect is unnamed. The strongest family is reported as "probable
    bearing tone at N.NN × shaft speed".
    """
    best = None
    thr = settings.min_height_db
    for ses in views:
        df = ses.bin_width_hz
        h = _height_db(ses, width_hz=max(0.5 * speed_hz, 10 * df))
        h = np.where(_sync_mask(ses.f_hz, speed_hz, settings, df), 0.0, h)
        fmax = min(float(ses.f_hz[-1]), 0.8 * (ses.band_hz[1] - ses.band_hz[0]))
        sel = (ses.f_hz >= min_order * speed_hz) & (ses.f_hz <= max_order * speed_hz)
        sel &= h >= thr + 4.0
        sel[1:-1] &= (h[1:-1] >= h[:-2]) & (h[1:-1] >= h[2:])
        view = f"{ses.band_source} {ses.band_hz[0]:.0f}-{ses.band_hz[1]:.0f} Hz"
        for i in np.flatnonzero(sel):
            f0 = i * df
            members = [(1, f0, float(h[i]))]
            for k in range(2, settings.n_harmonics + 1):
                if k * f0 >= fmax:
                    break
                j, hk = _line_near(h, df, k * f0, 1 + int(k / 2))
                if hk >= thr:
                    members.append((k, j * df, hk))
            if len(members) < 3:
                continue
            # rank as the comb does (height ÷ harmonic number): the family whose
            # fundamental and low harmonics stand highest, not a sideband family
            rank = sum((m[2] - thr) / m[0] for m in members)
            score = sum(min(m[2] - thr, 15.0) for m in members)
            if best is None or rank > best[0]:
                best = (rank, score, f0, members, view)
    if best is None:
        return ()
    _, score, f0, members, view = best
    conf = min(0.6, 1.0 - math.exp(-score / 30.0))
    if conf < settings.report_confidence:
        return ()
    order = f0 / speed_hz
    return (
        Finding(
            code=UNASSIGNED_CODE,
            confidence=round(conf, 3),
            severity=Severity.INFO,
            title=f"probable bearing tone at {order:.2f} × shaft speed",
            evidence=tuple(
                {"freq_hz": round(float(f), 3), "label": f"{k}x tone" if k > 1 else "tone",
                 "height_db": round(float(hk), 1), "order": round(float(f) / speed_hz, 3),
                 "spectrum": f"envelope ({view})"}
                for k, f, hk in members
            ),
            component="",
            extra={"order": round(float(order), 3)},
        ),
    )


def specs_by_shaft(machine) -> dict[str, tuple[float, tuple[BearingSpec, ...]]]:
    """``machine.bearings`` grouped by shaft: {shaft: (speed ÷ reference speed, specs)}.

    The train (:func:`agent.kinematics.train_from_config`) gives each
    bearing's orders — from its geometry, or the maker's multipliers where
    the config gives them — and each shaft's speed ratio.
    """
    train = train_from_config(machine)
    return {s.name: (float(train.ratios[s.name]), tuple(s.bearings)) for s in train.shafts if s.bearings}


def settings_from_config(analysis, machine=None) -> BearingSettings:
    """Detector settings from the ``[analysis]`` (and ``[machine]``: supply frequency) sections."""
    band = tuple(float(v) for v in analysis.envelope_band_hz)
    line = getattr(machine, "line_hz", None) if machine is not None else None
    return BearingSettings(
        slip_tol=float(analysis.bearing_slip_tol),
        band_hz=None if band == (0.0, 0.0) else band,
        line_hz=float(line) if line else None,
    )


def bearing_findings(
    accel_ms2: np.ndarray,
    fs_hz: float,
    speed_hz: float | None,
    machine,
    analysis,
    *,
    angle_domain_speed_hz: float | None = None,
    spectra: CaptureSpectra | None = None,
) -> tuple[Finding, ...]:
    """The pipeline's bearing stage: findings for one capture from the config sections.

    ``machine``/``analysis`` are the ``[machine]`` and ``[analysis]`` config
    sections (duck-typed). No speed (``None`` or 0) → no findings: bearing
    tones are multiples of shaft speed. ``speed_hz`` is the reference
    shaft's; a bearing on another shaft of the train is searched at that
    shaft's speed. For a capture re-sampled to shaft
    angle pass ``fs_hz`` = samples per revolution, ``speed_hz`` = 1 and the
    mean speed as ``angle_domain_speed_hz``: evidence is then given in Hz at
    that speed, with its order. ``spectra``: the same samples'
    :class:`agent.spectra.CaptureSpectra`, to share the acceleration spectrum.
    """
    if not speed_hz or speed_hz <= 0:
        return ()
    settings = settings_from_config(analysis, machine)
    groups = specs_by_shaft(machine) if machine.bearings else {"": (1.0, ())}
    found: tuple[Finding, ...] = ()
    for ratio, specs in groups.values():
        found += diagnose_bearings(accel_ms2, fs_hz, speed_hz * ratio, specs, settings, spectra=spectra)
    if angle_domain_speed_hz:
        k = float(angle_domain_speed_hz)
        found = tuple(
            replace(
                f,
                evidence=tuple({**e, "order": round(e["freq_hz"], 4), "freq_hz": round(e["freq_hz"] * k, 3)}
                               for e in f.evidence),
                title=_title(f.component, f.extra["defect"], f.extra["called"], f.extra["fundamental"] * k,
                             f.extra["order"], f.stage or 1) if "defect" in f.extra
                else f.title,
                extra={**f.extra, "angle_domain": True},
            )
            for f in found
        )
    return found
