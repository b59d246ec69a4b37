"""Wrench fit (ISO 6789 calibrated span, capacity margin) and torque units both ways."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st

from clampd.daemon.planner import PlannerError, TorqueUnit, from_nm, to_nm, tool_fit
from clampd.protocol import Kind, parse_quantity


def test_unit_definitions() -> None:
    # NIST SP 811 (B.8): 1 ft = 0.3048 m exactly, 1 lbf = 0.45359237 kg · 9.80665 m/s²
    # exactly, hence 1 ft·lbf = 1.3558179483314004 N·m and 1 in·lbf = 1/12 of it.
    assert to_nm(1.0, TorqueUnit.FT_LBF) == pytest.approx(1.3558179483314004, rel=1e-15)
    assert to_nm(12.0, TorqueUnit.IN_LBF) == pytest.approx(to_nm(1.0, TorqueUnit.FT_LBF))
    assert from_nm(1.3558179483, TorqueUnit.FT_LBF) == pytest.approx(1.0, rel=1e-10)
    # Cross-check with pint through the protocol's parser (an independent path).
    assert to_nm(75.0, TorqueUnit.FT_LBF) == pytest.approx(
        parse_quantity("75 ft*lbf", Kind.TORQUE), rel=1e-12
    )


@given(value=st.floats(1e-3, 1e5), unit=st.sampled_from(list(TorqueUnit)))
def test_conversions_round_trip(value: float, unit: TorqueUnit) -> None:
    assert from_nm(to_nm(value, unit), unit) == pytest.approx(value, rel=1e-12)


def test_target_in_the_middle_fits() -> None:
    fit = tool_fit(50.0, 100.0)
    assert fit.ok
    assert fit.fraction_of_max == pytest.approx(0.5)
    assert fit.warnings == ()


def test_iso_6789_lower_bound() -> None:
    # ISO 6789-1: calibrated span 20 %–100 % of the maximum.
    assert tool_fit(20.0, 100.0).in_calibrated_span
    low = tool_fit(19.9, 100.0)
    assert not low.in_calibrated_span
    assert not low.ok
    assert any("ISO 6789" in w for w in low.warnings)


def test_capacity_margin_at_80_percent() -> None:
    # Common practice, no source: keep the target at or below about 80 % of capacity.
    assert tool_fit(80.0, 100.0).ok
    near = tool_fit(85.0, 100.0)
    assert near.in_calibrated_span
    assert not near.within_capacity_margin
    over = tool_fit(120.0, 100.0)
    assert not over.in_calibrated_span
    assert "exceeds" in over.warnings[0]


def test_low_target_suggests_a_smaller_in_lbf_tool() -> None:
    # 8 N·m (about 5.9 ft·lbf, 71 in·lbf) on a 100 N·m wrench is 8 %: a wrench of
    # 10–40 N·m (89–354 in·lbf) fits, and in·lbf is the scale for such small targets.
    fit = tool_fit(8.0, 100.0)
    assert not fit.ok
    assert fit.suggested_max_range_nm == pytest.approx((10.0, 40.0))
    assert fit.suggested_unit is TorqueUnit.IN_LBF
    assert "in*lbf" in fit.warnings[0]
    # A larger target keeps ft·lbf.
    assert tool_fit(200.0, 100.0).suggested_unit is TorqueUnit.FT_LBF


@pytest.mark.parametrize(
    ("target", "cap"), [(0.0, 100.0), (-5.0, 100.0), (10.0, 0.0), (float("nan"), 1.0)]
)
def test_bad_input(target: float, cap: float) -> None:
    with pytest.raises(PlannerError):
        tool_fit(target, cap)
