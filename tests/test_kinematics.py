"""Machine train kinematics: shaft ratios, forcing frequencies, bearing tones."""

from __future__ import annotations

import dataclasses
import math

import pytest

from agent.kinematics import (
    Belt,
    BearingSpec,
    Coupling,
    GearPair,
    MachineTrain,
    Motor,
    Shaft,
    bearing_orders,
    bearing_orders_given,
    expected_frequencies,
)

IN_MM = 25.4


def test_cwru_drive_end_bearing_multipliers():
    # CWRU 6205-2RS drive-end bearing: 9 balls, d = 0.3126 in, D = 1.537 in,
    # contact 0 deg. Published multiples (dataset documentation; Smith &
    # Randall 2015, MSSP 64-65, Table 2): BPFI 5.4152, BPFO 3.5848,
    # FTF 0.3983, BSF 2.357; the dataset's "4.7135" is 2 x BSF.
    b = bearing_orders(9, 0.3126 * IN_MM, 1.537 * IN_MM, 0.0)
    assert b.bpfi == pytest.approx(5.4152, abs=5e-5)
    assert b.bpfo == pytest.approx(3.5848, abs=5e-5)
    assert b.ftf == pytest.approx(0.3983, abs=5e-5)
    assert b.bsf == pytest.approx(2.357, abs=5e-4)
    assert 2 * b.bsf == pytest.approx(4.7135, abs=5e-4)
    # identity BPFO + BPFI = N (REFERENCES §3, computed)
    assert b.bpfo + b.bpfi == pytest.approx(9.0)


def test_contact_angle_enters_the_formulas():
    # IMS Rexnord ZA-2115: 16 rollers, 0.331 in, 2.815 in, 15.17 deg
    # (REFERENCES §3, geometry from memory, values computed): BPFO 7.0921, BPFI 8.9079
    b = bearing_orders(16, 0.331, 2.815, 15.17)
    assert b.bpfo == pytest.approx(7.0921, abs=1e-3)
    assert b.bpfi == pytest.approx(8.9079, abs=1e-3)
    assert b.ftf == pytest.approx(0.4433, abs=1e-3)


def test_belt_gear_and_vane_pass():
    # REFERENCES §6 worked numbers (textbook kinematics / common practice):
    # belt rate = pi*d*n/L: 200 mm sheave at 1470 r/min on a 2000 mm belt = 7.70 Hz;
    # 6 vanes at 1470 r/min = 147 Hz; gear mesh = teeth x shaft speed.
    n_hz = 1470 / 60
    train = MachineTrain(
        shafts=(Shaft("motor"), Shaft("fan", blades=8), Shaft("pump", vanes=6), Shaft("out")),
        links=(
            Belt("motor", "fan", driver_diameter_mm=200, driven_diameter_mm=400, length_mm=2000),
            Coupling("motor", "pump"),
            GearPair("pump", "out", driver_teeth=23, driven_teeth=46),
        ),
        motor=Motor("motor", poles=4, line_hz=50.0, rotor_bars=28),
    )
    assert train.ratios == {"motor": 1.0, "fan": 0.5, "pump": 1.0, "out": 0.5}
    tones = {t.name: t for t in expected_frequencies(train, n_hz)}
    assert tones["belt rate motor-fan"].freq_hz == pytest.approx(7.70, abs=0.005)
    assert tones["belt rate motor-fan"].freq_hz == pytest.approx(math.pi * 200 * n_hz / 2000)
    assert tones["2x belt rate motor-fan"].freq_hz == pytest.approx(2 * math.pi * 200 * n_hz / 2000)
    assert tones["vane pass pump"].freq_hz == pytest.approx(147.0)
    assert tones["blade pass fan"].freq_hz == pytest.approx(8 * n_hz / 2)
    assert tones["gear mesh pump-out"].freq_hz == pytest.approx(23 * n_hz)
    assert tones["1X out"].freq_hz == pytest.approx(n_hz / 2)
    assert tones["1X fan"].order == pytest.approx(0.5)
    # motor: REFERENCES §6, 4-pole 50 Hz at 1470 r/min: slip 0.02, slip
    # frequency 0.5 Hz, pole pass 2.0 Hz; 28 bars: RBPF 686 Hz, sidebands 586 / 786 Hz
    assert tones["pole pass"].freq_hz == pytest.approx(2.0)
    assert tones["RBPF"].freq_hz == pytest.approx(686.0)
    assert tones["RBPF-2xLF"].freq_hz == pytest.approx(586.0)
    assert tones["RBPF+2xLF"].freq_hz == pytest.approx(786.0)
    assert tones["2xLF"].freq_hz == 100.0 and tones["2xLF"].family == "line"
    # synchronous forcing orders for the speed search (vanes, blades x ratio, mesh)
    assert train.forcing_orders() == (4.0, 6.0, 23.0)


def test_bearing_tones_named_per_shaft_with_slip_tolerance():
    de = BearingSpec("DE", bearing_orders_given(ftf=0.3983, bsf=2.357, bpfo=3.5848, bpfi=5.4152))
    train = MachineTrain(shafts=(Shaft("motor"), Shaft("pump", vanes=5, bearings=(de,))),
                         links=(Coupling("motor", "pump"),), motor=Motor("motor", 2, 60.0))
    tones = {t.name: t for t in expected_frequencies(train, 59.6)}
    t = tones["BPFO pump DE"]
    assert t.freq_hz == pytest.approx(3.5848 * 59.6)
    # bearing tones deviate 1-2 % from kinematics (slip; Randall & Antoni 2011): ±2 %
    assert t.tolerance_hz == pytest.approx(0.02 * t.freq_hz)
    assert tones["2xBPFI pump DE"].freq_hz == pytest.approx(2 * 5.4152 * 59.6)
    assert tones["1X motor"].tolerance_hz < 0.01 * 59.6


def test_single_shaft_names_are_plain():
    train = MachineTrain(shafts=(Shaft("motor"),), motor=Motor("motor", 4, 60.0))
    names = [t.name for t in expected_frequencies(train, 29.9)]
    assert names[:3] == ["1X", "2X", "3X"]
    assert "LF" in names and "2xLF" in names


@pytest.mark.parametrize(
    "kwargs,msg",
    [
        (dict(shafts=(Shaft("a"), Shaft("a"))), "unique"),
        (dict(shafts=(Shaft("a"), Shaft("b"))), "not linked"),
        (dict(shafts=(Shaft("a"),), links=(Coupling("a", "z"),)), "unknown shaft"),
        (dict(shafts=(Shaft("a"), Shaft("b")), links=(Belt("a", "b", 100, 0),)), "driven_diameter_mm"),
        (dict(shafts=(Shaft("a"), Shaft("b")), links=(Belt("a", "b", 100, 200, 300),)), "cannot wrap"),
        (dict(shafts=(Shaft("a"), Shaft("b")), links=(GearPair("a", "b", 20, 0),)), "driven_teeth"),
        (
            dict(shafts=(Shaft("a"), Shaft("b")), links=(Coupling("a", "b"), GearPair("a", "b", 20, 40))),
            "already",
        ),
        (dict(shafts=(Shaft("a"),), motor=Motor("a", poles=3, line_hz=50.0)), "even"),
        (dict(shafts=(Shaft("a"),), reference="b"), "reference"),
    ],
)
def test_bad_trains_are_refused_with_a_reason(kwargs, msg):
    with pytest.raises(ValueError, match=msg):
        MachineTrain(**kwargs)


def test_given_multipliers_are_checked():
    with pytest.raises(ValueError, match="bpfo"):
        bearing_orders_given(ftf=0.4, bsf=2.3, bpfo=0.0, bpfi=5.4)


# --------------------------------------------------------------- from the [machine] config


def _cfg(machine: dict):
    from agent.config import parse_config

    return parse_config({"machine": machine})


def test_train_from_config_with_belt_gear_and_bearings():
    from agent.kinematics import train_from_config

    cfg = _cfg({
        "speed_rpm": [1000.0, 1800.0], "line_hz": 60.0, "poles": 4, "rotor_bars": 44, "blades": 0,
        "shafts": [{"name": "fan", "blades": 12}, {"name": "drum"}],
        "belts": [{"driver": "motor", "driven": "fan", "driver_diameter_mm": 150.0,
                   "driven_diameter_mm": 300.0, "length_mm": 1800.0}],
        "gears": [{"driver": "fan", "driven": "drum", "driver_teeth": 17, "driven_teeth": 51}],
        "bearings": [{"name": "fan DE", "balls": 9, "ball_diameter_mm": 7.94, "pitch_diameter_mm": 39.04,
                      "shaft": "fan"}],
    })
    train = train_from_config(cfg.machine)
    assert train.ratios == pytest.approx({"motor": 1.0, "fan": 0.5, "drum": 0.5 * 17 / 51})
    assert train.forcing_orders() == (6.0, 8.5)  # 12 blades × 0.5; 17 teeth × 0.5
    names = {t.name for t in expected_frequencies(train, 29.5)}
    assert {"blade pass fan", "gear mesh fan-drum", "belt rate motor-fan", "BPFO fan fan DE", "RBPF"} <= names


@pytest.mark.parametrize(
    "machine,msg",
    [
        ({"shafts": [{"name": "fan"}]}, "not linked to the reference shaft"),
        ({"belts": [{"driver": "motor", "driven": "pump", "driver_diameter_mm": 100.0,
                     "driven_diameter_mm": 100.0}]}, "unknown shaft 'pump'"),
        ({"bearings": [{"name": "b", "balls": 8, "ball_diameter_mm": 10.0, "pitch_diameter_mm": 50.0,
                        "shaft": "pump"}]}, "unknown shaft 'pump'"),
        ({"drive": "inverter"}, "choose one of 'line', 'vfd'"),
        ({"poles": 5}, "must be even"),
        ({"speed_rpm": [600.0, 1000.0], "line_hz": 50.0, "poles": 2}, "set machine.drive = 'vfd'"),
        ({"gears": [{"driver": "motor", "driven": "x", "driver_teeth": 0, "driven_teeth": 20}]}, "driver_teeth"),
    ],
)
def test_bad_machine_config_is_reported(machine, msg):
    from agent.errors import ConfigError

    with pytest.raises(ConfigError, match=msg):
        _cfg(machine)


def test_vfd_allows_any_range():
    cfg = _cfg({"speed_rpm": [600.0, 1000.0], "line_hz": 50.0, "poles": 2, "drive": "vfd"})
    assert cfg.machine.drive == "vfd"


def test_given_bearing_multipliers_replace_the_geometry():
    from types import SimpleNamespace

    from agent.kinematics import train_from_config

    # a bearing row with the maker's multipliers (CWRU 6205 published values,
    # Smith & Randall 2015 Table 2) on made-up geometry: the given ones win
    b = SimpleNamespace(name="DE", balls=8, ball_diameter_mm=10.0, pitch_diameter_mm=50.0, contact_angle_deg=0.0,
                        shaft="", bpfo=3.5848, bpfi=5.4152, bsf=2.357, ftf=0.3983)
    train = train_from_config(dataclasses.replace(_cfg({}).machine, bearings=(b,)))
    o = train.shafts[0].bearings[0].orders
    assert (o.bpfo, o.bpfi, o.bsf, o.ftf) == (3.5848, 5.4152, 2.357, 0.3983)
