"""Quality statistics of tightening results: capability, X̄–R charts, run rules, drift alarms.

Pure code (no I/O, no clock): the runtime feeds ``QualityTracker.add`` with each result and
publishes the ``QualityStats`` and ``Alarm`` payloads it returns; ``clampd stats`` replays the
journal through the same tracker. Sources and definitions are in each module's header:
capability after ISO 22514 / VDI/VDE 2645 (``_capability``), Shewhart constants from the
published table (``_charts``), Nelson's eight tests (``_rules``), the drift alarm policy
(``_monitor``) and the groupings (``_tracker``).

The figures support, and never replace, the joint designer's specification, local codes and
licensed practice.
"""

from clampd.daemon.quality._capability import (
    Capability,
    CapabilityError,
    capability,
    sample_mean_std,
)
from clampd.daemon.quality._charts import (
    SHEWHART,
    ChartError,
    ChartLimits,
    ShewhartConstants,
    shewhart,
    subgroup_stats,
    xbar_r_limits,
    xbar_r_limits_from_summary,
)
from clampd.daemon.quality._monitor import (
    DEFAULT_MONITOR,
    ChartMonitor,
    ChartPoint,
    MonitorSettings,
)
from clampd.daemon.quality._rules import RunTest, fired_at, scan
from clampd.daemon.quality._tracker import (
    MAX_MAGNITUDE,
    NOT_MEASURED,
    GroupKey,
    GroupSnapshot,
    QualityInputError,
    QualityTracker,
    QuantitySummary,
    TrackerSettings,
)

__all__ = [
    "DEFAULT_MONITOR",
    "MAX_MAGNITUDE",
    "NOT_MEASURED",
    "SHEWHART",
    "Capability",
    "CapabilityError",
    "ChartError",
    "ChartLimits",
    "ChartMonitor",
    "ChartPoint",
    "GroupKey",
    "GroupSnapshot",
    "MonitorSettings",
    "QualityInputError",
    "QualityTracker",
    "QuantitySummary",
    "RunTest",
    "ShewhartConstants",
    "TrackerSettings",
    "capability",
    "fired_at",
    "sample_mean_std",
    "scan",
    "shewhart",
    "subgroup_stats",
    "xbar_r_limits",
    "xbar_r_limits_from_summary",
]
