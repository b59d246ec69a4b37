"""The whole plan and the program file it proposes.

The program file must load as TOML with only the engine's program keys, carry the cautions,
and (where the engine's loader is present) load through ``clampd.daemon.engine.parse_program``.
"""

from __future__ import annotations

import tomllib
from dataclasses import replace

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from clampd.daemon.engine import parse_program
from clampd.daemon.planner import (
    CAUTIONS,
    PROGRAM_KEYS,
    JointInput,
    PlannerError,
    TighteningMethod,
    permissible_preload_n,
    plan_joint,
    program_toml,
    propose_program,
    rotation_deg,
)
from clampd.protocol import Kind, parse_quantity

M10 = JointInput(thread="M10", property_class="8.8", grip_mm=30.0, mu_thread=0.12, mu_head=0.12)


def test_plan_is_consistent_with_its_parts() -> None:
    plan = plan_joint(M10)
    lo, hi = plan.mu_thread_range
    assert lo == 0.12
    assert hi == pytest.approx(0.16)
    # The torque gives FM,zul at μ min and less at μ max (VDI 2230 convention).
    assert plan.preload_at_torque_n[0] == pytest.approx(plan.preload_n)
    assert plan.preload_at_torque_n[1] < plan.preload_n
    # Angle control is bounded by FM,zul at the highest thread friction (most torsion); the
    # angle closes exactly the gap from the highest snug preload to it.
    assert plan.angle_target_preload_n == pytest.approx(
        permissible_preload_n(plan.thread, 640.0, plan.mu_thread_range[1], 0.9)
    )
    assert plan.angle_target_preload_n < plan.preload_n
    expected = rotation_deg(
        plan.angle_target_preload_n - plan.snug_preload_n[1],
        plan.bolt.total,
        plan.clamped.total,
        plan.thread.pitch_mm,
    )
    assert plan.angle_from_snug_deg == pytest.approx(expected)
    # ν = 0.9 stops short of yield (ν = 1) in every friction corner.
    assert plan.angle_from_snug_deg < plan.angle_to_yield_range_deg[0]
    assert plan.angle_to_yield_range_deg[0] <= plan.angle_to_yield_deg
    assert plan.angle_to_yield_deg <= plan.angle_to_yield_range_deg[1]
    assert plan.cautions == CAUTIONS
    assert plan.snug_torque_nm < plan.torque_nm


def test_torque_method_uses_alpha_a() -> None:
    plan = plan_joint(
        JointInput(
            thread="M12",
            property_class="10.9",
            grip_mm=40.0,
            mu_thread=0.1,
            mu_head=0.1,
            method=TighteningMethod.TORQUE,
            alpha_a=1.8,
        )
    )
    assert plan.preload_min_n == pytest.approx(plan.preload_n / 1.8)
    low = plan_joint(
        JointInput(
            thread="M12",
            property_class="10.9",
            grip_mm=40.0,
            mu_thread=0.1,
            mu_head=0.1,
            mu_thread_max=0.2,
            mu_head_max=0.2,
            method=TighteningMethod.TORQUE,
            alpha_a=1.1,
        )
    )
    assert any("below the friction range" in w for w in low.warnings)


def test_stainless_has_no_proof_stress_and_says_so() -> None:
    plan = plan_joint(
        JointInput(thread="M8", property_class="A2-70", grip_mm=20, mu_thread=0.2, mu_head=0.2)
    )
    assert plan.proof_load_n == pytest.approx(plan.thread.stress_area_mm2 * 450)
    assert any("no proof stress" in w for w in plan.warnings)


def _quantities(prog: dict[str, object]) -> dict[str, object]:
    out: dict[str, object] = {}
    for key, value in prog.items():
        if isinstance(value, str) and key in ("snug_torque", "max_torque", "target_torque"):
            out[key] = parse_quantity(value, Kind.TORQUE)
        elif key == "target_angle":
            assert isinstance(value, str)
            out[key] = parse_quantity(value, Kind.ANGLE)
        elif key in ("torque_window", "angle_window"):
            assert isinstance(value, list)
            kind = Kind.TORQUE if key == "torque_window" else Kind.ANGLE
            out[key] = [parse_quantity(v, kind) for v in value]
        else:
            out[key] = value
    return out


@pytest.mark.parametrize("strategy", ["torque", "torque-angle", "yield"])
def test_program_file_has_only_engine_keys_and_sane_windows(strategy: str) -> None:
    plan = plan_joint(M10)
    text = program_toml(plan, propose_program(plan, strategy))
    doc = tomllib.loads(text)
    assert set(doc) == {"program"}
    prog = doc["program"]
    assert set(prog) <= PROGRAM_KEYS
    assert prog["strategy"] == strategy
    q = _quantities(prog)
    tw, aw = q["torque_window"], q["angle_window"]
    assert isinstance(tw, list)
    assert isinstance(aw, list)
    assert 0 < tw[0] < tw[1] < q["max_torque"]
    assert 0 <= aw[0] < aw[1]
    if strategy == "torque-angle":
        assert aw[0] <= q["target_angle"] <= aw[1]
        assert aw[1] <= plan.angle_to_yield_range_deg[0] + 0.01
        assert tw[0] <= plan.torque_nm <= tw[1]
        assert "yield_fraction" not in prog
    elif strategy == "torque":
        # The target is MA; the angle window spans the angles to the window's torques.
        assert tw[0] < q["target_torque"] < tw[1]
        assert q["target_torque"] == pytest.approx(plan.torque_nm, abs=0.005)
        assert "target_angle" not in prog
        assert "yield_fraction" not in prog
        assert aw[1] <= plan.angle_to_yield_range_deg[1] + 0.01
    else:
        assert prog["yield_fraction"] == 0.5
        assert "target_angle" not in prog
        assert aw[0] <= plan.angle_to_yield_range_deg[0]
        assert plan.angle_to_yield_range_deg[1] <= aw[1]
    for caution in CAUTIONS:
        assert f"# CAUTION: {caution}" in text


def test_program_loads_through_the_engine() -> None:
    engine = pytest.importorskip("clampd.daemon.engine")
    parse_program = getattr(engine, "parse_program", None)
    if parse_program is None:
        pytest.skip("the engine does not export parse_program yet")
    plan = plan_joint(M10)
    for strategy in ("torque", "torque-angle", "yield"):
        prop = propose_program(plan, strategy)
        program = parse_program(program_toml(plan, prop))
        assert program.id == prop.id
        assert program.strategy.value == strategy
        assert program.snug_torque_nm == pytest.approx(prop.snug_torque_nm, abs=0.005)
        assert program.max_torque_nm == pytest.approx(prop.max_torque_nm, abs=0.005)


def test_unsupported_strategy_is_refused() -> None:
    with pytest.raises(PlannerError) as exc:
        propose_program(plan_joint(M10), "multi-step")
    assert exc.value.field == "strategy"


@pytest.mark.parametrize(
    ("changes", "field"),
    [
        ({"thread": "M7"}, "thread"),
        ({"grip_mm": -3.0}, "grip_mm"),
        ({"grip_mm": 20.0, "shank_mm": 25.0}, "grip_mm"),
        ({"hole_mm": 9.0}, "hole_mm"),
        ({"head_mm": 10.5}, "head_mm"),
        ({"mu_thread_max": 0.1}, "mu_thread_max"),
        ({"clamped_e_gpa": 205000.0}, "clamped_e_gpa"),
        ({"property_class": "8.9"}, "property_class"),
        ({"utilisation": 1.5}, "utilisation"),
    ],
)
def test_impossible_joints_name_the_input(changes: dict[str, object], field: str) -> None:
    with pytest.raises(PlannerError) as exc:
        plan_joint(replace(M10, **changes))  # type: ignore[arg-type]
    assert exc.value.field == field


def test_wrench_is_judged_on_the_highest_torque_it_will_see() -> None:
    # Torque control: the set torque. Torque-angle: the end of the angle step at the highest
    # friction, which is above the set torque.
    torque = plan_joint(replace(M10, method=TighteningMethod.TORQUE, wrench_max_nm=100.0))
    angle = plan_joint(replace(M10, wrench_max_nm=100.0))
    assert torque.tool is not None
    assert angle.tool is not None
    assert torque.tool.target_nm == pytest.approx(torque.torque_nm)
    assert angle.tool.target_nm == pytest.approx(angle.final_torque_range_nm[1])
    assert angle.tool.target_nm > angle.torque_nm


def test_soft_tapped_part_warns_about_stripping() -> None:
    soft = plan_joint(replace(M10, tapped=True, clamped_e_gpa=70.0))
    steel = plan_joint(replace(M10, tapped=True))
    assert any("stripping" in w for w in soft.warnings)
    assert not any("stripping" in w for w in steel.warnings)


@settings(max_examples=150, deadline=None)
@given(
    size=st.sampled_from(["M6", "M8", "M10", "M12", "M16", "M20", "M24", "M10x1.25", "M16x1.5"]),
    cls=st.sampled_from(["8.8", "10.9", "12.9", "A2-70", "A4-80"]),
    grip_per_d=st.floats(0.5, 8.0),
    mu_g=st.floats(0.06, 0.25),
    mu_k=st.floats(0.06, 0.25),
    spread=st.floats(0.0, 0.1),
    strategy=st.sampled_from(["torque", "torque-angle", "yield"]),
)
def test_any_valid_joint_gives_an_ordered_plan_and_a_loadable_program(
    *,
    size: str,
    cls: str,
    grip_per_d: float,
    mu_g: float,
    mu_k: float,
    spread: float,
    strategy: str,
) -> None:
    d = float(size[1:].split("x", maxsplit=1)[0])
    inp = JointInput(
        thread=size,
        property_class=cls,
        grip_mm=grip_per_d * d,
        mu_thread=mu_g,
        mu_head=mu_k,
        mu_thread_max=mu_g + spread,
        mu_head_max=mu_k + spread,
    )
    plan = plan_joint(inp)
    assert 0 < plan.snug_preload_n[0] <= plan.snug_preload_n[1] < plan.preload_n
    assert plan.preload_n < plan.yield_preload_n[1]
    assert plan.preload_at_torque_n[1] <= plan.preload_at_torque_n[0]
    assert 0 < plan.angle_from_snug_deg < plan.angle_to_yield_range_deg[0]
    assert plan.final_torque_range_nm[0] <= plan.final_torque_range_nm[1]
    # The angle step never takes the bolt to yield, whatever the friction in the range.
    assert plan.angle_target_preload_n < plan.yield_preload_n[0]
    if strategy == "torque-angle" and plan.angle_from_snug_deg < 1.0:
        with pytest.raises(PlannerError, match="use torque control"):
            propose_program(plan, strategy)
        return
    prop = propose_program(plan, strategy)
    doc = tomllib.loads(program_toml(plan, prop))
    assert set(doc["program"]) <= PROGRAM_KEYS
    assert prop.torque_window_nm[0] < prop.torque_window_nm[1] < prop.max_torque_nm
    assert prop.angle_window_deg[0] < prop.angle_window_deg[1]
    assert prop.snug_torque_nm < prop.torque_window_nm[0]
    # The engine's own loader accepts it (target above snug, over-torque stop above all).
    assert parse_program(program_toml(plan, prop)).strategy.value == strategy


def test_alpha_a_outside_torque_control_is_flagged_not_used() -> None:
    plan = plan_joint(replace(M10, alpha_a=2.5))
    assert any("αA applies to torque control only" in w for w in plan.warnings)
    assert plan.alpha_a < 2.0  # the torque-angle range, not the given factor
