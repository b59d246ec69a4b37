"""Capability indices of a tightening process: Cm/Cmk (machine) and Cp/Cpk (process).

Theory. A capability index compares the spread a process needs with the room its limits give
it. With lower and upper specification limits LSL, USL, a mean x̄ and a standard deviation σ:

    C  = (USL − LSL) / (6 σ)                        potential: centring ignored
    Ck = min(USL − x̄, x̄ − LSL) / (3 σ)             actual: the nearer limit counts

The two pairs in this module differ only in which σ they use, which is what the standards
distinguish (definitions from memory, after ISO 22514-2 for process capability and
VDI/VDE 2645-2 / ISO 22514-3 for machine capability of tightening tools):

- **Cm, Cmk** (machine capability): σ is the sample standard deviation ``s`` (n − 1 in the
  denominator) of consecutive rundowns in the window: a short study where the machine (here:
  wrench, program and technician together) is the only variation source.
- **Cp, Cpk** (process capability): σ is the within-subgroup estimate R̄ / d2 from the X̄–R
  chart's rational subgroups (Montgomery, "Introduction to Statistical Quality Control",
  ch. 8, from memory), so slow drifts between subgroups do not hide in σ; it needs the process
  to be in statistical control to mean anything.

One-sided limits: a window with only a minimum (or only a maximum) has no C; Ck uses the one
side given (Montgomery's Cpl/Cpu for one-sided specifications). An index is ``None`` when it is
undefined (no limits, fewer than two values, zero spread): a dashboard shows "—" rather than
infinity. These figures describe the measured results only; acceptance thresholds (commonly
Cm ≥ 2.0 and Cmk ≥ 1.67 for tightening tools, from memory) belong to the plant's quality
plan and the joint designer's specification.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence

__all__ = ["Capability", "CapabilityError", "capability", "sample_mean_std"]


class CapabilityError(ValueError):
    """The caller passed values or limits no capability can be computed from (our misuse)."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Capability:
    """Potential (``c``) and actual (``ck``) capability for one σ, None where undefined."""

    c: float | None
    ck: float | None


def _finite(name: str, value: float | None) -> None:
    if value is not None and not math.isfinite(value):
        raise CapabilityError(f"{name} must be finite, got {value}")


def capability(*, mean: float, sigma: float, lsl: float | None, usl: float | None) -> Capability:
    """C = (USL − LSL)/(6σ) and Ck = min(USL − x̄, x̄ − LSL)/(3σ) for a given σ.

    Pass the sample ``s`` for Cm/Cmk, R̄/d2 for Cp/Cpk. ``None`` limits mean "not specified".
    Raises CapabilityError for non-finite input, a negative σ, or LSL ≥ USL (a window that
    cannot hold any value is a program error, not a capability of 0).
    """
    _finite("mean", mean)
    _finite("sigma", sigma)
    _finite("lsl", lsl)
    _finite("usl", usl)
    if sigma < 0:
        raise CapabilityError(f"sigma must be >= 0, got {sigma}")
    if lsl is not None and usl is not None and not lsl < usl:
        raise CapabilityError(f"lower limit {lsl} must be below upper limit {usl}")
    if sigma == 0:
        return Capability(c=None, ck=None)
    c = None if lsl is None or usl is None else (usl - lsl) / (6.0 * sigma)
    sides: list[float] = []
    if usl is not None:
        sides.append(usl - mean)
    if lsl is not None:
        sides.append(mean - lsl)
    ck = min(sides) / (3.0 * sigma) if sides else None
    # A σ near the smallest float (e.g. two readings one ulp apart) overflows: undefined too.
    return Capability(c=_finite_or_none(c), ck=_finite_or_none(ck))


def _finite_or_none(value: float | None) -> float | None:
    return value if value is not None and math.isfinite(value) else None


def sample_mean_std(values: Sequence[float]) -> tuple[float, float]:
    """Mean and sample standard deviation s (n − 1 denominator, Bessel's correction).

    Two-pass (mean first, then squared deviations) so large torques with small spread keep
    their digits. Raises CapabilityError for fewer than two values or a non-finite value.
    """
    n = len(values)
    if n < 2:
        raise CapabilityError(f"need at least two values for a standard deviation, got {n}")
    for v in values:
        _finite("value", v)
    try:
        mean = math.fsum(values) / n
        var = math.fsum((v - mean) ** 2 for v in values) / (n - 1)
    except OverflowError:
        raise CapabilityError("values too large for a finite mean and variance") from None
    if not (math.isfinite(mean) and math.isfinite(var)):
        raise CapabilityError("values too large for a finite mean and variance")
    return mean, math.sqrt(var)
