"""The proposed torque-control program: VDI 2230 torques, the simulator's joints, the station.

External references used below:
- VDI 2230 Part 1 (2003/2015) Table A1, standard thread, ν = 0.9, μK = μG, ISO 273 medium
  holes: tightening torques MA in N·m (from memory; the same rows as
  tests/test_planner_vdi2230.py). The proposed target torque is that MA.
- The simulator's joint model (``clampd.simulators.JointModel``) as the independent truth for
  angles and yield onset: it implements the published resilience and torque relations on its
  own (exact thread lead P/(2π), d0 = (d2 + d3)/2), not the planner's code.
- ISO 6789-1 calibrates a hand torque tool over 20–100 % of its maximum; the station refuses a
  program whose torque passes the wrench's rated capacity (protocol/MQTT.md, wrench_not_fit).
"""

from __future__ import annotations

import dataclasses
import tomllib

import numpy as np
import pytest
from scipy.optimize import brentq

from clampd.daemon.engine import parse_program
from clampd.daemon.planner import (
    CAUTIONS,
    PROGRAM_KEYS,
    JointInput,
    JointPlan,
    TighteningMethod,
    plan_joint,
    program_toml,
    propose_program,
    tool_fit,
)
from clampd.daemon.runtime import StationState, WrenchNotFitError
from clampd.simulators import JointModel, JointPopulation

# VDI 2230 Part 1 Table A1 (from memory): MA in N·m at μG = μK.
TABLE_A1_MA: dict[tuple[str, str, float], float] = {
    ("M8", "8.8", 0.10): 21.6,
    ("M8", "8.8", 0.12): 24.6,
    ("M10", "8.8", 0.12): 48.0,
    ("M10", "10.9", 0.14): 79.0,
    ("M12", "8.8", 0.14): 93.0,
    ("M12", "10.9", 0.10): 108.0,
    ("M16", "8.8", 0.12): 206.0,
}


def _rounding_tol(value: float) -> float:
    # Half a unit of the table's last digit plus 0.6 % for its own rounding of d2, d3 and DKm
    # (the same allowance as tests/test_planner_vdi2230.py).
    half_unit = 0.5 if float(value).is_integer() else 0.05
    return half_unit + 0.006 * value


def _torque_plan(thread: str, cls: str, mu: float, **extra: float) -> JointPlan:
    d = float(thread[1:])
    return plan_joint(
        JointInput(
            thread=thread,
            property_class=cls,
            grip_mm=3.0 * d,
            mu_thread=mu,
            mu_head=mu,
            method=TighteningMethod.TORQUE,
            **extra,  # type: ignore[arg-type]
        )
    )


M10 = _torque_plan("M10", "8.8", 0.12)


@pytest.mark.parametrize(("key", "ma"), sorted(TABLE_A1_MA.items()))
def test_target_torque_is_the_vdi_table_torque(key: tuple[str, str, float], ma: float) -> None:
    thread, cls, mu = key
    plan = _torque_plan(thread, cls, mu)
    prop = propose_program(plan, "torque")
    assert prop.strategy == "torque"
    target = prop.target_torque_nm
    assert target is not None
    assert target == pytest.approx(ma, abs=_rounding_tol(ma))
    # ±10 % window around it (common practice, no source), never past the yield cap.
    lo, hi = prop.torque_window_nm
    assert lo == pytest.approx(0.9 * target)
    assert target < hi <= min(1.1 * target, plan.yield_torque_nm[0])
    assert prop.snug_torque_nm < lo
    assert hi < prop.max_torque_nm
    assert prop.target_angle_deg is None
    assert prop.yield_fraction is None


def test_torque_program_file_loads_through_the_engine_with_its_cautions() -> None:
    prop = propose_program(M10, "torque")
    text = program_toml(M10, prop)
    assert set(tomllib.loads(text)["program"]) <= PROGRAM_KEYS
    program = parse_program(text)
    assert program.strategy.value == "torque"
    assert program.id == prop.id
    assert prop.target_torque_nm is not None
    assert program.target_torque_nm == pytest.approx(prop.target_torque_nm, abs=0.005)
    assert program.torque_window_nm == pytest.approx(prop.torque_window_nm, abs=0.005)
    assert program.angle_window_deg == pytest.approx(prop.angle_window_deg, abs=0.005)
    assert program.max_torque_nm == pytest.approx(prop.max_torque_nm, abs=0.005)
    assert program.target_angle_deg is None
    for caution in CAUTIONS:
        assert f"# CAUTION: {caution}" in text
    # The file says how far above FM,zul the top of the torque window can take the preload.
    assert prop.notes
    for note in prop.notes:
        assert f"# NOTE: {note}" in text
    assert "tool's scatter" in text


def test_torque_program_passes_the_tool_fit_and_the_station_fit_check() -> None:
    # A 100 N·m wrench suits MA ≈ 48 N·m (48 % of its maximum: inside ISO 6789's 20–100 %
    # span and under the 80 % margin); a 50 N·m wrench is under the window's top (53 N·m).
    plan = _torque_plan("M10", "8.8", 0.12, wrench_max_nm=100.0)
    prop = propose_program(plan, "torque")
    assert plan.tool is not None
    assert plan.tool.ok
    assert plan.tool.target_nm == pytest.approx(prop.target_torque_nm)
    assert tool_fit(prop.torque_window_nm[1], 100.0).ok
    table = tomllib.loads(program_toml(plan, prop))["program"]
    station = StationState.from_tables("st-120", [table], {"wr-big": 100.0, "wr-small": 50.0})
    job = station.select(
        program_id=prop.id, part_id="DK48-1", joint_positions=["guard-1"], wrench_id="wr-big"
    )
    assert job.program.target_torque_nm == pytest.approx(prop.target_torque_nm, abs=0.005)
    assert not tool_fit(prop.target_torque_nm or 0.0, 50.0).ok
    with pytest.raises(WrenchNotFitError):
        station.select(
            program_id=prop.id, part_id="DK48-1", joint_positions=["guard-1"], wrench_id="wr-small"
        )


def _plan_for(pop: JointPopulation, mu_lo: float, mu_hi: float) -> JointPlan:
    return plan_joint(
        JointInput(
            thread=f"M{pop.d_mm}",
            property_class=pop.property_class,
            grip_mm=pop.clamp_length_mm,
            mu_thread=mu_lo,
            mu_head=mu_lo,
            mu_thread_max=mu_hi,
            mu_head_max=mu_hi,
            method=TighteningMethod.TORQUE,
        )
    )


def _angle_past_snug(joint: JointModel, snug_nm: float, torque_nm: float) -> float:
    """True angle from where the torque passes snug to where it reaches ``torque_nm``."""
    top = joint.true_yield_onset_angle_deg
    snug = brentq(lambda a: joint.point(a).torque_nm - snug_nm, joint.contact_angle_deg, top)
    end = brentq(lambda a: joint.point(a).torque_nm - torque_nm, snug, top)
    return float(end - snug)


# The simulator's lot: friction spread over the planned range 0.12–0.16 (±3 σ), bolts ~10 %
# above the class minimum strength (its default lot model), seating 5–15°.
MU_LO, MU_HI = 0.12, 0.16
POP = JointPopulation(
    d_mm=10,
    property_class="8.8",
    clamp_length_mm=30.0,
    mu_thread_mean=(MU_LO + MU_HI) / 2,
    mu_thread_sd=(MU_HI - MU_LO) / 6,
    mu_head_mean=(MU_LO + MU_HI) / 2,
    mu_head_sd=(MU_HI - MU_LO) / 6,
)


def test_angle_window_holds_the_simulated_lot_over_the_whole_torque_window() -> None:
    plan = _plan_for(POP, MU_LO, MU_HI)
    prop = propose_program(plan, "torque")
    lo, hi = prop.angle_window_deg
    rng = np.random.default_rng(23)
    angles = []
    for _ in range(200):
        joint = POP.draw(rng)
        for torque in prop.torque_window_nm:
            angles.append(_angle_past_snug(joint, prop.snug_torque_nm, torque))
    a = np.array(angles)
    assert lo <= a.min()
    assert a.max() <= hi
    # Not vacuous: the window is at most twice as wide as what the lot needs.
    assert hi - lo <= 2.0 * (a.max() - a.min())


@pytest.mark.parametrize(("scale", "side"), [(2.0, "high"), (0.5, "low")])
def test_a_joint_far_softer_or_stiffer_than_planned_leaves_the_angle_window(
    scale: float, side: str
) -> None:
    # A gasket or a missing sleeve (twice the resilience) turns much further to the target
    # torque; a joint half as compliant turns much less. Either is a wrong joint.
    plan = _plan_for(POP, MU_LO, MU_HI)
    prop = propose_program(plan, "torque")
    assert prop.target_torque_nm is not None
    joint = POP.draw(np.random.default_rng(5))
    odd = dataclasses.replace(
        joint,
        bolt_resilience_mm_per_n=joint.bolt_resilience_mm_per_n * scale,
        clamped_resilience_mm_per_n=joint.clamped_resilience_mm_per_n * scale,
    )
    angle = _angle_past_snug(odd, prop.snug_torque_nm, prop.target_torque_nm)
    lo, hi = prop.angle_window_deg
    assert (angle > hi) if side == "high" else (angle < lo)
    assert lo <= _angle_past_snug(joint, prop.snug_torque_nm, prop.target_torque_nm) <= hi


def test_top_of_the_torque_window_stops_short_of_yield_for_a_minimum_strength_bolt() -> None:
    # Worst case of the planned range: lowest friction, bolt at the ISO 898-1 class minimum
    # (Rp0.2 640 MPa, Rm 800 MPa for 8.8 up to M16, from memory). The simulator's own yield
    # onset must lie above the window's top, and not far above (the cap is the yield torque).
    plan = _plan_for(POP, MU_LO, MU_HI)
    prop = propose_program(plan, "torque")
    base = POP.draw(np.random.default_rng(1))
    weakest = dataclasses.replace(
        base, rp02_mpa=640.0, rm_mpa=800.0, mu_thread=MU_LO, mu_head=MU_LO
    )
    onset_torque = weakest.point(weakest.true_yield_onset_angle_deg).torque_nm
    top = prop.torque_window_nm[1]
    assert top < onset_torque < 1.08 * top
    at_top = brentq(
        lambda a: weakest.point(a).torque_nm - top,
        weakest.contact_angle_deg,
        weakest.true_yield_onset_angle_deg,
    )
    assert not weakest.point(at_top).yielded
    assert weakest.point(weakest.true_yield_onset_angle_deg + 1.0).yielded


def test_full_utilisation_puts_the_window_top_at_the_target() -> None:
    # ν = 1: MA itself takes a minimum-strength bolt at the lowest friction to yield, so the
    # window may not reach above it.
    plan = _torque_plan("M10", "8.8", 0.12, utilisation=1.0)
    prop = propose_program(plan, "torque")
    assert prop.torque_window_nm[1] == pytest.approx(prop.target_torque_nm)
    assert any("little margin below yield" in w for w in plan.warnings)
