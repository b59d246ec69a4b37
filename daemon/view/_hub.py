"""The station view's model: one snapshot of what the page shows, and deltas fanned out to pages.

Theory of operation
-------------------
``ViewHub`` is fed by the runtime (engine events, live events, samples, results, wrench status,
station state, broker state) through plain synchronous methods that never block and never
await: the wrench worker's sample path may call them. Each call updates the snapshot and, when
something visible changed, encodes **one** delta message (JSON, once, whatever the number of
pages) and offers it to every subscriber.

Subscribers (one per open page, see ``_server.py``) each have a bounded queue. A page that
reads too slowly (a busy touchscreen, a stalled network) overflows its queue; the queue is then
emptied and the subscriber's next message is a fresh full snapshot: a slow page skips ahead to
the present, it never holds up the engine nor grows memory.

Curve updates are rate-limited: samples arrive as frames (tens per second per wrench), and
points are sent at most every ``CURVE_INTERVAL_S``. A point that must wait is sent by a timer
on the running loop (or by the next event, which always flushes first, so markers never
overtake the curve they belong to). A rundown's live curve is bounded (``MAX_LIVE_POINTS``,
halved by decimation when full); the finished curve is the engine's full-resolution one
reduced with LTTB (the protocol's downsampler) to ``RESULT_POINTS``.

Every message carries ``seq`` (strictly increasing per hub) and ``ts_ms``: the wall-clock time
(ms since the epoch) at which the hub received the input. A page compares it with its own
clock to measure event-to-screen latency (``tests/benchmarks/bench_view.py``).

The page is read-only and these figures support, never replace, the joint designer's
specification, local codes and licensed practice.
"""

from __future__ import annotations

import asyncio
import collections
import dataclasses
import datetime as dt
import json
import math
import time
from collections.abc import Iterable, Mapping, Sequence
from typing import Any, Final, Literal, Protocol

import numpy as np
import numpy.typing as npt

from clampd.daemon import engine
from clampd.protocol import (
    LiveCue,
    LiveProgress,
    LiveSnug,
    LiveStop,
    RundownResult,
    WrenchStatus,
    lttb_indices,
)

__all__ = [
    "CURVE_INTERVAL_S",
    "MAX_LIVE_POINTS",
    "QUEUE_BOUND",
    "RECENT_RESULTS",
    "RESULT_POINTS",
    "JobView",
    "JointView",
    "Message",
    "StationView",
    "Subscription",
    "ViewError",
    "ViewHub",
    "limits_of",
    "station_view",
]

# Curve deltas at most 25 per second per hub: motion at 25 frames/s looks continuous (the PAL
# television frame rate; common practice, no source) and a 40 ms hold keeps the added lag well
# inside the 100 ms event-to-screen goal, while a small board encodes a tenth of the frames it
# receives.
CURVE_INTERVAL_S: Final = 0.04
# Live points kept per rundown before halving: an 800-px-wide plot has fewer columns than this,
# and a snapshot stays ~25 kB of JSON (our choice).
MAX_LIVE_POINTS: Final = 1200
# Points of a finished curve on the page: LTTB keeps the snug knee and the peak at this size
# (the same downsampler the MQTT result uses; our choice of size for an 800–1920 px plot).
RESULT_POINTS: Final = 600
# Messages waiting per page: ~10 s of curve deltas at 25/s with markers; a page further
# behind than that gets the latest snapshot instead (our choice).
QUEUE_BOUND: Final = 256
# Results listed on the page: two parts' worth at a typical 4–8 screw station (our choice).
RECENT_RESULTS: Final = 12

Number = float | int
ArrayLike = float | Sequence[float] | npt.NDArray[np.float64]


class ViewError(ValueError):
    """Our caller's mistake: an input the view cannot show (named in the message)."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class JointView:
    """One joint position of the selected part and its state (``pending``/``ok``/``nok``)."""

    position: str
    state: Literal["pending", "ok", "nok"]


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class JobView:
    """A selection as the page shows it: whom it is for, the program's limits, the joints."""

    wrench_id: str | None  # None: station-wide
    program: engine.Program
    part_id: str
    joints: tuple[JointView, ...]
    locked: bool = False


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class StationView:
    """The station's identity and its selections."""

    station_id: str
    name: str = ""
    locked: bool = False
    jobs: tuple[JobView, ...] = ()


@dataclasses.dataclass(frozen=True, slots=True)
class Message:
    """One server-sent event: ``event`` is ``snapshot`` or ``delta``; ``data`` is JSON."""

    event: Literal["snapshot", "delta"]
    seq: int
    data: str


class _Clock(Protocol):
    def __call__(self) -> float: ...


def limits_of(program: engine.Program) -> dict[str, Any]:
    """What the plot draws for a program: snug, targets, windows, over-torque limit."""
    targets_nm = [program.target_torque_nm] if program.target_torque_nm is not None else []
    targets_deg = [program.target_angle_deg] if program.target_angle_deg is not None else []
    for step in program.steps:
        if step.target_torque_nm is not None:
            targets_nm.append(step.target_torque_nm)
        if step.target_angle_deg is not None:
            targets_deg.append(step.target_angle_deg)
    tw, aw = program.torque_window_nm, program.angle_window_deg
    return {
        "program_id": program.id,
        "program_version": program.version,
        "strategy": program.strategy.value,
        "snug_nm": program.snug_torque_nm,
        "targets_nm": targets_nm,
        "targets_deg": targets_deg,
        "torque_window": None if tw is None else [tw[0], tw[1]],
        "angle_window": None if aw is None else [aw[0], aw[1]],
        "max_torque_nm": program.max_torque_nm,
    }


def _finite_or_none(x: float | None) -> float | None:
    return None if x is None or not math.isfinite(x) else round(float(x), 4)


def _pt(angle: float | None, torque: float) -> list[float | None]:
    return [_finite_or_none(angle), round(float(torque), 4)]


class Subscription:
    """One page's feed. ``await next()`` returns the next message; the first is a snapshot.

    Created by ``ViewHub.subscribe()``; ``close()`` (or ``with``) removes it from the hub.
    """

    def __init__(self, hub: ViewHub, bound: int) -> None:
        self._hub = hub
        self._queue: collections.deque[Message] = collections.deque()
        self._bound = bound
        self._wake = asyncio.Event()
        self._resync = True  # the first message is the whole picture
        self.dropped = 0
        """Times this page fell behind and skipped to a snapshot."""

    def _offer(self, message: Message) -> None:
        if self._resync:
            return  # a snapshot is due anyway; it will contain this change
        if len(self._queue) >= self._bound:
            self._queue.clear()
            self._resync = True
            self.dropped += 1
        else:
            self._queue.append(message)
        self._wake.set()

    def pending(self) -> int:
        """Messages waiting (a snapshot due counts as one)."""
        return len(self._queue) + (1 if self._resync else 0)

    def next_nowait(self) -> Message | None:
        """The next message if one is ready, else None."""
        if self._resync:
            self._resync = False
            self._queue.clear()
            return self._hub.snapshot_message()
        if self._queue:
            return self._queue.popleft()
        self._wake.clear()
        return None

    async def next(self) -> Message:
        """Wait for the next message."""
        while True:
            message = self.next_nowait()
            if message is not None:
                return message
            await self._wake.wait()

    def close(self) -> None:
        """Stop receiving (idempotent)."""
        self._hub._unsubscribe(self)

    def __enter__(self) -> Subscription:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


@dataclasses.dataclass(slots=True)
class _Rundown:
    wrench_id: str
    rundown_id: str
    limits: dict[str, Any] | None
    phase: Literal["running", "finished"] = "running"
    points: list[list[float | None]] = dataclasses.field(default_factory=list)
    sent: int = 0  # points already in a delta
    marks: list[dict[str, Any]] = dataclasses.field(default_factory=list)
    torque_nm: float = 0.0
    angle_deg: float | None = None
    status: str | None = None
    reasons: list[str] = dataclasses.field(default_factory=list)
    epoch: int = 0  # bumps when the point list is rewritten (decimated or replaced)
    stored: bool = False  # its stored result has been shown
    final: list[float | None] | None = None  # [angle, torque] judged, once finished
    pending_ms: float = 0.0  # wall stamp of the oldest point not yet sent

    def to_json(self) -> dict[str, Any]:
        return {
            "wrench_id": self.wrench_id,
            "id": self.rundown_id,
            "phase": self.phase,
            "limits": self.limits,
            "points": self.points,
            "marks": self.marks,
            "torque_nm": round(self.torque_nm, 4),
            "angle_deg": _finite_or_none(self.angle_deg),
            "status": self.status,
            "reasons": self.reasons,
            "epoch": self.epoch,
            "stored": self.stored,
            "final": self.final,
        }


class ViewHub:
    """The view's state and its fan-out (see the module docstring).

    ``clock`` is the monotonic clock used for rate limiting (injected by tests); ``wall`` the
    wall clock stamped into messages. Inputs that cannot be shown (an unknown kind of event,
    non-finite torque) raise ``ViewError`` and change nothing.
    """

    def __init__(
        self,
        station_id: str,
        *,
        name: str = "",
        clock: _Clock = time.monotonic,
        wall: _Clock = time.time,
        curve_interval_s: float = CURVE_INTERVAL_S,
        queue_bound: int = QUEUE_BOUND,
        recent_results: int = RECENT_RESULTS,
    ) -> None:
        if curve_interval_s < 0 or queue_bound < 1 or recent_results < 1:
            raise ViewError("curve_interval_s >= 0, queue_bound >= 1, recent_results >= 1")
        self._clock = clock
        self._wall = wall
        self._interval = curve_interval_s
        self._bound = queue_bound
        self._seq = 0
        self._subs: list[Subscription] = []
        self._station: dict[str, Any] = {"id": station_id, "name": name, "locked": False}
        self._jobs: list[dict[str, Any]] = []
        self._programs: dict[str | None, engine.Program] = {}
        self._wrenches: dict[str, dict[str, Any]] = {}
        self._rundowns: dict[str, _Rundown] = {}
        self._focus: str | None = None
        self._results: collections.deque[dict[str, Any]] = collections.deque(maxlen=recent_results)
        self._broker: dict[str, Any] = {"connected": False, "backlog": None}
        self._last_curve_send = -math.inf
        self._timer: asyncio.TimerHandle | None = None
        self._stamp_ms = 0.0
        self.messages_sent = 0
        """Deltas encoded since start (one per visible change, whatever the page count)."""

    # -- subscribers ----------------------------------------------------------------------

    def subscribe(self) -> Subscription:
        """A new page's feed; its first message is a full snapshot."""
        sub = Subscription(self, self._bound)
        self._subs.append(sub)
        return sub

    def _unsubscribe(self, sub: Subscription) -> None:
        if sub in self._subs:
            self._subs.remove(sub)

    @property
    def subscribers(self) -> int:
        """Open feeds."""
        return len(self._subs)

    # -- snapshot -------------------------------------------------------------------------

    def snapshot(self) -> dict[str, Any]:
        """The whole picture as plain JSON-ready data (what ``/snapshot.json`` serves)."""
        self._flush_curve(force=True)
        return {
            "seq": self._seq,
            "ts_ms": self._stamp_ms,
            "station": dict(self._station),
            "jobs": list(self._jobs),
            "wrenches": {k: dict(v) for k, v in self._wrenches.items()},
            "rundowns": {k: r.to_json() for k, r in self._rundowns.items()},
            "focus": self._focus,
            "results": list(self._results),
            "broker": dict(self._broker),
        }

    def snapshot_message(self) -> Message:
        """The snapshot as a message (sent first, and to a page that fell behind)."""
        snap = self.snapshot()
        return Message("snapshot", self._seq, json.dumps(snap, separators=(",", ":")))

    # -- inputs: station, wrenches, broker ------------------------------------------------

    def on_station(self, view: StationView) -> None:
        """The station's identity, lock and selections changed (or were read at start)."""
        self._stamp()
        jobs = []
        programs: dict[str | None, engine.Program] = {}
        for job in view.jobs:
            programs[job.wrench_id] = job.program
            nxt = next((j.position for j in job.joints if j.state == "pending"), None)
            jobs.append(
                {
                    "wrench_id": job.wrench_id,
                    "part_id": job.part_id,
                    "locked": job.locked,
                    "limits": limits_of(job.program),
                    "joints": [{"position": j.position, "state": j.state} for j in job.joints],
                    "next_position": nxt,
                }
            )
        self._programs = programs
        station = {"id": view.station_id, "name": view.name, "locked": view.locked}
        if station != self._station:
            self._station = station
            self._emit({"type": "station", "value": station})
        if jobs != self._jobs:
            self._jobs = jobs
            self._emit({"type": "jobs", "value": jobs})

    def on_link(
        self,
        wrench_id: str,
        *,
        connected: bool,
        battery_pct: int | None = None,
        calibration: str = "unknown",
        calibration_due: dt.date | None = None,
        torque_max_nm: float | None = None,
        locked: bool = False,
    ) -> None:
        """A wrench's link, battery, calibration or lock changed."""
        self._stamp()
        if battery_pct is not None and not 0 <= battery_pct <= 100:
            raise ViewError(f"{wrench_id}: battery_pct must be 0..100, got {battery_pct}")
        value = {
            "id": wrench_id,
            "connected": connected,
            "battery_pct": battery_pct if connected else None,
            "calibration": calibration,
            "calibration_due": None if calibration_due is None else calibration_due.isoformat(),
            "torque_max_nm": torque_max_nm,
            "locked": locked,
        }
        if self._wrenches.get(wrench_id) != value:
            self._wrenches[wrench_id] = value
            self._emit({"type": "wrench", "value": value})

    def on_wrench_status(self, status: WrenchStatus) -> None:
        """The retained wrench status the worker publishes (``StatusSink`` port)."""
        self.on_link(
            status.wrench_id,
            connected=status.connected,
            battery_pct=status.battery_pct,
            calibration=status.calibration.state.value,
            calibration_due=status.calibration.due_date,
            torque_max_nm=status.torque_max_nm,
            locked=status.locked,
        )

    offer_status = on_wrench_status
    """The worker's ``StatusSink`` port, so the hub can sit beside the MQTT status board."""

    def on_broker(self, connected: bool, backlog: int | None) -> None:
        """The broker connection and the outbox backlog (results not yet acknowledged)."""
        self._stamp()
        if backlog is not None and backlog < 0:
            raise ViewError(f"backlog must be >= 0, got {backlog}")
        value = {"connected": connected, "backlog": backlog}
        if value != self._broker:
            self._broker = value
            self._emit({"type": "broker", "value": value})

    # -- inputs: the rundown ----------------------------------------------------------------

    def on_engine_event(self, wrench_id: str, event: engine.Event, t_host: float) -> None:
        """An event of ``wrench_id``'s engine; ``t_host`` is the host's monotonic stamp of the
        samples that caused it (kept for the record; the message carries the wall time)."""
        del t_host
        self._stamp()
        match event:
            case engine.RundownStarted():
                self._begin(wrench_id, f"{wrench_id}:{event.index}", event.torque_nm)
            case engine.SnugReached():
                self._mark(wrench_id, "snug", 0.0, event.torque_nm)
            case engine.CueFired():
                r = self._rundowns.get(wrench_id)
                torque = r.torque_nm if r is not None else 0.0
                angle = r.angle_deg if r is not None else None
                self._mark(wrench_id, f"cue_{event.kind.value}", angle, torque)
            case engine.StopReached():
                self._mark(wrench_id, "stop", event.angle_deg, event.torque_nm)
            case engine.YieldDetected():
                self._mark(wrench_id, "yield", event.point.angle_deg, event.point.torque_nm)
            case engine.OverTorque():
                r = self._rundowns.get(wrench_id)
                self._mark(wrench_id, "over_torque", r.angle_deg if r else None, event.torque_nm)
            case engine.EngineFault():
                r = self._rundowns.get(wrench_id)
                self._mark(wrench_id, "fault", r.angle_deg if r else None, r.torque_nm if r else 0)
            case engine.RundownFinished():
                res = event.result
                self._finish(
                    wrench_id,
                    status=res.status.value,
                    reasons=[x.value for x in res.reasons],
                    curve=(res.curve_angle_deg, res.curve_torque_nm),
                    snugged=res.snug is not None,
                    final=_pt(
                        res.final_angle_deg if res.snug is not None else None,
                        res.final_torque_nm,
                    ),
                )
            case _:
                raise ViewError(f"{wrench_id}: no view for engine event {type(event).__name__}")

    def on_samples(
        self, wrench_id: str, t_s: ArrayLike, torque_nm: ArrayLike, angle_deg: ArrayLike | None
    ) -> None:
        """Samples of the rundown in progress (one frame, or one sample). ``angle_deg`` is
        the engine's counted angle from snug (``Engine.angle_deg``: one value for the frame's
        last sample, or one per sample), None before snug. Ignored between rundowns."""
        self._stamp()
        torque = np.atleast_1d(np.asarray(torque_nm, dtype=np.float64))
        times = np.atleast_1d(np.asarray(t_s, dtype=np.float64))
        if torque.ndim != 1 or torque.shape != times.shape or torque.shape[0] == 0:
            raise ViewError(f"{wrench_id}: t_s and torque_nm must be equal, non-empty 1-D")
        if not np.isfinite(torque).all():
            raise ViewError(f"{wrench_id}: torque must be finite")
        angle: float | None = None
        if angle_deg is not None:
            a = np.atleast_1d(np.asarray(angle_deg, dtype=np.float64))
            if a.shape not in ((1,), torque.shape) or not np.isfinite(a).all():
                raise ViewError(f"{wrench_id}: angle_deg: one finite value or one per sample")
            angle = float(a[-1])
        r = self._rundowns.get(wrench_id)
        if r is None or r.phase != "running":
            return
        # One point per frame: its last sample (the angle known there). Frames arrive tens of
        # times a second, which is finer than a plot's pixel columns for a hand rundown.
        self._point(r, angle, float(torque[-1]))

    def on_live(self, event: LiveProgress | LiveCue | LiveSnug | LiveStop) -> None:
        """A live event as published over MQTT (the worker's ``LiveSink`` port)."""
        self._stamp()
        wrench_id = event.wrench_id
        r = self._rundowns.get(wrench_id)
        if r is None or r.rundown_id != event.rundown_id:
            self._begin(wrench_id, event.rundown_id, event.torque_nm)
            r = self._rundowns[wrench_id]
        match event:
            case LiveProgress():
                if r.phase == "running":
                    self._point(r, event.angle_deg, event.torque_nm)
            case LiveSnug():
                self._mark(wrench_id, "snug", 0.0, event.torque_nm)
            case LiveCue():
                self._mark(wrench_id, f"cue_{event.cue.value}", r.angle_deg, event.torque_nm)
            case LiveStop():
                self._mark(wrench_id, "stop", event.angle_deg, event.torque_nm)

    publish_live = on_live
    """The worker's ``LiveSink`` port, so the hub can sit beside the MQTT session."""

    def on_result(self, payload: RundownResult) -> None:
        """A judged, stored result: the verdict, the list of recent results, the final curve."""
        self._stamp()
        reasons = [r.value for r in payload.reasons]
        summary: dict[str, Any] = {
            "id": payload.id,
            "wrench_id": payload.wrench.wrench_id,
            "part_id": payload.part_id,
            "joint_position": payload.joint_position,
            "program_id": payload.program.program_id,
            "status": payload.status.value,
            "reasons": reasons,
            "final_torque_nm": round(payload.final_torque_nm, 3),
            "final_angle_deg": _finite_or_none(payload.final_angle_deg),
            "finished_at": payload.finished_at.isoformat(),
        }
        self._results.appendleft(summary)
        wrench_id = payload.wrench.wrench_id
        r = self._rundowns.get(wrench_id)
        if r is not None and r.rundown_id != payload.id and r.phase == "running":
            # Stored while the next rundown already runs: leave its live curve alone.
            self._emit({"type": "result", "value": summary})
            return
        if r is None or (r.rundown_id != payload.id and r.stored):
            # Nothing on screen for it (the view started late, live events were missed).
            self._begin(wrench_id, payload.id, payload.final_torque_nm)
        curve = payload.curve
        self._finish(
            wrench_id,
            status=payload.status.value,
            reasons=reasons,
            curve=(np.asarray(curve.angle_deg), np.asarray(curve.torque_nm)),
            snugged=payload.snug_torque_nm is not None,
            final=_pt(payload.final_angle_deg, payload.final_torque_nm),
            rundown_id=payload.id,
        )
        self._rundowns[wrench_id].stored = True
        self._emit({"type": "result", "value": summary})

    # -- internals --------------------------------------------------------------------------

    def _stamp(self) -> None:
        self._stamp_ms = round(self._wall() * 1000.0, 3)

    def _emit(self, body: dict[str, Any], *, ts_ms: float | None = None) -> None:
        self._seq += 1
        body["seq"] = self._seq
        body["ts_ms"] = self._stamp_ms if ts_ms is None else ts_ms
        message = Message("delta", self._seq, json.dumps(body, separators=(",", ":")))
        self.messages_sent += 1
        for sub in self._subs:
            sub._offer(message)

    def _limits_for(self, wrench_id: str) -> dict[str, Any] | None:
        program = self._programs.get(wrench_id) or self._programs.get(None)
        return None if program is None else limits_of(program)

    def _begin(self, wrench_id: str, rundown_id: str, torque_nm: float) -> None:
        if not math.isfinite(torque_nm):
            raise ViewError(f"{wrench_id}: torque must be finite")
        self._flush_curve(force=True)
        r = _Rundown(wrench_id, rundown_id, self._limits_for(wrench_id))
        r.points.append(_pt(None, torque_nm))
        r.torque_nm = torque_nm
        self._rundowns[wrench_id] = r
        self._focus = wrench_id
        r.sent = len(r.points)
        self._emit({"type": "rundown", "value": r.to_json()})

    def _point(self, r: _Rundown, angle: float | None, torque: float) -> None:
        if not math.isfinite(torque) or (angle is not None and not math.isfinite(angle)):
            raise ViewError(f"{r.wrench_id}: curve point must be finite")
        if r.sent == len(r.points):
            r.pending_ms = self._stamp_ms
        r.points.append(_pt(angle, torque))
        r.torque_nm, r.angle_deg = torque, angle
        if len(r.points) > MAX_LIVE_POINTS:
            # Keep every other point (and the newest); the page gets the whole curve again.
            r.points = [*r.points[-2::-2][::-1], r.points[-1]]
            r.epoch += 1
            r.sent = len(r.points)
            self._emit({"type": "rundown", "value": r.to_json()})
            return
        self._flush_curve(force=False)

    def _flush_curve(self, *, force: bool) -> None:
        """Send unsent points of every rundown, at most every ``CURVE_INTERVAL_S``."""
        now = self._clock()
        due = now - self._last_curve_send
        if not force and due < self._interval:
            self._arm_timer(self._interval - due)
            return
        sent_any = False
        for r in self._rundowns.values():
            if r.sent < len(r.points):
                self._emit(
                    {
                        "type": "points",
                        "wrench_id": r.wrench_id,
                        "id": r.rundown_id,
                        "epoch": r.epoch,
                        "from": r.sent,
                        "points": r.points[r.sent :],
                        "torque_nm": round(r.torque_nm, 4),
                        "angle_deg": _finite_or_none(r.angle_deg),
                    },
                    # The oldest point's stamp: latency is counted from the sample that
                    # waited longest, not from the newest.
                    ts_ms=r.pending_ms,
                )
                r.sent = len(r.points)
                sent_any = True
        if sent_any:
            self._last_curve_send = now
        if self._timer is not None:
            self._timer.cancel()
            self._timer = None

    def _arm_timer(self, delay: float) -> None:
        if self._timer is not None:
            return
        try:
            loop = asyncio.get_running_loop()
        except RuntimeError:
            return  # no loop (a synchronous caller): the next input or snapshot flushes
        self._timer = loop.call_later(delay, self._on_timer)

    def _on_timer(self) -> None:
        self._timer = None
        self._flush_curve(force=True)

    def flush(self) -> None:
        """Send any held curve points now (the timer does this on a running loop)."""
        self._flush_curve(force=True)

    def _mark(self, wrench_id: str, kind: str, angle: float | None, torque: float) -> None:
        r = self._rundowns.get(wrench_id)
        if r is None:
            return  # a marker with no rundown on screen (the view started mid-rundown)
        if not math.isfinite(torque):
            raise ViewError(f"{wrench_id}: {kind}: torque must be finite")
        self._flush_curve(force=True)
        mark = {"kind": kind, "angle_deg": _finite_or_none(angle), "torque_nm": round(torque, 4)}
        r.marks.append(mark)
        self._emit({"type": "mark", "wrench_id": wrench_id, "id": r.rundown_id, "value": mark})

    def _finish(
        self,
        wrench_id: str,
        *,
        status: str,
        reasons: list[str],
        curve: tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]],
        snugged: bool,
        final: list[float | None],
        rundown_id: str | None = None,
    ) -> None:
        r = self._rundowns.get(wrench_id)
        if r is None:
            return
        self._flush_curve(force=True)
        angle, torque = curve
        if angle.shape != torque.shape or angle.ndim != 1:
            raise ViewError(f"{wrench_id}: curve columns differ")
        if angle.shape[0] > RESULT_POINTS:
            idx = lttb_indices(np.arange(angle.shape[0], dtype=np.float64), torque, RESULT_POINTS)
            angle, torque = angle[idx], torque[idx]
        r.points = [_pt(float(a), float(t)) for a, t in zip(angle, torque, strict=True)]
        if not snugged:
            r.points = [[None, p[1]] for p in r.points]
        r.sent = len(r.points)
        r.epoch += 1
        r.phase = "finished"
        r.status, r.reasons, r.final = status, reasons, final
        if rundown_id is not None:
            r.rundown_id = rundown_id
        if r.points:
            r.torque_nm = float(r.points[-1][1] or 0.0)
        self._emit({"type": "rundown", "value": r.to_json()})


_JOINT_STATES: Final[dict[str, Literal["pending", "ok", "nok"]]] = {
    "pending": "pending",
    "ok": "ok",
    "nok": "nok",
}


def station_view(
    station_id: str,
    *,
    name: str = "",
    locked: bool = False,
    jobs: Iterable[tuple[str | None, engine.Program, str, Mapping[str, str], bool]] = (),
) -> StationView:
    """Build a ``StationView`` from plain tuples ``(wrench_id, program, part_id,
    {position: state}, locked)`` (a convenience for adapters and tests)."""
    out = []
    for wrench_id, program, part_id, joints, job_locked in jobs:
        slots = []
        for position, state in joints.items():
            known = _JOINT_STATES.get(state)
            if known is None:
                raise ViewError(f"joint {position}: state must be pending/ok/nok, got {state!r}")
            slots.append(JointView(position=position, state=known))
        out.append(
            JobView(
                wrench_id=wrench_id,
                program=program,
                part_id=part_id,
                joints=tuple(slots),
                locked=job_locked,
            )
        )
    return StationView(station_id=station_id, name=name, locked=locked, jobs=tuple(out))
