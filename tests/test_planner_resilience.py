"""Bolt and clamped-part resilience and the nut rotation they imply.

Checks against a textbook worked example (Budynas & Nisbett, Shigley's Mechanical
Engineering Design, chapter 8 solutions: an M12 cap screw through 20 mm of steel into cast
iron, members by conical frusta at 30°), against the integral that defines a frustum's
resilience (scipy.integrate.quad), and against a hand calculation of VDI 2230's bolt
segments.
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy.integrate import quad

from clampd.daemon.planner import (
    PlannerError,
    bolt_resilience,
    clamped_resilience,
    cone_tan_phi,
    frustum_resilience,
    rotation_deg,
    thread_spec,
)

TAN30 = math.tan(math.radians(30.0))


def test_textbook_frusta_member_stiffness_and_angle() -> None:
    # Shigley's MED (Budynas & Nisbett), ch. 8 solutions, metric cap-screw problem: d = 12 mm,
    # washer face D = 1.5 d = 18 mm, 30° frusta. Published: upper frustum t = 20 mm, steel
    # E = 207 GPa -> k1 = 4470 MN/m; central t = 2.5 mm, D = 41.09 mm, cast iron E = 100 GPa
    # -> k2 = 52 230 MN/m; lower t = 22.5 mm, cast iron -> k3 = 2074 MN/m; in series
    # km = 1379 MN/m. Bolt kb = 466.8 MN/m, joint constant C = 0.253.
    k1 = 1 / frustum_resilience(20.0, 18.0, 12.0, 207_000.0, TAN30) / 1000
    k2 = 1 / frustum_resilience(2.5, 41.09, 12.0, 100_000.0, TAN30) / 1000
    k3 = 1 / frustum_resilience(22.5, 18.0, 12.0, 100_000.0, TAN30) / 1000
    assert k1 == pytest.approx(4470, rel=0.001)
    assert k2 == pytest.approx(52_230, rel=0.001)  # D printed to 0.01 mm
    assert k3 == pytest.approx(2074, rel=0.001)
    km = 1 / (1 / k1 + 1 / k2 + 1 / k3)
    assert km == pytest.approx(1379, rel=0.001)
    kb = 466.8
    assert kb / (kb + km) == pytest.approx(0.253, abs=0.0005)
    # The resulting angle (our derivation from the published stiffnesses): to reach the
    # example's preload Fi = 0.75·At·Sp = 37.9 kN with P = 1.75 mm, the nut turns
    # 360°·(1/kb + 1/km)·Fi/P = 360·(2.1422e-6 + 0.7252e-6 mm/N)·37 900 N / 1.75 mm = 22.36°.
    angle = rotation_deg(37_900.0, 1 / (kb * 1000), 1 / (km * 1000), 1.75)
    assert angle == pytest.approx(22.36, abs=0.02)


def _cone_integral(
    lk: float, *, dw: float, dh: float, e: float, tan_phi: float, da: float, w: float
) -> float:
    # δ = ∫ dx / (E·A(x)) over the grip, A(x) the annulus of the cone (capped at the part's
    # outside diameter, a sleeve beyond): one cone over lK (w = 2) or two mirrored (w = 1).
    def inv_stiffness(x: float) -> float:
        dia = min(dw + 2.0 * x * tan_phi, da)
        return 1.0 / (e * math.pi / 4.0 * (dia * dia - dh * dh))

    span = lk if w == 2.0 else lk / 2.0
    kink = (da - dw) / (2.0 * tan_phi)  # where the cone meets the part's outside diameter
    points = [kink] if 0.0 < kink < span else None
    part = float(quad(inv_stiffness, 0.0, span, points=points, limit=200)[0])
    return part if w == 2.0 else 2.0 * part


@pytest.mark.parametrize("tapped", [False, True])
@pytest.mark.parametrize("outside_mm", [None, 40.0, 24.0, 14.0])
def test_clamped_resilience_equals_the_cone_integral(
    tapped: bool, outside_mm: float | None
) -> None:
    # Reference: numerical integration with scipy.integrate.quad of the defining integral.
    lk, dw, dh, e = 30.0, 16.0, 11.0, 205_000.0
    got = clamped_resilience(lk, dw, dh, e, outside_mm=outside_mm, tapped=tapped)
    da = got.outside_diameter_mm
    ref = _cone_integral(
        lk, dw=dw, dh=dh, e=e, tan_phi=got.tan_phi, da=da, w=2.0 if tapped else 1.0
    )
    assert got.total == pytest.approx(ref, rel=1e-7)
    expected_model = {None: "cone", 40.0: "cone", 24.0: "cone+sleeve", 14.0: "sleeve"}
    if tapped and outside_mm == 40.0:
        expected_model[40.0] = "cone+sleeve"  # the single cone of a tapped hole spreads wider
    assert got.model == expected_model[outside_mm]


def test_vdi_cone_is_the_frustum_form_with_30_degrees() -> None:
    # Shigley's eq. for one frustum, k = 0.5774·π·E·d / ln[(1.155t + D − d)(D + d) /
    # ((1.155t + D + d)(D − d))] (from memory), is VDI's cone with tan φ = tan 30°.
    t, big_d, d, e = 15.0, 17.0, 10.5, 205_000.0
    k = (0.5774 * math.pi * e * d) / math.log(
        (1.155 * t + big_d - d) * (big_d + d) / ((1.155 * t + big_d + d) * (big_d - d))
    )
    assert 1 / frustum_resilience(t, big_d, d, e, TAN30) == pytest.approx(k, rel=2e-4)


def test_cone_angle_fit_and_default_part_width() -> None:
    # VDI 2230 Part 1 (2003), tan φ_D = 0.362 + 0.032 ln(βL/2) + 0.153 ln y (from memory):
    # at βL = 2 and y = 1 the through-bolt cone is 0.362 (about 19.9°).
    assert cone_tan_phi(20.0, 10.0, 10.0, tapped=False) == pytest.approx(0.362)
    assert cone_tan_phi(10.0, 10.0, 10.0, tapped=True) == pytest.approx(0.348)
    # With no outside diameter the part is as wide as its own cone: DA = dW + w·lK·tan φ(DA).
    got = clamped_resilience(30.0, 14.63, 11.0, 205_000.0)
    assert got.outside_diameter_mm == pytest.approx(14.63 + 30.0 * got.tan_phi, rel=1e-9)
    assert got.cone_limit_diameter_mm == pytest.approx(got.outside_diameter_mm, rel=1e-9)


def test_bolt_segments_hand_calculation() -> None:
    # VDI 2230 Part 1, 5.1.1, by hand for M10 (d3 = 10 − 1.226869·1.5 = 8.1597 mm,
    # AN 78.5398 mm², Ad3 52.2925 mm²), hexagon head, nut, grip 30 mm fully threaded,
    # E 205 000 MPa:
    #   head 0.5·10/AN = 0.063662, free thread 30/Ad3 = 0.573696,
    #   engaged 0.5·10/Ad3 = 0.095616, nut 0.4·10/AN = 0.050930 (1/mm)
    #   δS = 0.783904 / 205 000 = 3.82392e-6 mm/N.
    b = bolt_resilience(thread_spec("M10"), 30.0, 205_000.0)
    assert b.total == pytest.approx(3.82392e-6, rel=2e-5)
    assert b.head == pytest.approx(0.063662 / 205_000, rel=2e-5)
    # 10 mm of plain shank instead of thread: 10/AN replaces 10/Ad3.
    s = bolt_resilience(thread_spec("M10"), 30.0, 205_000.0, shank_mm=10.0)
    assert s.total == pytest.approx((0.783904 - 10 / 52.2925 + 10 / 78.5398) / 205_000, rel=2e-5)
    # Socket head 0.4·d, tapped hole 0.33·d (same source).
    st_ = bolt_resilience(thread_spec("M10"), 30.0, 205_000.0, head="socket", tapped=True)
    assert st_.head == pytest.approx(4.0 / 78.5398 / 205_000, rel=2e-5)
    assert st_.nut == pytest.approx(3.3 / 78.5398 / 205_000, rel=2e-5)


@given(grip=st.floats(5.0, 40.0), extra=st.floats(0.1, 8.0))
def test_longer_grip_is_more_resilient(grip: float, extra: float) -> None:
    # Up to lK = 4·d. Beyond it, with the part's width left to the cone (DA = DA,Gr), the cone
    # fit's growth of tan φ with ln(DA/dW) outweighs the added length and δP flattens (the
    # planner warns there and asks for the real outside diameter).
    t = thread_spec("M12")
    assert bolt_resilience(t, grip + extra, 205e3).total > bolt_resilience(t, grip, 205e3).total
    assert (
        clamped_resilience(grip + extra, 16.63, 13.5, 205e3).total
        > clamped_resilience(grip, 16.63, 13.5, 205e3).total
    )


def test_impossible_geometry_is_refused() -> None:
    t = thread_spec("M10")
    with pytest.raises(PlannerError, match="shorter than the plain shank") as exc:
        bolt_resilience(t, 20.0, 205e3, shank_mm=25.0)
    assert exc.value.field == "grip_mm"
    with pytest.raises(PlannerError) as exc:
        bolt_resilience(t, -5.0, 205e3)
    assert exc.value.field == "grip_mm"
    with pytest.raises(PlannerError) as exc:
        clamped_resilience(30.0, 10.0, 11.0, 205e3)
    assert exc.value.field == "head_mm"
    with pytest.raises(PlannerError) as exc:
        clamped_resilience(30.0, 14.0, 11.0, 205e3, outside_mm=10.0)
    assert exc.value.field == "outside_mm"
    with pytest.raises(PlannerError, match="head style"):
        bolt_resilience(t, 30.0, 205e3, head="pan")
