"""`clampd plan`: compute preload, torque and angles for a bolted joint, propose a program.

The arithmetic lives in the pure planner (``clampd.daemon.planner``); this module only reads
arguments, prints a table or JSON, and writes ``--program-out``. Every output, human or
JSON or file, carries the planner's cautions: the numbers support, never replace, the
joint designer's specification and must be confirmed on the real joint.

Exit status: 0 planned, 2 bad input (unknown thread or class, impossible geometry,
unreadable quantity, unwritable output file) with a one-line error on stderr.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
from pathlib import Path
from typing import Any

from clampd.daemon.planner import (
    PLANNER_VERSION,
    JointInput,
    JointPlan,
    PlannerError,
    ProgramProposal,
    TighteningMethod,
    TorqueUnit,
    from_nm,
    plan_joint,
    program_toml,
    propose_program,
)
from clampd.protocol import Kind, UnitError, parse_quantity

__all__ = ["add_arguments", "plan_as_dict", "run"]


# A bare number is refused rather than taken as N·m: shops set wrenches in ft·lbf and in·lbf
# too, and a capacity read in the wrong unit passes a wrench that is 1.36 times too small.
_WRENCH_FORMAT = 'e.g. "100 N*m" or "75 ft*lbf"'


def _wrench_max_nm(text: str) -> float:
    """The wrench capacity in N·m; ``UnitError`` naming the option and the expected format."""
    try:
        float(text)
    except ValueError:
        pass
    else:
        raise UnitError(f"--wrench-max {text!r} has no unit: give it as {_WRENCH_FORMAT}")
    try:
        return parse_quantity(text, Kind.TORQUE)
    except UnitError:
        raise UnitError(
            f"--wrench-max {text!r} is not a torque: give it as {_WRENCH_FORMAT}"
        ) from None


def _finite(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"{text!r} is not a finite number")
    return value


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Declare the joint's inputs; lengths in mm, friction coefficients bare numbers."""
    a = parser.add_argument
    a("--thread", required=True, help="ISO metric thread, e.g. M10 or M10x1.25")
    a("--class", dest="property_class", required=True, help="8.8, 9.8, 10.9, 12.9, A2-70, A4-80")
    a("--grip-mm", type=_finite, required=True, help="clamp length lK in mm")
    a("--mu-thread", type=_finite, required=True, help="thread friction μG (lowest expected)")
    a("--mu-head", type=_finite, required=True, help="head friction μK (lowest expected)")
    a("--mu-thread-max", type=_finite, help="highest thread friction (default μG + 0.04)")
    a("--mu-head-max", type=_finite, help="highest head friction (default μK + 0.04)")
    a("--pitch-mm", type=_finite, help="pitch for a fine thread")
    a("--hole-mm", type=_finite, help="clearance hole (default ISO 273 medium)")
    a("--head-mm", type=_finite, help="head bearing diameter dW (default by head style)")
    a("--head", choices=("hex", "socket"), default="hex", help="head style (default hex)")
    a("--shank-mm", type=_finite, default=0.0, help="plain shank inside the grip (default 0)")
    a("--tapped", action="store_true", help="bolt in a tapped hole instead of a nut")
    a("--clamped-e-gpa", type=_finite, help="Young's modulus of the clamped parts (default steel)")
    a("--clamped-od-mm", type=_finite, help="outside diameter of the clamped parts")
    a("--utilisation", type=_finite, default=0.9, help="share of yield used, ν (default 0.9)")
    a(
        "--method",
        choices=[m.value for m in TighteningMethod],
        default="torque-angle",
        help="tightening method (default torque-angle); decides αA and the proposed program "
        "(--program-out: torque-angle or yield with their windows, torque with an angle "
        "monitoring window)",
    )
    a("--alpha-a", type=_finite, help="tightening factor for torque control (default 1.7)")
    a("--wrench-max", help=f"wrench capacity with its unit, {_WRENCH_FORMAT}")
    a("--program-out", type=Path, metavar="FILE.toml", help="write the proposed program here")
    a("--json", action="store_true", help="print JSON instead of a table")


def _pair(values: tuple[float, float], a: str = "mu_min", b: str = "mu_max") -> dict[str, float]:
    return {a: values[0], b: values[1]}


def plan_as_dict(plan: JointPlan, proposal: ProgramProposal | None) -> dict[str, Any]:
    """The plan as JSON-ready data: SI numbers, field names carrying their units."""
    inp = plan.inputs
    out: dict[str, Any] = {
        "planner_version": PLANNER_VERSION,
        "inputs": {
            "thread": inp.thread,
            "property_class": inp.property_class,
            "grip_mm": inp.grip_mm,
            "mu_thread": inp.mu_thread,
            "mu_head": inp.mu_head,
            "mu_thread_max": inp.mu_thread_max,
            "mu_head_max": inp.mu_head_max,
            "pitch_mm": inp.pitch_mm,
            "hole_mm": inp.hole_mm,
            "head_mm": inp.head_mm,
            "head": inp.head,
            "shank_mm": inp.shank_mm,
            "tapped": inp.tapped,
            "clamped_e_gpa": inp.clamped_e_gpa,
            "clamped_od_mm": inp.clamped_od_mm,
            "utilisation": inp.utilisation,
            "method": inp.method.value,
            "alpha_a": inp.alpha_a,
            "wrench_max_nm": inp.wrench_max_nm,
        },
        "thread": plan.thread.name,
        "d_mm": plan.thread.d_mm,
        "pitch_mm": plan.thread.pitch_mm,
        "d2_mm": plan.thread.d2_mm,
        "d3_mm": plan.thread.d3_mm,
        "ds_mm": plan.thread.ds_mm,
        "stress_area_mm2": plan.thread.stress_area_mm2,
        "property_class": plan.material.name,
        "rp02_min_mpa": plan.material.rp02_min_mpa,
        "rm_min_mpa": plan.material.rm_min_mpa,
        "proof_stress_mpa": plan.material.proof_stress_mpa,
        "proof_load_n": plan.proof_load_n,
        "hole_mm": plan.hole_mm,
        "head_bearing_mm": plan.head_mm,
        "dkm_mm": plan.dkm_mm,
        "mu_thread_range": list(plan.mu_thread_range),
        "mu_head_range": list(plan.mu_head_range),
        "preload_n": plan.preload_n,
        "torque_nm": plan.torque_nm,
        "torque_ft_lbf": from_nm(plan.torque_nm, TorqueUnit.FT_LBF),
        "torque_in_lbf": from_nm(plan.torque_nm, TorqueUnit.IN_LBF),
        "nut_factor": plan.nut_factor,
        "preload_at_torque_n": _pair(plan.preload_at_torque_n),
        "alpha_a": plan.alpha_a,
        "preload_min_n": plan.preload_min_n,
        "preload_max_n": plan.preload_max_n,
        "bolt_resilience_mm_per_n": plan.bolt.total,
        "bolt_resilience_segments_mm_per_n": {
            "head": plan.bolt.head,
            "shank": plan.bolt.shank,
            "free_thread": plan.bolt.free_thread,
            "engaged_thread": plan.bolt.engaged_thread,
            "nut": plan.bolt.nut,
        },
        "clamped_resilience_mm_per_n": plan.clamped.total,
        "clamped_model": {
            "model": plan.clamped.model,
            "tan_phi": plan.clamped.tan_phi,
            "cone_limit_diameter_mm": plan.clamped.cone_limit_diameter_mm,
            "outside_diameter_mm": plan.clamped.outside_diameter_mm,
        },
        "snug_torque_nm": plan.snug_torque_nm,
        "snug_preload_n": _pair(plan.snug_preload_n, "mu_max", "mu_min"),
        "angle_target_preload_n": plan.angle_target_preload_n,
        "angle_from_snug_deg": plan.angle_from_snug_deg,
        "angle_to_yield_deg": plan.angle_to_yield_deg,
        "angle_to_yield_range_deg": list(plan.angle_to_yield_range_deg),
        "yield_preload_n": _pair(plan.yield_preload_n, "mu_max", "mu_min"),
        "yield_torque_nm": list(plan.yield_torque_nm),
        "final_torque_range_nm": list(plan.final_torque_range_nm),
        "tool_fit": None,
        "program": None,
        "warnings": list(plan.warnings),
        "cautions": list(plan.cautions),
    }
    if plan.tool is not None:
        t = plan.tool
        out["tool_fit"] = {
            "ok": t.ok,
            "target_nm": t.target_nm,
            "wrench_max_nm": t.wrench_max_nm,
            "fraction_of_max": t.fraction_of_max,
            "in_calibrated_span": t.in_calibrated_span,
            "within_capacity_margin": t.within_capacity_margin,
            "suggested_max_range_nm": list(t.suggested_max_range_nm),
            "suggested_unit": t.suggested_unit.value,
        }
    if proposal is not None:
        out["program"] = {
            "id": proposal.id,
            "strategy": proposal.strategy,
            "snug_torque_nm": proposal.snug_torque_nm,
            "target_torque_nm": proposal.target_torque_nm,
            "target_angle_deg": proposal.target_angle_deg,
            "yield_fraction": proposal.yield_fraction,
            "torque_window_nm": list(proposal.torque_window_nm),
            "angle_window_deg": list(proposal.angle_window_deg),
            "max_torque_nm": proposal.max_torque_nm,
            "notes": list(proposal.notes),
        }
    return out


def _torque(nm: float) -> str:
    return (
        f"{nm:.2f} N·m  ({from_nm(nm, TorqueUnit.FT_LBF):.1f} ft·lbf,"
        f" {from_nm(nm, TorqueUnit.IN_LBF):.0f} in·lbf)"
    )


def _table(plan: JointPlan, proposal: ProgramProposal | None) -> str:
    t, m = plan.thread, plan.material
    g, k = plan.mu_thread_range, plan.mu_head_range
    rows: list[tuple[str, str]] = [
        ("thread", f"{t.name}, P {t.pitch_mm:g} mm, class {m.name} ({m.standard})"),
        ("d2 / d3 / ds", f"{t.d2_mm:.3f} / {t.d3_mm:.3f} / {t.ds_mm:.3f} mm"),
        ("stress area As", f"{t.stress_area_mm2:.1f} mm²"),
        ("Rp0.2 min / Rm min", f"{m.rp02_min_mpa:.0f} / {m.rm_min_mpa:.0f} MPa"),
        ("proof load", f"{plan.proof_load_n / 1000:.1f} kN"),
        ("head dW / hole dh / DKm", f"{plan.head_mm:g} / {plan.hole_mm:g} / {plan.dkm_mm:.2f} mm"),
        ("friction μG / μK", f"{g[0]:g}–{g[1]:g} / {k[0]:g}–{k[1]:g}"),
        (f"preload FM,zul (ν {plan.inputs.utilisation:g})", f"{plan.preload_n / 1000:.2f} kN"),
        ("tightening torque MA", _torque(plan.torque_nm)),
        (
            "preload from MA at μ min/max",
            " / ".join(f"{f / 1000:.2f}" for f in plan.preload_at_torque_n) + " kN",
        ),
        (
            f"αA ({plan.inputs.method.value}), FM min–max",
            f"{plan.alpha_a:.2f}, {plan.preload_min_n / 1e3:.2f}–{plan.preload_max_n / 1e3:.2f} kN",
        ),
        ("nut factor K = MA/(FM·d)", f"{plan.nut_factor:.3f}"),
        ("bolt resilience δS", f"{plan.bolt.total:.4g} mm/N"),
        ("clamped resilience δP", f"{plan.clamped.total:.4g} mm/N ({plan.clamped.model})"),
        ("snug torque", _torque(plan.snug_torque_nm)),
        (
            "angle snug → FM,zul at μG max",
            f"{plan.angle_from_snug_deg:.1f}° (to {plan.angle_target_preload_n / 1000:.2f} kN)",
        ),
        (
            "angle snug → yield (ν 1)",
            (
                f"{plan.angle_to_yield_deg:.1f}° (range {plan.angle_to_yield_range_deg[0]:.1f}"
                f"–{plan.angle_to_yield_range_deg[1]:.1f}°)"
            ),
        ),
    ]
    if plan.tool is not None:
        tf = plan.tool
        rows.append(
            (
                "wrench fit",
                (
                    f"{'fits' if tf.ok else 'does NOT fit'}: {tf.fraction_of_max:.0%} of"
                    f" {tf.wrench_max_nm:.1f} N·m"
                ),
            )
        )
    if proposal is not None:
        tw, aw = proposal.torque_window_nm, proposal.angle_window_deg
        if proposal.target_angle_deg is not None:
            target = f"target angle {proposal.target_angle_deg:g}°"
        elif proposal.target_torque_nm is not None:
            target = f"target torque {proposal.target_torque_nm:.2f} N·m"
        else:
            target = f"yield fraction {proposal.yield_fraction:g}"
        rows.append(("program", f"{proposal.strategy}: snug, {target}"))
        rows.append(("  torque window", f"{tw[0]:.1f}–{tw[1]:.1f} N·m"))
        rows.append(("  angle window", f"{aw[0]:.1f}–{aw[1]:.1f}°"))
        rows.append(("  over-torque stop", f"{proposal.max_torque_nm:.1f} N·m"))
    width = max(len(r[0]) for r in rows)
    lines = [f"{label:<{width}}  {value}" for label, value in rows]
    lines += [f"WARNING: {w}" for w in plan.warnings]
    if proposal is not None:
        lines += [f"NOTE: {n}" for n in proposal.notes]
    lines += [f"CAUTION: {c}" for c in plan.cautions]
    return "\n".join(lines)


def run(args: argparse.Namespace) -> int:
    """Plan the joint, print it, and write the program when asked."""
    try:
        wrench = None
        if args.wrench_max is not None:
            wrench = _wrench_max_nm(args.wrench_max)
        inp = JointInput(
            thread=args.thread,
            property_class=args.property_class,
            grip_mm=args.grip_mm,
            mu_thread=args.mu_thread,
            mu_head=args.mu_head,
            mu_thread_max=args.mu_thread_max,
            mu_head_max=args.mu_head_max,
            pitch_mm=args.pitch_mm,
            hole_mm=args.hole_mm,
            head_mm=args.head_mm,
            head=args.head,
            shank_mm=args.shank_mm,
            tapped=args.tapped,
            clamped_e_gpa=args.clamped_e_gpa,
            clamped_od_mm=args.clamped_od_mm,
            utilisation=args.utilisation,
            method=TighteningMethod(args.method),
            alpha_a=args.alpha_a,
            wrench_max_nm=wrench,
        )
        plan = plan_joint(inp)
        # The method's values name the engine's strategies (torque, torque-angle, yield).
        proposal = propose_program(plan, inp.method.value)
    except PlannerError as exc:
        # The only strategy the planner refuses for a valid method: an angle step under 1°.
        hint = " (--method torque)" if exc.field == "strategy" else ""
        print(f"clampd plan: error: {exc}{hint}", file=sys.stderr)
        return 2
    except UnitError as exc:
        print(f"clampd plan: error: {exc}", file=sys.stderr)
        return 2
    if args.program_out is not None:
        try:
            args.program_out.write_text(program_toml(plan, proposal), encoding="utf-8")
        except OSError as exc:
            print(f"clampd plan: error: cannot write {args.program_out}: {exc}", file=sys.stderr)
            return 2
    if args.json:
        data = plan_as_dict(plan, proposal)
        data["program_out"] = None if args.program_out is None else str(args.program_out)
        print(json.dumps(data, indent=2, ensure_ascii=False))
    else:
        print(_table(plan, proposal))
    return 0
