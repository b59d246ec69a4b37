"""Quantities at the edges, against the exact definitions.

Source: NIST SP 811 (2008), Appendix B.8/B.9: 1 ft = 0.3048 m exactly, 1 lbf = 0.45359237 kg ×
9.80665 m/s² exactly, hence 1 ft·lbf = 1.3558179483 N·m and 1 in·lbf = 0.1129848290 N·m.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from clampd.protocol import NM_PER_FT_LBF, NM_PER_IN_LBF, Kind, UnitError, parse_quantity


def test_constants_match_the_exact_definitions() -> None:
    assert math.isclose(NM_PER_FT_LBF, 1.3558179483, rel_tol=1e-10)
    assert math.isclose(NM_PER_FT_LBF, 12 * NM_PER_IN_LBF, rel_tol=1e-15)


@pytest.mark.parametrize(
    ("text", "expected_nm"),
    [
        ("27 N*m", 27.0),
        ("27 N·m", 27.0),
        ("27 Nm", 27.0),
        ("27 N.m", 27.0),
        ("20 ft*lbf", 20 * 1.3558179483),
        ("20 ftlb", 20 * 1.3558179483),
        ("240 in*lbf", 240 * 0.1129848290),
        ("240 inlb", 240 * 0.1129848290),
        ("3 lbf*ft", 3 * 1.3558179483),
        ("1.5 kN*m", 1500.0),
    ],
)
def test_trade_spellings_of_torque(text: str, expected_nm: float) -> None:
    assert math.isclose(parse_quantity(text, Kind.TORQUE), expected_nm, rel_tol=1e-9)


def test_angles_and_bare_numbers() -> None:
    assert parse_quantity("30 deg", Kind.ANGLE) == pytest.approx(30.0)
    assert parse_quantity("30°", Kind.ANGLE) == pytest.approx(30.0)
    assert parse_quantity("0.5 turn", Kind.ANGLE) == pytest.approx(180.0)
    assert parse_quantity("1 rad", Kind.ANGLE) == pytest.approx(math.degrees(1.0))
    assert parse_quantity(12, Kind.TORQUE) == 12.0


@pytest.mark.parametrize(
    ("text", "kind"),
    [("2 in", Kind.TORQUE), ("30 deg", Kind.TORQUE), ("", Kind.ANGLE), ("abc", Kind.ANGLE)],
)
def test_wrong_dimension_or_garbage_is_a_unit_error(text: str, kind: Kind) -> None:
    with pytest.raises(UnitError):
        parse_quantity(text, kind)


def test_non_finite_and_booleans_are_refused() -> None:
    with pytest.raises(UnitError):
        parse_quantity(float("nan"), Kind.TORQUE)
    with pytest.raises(UnitError):
        parse_quantity(True, Kind.TORQUE)


@given(st.text(max_size=40))
def test_arbitrary_text_only_raises_unit_error(text: str) -> None:
    try:
        value = parse_quantity(text, Kind.TORQUE)
    except UnitError:
        return
    assert math.isfinite(value)
