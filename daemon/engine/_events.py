"""The engine's outputs: a closed set of frozen, slotted, keyword-only events.

Every event names the exact sample index (0-based, counted since the Engine was created) at
which its condition first held, and the sensor time of that sample. Field names carry their
units. Events validate themselves on construction, so a malformed one is a bug caught where it
is made, not in the MQTT payload three layers later.

``RundownFinished.result`` is the whole judged rundown, including its full-resolution curve.
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from clampd.protocol._downsample import lttb_indices

__all__ = [
    "Check",
    "CheckOutcome",
    "CueFired",
    "CueKind",
    "CueRecord",
    "EngineFault",
    "Event",
    "OverTorque",
    "Reason",
    "RundownFinished",
    "RundownResult",
    "RundownStarted",
    "SnugPoint",
    "SnugReached",
    "Status",
    "StopPoint",
    "StopReached",
    "StopTrigger",
    "YieldDetected",
    "YieldPoint",
]

FloatArray = npt.NDArray[np.float64]


class Status(enum.StrEnum):
    """The judgement of a rundown."""

    OK = "OK"
    NOK = "NOK"


class Reason(enum.StrEnum):
    """Machine-readable reasons for NOK (shared with the MQTT result payload)."""

    TORQUE_LOW = "torque_low"
    TORQUE_HIGH = "torque_high"
    ANGLE_LOW = "angle_low"
    ANGLE_HIGH = "angle_high"
    OVER_TORQUE = "over_torque"
    DATA_GAP = "data_gap"
    LINK_LOST = "link_lost"
    ABORTED = "aborted"
    TIMEOUT = "timeout"
    YIELD_NOT_FOUND = "yield_not_found"
    SNUG_NOT_FOUND = "snug_not_found"
    ENGINE_ERROR = "engine_error"
    # error proofing from the curve (see _proofing.py)
    PREVAILING_TORQUE_LOW = "prevailing_torque_low"
    PREVAILING_TORQUE_HIGH = "prevailing_torque_high"
    RUNDOWN_ANGLE_LOW = "rundown_angle_low"
    RUNDOWN_ANGLE_HIGH = "rundown_angle_high"
    JOINT_RATE_LOW = "joint_rate_low"
    JOINT_RATE_HIGH = "joint_rate_high"
    REHIT = "rehit"
    TORQUE_FELL_WHILE_TURNING = "torque_fell_while_turning"


class Check(enum.StrEnum):
    """The error-proofing checks a program can switch on (one outcome each per rundown)."""

    PREVAILING_TORQUE = "prevailing_torque"  # torque while the fastener runs down freely
    RUNDOWN_ANGLE = "rundown_angle"  # rotation from the first turn to snug
    JOINT_RATE = "joint_rate"  # dT/dθ after snug
    REHIT = "rehit"  # snug reached with almost no rotation: the joint was already tight
    TORQUE_DROP = "torque_drop"  # torque fell while the fastener turned


class StopTrigger(enum.StrEnum):
    """What made a step (or the rundown) stop."""

    TARGET_TORQUE = "target_torque"
    TARGET_ANGLE = "target_angle"
    YIELD = "yield"
    OVER_TORQUE = "over_torque"


class CueKind(enum.StrEnum):
    """Cues for the technician: get ready, and stop now (fired early by latency + reaction)."""

    APPROACH = "approach"
    STOP = "stop"


def _check(cond: bool, what: str) -> None:
    if not cond:
        raise ValueError(f"invalid event field: {what}")


def _finite(*values: float) -> bool:
    return all(math.isfinite(v) for v in values)


@dataclass(frozen=True, slots=True, kw_only=True)
class SnugPoint:
    """Where snug was reached."""

    index: int
    t_s: float
    torque_nm: float

    def __post_init__(self) -> None:
        _check(self.index >= 0 and _finite(self.t_s, self.torque_nm), "snug point")


@dataclass(frozen=True, slots=True, kw_only=True)
class StopPoint:
    """Where the rundown's stop condition first held."""

    index: int
    t_s: float
    trigger: StopTrigger
    torque_nm: float
    angle_deg: float

    def __post_init__(self) -> None:
        _check(self.index >= 0 and _finite(self.t_s, self.torque_nm, self.angle_deg), "stop")


@dataclass(frozen=True, slots=True, kw_only=True)
class YieldPoint:
    """Where the yield condition first held, with the slopes that decided it."""

    index: int
    t_s: float
    torque_nm: float
    angle_deg: float
    slope_nm_per_deg: float
    max_slope_nm_per_deg: float

    def __post_init__(self) -> None:
        _check(
            self.index >= 0
            and _finite(
                self.t_s,
                self.torque_nm,
                self.angle_deg,
                self.slope_nm_per_deg,
                self.max_slope_nm_per_deg,
            ),
            "yield point",
        )


@dataclass(frozen=True, slots=True, kw_only=True)
class CheckOutcome:
    """One error-proofing check of a rundown: what was measured, against which limits.

    ``passed`` is ``None`` when the rundown gave nothing to measure (no run-in before snug,
    no joint-rate fit); such a check neither passes nor fails the rundown by itself, the
    rundown's other reasons (``snug_not_found``, ``rehit``) say why. ``index`` is the sample
    where the condition first held (torque drop), else ``None``. Units: N·m for prevailing
    torque and torque drop (the torque it fell to), degrees for angles, N·m/deg for the rate.
    """

    check: Check
    value: float | None
    low: float | None
    high: float | None
    passed: bool | None
    index: int | None = None

    def __post_init__(self) -> None:
        _check(self.value is None or math.isfinite(self.value), "check value")
        _check(self.index is None or self.index >= 0, "check index")
        _check(self.passed is None or self.value is not None, "check judged without a value")

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form (``clampd replay --json``)."""
        return {
            "check": self.check.value,
            "value": self.value,
            "low": self.low,
            "high": self.high,
            "passed": self.passed,
            "index": self.index,
        }


@dataclass(frozen=True, slots=True, kw_only=True)
class CueRecord:
    """A fired cue with the predicted and (once known) the actual crossing of its target."""

    kind: CueKind
    step: int
    index: int
    t_s: float
    predicted_crossing_t_s: float
    actual_crossing_index: int | None = None
    actual_crossing_t_s: float | None = None

    def __post_init__(self) -> None:
        _check(self.index >= 0 and self.step >= 0, "cue index/step")
        _check(_finite(self.t_s, self.predicted_crossing_t_s), "cue times")


@dataclass(frozen=True, slots=True, kw_only=True)
class RundownStarted:
    """Torque rose past the start level: a rundown begins at this sample."""

    index: int
    t_s: float
    torque_nm: float
    gyro_bias_dps: float
    program_id: str

    def __post_init__(self) -> None:
        _check(self.index >= 0 and _finite(self.t_s, self.torque_nm, self.gyro_bias_dps), "start")


@dataclass(frozen=True, slots=True, kw_only=True)
class SnugReached:
    """Torque first reached the snug torque; angle is counted from this sample."""

    index: int
    t_s: float
    torque_nm: float

    def __post_init__(self) -> None:
        _check(self.index >= 0 and _finite(self.t_s, self.torque_nm), "snug")


@dataclass(frozen=True, slots=True, kw_only=True)
class CueFired:
    """Cue the technician now; ``predicted_crossing_t_s`` is when the target should be hit."""

    kind: CueKind
    step: int
    index: int
    t_s: float
    predicted_crossing_t_s: float

    def __post_init__(self) -> None:
        _check(self.index >= 0 and self.step >= 0, "cue index/step")
        _check(_finite(self.t_s, self.predicted_crossing_t_s), "cue times")
        _check(self.predicted_crossing_t_s >= self.t_s, "cue predicted before now")


@dataclass(frozen=True, slots=True, kw_only=True)
class StopReached:
    """A step's target (or yield, or over-torque) first held at this sample."""

    index: int
    t_s: float
    step: int
    last_step: bool
    trigger: StopTrigger
    torque_nm: float
    angle_deg: float
    cue_lead_s: float | None  # time from the stop cue to this sample, if the cue came first

    def __post_init__(self) -> None:
        _check(self.index >= 0 and self.step >= 0, "stop index/step")
        _check(_finite(self.t_s, self.torque_nm, self.angle_deg), "stop values")
        _check(self.cue_lead_s is None or self.cue_lead_s >= 0.0, "cue lead")


@dataclass(frozen=True, slots=True, kw_only=True)
class YieldDetected:
    """The slope dT/dθ fell to the set fraction of its linear-region maximum."""

    point: YieldPoint


@dataclass(frozen=True, slots=True, kw_only=True)
class OverTorque:
    """Torque reached the program's over-torque limit: stop at once."""

    index: int
    t_s: float
    torque_nm: float
    limit_nm: float

    def __post_init__(self) -> None:
        _check(self.index >= 0 and _finite(self.t_s, self.torque_nm, self.limit_nm), "over")


@dataclass(frozen=True, slots=True, kw_only=True)
class EngineFault:
    """An internal error poisoned the rundown; it ends NOK (engine_error) right after this."""

    index: int
    t_s: float
    message: str

    def __post_init__(self) -> None:
        _check(self.index >= 0 and bool(self.message), "fault")


@dataclass(frozen=True, slots=True, kw_only=True, eq=False)
class RundownResult:
    """A judged rundown. Angles are degrees from snug; the curve is at full resolution.

    ``eq=False``: the curve is numpy arrays, and a result is an identity, not a value.
    """

    status: Status
    reasons: tuple[Reason, ...]
    strategy: str
    program_id: str
    program_version: int
    start_index: int
    start_t_s: float
    end_index: int
    end_t_s: float
    gyro_bias_dps: float
    snug: SnugPoint | None
    stop: StopPoint | None
    cues: tuple[CueRecord, ...]
    final_torque_nm: float
    final_angle_deg: float
    peak_torque_nm: float
    yield_point: YieldPoint | None
    joint_rate_nm_per_deg: float | None
    joint_rate_r2: float | None
    curve_t_s: FloatArray = field(repr=False)
    curve_torque_nm: FloatArray = field(repr=False)
    curve_angle_deg: FloatArray = field(repr=False)
    # Error proofing (``_proofing.py``): run-in figures and the outcome of every check the
    # program switched on. ``None``: not measured (no run-in seen, or no snug).
    prevailing_torque_nm: float | None = None
    rundown_angle_deg: float | None = None
    contact_to_snug_deg: float | None = None
    checks: tuple[CheckOutcome, ...] = ()

    def __post_init__(self) -> None:
        _check((self.status is Status.OK) == (not self.reasons), "status vs reasons")
        _check(self.end_index >= self.start_index >= 0, "indices")
        n = self.end_index - self.start_index + 1
        _check(
            self.curve_t_s.shape
            == self.curve_torque_nm.shape
            == self.curve_angle_deg.shape
            == (n,),
            "curve length",
        )
        _check(_finite(self.final_torque_nm, self.final_angle_deg, self.peak_torque_nm), "finals")

    def curve_downsampled(self, max_points: int) -> tuple[FloatArray, FloatArray, FloatArray]:
        """The curve reduced to at most ``max_points`` points (LTTB on torque over sample order,
        so the snug knee, the yield knee and the peak survive); first and last kept."""
        idx = lttb_indices(
            np.arange(self.curve_t_s.shape[0], dtype=np.float64), self.curve_torque_nm, max_points
        )
        return self.curve_t_s[idx], self.curve_torque_nm[idx], self.curve_angle_deg[idx]

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready summary (no curve), as ``clampd replay --json`` prints it."""
        yp = self.yield_point
        return {
            "status": self.status.value,
            "reasons": [r.value for r in self.reasons],
            "strategy": self.strategy,
            "program": {"id": self.program_id, "version": self.program_version},
            "start": {"index": self.start_index, "t_s": self.start_t_s},
            "end": {"index": self.end_index, "t_s": self.end_t_s},
            "gyro_bias_dps": self.gyro_bias_dps,
            "snug": None
            if self.snug is None
            else {"index": self.snug.index, "t_s": self.snug.t_s, "torque_nm": self.snug.torque_nm},
            "stop": None
            if self.stop is None
            else {
                "index": self.stop.index,
                "t_s": self.stop.t_s,
                "trigger": self.stop.trigger.value,
                "torque_nm": self.stop.torque_nm,
                "angle_deg": self.stop.angle_deg,
            },
            "cues": [
                {
                    "kind": c.kind.value,
                    "step": c.step,
                    "index": c.index,
                    "t_s": c.t_s,
                    "predicted_crossing_t_s": c.predicted_crossing_t_s,
                    "actual_crossing_index": c.actual_crossing_index,
                    "actual_crossing_t_s": c.actual_crossing_t_s,
                }
                for c in self.cues
            ],
            "final": {"torque_nm": self.final_torque_nm, "angle_deg": self.final_angle_deg},
            "peak_torque_nm": self.peak_torque_nm,
            "yield": {
                "detected": yp is not None,
                "index": None if yp is None else yp.index,
                "t_s": None if yp is None else yp.t_s,
                "torque_nm": None if yp is None else yp.torque_nm,
                "angle_deg": None if yp is None else yp.angle_deg,
            },
            "joint_rate_nm_per_deg": self.joint_rate_nm_per_deg,
            "joint_rate_r2": self.joint_rate_r2,
            "samples": int(self.curve_t_s.shape[0]),
            "prevailing_torque_nm": self.prevailing_torque_nm,
            "rundown_angle_deg": self.rundown_angle_deg,
            "contact_to_snug_deg": self.contact_to_snug_deg,
            "checks": [c.to_dict() for c in self.checks],
        }


@dataclass(frozen=True, slots=True, kw_only=True)
class RundownFinished:
    """The rundown ended at this sample (release, or a fault); ``result`` is its judgement."""

    index: int
    t_s: float
    result: RundownResult

    def __post_init__(self) -> None:
        _check(self.index == self.result.end_index, "finished index")


Event = (
    RundownStarted
    | SnugReached
    | CueFired
    | StopReached
    | YieldDetected
    | OverTorque
    | RundownFinished
    | EngineFault
)
