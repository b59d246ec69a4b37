"""Elastic resilience of bolt and clamped parts, and the nut rotation it implies.

Theory of operation (VDI 2230 Part 1, section 5.1). The bolt is a chain of springs in
series, each δi = li/(E·Ai): the head (lSK = 0.5·d for a hexagon head, 0.4·d for a socket
head, on the nominal area), an unthreaded shank, the free loaded thread inside the grip
(on the minor area Ad3), the engaged thread (lG = 0.5·d on Ad3) and the nut or tapped hole
(lM = 0.4·d for a nut, 0.33·d for a tapped hole, on the nominal area with the nut's
modulus).

The clamped parts carry the preload through a cone that spreads from the bearing face at
a half-angle φ (tan φ from VDI 2230's empirical fit in the grip ratio βL = lK/dW and the
width ratio y = DA/dW), becoming a sleeve where the cone would be wider than the part.
A through-bolt joint with a nut has two cones meeting in the middle (w = 1); a bolt in a
tapped hole has one cone over the whole grip (w = 2). When the part's outside diameter is
unknown it is taken as just wide enough for the full cone (DA = DA,Gr, found by fixed
point), which is the stiffest, most common assumption for plates.

While the joint stays elastic, one turn of the nut advances it by one pitch and the
preload grows by P/(δS + δP), so the nut rotation between two preloads is
θ = 360°·(δS + δP)·ΔF/P. That is the angle a torque-angle program counts from snug.

Units: mm, N, MPa; resiliences in mm/N.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from clampd.daemon.planner._errors import PlannerError
from clampd.daemon.planner._threads import ThreadSpec

__all__ = [
    "BoltResilience",
    "ClampedResilience",
    "bolt_resilience",
    "clamped_resilience",
    "cone_tan_phi",
    "frustum_resilience",
    "rotation_deg",
]

# Head, engaged-thread and nut substitution lengths as fractions of d: VDI 2230 Part 1,
# section 5.1.1 (from memory).
_L_HEAD = {"hex": 0.5, "socket": 0.4}
_L_ENGAGED = 0.5
_L_NUT = 0.4
_L_TAPPED = 0.33


@dataclass(frozen=True, slots=True, kw_only=True)
class BoltResilience:
    """Resilience of each bolt segment, mm/N, and their sum."""

    head: float
    shank: float
    free_thread: float
    engaged_thread: float
    nut: float

    @property
    def total(self) -> float:
        """δS: the segments act in series."""
        return self.head + self.shank + self.free_thread + self.engaged_thread + self.nut


@dataclass(frozen=True, slots=True, kw_only=True)
class ClampedResilience:
    """δP of the clamped parts (mm/N) and the cone that gave it."""

    total: float
    tan_phi: float
    cone_limit_diameter_mm: float
    outside_diameter_mm: float
    model: str  # "cone", "cone+sleeve" or "sleeve"


def _positive(name: str, value: float) -> None:
    if not (math.isfinite(value) and value > 0):
        raise PlannerError(name, f"must be a positive number, got {value}")


def bolt_resilience(
    thread: ThreadSpec,
    grip_mm: float,
    e_bolt_mpa: float,
    *,
    shank_mm: float = 0.0,
    head: str = "hex",
    tapped: bool = False,
    e_nut_mpa: float | None = None,
) -> BoltResilience:
    """δS of a bolt whose grip ``grip_mm`` holds ``shank_mm`` of plain shank, rest thread.

    A shank longer than the grip cannot exist in the joint and is refused.
    """
    _positive("grip_mm", grip_mm)
    _positive("e_bolt_mpa", e_bolt_mpa)
    if not (math.isfinite(shank_mm) and shank_mm >= 0):
        raise PlannerError("shank_mm", f"must be zero or positive, got {shank_mm}")
    if shank_mm > grip_mm:
        raise PlannerError(
            "grip_mm", f"grip {grip_mm:g} mm is shorter than the plain shank {shank_mm:g} mm"
        )
    if head not in _L_HEAD:
        raise PlannerError("head", f"unknown head style {head!r} (hex or socket)")
    e_nut = e_bolt_mpa if e_nut_mpa is None else e_nut_mpa
    _positive("e_nut_mpa", e_nut)
    d, an, ad3 = thread.d_mm, thread.nominal_area_mm2, thread.minor_area_mm2
    l_nut = (_L_TAPPED if tapped else _L_NUT) * d
    return BoltResilience(
        head=_L_HEAD[head] * d / (e_bolt_mpa * an),
        shank=shank_mm / (e_bolt_mpa * an),
        free_thread=(grip_mm - shank_mm) / (e_bolt_mpa * ad3),
        engaged_thread=_L_ENGAGED * d / (e_bolt_mpa * ad3),
        nut=l_nut / (e_nut * an),
    )


def cone_tan_phi(grip_mm: float, bearing_mm: float, outside_mm: float, *, tapped: bool) -> float:
    """tan φ of the deformation cone: VDI 2230 Part 1 (2003), eq. for DSV and ESV, from memory."""
    beta_l = grip_mm / bearing_mm
    y = outside_mm / bearing_mm
    if tapped:
        return 0.348 + 0.013 * math.log(beta_l) + 0.193 * math.log(y)
    return 0.362 + 0.032 * math.log(beta_l / 2.0) + 0.153 * math.log(y)


def frustum_resilience(
    height_mm: float, bearing_mm: float, hole_mm: float, e_mpa: float, tan_phi: float
) -> float:
    """δ of one hollow cone frustum (mm/N) that widens from ``bearing_mm`` over ``height_mm``.

    The closed form of ∫ dx / (E·π/4·((dW + 2x·tanφ)² − dh²)); VDI 2230's cone resilience
    is two of these (through-bolt) or one over the whole grip (tapped hole).
    """
    for name, v in (
        ("grip_mm", height_mm),
        ("head_mm", bearing_mm),
        ("hole_mm", hole_mm),
        ("clamped_e_mpa", e_mpa),
        ("tan_phi", tan_phi),
    ):
        _positive(name, v)
    if bearing_mm <= hole_mm:
        raise PlannerError(
            "head_mm", f"bearing diameter {bearing_mm:g} mm must exceed the hole {hole_mm:g} mm"
        )
    dw, dh, wide = bearing_mm, hole_mm, bearing_mm + 2.0 * height_mm * tan_phi
    return math.log((dw + dh) * (wide - dh) / ((dw - dh) * (wide + dh))) / (
        e_mpa * math.pi * dh * tan_phi
    )


def clamped_resilience(
    grip_mm: float,
    bearing_mm: float,
    hole_mm: float,
    e_clamped_mpa: float,
    *,
    outside_mm: float | None = None,
    tapped: bool = False,
) -> ClampedResilience:
    """δP of clamped parts of one material; ``outside_mm`` None means "wide enough for the cone"."""
    _positive("grip_mm", grip_mm)
    _positive("head_mm", bearing_mm)
    _positive("hole_mm", hole_mm)
    _positive("clamped_e_mpa", e_clamped_mpa)
    if bearing_mm <= hole_mm:
        raise PlannerError(
            "head_mm", f"bearing diameter {bearing_mm:g} mm must exceed the hole {hole_mm:g} mm"
        )
    w = 2.0 if tapped else 1.0
    if outside_mm is None:
        # Fixed point DA = dW + w·lK·tanφ(DA): tan φ grows only with ln(DA), so this
        # contracts fast; 50 rounds is far more than the ~10 it needs.
        da = bearing_mm * 3.0
        for _ in range(50):
            da_new = bearing_mm + w * grip_mm * cone_tan_phi(grip_mm, bearing_mm, da, tapped=tapped)
            if abs(da_new - da) < 1e-9:
                break
            da = da_new
        outside = da_new
    else:
        _positive("outside_mm", outside_mm)
        if outside_mm <= hole_mm:
            raise PlannerError(
                "outside_mm", f"part diameter {outside_mm:g} mm must exceed the hole {hole_mm:g}"
            )
        outside = outside_mm
    dw, dh, lk = bearing_mm, hole_mm, grip_mm
    tan_phi = cone_tan_phi(lk, dw, max(outside, dw), tapped=tapped)
    d_limit = dw + w * lk * tan_phi
    if outside >= d_limit - 1e-9:
        # Two frusta of half the grip meeting mid-joint (nut), or one over the grip (tapped).
        if tapped:
            delta = frustum_resilience(lk, dw, dh, e_clamped_mpa, tan_phi)
        else:
            delta = 2.0 * frustum_resilience(lk / 2.0, dw, dh, e_clamped_mpa, tan_phi)
        model = "cone"
    elif outside > dw:
        cone = (
            2.0
            / (w * dh * tan_phi)
            * math.log((dw + dh) * (outside - dh) / ((dw - dh) * (outside + dh)))
        )
        sleeve = 4.0 / (outside**2 - dh**2) * (lk - (outside - dw) / (w * tan_phi))
        delta = (cone + sleeve) / (e_clamped_mpa * math.pi)
        model = "cone+sleeve"
    else:
        delta = 4.0 * lk / (e_clamped_mpa * math.pi * (outside**2 - dh**2))
        model = "sleeve"
    return ClampedResilience(
        total=delta,
        tan_phi=tan_phi,
        cone_limit_diameter_mm=d_limit,
        outside_diameter_mm=outside,
        model=model,
    )


def rotation_deg(
    delta_f_n: float, bolt_mm_per_n: float, clamped_mm_per_n: float, pitch_mm: float
) -> float:
    """Nut rotation in degrees that changes the preload by ``delta_f_n`` in the elastic range."""
    return 360.0 * (bolt_mm_per_n + clamped_mm_per_n) * delta_f_n / pitch_mm
