"""Bearing diagnosis on the open CWRU/IMS records and on synthetic faults.

Writes the confusion table and the detection-rate-versus-SNR table to
``docs/bearing-validation.md``::

    python replay/bearing_validation.py            # from the project root
    python replay/bearing_validation.py --print    # table to stdout only

The shared reference data is read in place from ``../shared/data/bearings``
beside the project (PROVENANCE.md there). The tests
(``tests/test_bearings_cwru.py``) call the same functions and assert the
thresholds.
"""

from __future__ import annotations

import argparse
import csv
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:  # run as a script from anywhere
    sys.path.insert(0, str(ROOT))

from agent.bearings import (  # noqa: E402
    CODES,
    BearingSettings,
    diagnose_bearings,
    envelope_views,
    score_bearing,
    spec_from_geometry,
)
from agent.recordings import read_recording  # noqa: E402
from agent.speed import estimate_speed, speed_spectrum  # noqa: E402
from replay.bearing_signals import bearing_fault_signal  # noqa: E402

INCH_MM = 25.4
#: CWRU drive-end bearing 6205-2RS (dataset documentation, as in PROVENANCE.md)
CWRU_DE = spec_from_geometry("drive end 6205-2RS", 9, 0.3126 * INCH_MM, 1.537 * INCH_MM, 0.0)
#: IMS set 1, Rexnord ZA-2115 double-row roller bearing: 16 rollers, 0.331 in,
#: 2.815 in pitch, 15.17° (Qiu et al., J. Sound Vib. 289, 2006; from memory,
#: not in the dataset's readme — used only to check for false calls)
IMS_ZA2115 = spec_from_geometry("ZA-2115", 16, 0.331 * INCH_MM, 2.815 * INCH_MM, 15.17)
#: sample rate by CWRU folder (PROVENANCE.md: normal_baseline is 48 kHz)
CWRU_FS_HZ = {"12k_drive_end": 12000.0, "48k_drive_end": 48000.0, "normal_baseline": 48000.0}
CWRU_SR_SET = {"12k_drive_end": "12k_DE", "48k_drive_end": "48k_DE", "normal_baseline": "48k_normal_baseline"}
#: speed search as in a default config (machine.speed_rpm 600-3600); CWRU and IMS are US rigs (60 Hz
#: supply, machine.line_hz = 60)
SPEED_RANGE_HZ = (10.0, 60.0)
LINE_HZ = 60.0
SETTINGS = BearingSettings(line_hz=LINE_HZ)
IMS_STATED_SPEED_HZ = 2000.0 / 60.0  # dataset readme: 2000 rpm
TRUTH = {"inner race": "inner", "ball": "ball", "normal": "none"}


def find_bearing_data() -> Path | None:
    """``shared/data/bearings`` beside the project (any parent), or None."""
    for parent in [ROOT, *ROOT.parents]:
        cand = parent / "shared" / "data" / "bearings"
        if cand.is_dir():
            return cand
    return None


def shaft_speed_hz(accel_ms2: np.ndarray, fs_hz: float) -> tuple[float, str]:
    """Running speed as the agent finds it (no tachometer); (0.0, reason) when it cannot."""
    est = estimate_speed(speed_spectrum(accel_ms2, fs_hz), speed_range_hz=SPEED_RANGE_HZ, line_hz=LINE_HZ)
    if not est.found:
        return 0.0, "not found"
    return est.speed_hz, "estimated"


@dataclass(frozen=True, slots=True)
class RecordResult:
    record: str
    folder: str
    truth: str  # "outer" | "inner" | "ball" | "none"
    size_in: str
    load_hp: str
    sr_best: str  # Smith & Randall 2015, best over methods (Y1..N2), drive end
    sr_ypn: str  # Y / P / N ("" for the baseline)
    file_speed_hz: float
    speed_hz: float
    speed_source: str
    call: str  # "outer" | "inner" | "ball" | "cage" | "none"
    confidence: float
    stage: int | None
    scores: dict
    title: str
    unassigned_order: float | None = None  # with no geometry configured: the family reported, × shaft speed

    @property
    def correct(self) -> bool:
        return self.call == self.truth

    @property
    def wrong(self) -> bool:
        return self.call not in ("none", self.truth)


def _sr_table(data: Path) -> dict[tuple[str, str], dict]:
    lines = [ln for ln in (data / "smith_randall_2015_table.csv").read_text().splitlines() if not ln.startswith("#")]
    return {(r["set"], r["record"]): r for r in csv.DictReader(lines)}


def _manifest(data: Path) -> list[dict]:
    return list(csv.DictReader((data / "manifest.csv").read_text().splitlines()))


def _de_channel(path: Path) -> str:
    from scipy.io import whosmat

    names = [n for n, _, _ in whosmat(str(path)) if n.endswith("_DE_time")]
    if len(names) != 1:
        raise ValueError(f"{path.name}: expected one *_DE_time variable, found {names}")
    return names[0]


def _call_of(findings) -> tuple[str, float, int | None, dict, str]:
    inv = {v: k for k, v in CODES.items()}
    for f in findings:
        if f.code in inv:
            return inv[f.code], float(f.confidence), f.stage, dict(f.extra.get("scores", {})), f.title
    return "none", 0.0, None, {}, ""


def run_cwru(data: Path, settings: BearingSettings = SETTINGS) -> list[RecordResult]:
    """Every CWRU record: drive-end channel, agent's speed, 6205 geometry."""
    sr = _sr_table(data)
    out = []
    for row in _manifest(data):
        if row["dataset"] != "CWRU":
            continue
        path = data / row["file"]
        folder = path.parent.name
        fs = CWRU_FS_HZ[folder]
        rec = read_recording(path, channel=_de_channel(path), fs_hz=fs, units="g")
        file_rpm = float(row["rpm_in_file"]) if row["rpm_in_file"] else None
        speed, source = shaft_speed_hz(rec.accel_ms2, fs)
        findings = diagnose_bearings(rec.accel_ms2, fs, speed, (CWRU_DE,), settings) if speed > 0 else ()
        scores = {}
        if speed > 0:
            sc = score_bearing(CWRU_DE, envelope_views(rec.accel_ms2, fs, CWRU_DE.orders.bpfi * speed, settings),
                               speed, settings)
            scores = {d: round(s.confidence, 2) for d, s in sc.items()}
        call, conf, stage, _, title = _call_of(findings)
        no_geo = diagnose_bearings(rec.accel_ms2, fs, speed, (), settings) if speed > 0 else ()
        num = path.stem
        s = sr.get((CWRU_SR_SET[folder], num), {})
        truth = "outer" if row["fault_type"].startswith("outer") else TRUTH.get(row["fault_type"], "?")
        out.append(
            RecordResult(
                record=num,
                folder=folder,
                truth=truth,
                size_in=row["fault_size_in"],
                load_hp=row["load"].split(" hp")[0],
                sr_best=s.get("derived_best_DE", ""),
                sr_ypn=s.get("derived_best_DE_YPN", ""),
                file_speed_hz=file_rpm / 60.0 if file_rpm else 0.0,
                speed_hz=speed,
                speed_source=source,
                call=call,
                confidence=conf,
                stage=stage,
                scores=scores,
                title=title,
                unassigned_order=no_geo[0].extra["order"] if no_geo else None,
            )
        )
    return out


def run_ims(data: Path, settings: BearingSettings = SETTINGS) -> list[dict]:
    """The two healthy IMS snapshots, every channel: agent's speed; stated speed with and without geometry."""
    out = []
    for row in _manifest(data):
        if row["dataset"] != "IMS":
            continue
        arr = np.loadtxt(data / row["file"])
        for ch in range(arr.shape[1]):
            x = arr[:, ch] * 9.80665  # the files are in g (dataset readme)
            speed, source = shaft_speed_hz(x, 20000.0)
            agent_speed = diagnose_bearings(x, 20000.0, speed, (IMS_ZA2115,), settings) if speed > 0 else ()
            stated_geo = diagnose_bearings(x, 20000.0, IMS_STATED_SPEED_HZ, (IMS_ZA2115,), settings)
            stated_none = diagnose_bearings(x, 20000.0, IMS_STATED_SPEED_HZ, (), settings)
            out.append(
                {
                    "snapshot": Path(row["file"]).name,
                    "channel": ch + 1,
                    "speed_source": source,
                    "speed_hz": speed,
                    "findings_agent_speed": agent_speed,
                    "findings_stated_geometry": stated_geo,
                    "findings_stated_no_geometry": stated_none,
                }
            )
    return out


SYN_SPEC = spec_from_geometry("synthetic 8-ball", 8, 12.7, 60.0, 0.0)


def snr_sweep(
    snrs_db=(-21, -18, -15, -12, -9, -6), seeds: int = 10, settings: BearingSettings = BearingSettings()
) -> dict:
    """Detection and wrong-call counts per defect and SNR (65 536 samples at 25.6 kHz, 25 Hz shaft)."""
    res = {}
    for snr in snrs_db:
        for defect in ("outer", "inner", "ball", None):
            hit = wrong = 0
            for seed in range(seeds):
                x = bearing_fault_signal(defect, snr, SYN_SPEC.orders, seed=seed)
                call, conf, *_ = _call_of(diagnose_bearings(x, 25600.0, 25.0, (SYN_SPEC,), settings))
                if defect and call == defect:
                    hit += 1
                elif call != "none":
                    wrong += 1
            res[(snr, defect or "none")] = (hit, wrong, seeds)
    return res


#: the simulator's pump skid (agent/simulator.py defaults: 4-pole motor on 50 Hz, 6 vanes, 28 rotor bars,
#: 3.3 kHz bearing ring) with one bearing of our own invention on the pump drive end
SIM_BEARING = ("pump DE", 8, 12.7, 60.0)


def sim_sweep(levels_g=(0.002, 0.003, 0.005, 0.01, 0.02), seeds: int = 5) -> dict:
    """Simulator bearing faults by impact level: (level, defect) → (hits, wrong, n, mean whole-band SNR dB).

    The speed is the agent's estimate; SNR is the power of the fault's contribution (faulty minus
    healthy capture, same seed) over the healthy capture's power, whole band.
    """
    from agent.simulator import BearingDefect, Faults, OperatingPoint, SimBearing, SimMachine, synthesize

    machine = SimMachine(bearings=(SimBearing(*SIM_BEARING),))
    spec = spec_from_geometry(*SIM_BEARING)
    point = OperatingPoint(speed_hz=24.6, line_hz=50.0)
    settings = BearingSettings(line_hz=50.0)
    fs, n = 25600.0, 65536
    out = {}
    for level in (*levels_g, 0.0):
        for defect in ("outer", "inner", "ball") if level else ("none",):
            hit = wrong = 0
            snrs = []
            for seed in range(seeds):
                healthy, _ = synthesize(machine, point, Faults(), fs, n, seed=seed)
                faults = Faults(bearings=(BearingDefect("pump DE", defect, level),)) if level else Faults()
                x, _ = synthesize(machine, point, faults, fs, n, seed=seed)
                if level:
                    snrs.append(10 * np.log10(np.mean((x - healthy) ** 2) / np.mean(healthy**2)))
                est = estimate_speed(speed_spectrum(x, fs), speed_range_hz=(10.0, 60.0), line_hz=50.0, poles=4)
                found = diagnose_bearings(x, fs, est.speed_hz, (spec,), settings) if est.found else ()
                call = _call_of(found)[0]
                hit += call == defect and defect != "none"
                wrong += call not in ("none", defect)
            out[(level, defect)] = (hit, wrong, seeds, float(np.mean(snrs)) if snrs else None)
    return out


def confusion(rows: list[RecordResult]) -> dict[tuple[str, str], int]:
    out: dict[tuple[str, str], int] = {}
    for r in rows:
        out[(r.truth, r.call)] = out.get((r.truth, r.call), 0) + 1
    return out


#: why record 197 is missed: an analysis of the whole drive-end record (not regenerated by this script;
#: the numbers are from the analysis that issue #5 asked for, with the detector of this commit)
RECORD_197 = """### Record 197 (outer race, 0.014 in, 0 hp): why it is missed

The benchmark rates it N1 with its methods 1 (envelope of the raw signal) and 2 (cepstrum
pre-whitening + envelope) on all three channels, and Y2 ("clearly diagnosable, non-classic") with
method 3 (discrete/random separation, DRS, + spectral-kurtosis band + envelope) on the drive end
only; its tables give no further note. What the drive-end record shows (whole 10 s record):

* The speed is right: 29.926 Hz found, 29.933 Hz in the file (−0.03 %); BPFO 107.3 Hz is searched
  within ±2 %. The signal is not impulsive: kurtosis 3.06 (Gaussian 3), and after pre-whitening no
  band of the detector's kurtogram (≥ 648 Hz wide, 648-5400 Hz) exceeds a spectral kurtosis of 2
  (chosen 3375-4125 Hz, SK 1.99).
* In both views the highest line within ±2 % of each of the first five BPFO harmonics stands
  7.7-11.4 dB above the floor, what the largest noise line in a window that wide reaches, and no
  fundamental lines up more than one of them above the 8 dB threshold: outer-race score 0.05.
* No band would do better: the pre-whitened SES of every band 250-3000 Hz wide between 100 Hz and
  5.4 kHz (centres a quarter-width apart) gives an outer-race confidence of at most 0.20 and no
  family above 0.24. No band-selection rule on the pre-whitened signal (higher kurtogram levels, an
  infogram, the band with the most SES-tone evidence) can call 197; slip smoothing and speed are
  not the issue either.
* A BPFO-like family appears only without whitening: in the SES of the DRS residual (frequency-
  domain DRS after Antoni & Randall 2004, 4096-sample segments, 50 ms delay; 16 % of the raw
  r.m.s. is random) in 375-1500 Hz, 3.614 × shaft speed (108.1 Hz) and its harmonics stand 18, 12,
  14, 15, 10 dB above the floor (healthy 97: at most 9 dB). In the raw spectrum that order is a
  near-discrete comb (5× at 540.8 Hz and 9× at 973.4 Hz about 40 dB above the floor): the
  signature is nearly periodic, and pre-whitening, which gives every line unit magnitude, flattens
  it (at most 7 dB on the same lines). 3.614× is 0.8 % above the 6205's kinematic BPFO (the seeded
  outer-race records 130, 131, 135, 234, 235 show 3.59-3.60×). The kurtosis-selected band of the DRS
  residual (4125-4875 Hz, SK 8.3) shows no BPFO family (two harmonics, 0.27), so our replica of
  method 3 does not reproduce the benchmark's Y2.
* Why no DRS or raw view was added: (1) the raw spectrum of the healthy baseline 97 carries the
  same 3.61× comb (9th harmonic 37 dB above the floor against 42 dB in 197), as do 118, 122, 198
  and 223: a component of the rig or of healthy ball passage, not specific to the fault; (2) the
  non-whitened envelope of 197 also holds a 5.39× family (161.2 Hz, from discrete lines 3.2-3.6
  kHz apart by that much; 3.614 + 5.386 = 9 balls, the inner-race partner of the 3.61× line) 0.5 %
  below the kinematic BPFI, so a DRS view calls 197 *inner race* (0.56-0.73); (3) as a third view,
  the DRS envelope gives wrong calls above 0.5: in its kurtogram band on 169 (ball 0.99) and 198
  (inner 0.71), over the whole band on 118, 119, 122 (outer 0.54-0.85), 169, 170 (ball) and 197,
  198 (inner); with longer DRS segments also on IMS channels.
* What it would take: telling a fault's jittered (cyclostationary) comb from a deterministic comb
  of the same order, e.g. against the machine's own learned baseline envelope, or by cyclic
  coherence at the BPFO cycle frequency rather than envelope line heights, with thresholds set on
  other rigs' recordings. Until then 197 stays a documented miss (`KNOWN_Y_MISSES` in
  `tests/test_bearings_cwru.py`)."""


def render(rows: list[RecordResult], ims: list[dict], sweep: dict, sim: dict | None = None) -> str:
    calls = ["outer", "inner", "ball", "cage", "none"]
    truths = ["outer", "inner", "ball", "none"]
    conf = confusion(rows)
    name = {"outer": "outer race", "inner": "inner race", "ball": "rolling element", "cage": "cage",
            "none": "no call"}
    tname = {**name, "none": "healthy"}
    L = []
    a = L.append
    a("# Bearing diagnosis: validation on open data")
    a("")
    a("Generated by `python replay/bearing_validation.py` (do not edit by hand). Method: cepstrum")
    a("pre-whitening, fast-kurtogram band and full-band squared envelope spectra, defect families")
    a("searched within ±2 % slip (module docstrings of `agent/envelope.py` and `agent/bearings.py`).")
    a("A *call* is a bearing finding with confidence ≥ 0.5; weaker evidence gives no finding.")
    a("")
    a("## CWRU drive-end records (drive-end channel, 6205-2RS geometry, speed found by the agent)")
    a("")
    a("Benchmark: W. A. Smith, R. B. Randall, MSSP 64-65 (2015) 100-131, best verdict over their three")
    a("methods for the drive-end channel (Y = clearly diagnosable, P = partly, N = not).")
    a("")
    a("### Confusion table (truth × call)")
    a("")
    a("| truth \\ call | " + " | ".join(name[c] for c in calls) + " |")
    a("|---|" + "---|" * len(calls))
    for t in truths:
        a(f"| {tname[t]} | " + " | ".join(str(conf.get((t, c), 0)) for c in calls) + " |")
    a("")
    a("### By benchmark verdict")
    a("")
    a("| benchmark | records | right call | no call | wrong call | wrong call with confidence > 0.5 |")
    a("|---|---|---|---|---|---|")
    for v in ("Y", "P", "N", ""):
        sel = [r for r in rows if r.sr_ypn == v]
        if not sel:
            continue
        a(f"| {v or 'healthy'} | {len(sel)} | {sum(r.correct for r in sel if r.truth != 'none')} | "
          f"{sum(r.call == 'none' for r in sel)} | {sum(r.wrong for r in sel)} | "
          f"{sum(r.wrong and r.confidence > 0.5 for r in sel)} |")
    a("")
    a("### Per record")
    a("")
    a("| record | fs | truth | size in | load hp | benchmark | speed Hz (file) | speed source | call | confidence "
      "| stage | scores (outer/inner/ball/cage) | no geometry: tone × shaft |")
    a("|---|---|---|---|---|---|---|---|---|---|---|---|---|")
    for r in rows:
        sc = "/".join(f"{r.scores.get(d, 0):.2f}" for d in ("outer", "inner", "ball", "cage")) if r.scores else "-"
        mark = "" if r.correct else " ✗" if r.wrong else " –" if r.truth != "none" else ""
        a(f"| {r.record} | {CWRU_FS_HZ[r.folder] / 1000:g}k | {tname[r.truth]} | {r.size_in or '-'} | {r.load_hp} | "
          f"{r.sr_best or 'baseline'} {r.sr_ypn} | {r.speed_hz:.3f} ({r.file_speed_hz:.3f}) | {r.speed_source} | "
          f"{name[r.call]}{mark} | {r.confidence:.2f} | {r.stage or '-'} | {sc} | "
          f"{'-' if r.unassigned_order is None else f'{r.unassigned_order:.2f}'} |")
    a("")
    a("✗ wrong call, – missed (no call). Scores are each defect's best confidence (after the winning")
    a("family's lines are set aside), shown whether or not a call was made. The last column is what the")
    a("agent reports with no bearing geometry configured (\"probable bearing tone at N.NN × shaft speed\");")
    a("the 6205's kinematic orders are BPFO 3.585, BPFI 5.415, 2×BSF 4.714.")
    a("")
    wrong_scores = [(v, d, r.record, r.sr_best or "baseline") for r in rows if not r.correct
                    for d, v in r.scores.items() if d != r.truth]
    top_wrong = max(wrong_scores) if wrong_scores else (0.0, "-", "-", "")
    second = [(v, d, r.record) for r in rows if r.correct for d, v in r.scores.items() if d != r.truth]
    top_second = max(second) if second else (0.0, "-", "-")
    conf_of = {r.record: r.confidence for r in rows}
    a("### Notes")
    a("")
    a("* Compared with the benchmark: every record it rates Y is called right except 197 (outer race,")
    a("  0.014 in, 0 hp), which the benchmark found only with its third method (discrete/random")
    a("  separation + spectral-kurtosis band; its envelope methods 1 and 2 gave N1); see the next")
    a("  section. The P and N records give no call, and no")
    a("  record gets a wrong call. On the records without a right call the highest score for a wrong")
    a(f"  defect is {top_wrong[1]} {top_wrong[0]:.2f} on {top_wrong[2]} ({top_wrong[3]}). Where one defect is")
    a("  strong, the rich envelope lets other families score high after it is set aside (up to")
    a(f"  {top_second[1]} {top_second[0]:.2f} on {top_second[2]}), but only the winning family is called.")
    a("* 174 (48 kHz, 1.3 s, rated N1) gets no verdict: the speed stage finds no credible running speed")
    a("  in it, and without speed there are no bearing frequencies to look for.")
    a("* The ball records are the hard ones, as in the benchmark: 222 and 223 are called from one")
    a(f"  slip-smeared 2×BSF hump (222 at {conf_of.get('222', 0):.2f}, 223 at {conf_of.get('223', 0):.2f};"
      " the call threshold is 0.5).")
    a("* The detector's thresholds are general (module docstring of `agent/bearings.py`), but they were")
    a("  settled with these records in view; recordings from other rigs are the real test.")
    a("")
    a(RECORD_197)
    a("")
    a("## IMS run-to-failure set 1, first snapshots (healthy), all 8 channels")
    a("")
    n_agent = sum(len(r["findings_agent_speed"]) for r in ims)
    n_geo = sum(len(r["findings_stated_geometry"]) for r in ims)
    n_none = sum(len(r["findings_stated_no_geometry"]) for r in ims)
    found = sum(r["speed_hz"] > 0 for r in ims)
    a(f"* Speed found by the agent on {found} of {len(ims)} channel-snapshots; bearing findings with that speed: {n_agent}.")
    a(f"* With the stated 2000 r/min and ZA-2115 geometry (from memory, Qiu et al. 2006): {n_geo} findings.")
    a(f"* With the stated speed and no geometry (unassigned-tone search): {n_none} findings.")
    a("")
    a("## Synthetic faults: detection rate versus SNR")
    a("")
    a("Impacts at the defect frequency (1 % jitter) ringing a 3.3 kHz, 5 %-damped resonance; inner race")
    a("load-zone modulated at 1X, rolling element at FTF; shaft 1X/2X/3X three times the bearing signal's")
    a("r.m.s.; white noise. SNR = bearing-signal power ÷ noise power over the whole band. 65 536 samples at")
    a("25.6 kHz, 25 Hz shaft, 8 balls 12.7 mm on 60 mm pitch. Right calls / wrong calls out of the seeds.")
    a("")
    snrs = sorted({k[0] for k in sweep})
    a("| SNR dB | " + " | ".join(f"{name[d]}" for d in ("outer", "inner", "ball", "none")) + " |")
    a("|---|---|---|---|---|")
    for snr in snrs:
        cells = []
        for d in ("outer", "inner", "ball", "none"):
            hit, wrong, n = sweep[(snr, d)]
            cells.append(f"{hit}/{n} right, {wrong} wrong" if d != "none" else f"{wrong}/{n} false calls")
        a(f"| {snr:+d} | " + " | ".join(cells) + " |")
    a("")
    if sim:
        a("## Simulated pump skid: detection versus impact level")
        a("")
        a("`agent/simulator.py` defaults (4-pole motor on 50 Hz at 24.6 Hz, 6 vanes, 28 rotor bars, line")
        a("family, broadband floor, 3.3 kHz bearing ring) with an invented bearing (8 balls, 12.7 mm, 60 mm")
        a("pitch) on the pump drive end; the simulator's own impact trains (1 % slip, 1 % jitter). Speed is the")
        a("agent's estimate; line_hz = 50. SNR is the fault's contribution (faulty minus healthy capture, same")
        a("seed) over the healthy capture's power, whole band — low because the machine's own tones dominate the")
        a("band while the impacts live near the 3.3 kHz ring. Right calls / wrong calls out of the seeds.")
        a("")
        a("| impact g | SNR dB | outer race | inner race | rolling element |")
        a("|---|---|---|---|---|")
        for level in sorted({k[0] for k in sim if k[0]}):
            cells = []
            snr = np.mean([sim[(level, d)][3] for d in ("outer", "inner", "ball")])
            for d in ("outer", "inner", "ball"):
                hit, wrong, n, _ = sim[(level, d)]
                cells.append(f"{hit}/{n} right, {wrong} wrong")
            a(f"| {level:g} | {snr:.0f} | " + " | ".join(cells) + " |")
        hit, wrong, n, _ = sim[(0.0, "none")]
        a(f"| healthy | - | {wrong}/{n} false calls | | |")
        a("")
    return "\n".join(L)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--print", action="store_true", help="print the document instead of writing it")
    ap.add_argument("--out", default=str(ROOT / "docs" / "bearing-validation.md"))
    args = ap.parse_args(argv)
    data = find_bearing_data()
    if data is None:
        print("shared/data/bearings not found beside the project", file=sys.stderr)
        return 1
    t0 = time.perf_counter()
    rows = run_cwru(data)
    ims = run_ims(data)
    sweep = snr_sweep()
    doc = render(rows, ims, sweep, sim_sweep())
    if args.print:
        print(doc)
    else:
        Path(args.out).write_text(doc, encoding="utf-8")
        print(f"wrote {args.out} in {time.perf_counter() - t0:.0f} s")
    return 0


if __name__ == "__main__":
    sys.exit(main())
