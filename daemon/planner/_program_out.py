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
  widened by 20 % either side for the plastic onset the detector needs; its upper limit
  also allows for delivered bolts being stronger than the class minimum the plan uses
  (Rp0.2 commonly ~10 % above the ISO 898-1 minimum; from memory, common practice, no
  source) and for the technician's overrun after the stop cue, which a detected yield
  cannot lead: cue latency plus a slow reaction (~0.35 s) at a finishing pull of ~40 °/s is
  ~14°, taken as 15° (our estimate from the reaction times in DESIGN.md's domain notes).
  The torque window spans the torques at yield of both corners, widened by 10 %.
- torque: the target torque is MA, the VDI 2230 tightening torque that gives FM,zul at the
  lowest friction (``JointPlan.torque_nm``; the torque the tables print). The torque window is
  ±10 % of it, as wide as the torque-angle program widens its final torques and wider than the
  ±4 to ±6 % ISO 6789-1 allows a hand torque tool (from memory), so a sound tool lands inside;
  its upper limit is capped at the least torque that takes a minimum-strength bolt to yield
  (ν = 1 at the lowest friction), but never below the target. The angle monitoring window is
  the elastic angle from snug to each end of the torque window at both friction corners
  (preload F = M/(dMA/dF) in the VDI 2230 torque relation, angle 360·(δS+δP)·ΔF/P), widened
  like the torque-angle window: ±10 %, at least ±2°, the widening above capped at the largest
  angle to yield (past it a minimum-strength bolt has yielded at any friction in the range)
  but never cutting into the span itself. It flags a joint much softer or stiffer
  than planned (wrong part, missing washer, cross-threading, a stripping thread); narrow it
  from a run of known-good joints on the line. The window lets the torque run above MA, so at
  the lowest friction the preload may pass FM,zul: the file says by how much.
- max_torque (an over-torque stop) sits 10 % above the torque window.
- error proofing (the engine's ``_proofing.py``): the joint-rate window spans
  dT/dθ = (dMA/dF)·P/(360·(δS+δP)) at both friction corners (dMA/dF from the VDI 2230 torque
  relation), widened by 10 % for the slope fit and the resilience model; the
  prevailing-torque window is 0 to 10 % of snug (a plain nut runs down almost freely);
  a re-hit is snug within half the elastic angle from zero preload to the lowest snug
  preload (a fresh joint must turn at least that far); the torque-drop check trips at a 20 %
  fall; the rundown-angle window only when the thread length run down before the head seats
  is given (``rundown_mm``): from its shortest run, to its longest plus the angle to the
  highest snug preload plus 30° of seating. These are starting values: narrow the joint-rate
  window from a run of known-good joints on the line.
TOML is written by hand: the values are plain strings, numbers and two-element lists,
and a writer dependency is not worth it for that.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any

from clampd.daemon.planner._errors import PlannerError
from clampd.daemon.planner._joint import JointPlan
from clampd.daemon.planner._resilience import rotation_deg
from clampd.daemon.planner._vdi2230 import preload_from_torque_n, torque_per_preload_mm

__all__ = ["PROGRAM_KEYS", "ProgramProposal", "program_toml", "propose_program"]

PROGRAM_KEYS = frozenset(
    {
        "id", "name", "version", "strategy", "snug_torque", "target_torque", "target_angle",
        "yield_fraction", "torque_window", "angle_window", "max_torque",
        "prevailing_torque_window", "rundown_angle_window", "joint_rate_window",
        "rehit_angle_max", "torque_drop",
    }
)  # fmt: skip

# Window widening and the gradient criterion, see the module docstring.
_TORQUE_WIDEN = 0.10
_ANGLE_TOL = 0.10
_ANGLE_TOL_MIN_DEG = 2.0
_YIELD_ANGLE_WIDEN = 0.20
_STRENGTH_OVER_MIN = 1.10  # delivered Rp0.2 over the class minimum (from memory)
_YIELD_OVERRUN_DEG = 15.0  # technician's overrun after a yield stop cue (our estimate)
_MAX_TORQUE_OVER = 0.10
YIELD_FRACTION = 0.5
# Error-proofing defaults, see the module docstring (common practice, no source; our choices).
_PREVAILING_OF_SNUG = 0.10
_REHIT_OF_SNUG_ANGLE = 0.5
_TORQUE_DROP = 0.20
_SEATING_DEG = 30.0
# Joint-rate window widening: the engine's fit over the curve from snug reads a few % off the
# elastic slope, and substitute-sleeve models of δP differ by ~20 % (a few % of the rate).
_RATE_WIDEN = 0.10


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
    prevailing_torque_window_nm: tuple[float, float] | None = None
    rundown_angle_window_deg: tuple[float, float] | None = None
    joint_rate_window_nm_per_deg: tuple[float, float] | None = None
    rehit_angle_max_deg: float | None = None
    torque_drop_fraction: float | None = None
    notes: tuple[str, ...] = ()


def _program_id(plan: JointPlan, strategy: str) -> str:
    raw = f"plan-{plan.thread.name}-{plan.material.name}-{plan.inputs.grip_mm:g}mm-{strategy}"
    return re.sub(r"[^A-Za-z0-9._-]", "-", raw).lower()


def _proofing(plan: JointPlan, rundown_mm: tuple[float, float] | None) -> dict[str, Any]:
    """The error-proofing keys of a proposal (see the module docstring)."""
    delta = plan.bolt.total + plan.clamped.total
    p = plan.thread.pitch_mm
    rates = tuple(
        torque_per_preload_mm(plan.thread, mu_g, mu_k, plan.dkm_mm) / 1000.0 * p / (360.0 * delta)
        for mu_g, mu_k in zip(plan.mu_thread_range, plan.mu_head_range, strict=True)
    )
    snug_angle = rotation_deg(min(plan.snug_preload_n), plan.bolt.total, plan.clamped.total, p)
    out: dict[str, Any] = {
        "prevailing_torque_window_nm": (0.0, _PREVAILING_OF_SNUG * plan.snug_torque_nm),
        "joint_rate_window_nm_per_deg": (
            min(rates) * (1.0 - _RATE_WIDEN),
            max(rates) * (1.0 + _RATE_WIDEN),
        ),
        "rehit_angle_max_deg": _REHIT_OF_SNUG_ANGLE * snug_angle,
        "torque_drop_fraction": _TORQUE_DROP,
    }
    if rundown_mm is not None:
        lo, hi = rundown_mm
        if not (math.isfinite(lo) and math.isfinite(hi) and 0.0 <= lo <= hi):
            raise PlannerError(
                "rundown_mm", f"must be [min, max] with 0 <= min <= max, got {rundown_mm}"
            )
        top = rotation_deg(max(plan.snug_preload_n), plan.bolt.total, plan.clamped.total, p)
        out["rundown_angle_window_deg"] = (lo * 360.0 / p, hi * 360.0 / p + top + _SEATING_DEG)
    return out


def propose_program(
    plan: JointPlan,
    strategy: str = "torque-angle",
    *,
    rundown_mm: tuple[float, float] | None = None,
) -> ProgramProposal:
    """Derive a torque, torque-angle or yield program from ``plan``; ``PlannerError`` otherwise.

    ``rundown_mm``: the thread length the wrench runs down before the head seats (shortest,
    longest), when the assembly fixes it; it gives the rundown-angle window.
    """
    proofing = _proofing(plan, rundown_mm)
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
            **proofing,
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
            angle_window_deg=(
                a_lo * (1 - _YIELD_ANGLE_WIDEN),
                a_hi * _STRENGTH_OVER_MIN * (1 + _YIELD_ANGLE_WIDEN) + _YIELD_OVERRUN_DEG,
            ),
            max_torque_nm=tw[1] * (1 + _MAX_TORQUE_OVER),
            **proofing,
        )
    if strategy == "torque":
        return _torque_program(plan, name, proofing)
    raise PlannerError("strategy", f"can propose torque, torque-angle or yield, not {strategy!r}")


def _torque_program(plan: JointPlan, name: str, proofing: dict[str, Any]) -> ProgramProposal:
    """Torque control with angle monitoring (see the module docstring)."""
    target = plan.torque_nm
    tw = (
        target * (1 - _TORQUE_WIDEN),
        max(min(target * (1 + _TORQUE_WIDEN), plan.yield_torque_nm[0]), target),
    )
    (mu_g_lo, mu_g_hi), (mu_k_lo, mu_k_hi) = plan.mu_thread_range, plan.mu_head_range
    delta_s, delta_p, p = plan.bolt.total, plan.clamped.total, plan.thread.pitch_mm

    def angle(torque_nm: float, mu_g: float, mu_k: float) -> float:
        rise = torque_nm - plan.snug_torque_nm
        f = preload_from_torque_n(rise, plan.thread, mu_g, mu_k, plan.dkm_mm)
        return rotation_deg(f, delta_s, delta_p, p)

    # The least angle: lowest window torque at the highest friction; the most: the reverse.
    a_lo, a_hi = angle(tw[0], mu_g_hi, mu_k_hi), angle(tw[1], mu_g_lo, mu_k_lo)
    tol_lo = max(_ANGLE_TOL * a_lo, _ANGLE_TOL_MIN_DEG)
    tol_hi = max(_ANGLE_TOL * a_hi, _ANGLE_TOL_MIN_DEG)
    # Past this angle a minimum-strength bolt has yielded whatever the friction.
    yield_cap = plan.angle_to_yield_range_deg[1]
    f_top = preload_from_torque_n(tw[1], plan.thread, mu_g_lo, mu_k_lo, plan.dkm_mm)
    nu_top = plan.inputs.utilisation * f_top / plan.preload_n
    notes = (
        (
            f"target torque {target:.2f} N·m is MA, which gives FM,zul {plan.preload_n:.0f} N"
            f" at μG {mu_g_lo:g}; at the top of the torque window ({tw[1]:.2f} N·m) the same"
            f" friction gives {f_top:.0f} N, a utilisation ν of about {nu_top:.2f}."
        ),
        (
            "Where the specification requires the preload to stay at or below FM,zul including"
            " the tool's scatter, lower the target torque by that scatter."
        ),
    )
    return ProgramProposal(
        id=_program_id(plan, "torque"),
        name=name,
        strategy="torque",
        snug_torque_nm=plan.snug_torque_nm,
        target_torque_nm=target,
        target_angle_deg=None,
        yield_fraction=None,
        torque_window_nm=tw,
        angle_window_deg=(max(a_lo - tol_lo, 0.0), max(min(a_hi + tol_hi, yield_cap), a_hi)),
        max_torque_nm=tw[1] * (1 + _MAX_TORQUE_OVER),
        notes=notes,
        **proofing,
    )


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
    lines += [f"# NOTE: {n}" for n in proposal.notes]
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
            f"#   preload from MA at μ min/max {plan.preload_at_torque_n[0]:.0f}"
            f"–{plan.preload_at_torque_n[1]:.0f} N (torque control)"
        ),
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
    ]
    if proposal.prevailing_torque_window_nm is not None:
        pw = proposal.prevailing_torque_window_nm
        lines.append(f"prevailing_torque_window = [{_q(pw[0], 'N*m')}, {_q(pw[1], 'N*m')}]")
    if proposal.rundown_angle_window_deg is not None:
        rw = proposal.rundown_angle_window_deg
        lines.append(f"rundown_angle_window = [{_q(rw[0], 'deg')}, {_q(rw[1], 'deg')}]")
    if proposal.joint_rate_window_nm_per_deg is not None:
        jw = proposal.joint_rate_window_nm_per_deg
        lines.append(f'joint_rate_window = ["{jw[0]:.4f} N*m/deg", "{jw[1]:.4f} N*m/deg"]')
    if proposal.rehit_angle_max_deg is not None:
        lines.append(f"rehit_angle_max = {_q(proposal.rehit_angle_max_deg, 'deg')}")
    if proposal.torque_drop_fraction is not None:
        lines.append(f"torque_drop = {proposal.torque_drop_fraction:g}")
    lines.append("")
    return "\n".join(lines)
