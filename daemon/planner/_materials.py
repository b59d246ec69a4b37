"""Bolt property classes: minimum strengths from ISO 898-1 and ISO 3506-1.

Values are the standards' minima, in MPa, from memory of ISO 898-1:2013 (Table 3:
Rm min, ReL/Rp0.2 min, proof stress Sp) and ISO 3506-1:2009 (austenitic stainless, which
has no proof stress; its load at Rp0.2 stands in for one and is flagged). Class 8.8
changes at d = 16 mm: that is why a class is looked up together with the diameter.
Class 9.8 is defined only up to M16.
"""

from __future__ import annotations

from dataclasses import dataclass

from clampd.daemon.planner._errors import PlannerError

__all__ = ["PROPERTY_CLASSES", "PropertyClass", "property_class"]

# Young's modulus of steel bolts at room temperature, MPa: the value VDI 2230 Part 1 uses
# in its worked examples (205 000 N/mm², from memory).
E_STEEL_MPA = 205_000.0
# Austenitic stainless (A2/A4), MPa: handbook value for AISI 304/316 (about 193 GPa,
# from memory of common material data sheets).
E_AUSTENITIC_MPA = 193_000.0


@dataclass(frozen=True, slots=True, kw_only=True)
class PropertyClass:
    """Minimum strengths (MPa) of one property class at one diameter."""

    name: str
    rm_min_mpa: float
    rp02_min_mpa: float
    proof_stress_mpa: float | None
    e_mpa: float
    standard: str


# name -> (d_max_mm or None, Rm min, Rp0.2 min, Sp, E, standard); several rows per name
# where the standard changes with size. ISO 898-1:2013 Table 3 / ISO 3506-1:2009 Table 2,
# from memory.
_ROWS: tuple[tuple[str, float | None, float, float, float | None, float, str], ...] = (
    ("8.8", 16.0, 800.0, 640.0, 580.0, E_STEEL_MPA, "ISO 898-1"),
    ("8.8", None, 830.0, 660.0, 600.0, E_STEEL_MPA, "ISO 898-1"),
    ("9.8", 16.0, 900.0, 720.0, 650.0, E_STEEL_MPA, "ISO 898-1"),
    ("10.9", None, 1040.0, 940.0, 830.0, E_STEEL_MPA, "ISO 898-1"),
    ("12.9", None, 1220.0, 1100.0, 970.0, E_STEEL_MPA, "ISO 898-1"),
    ("A2-70", 24.0, 700.0, 450.0, None, E_AUSTENITIC_MPA, "ISO 3506-1"),
    ("A4-70", 24.0, 700.0, 450.0, None, E_AUSTENITIC_MPA, "ISO 3506-1"),
    ("A4-80", 24.0, 800.0, 600.0, None, E_AUSTENITIC_MPA, "ISO 3506-1"),
)

PROPERTY_CLASSES: tuple[str, ...] = tuple(dict.fromkeys(r[0] for r in _ROWS))


def property_class(name: str, d_mm: float) -> PropertyClass:
    """Return the class's minima at diameter ``d_mm``; raise ``PlannerError`` when undefined."""
    key = name.strip().upper()
    rows = [r for r in _ROWS if r[0].upper() == key]
    if not rows:
        raise PlannerError(
            "property_class", f"unknown class {name!r} (known: {', '.join(PROPERTY_CLASSES)})"
        )
    for cname, d_max, rm, rp, sp, e, std in rows:
        if d_max is None or d_mm <= d_max:
            return PropertyClass(
                name=cname,
                rm_min_mpa=rm,
                rp02_min_mpa=rp,
                proof_stress_mpa=sp,
                e_mpa=e,
                standard=std,
            )
    raise PlannerError(
        "property_class", f"class {name} is not defined above M{rows[-1][1]:g} in {rows[-1][6]}"
    )
