"""X̄–R control-chart limits from the published Shewhart constants.

Theory. Consecutive results are cut into rational subgroups of n (2..10) parts. Each subgroup
gives a mean x̄ᵢ and a range Rᵢ = max − min. Over k subgroups of a period judged stable, the
grand mean x̿ and the mean range R̄ give (Shewhart's 3-sigma limits):

    X̄ chart:  centre x̿,  UCL = x̿ + A2 R̄,  LCL = x̿ − A2 R̄
    R chart:  centre R̄,  UCL = D4 R̄,      LCL = D3 R̄
    within-subgroup σ̂ = R̄ / d2

with A2 = 3 / (d2 √n), D3 = max(0, 1 − 3 d3/d2), D4 = 1 + 3 d3/d2, where d2 and d3 are the
mean and standard deviation of the range of n independent standard normal values.

The constants are the published table (ASTM MNL 7, "Manual on Presentation of Data and
Control Chart Analysis", and Montgomery, "Introduction to Statistical Quality Control",
Appendix VI; values typed from memory, three decimals as printed there). The tests check
every entry against an independent numerical integration with scipy, so a typo cannot hide.

Ranges, not standard deviations, because they are what the tables, the plant's paper charts
and a technician's mental arithmetic use at n ≤ 10, where R loses little efficiency against s.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from types import MappingProxyType

__all__ = [
    "SHEWHART",
    "ChartError",
    "ChartLimits",
    "ShewhartConstants",
    "shewhart",
    "subgroup_stats",
    "xbar_r_limits",
    "xbar_r_limits_from_summary",
]


class ChartError(ValueError):
    """Subgroups or summary figures no chart can be drawn from (the caller's misuse)."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ShewhartConstants:
    """Factors of the X̄–R chart for one subgroup size (dimensionless)."""

    n: int
    A2: float
    D3: float
    D4: float
    d2: float
    d3: float


# ASTM MNL 7 / Montgomery Appendix VI (from memory; checked against scipy in the tests).
# columns: n, A2, D3, D4, d2, d3
_TABLE = (
    (2, 1.880, 0.0, 3.267, 1.128, 0.853),
    (3, 1.023, 0.0, 2.574, 1.693, 0.888),
    (4, 0.729, 0.0, 2.282, 2.059, 0.880),
    (5, 0.577, 0.0, 2.114, 2.326, 0.864),
    (6, 0.483, 0.0, 2.004, 2.534, 0.848),
    (7, 0.419, 0.076, 1.924, 2.704, 0.833),
    (8, 0.373, 0.136, 1.864, 2.847, 0.820),
    (9, 0.337, 0.184, 1.816, 2.970, 0.808),
    (10, 0.308, 0.223, 1.777, 3.078, 0.797),
)
SHEWHART: MappingProxyType[int, ShewhartConstants] = MappingProxyType(
    {
        n: ShewhartConstants(n=n, A2=A2, D3=D3, D4=D4, d2=d2, d3=d3)
        for n, A2, D3, D4, d2, d3 in _TABLE
    }
)


def shewhart(n: int) -> ShewhartConstants:
    """Constants for subgroup size ``n``; ChartError outside the table's 2..10."""
    try:
        return SHEWHART[n]
    except KeyError:
        raise ChartError(f"subgroup size must be 2..10 (the published table), got {n}") from None


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ChartLimits:
    """Centre lines and 3-sigma limits of an X̄–R chart, in the measured quantity's unit."""

    subgroup_size: int
    subgroups: int
    xbar_center: float
    xbar_ucl: float
    xbar_lcl: float
    range_center: float
    range_ucl: float
    range_lcl: float

    @property
    def sigma_within(self) -> float:
        """σ̂ = R̄ / d2: the within-subgroup standard deviation the limits imply."""
        return self.range_center / shewhart(self.subgroup_size).d2

    @property
    def sigma_xbar(self) -> float:
        """Standard deviation of a subgroup mean, (UCL − centre)/3 = A2 R̄ / 3."""
        return (self.xbar_ucl - self.xbar_center) / 3.0


def xbar_r_limits_from_summary(
    *, grand_mean: float, mean_range: float, n: int, subgroups: int = 0
) -> ChartLimits:
    """Limits from x̿ and R̄ (as printed in worked examples); ChartError on bad figures."""
    k = shewhart(n)
    if not (math.isfinite(grand_mean) and math.isfinite(mean_range)) or mean_range < 0:
        raise ChartError(f"need a finite mean and a range >= 0, got {grand_mean}, {mean_range}")
    return ChartLimits(
        subgroup_size=n,
        subgroups=subgroups,
        xbar_center=grand_mean,
        xbar_ucl=grand_mean + k.A2 * mean_range,
        xbar_lcl=grand_mean - k.A2 * mean_range,
        range_center=mean_range,
        range_ucl=k.D4 * mean_range,
        range_lcl=k.D3 * mean_range,
    )


def subgroup_stats(subgroup: Sequence[float]) -> tuple[float, float]:
    """(x̄, R) of one subgroup; ChartError for a size outside 2..10 or a non-finite value."""
    shewhart(len(subgroup))
    if not all(math.isfinite(v) for v in subgroup):
        raise ChartError("subgroup values must be finite")
    try:
        mean = math.fsum(subgroup) / len(subgroup)
    except OverflowError:  # the sum passes 1.8e308 on the way; the mean itself cannot
        mean = math.fsum(v / len(subgroup) for v in subgroup)
    rng = max(subgroup) - min(subgroup)
    if not math.isfinite(rng):
        raise ChartError("subgroup values too far apart for a finite range")
    return mean, rng


def xbar_r_limits(subgroups: Sequence[Sequence[float]]) -> ChartLimits:
    """Limits from raw subgroups, all of one size n in 2..10.

    ChartError when there are none, when sizes differ (the constants assume one n) or a value
    is not finite. Montgomery recommends 20–25 subgroups before trusting the limits (from
    memory); fewer are accepted here and the count is carried in ``subgroups``.
    """
    if not subgroups:
        raise ChartError("need at least one subgroup")
    n = len(subgroups[0])
    if any(len(g) != n for g in subgroups):
        raise ChartError("all subgroups must have the same size")
    stats = [subgroup_stats(g) for g in subgroups]
    grand = math.fsum(m for m, _ in stats) / len(stats)
    rbar = math.fsum(r for _, r in stats) / len(stats)
    return xbar_r_limits_from_summary(grand_mean=grand, mean_range=rbar, n=n, subgroups=len(stats))
