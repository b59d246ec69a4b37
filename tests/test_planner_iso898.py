"""Thread geometry and property classes against ISO 724, ISO 898-1 and ISO 3506-1.

Reference values are the printed (rounded) figures of the standards, from memory:
- ISO 898-1:2013, tables of stress areas and of minimum proof loads for coarse and fine
  threads (proof load = As,nom · Sp, rounded to three significant figures there).
- ISO 724 basic pitch diameters and the minor diameter d3 of the external thread (ISO 965-1),
  printed to three decimals.
Tolerances follow the rounding of the printed tables.
"""

from __future__ import annotations

import pytest

from clampd.daemon.planner import PlannerError, property_class, thread_spec

# ISO 898-1:2013, stress area As,nom in mm² (coarse and fine pitch tables; from memory).
STRESS_AREA_MM2 = {
    "M6": 20.1, "M8": 36.6, "M10": 58.0, "M12": 84.3, "M14": 115.0, "M16": 157.0,
    "M18": 192.0, "M20": 245.0, "M24": 353.0, "M30": 561.0,
    "M8x1": 39.2, "M10x1.25": 61.2, "M12x1.25": 92.1, "M12x1.5": 88.1, "M16x1.5": 167.0,
    "M20x1.5": 272.0,
}  # fmt: skip

# ISO 898-1:2013, minimum proof loads in N, coarse thread (from memory).
PROOF_LOAD_N = {
    ("M6", "8.8"): 11_600, ("M6", "10.9"): 16_700, ("M6", "12.9"): 19_500,
    ("M8", "8.8"): 21_200, ("M8", "10.9"): 30_400, ("M8", "12.9"): 35_500,
    ("M10", "8.8"): 33_700, ("M10", "10.9"): 48_100, ("M10", "12.9"): 56_300,
    ("M12", "8.8"): 48_900, ("M12", "10.9"): 70_000, ("M12", "12.9"): 81_800,
    ("M14", "8.8"): 66_700, ("M14", "10.9"): 95_500, ("M14", "12.9"): 112_000,
    ("M16", "8.8"): 91_000, ("M16", "10.9"): 130_000, ("M16", "12.9"): 152_000,
    ("M18", "8.8"): 115_000, ("M18", "10.9"): 159_000, ("M18", "12.9"): 186_000,
    ("M20", "8.8"): 147_000, ("M20", "10.9"): 203_000, ("M20", "12.9"): 238_000,
    ("M10", "9.8"): 37_700, ("M16", "9.8"): 102_000,
}  # fmt: skip

# ISO 724 d2 and ISO 965-1 d3 in mm, printed to three decimals (from memory).
DIAMETERS_MM = {
    "M6": (5.350, 4.773), "M8": (7.188, 6.466), "M10": (9.026, 8.160),
    "M12": (10.863, 9.853), "M16": (14.701, 13.546), "M20": (18.376, 16.933),
}  # fmt: skip


@pytest.mark.parametrize(("name", "area"), sorted(STRESS_AREA_MM2.items()))
def test_stress_area_matches_iso_898_1(name: str, area: float) -> None:
    # The standard rounds As to three significant figures: half a unit in the last place.
    assert thread_spec(name).stress_area_mm2 == pytest.approx(area, rel=0.004)


@pytest.mark.parametrize(("key", "load"), sorted(PROOF_LOAD_N.items()))
def test_proof_load_matches_iso_898_1(key: tuple[str, str], load: int) -> None:
    name, cls = key
    t = thread_spec(name)
    sp = property_class(cls, t.d_mm).proof_stress_mpa
    assert sp is not None
    # Printed loads use the rounded As and are cut to three significant figures (M6 8.8:
    # 20.1 · 580 = 11 658 is printed 11 600), so allow 1 %.
    assert t.stress_area_mm2 * sp == pytest.approx(load, rel=0.01)


@pytest.mark.parametrize(("name", "d2_d3"), sorted(DIAMETERS_MM.items()))
def test_pitch_and_minor_diameters(name: str, d2_d3: tuple[float, float]) -> None:
    t = thread_spec(name)
    assert t.d2_mm == pytest.approx(d2_d3[0], abs=0.0006)
    assert t.d3_mm == pytest.approx(d2_d3[1], abs=0.0006)


def test_class_8_8_changes_above_m16() -> None:
    # ISO 898-1:2013 Table 3 (from memory): 8.8 is Rp0.2 640 / Rm 800 / Sp 580 MPa up to
    # d = 16 mm and 660 / 830 / 600 MPa above.
    small, large = property_class("8.8", 16.0), property_class("8.8", 20.0)
    assert (small.rp02_min_mpa, small.rm_min_mpa, small.proof_stress_mpa) == (640, 800, 580)
    assert (large.rp02_min_mpa, large.rm_min_mpa, large.proof_stress_mpa) == (660, 830, 600)


def test_higher_classes_and_stainless() -> None:
    # ISO 898-1:2013 Table 3 and ISO 3506-1:2009 (from memory).
    assert property_class("10.9", 12).rp02_min_mpa == 940
    assert property_class("10.9", 12).rm_min_mpa == 1040
    assert property_class("12.9", 12).rp02_min_mpa == 1100
    assert property_class("12.9", 12).rm_min_mpa == 1220
    a2 = property_class("A2-70", 10)
    a4 = property_class("a4-80", 10)
    assert (a2.rp02_min_mpa, a2.rm_min_mpa, a2.proof_stress_mpa) == (450, 700, None)
    assert (a4.rp02_min_mpa, a4.rm_min_mpa) == (600, 800)


def test_undefined_classes_and_threads_are_refused() -> None:
    with pytest.raises(PlannerError) as exc:
        property_class("9.8", 20)  # ISO 898-1 defines 9.8 only up to M16
    assert exc.value.field == "property_class"
    with pytest.raises(PlannerError, match="unknown class"):
        property_class("11.9", 10)
    with pytest.raises(PlannerError, match="unknown thread size"):
        thread_spec("M11")
    with pytest.raises(PlannerError) as exc:
        thread_spec("M10x1.75")
    assert exc.value.field == "pitch_mm"
    with pytest.raises(PlannerError, match="not an ISO metric thread"):
        thread_spec("3/8-16 UNC")
    with pytest.raises(PlannerError, match="already names pitch"):
        thread_spec("M10x1.25", 1.0)


def test_fine_pitch_by_argument_equals_designation() -> None:
    by_text, by_arg = thread_spec("M12x1.5"), thread_spec("M12", 1.5)
    assert by_text == by_arg
    assert not by_text.coarse
    assert by_text.name == "M12x1.5"
    assert thread_spec("M12", 1.75).coarse
