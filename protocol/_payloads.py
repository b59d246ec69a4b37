"""Payloads the station publishes over MQTT: results, status, live events, replies, stats, alarms.

Every payload is a pydantic v2 model with a fixed ``schema_version`` and a ``kind`` naming it,
so a consumer that subscribes with a wildcard can dispatch on ``kind`` alone. Field names carry
their units (``torque_nm``, ``angle_deg``, ``t_s``); the curve states its units once more in
``curve.units`` for readers who look only at the arrays.

Invariants the models enforce (so a payload that breaks them cannot be built, let alone sent):
- a result is OK exactly when it has no reasons; NOK always says why;
- times are UTC and a rundown finishes no earlier than it starts;
- the curve's columns have equal length, time never runs backwards, and the curve holds no
  more points than the raw samples it came from;
- a reply is an error exactly when it carries an error code.

These results support, and never replace, the joint designer's specification: OK means the
rundown met the program's windows as measured by this wrench, not that the joint is sound.
"""

from __future__ import annotations

import datetime as dt
import enum
from collections.abc import Sequence
from typing import Annotated, Literal, Self

import numpy as np
import numpy.typing as npt
from pydantic import ConfigDict, Field, model_validator

from clampd.protocol._commands import MAX_JOINT_POSITIONS, CommandName, ErrorCode
from clampd.protocol._downsample import DownsampleError, lttb_indices, take
from clampd.protocol._fields import (
    FiniteFloat,
    Ident,
    OutboundModel,
    PartId,
    Serial,
    Text,
    UtcDatetime,
    Uuid7,
)

__all__ = [
    "DEFAULT_CURVE_POINTS",
    "MAX_CURVE_POINTS",
    "Alarm",
    "AlarmCode",
    "AlarmSeverity",
    "AlarmState",
    "Calibration",
    "CalibrationState",
    "CapabilityIndices",
    "ControlChartLimits",
    "CueKind",
    "Curve",
    "CurveUnits",
    "Judgement",
    "JudgementWindows",
    "LiveCue",
    "LiveEvent",
    "LiveProgress",
    "LiveSnug",
    "LiveStop",
    "ProgramRef",
    "QualityStats",
    "Reason",
    "Reply",
    "ReplyStatus",
    "RundownResult",
    "Selection",
    "StationState",
    "StationStatus",
    "StopTrigger",
    "Strategy",
    "WrenchRef",
    "WrenchStatus",
    "YieldPoint",
]

# 256 points draw a torque-angle curve without visible loss at screen size and keep a result
# near 10 kB of JSON (three columns of ~10-character numbers); the task fixed this default.
DEFAULT_CURVE_POINTS = 256
# Hard cap on any published curve: 4096 × 3 numbers stay near 150 kB, well below the packet
# limits plant brokers are commonly configured with (common practice, no source).
MAX_CURVE_POINTS = 4096


class Judgement(enum.StrEnum):
    """The judgement of one rundown (the trade's OK/NOK)."""

    OK = "OK"
    NOK = "NOK"


class Reason(enum.StrEnum):
    """Why a rundown is NOK. Consumers should treat a code they do not know as a plain NOK."""

    TORQUE_LOW = "torque_low"
    TORQUE_HIGH = "torque_high"
    ANGLE_LOW = "angle_low"
    ANGLE_HIGH = "angle_high"
    OVER_TORQUE = "over_torque"  # beyond the wrench's rated capacity
    SNUG_NOT_FOUND = "snug_not_found"
    YIELD_NOT_FOUND = "yield_not_found"
    YIELD_EARLY = "yield_early"  # yield before the minimum torque or angle
    JOINT_RATE_LOW = "joint_rate_low"
    JOINT_RATE_HIGH = "joint_rate_high"
    PREVAILING_TORQUE_LOW = "prevailing_torque_low"  # torque during the free rundown
    PREVAILING_TORQUE_HIGH = "prevailing_torque_high"  # e.g. cross-threaded or galled
    RUNDOWN_ANGLE_LOW = "rundown_angle_low"  # rotation from the first turn to snug
    RUNDOWN_ANGLE_HIGH = "rundown_angle_high"
    REHIT = "rehit"  # snug with almost no rotation: the joint was already tight
    TORQUE_FELL_WHILE_TURNING = "torque_fell_while_turning"  # stripped thread, necking bolt
    DATA_GAP = "data_gap"
    LINK_LOST = "link_lost"
    ABORTED = "aborted"
    TIMEOUT = "timeout"
    ENGINE_ERROR = "engine_error"
    CALIBRATION_OVERDUE = "calibration_overdue"
    WRONG_WRENCH = "wrong_wrench"  # program's torque outside the wrench's usable range
    TORQUE_OVERRANGE = "torque_overrange"  # the sensor flagged torque beyond its range
    GYRO_OVERRANGE = "gyro_overrange"  # the gyro saturated: the angle is under-counted


class Strategy(enum.StrEnum):
    """How the rundown was controlled; the other quantity is monitored by windows."""

    TORQUE = "torque"  # stop at target torque, monitor angle
    TORQUE_ANGLE = "torque_angle"  # snug, then stop at target angle, monitor torque
    YIELD_GRADIENT = "yield_gradient"  # stop when dT/dθ falls to a fraction of its maximum
    TORQUE_TO_YIELD = "torque_to_yield"  # snug plus an angle past yield on purpose
    MULTI_STEP = "multi_step"


class StopTrigger(enum.StrEnum):
    """What ended the rundown."""

    TORQUE_REACHED = "torque_reached"
    ANGLE_REACHED = "angle_reached"
    YIELD_DETECTED = "yield_detected"
    RELEASED = "released"  # the technician let go before any stop condition
    ABORTED = "aborted"
    TIMED_OUT = "timed_out"
    LINK_LOST = "link_lost"
    FAULT = "fault"


class CalibrationState(enum.StrEnum):
    """Where the wrench stands against its calibration interval."""

    OK = "ok"
    DUE_SOON = "due_soon"
    OVERDUE = "overdue"
    UNKNOWN = "unknown"


class Calibration(OutboundModel):
    """A wrench's calibration state, as the station's records have it."""

    state: CalibrationState
    due_date: dt.date | None = Field(description="Next calibration due (date, no time zone).")


class WrenchRef(OutboundModel):
    """Which wrench did the rundown, and whether its calibration was current."""

    wrench_id: Ident
    serial: Serial
    calibration: Calibration


class ProgramRef(OutboundModel):
    """The tightening program that governed the rundown."""

    program_id: Ident
    version: int = Field(ge=1)


class YieldPoint(OutboundModel):
    """Onset of yield found on the curve (angle from snug)."""

    torque_nm: FiniteFloat
    angle_deg: FiniteFloat


class JudgementWindows(OutboundModel):
    """The windows the rundown was judged against; null where the program sets none."""

    torque_min_nm: FiniteFloat | None
    torque_max_nm: FiniteFloat | None
    angle_min_deg: FiniteFloat | None
    angle_max_deg: FiniteFloat | None


class CurveUnits(OutboundModel):
    """Units of the curve's columns, spelt out for readers of the arrays."""

    t: Literal["s"] = "s"
    angle: Literal["deg"] = "deg"
    torque: Literal["N*m"] = "N*m"


FloatColumn = list[FiniteFloat]


class Curve(OutboundModel):
    """Torque-angle-time points of a rundown, downsampled to a bounded count.

    ``t_s`` counts from the first sample of the rundown; ``angle_deg`` is from snug (negative
    before snug). ``raw_sample_count`` is how many samples the engine captured.
    """

    units: CurveUnits = CurveUnits()
    method: Literal["lttb", "none"] = Field(
        description="lttb: largest-triangle-three-buckets over (angle, torque); none: all samples."
    )
    raw_sample_count: int = Field(ge=0)
    t_s: FloatColumn = Field(max_length=MAX_CURVE_POINTS)
    angle_deg: FloatColumn = Field(max_length=MAX_CURVE_POINTS)
    torque_nm: FloatColumn = Field(max_length=MAX_CURVE_POINTS)

    @model_validator(mode="after")
    def _consistent(self) -> Self:
        n = len(self.t_s)
        if len(self.angle_deg) != n or len(self.torque_nm) != n:
            raise ValueError(
                f"curve columns differ in length: t_s {n}, angle_deg {len(self.angle_deg)}, "
                f"torque_nm {len(self.torque_nm)}"
            )
        if n > self.raw_sample_count:
            raise ValueError(f"curve has {n} points but only {self.raw_sample_count} raw samples")
        if self.method == "none" and n != self.raw_sample_count:
            raise ValueError("method 'none' means every raw sample is in the curve")
        if any(b < a for a, b in zip(self.t_s, self.t_s[1:], strict=False)):
            raise ValueError("curve time runs backwards")
        return self

    @classmethod
    def from_samples(
        cls,
        t_s: Sequence[float] | npt.NDArray[np.float64],
        angle_deg: Sequence[float] | npt.NDArray[np.float64],
        torque_nm: Sequence[float] | npt.NDArray[np.float64],
        max_points: int = DEFAULT_CURVE_POINTS,
    ) -> Curve:
        """Downsample raw samples by LTTB over (angle, torque), carrying time along.

        LTTB runs on the torque-angle plane because that is the curve an MES draws and where
        the snug and yield knees live. Raises ``DownsampleError`` or ``ValidationError`` on
        bad columns (the caller's fault).
        """
        if not 2 <= max_points <= MAX_CURVE_POINTS:
            raise DownsampleError(f"max_points must be in 2..{MAX_CURVE_POINTS}, got {max_points}")
        n = len(t_s)
        if len(angle_deg) != n or len(torque_nm) != n:
            raise DownsampleError("t_s, angle_deg and torque_nm must have the same length")
        idx = lttb_indices(angle_deg, torque_nm, max_points)
        t, a, q = take(idx, t_s, angle_deg, torque_nm)
        return cls(
            method="lttb" if len(idx) < n else "none",
            raw_sample_count=n,
            t_s=t,
            angle_deg=a,
            torque_nm=q,
        )


class RundownResult(OutboundModel):
    """One judged rundown: who, what, where, when, the verdict with reasons, and the curve.

    ``id`` is a UUIDv7: an MES de-duplicates on it, because QoS 1 and the station's outbox
    both deliver at least once.
    """

    # The cross-field rule "OK exactly when no reasons" in the exported schema too (draft-07
    # if/then/else), so an MES validator enforces what the model enforces.
    model_config = ConfigDict(
        json_schema_extra={
            "if": {"properties": {"status": {"const": "OK"}}},
            "then": {"properties": {"reasons": {"maxItems": 0}}},
            "else": {"properties": {"reasons": {"minItems": 1}}},
        }
    )

    schema_version: Literal["1"] = "1"
    kind: Literal["result"] = "result"
    id: Uuid7
    station: Ident
    wrench: WrenchRef
    program: ProgramRef
    part_id: PartId
    joint_position: Ident
    started_at: UtcDatetime
    finished_at: UtcDatetime
    strategy: Strategy
    status: Judgement
    reasons: list[Reason] = Field(max_length=len(Reason), json_schema_extra={"uniqueItems": True})
    windows: JudgementWindows | None
    snug_torque_nm: FiniteFloat | None = Field(description="null when snug was not found.")
    final_torque_nm: FiniteFloat
    peak_torque_nm: FiniteFloat
    final_angle_deg: FiniteFloat | None = Field(description="From snug; null without snug.")
    stop_trigger: StopTrigger
    yield_point: YieldPoint | None
    joint_rate_nm_per_deg: FiniteFloat | None = Field(
        description="Slope dT/dθ of the linear region after snug, N·m per degree."
    )
    joint_rate_r2: FiniteFloat | None = Field(
        ge=0.0, le=1.0, description="Coefficient of determination of the joint-rate fit."
    )
    curve: Curve

    @model_validator(mode="after")
    def _consistent(self) -> Self:
        if self.finished_at < self.started_at:
            raise ValueError("finished_at is before started_at")
        if len(set(self.reasons)) != len(self.reasons):
            raise ValueError("reasons repeat")
        if (self.status is Judgement.OK) == bool(self.reasons):
            raise ValueError("status OK must have no reasons, NOK at least one")
        if self.peak_torque_nm < self.final_torque_nm:
            raise ValueError("peak torque is below final torque")
        return self


class Selection(OutboundModel):
    """What the station is set to do next (from the last ``select_program`` command)."""

    program_id: Ident
    program_version: int = Field(ge=1)
    part_id: PartId
    joint_positions: list[Ident] = Field(min_length=1, max_length=MAX_JOINT_POSITIONS)
    next_position: Ident | None = Field(description="null when every position is done.")


class StationState(enum.StrEnum):
    """Whether the station daemon is connected; ``offline`` is also its MQTT last will."""

    ONLINE = "online"
    OFFLINE = "offline"


class StationStatus(OutboundModel):
    """Retained station status; the same model with state ``offline`` is the last will."""

    schema_version: Literal["1"] = "1"
    kind: Literal["station_status"] = "station_status"
    station: Ident
    state: StationState
    software_version: Annotated[str, Field(max_length=64)] | None
    locked: bool
    selection: Selection | None
    at: UtcDatetime = Field(
        description="When this status was declared; for the last will, when the station connected."
    )

    @classmethod
    def offline(cls, station: str, at: dt.datetime) -> StationStatus:
        """The last-will payload registered when connecting (``at`` is the connect time)."""
        return cls(
            station=station,
            state=StationState.OFFLINE,
            software_version=None,
            locked=True,
            selection=None,
            at=at,
        )


class WrenchStatus(OutboundModel):
    """Retained status of one wrench: link, battery, lock and calibration."""

    schema_version: Literal["1"] = "1"
    kind: Literal["wrench_status"] = "wrench_status"
    station: Ident
    wrench_id: Ident
    serial: Serial | None
    connected: bool
    battery_pct: int | None = Field(ge=0, le=100)
    torque_max_nm: FiniteFloat | None = Field(gt=0, description="Rated capacity.")
    calibration: Calibration
    locked: bool
    at: UtcDatetime


class _LiveBase(OutboundModel):
    schema_version: Literal["1"] = "1"
    station: Ident
    wrench_id: Ident
    rundown_id: Uuid7 = Field(description="The id the rundown's result will carry.")
    t_s: FiniteFloat = Field(ge=0, description="Seconds since the rundown's first sample.")


class LiveProgress(_LiveBase):
    """Rundown progress, rate-limited by the station (QoS 0: a lost one is replaced soon)."""

    kind: Literal["progress"] = "progress"
    torque_nm: FiniteFloat
    angle_deg: FiniteFloat | None = Field(description="From snug; null before snug.")


class CueKind(enum.StrEnum):
    """Cues given to the technician."""

    APPROACH = "approach"
    STOP = "stop"


class LiveCue(_LiveBase):
    """A cue was given (fired early by the predicted reaction time)."""

    kind: Literal["cue"] = "cue"
    cue: CueKind
    torque_nm: FiniteFloat


class LiveSnug(_LiveBase):
    """Snug was found; angle counts from here."""

    kind: Literal["snug"] = "snug"
    torque_nm: FiniteFloat


class LiveStop(_LiveBase):
    """The rundown stopped; its judged result follows on the result topic."""

    kind: Literal["stop"] = "stop"
    trigger: StopTrigger
    torque_nm: FiniteFloat
    angle_deg: FiniteFloat | None


LiveEvent = Annotated[LiveProgress | LiveCue | LiveSnug | LiveStop, Field(discriminator="kind")]


class ReplyStatus(enum.StrEnum):
    """Outcome of a command."""

    OK = "ok"
    ERROR = "error"


class Reply(OutboundModel):
    """The station's answer to one command (sent to the requested reply topic)."""

    model_config = ConfigDict(
        json_schema_extra={
            "if": {"properties": {"status": {"const": "error"}}},
            "then": {"properties": {"code": {"type": "string"}}},
            "else": {"properties": {"code": {"type": "null"}}},
        }
    )

    schema_version: Literal["1"] = "1"
    kind: Literal["reply"] = "reply"
    station: Ident
    command: CommandName | None = Field(description="null when the command could not be read.")
    status: ReplyStatus
    code: ErrorCode | None = Field(description="Set exactly when status is error.")
    text: Text | None
    correlation_id: Annotated[str, Field(pattern=r"^[!-~]{1,128}$")] | None
    at: UtcDatetime

    @model_validator(mode="after")
    def _consistent(self) -> Self:
        if (self.status is ReplyStatus.ERROR) != (self.code is not None):
            raise ValueError("a reply carries a code exactly when its status is error")
        return self


class CapabilityIndices(OutboundModel):
    """Capability of one quantity against the program's window; null where undefined.

    cm/cmk use the sample standard deviation of the window, cp/cpk the within-subgroup
    R̄/d2 (definitions in clampd.daemon.quality). Null: a one-sided window has no cm/cp, a
    window without limits or with no spread has none at all.
    """

    lsl: FiniteFloat | None = Field(description="Lower limit used (the window's minimum).")
    usl: FiniteFloat | None = Field(description="Upper limit used (the window's maximum).")
    cm: FiniteFloat | None
    cmk: FiniteFloat | None
    cp: FiniteFloat | None
    cpk: FiniteFloat | None


class ControlChartLimits(OutboundModel):
    """X̄–R chart limits fixed from baseline subgroups, in the unit the parent field names."""

    subgroup_size: int = Field(ge=2, le=10)
    baseline_subgroups: int = Field(ge=1)
    xbar_center: FiniteFloat
    xbar_ucl: FiniteFloat
    xbar_lcl: FiniteFloat
    range_center: FiniteFloat = Field(ge=0)
    range_ucl: FiniteFloat = Field(ge=0)
    range_lcl: FiniteFloat = Field(ge=0)
    last_xbar: FiniteFloat | None = Field(description="Latest subgroup mean judged; null before.")
    last_tests: list[Annotated[int, Field(ge=1, le=8)]] = Field(
        max_length=8,
        description="Run-rule tests (Nelson 1984, numbered 1-8) that fired at the latest point.",
    )
    drift_alarm: bool = Field(description="A trend_drift alarm for this chart is raised.")


class QualityStats(OutboundModel):
    """Retained running statistics of recent results for one program on one wrench.

    Means and standard deviations cover the OK and NOK results in the window that measured a
    completed rundown (aborted, timed-out, link-lost and faulted rundowns count in ``count``
    and ``nok_count`` but not in the figures); null until at least two such results exist.
    Capability and chart fields are null until they can be computed (chart: after the
    baseline subgroups). They were added before any release published this payload, so the
    schema version stays 1 (see MQTT.md, Versioning).
    """

    schema_version: Literal["1"] = "1"
    kind: Literal["stats"] = "stats"
    station: Ident
    program_id: Ident
    wrench_id: Ident
    window_size: int = Field(ge=1)
    count: int = Field(ge=0)
    ok_count: int = Field(ge=0)
    nok_count: int = Field(ge=0)
    final_torque_mean_nm: FiniteFloat | None
    final_torque_std_nm: FiniteFloat | None = Field(ge=0)
    final_angle_mean_deg: FiniteFloat | None
    final_angle_std_deg: FiniteFloat | None = Field(ge=0)
    first_at: UtcDatetime | None
    last_at: UtcDatetime | None
    at: UtcDatetime
    final_torque_capability: CapabilityIndices | None = None
    final_angle_capability: CapabilityIndices | None = None
    final_torque_chart_nm: ControlChartLimits | None = None
    final_angle_chart_deg: ControlChartLimits | None = None

    @model_validator(mode="after")
    def _consistent(self) -> Self:
        if self.ok_count + self.nok_count != self.count or self.count > self.window_size:
            raise ValueError("ok_count + nok_count must equal count, and count <= window_size")
        return self


class AlarmCode(enum.StrEnum):
    """Conditions a station raises for people to act on."""

    CALIBRATION_OVERDUE = "calibration_overdue"
    CALIBRATION_DUE_SOON = "calibration_due_soon"
    NOK_STREAK = "nok_streak"
    WRENCH_LOST = "wrench_lost"
    BATTERY_LOW = "battery_low"
    OUTBOX_BACKLOG = "outbox_backlog"
    TREND_DRIFT = "trend_drift"


class AlarmSeverity(enum.StrEnum):
    """How urgently someone should look."""

    INFO = "info"
    WARNING = "warning"
    CRITICAL = "critical"


class AlarmState(enum.StrEnum):
    """An alarm is raised once and cleared once, both under the same id."""

    RAISED = "raised"
    CLEARED = "cleared"


class Alarm(OutboundModel):
    """An alarm event (not retained; the retained station and wrench status show the state)."""

    schema_version: Literal["1"] = "1"
    kind: Literal["alarm"] = "alarm"
    id: Uuid7
    station: Ident
    code: AlarmCode
    severity: AlarmSeverity
    state: AlarmState
    text: Text
    wrench_id: Ident | None
    program_id: Ident | None
    at: UtcDatetime
