"""One quantity's X̄–R chart over a stream of values: baseline, run rules, drift alarm state.

Theory of operation. Values arrive one at a time (final torques, or final angles, of one
program on one wrench). They are cut into consecutive rational subgroups of ``subgroup_size``.
The first ``baseline_subgroups`` complete subgroups fix the chart's limits (Shewhart's phase I:
Montgomery recommends 20–25 preliminary subgroups, from memory); after that the limits are
frozen and every new subgroup mean is judged by Nelson's tests (``_rules``) against them
(phase II). Frozen, because limits that follow the data would swallow the very drift the
chart is there to show.

Drift alarm. The alarm is *raised* when one of ``alarm_tests`` fires at ``confirm``
consecutive subgroup points, and *cleared* after ``clear_after`` consecutive points on which
none of them fires. The defaults (tests 5 and 6, confirm 3, clear after 8) are our choice,
measured, not published: with limits from 20 subgroups of 5, a stable normal process raises a
false alarm in about 3 % of 400-part runs, and a mean creeping by 0.05 σ per part is caught
within about 55 parts of the drift's start (1000 seeded runs each; reproduced by
``tests/test_quality_monitor.py``). Firing on a single point would be faster by about ten
parts but false-alarms on more than half of all stable 400-part runs (the tests measure that
too). Test 1 (beyond 3 σ) and the R chart's upper limit are reported as signals with every
point but do not raise the drift alarm: one point out is an event to look at, not a drift.

A baseline with no spread at all (R̄ = 0, e.g. a quantised reading that never changed) gives a
chart with zero width; its points are reported but no test is evaluated against it.
"""

from __future__ import annotations

import collections
import dataclasses
import math

from clampd.daemon.quality._charts import ChartError, ChartLimits, subgroup_stats, xbar_r_limits
from clampd.daemon.quality._rules import RunTest, fired_at

__all__ = ["DEFAULT_MONITOR", "ChartMonitor", "ChartPoint", "MonitorSettings"]

# The longest Nelson test looks back 15 points.
_RULE_MEMORY = 15


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class MonitorSettings:
    """How a chart is built and when it alarms; validated on construction."""

    # 5 is the subgroup size of most worked examples and of the constants' best-known row.
    subgroup_size: int = 5
    # Montgomery's 20–25 preliminary subgroups (from memory): 20 × 5 = 100 parts.
    baseline_subgroups: int = 20
    # Zone tests 5 and 6: the measured best trade-off of detection and false alarms (module doc).
    alarm_tests: frozenset[RunTest] = frozenset(
        {RunTest.TWO_OF_THREE_BEYOND_2_SIGMA, RunTest.FOUR_OF_FIVE_BEYOND_1_SIGMA}
    )
    # Three consecutive firing points: false alarms per 400 parts fall from ~49 % to ~3 %.
    confirm: int = 3
    # Eight quiet points (40 parts at n = 5) before the alarm clears: as long as test 2's run.
    clear_after: int = 8
    # Subgroup points kept for display: 60 × 5 = 300 parts, a shift's worth on a slow station
    # (our choice); the CLI raises it to draw a whole journal.
    history: int = 60

    def __post_init__(self) -> None:
        if not 2 <= self.subgroup_size <= 10:
            raise ChartError(f"subgroup_size must be 2..10, got {self.subgroup_size}")
        if self.baseline_subgroups < 2:
            raise ChartError(f"baseline_subgroups must be >= 2, got {self.baseline_subgroups}")
        if not self.alarm_tests:
            raise ChartError("alarm_tests must name at least one test")
        if self.confirm < 1 or self.clear_after < 1 or self.history < 1:
            raise ChartError("confirm, clear_after and history must be >= 1")


DEFAULT_MONITOR = MonitorSettings()


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ChartPoint:
    """One completed subgroup as the chart sees it.

    ``z`` is None during the baseline and on a chart with zero width. ``raised``/``cleared``
    say whether this point changed the drift alarm's state.
    """

    index: int
    xbar: float
    range: float
    z: float | None
    fired: frozenset[RunTest]
    range_beyond: bool
    raised: bool
    cleared: bool


class ChartMonitor:
    """X̄–R chart of one quantity: feed values with ``add``; pure, deterministic, no I/O."""

    def __init__(self, settings: MonitorSettings = DEFAULT_MONITOR) -> None:
        self.settings = settings
        self.limits: ChartLimits | None = None
        self.alarm_active = False
        self.points: collections.deque[ChartPoint] = collections.deque(maxlen=settings.history)
        self._open: list[float] = []
        self._baseline: list[list[float]] = []
        self._z: collections.deque[float] = collections.deque(maxlen=_RULE_MEMORY)
        self._firing_run = 0
        self._quiet_run = 0
        self._count = 0

    def add(self, value: float) -> ChartPoint | None:
        """Take one value; return the chart point when it completes a subgroup, else None.

        Raises ChartError for a non-finite value (the caller's misuse; nothing changes).
        """
        if not math.isfinite(value):
            raise ChartError(f"chart values must be finite, got {value}")
        group = [*self._open, value]
        if len(group) < self.settings.subgroup_size:
            self._open = group
            return None
        xbar, rng = subgroup_stats(group)  # may raise ChartError: then nothing has changed
        self._open = []
        self._count += 1
        if self.limits is None:
            self._baseline.append(group)
            if len(self._baseline) >= self.settings.baseline_subgroups:
                self.limits = xbar_r_limits(self._baseline)
                self._baseline = []
            point = ChartPoint(
                index=self._count,
                xbar=xbar,
                range=rng,
                z=None,
                fired=frozenset(),
                range_beyond=False,
                raised=False,
                cleared=False,
            )
        else:
            point = self._judge(xbar, rng, self.limits)
        self.points.append(point)
        return point

    def _judge(self, xbar: float, rng: float, limits: ChartLimits) -> ChartPoint:
        sigma = limits.sigma_xbar
        z: float | None = None
        fired: frozenset[RunTest] = frozenset()
        if sigma > 0:
            z = (xbar - limits.xbar_center) / sigma
            self._z.append(z)
            fired = fired_at(list(self._z))
        alarming = bool(fired & self.settings.alarm_tests)
        self._firing_run = self._firing_run + 1 if alarming else 0
        self._quiet_run = 0 if alarming else self._quiet_run + 1
        raised = cleared = False
        if not self.alarm_active and self._firing_run >= self.settings.confirm:
            self.alarm_active = raised = True
        elif self.alarm_active and self._quiet_run >= self.settings.clear_after:
            self.alarm_active = False
            cleared = True
        return ChartPoint(
            index=self._count,
            xbar=xbar,
            range=rng,
            z=z,
            fired=fired,
            range_beyond=rng > limits.range_ucl,
            raised=raised,
            cleared=cleared,
        )
