"""Running speed from the spectrum, without a tachometer (pure functions).

Method
------
:func:`estimate_speed` is a harmonic-evidence search (a harmonic-sum
detector in the spirit of Schroeder 1968 / Noll 1969, worked on picked
peaks rather than on raw lines):

1. Peaks are picked from the spectrum with :func:`agent.spectra.find_peaks`
   against the running-median floor of :func:`agent.spectra.noise_floor`.
   Each peak's *evidence* is its height above the floor minus the height
   that noise alone exceeds with probability 10⁻³ per line
   (:func:`agent.spectra.noise_threshold_db`: averaged periodogram lines are
   χ² with 2K degrees of freedom), capped at 30 dB so one huge peak cannot
   outvote a whole family.
2. For a line-fed motor, peaks on the line-frequency family (1…4 ×
   ``line_hz``, within about two lines) are set aside: they are electrical,
   not mechanical, and would otherwise pose as 1X/2X of a 4-pole or 2-pole
   motor. A machine turning at exactly a line multiple is still found
   through its other harmonics and forcing orders. Under a VFD
   (``variable_speed``) the motor's electrical family is at the drive's
   output frequency, speed × poles/2 ÷ (1 − slip), and follows the speed, so
   the mains family is not special: a mechanical tone may fall on it (a
   6-vane pump at 1000 r/min has its vane pass at 100 Hz). Mains-family
   peaks (leaking from other equipment) then give no shaft-rate support
   (step 4) and count for a speed only in proportion to its support, so a
   family built from them alone is no rotation and cannot outweigh a
   mechanical hypothesis that explains them.
3. Every candidate speed on a fine grid across ``speed_range_hz`` is scored
   by the evidence of peaks near 1X, 2X … ``n_harmonics``×X (weights falling
   as 1/√h, so f/2 and 2f lose to f) and near the synchronous forcing orders
   (vane pass, blade pass, gear mesh … and their 2nd and 3rd harmonics,
   weight 1): a weak 1X under a strong vane-pass family is still found.
4. Shaft-rate support, an analyst's first check: a speed hypothesis is
   credible when the spectrum shows its shaft rate — the 1X itself
   (residual unbalance gives one on every machine) or two consecutive
   harmonics h, h+1 one shaft rate apart (the spacing gives the rate even
   when 1X is missing: the residue pitch of Schouten 1940; misalignment's
   2X-3X, looseness' long series). Orders above 2X (higher harmonics and
   forcing orders) count fully only with that support, a quarter without
   it, and the whole score is halved without a 1X. Otherwise any harmonic
   family of a non-synchronous tone fits m, 2m, 3m × (its frequency ÷ m):
   bearing-defect tones outgrowing 1X (BPFO = 3.21X, 2×, 3× BPFO) would read
   as the 6X, 12X, 18X "vane pass" of a shaft at 3.21/6 of the true speed.
5. Priors: for a line-fed induction motor with known ``poles`` the speed
   lies just below synchronous speed 2·``line_hz``/``poles`` (slip 0 to
   ``max_slip``), so candidates there are preferred; a previous estimate
   adds a small Gaussian preference around itself, scaled by the
   candidate's shaft-rate support, so that tracking never keeps alive a
   speed whose 1X has gone.
6. The best candidate is refined by a weighted least-squares fit over its
   matched family, f₀ = Σ wₕ·h·fₕ / Σ wₕ·h², with wₕ the linear power SNR of
   harmonic h (the variance of fₕ/h falls as h²·SNR). Each fₕ is the
   Hann-window two-line interpolated frequency of
   :func:`agent.spectra.tone_at` (Grandke's estimator, T. Grandke, IEEE
   Trans. Instrum. Meas. 32(2), 1983): for a single noise-free tone its bias
   is only the leakage of the negative-frequency image, below 10⁻⁵ line for
   tones more than a few lines from DC (REFERENCES §7.1, computed); a
   parabola on dB would have up to 0.016 line bias, on linear magnitude
   0.053 line.

Confidence is the product of an absolute part, 1 − exp(−score/20 dB), and a
margin part, min(1, 2·(1 − runner-up/best)), where the runner-up is the best
candidate more than 3 % (or one line) away and not at 1/3, 1/2, 2 or 3
times the winner. A score below ``min_score_db`` — or a single tone below
twice that with no harmonic or forcing order beside it — means no credible
rotation: ``found`` is False ("not running").

Speed that changes within a capture is handled by :func:`speed_profile`
(ridge of the strongest tracked harmonic in a short-time spectrum, smoothed
by a low-order polynomial) and :mod:`agent.orders` (computed order
tracking).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from agent.spectra import (
    CaptureSpectra,
    Spectrum,
    SpectrumPlan,
    find_peaks,
    noise_floor,
    noise_threshold_db,
    segment_powers,
    tones_at_rows,
)

#: evidence cap per tone, dB above the noise-only level
_CAP_DB = 30.0
#: line-frequency family members set aside (k × line_hz, k = 1..4)
_LINE_FAMILY = (1, 2, 3, 4)
#: Hann main lobe: two tones need about this many lines between them to show
#: as two peaks (common practice: separation ≥ 2 lines for Hann)
_RESOLVE_LINES = 2.0
#: evidence (dB above the noise-only level) at which a 1X, or the weaker of two
#: consecutive harmonics, counts fully as shaft-rate support
_SUPPORT_DB = 10.0
#: credit of the orders above 2X at a candidate speed without shaft-rate
#: support (1 with full support)
_UNSUPPORTED = 0.25


@dataclass(frozen=True, slots=True)
class SpeedEstimate:
    """Running speed of the reference shaft, as found in one spectrum.

    ``speed_hz`` is 0.0 when ``found`` is False (no credible rotation).
    ``slip`` is the induction-motor slip (n_s − n)/n_s as a fraction, given
    only when poles are known and the motor is line-fed. ``harmonics_used``
    counts the tones in the least-squares fit. ``resolution_flag`` is True
    when the spectrum's line spacing cannot separate 2X from twice line
    frequency; ``required_capture_s`` is then the segment (capture) length
    that would.
    """

    speed_hz: float
    confidence: float
    found: bool
    slip: float | None = None
    method: str = ""
    notes: tuple[str, ...] = ()
    harmonics_used: int = 0
    score_db: float = 0.0
    resolution_flag: bool = False
    required_capture_s: float | None = None
    bin_width_hz: float = 0.0

    @property
    def rpm(self) -> float:
        return self.speed_hz * 60.0

    def to_json(self) -> dict:
        return {
            "found": self.found,
            "speed_hz": round(self.speed_hz, 4),
            "rpm": round(self.rpm, 1),
            "confidence": round(self.confidence, 3),
            "slip": None if self.slip is None else round(self.slip, 5),
            "method": self.method,
            "harmonics_used": self.harmonics_used,
            "score_db": round(self.score_db, 1),
            "resolution_flag": self.resolution_flag,
            "required_capture_s": None if self.required_capture_s is None else round(self.required_capture_s, 2),
            "notes": list(self.notes),
        }


def synchronous_speed_hz(line_hz: float, poles: int) -> float:
    """Synchronous shaft speed 2·f/p in Hz (= 120·f/p r/min; machines texts)."""
    if poles < 2 or poles % 2:
        raise ValueError(f"poles must be an even number >= 2, got {poles!r}")
    if not line_hz > 0:
        raise ValueError(f"line_hz must be > 0, got {line_hz!r}")
    return 2.0 * line_hz / poles


def _truncate(spec: Spectrum, fmax_hz: float) -> Spectrum:
    n = int(min(spec.f_hz.size, np.searchsorted(spec.f_hz, fmax_hz, side="right") + 8))
    return Spectrum(
        f_hz=spec.f_hz[:n],
        power=spec.power[:n],
        quantity=spec.quantity,
        unit=spec.unit,
        window=spec.window,
        bin_width_hz=spec.bin_width_hz,
        enbw_bins=spec.enbw_bins,
        n_averages=spec.n_averages,
        nperseg=spec.nperseg,
    )


def _check_args(spec: Spectrum, speed_range_hz, line_hz, poles, forcing_orders, n_harmonics, max_slip):
    if not isinstance(spec, Spectrum):
        raise TypeError(f"spec must be a Spectrum, got {type(spec).__name__}")
    try:
        lo, hi = (float(v) for v in speed_range_hz)
    except (TypeError, ValueError):
        raise ValueError(f"speed_range_hz must be (low, high) in Hz, got {speed_range_hz!r}") from None
    if not 0 < lo < hi:
        raise ValueError(f"speed_range_hz must satisfy 0 < low < high, got {speed_range_hz!r}")
    if hi > spec.fmax_hz:
        raise ValueError(f"speed_range_hz high {hi} Hz is above the spectrum's top {spec.fmax_hz:.1f} Hz")
    if line_hz is not None and not line_hz > 0:
        raise ValueError(f"line_hz must be > 0 or None, got {line_hz!r}")
    if poles is not None and (int(poles) != poles or poles < 2 or poles % 2):
        raise ValueError(f"poles must be an even number >= 2, got {poles!r}")
    if poles is not None and line_hz is None:
        raise ValueError("poles given without line_hz: synchronous speed needs both")
    for k in forcing_orders:
        if not k > 0:
            raise ValueError(f"forcing orders must be > 0, got {k!r}")
    if int(n_harmonics) < 1:
        raise ValueError(f"n_harmonics must be >= 1, got {n_harmonics!r}")
    if not 0 < max_slip < 0.5:
        raise ValueError(f"max_slip must be in (0, 0.5), got {max_slip!r}")
    return lo, hi


def _order_weights(n_harmonics: int, forcing_orders) -> tuple[np.ndarray, np.ndarray]:
    """Orders scored for a candidate and their weights (max where they coincide)."""
    w: dict[float, float] = {}
    for h in range(1, n_harmonics + 1):
        w[float(h)] = 1.0 / math.sqrt(h)
    for k in forcing_orders:
        for m in (1, 2, 3):
            o = round(float(k) * m, 9)
            w[o] = max(w.get(o, 0.0), 1.0)
    orders = np.array(sorted(w))
    return orders, np.array([w[o] for o in orders])


def _match(
    cand_hz: np.ndarray, orders: np.ndarray, pk_f: np.ndarray, tol_abs_hz: float, tol_rel: float
) -> tuple[np.ndarray, np.ndarray]:
    """Index of the nearest peak to every order×candidate and its closeness (0..1)."""
    return _nearest_peak(cand_hz[:, None] * orders[None, :], pk_f, tol_abs_hz, tol_rel)


def _nearest_peak(target: np.ndarray, pk_f: np.ndarray, tol_abs_hz: float, tol_rel: float):
    """(index of the nearest peak, closeness 0..1) for every target frequency; ``pk_f`` ascending."""
    j = np.clip(np.searchsorted(pk_f, target), 1, pk_f.size - 1)
    left, right = pk_f[j - 1], pk_f[j]
    use_left = np.abs(target - left) <= np.abs(right - target)
    idx = np.where(use_left, j - 1, j)
    d = np.abs(pk_f[idx] - target)
    tol = np.maximum(tol_abs_hz, tol_rel * target)
    close = np.clip(1.0 - (d / tol) ** 2, 0.0, 1.0)
    return idx, close


def _match_grid(
    cand_hz: np.ndarray, orders: np.ndarray, pk_f: np.ndarray, tol_abs_hz: float, tol_rel: float
) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_match` over an ascending candidate grid, worked out only where some peak is in reach.

    Elsewhere closeness is 0 (and the index 0): every order×candidate within
    a tolerance of a peak is in one of the ranges below, so the result
    equals :func:`_match`'s wherever closeness is above 0.
    """
    idx = np.zeros((cand_hz.size, orders.size), dtype=np.intp)
    close = np.zeros((cand_hz.size, orders.size))
    pk = pk_f[np.isfinite(pk_f)]
    reach = 1.1 * np.maximum(tol_abs_hz, tol_rel * pk) + 1e-9  # a little more than any tolerance there
    first = np.searchsorted(cand_hz, ((pk - reach)[:, None] / orders[None, :]).ravel(), "left") - 1
    last = np.searchsorted(cand_hz, ((pk + reach)[:, None] / orders[None, :]).ravel(), "right") + 1
    first, last = np.clip(first, 0, cand_hz.size), np.clip(last, 0, cand_hz.size)
    n_rows = np.maximum(last - first, 0)
    if not n_rows.any():
        return idx, close
    # the candidate rows of every (peak, order) range, one after the other
    rows = np.arange(n_rows.sum()) + np.repeat(first - (np.cumsum(n_rows) - n_rows), n_rows)
    cols = np.repeat(np.tile(np.arange(orders.size), pk.size), n_rows)
    idx[rows, cols], close[rows, cols] = _nearest_peak(cand_hz[rows] * orders[cols], pk_f, tol_abs_hz, tol_rel)
    return idx, close


def _nearest(cand: np.ndarray, f: float) -> int:
    return int(np.argmin(np.abs(cand - f)))


def _inside(prior: np.ndarray, i: int) -> bool:
    """Is candidate ``i`` inside the line-fed slip window (prior factor not halved)?"""
    return bool(prior[i] >= 0.75 * prior.max())


def _family_evidence(f0, orders, pk_f, pk_ev, tol_abs, tol_rel) -> np.ndarray:
    idx, close = _match(np.array([f0]), np.asarray(orders, dtype=float), pk_f, tol_abs, tol_rel)
    return pk_ev[idx[0]] * close[0]


def estimate_speed(
    spec: Spectrum,
    *,
    speed_range_hz: tuple[float, float],
    line_hz: float | None,
    poles: int | None = None,
    forcing_orders: tuple[float, ...] = (),
    previous: SpeedEstimate | None = None,
    variable_speed: bool = False,
    max_slip: float = 0.08,
    n_harmonics: int = 10,
    min_score_db: float = 8.0,
) -> SpeedEstimate:
    """Running speed of the reference shaft from one averaged spectrum.

    Parameters
    ----------
    spec
        Acceleration (or velocity) power spectrum from :mod:`agent.spectra`.
        Its line spacing sets the accuracy: a long single segment (e.g.
        :func:`speed_spectrum`) is best.
    speed_range_hz
        (low, high) search range of shaft speed in Hz (config
        ``machine.speed_rpm`` ÷ 60).
    line_hz
        Supply frequency (50 or 60 Hz) whose family 1…4 × ``line_hz`` is
        never taken as shaft evidence for a line-fed motor, and never as a
        shaft rate under a VFD; None when unknown.
    poles
        Motor poles; with a line-fed motor (``variable_speed`` False) the
        search prefers speeds within ``max_slip`` below 2·``line_hz``/poles
        and reports slip.
    forcing_orders
        Synchronous forcing orders of the reference shaft (vanes, blades,
        gear teeth × shaft ratio …), scored with their 2nd and 3rd harmonics.
    previous
        Last capture's estimate: a found one adds a small preference for
        speeds near it (tracking across captures).

    Returns a :class:`SpeedEstimate`; ``found`` False means no credible
    rotation in the range (machine stopped, or the spectrum shows no shaft
    family). Raises ``ValueError``/``TypeError`` for impossible arguments.
    """
    lo, hi = _check_args(spec, speed_range_hz, line_hz, poles, forcing_orders, n_harmonics, max_slip)
    n_harmonics = int(n_harmonics)
    bin_hz = spec.bin_width_hz
    orders, weights = _order_weights(n_harmonics, forcing_orders)
    top_hz = min(spec.fmax_hz, hi * orders.max() * 1.05 + 4 * bin_hz)
    sub = _truncate(spec, top_hz)
    floor = noise_floor(sub)
    excess0 = noise_threshold_db(spec.n_averages, 1e-3)
    peaks = find_peaks(sub, floor, min_height_db=excess0, fmin_hz=0.5 * lo, false_alarm_per_line=None)
    notes: list[str] = []
    line_tol_hz = 1.0 * bin_hz + 0.03
    def on_mains(f_hz: float) -> bool:
        return line_hz is not None and any(abs(f_hz - k * line_hz) <= line_tol_hz for k in _LINE_FAMILY)

    # a line-fed motor's own electrical family is never shaft evidence. Under a
    # VFD the motor is fed at the drive's output frequency (speed × poles/2 /
    # (1 − slip)), not the mains: a tone on the mains family (leaking from
    # other equipment) may be a genuine mechanical order (vane pass at
    # 2 × line_hz), so it is scored, but it cannot show a shaft rate (1X, or a
    # pair h, h+1) by itself and counts only for a speed that shows one
    kept = sorted((p for p in peaks if variable_speed or not on_mains(p.freq_hz)), key=lambda p: p.freq_hz)
    if not kept:
        return _not_found(spec, "no credible rotation: no peaks above the noise outside the line-frequency family")
    pk_f = np.array([p.freq_hz for p in kept] + [np.inf])
    pk_ev = np.array([min(p.height_db - excess0, _CAP_DB) for p in kept] + [0.0])
    pk_ev_support = np.where([on_mains(f) for f in pk_f], 0.0, pk_ev)  # evidence that can show a shaft rate

    # candidate grid: fine enough that the highest scored order moves < 1/4 line per step
    step = bin_hz / (4.0 * orders.max())
    cand = np.arange(lo, hi + step, step)
    # match tolerance: interpolation error (< 0.1 line with fair SNR, Grandke)
    # plus the smearing of a slowly wandering speed (0.1 % of the tone)
    tol_abs = 0.6 * bin_hz
    tol_rel = 0.001
    idx, close = _match_grid(cand, orders, pk_f, tol_abs, tol_rel)
    shaft_ev = pk_ev_support[idx] * close  # evidence of tones that can show a shaft rate
    mains_ev = pk_ev[idx] * close - shaft_ev  # evidence of mains-family tones (VFD only; else 0)
    # shaft-rate support (an analyst's first check): a speed is credible when
    # the spectrum shows the shaft rate itself — its 1X (residual unbalance
    # gives one on every machine), or two consecutive harmonics h, h+1 one
    # shaft rate apart (the spacing shows the rate even with 1X missing:
    # Schouten's residue pitch; misalignment's 2X-3X, looseness' long
    # series); 0..1, full at _SUPPORT_DB of evidence
    harm = shaft_ev[:, np.isin(orders, np.arange(1.0, n_harmonics + 1.0))]  # 1X … n×X
    one_x = harm[:, 0]
    pairs = np.minimum(harm[:, 1:], harm[:, :-1]).max(axis=1, initial=0.0)
    support = np.minimum(1.0, np.maximum(one_x, pairs) / _SUPPORT_DB)
    # under a VFD a mains-family tone counts for a speed only as far as that
    # speed shows its shaft rate by other tones: it may be the speed's vane
    # pass, but mains leakage alone (a stopped machine beside running ones)
    # is no rotation
    evidence = shaft_ev + support[:, None] * mains_ev
    # orders above 2X (higher harmonics, vane pass and other forcing orders)
    # count fully only with that support: without it, a harmonic family of a
    # non-synchronous tone (bearing defect tones and their harmonics) or of
    # a speed outside the range fits m, 2m, 3m … × (its frequency / m) — e.g.
    # BPFO = 3.21X and its harmonics read as the 6X, 12X, 18X "vane pass" of
    # a shaft at 3.21/6 of the true speed
    low = orders <= 2.0
    credit = _UNSUPPORTED + (1.0 - _UNSUPPORTED) * support
    score = evidence @ np.where(low, weights, 0.0) + credit * (evidence @ np.where(low, 0.0, weights))
    # a shaft family without its fundamental (1X) is suspect: combs of other
    # origin (bearing tones, cage sidebands, intermodulation) fit rational
    # multiples of the true speed
    score = score * (0.5 + 0.5 * np.minimum(1.0, one_x / _SUPPORT_DB))

    prior = np.ones_like(cand)
    sync_hz = None
    if poles is not None and not variable_speed:
        sync_hz = synchronous_speed_hz(line_hz, int(poles))
        inside = (cand <= sync_hz + 0.5 * bin_hz) & (cand >= sync_hz * (1.0 - max_slip))
        prior = np.where(inside, 1.0, 0.5)
    if previous is not None and previous.found and previous.speed_hz > 0:
        # tracking helps a speed only as far as its shaft rate is still seen: a
        # hypothesis whose 1X has gone is not kept alive by its past
        sigma = max(0.03 * previous.speed_hz, 3 * bin_hz)
        prior = prior * (1.0 + 0.25 * support * np.exp(-0.5 * ((cand - previous.speed_hz) / sigma) ** 2))
    total = score * prior
    best = int(np.argmax(total))
    in_window = prior.copy() if sync_hz is not None else None
    if score[best] < min_score_db:
        return _not_found(
            spec,
            f"no credible rotation in {lo * 60:.0f}-{hi * 60:.0f} r/min "
            f"(best family evidence {score[best]:.1f} dB < {min_score_db:.1f} dB)",
        )
    # sub-multiple check (pitch detectors' octave test): when the odd
    # multiples of f/m carry as much evidence as the multiples of f, the
    # shaft turns at f/m and f is its 2X (or 3X)
    for m in (2, 3):
        f_sub = float(cand[best]) / m
        if f_sub < lo:
            continue
        hs = np.arange(1, n_harmonics * m + 1, dtype=float)
        ev = _family_evidence(f_sub, hs, pk_f, pk_ev_support, tol_abs, tol_rel)
        on = ev[hs % m == 0].sum()
        off = ev[hs % m != 0].sum()
        if in_window is not None and _inside(in_window, best) and not _inside(in_window, _nearest(cand, f_sub)):
            continue  # a line-fed motor cannot turn at f/m: keep the speed the slip window allows
        if ev[0] >= 6.0 and off >= 0.6 * on:
            best = _nearest(cand, f_sub)
            notes.append(f"{m}X family found at {f_sub * m * 60:.0f} r/min; shaft speed taken as its 1/{m}")
            break
    f0 = float(cand[best])

    # runner-up: the best harmonically unrelated candidate (f/3, f/2, 2f, 3f
    # were settled by the sub-multiple check), for the margin part of confidence.
    # A candidate near r·f0 scores on f0's own peaks only within 0.6 line of
    # it (the match tolerance): one line (or 3 %) apart it is another speed —
    # with coarse lines a family at 1.87 × f0 must still count as a rival
    away = np.ones(cand.size, dtype=bool)
    for r in (1.0, 0.5, 2.0, 1.0 / 3.0, 3.0):
        away &= np.abs(cand - r * f0) > max(0.03 * r * f0, bin_hz)
    runner = float(total[away].max()) if away.any() else 0.0

    # least-squares refinement over the matched family (two passes, tighter second)
    f_fit, used = f0, 0
    for tol_scale in (1.0, 0.5):
        sel_idx, sel_close = _match(np.array([f_fit]), orders, pk_f, tol_abs * tol_scale, tol_rel * tol_scale)
        num = den = 0.0
        used = 0
        seen = set()
        for o, i, c in zip(orders, sel_idx[0], sel_close[0]):
            if c <= 0 or i in seen or not np.isfinite(pk_f[i]):
                continue
            seen.add(int(i))
            snr = c * 10.0 ** (pk_ev[i] / 10.0)
            num += snr * o * pk_f[i]
            den += snr * o * o
            used += 1
        if den > 0:
            f_fit = num / den
    if used < 2 and score[best] < 2.0 * min_score_db:
        return _not_found(
            spec,
            f"only one weak tone ({f_fit:.2f} Hz, evidence {score[best]:.1f} dB) and no harmonic family: "
            "no credible rotation",
        )
    if not lo - bin_hz <= f_fit <= hi + bin_hz:
        f_fit = f0
        notes.append("least-squares fit left the range; grid value kept")

    conf_abs = 1.0 - math.exp(-float(score[best]) / 20.0)
    margin = 1.0 - runner / float(total[best]) if total[best] > 0 else 0.0
    confidence = float(np.clip(conf_abs * min(1.0, 2.0 * margin), 0.0, 1.0))

    slip = None
    method = "harmonic family"
    if sync_hz is not None:
        slip = (sync_hz - f_fit) / sync_hz
        method += f", {int(poles)}-pole line-fed motor prior"
        if not -0.002 <= slip <= max_slip:
            notes.append(
                f"speed {f_fit * 60:.1f} r/min is outside 0-{max_slip:.0%} slip below synchronous "
                f"{sync_hz * 60:.0f} r/min"
            )
    if previous is not None and previous.found:
        method += ", tracked"
    flag, need_s, note = _resolution_check(f_fit, line_hz, bin_hz)
    if note:
        notes.append(note)
    return SpeedEstimate(
        speed_hz=float(f_fit),
        confidence=confidence,
        found=True,
        slip=None if slip is None else float(slip),
        method=method,
        notes=tuple(notes),
        harmonics_used=used,
        score_db=float(score[best]),
        resolution_flag=flag,
        required_capture_s=need_s,
        bin_width_hz=bin_hz,
    )


def _not_found(spec: Spectrum, why: str) -> SpeedEstimate:
    return SpeedEstimate(
        speed_hz=0.0,
        confidence=0.0,
        found=False,
        method="none",
        notes=(why,),
        bin_width_hz=spec.bin_width_hz,
    )


def resolution_check(speed_hz: float, line_hz: float | None, bin_width_hz: float) -> tuple[bool, float | None, str]:
    """Can lines ``bin_width_hz`` apart separate 2X from twice line frequency?

    Returns (flag, required segment length in s, note). With a Hann window two
    tones show as two peaks when at least two lines apart (main-lobe
    half-width; common practice), so the segment must last 2/Δf seconds.
    For a 2-pole 60 Hz motor at 3580 r/min, Δf = 120 − 119.33 = 0.67 Hz:
    a 1 s capture (1 Hz lines) cannot separate them, 4 s (0.25 Hz) can.
    """
    return _resolution_check(speed_hz, line_hz, bin_width_hz)


def _resolution_check(speed_hz, line_hz, bin_hz):
    if line_hz is None or speed_hz <= 0:
        return False, None, ""
    two_x, two_lf = 2.0 * speed_hz, 2.0 * line_hz
    d = abs(two_x - two_lf)
    if d >= 0.05 * two_lf or d >= _RESOLVE_LINES * bin_hz:
        return False, None, ""
    if d < 1e-6:
        return True, None, (
            f"2X ({two_x:.2f} Hz) coincides with twice line frequency ({two_lf:.2f} Hz): "
            "no capture length separates them"
        )
    need = _RESOLVE_LINES / d
    return True, float(need), (
        f"2X ({two_x:.2f} Hz) and twice line frequency ({two_lf:.2f} Hz) are {d:.2f} Hz apart, "
        f"less than {_RESOLVE_LINES:g} lines of {bin_hz:.3f} Hz: a segment of at least {need:.1f} s "
        "would separate them"
    )


def speed_spectrum(
    accel_ms2: np.ndarray, fs_hz: float, *, window: str = "hann", spectra: CaptureSpectra | None = None
) -> Spectrum:
    """One Hann segment over the whole capture: the finest line spacing for speed.

    The segment length is the capture length rounded down to an even count,
    so the line spacing is fs/N ≈ 1/capture length. ``spectra`` (the same
    samples' :class:`agent.spectra.CaptureSpectra`) shares it with other stages.
    """
    x = np.asarray(accel_ms2, dtype=np.float64)
    if x.ndim != 1 or x.size < 16:
        raise ValueError(f"accel_ms2 must be 1-D with at least 16 samples, got shape {x.shape}")
    plan = SpectrumPlan.build(fs_hz, x.size, window=window, lines=x.size // 2, overlap=0.0)
    return (CaptureSpectra(x, fs_hz) if spectra is None else spectra.of_samples(x)).accel(plan)


# ---------------------------------------------------------------- within-capture speed


@dataclass(frozen=True, slots=True)
class SpeedProfile:
    """Shaft speed against time within one capture.

    ``t_s``/``speed_hz`` are the smoothed profile at the short-time spectrum's
    frame centres; ``coeffs`` the polynomial (numpy.polynomial, time in s
    from the first sample) that gives speed at any time; ``harmonic`` the
    order that was tracked.
    """

    t_s: np.ndarray
    speed_hz: np.ndarray
    coeffs: tuple[float, ...]
    harmonic: int
    duration_s: float
    ridge_rms_hz: float = 0.0  # r.m.s. scatter of the frame ridge about the fit (speed, Hz)

    def __post_init__(self) -> None:
        for name in ("t_s", "speed_hz"):
            arr = np.array(getattr(self, name), dtype=np.float64, copy=True)
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)

    def at(self, t_s: np.ndarray) -> np.ndarray:
        """Speed in Hz at times ``t_s`` (s from the first sample)."""
        return np.polynomial.polynomial.polyval(np.asarray(t_s, dtype=np.float64), self.coeffs)

    @property
    def mean_hz(self) -> float:
        rev = np.polynomial.polynomial.polyint(self.coeffs)  # revolutions since the first sample
        pv = np.polynomial.polynomial.polyval
        return float((pv(self.duration_s, rev) - pv(0.0, rev)) / self.duration_s)

    @property
    def span_hz(self) -> float:
        """max − min of the speed over the capture."""
        t = np.linspace(0.0, self.duration_s, 512)
        v = self.at(t)
        return float(v.max() - v.min())

    @property
    def span_fraction(self) -> float:
        return self.span_hz / self.mean_hz if self.mean_hz > 0 else 0.0

    def to_json(self) -> dict:
        return {
            "mean_hz": round(self.mean_hz, 4),
            "span_hz": round(self.span_hz, 4),
            "span_fraction": round(self.span_fraction, 5),
            "harmonic": self.harmonic,
        }


def speed_profile(
    accel_ms2: np.ndarray,
    fs_hz: float,
    speed_hz_guess: float,
    *,
    line_hz: float | None = None,
    harmonics: tuple[int, ...] = (1, 2, 3, 4, 5, 6),
    frame_s: float | None = None,
    max_change: float = 0.06,
    degree: int = 3,
    whole: Spectrum | None = None,
) -> SpeedProfile:
    """Speed profile within a capture from the ridge of one tracked harmonic.

    The harmonic h standing highest above the local floor near
    h × ``speed_hz_guess`` (away from the line-frequency family) is followed frame by frame in a
    short-time Hann spectrum (frames of ``frame_s``, default capture/8, 75 %
    overlap); each frame's ridge frequency is Grandke-interpolated
    (:func:`agent.spectra.tone_at`), divided by h, and a polynomial of
    ``degree`` is least-squares fitted to the ridge to give a smooth profile.
    ``max_change`` bounds the search band (± fraction of the guess).
    ``whole`` is the capture's :func:`speed_spectrum` when the caller has it
    already (it is computed otherwise).
    """
    x = np.asarray(accel_ms2, dtype=np.float64)
    if x.ndim != 1 or x.size < 64:
        raise ValueError(f"accel_ms2 must be 1-D with at least 64 samples, got shape {x.shape}")
    if not fs_hz > 0:
        raise ValueError(f"fs_hz must be > 0, got {fs_hz!r}")
    if not speed_hz_guess > 0:
        raise ValueError(f"speed_hz_guess must be > 0, got {speed_hz_guess!r}")
    if not 0 < max_change < 0.5:
        raise ValueError(f"max_change must be in (0, 0.5), got {max_change!r}")
    duration_s = x.size / fs_hz
    nfr = int(round((frame_s or duration_s / 8.0) * fs_hz))
    nfr = max(32, min(nfr - nfr % 2, x.size))
    plan = SpectrumPlan.build(fs_hz, nfr, window="hann", lines=nfr // 2, overlap=0.75)
    step = nfr - plan.noverlap
    starts = np.arange(0, x.size - nfr + 1, step)
    bin_hz = plan.bin_width_hz

    # choose the harmonic standing highest above the local floor at h × guess
    # (a shaft-locked tone, not the strongest energy in a band that may hold
    # bearing tones), away from the line-frequency family
    if whole is None:
        whole = speed_spectrum(x, fs_hz)
    top = min(whole.fmax_hz, max(harmonics) * speed_hz_guess * (1 + max_change) + 10 * whole.bin_width_hz)
    whole = _truncate(whole, top)
    floor = noise_floor(whole)
    best_h, best_e = None, -np.inf
    for h in harmonics:
        c = h * speed_hz_guess
        lo_b, hi_b = c * (1 - max_change), c * (1 + max_change)
        if hi_b >= min(fs_hz / 2, whole.fmax_hz):
            continue
        if line_hz is not None and any(lo_b - 2 * bin_hz <= k * line_hz <= hi_b + 2 * bin_hz for k in _LINE_FAMILY):
            continue
        half = max(3 * whole.bin_width_hz, 0.5 * max_change * c)
        sel = np.flatnonzero((whole.f_hz >= c - half) & (whole.f_hz <= c + half))
        if sel.size == 0:
            continue
        e = float(np.max(10 * np.log10(whole.power[sel] / floor[sel])))
        if e > best_e:
            best_h, best_e = h, e
    if best_h is None:
        raise ValueError(
            f"no harmonic of {speed_hz_guess:.2f} Hz can be tracked in frames of {nfr / fs_hz:.3f} s "
            f"({bin_hz:.2f} Hz lines): each lies too near the line-frequency family or the top of the band"
        )
    h = best_h
    lo_b, hi_b = h * speed_hz_guess * (1 - max_change), h * speed_hz_guess * (1 + max_change)
    klo = max(1, int(np.floor(lo_b / bin_hz)))
    khi = min(plan.lines - 1, int(np.ceil(hi_b / bin_hz)))
    if khi - klo < 2:
        raise ValueError(
            f"frames of {nfr / fs_hz:.3f} s ({bin_hz:.2f} Hz lines) are too short to track {h}X; "
            "use a longer frame_s"
        )
    # each frame's ridge line and its tone (tone_at reads a few lines around it: the lines above are not kept)
    powers = segment_powers(x, plan, n_lines=khi + 8)
    ridge = klo + np.argmax(powers[:, klo : khi + 1], axis=1)
    f_r, w_c = tones_at_rows(powers, ridge, bin_width_hz=bin_hz, enbw_bins=plan.figures.enbw_bins)
    t_c = (starts[: powers.shape[0]] + nfr / 2) / fs_hz
    f_c = f_r / h
    deg = int(min(degree, max(0, t_c.size - 2)))
    # robust fit: drop frames far from a first fit (ridge jumps), refit
    coeffs = np.polynomial.polynomial.polyfit(t_c, f_c, deg, w=w_c)
    resid = f_c - np.polynomial.polynomial.polyval(t_c, coeffs)
    mad = np.median(np.abs(resid - np.median(resid))) + 1e-12
    keep = np.abs(resid) <= max(4 * 1.4826 * mad, 0.05 * bin_hz / h)
    if keep.sum() >= deg + 2:
        coeffs = np.polynomial.polynomial.polyfit(t_c[keep], f_c[keep], deg, w=w_c[keep])
    resid = (f_c - np.polynomial.polynomial.polyval(t_c, coeffs))[keep]
    ridge_rms = float(np.sqrt(np.mean(resid**2))) if resid.size else 0.0
    return SpeedProfile(
        t_s=t_c,
        speed_hz=np.polynomial.polynomial.polyval(t_c, coeffs),
        coeffs=tuple(float(c) for c in coeffs),
        harmonic=int(h),
        duration_s=float(duration_s),
        ridge_rms_hz=ridge_rms,
    )
