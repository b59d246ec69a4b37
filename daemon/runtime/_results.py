"""From the engine's judged rundown and the station's context to the published result payload.

Theory of operation
-------------------
The engine speaks sensor time (seconds on the wrench's own clock, made continuous) and its own
enums; the MQTT contract (``clampd.protocol.RundownResult``) speaks UTC, the station's
identifiers and the protocol's enums. ``build_result`` is the one place that translates:

- times: a ``ClockAnchor`` pairs a sensor time with the host's ``time.monotonic()`` at which
  that sample's notification arrived, and the host's wall-clock offset. A sensor time maps to
  UTC through it. Sensor crystals are off by tens of ppm (common practice, no source), which
  over a rundown of seconds is well under a millisecond, so one anchor per rundown suffices;
- enums: the engine's reasons, strategies and stop triggers map by explicit tables, so a new
  member on either side fails loudly here (``KeyError`` in the tests) instead of leaking;
- the curve: the engine's full-resolution curve is downsampled by the protocol's LTTB
  (``Curve.from_samples``) with time counted from the rundown's first sample;
- station policy that the engine does not know (a locked tool, an overdue calibration that
  blocks) arrives as ``extra_reasons`` and turns the result NOK with those reasons added.

``OutboxResultSink`` is the durable port's implementation: route by the topic table and put
into the SQLite outbox, which returns only after a full sync (durable before publish).

These results support, never replace, the joint designer's specification: OK means the rundown
met the program's windows as measured by this wrench, not that the joint is sound.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
import re
from typing import Final, Protocol

import numpy as np

from clampd.daemon import engine
from clampd.daemon.runtime._outbox import AsyncOutbox
from clampd.protocol import (
    DEFAULT_CURVE_POINTS,
    Calibration,
    Curve,
    Judgement,
    JudgementWindows,
    ProgramRef,
    Reason,
    RundownResult,
    StopTrigger,
    Strategy,
    Topics,
    WrenchRef,
    YieldPoint,
)
from clampd.protocol._fields import SERIAL_PATTERN

__all__ = [
    "REASONS",
    "STOP_TRIGGERS",
    "STRATEGIES",
    "ClockAnchor",
    "OutboxResultSink",
    "ResultContext",
    "ResultSink",
    "build_result",
    "safe_serial",
]

# Engine reason → published reason: the engine uses the contract's words, so they map by
# value; a reason the contract lacks fails here, at import, not in a payload at run time.
REASONS: Final[dict[engine.Reason, Reason]] = {r: Reason(r.value) for r in engine.Reason}

STRATEGIES: Final[dict[engine.Strategy, Strategy]] = {
    engine.Strategy.TORQUE: Strategy.TORQUE,
    engine.Strategy.TORQUE_ANGLE: Strategy.TORQUE_ANGLE,
    engine.Strategy.YIELD: Strategy.YIELD_GRADIENT,
    engine.Strategy.TORQUE_TO_YIELD: Strategy.TORQUE_TO_YIELD,
    engine.Strategy.MULTI_STEP: Strategy.MULTI_STEP,
}

# The engine's over-torque stop is the program's safety limit, not a target: the contract has
# no trigger of that name, and "fault" is what an MES should read (the reason says which).
STOP_TRIGGERS: Final[dict[engine.StopTrigger, StopTrigger]] = {
    engine.StopTrigger.TARGET_TORQUE: StopTrigger.TORQUE_REACHED,
    engine.StopTrigger.TARGET_ANGLE: StopTrigger.ANGLE_REACHED,
    engine.StopTrigger.YIELD: StopTrigger.YIELD_DETECTED,
    engine.StopTrigger.OVER_TORQUE: StopTrigger.FAULT,
}

# Without a stop point, the first of these reasons says what ended the rundown.
_ENDING: Final[tuple[tuple[Reason, StopTrigger], ...]] = (
    (Reason.LINK_LOST, StopTrigger.LINK_LOST),
    (Reason.ABORTED, StopTrigger.ABORTED),
    (Reason.TIMEOUT, StopTrigger.TIMED_OUT),
    (Reason.ENGINE_ERROR, StopTrigger.FAULT),
    (Reason.DATA_GAP, StopTrigger.FAULT),
)

# The contract's own rule for a serial, so the two cannot drift apart.
_SERIAL_RE: Final = re.compile(SERIAL_PATTERN)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ClockAnchor:
    """Where sensor time meets host time: ``sensor_t_s`` arrived at ``host_t_s`` (monotonic),
    and the wall clock read ``host_t_s + wall_minus_monotonic_s`` then."""

    sensor_t_s: float
    host_t_s: float
    wall_minus_monotonic_s: float

    def __post_init__(self) -> None:
        if not all(
            math.isfinite(v) for v in (self.sensor_t_s, self.host_t_s, self.wall_minus_monotonic_s)
        ):
            raise ValueError("clock anchor values must be finite")

    def utc(self, sensor_t_s: float) -> dt.datetime:
        """The UTC wall time at which sensor time ``sensor_t_s`` happened."""
        wall = self.wall_minus_monotonic_s + self.host_t_s + (sensor_t_s - self.sensor_t_s)
        return dt.datetime.fromtimestamp(wall, dt.UTC)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ResultContext:
    """What the station knows about a rundown that the engine does not."""

    result_id: str
    station_id: str
    wrench_id: str
    serial: str
    calibration: Calibration
    program: engine.Program
    part_id: str
    joint_position: str
    clock: ClockAnchor
    extra_reasons: tuple[Reason, ...] = ()
    curve_points: int = DEFAULT_CURVE_POINTS


def safe_serial(serial: str | None, fallback: str) -> str:
    """A serial the contract accepts (1-32 printable ASCII, inner spaces allowed), else
    ``fallback``.

    A wrench's serial comes off the air; a blank or odd one must not make its result
    unpublishable, so the station's own wrench id stands in. Surrounding spaces are
    padding (firmware that pads its 16 bytes with spaces instead of NULs), not part of the
    serial, so they are dropped rather than costing the result its tool's serial.
    """
    text = None if serial is None else serial.strip(" ")
    if text and _SERIAL_RE.fullmatch(text):
        return text
    return fallback


def build_result(result: engine.RundownResult, ctx: ResultContext) -> RundownResult:
    """The published payload of one judged rundown.

    Raises ``pydantic.ValidationError`` or ``DownsampleError`` only when the engine's result or
    the context breaks the contract (ours: a bug, never the sensor's data).
    """
    reasons = [REASONS[r] for r in result.reasons]
    for extra in ctx.extra_reasons:
        if extra not in reasons:
            reasons.append(extra)
    status = Judgement.NOK if reasons else Judgement.OK
    program = ctx.program
    windows = None
    if program.torque_window_nm is not None or program.angle_window_deg is not None:
        tw = program.torque_window_nm
        aw = program.angle_window_deg
        windows = JudgementWindows(
            torque_min_nm=None if tw is None else tw[0],
            torque_max_nm=None if tw is None else tw[1],
            angle_min_deg=None if aw is None else aw[0],
            angle_max_deg=None if aw is None else aw[1],
        )
    if result.stop is not None:
        trigger = STOP_TRIGGERS[result.stop.trigger]
    else:
        trigger = next((t for r, t in _ENDING if r in reasons), StopTrigger.RELEASED)
    snug = result.snug
    yp = result.yield_point
    t0 = float(result.curve_t_s[0])
    curve = Curve.from_samples(
        result.curve_t_s - t0,
        result.curve_angle_deg,
        result.curve_torque_nm,
        max_points=ctx.curve_points,
    )
    r2 = result.joint_rate_r2
    rate = result.joint_rate_nm_per_deg
    return RundownResult(
        id=ctx.result_id,
        station=ctx.station_id,
        wrench=WrenchRef(
            wrench_id=ctx.wrench_id,
            serial=safe_serial(ctx.serial, ctx.wrench_id),
            calibration=ctx.calibration,
        ),
        program=ProgramRef(program_id=result.program_id, version=result.program_version),
        part_id=ctx.part_id,
        joint_position=ctx.joint_position,
        started_at=ctx.clock.utc(result.start_t_s),
        finished_at=ctx.clock.utc(result.end_t_s),
        strategy=STRATEGIES[engine.Strategy(result.strategy)],
        status=status,
        reasons=reasons,
        windows=windows,
        snug_torque_nm=None if snug is None else snug.torque_nm,
        final_torque_nm=result.final_torque_nm,
        peak_torque_nm=result.peak_torque_nm,
        final_angle_deg=None if snug is None else result.final_angle_deg,
        stop_trigger=trigger,
        yield_point=None
        if yp is None
        else YieldPoint(torque_nm=yp.torque_nm, angle_deg=yp.angle_deg),
        joint_rate_nm_per_deg=rate if rate is not None and math.isfinite(rate) else None,
        joint_rate_r2=None if r2 is None or not math.isfinite(r2) else float(np.clip(r2, 0.0, 1.0)),
        curve=curve,
    )


class ResultSink(Protocol):
    """Where judged results go, durably: returns only once the result is safe on disk."""

    async def put_result(self, payload: RundownResult) -> bool:
        """Store ``payload``; True if it was new, False if the same result was stored before."""
        ...


class OutboxResultSink:
    """``ResultSink`` over the SQLite outbox: topic from the topic table, journal columns set."""

    def __init__(self, outbox: AsyncOutbox, topics: Topics) -> None:
        self._outbox = outbox
        self._topics = topics

    async def put_result(self, payload: RundownResult) -> bool:
        """Durable put (see ``Outbox.put`` for the errors: full, conflict, disk full)."""
        route = self._topics.route(payload)
        return await self._outbox.put(
            payload.id,
            route.topic,
            payload.to_json_bytes(),
            station=payload.station,
            wrench=payload.wrench.wrench_id,
            program=payload.program.program_id,
            part_id=payload.part_id,
            status=payload.status.value,
            finished_at=payload.finished_at,
        )
