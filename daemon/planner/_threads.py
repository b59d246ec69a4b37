"""ISO metric threads and the standard hardware around them.

Geometry follows the ISO basic profile (ISO 68-1 / ISO 724): pitch diameter
d2 = d − 0.649519·P, minor diameter of the external thread d3 = d − 1.226869·P, and the
tensile stress area As = π/4·((d2 + d3)/2)² (ISO 898-1). The stress diameter
ds = (d2 + d3)/2 is also the d0 that VDI 2230 Part 1 uses for the equivalent stress of a
bolt without a reduced shank, so both are computed here, not stored, and the tests check
them against the rounded areas that ISO 898-1 prints.

Pitches (ISO 261 coarse and the common fine series), medium clearance holes (ISO 273)
and head bearing diameters are tabulated; they are from memory of those standards and
each table says so. A caller with real hardware passes its own dimensions instead.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

from clampd.daemon.planner._errors import PlannerError

__all__ = [
    "COARSE_PITCH_MM",
    "ThreadSpec",
    "clearance_hole_mm",
    "head_bearing_mm",
    "parse_thread",
    "thread_spec",
]

# ISO 261 coarse pitch series, mm (from memory of ISO 261 / ISO 724).
COARSE_PITCH_MM: dict[float, float] = {
    3: 0.5, 4: 0.7, 5: 0.8, 6: 1.0, 8: 1.25, 10: 1.5, 12: 1.75, 14: 2.0, 16: 2.0,
    18: 2.5, 20: 2.5, 22: 2.5, 24: 3.0, 27: 3.0, 30: 3.5, 33: 3.5, 36: 4.0,
}  # fmt: skip

# Fine pitches in common use per size (ISO 261 preferred fine series, from memory).
FINE_PITCHES_MM: dict[float, tuple[float, ...]] = {
    8: (1.0,), 10: (1.25, 1.0), 12: (1.5, 1.25), 14: (1.5,), 16: (1.5,), 18: (2.0, 1.5),
    20: (2.0, 1.5), 22: (2.0, 1.5), 24: (2.0,), 27: (2.0,), 30: (2.0,), 33: (2.0,),
    36: (3.0,),
}  # fmt: skip

# ISO 273 clearance holes, medium series, mm (from memory of ISO 273).
_HOLE_MEDIUM_MM: dict[float, float] = {
    3: 3.4, 4: 4.5, 5: 5.5, 6: 6.6, 8: 9.0, 10: 11.0, 12: 13.5, 14: 15.5, 16: 17.5,
    18: 20.0, 20: 22.0, 22: 24.0, 24: 26.0, 27: 30.0, 30: 33.0, 33: 36.0, 36: 39.0,
}  # fmt: skip

# Minimum bearing face diameter dw,min of hexagon head bolts and screws, ISO 4014/4017,
# product grade A up to M24 and grade B above (from memory of those standards). With the
# ISO 273 medium holes above these reproduce the tightening torques of VDI 2230 Part 1's
# tables (checked in tests/test_planner_vdi2230.py).
_HEX_DW_MIN_MM: dict[float, float] = {
    3: 4.57, 4: 5.88, 5: 6.88, 6: 8.88, 8: 11.63, 10: 14.63, 12: 16.63, 14: 19.64,
    16: 22.49, 18: 25.34, 20: 28.19, 22: 31.71, 24: 33.61, 27: 38.0, 30: 42.75,
    33: 46.55, 36: 51.11,
}  # fmt: skip

# Head diameter dk,max of socket head cap screws, ISO 4762 (from memory). The real bearing
# face is a little smaller (under-head chamfer); pass --head-mm when it matters.
_SOCKET_DK_MM: dict[float, float] = {
    3: 5.5, 4: 7.0, 5: 8.5, 6: 10.0, 8: 13.0, 10: 16.0, 12: 18.0, 14: 21.0, 16: 24.0,
    18: 27.0, 20: 30.0, 22: 33.0, 24: 36.0, 27: 40.0, 30: 45.0, 33: 50.0, 36: 54.0,
}  # fmt: skip

_THREAD_RE = re.compile(r"^\s*M\s*(\d+(?:\.\d+)?)\s*(?:[xX×]\s*(\d+(?:\.\d+)?))?\s*$")


@dataclass(frozen=True, slots=True, kw_only=True)
class ThreadSpec:
    """One ISO metric thread; all lengths in mm, areas in mm²."""

    d_mm: float
    pitch_mm: float
    coarse: bool

    def __post_init__(self) -> None:
        if not (math.isfinite(self.d_mm) and self.d_mm > 0):
            raise PlannerError("thread", f"nominal diameter must be positive, got {self.d_mm}")
        if not (math.isfinite(self.pitch_mm) and 0 < self.pitch_mm < self.d_mm / 4):
            raise PlannerError(
                "pitch_mm", f"pitch {self.pitch_mm} mm is not a metric pitch for M{self.d_mm:g}"
            )

    @property
    def name(self) -> str:
        """The designation people write: M10, or M10x1.25 for a fine thread."""
        base = f"M{self.d_mm:g}"
        return base if self.coarse else f"{base}x{self.pitch_mm:g}"

    @property
    def d2_mm(self) -> float:
        """Pitch diameter (ISO 724)."""
        return self.d_mm - 0.649519 * self.pitch_mm

    @property
    def d3_mm(self) -> float:
        """Minor diameter of the external thread (ISO 724)."""
        return self.d_mm - 1.226869 * self.pitch_mm

    @property
    def ds_mm(self) -> float:
        """Stress diameter (d2 + d3)/2, the d0 of VDI 2230 for a full-shank bolt."""
        return 0.5 * (self.d2_mm + self.d3_mm)

    @property
    def stress_area_mm2(self) -> float:
        """Tensile stress area As (ISO 898-1)."""
        return math.pi / 4.0 * self.ds_mm**2

    @property
    def nominal_area_mm2(self) -> float:
        """Nominal cross-section AN = π d²/4 (VDI 2230 head and nut segments)."""
        return math.pi / 4.0 * self.d_mm**2

    @property
    def minor_area_mm2(self) -> float:
        """Minor-diameter cross-section Ad3 (VDI 2230 thread segments)."""
        return math.pi / 4.0 * self.d3_mm**2


def parse_thread(text: str) -> tuple[float, float | None]:
    """Read "M10" or "M10x1.25" into (d_mm, pitch_mm or None); raise ``PlannerError``."""
    m = _THREAD_RE.match(text)
    if m is None:
        raise PlannerError("thread", f"{text!r} is not an ISO metric thread like M10 or M10x1.25")
    return float(m.group(1)), (float(m.group(2)) if m.group(2) else None)


def thread_spec(text: str, pitch_mm: float | None = None) -> ThreadSpec:
    """Look up a thread; a pitch (in the text or given) must be coarse or a listed fine one.

    Unknown sizes and pitches are refused rather than computed, because a typo such as
    M10x1.75 would otherwise give a plausible but wrong torque.
    """
    d, text_pitch = parse_thread(text)
    if text_pitch is not None and pitch_mm is not None and text_pitch != pitch_mm:
        raise PlannerError("pitch_mm", f"{text} already names pitch {text_pitch:g} mm")
    pitch = pitch_mm if pitch_mm is not None else text_pitch
    if d not in COARSE_PITCH_MM:
        sizes = ", ".join(f"M{k:g}" for k in COARSE_PITCH_MM)
        raise PlannerError("thread", f"unknown thread size M{d:g} (known: {sizes})")
    coarse = COARSE_PITCH_MM[d]
    if pitch is None or pitch == coarse:
        return ThreadSpec(d_mm=d, pitch_mm=coarse, coarse=True)
    fine = FINE_PITCHES_MM.get(d, ())
    if pitch not in fine:
        allowed = ", ".join(f"{p:g}" for p in (coarse, *fine))
        raise PlannerError("pitch_mm", f"pitch {pitch:g} mm is not listed for M{d:g} ({allowed})")
    return ThreadSpec(d_mm=d, pitch_mm=pitch, coarse=False)


def clearance_hole_mm(d_mm: float) -> float:
    """Medium-series clearance hole for a nominal diameter (ISO 273)."""
    try:
        return _HOLE_MEDIUM_MM[d_mm]
    except KeyError:
        raise PlannerError("hole_mm", f"no ISO 273 hole listed for M{d_mm:g}; give one") from None


def head_bearing_mm(d_mm: float, head: str = "hex") -> float:
    """Outside diameter of the head bearing face for a standard head style."""
    table = {"hex": _HEX_DW_MIN_MM, "socket": _SOCKET_DK_MM}.get(head)
    if table is None:
        raise PlannerError("head", f"unknown head style {head!r} (hex or socket)")
    try:
        return table[d_mm]
    except KeyError:
        raise PlannerError("head_mm", f"no {head} head listed for M{d_mm:g}; give one") from None
