"""One joint, planned end to end: preload, torque, resilience, angles, snug, tool fit.

The planner composes the pure pieces (threads, classes, VDI 2230 preload and torque,
resilience) into one answer a technician's program can be built from. Friction is a
range [μ min, μ max]: μ min sizes the torque so the bolt reaches at most FM,zul (the
published convention), μ max shows the least preload the same torque gives.

Angle control is different: the preload an angle gives hardly depends on friction, but the
thread torsion it carries does, so the limit that binds is FM,zul at μG max (most torsion,
lowest permissible preload). The angle step is sized to reach exactly that preload from
the highest snug preload (μ min); any other friction ends lower. The angle to yield is
given for both friction corners so a yield program can window it.

Nothing here replaces the joint designer: every plan carries ``CAUTIONS`` and the
warnings that apply to its inputs.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from clampd.daemon.planner._errors import PlannerError
from clampd.daemon.planner._materials import E_STEEL_MPA, PropertyClass, property_class
from clampd.daemon.planner._resilience import (
    BoltResilience,
    ClampedResilience,
    bolt_resilience,
    clamped_resilience,
    rotation_deg,
)
from clampd.daemon.planner._threads import (
    ThreadSpec,
    clearance_hole_mm,
    head_bearing_mm,
    thread_spec,
)
from clampd.daemon.planner._toolfit import ToolFit, tool_fit
from clampd.daemon.planner._vdi2230 import (
    ALPHA_A,
    TighteningMethod,
    permissible_preload_n,
    preload_from_torque_n,
    tightening_torque_nm,
)

__all__ = ["CAUTIONS", "PLANNER_VERSION", "JointInput", "JointPlan", "plan_joint"]

PLANNER_VERSION = "1"

CAUTIONS: tuple[str, ...] = (
    (
        "These values support, and never replace, the joint designer's specification;"
        " where they differ, the specification governs."
    ),
    (
        "Confirm preload, torque and angle by tests on the real joint (the same parts, surfaces,"
        " lubricant and tool) before production use."
    ),
    (
        "Follow local codes and licensed engineering practice: a wrong value can injure people"
        " and damage machines."
    ),
    (
        "Torque-to-yield bolts, and any bolt tightened into yield, are not reusable; replace them"
        " whenever the joint is opened."
    ),
)

# Snug at a quarter of the final torque: high enough to close the faces, low enough to leave
# most of the preload to the angle step (common practice, no source; 10–30 % is usual).
SNUG_FRACTION = 0.25
# When only one friction value is given, the upper end of the range is taken this much
# higher: the width of one friction class in VDI 2230 Part 1 Table A5 is about 0.04–0.06
# (from memory); state the real range when it is known.
DEFAULT_MU_SPREAD = 0.04


@dataclass(frozen=True, slots=True, kw_only=True)
class JointInput:
    """What the planner needs; lengths in mm, moduli in GPa, friction coefficients bare."""

    thread: str
    property_class: str
    grip_mm: float
    mu_thread: float
    mu_head: float
    mu_thread_max: float | None = None
    mu_head_max: float | None = None
    pitch_mm: float | None = None
    hole_mm: float | None = None
    head_mm: float | None = None
    head: str = "hex"
    shank_mm: float = 0.0
    tapped: bool = False
    clamped_e_gpa: float | None = None
    clamped_od_mm: float | None = None
    utilisation: float = 0.9
    method: TighteningMethod = TighteningMethod.TORQUE_ANGLE
    alpha_a: float | None = None
    wrench_max_nm: float | None = None


@dataclass(frozen=True, slots=True, kw_only=True)
class JointPlan:
    """The planner's answer. Forces in N, torques in N·m, angles in degrees, mm/N."""

    inputs: JointInput
    thread: ThreadSpec
    material: PropertyClass
    hole_mm: float
    head_mm: float
    dkm_mm: float
    mu_thread_range: tuple[float, float]
    mu_head_range: tuple[float, float]
    proof_load_n: float
    preload_n: float
    torque_nm: float
    preload_at_torque_n: tuple[float, float]
    alpha_a: float
    preload_min_n: float
    preload_max_n: float
    bolt: BoltResilience
    clamped: ClampedResilience
    snug_torque_nm: float
    snug_preload_n: tuple[float, float]
    angle_target_preload_n: float
    angle_from_snug_deg: float
    yield_preload_n: tuple[float, float]
    yield_torque_nm: tuple[float, float]
    angle_to_yield_deg: float
    angle_to_yield_range_deg: tuple[float, float]
    final_torque_range_nm: tuple[float, float]
    tool: ToolFit | None
    warnings: tuple[str, ...]
    cautions: tuple[str, ...] = field(default=CAUTIONS)

    @property
    def nut_factor(self) -> float:
        """K = MA/(FM·d) at μ min, the short-form figure handbooks quote."""
        return self.torque_nm * 1000.0 / (self.preload_n * self.thread.d_mm)


def _range(lo: float, hi: float | None, name: str) -> tuple[float, float]:
    top = lo + DEFAULT_MU_SPREAD if hi is None else hi
    if top < lo:
        raise PlannerError(name, f"maximum friction {top} is below the minimum {lo}")
    return lo, top


def plan_joint(inp: JointInput) -> JointPlan:
    """Plan one joint; raise ``PlannerError`` naming the input when it cannot exist."""
    thread = thread_spec(inp.thread, inp.pitch_mm)
    mat = property_class(inp.property_class, thread.d_mm)
    hole = clearance_hole_mm(thread.d_mm) if inp.hole_mm is None else inp.hole_mm
    head = head_bearing_mm(thread.d_mm, inp.head) if inp.head_mm is None else inp.head_mm
    for name, v in (("hole_mm", hole), ("head_mm", head), ("grip_mm", inp.grip_mm)):
        if not (math.isfinite(v) and v > 0):
            raise PlannerError(name, f"must be a positive length, got {v}")
    if hole < thread.d_mm:
        raise PlannerError("hole_mm", f"hole {hole:g} mm is smaller than the bolt M{thread.d_mm:g}")
    if head <= hole:
        raise PlannerError("head_mm", f"head bearing {head:g} mm must exceed the hole {hole:g} mm")
    mu_g = _range(inp.mu_thread, inp.mu_thread_max, "mu_thread_max")
    mu_k = _range(inp.mu_head, inp.mu_head_max, "mu_head_max")
    if inp.clamped_e_gpa is not None and not (
        math.isfinite(inp.clamped_e_gpa) and 1.0 <= inp.clamped_e_gpa <= 1000.0
    ):
        # 1..1000 GPa brackets every engineering solid from polymers to carbides; a value
        # outside is a unit slip (MPa given as GPa).
        raise PlannerError("clamped_e_gpa", f"must be in [1, 1000] GPa, got {inp.clamped_e_gpa}")
    e_clamped = E_STEEL_MPA if inp.clamped_e_gpa is None else inp.clamped_e_gpa * 1000.0
    dkm = 0.5 * (head + hole)
    warnings: list[str] = []

    fm_zul = permissible_preload_n(thread, mat.rp02_min_mpa, mu_g[0], inp.utilisation)
    ma = tightening_torque_nm(fm_zul, thread, mu_g[0], mu_k[0], dkm)
    f_at_ma = (
        preload_from_torque_n(ma, thread, mu_g[0], mu_k[0], dkm),
        preload_from_torque_n(ma, thread, mu_g[1], mu_k[1], dkm),
    )
    bolt = bolt_resilience(
        thread,
        inp.grip_mm,
        mat.e_mpa,
        shank_mm=inp.shank_mm,
        head=inp.head,
        tapped=inp.tapped,
        e_nut_mpa=e_clamped if inp.tapped else None,
    )
    clamped = clamped_resilience(
        inp.grip_mm, head, hole, e_clamped, outside_mm=inp.clamped_od_mm, tapped=inp.tapped
    )
    d_s, d_p, p = bolt.total, clamped.total, thread.pitch_mm

    snug = SNUG_FRACTION * ma
    snug_f = (
        preload_from_torque_n(snug, thread, mu_g[1], mu_k[1], dkm),
        preload_from_torque_n(snug, thread, mu_g[0], mu_k[0], dkm),
    )
    fm_zul_angle = permissible_preload_n(thread, mat.rp02_min_mpa, mu_g[1], inp.utilisation)
    angle = rotation_deg(fm_zul_angle - snug_f[1], d_s, d_p, p)
    f_y = (
        permissible_preload_n(thread, mat.rp02_min_mpa, mu_g[1], 1.0),
        permissible_preload_n(thread, mat.rp02_min_mpa, mu_g[0], 1.0),
    )
    t_y = (
        tightening_torque_nm(f_y[1], thread, mu_g[0], mu_k[0], dkm),
        tightening_torque_nm(f_y[0], thread, mu_g[1], mu_k[1], dkm),
    )
    mu_mid = 0.5 * (mu_g[0] + mu_g[1])
    mu_k_mid = 0.5 * (mu_k[0] + mu_k[1])
    f_y_mid = permissible_preload_n(thread, mat.rp02_min_mpa, mu_mid, 1.0)
    snug_mid = preload_from_torque_n(snug, thread, mu_mid, mu_k_mid, dkm)
    angle_y = rotation_deg(f_y_mid - snug_mid, d_s, d_p, p)
    angle_y_range = (
        rotation_deg(f_y[0] - snug_f[1], d_s, d_p, p),
        rotation_deg(f_y[1] - snug_f[0], d_s, d_p, p),
    )
    # Final torque at the end of the angle step for each friction corner (elastic bolt).
    delta_f = fm_zul_angle - snug_f[1]
    t_final = (
        tightening_torque_nm(snug_f[1] + delta_f, thread, mu_g[0], mu_k[0], dkm),
        tightening_torque_nm(snug_f[0] + delta_f, thread, mu_g[1], mu_k[1], dkm),
    )

    method = inp.method
    if inp.alpha_a is not None and method is not TighteningMethod.TORQUE:
        warnings.append(
            f"αA applies to torque control only; for {method.value} the preload range comes"
            " from snug and yield scatter, so the given αA is not used"
        )
    if method is TighteningMethod.TORQUE:
        alpha = ALPHA_A[method] if inp.alpha_a is None else inp.alpha_a
        if not (math.isfinite(alpha) and alpha >= 1.0):
            raise PlannerError("alpha_a", f"tightening factor must be >= 1, got {alpha}")
        f_max, f_min = fm_zul, fm_zul / alpha
        friction_alpha = f_at_ma[0] / f_at_ma[1]
        if alpha < friction_alpha:
            warnings.append(
                f"αA {alpha:.2f} is below the friction range alone ({friction_alpha:.2f});"
                " the minimum preload is overstated"
            )
    elif method is TighteningMethod.TORQUE_ANGLE:
        f_max, f_min = fm_zul_angle, snug_f[0] + delta_f
        alpha = f_max / f_min
    else:
        f_max, f_min = f_y[1], f_y[0]
        alpha = f_max / f_min
        warnings.append(
            "yield tightening: real bolts exceed the minimum Rp0.2, so the preload at yield is"
            " usually higher than shown; the joint must carry it"
        )

    if mat.proof_stress_mpa is None:
        proof_load = thread.stress_area_mm2 * mat.rp02_min_mpa
        warnings.append(
            f"{mat.standard} gives no proof stress for {mat.name}; proof_load_n is the load at"
            " the minimum 0.2 % proof strength"
        )
    else:
        proof_load = thread.stress_area_mm2 * mat.proof_stress_mpa
    if inp.grip_mm < thread.d_mm:
        warnings.append(
            f"grip {inp.grip_mm:g} mm is shorter than the diameter: a stiff joint where a few"
            " degrees change the preload a lot and embedding loses much of it"
        )
    if inp.clamped_od_mm is None and inp.grip_mm > 4.0 * thread.d_mm:
        # Past lK ≈ 4·d the assumed part width (as wide as the cone) drives tan φ up faster
        # than the grip adds length (tests/test_planner_resilience.py shows where).
        warnings.append(
            "long grip with the clamped parts' outside diameter unknown: give it"
            " (--clamped-od-mm) for a better clamped-part resilience"
        )
    if inp.grip_mm > 10.0 * thread.d_mm:
        # Beyond lK ≈ 10·d the cone model of VDI 2230 is outside its usual range (from memory).
        warnings.append("grip longer than 10·d: the deformation-cone model is extrapolated")
    if angle < 15.0 and method is not TighteningMethod.TORQUE:
        # Below ~15° the scatter of snug and of the wrench's own angle error is a large share
        # of the angle step (common practice, no source).
        warnings.append(f"angle from snug is only {angle:.1f}°; snug scatter dominates the preload")
    if inp.tapped and e_clamped < 150_000.0:
        # A tapped hole in a part softer than steel (aluminium, cast iron) strips before the
        # bolt breaks unless the engagement is long enough; VDI 2230 checks it separately.
        warnings.append(
            "tapped hole in a material softer than steel: check the thread engagement length"
            " against stripping"
        )
    if inp.utilisation > 0.9:
        warnings.append(f"utilisation {inp.utilisation:g} leaves little margin below yield")

    tool = None
    if inp.wrench_max_nm is not None:
        # The highest torque the wrench will see: at yield, at the end of the angle step with
        # the highest friction, or the set torque itself.
        if method is TighteningMethod.YIELD:
            target = t_y[1]
        elif method is TighteningMethod.TORQUE_ANGLE:
            target = max(ma, t_final[1])
        else:
            target = ma
        tool = tool_fit(target, inp.wrench_max_nm)
        warnings.extend(tool.warnings)

    return JointPlan(
        inputs=inp,
        thread=thread,
        material=mat,
        hole_mm=hole,
        head_mm=head,
        dkm_mm=dkm,
        mu_thread_range=mu_g,
        mu_head_range=mu_k,
        proof_load_n=proof_load,
        preload_n=fm_zul,
        torque_nm=ma,
        preload_at_torque_n=f_at_ma,
        alpha_a=alpha,
        preload_min_n=f_min,
        preload_max_n=f_max,
        bolt=bolt,
        clamped=clamped,
        snug_torque_nm=snug,
        snug_preload_n=snug_f,
        angle_target_preload_n=fm_zul_angle,
        angle_from_snug_deg=angle,
        yield_preload_n=f_y,
        yield_torque_nm=t_y,
        angle_to_yield_deg=angle_y,
        angle_to_yield_range_deg=angle_y_range,
        final_torque_range_nm=t_final,
        tool=tool,
        warnings=tuple(warnings),
    )
