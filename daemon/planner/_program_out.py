"""A tightening program proposed from a plan, written as the engine's program TOML.

The file holds one ``[program]`` table with only the keys the engine's program loader
knows (id, name, version, strategy, snug_torque, target_torque, target_angle,
yield_fraction, torque_window, angle_window, max_torque); quantities are written as
strings with units so a person can read and edit them. The cautions and the derivation
go in comments at the top, where the loader ignores them but every reader sees them.

Windows (common practice, no source, unless said):
- torque-angle: target angle is the angle from snug to FM,zul at μG max (see
  ``_joint``) rounded down to a whole
  degree; the angle window is ±10 % of it (at least ±2°), capped below the smallest angle
  to yield; the torque window spans the final torques of both friction corners, widened
  by 10 %.
- yield: stop when the slope falls to half its linear maximum (the usual gradient
  criterion); the angle window spans the angles to yield of both friction corners,
  widened by 20 % either side for the plastic onset the detector needs; the torque window
  spans the torques at yield of both corners, widened by 10 %.
- max_torque (an over-torque stop) sits 10 % above the torque window.
TOML is written by hand: the values are plain strings, numbers and two-element lists,
and a writer dependency is not worth it for that.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from clampd.daemon.planner._errors import PlannerError
from clampd.daemon.planner._joint import JointPlan

__all__ = ["PROGRAM_KEYS", "ProgramProposal", "program_toml", "propose_program"]

PROGRAM_KEYS = frozenset(
    {
        "id", "name", "version", "strategy", "snug_torque", "target_torque", "target_angle",
        "yield_fraction", "torque_window", "angle_window", "max_torque",
    }
)  # fmt: skip

# Window widening and the gradient criterion, see the module docstring.
_TORQUE_WIDEN = 0.10
_ANGLE_TOL = 0.10
_ANGLE_TOL_MIN_DEG = 2.0
_YIELD_ANGLE_WIDEN = 0.20
_MAX_TORQUE_OVER = 0.10
YIELD_FRACTION = 0.5


@dataclass(frozen=True, slots=True, kw_only=True)
class ProgramProposal:
    """A program in SI: N·m and degrees; ``None`` for keys the strategy does not use."""

    id: str
    name: str
    strategy: str
    snug_torque_nm: float
    target_torque_nm: float | None
    target_angle_deg: float | None
    yield_fraction: float | None
    torque_window_nm: tuple[float, float]
    angle_window_deg: tuple[float, float]
    max_torque_nm: float


def _program_id(plan: JointPlan, strategy: str) -> str:
    raw = f"plan-{plan.thread.name}-{plan.material.name}-{plan.inputs.grip_mm:g}mm-{strategy}"
    return re.sub(r"[^A-Za-z0-9._-]", "-", raw).lower()


def propose_program(plan: JointPlan, strategy: str = "torque-angle") -> ProgramProposal:
    """Derive a torque-angle or yield program from ``plan``; ``PlannerError`` otherwise."""
    name = (
        f"{plan.thread.name} {plan.material.name}, grip {plan.inputs.grip_mm:g} mm,"
        f" μG {plan.mu_thread_range[0]:g}–{plan.mu_thread_range[1]:g}"
    )
    if strategy == "torque-angle":
        target = math.floor(plan.angle_from_snug_deg)
        if target < 1:
            raise PlannerError("strategy", "angle from snug is under 1°: use torque control")
        tol = max(_ANGLE_TOL * target, _ANGLE_TOL_MIN_DEG)
        hi = min(target + tol, plan.angle_to_yield_range_deg[0])
        t_lo, t_hi = plan.final_torque_range_nm
        tw = (t_lo * (1 - _TORQUE_WIDEN), t_hi * (1 + _TORQUE_WIDEN))
        return ProgramProposal(
            id=_program_id(plan, strategy),
            name=name,
            strategy=strategy,
            snug_torque_nm=plan.snug_torque_nm,
            target_torque_nm=None,
            target_angle_deg=float(target),
            yield_fraction=None,
            torque_window_nm=tw,
            angle_window_deg=(max(target - tol, 0.0), max(hi, float(target))),
            max_torque_nm=tw[1] * (1 + _MAX_TORQUE_OVER),
        )
    if strategy == "yield":
        a_lo, a_hi = plan.angle_to_yield_range_deg
        t_lo, t_hi = plan.yield_torque_nm
        tw = (t_lo * (1 - _TORQUE_WIDEN), t_hi * (1 + _TORQUE_WIDEN))
        return ProgramProposal(
            id=_program_id(plan, strategy),
            name=name,
            strategy=strategy,
            snug_torque_nm=plan.snug_torque_nm,
            target_torque_nm=None,
            target_angle_deg=None,
            yield_fraction=YIELD_FRACTION,
            torque_window_nm=tw,
            angle_window_deg=(a_lo * (1 - _YIELD_ANGLE_WIDEN), a_hi * (1 + _YIELD_ANGLE_WIDEN)),
            max_torque_nm=tw[1] * (1 + _MAX_TORQUE_OVER),
        )
    raise PlannerError("strategy", f"can propose torque-angle or yield, not {strategy!r}")


def _q(value: float, unit: str) -> str:
    return f'"{value:.2f} {unit}"'


def _toml_str(text: str) -> str:
    escaped = text.replace("\\", "\\\\").replace('"', '\\"')
    return f'"{escaped}"'


def program_toml(plan: JointPlan, proposal: ProgramProposal) -> str:
    """The program file text: cautions and derivation as comments, then ``[program]``."""
    lines = ["# Tightening program proposed by clampd plan (planner version 1)."]
    lines += [f"# CAUTION: {c}" for c in plan.cautions]
    lines += [f"# WARNING: {w}" for w in plan.warnings]
    lines += [
        "# Derivation (VDI 2230 Part 1, ISO 898-1):",
        (
            f"#   {plan.thread.name} P={plan.thread.pitch_mm:g} mm, class {plan.material.name},"
            f" grip {plan.inputs.grip_mm:g} mm, dW {plan.head_mm:g} mm, dh {plan.hole_mm:g} mm"
        ),
        (
            f"#   μG {plan.mu_thread_range[0]:g}–{plan.mu_thread_range[1]:g},"
            f" μK {plan.mu_head_range[0]:g}–{plan.mu_head_range[1]:g},"
            f" utilisation {plan.inputs.utilisation:g}"
        ),
        f"#   FM,zul {plan.preload_n:.0f} N at μG min; MA {plan.torque_nm:.2f} N·m",
        f"#   δS {plan.bolt.total:.4g} mm/N, δP {plan.clamped.total:.4g} mm/N",
        (
            f"#   snug {plan.snug_torque_nm:.2f} N·m; angle from snug to"
            f" {plan.angle_target_preload_n:.0f} N (FM,zul at μG max)"
            f" {plan.angle_from_snug_deg:.1f}°; to yield {plan.angle_to_yield_range_deg[0]:.1f}"
            f"–{plan.angle_to_yield_range_deg[1]:.1f}°"
        ),
        "",
        "[program]",
        f"id = {_toml_str(proposal.id)}",
        f"name = {_toml_str(proposal.name)}",
        "version = 1",
        f"strategy = {_toml_str(proposal.strategy)}",
        f"snug_torque = {_q(proposal.snug_torque_nm, 'N*m')}",
    ]
    if proposal.target_torque_nm is not None:
        lines.append(f"target_torque = {_q(proposal.target_torque_nm, 'N*m')}")
    if proposal.target_angle_deg is not None:
        lines.append(f"target_angle = {_q(proposal.target_angle_deg, 'deg')}")
    if proposal.yield_fraction is not None:
        lines.append(f"yield_fraction = {proposal.yield_fraction:g}")
    tw, aw = proposal.torque_window_nm, proposal.angle_window_deg
    lines += [
        f"torque_window = [{_q(tw[0], 'N*m')}, {_q(tw[1], 'N*m')}]",
        f"angle_window = [{_q(aw[0], 'deg')}, {_q(aw[1], 'deg')}]",
        f"max_torque = {_q(proposal.max_torque_nm, 'N*m')}",
        "",
    ]
    return "\n".join(lines)
