"""Quality tracker: rolling capability, control charts and drift alarms from results.

Theory of operation. The runtime hands every judged result to ``QualityTracker.add`` and
publishes what comes back: a ``QualityStats`` for the result's program on its wrench (retained
on ``stats/{program_id}/{wrench_id}``) and any ``Alarm`` raised or cleared by it. The tracker is
pure (no I/O, no clock, no randomness): every time it reports comes from the results, and alarm
ids are derived from the result that caused them, so replaying a journal gives the same output
byte for byte.

Two groupings are kept for each result:

- **program × wrench**: what one tool does on one job; published as ``QualityStats``;
- **program × joint position** (all wrenches): what one joint of the part does; it raises
  drift alarms too (``wrench_id`` null, the position named in the text) and is read by
  ``clampd stats`` through ``snapshot``.

Each group holds a rolling window of the last ``window`` results (counts, means, standard
deviations, Cm/Cmk with the sample s, Cp/Cpk with R̄/d2 of the window's consecutive subgroups)
and, per quantity (final torque, final angle), a ``ChartMonitor`` whose limits are fixed from
the first baseline subgroups and whose run rules raise and clear ``trend_drift``.

Which results are measurements: rundowns that ended by ``aborted``, ``timed_out``,
``link_lost`` or ``fault`` did not complete a tightening; they count in ``count`` and
``nok_count`` but not in means, capability or charts (their final torque says how far the
rundown got, not how the process tightens). A result without a final angle (no snug) counts in
the torque figures only; a value beyond ``MAX_MAGNITUDE`` is not a measurement either.

A group restarts (window, baseline and alarms) when the program's version or its windows change:
capability against new limits and a chart of a changed process must not mix with the old. An
active drift alarm is cleared then, with a text saying why. A result id seen again within the
window is ignored (results are delivered at least once). ``rebaseline`` restarts a group on
purpose, e.g. after a corrective action.

These figures support, and never replace, the joint designer's specification, local codes and
licensed practice: a capable, in-control process can still be tightening to the wrong program.
"""

from __future__ import annotations

import collections
import dataclasses
import datetime as dt
import hashlib
import math
import uuid
from collections.abc import Iterator
from typing import Literal, NamedTuple

from pydantic import ValidationError

from clampd.daemon.quality._capability import CapabilityError, capability, sample_mean_std
from clampd.daemon.quality._charts import ChartLimits, shewhart
from clampd.daemon.quality._monitor import (
    DEFAULT_MONITOR,
    ChartMonitor,
    ChartPoint,
    MonitorSettings,
)
from clampd.protocol import (
    Alarm,
    AlarmCode,
    AlarmSeverity,
    AlarmState,
    CapabilityIndices,
    ControlChartLimits,
    Judgement,
    QualityStats,
    RundownResult,
    StopTrigger,
)

__all__ = [
    "MAX_MAGNITUDE",
    "NOT_MEASURED",
    "GroupKey",
    "GroupSnapshot",
    "QualityInputError",
    "QualityTracker",
    "QuantitySummary",
    "TrackerSettings",
]

# Stop triggers of rundowns that did not complete a tightening (module doc).
NOT_MEASURED = frozenset(
    {StopTrigger.ABORTED, StopTrigger.TIMED_OUT, StopTrigger.LINK_LOST, StopTrigger.FAULT}
)
# A final torque (N·m) or angle (deg) beyond 10^9 is no measurement of any tightening tool
# (common practice, no source); such a result counts but is not measured, which also keeps
# every sum of a window far from floating-point overflow.
MAX_MAGNITUDE = 1e9
_EPOCH = dt.datetime(1970, 1, 1, tzinfo=dt.UTC)
_MS = dt.timedelta(milliseconds=1)


class QualityInputError(ValueError):
    """A result handed to the tracker is not a valid result (the caller's or peer's fault)."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class TrackerSettings:
    """Window and chart settings; validated on construction (ValueError)."""

    # 50 consecutive parts: the usual size of a machine capability study (ISO 22514-3 and
    # VDI/VDE 2645-2 studies use at least 50, from memory).
    window: int = 50
    monitor: MonitorSettings = DEFAULT_MONITOR

    def __post_init__(self) -> None:
        if self.window < 2:
            raise ValueError(f"window must be >= 2, got {self.window}")


@dataclasses.dataclass(frozen=True, slots=True, order=True)
class GroupKey:
    """A grouping: ``kind`` wrench (member = wrench id) or position (member = joint position)."""

    kind: Literal["wrench", "position"]
    program_id: str
    member: str

    def describe(self) -> str:
        """How alarm texts and tables name the group."""
        if self.kind == "wrench":
            return f"program {self.program_id} on wrench {self.member}"
        return f"program {self.program_id} at joint position {self.member} (all wrenches)"


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class QuantitySummary:
    """Window figures and chart state of one quantity (final torque or final angle)."""

    n: int
    mean: float | None
    std: float | None
    lsl: float | None
    usl: float | None
    cm: float | None
    cmk: float | None
    cp: float | None
    cpk: float | None
    limits: ChartLimits | None
    baseline_done: int
    points: tuple[ChartPoint, ...]
    drift_alarm: bool


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class GroupSnapshot:
    """Everything known about one group, for the CLI and for building ``QualityStats``."""

    key: GroupKey
    station: str
    window_size: int
    count: int
    ok_count: int
    nok_count: int
    first_at: dt.datetime | None
    last_at: dt.datetime | None
    at: dt.datetime | None
    torque: QuantitySummary
    angle: QuantitySummary


@dataclasses.dataclass(frozen=True, slots=True)
class _Entry:
    id: str
    ok: bool
    finished_at: dt.datetime
    torque_nm: float | None
    angle_deg: float | None


_Quantity = Literal["torque", "angle"]
_LABEL = {"torque": ("Final torque", "N·m"), "angle": ("Final angle", "deg")}


class _Group:
    __slots__ = ("alarm_ids", "charts", "entries", "ids", "last_at", "spec", "station")

    def __init__(self, settings: TrackerSettings, spec: _Spec, station: str) -> None:
        self.entries: collections.deque[_Entry] = collections.deque(maxlen=settings.window)
        self.ids: set[str] = set()
        self.charts = {q: ChartMonitor(settings.monitor) for q in ("torque", "angle")}
        self.alarm_ids: dict[str, str] = {}
        self.spec = spec
        self.station = station
        self.last_at: dt.datetime | None = None

    def push(self, entry: _Entry) -> None:
        if len(self.entries) == self.entries.maxlen:
            self.ids.discard(self.entries[0].id)
        self.entries.append(entry)
        self.ids.add(entry.id)


def _alarm_id(at: dt.datetime, *parts: str) -> str:
    """A UUIDv7 (RFC 9562 §5.7) from the causing result's time and a hash of what it names.

    Deterministic so that a replayed journal reproduces its alarms; unique because the parts
    include the causing result's own (unique) id.
    """
    ms = (at - _EPOCH) // _MS
    digest = hashlib.sha256("|".join(parts).encode()).digest()
    rand_a = int.from_bytes(digest[:2], "big") & 0xFFF
    rand_b = int.from_bytes(digest[2:10], "big") & ((1 << 62) - 1)
    value = (ms & ((1 << 48) - 1)) << 80 | 0x7 << 76 | rand_a << 64 | 0b10 << 62 | rand_b
    return str(uuid.UUID(int=value))


class _Spec(NamedTuple):
    version: int
    torque_min_nm: float | None
    torque_max_nm: float | None
    angle_min_deg: float | None
    angle_max_deg: float | None


def _spec_of(result: RundownResult) -> _Spec:
    w = result.windows
    if w is None:
        return _Spec(result.program.version, None, None, None, None)
    return _Spec(
        result.program.version, w.torque_min_nm, w.torque_max_nm, w.angle_min_deg, w.angle_max_deg
    )


def _measurement(value: float | None) -> float | None:
    """The value, or None beyond ±MAX_MAGNITUDE (no tool measures that; keeps sums finite)."""
    return value if value is not None and abs(value) <= MAX_MAGNITUDE else None


def _within_sigma(values: list[float], n: int) -> float | None:
    """R̄/d2 over the window's consecutive subgroups of n (a trailing partial one is left out)."""
    groups = [values[i : i + n] for i in range(0, len(values) - n + 1, n)]
    if len(groups) < 2:  # one range is too little to call it a within-subgroup estimate
        return None
    rbar = math.fsum(max(g) - min(g) for g in groups) / len(groups)
    return rbar / shewhart(n).d2


class QualityTracker:
    """Rolling statistics and drift alarms per program × wrench and program × joint position.

    Pure and deterministic; one instance per station, fed in the order results finish.
    """

    def __init__(self, settings: TrackerSettings | None = None) -> None:
        self.settings = settings or TrackerSettings()
        self._groups: dict[GroupKey, _Group] = {}

    def add(self, result: RundownResult | bytes) -> list[QualityStats | Alarm]:
        """Take one result; return its group's ``QualityStats`` first, then any alarms.

        ``result`` may be the model or its JSON bytes (as journaled). Raises
        QualityInputError for bytes that are not a valid result; nothing changes then. A
        result id already in the window returns ``[]`` and changes nothing.
        """
        if not isinstance(result, RundownResult):
            try:
                result = RundownResult.model_validate_json(result, strict=False)
            except (ValidationError, ValueError) as exc:
                raise QualityInputError(f"not a valid result: {exc}") from None
        keys = (
            GroupKey("wrench", result.program.program_id, result.wrench.wrench_id),
            GroupKey("position", result.program.program_id, result.joint_position),
        )
        if result.id in self._group(keys[0], result).ids:
            return []
        measured = result.stop_trigger not in NOT_MEASURED
        entry = _Entry(
            id=result.id,
            ok=result.status is Judgement.OK,
            finished_at=result.finished_at,
            torque_nm=_measurement(result.final_torque_nm) if measured else None,
            angle_deg=_measurement(result.final_angle_deg) if measured else None,
        )
        alarms: list[Alarm] = []
        for key in keys:
            group = self._group(key, result)
            if group.spec != _spec_of(result):
                alarms += self._restart(key, result, "the program's version or windows changed")
                group = self._group(key, result)
            group.push(entry)
            group.last_at = result.finished_at
            alarms += self._feed_charts(key, group, result, entry)
        return [self.stats(keys[0]), *alarms]

    def rebaseline(self, key: GroupKey, at: dt.datetime, why: str) -> list[Alarm]:
        """Restart a group (window, baseline, alarms); returns the alarms this clears.

        ``at`` stamps the clearing alarms (UTC); KeyError for a group never seen.
        """
        group = self._groups[key]
        alarms = [
            _alarm(
                key,
                station=group.station,
                state=AlarmState.CLEARED,
                at=at,
                alarm_id=alarm_id,
                text=f"{_LABEL[q][0]} of {key.describe()}: drift alarm withdrawn, {why}.",
            )
            for q, alarm_id in sorted(group.alarm_ids.items())
        ]
        self._groups[key] = _Group(self.settings, group.spec, group.station)
        return alarms

    def groups(self) -> Iterator[GroupKey]:
        """Keys of every group seen, sorted (wrench groups first, then positions)."""
        return iter(sorted(self._groups, key=lambda k: (k.kind != "wrench", k)))

    def snapshot(self, key: GroupKey) -> GroupSnapshot:
        """The group's figures now; KeyError for a group never seen."""
        group = self._groups[key]
        entries = list(group.entries)
        spec = group.spec
        torque_limits = (spec.torque_min_nm, spec.torque_max_nm)
        angle_limits = (spec.angle_min_deg, spec.angle_max_deg)
        times = [e.finished_at for e in entries]
        ok = sum(e.ok for e in entries)
        return GroupSnapshot(
            key=key,
            station=group.station,
            window_size=self.settings.window,
            count=len(entries),
            ok_count=ok,
            nok_count=len(entries) - ok,
            first_at=min(times) if times else None,
            last_at=max(times) if times else None,
            at=group.last_at,
            torque=self._summary(
                [e.torque_nm for e in entries if e.torque_nm is not None],
                torque_limits,
                group.charts["torque"],
            ),
            angle=self._summary(
                [e.angle_deg for e in entries if e.angle_deg is not None],
                angle_limits,
                group.charts["angle"],
            ),
        )

    def stats(self, key: GroupKey) -> QualityStats:
        """The retained payload of a program × wrench group; ValueError for a position group."""
        if key.kind != "wrench":
            raise ValueError("QualityStats are published per program and wrench only")
        snap = self.snapshot(key)
        assert snap.at is not None  # a group exists only once a result arrived
        t, a = snap.torque, snap.angle
        return QualityStats(
            station=snap.station,
            program_id=key.program_id,
            wrench_id=key.member,
            window_size=snap.window_size,
            count=snap.count,
            ok_count=snap.ok_count,
            nok_count=snap.nok_count,
            final_torque_mean_nm=t.mean,
            final_torque_std_nm=t.std,
            final_angle_mean_deg=a.mean,
            final_angle_std_deg=a.std,
            first_at=snap.first_at,
            last_at=snap.last_at,
            at=snap.at,
            final_torque_capability=_indices(t),
            final_angle_capability=_indices(a),
            final_torque_chart_nm=_chart(t),
            final_angle_chart_deg=_chart(a),
        )

    # -- internals ---------------------------------------------------------------------------

    def _group(self, key: GroupKey, result: RundownResult) -> _Group:
        group = self._groups.get(key)
        if group is None:
            group = self._groups[key] = _Group(self.settings, _spec_of(result), result.station)
        return group

    def _restart(self, key: GroupKey, result: RundownResult, why: str) -> list[Alarm]:
        alarms = self.rebaseline(key, result.finished_at, why)
        self._groups[key] = _Group(self.settings, _spec_of(result), result.station)
        return alarms

    def _feed_charts(
        self, key: GroupKey, group: _Group, result: RundownResult, entry: _Entry
    ) -> list[Alarm]:
        alarms: list[Alarm] = []
        values: dict[_Quantity, float | None] = {
            "torque": entry.torque_nm,
            "angle": entry.angle_deg,
        }
        for quantity, value in values.items():
            if value is None:
                continue
            chart = group.charts[quantity]
            point = chart.add(value)
            if point is None or chart.limits is None:
                continue
            if point.raised:
                alarm_id = _alarm_id(
                    result.finished_at, "trend_drift", *dataclasses.astuple(key), quantity, entry.id
                )
                group.alarm_ids[quantity] = alarm_id
                alarms.append(
                    _alarm(
                        key,
                        station=group.station,
                        state=AlarmState.RAISED,
                        at=result.finished_at,
                        alarm_id=alarm_id,
                        text=_raise_text(key, quantity, point, chart),
                    )
                )
            elif point.cleared and quantity in group.alarm_ids:
                alarm_id = group.alarm_ids.pop(quantity)
                text = (
                    f"{_LABEL[quantity][0]} of {key.describe()} shows no drift pattern for "
                    f"{chart.settings.clear_after} subgroups."
                )
                alarms.append(
                    _alarm(
                        key,
                        station=group.station,
                        state=AlarmState.CLEARED,
                        at=result.finished_at,
                        alarm_id=alarm_id,
                        text=text,
                    )
                )
        return alarms

    def _summary(
        self,
        values: list[float],
        limits: tuple[float | None, float | None],
        chart: ChartMonitor,
    ) -> QuantitySummary:
        lsl, usl = limits
        mean = std = cm = cmk = cp = cpk = None
        if len(values) >= 2:
            try:
                mean, std = sample_mean_std(values)
            except CapabilityError:  # only for absurd magnitudes (~1e308): report nothing
                mean = std = None
        has_limits = (lsl, usl) != (None, None) and (lsl is None or usl is None or lsl < usl)
        if mean is not None and std is not None and has_limits:
            m = capability(mean=mean, sigma=std, lsl=lsl, usl=usl)
            cm, cmk = m.c, m.ck
            sigma_w = _within_sigma(values, chart.settings.subgroup_size)
            if sigma_w is not None and math.isfinite(sigma_w):
                p = capability(mean=mean, sigma=sigma_w, lsl=lsl, usl=usl)
                cp, cpk = p.c, p.ck
        baseline = chart.settings.baseline_subgroups
        done = baseline if chart.limits is not None else min(len(chart.points), baseline)
        return QuantitySummary(
            n=len(values),
            mean=mean,
            std=std,
            lsl=lsl,
            usl=usl,
            cm=cm,
            cmk=cmk,
            cp=cp,
            cpk=cpk,
            limits=chart.limits,
            baseline_done=done,
            points=tuple(chart.points),
            drift_alarm=chart.alarm_active,
        )


def _alarm(
    key: GroupKey,
    *,
    station: str,
    state: AlarmState,
    at: dt.datetime,
    alarm_id: str,
    text: str,
) -> Alarm:
    return Alarm(
        id=alarm_id,
        station=station,
        code=AlarmCode.TREND_DRIFT,
        severity=AlarmSeverity.WARNING,
        state=state,
        text=text[:500],  # Alarm.text is bounded; ours stay near 350 characters
        wrench_id=key.member if key.kind == "wrench" else None,
        program_id=key.program_id,
        at=at,
    )


def _raise_text(key: GroupKey, quantity: _Quantity, point: ChartPoint, chart: ChartMonitor) -> str:
    label, unit = _LABEL[quantity]
    lim = chart.limits
    assert lim is not None
    tests = sorted(point.fired & chart.settings.alarm_tests)
    named = "; ".join(f"test {int(t)}, {t.text}" for t in tests)
    return (
        f"{label} of {key.describe()} is drifting: run-rule tests fired on "
        f"{chart.settings.confirm} consecutive subgroups (Nelson {named}). "
        f"Latest subgroup mean {point.xbar:.4g} {unit}, chart centre "
        f"{lim.xbar_center:.4g}, limits {lim.xbar_lcl:.4g} to {lim.xbar_ucl:.4g}. Check tool, "
        "parts and joint against the joint designer's specification before going on."
    )


def _indices(q: QuantitySummary) -> CapabilityIndices | None:
    if q.mean is None or (q.lsl is None and q.usl is None):
        return None
    return CapabilityIndices(lsl=q.lsl, usl=q.usl, cm=q.cm, cmk=q.cmk, cp=q.cp, cpk=q.cpk)


def _chart(q: QuantitySummary) -> ControlChartLimits | None:
    lim = q.limits
    if lim is None or not all(math.isfinite(v) for v in dataclasses.astuple(lim)):
        return None  # limits of absurd magnitudes (~1e308) overflow: no chart to publish
    judged = [p for p in q.points if p.z is not None]
    last = judged[-1] if judged else None
    return ControlChartLimits(
        subgroup_size=lim.subgroup_size,
        baseline_subgroups=lim.subgroups,
        xbar_center=lim.xbar_center,
        xbar_ucl=lim.xbar_ucl,
        xbar_lcl=lim.xbar_lcl,
        range_center=lim.range_center,
        range_ucl=lim.range_ucl,
        range_lcl=lim.range_lcl,
        last_xbar=None if last is None else last.xbar,
        last_tests=[] if last is None else sorted(int(t) for t in last.fired),
        drift_alarm=q.drift_alarm,
    )
