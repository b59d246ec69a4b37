"""Programs: TOML with units, SI inside, strict keys, errors with field paths.

Unit references: 1 ft = 0.3048 m exactly (international foot, 1959) and
1 lbf = 0.45359237 kg × 9.80665 m/s² exactly (standard gravity), as tabulated in NIST SP 811
(2008), appendix B.8; hence 1 ft·lbf = 12 in·lbf = 1.3558179483 N·m.
"""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from clampd.daemon.engine import (
    Program,
    ProgramError,
    StepKind,
    Strategy,
    load_program,
    parse_program,
    program_from_mapping,
)

DATA = Path(__file__).parent / "data"
FT_LBF = 0.3048 * 0.45359237 * 9.80665  # N·m, exact by definition (NIST SP 811 B.8)


def _toml(body: str) -> Program:
    return parse_program("[program]\n" + body)


def test_foot_pound_force_and_inch_pound_force_in_newton_metres() -> None:
    a = _toml(
        'id = "a"\nstrategy = "torque"\nsnug_torque = "2 ft*lbf"\ntarget_torque = "20 ft*lbf"'
    )
    b = _toml(
        'id = "b"\nstrategy = "torque"\nsnug_torque = "24 in*lbf"\ntarget_torque = "240 in*lbf"'
    )
    assert a.target_torque_nm is not None
    assert a.target_torque_nm == pytest.approx(20 * FT_LBF, rel=1e-12)
    assert b.target_torque_nm == pytest.approx(a.target_torque_nm, rel=1e-12)
    assert a.target_torque_nm / 20 == pytest.approx(1.3558179483, abs=1e-10)  # NIST SP 811


def test_angles_and_times_with_units() -> None:
    p = _toml(
        'id = "c"\nstrategy = "torque-angle"\nsnug_torque = "27 N*m"\ntarget_angle = "0.25 turn"\n'
        'timeout = "1500 ms"\nslope_window = "0.5 deg"\nangle_window = ["80 deg", "100 deg"]'
    )
    assert p.target_angle_deg == pytest.approx(90.0)  # a quarter turn is 90° (definition)
    assert p.timeout_s == pytest.approx(1.5)
    assert p.snug_torque_nm == 27.0
    assert p.angle_window_deg == (80.0, 100.0)
    assert p.slope_window_deg == 0.5


def test_bare_numbers_are_si() -> None:
    p = program_from_mapping(
        {"id": "d", "strategy": "torque", "snug_torque": 5, "target_torque": 12.5}
    )
    assert p.target_torque_nm == 12.5
    assert p.version == 1
    assert p.name is None


def test_program_file_loads() -> None:
    p = load_program(DATA / "program_torque_angle.toml")
    assert p.strategy is Strategy.TORQUE_ANGLE
    assert p.target_angle_deg == 60.0
    assert p.torque_window_nm == (25.0, 90.0)
    assert p.max_torque_nm == 100.0


def test_multi_step_program() -> None:
    p = parse_program(
        """
[program]
id = "head-bolt-demo"
strategy = "multi-step"
snug_torque = "15 N*m"
max_torque = "120 N*m"

[[program.step]]
kind = "torque"
target_torque = "30 N*m"

[[program.step]]
kind = "angle"
target_angle = "90 deg"

[[program.step]]
kind = "angle"
target_angle = "0.25 turn"
"""
    )
    assert [s.kind for s in p.steps] == [StepKind.TORQUE, StepKind.ANGLE, StepKind.ANGLE]
    assert p.steps[2].target_angle_deg == pytest.approx(90.0)


def _problems(text: str) -> dict[str, str]:
    with pytest.raises(ProgramError) as info:
        parse_program(text)
    assert str(info.value)
    return dict(info.value.problems)


def test_unknown_keys_are_errors_with_paths() -> None:
    probs = _problems(
        '[program]\nid = "x"\nstrategy = "torque"\nsnug_torque = 5\ntarget_torque = 10\n'
        "targt_angle = 3\n"
    )
    assert probs == {"program.targt_angle": "unknown key"}
    probs = _problems(
        '[program]\nid = "x"\nstrategy = "multi-step"\nsnug_torque = 5\n'
        '[[program.step]]\nkind = "angle"\ntarget_angle = 10\ncolour = "red"\n'
    )
    assert probs == {"program.step[0].colour": "unknown key"}


def test_wrong_units_and_values_name_the_field() -> None:
    probs = _problems(
        '[program]\nid = "x"\nstrategy = "torque"\nsnug_torque = "5 deg"\ntarget_torque = 10\n'
    )
    assert list(probs) == ["program.snug_torque"]
    assert "not a torque" in probs["program.snug_torque"]
    probs = _problems('[program]\nid = "x"\nstrategy = "spin"\nsnug_torque = 5\n')
    assert list(probs) == ["program.strategy"]
    probs = _problems(
        '[program]\nid = "x"\nstrategy = "yield"\nsnug_torque = 5\nyield_fraction = 1.5\n'
    )
    assert list(probs) == ["program.yield_fraction"]


def test_strategy_rules_report_every_problem() -> None:
    probs = _problems(
        '[program]\nid = "x"\nstrategy = "torque"\nsnug_torque = 20\ntarget_angle = 30\n'
        "torque_window = [50, 40]\nmax_torque = 10\n"
    )
    assert set(probs) == {
        "program.target_torque",
        "program.target_angle",
        "program.torque_window",
        "program.max_torque",
    }
    probs = _problems('[program]\nid = "x"\nstrategy = "multi-step"\nsnug_torque = 5\n')
    assert set(probs) == {"program.step"}
    probs = _problems(
        '[program]\nid = "x"\nstrategy = "multi-step"\nsnug_torque = 5\n'
        '[[program.step]]\nkind = "torque"\ntarget_angle = 10\n'
    )
    assert set(probs) == {"program.step[0].target_torque"}


def test_file_shape_errors() -> None:
    assert "(file)" in _problems("[program\n")
    assert "program" in _problems('id = "x"\n')
    assert "other" in _problems('[program]\nid="x"\n[other]\na=1\n')
    assert "program" in _problems('program = "x"\n')
    with pytest.raises(ProgramError, match="cannot read"):
        load_program(DATA / "does-not-exist.toml")
    probs = _problems('[program]\nversion = 0\nid = "x"\nstrategy = "yield"\nsnug_torque = 5\n')
    assert set(probs) == {"program.version"}
    deep = "[program]\nid = " + "[" * 5000 + "]" * 5000 + "\n"
    assert set(_problems(deep)) == {"(file)"}
    # the version is the program's revision: any positive revision loads and is kept
    assert _toml('version = 7\nid = "x"\nstrategy = "yield"\nsnug_torque = 5').version == 7


def test_program_is_frozen_and_defaults_are_documented_values() -> None:
    p = _toml('id = "y"\nstrategy = "yield"\nsnug_torque = 5')
    assert p.yield_fraction == 0.5
    assert p.slope_window_deg == 2.0
    assert p.yield_min_angle == 4.0
    with pytest.raises(Exception, match="frozen"):
        setattr(p, "id", "z")  # noqa: B010 (bypass the static check on purpose)
    assert math.isfinite(p.snug_torque_nm)
