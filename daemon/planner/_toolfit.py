"""Does a wrench suit a target torque? Torque units both ways.

ISO 6789 calibrates a hand torque tool over 20 % to 100 % of its maximum, so a target
below 20 % lies outside the span whose accuracy is certified. Keeping the target at or
below about 80 % of capacity leaves headroom for overshoot and for the torque at which
the yield or angle step ends (common practice, no source). When the target is too small
for the tool, a tool in in·lbf is usually what the shop floor has for it; the suggestion
says so.
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass

from clampd.daemon.planner._errors import PlannerError
from clampd.protocol import NM_PER_FT_LBF, NM_PER_IN_LBF

__all__ = ["ToolFit", "TorqueUnit", "from_nm", "to_nm", "tool_fit"]

# ISO 6789-1: the calibrated span of a hand torque tool is 20 % to 100 % of its maximum.
ISO6789_LOW_FRACTION = 0.2
# Common practice, no source: keep a target at or below about 80 % of the tool's capacity.
CAPACITY_FRACTION = 0.8
# Below about 20 ft·lbf targets are usually set on in·lbf tools in shops that use
# imperial units (common practice, no source).
IN_LBF_BELOW_NM = 20.0 * NM_PER_FT_LBF


class TorqueUnit(enum.Enum):
    """Torque units people set wrenches in."""

    NM = "N*m"
    FT_LBF = "ft*lbf"
    IN_LBF = "in*lbf"


_NM_PER: dict[TorqueUnit, float] = {
    TorqueUnit.NM: 1.0,
    TorqueUnit.FT_LBF: NM_PER_FT_LBF,
    TorqueUnit.IN_LBF: NM_PER_IN_LBF,
}


def to_nm(value: float, unit: TorqueUnit) -> float:
    """Convert a torque in ``unit`` to N·m (exact definitions of foot and pound-force)."""
    return value * _NM_PER[unit]


def from_nm(nm: float, unit: TorqueUnit) -> float:
    """Convert a torque in N·m to ``unit``."""
    return nm / _NM_PER[unit]


@dataclass(frozen=True, slots=True, kw_only=True)
class ToolFit:
    """The verdict for one target on one wrench, with a suggestion when it does not fit."""

    target_nm: float
    wrench_max_nm: float
    fraction_of_max: float
    in_calibrated_span: bool
    within_capacity_margin: bool
    suggested_max_range_nm: tuple[float, float]
    suggested_unit: TorqueUnit
    warnings: tuple[str, ...]

    @property
    def ok(self) -> bool:
        """True when both the ISO 6789 span and the capacity margin hold."""
        return self.in_calibrated_span and self.within_capacity_margin


def tool_fit(target_nm: float, wrench_max_nm: float) -> ToolFit:
    """Judge ``target_nm`` on a wrench of ``wrench_max_nm``; ``PlannerError`` on bad input."""
    for name, v in (("target_nm", target_nm), ("wrench_max_nm", wrench_max_nm)):
        if not (math.isfinite(v) and v > 0):
            raise PlannerError(name, f"must be a positive torque, got {v}")
    frac = target_nm / wrench_max_nm
    in_span = ISO6789_LOW_FRACTION <= frac <= 1.0
    margin = frac <= CAPACITY_FRACTION
    # A wrench suits the target when target/0.8 <= max <= target/0.2.
    lo, hi = target_nm / CAPACITY_FRACTION, target_nm / ISO6789_LOW_FRACTION
    unit = TorqueUnit.IN_LBF if target_nm < IN_LBF_BELOW_NM else TorqueUnit.FT_LBF
    span = f"{lo:.1f}–{hi:.1f} N·m ({from_nm(lo, unit):.0f}–{from_nm(hi, unit):.0f} {unit.value})"
    warnings: list[str] = []
    if frac > 1.0:
        warnings.append(
            f"target {target_nm:.1f} N·m exceeds the wrench maximum {wrench_max_nm:.1f} N·m;"
            f" use a wrench with a maximum of {span}"
        )
    elif not margin:
        warnings.append(
            f"target is {frac:.0%} of the wrench maximum (keep it at or below"
            f" {CAPACITY_FRACTION:.0%}); a wrench with a maximum of {span} fits better"
        )
    if frac < ISO6789_LOW_FRACTION:
        warnings.append(
            f"target is {frac:.0%} of the wrench maximum, below the ISO 6789 calibrated span"
            f" ({ISO6789_LOW_FRACTION:.0%}–100%); use a wrench with a maximum of {span}"
        )
    return ToolFit(
        target_nm=target_nm,
        wrench_max_nm=wrench_max_nm,
        fraction_of_max=frac,
        in_calibrated_span=in_span,
        within_capacity_margin=margin,
        suggested_max_range_nm=(lo, hi),
        suggested_unit=unit,
        warnings=tuple(warnings),
    )
