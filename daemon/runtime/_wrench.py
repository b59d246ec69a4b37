"""The per-wrench worker: one task owns one wrench's engine and turns its link into outputs.

Theory of operation
-------------------
``WrenchWorker.run()`` lives for the daemon's lifetime. It keeps the wrench's link up
(``link.connect_forever``) and, per connection, reads ``link.notifications()`` in one task:

1. decode the frame (profile v1 or the configured declarative profile). A ``FrameError`` is
   the sensor's fault: counted, logged, the frame dropped, the worker goes on;
2. check continuity (``SequenceChecker``, a new one per connection): lost notifications are
   counted; the engine sees the hole through the sample times (its ``max_gap_s`` judges it);
3. place the samples on one continuous engine time line. Each connection's sensor time is
   shifted so that it continues from the previous connection by the host time that passed,
   so the engine's time never runs backwards, even when a wrench rebooted meanwhile;
4. take the configured axis and sign, multiply torque by the calibration factor, feed;
5. act on the events. A stop or approach cue is played on the station's ``CuePlayer`` at once
   (``play`` never blocks) and queued for the tool's control characteristic, which a second
   task of the connection writes, so a slow radio write never delays the next sample. Live
   events (snug, cue, stop, progress at a bounded rate) go to the ``LiveSink`` without
   waiting. A finished rundown goes to the worker's results task, which maps it to the result
   payload (``_results.build_result``, in a thread: it costs milliseconds), puts it into the
   durable ``ResultSink`` and only then marks the joint position done in the station state.
   The sample path never waits for a disk sync. A result the sink refuses (outbox full, disk
   full) stays in memory, first in line, and is retried: nothing judged is dropped.

Link loss ends the rundown in progress NOK ``link_lost`` with its partial curve (the engine
keeps it); the result is stored like any other and the link reconnects on its own.

Station policy (documented choices)
-----------------------------------
- Locked tool: the rundown is still measured (the joint *is* being loaded, and a record of it
  is worth more than silence), the tool and the speaker play the ``locked`` cue when it starts,
  and its result is NOK. The published contract (schema 1) has no ``tool_locked`` reason, so
  the reason is ``aborted``: the station refused the rundown. Stop cues still play, because
  stopping a person at target is safer than letting them pull on.
- Calibration overdue: every result carries the calibration state and due date; when the
  wrench's config says ``block_when_calibration_overdue``, a rundown is refused like a locked
  one, with reason ``calibration_overdue``.
- No program selected: there is nothing to judge against, so samples are checked and dropped;
  torque past the start level plays the ``locked`` cue once per excursion.
- Program changes (a new selection) apply between rundowns only; the part id and joint position
  of a rundown are those in force when it started.
- Aborts (``request_abort``) end the rundown in progress NOK ``aborted`` at the next frame or
  idle tick (within ``IDLE_S``).
- Sensor flags (PROFILE.md): a frame flagged ``OVERLOAD`` or ``GYRO_SATURATED`` during a
  rundown makes it NOK ``torque_overrange`` or ``gyro_overrange`` (an overloaded bridge
  misreads torque, a saturated gyro under-counts angle: neither reading can be trusted for a
  verdict), logged once per rundown; the samples still go to the engine, so the curve shows
  what the sensor said. ``LOW_BATTERY`` is logged once per connection (the wrench status
  carries the Battery Service's level). A tool whose info record states another rated torque
  than the station file is logged once per connection: the file's value is the one used.

These results support, never replace, the joint designer's specification, local codes and
licensed practice.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import dataclasses
import datetime as dt
import logging
import math
import random
import time
from collections.abc import AsyncIterator, Awaitable, Callable
from typing import Final, Literal, Protocol

import numpy as np
import numpy.typing as npt

from clampd.daemon import engine
from clampd.daemon.runtime._ble import (
    BatteryLevel,
    Idle,
    LinkError,
    LinkItem,
    LinkLost,
    Notification,
)
from clampd.daemon.runtime._config import CalibrationState as ConfigCalibration
from clampd.daemon.runtime._config import WrenchConfig, calibration_state, sensor_profile
from clampd.daemon.runtime._cues import CuePlayer, CueSound, LatencyLog
from clampd.daemon.runtime._outbox import OutboxError
from clampd.daemon.runtime._results import (
    STOP_TRIGGERS,
    ClockAnchor,
    ResultContext,
    ResultSink,
    build_result,
    safe_serial,
)
from clampd.protocol import (
    Calibration,
    CalibrationState,
    CueKind,
    CuePattern,
    FrameError,
    FrameFlags,
    Judgement,
    LiveCue,
    LiveProgress,
    LiveSnug,
    LiveStop,
    LostFrames,
    Reason,
    RundownResult,
    SampleFrame,
    SequenceChecker,
    WrenchInfo,
    WrenchStatus,
    axis_rate,
    decode_frame,
    encode_cue,
    new_uuid7,
)

__all__ = [
    "CUE_DURATION_MS",
    "IDLE_S",
    "PROGRESS_INTERVAL_S",
    "STORE_RETRY_S",
    "LiveSink",
    "StationPort",
    "StatusSink",
    "WorkOrder",
    "WorkerStats",
    "WrenchLinkPort",
    "WrenchWorker",
    "engine_settings",
]

_log = logging.getLogger(__name__)

# With no notification for this long the worker ticks its engine (rundown timeout) and looks at
# aborts, lock changes and unstored results. 0.1 s keeps an abort prompt and costs ten wake-ups
# a second on an idle link (our choice; the engine's default timeout is 5 s).
IDLE_S: Final = 0.1
# Live progress at most this often per wrench: a dashboard redraws at about 10 Hz, and live
# events are QoS 0 (common practice, no source; the MQTT side rate-limits again).
PROGRESS_INTERVAL_S: Final = 0.1
# How long the tool's buzzer/LED plays each pattern, ms (our own choice: long enough to
# notice, short enough to end before the next stroke). Stop is longest: it must be noticed.
CUE_DURATION_MS: Final[dict[CuePattern, int]] = {
    CuePattern.APPROACH: 150,
    CuePattern.STOP: 400,
    CuePattern.OK: 300,
    CuePattern.NOK: 600,
    CuePattern.LOCKED: 600,
}
# A result the sink refused (outbox full, disk full) is offered again this often: often enough
# to catch the moment the flusher made room, rare enough not to flood the log (our choice).
STORE_RETRY_S: Final = 1.0
# Cue writes waiting for the radio: a cue older than a few is stale (our choice).
_CUE_QUEUE_BOUND: Final = 8
# Log at most one line per this many corrupt frames after the first few (our choice).
_CORRUPT_LOG_EVERY: Final = 100
# Sensor flags that make the rundown they fall in NOK, with the reason each gives.
_FLAG_REASONS: Final = (
    (FrameFlags.OVERLOAD, Reason.TORQUE_OVERRANGE),
    (FrameFlags.GYRO_SATURATED, Reason.GYRO_OVERRANGE),
)
# A tool's stated rated torque and the station file's agree within this fraction: the info
# record holds an f32 and a file may give "110 ft*lbf" or a rounded N*m figure, which differ
# by rounding only; another tool model differs by tens of percent (our choice).
_TORQUE_MAX_TOLERANCE: Final = 0.005

_CUE_SOUND: Final = {
    engine.CueKind.APPROACH: (CueSound.APPROACH, CuePattern.APPROACH, CueKind.APPROACH),
    engine.CueKind.STOP: (CueSound.STOP, CuePattern.STOP, CueKind.STOP),
}
_CALIBRATION: Final = {
    ConfigCalibration.OK: CalibrationState.OK,
    ConfigCalibration.DUE_SOON: CalibrationState.DUE_SOON,
    ConfigCalibration.OVERDUE: CalibrationState.OVERDUE,
}

LiveEventPayload = LiveProgress | LiveCue | LiveSnug | LiveStop


# -- ports -------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class WorkOrder:
    """What the station wants from this wrench next: the program, the part and the position."""

    program: engine.Program
    part_id: str
    joint_position: str


class StationPort(Protocol):
    """The part of the station state a wrench worker reads and advances."""

    def work_order(self, wrench_id: str) -> WorkOrder | None:
        """The selection in force for this wrench, or None when nothing is selected."""
        ...

    def is_locked(self, wrench_id: str) -> bool:
        """True while rundowns on this wrench must be refused."""
        ...

    def position_done(self, wrench_id: str, joint_position: str, status: Judgement) -> None:
        """A result for ``joint_position`` is stored; the station may advance to the next."""
        ...


class LiveSink(Protocol):
    """Live events (QoS 0): never blocks and may drop. ``MqttSession`` provides it."""

    def publish_live(self, event: LiveEventPayload) -> None:
        """Hand over one live event (it names its wrench)."""
        ...


class StatusSink(Protocol):
    """Retained wrench status: ``offer_status`` never blocks; the latest one wins."""

    def offer_status(self, status: WrenchStatus) -> None:
        """Hand over the wrench's current status."""
        ...


class WrenchLinkPort(Protocol):
    """What the worker needs of a link (``BleakWrenchLink`` provides it)."""

    address: str
    info: WrenchInfo | None
    battery_pct: int | None

    @property
    def connected(self) -> bool:
        """True while the link is up."""
        ...

    def notifications(self, *, idle_s: float | None = None) -> AsyncIterator[LinkItem]:
        """Items in arrival order until ``LinkLost``."""
        ...

    async def write_control(self, data: bytes) -> None:
        """One control write with response."""
        ...

    async def connect_forever(
        self, serve: Callable[[WrenchLinkPort], Awaitable[None]], *, rng: random.Random | None
    ) -> None:
        """Connect, serve, reconnect after loss; forever."""
        ...


@dataclasses.dataclass(slots=True)
class WorkerStats:
    """Counters of one worker, for status, logs, tests and benchmarks."""

    frames: int = 0
    frames_corrupt: int = 0
    frames_lost: int = 0
    frames_refused: int = 0
    samples_rejected: int = 0
    samples_unassigned: int = 0
    rundowns: int = 0
    results_stored: int = 0
    results_unstored: int = 0
    cue_writes: int = 0
    cue_writes_failed: int = 0
    cue_writes_dropped: int = 0
    links_lost: int = 0
    live_offered: int = 0


@dataclasses.dataclass(slots=True)
class _Rundown:
    result_id: str
    order: WorkOrder
    t0: float
    extra: tuple[Reason, ...]
    last_progress_host_s: float = -math.inf
    order_stale: bool = False


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class _Finished:
    result: engine.RundownResult
    rundown: _Rundown
    anchor: ClockAnchor
    serial: str
    calibration: Calibration


def engine_settings(
    config: WrenchConfig, *, reaction_time_s: float = 0.2, cue_latency_s: float = 0.05
) -> engine.EngineSettings:
    """Engine settings for this wrench: its deflection, the station's cue timing."""
    return engine.EngineSettings(
        deflection_deg_per_nm=config.deflection_deg_per_nm,
        reaction_time_s=reaction_time_s,
        cue_latency_s=cue_latency_s,
    )


def _utc_today() -> dt.date:
    return dt.datetime.now(dt.UTC).date()


class WrenchWorker:
    """One wrench: its link, its engine and everything that follows from the samples.

    All engine calls happen in the task running ``run()``; the other public methods only
    set flags, so they are safe to call from any task of the loop.
    """

    def __init__(
        self,
        config: WrenchConfig,
        *,
        station_id: str,
        link: WrenchLinkPort,
        station: StationPort,
        results: ResultSink,
        live: LiveSink,
        status: StatusSink,
        cues: CuePlayer,
        settings: engine.EngineSettings | None = None,
        today: Callable[[], dt.date] = _utc_today,
        rng: random.Random | None = None,
        idle_s: float = IDLE_S,
        progress_interval_s: float = PROGRESS_INTERVAL_S,
    ) -> None:
        self.config = config
        self.wrench_id = config.id
        self.station_id = station_id
        self.link = link
        self._station = station
        self._results = results
        self._live = live
        self._status = status
        self._player = cues
        self._settings = settings if settings is not None else engine_settings(config)
        self._today = today
        self._rng = rng
        self._idle_s = idle_s
        self._progress_s = progress_interval_s
        axis = config.axis
        self._axis: Literal["x", "y", "z"] = (
            "x" if axis[1] == "x" else "y" if axis[1] == "y" else "z"
        )
        self._sign: Literal[1, -1] = 1 if axis[0] == "+" else -1
        self._decode: Callable[[bytes], SampleFrame]
        self._new_checker: Callable[[], SequenceChecker]
        profile = sensor_profile(config.profile)
        if profile is None:
            self._decode = decode_frame
            self._new_checker = SequenceChecker
        else:
            self._decode = profile.decode
            self._new_checker = profile.checker
        # A sensor on a declarative profile has no control characteristic: its cues are the
        # station's speaker only (a write would be refused every time).
        self._tool_cues = profile is None
        self.engine: engine.Engine | None = None
        self.stats = WorkerStats()
        self.cue_latency = LatencyLog()
        """Sample arrival (host stamp of the notification) to the cue player call, seconds."""
        self._checker = self._new_checker()
        self._offset: float | None = None
        self._last_t: float | None = None
        self._last_host: float | None = None
        self._last_period_s = 0.001
        self._last_torque = 0.0
        self._anchor: ClockAnchor | None = None
        self._current: _Rundown | None = None
        self._abort = False
        self._unassigned_warned = False
        self._unstored: collections.deque[RundownResult] = collections.deque()
        self._finished: asyncio.Queue[_Finished] = asyncio.Queue()
        # 1 while the results task maps a result it took off ``_finished``: that result is in
        # neither queue, and is deliberately not in ``unstored_results`` (see ``_start``).
        self._mapping = 0
        self._cue_queue: asyncio.Queue[bytes] | None = None
        self._last_status: tuple[object, ...] | None = None
        self._battery: int | None = None
        self._low_battery_logged = False
        # Reasons the frame being handled gives the rundown it falls in (sensor flags).
        self._frame_faults: tuple[Reason, ...] = ()

    def __repr__(self) -> str:
        return f"WrenchWorker({self.wrench_id!r}, {self.link.address!r})"

    # -- public surface ----------------------------------------------------------------

    def request_abort(self) -> bool:
        """Ask to end the rundown in progress NOK (aborted); False when none is in progress."""
        if self._current is None:
            return False
        self._abort = True
        return True

    def refresh_status(self) -> None:
        """Offer the wrench status again when something in it changed outside the link (a
        lock or unlock by command); unchanged, nothing is offered. The worker's own re-checks
        run on link events only, which a disconnected or busily streaming wrench does not
        give it in time."""
        self._publish_status()

    @property
    def in_rundown(self) -> bool:
        """True while a rundown is in progress."""
        return self._current is not None

    @property
    def unstored_results(self) -> int:
        """Judged results not yet durable: queued for mapping, being stored, or refused and
        held (the one being mapped in a thread is not counted)."""
        return len(self._unstored) + self._finished.qsize()

    async def run(self) -> None:
        """Serve the wrench forever (until cancelled): connect, stream, reconnect; store
        results in a task of their own (``clampd[<wrench>].results``)."""
        self._publish_status(force=True)
        async with asyncio.TaskGroup() as tg:
            tg.create_task(self._store_forever(), name=f"clampd[{self.wrench_id}].results")
            await self.link.connect_forever(self._serve, rng=self._rng)

    # -- one connection ----------------------------------------------------------------

    async def _serve(self, link: WrenchLinkPort) -> None:
        self._checker = self._new_checker()
        self._offset = None
        queue: asyncio.Queue[bytes] = asyncio.Queue(_CUE_QUEUE_BOUND)
        self._cue_queue = queue
        self._battery = link.battery_pct
        self._low_battery_logged = False
        self._check_rating(link.info)
        self._publish_status()
        try:
            async with asyncio.TaskGroup() as tg:
                writer = tg.create_task(
                    self._write_cues(link, queue), name=f"clampd[{self.wrench_id}].cues"
                )
                try:
                    async for item in link.notifications(idle_s=self._idle_s):
                        await self._handle(item)
                finally:
                    writer.cancel()
        finally:
            self._cue_queue = None
            self._publish_status()

    async def _handle(self, item: LinkItem) -> None:
        if isinstance(item, Notification):
            await self._on_notification(item)
        elif isinstance(item, Idle):
            await self._on_idle(item.host_t_s)
        elif isinstance(item, BatteryLevel):
            self._battery = item.percent
            self._publish_status()
        else:
            await self._on_lost(item)

    async def _write_cues(self, link: WrenchLinkPort, queue: asyncio.Queue[bytes]) -> None:
        while True:
            data = await queue.get()
            try:
                await link.write_control(data)
                self.stats.cue_writes += 1
            except LinkError as exc:
                # The loss itself arrives as LinkLost in the stream; a refused write is logged.
                self.stats.cue_writes_failed += 1
                _log.warning("%s %s: cue write failed: %s", self.wrench_id, self.link.address, exc)

    # -- samples ---------------------------------------------------------------------------

    async def _on_notification(self, n: Notification) -> None:
        self.stats.frames += 1
        try:
            frame = self._decode(n.data)
        except FrameError as exc:
            self.stats.frames_corrupt += 1
            if (
                self.stats.frames_corrupt <= 3
                or self.stats.frames_corrupt % _CORRUPT_LOG_EVERY == 0
            ):
                _log.warning(
                    "%s %s: frame dropped (%d so far): %s",
                    self.wrench_id,
                    self.link.address,
                    self.stats.frames_corrupt,
                    exc,
                )
            return
        check = self._checker.feed(frame)
        for event in check.events:
            if isinstance(event, LostFrames):
                self.stats.frames_lost += event.missing
        if not check.accepted:
            self.stats.frames_refused += 1
            return
        self._frame_faults = tuple(r for flag, r in _FLAG_REASONS if flag in frame.flags)
        if FrameFlags.LOW_BATTERY in frame.flags and not self._low_battery_logged:
            self._low_battery_logged = True
            _log.warning(
                "%s %s: the wrench reports a low battery; charge or swap it before the next job",
                self.wrench_id,
                self.link.address,
            )
        times = check.times_s()
        period_s = frame.period_us / 1e6
        if self._offset is None:
            self._offset = self._continue_from(float(times[0]), n.host_t_s, period_s)
        t = times + self._offset
        torque = frame.torque_nm * self.config.calibration_factor
        rate = axis_rate(frame, self._axis, self._sign)
        last_t = float(t[-1])
        self._anchor = ClockAnchor(
            sensor_t_s=last_t,
            host_t_s=n.host_t_s,
            wall_minus_monotonic_s=time.time() - time.monotonic(),
        )
        self._last_t, self._last_host, self._last_period_s = last_t, n.host_t_s, period_s
        self._last_torque = float(torque[-1])
        eng = self._engine_for_next_rundown()
        if eng is None:
            self._unassigned(torque)
            return
        if self._abort:
            await self._act(eng.abort(float(t[0]) - period_s / 2), n.host_t_s, _EMPTY, eng)
        base = eng.samples_seen
        try:
            events = eng.feed(t, torque, rate)
        except engine.SensorDataError as exc:
            self.stats.samples_rejected += frame.count
            _log.warning("%s %s: samples rejected: %s", self.wrench_id, self.link.address, exc)
            return
        await self._act(events, n.host_t_s, torque, eng, base=base)
        self._mark_faults()  # a rundown that started in, or goes on after, this frame
        self._frame_faults = ()
        self._progress(n.host_t_s, last_t)

    def _continue_from(self, first_t: float, host_t: float, period_s: float) -> float:
        """Offset that places this connection's first sample after everything fed so far."""
        if self._last_t is None or self._last_host is None:
            return -first_t
        gap = max(host_t - self._last_host, period_s)
        return self._last_t + gap - first_t

    def _engine_for_next_rundown(self) -> engine.Engine | None:
        order = self._station.work_order(self.wrench_id)
        eng = self.engine
        if order is None:
            return eng if eng is not None and eng.state is not engine.State.IDLE else None
        if eng is None:
            self.engine = eng = engine.Engine(order.program, self._settings)
        elif eng.state is engine.State.IDLE and eng.program is not order.program:
            if (eng.program.id, eng.program.version) != (order.program.id, order.program.version):
                _log.info(
                    "%s %s: program %s v%d from the next rundown on",
                    self.wrench_id,
                    self.link.address,
                    order.program.id,
                    order.program.version,
                )
            eng.select_program(order.program)
        return eng

    def _unassigned(self, torque: npt.NDArray[np.float64]) -> None:
        self.stats.samples_unassigned += int(torque.shape[0])
        loaded = bool((torque >= self._settings.start_torque_nm).any())
        if loaded and not self._unassigned_warned:
            self._unassigned_warned = True
            _log.warning(
                "%s %s: torque applied with no program selected", self.wrench_id, self.link.address
            )
            self._cue(CuePattern.LOCKED, sound=CueSound.LOCKED)
        elif not loaded:
            self._unassigned_warned = False

    # -- events ----------------------------------------------------------------------------

    async def _act(
        self,
        events: list[engine.Event],
        host_t_s: float,
        torque: npt.NDArray[np.float64],
        eng: engine.Engine,
        *,
        base: int | None = None,
    ) -> None:
        for event in events:
            match event:
                case engine.CueFired():
                    sound, pattern, kind = _CUE_SOUND[event.kind]
                    # Latency is measured up to the call that starts the sound.
                    self.cue_latency.record(time.monotonic() - host_t_s)
                    self._player.play(sound)
                    self._tool_cue(pattern)
                    r = self._current
                    if r is not None:
                        self._offer(
                            LiveCue(
                                station=self.station_id,
                                wrench_id=self.wrench_id,
                                rundown_id=r.result_id,
                                t_s=max(event.t_s - r.t0, 0.0),
                                cue=kind,
                                torque_nm=_at(torque, event.index, base, self._last_torque),
                            )
                        )
                case engine.RundownStarted():
                    self._start(event)
                case engine.SnugReached():
                    r = self._current
                    if r is not None:
                        self._offer(
                            LiveSnug(
                                station=self.station_id,
                                wrench_id=self.wrench_id,
                                rundown_id=r.result_id,
                                t_s=max(event.t_s - r.t0, 0.0),
                                torque_nm=event.torque_nm,
                            )
                        )
                case engine.StopReached():
                    r = self._current
                    if r is not None and event.last_step:
                        self._offer(
                            LiveStop(
                                station=self.station_id,
                                wrench_id=self.wrench_id,
                                rundown_id=r.result_id,
                                t_s=max(event.t_s - r.t0, 0.0),
                                trigger=STOP_TRIGGERS[event.trigger],
                                torque_nm=event.torque_nm,
                                angle_deg=event.angle_deg,
                            )
                        )
                case engine.OverTorque():
                    _log.warning(
                        "%s %s: over-torque %.2f N*m (limit %.2f)",
                        self.wrench_id,
                        self.link.address,
                        event.torque_nm,
                        event.limit_nm,
                    )
                    self._player.play(CueSound.STOP)
                    self._tool_cue(CuePattern.STOP)
                case engine.YieldDetected():
                    _log.info(
                        "%s %s: yield at %.2f N*m",
                        self.wrench_id,
                        self.link.address,
                        event.point.torque_nm,
                    )
                case engine.EngineFault():
                    _log.error(
                        "%s %s: engine fault: %s", self.wrench_id, self.link.address, event.message
                    )
                case engine.RundownFinished():
                    self._mark_faults()  # the frame that ended it counts too
                    await self._finish(event.result)
        del eng

    def _start(self, event: engine.RundownStarted) -> None:
        order = self._station.work_order(self.wrench_id)
        assert self.engine is not None
        if order is None or order.program is not self.engine.program:
            # The selection changed since the engine armed; the rundown runs what it armed with.
            order = WorkOrder(
                program=self.engine.program,
                part_id=order.part_id if order else "unassigned",
                joint_position=order.joint_position if order else "unassigned",
            )
        extra: list[Reason] = []
        if self._station.is_locked(self.wrench_id):
            extra.append(Reason.ABORTED)
        if self._calibration_blocks():
            extra.append(Reason.CALIBRATION_OVERDUE)
        self._current = _Rundown(
            result_id=new_uuid7(),
            order=order,
            t0=event.t_s,
            extra=tuple(extra),
            # Also while the previous result is being mapped: its position is not done yet.
            order_stale=self.unstored_results > 0 or self._mapping > 0,
        )
        self._abort = False
        self.stats.rundowns += 1
        if extra:
            _log.warning(
                "%s %s: rundown refused (%s); it is recorded NOK",
                self.wrench_id,
                self.link.address,
                ", ".join(r.value for r in extra),
            )
            self._player.play(CueSound.LOCKED)
            self._tool_cue(CuePattern.LOCKED)

    def _mark_faults(self) -> None:
        """Give the rundown in progress the reasons of the current frame's sensor flags,
        each once, with one log line per new reason."""
        current = self._current
        if current is None or not self._frame_faults:
            return
        new = tuple(r for r in self._frame_faults if r not in current.extra)
        if not new:
            return
        current.extra += new
        _log.warning(
            "%s %s: sensor flagged %s during rundown %s; it is recorded NOK",
            self.wrench_id,
            self.link.address,
            ", ".join(r.value for r in new),
            current.result_id,
        )

    def _check_rating(self, info: WrenchInfo | None) -> None:
        if info is None:
            return
        configured = self.config.torque_max_nm
        if abs(info.torque_max_nm - configured) > _TORQUE_MAX_TOLERANCE * configured:
            _log.warning(
                "%s %s: the tool states a rated torque of %.1f N*m, the station file %.1f N*m "
                "(torque_max); check that this is the wrench the file means",
                self.wrench_id,
                self.link.address,
                info.torque_max_nm,
                configured,
            )

    async def _finish(self, result: engine.RundownResult) -> None:
        current, self._current = self._current, None
        self._abort = False
        if current is None:  # every finish follows a start; kept total for safety
            assert self.engine is not None
            current = _Rundown(
                result_id=new_uuid7(),
                order=WorkOrder(
                    program=self.engine.program, part_id="unassigned", joint_position="unassigned"
                ),
                t0=result.start_t_s,
                extra=(),
            )
        anchor = self._anchor or ClockAnchor(
            sensor_t_s=result.end_t_s,
            host_t_s=time.monotonic(),
            wall_minus_monotonic_s=time.time() - time.monotonic(),
        )
        # The verdict cue now; mapping and storing follow in the results task, so that the
        # samples of the next rundown are never held up by a disk sync.
        ok = result.status is engine.Status.OK and not current.extra
        self._player.play(CueSound.OK if ok else CueSound.NOK)
        self._tool_cue(CuePattern.OK if ok else CuePattern.NOK)
        info = self.link.info
        self._finished.put_nowait(
            _Finished(
                result=result,
                rundown=current,
                anchor=anchor,
                serial=safe_serial(None if info is None else info.serial, self.wrench_id),
                calibration=self._calibration(),
            )
        )

    async def _store_forever(self) -> None:
        """The results task: map, store durably, then advance the station; in rundown order.

        A result the sink refuses stays first in line and is retried every ``STORE_RETRY_S``;
        nothing judged is dropped and nothing later overtakes it.
        """
        while True:
            item = await self._finished.get()
            self._mapping = 1
            rundown = item.rundown
            order = rundown.order
            if rundown.order_stale:
                # It started while the previous result was still being stored: the position
                # it belongs to is the one in force now that that one is stored.
                now = self._station.work_order(self.wrench_id)
                if now is not None:
                    order = dataclasses.replace(
                        order, part_id=now.part_id, joint_position=now.joint_position
                    )
            # Off the loop: downsampling a long curve costs ~15 ms of Python (measured with
            # tests/benchmarks/bench_cue_latency.py), which would delay every wrench's cues. A
            # rundown starting meanwhile sees ``_mapping`` and takes the joint position in
            # force once this one is stored.
            payload = await asyncio.to_thread(
                build_result,
                item.result,
                ResultContext(
                    result_id=rundown.result_id,
                    station_id=self.station_id,
                    wrench_id=self.wrench_id,
                    serial=item.serial,
                    calibration=item.calibration,
                    program=order.program,
                    part_id=order.part_id,
                    joint_position=order.joint_position,
                    clock=item.anchor,
                    extra_reasons=rundown.extra,
                ),
            )
            ok = payload.status is Judgement.OK
            _log.info(
                "%s %s: rundown %s %s%s at %s/%s (%.2f N*m)",
                self.wrench_id,
                self.link.address,
                payload.id,
                payload.status.value,
                "" if ok else " " + ",".join(r.value for r in payload.reasons),
                payload.part_id,
                payload.joint_position,
                payload.final_torque_nm,
            )
            self._unstored.append(payload)
            self._mapping = 0
            while True:
                if await self._store_unstored():
                    break
                await asyncio.sleep(STORE_RETRY_S)

    async def _store_unstored(self) -> bool:
        """Durable first, then the station state; False at the first refusal."""
        while self._unstored:
            payload = self._unstored[0]
            try:
                await self._results.put_result(payload)
            except OutboxError as exc:
                self.stats.results_unstored = len(self._unstored)
                _log.error(
                    "%s %s: result %s kept in memory, not stored: %s",
                    self.wrench_id,
                    self.link.address,
                    payload.id,
                    exc,
                )
                return False
            self._unstored.popleft()
            self.stats.results_stored += 1
            self.stats.results_unstored = len(self._unstored)
            self._station.position_done(self.wrench_id, payload.joint_position, payload.status)
        return True

    # -- idle, loss ---------------------------------------------------------------------

    async def _on_idle(self, host_t_s: float) -> None:
        eng = self.engine
        if eng is not None and self._current is not None and self._last_t is not None:
            t_est = self._sensor_time_at(host_t_s)
            if self._abort:
                await self._act(eng.abort(t_est), host_t_s, _EMPTY, eng)
            else:
                await self._act(eng.tick(t_est), host_t_s, _EMPTY, eng)
        self._publish_status()

    async def _on_lost(self, lost: LinkLost) -> None:
        self.stats.links_lost += 1
        self._cue_queue = None  # nothing more can reach the tool on this connection
        _log.warning("%s %s: link lost", self.wrench_id, self.link.address)
        eng = self.engine
        if eng is not None and self._last_t is not None:
            await self._act(
                eng.link_lost(self._sensor_time_at(lost.host_t_s)), lost.host_t_s, _EMPTY, eng
            )

    def _sensor_time_at(self, host_t_s: float) -> float:
        assert self._last_t is not None
        assert self._last_host is not None
        return self._last_t + max(host_t_s - self._last_host, 0.0)

    # -- outputs --------------------------------------------------------------------------

    def _cue(self, pattern: CuePattern, *, sound: CueSound) -> None:
        self._player.play(sound)
        self._tool_cue(pattern)

    def _tool_cue(self, pattern: CuePattern) -> None:
        queue = self._cue_queue
        if queue is None or not self._tool_cues:
            return
        data = encode_cue(pattern, CUE_DURATION_MS[pattern])
        if queue.full():
            with contextlib.suppress(asyncio.QueueEmpty):
                queue.get_nowait()  # the oldest cue is the stalest
            self.stats.cue_writes_dropped += 1
        queue.put_nowait(data)

    def _offer(self, event: LiveEventPayload) -> None:
        self._live.publish_live(event)
        self.stats.live_offered += 1

    def _progress(self, host_t_s: float, last_t: float) -> None:
        current = self._current
        if current is None or host_t_s - current.last_progress_host_s < self._progress_s:
            return
        current.last_progress_host_s = host_t_s
        self._offer(
            LiveProgress(
                station=self.station_id,
                wrench_id=self.wrench_id,
                rundown_id=current.result_id,
                t_s=max(last_t - current.t0, 0.0),
                torque_nm=self._last_torque,
                # Counted from snug at the last sample; None before snug.
                angle_deg=None if self.engine is None else self.engine.angle_deg,
            )
        )

    def _calibration_state(self) -> ConfigCalibration | None:
        due = self.config.calibration_due
        return None if due is None else calibration_state(due, self._today())

    def _calibration(self) -> Calibration:
        state = self._calibration_state()
        return Calibration(
            state=CalibrationState.UNKNOWN if state is None else _CALIBRATION[state],
            due_date=self.config.calibration_due,
        )

    def _calibration_blocks(self) -> bool:
        return (
            self.config.block_when_calibration_overdue
            and self._calibration_state() is ConfigCalibration.OVERDUE
        )

    def _publish_status(self, *, force: bool = False) -> None:
        info = self.link.info
        connected = self.link.connected
        calibration = self._calibration()
        locked = self._station.is_locked(self.wrench_id)
        battery = self._battery if connected else None
        serial = None if info is None else safe_serial(info.serial, self.wrench_id)
        key = (connected, battery, calibration, locked, serial)
        if not force and key == self._last_status:
            return
        self._last_status = key
        self._status.offer_status(
            WrenchStatus(
                station=self.station_id,
                wrench_id=self.wrench_id,
                serial=serial,
                connected=connected,
                battery_pct=None if battery is None else max(0, min(100, battery)),
                torque_max_nm=self.config.torque_max_nm if info is None else info.torque_max_nm,
                calibration=calibration,
                locked=locked,
                at=dt.datetime.now(dt.UTC),
            )
        )


_EMPTY: Final[npt.NDArray[np.float64]] = np.zeros(0)


def _at(torque: npt.NDArray[np.float64], index: int, base: int | None, fallback: float) -> float:
    if base is None:
        return fallback
    k = index - base
    return float(torque[k]) if 0 <= k < torque.shape[0] else fallback
