"""Adapters from the runtime's ports to the view hub: the narrow seam the supervisor wires.

Why here and not in the runtime: the view is optional (``[view] enabled``), and the runtime
should not learn a new shape for it. Each adapter reads a runtime object through the public
surface it already has and calls one ``ViewHub`` method:

- ``station_view_of(state, name=)``: ``StationState`` → ``StationView`` (call it from a
  ``state.subscribe`` listener, and once at start);
- ``ResultTee(sink, hub)``: a ``ResultSink`` that stores first, then shows the result (the
  page never shows a verdict that is not durable);
- ``StatusTee(board, hub)``: ``StatusSink`` and ``LiveSink`` that hand over to the MQTT
  status board and to the hub;
- ``follow_broker(hub, online, backlog)``: a task that polls the broker link and the outbox
  backlog (neither has a change notification) every ``BROKER_POLL_S``.
"""

from __future__ import annotations

import asyncio
from collections.abc import Awaitable, Callable
from typing import TYPE_CHECKING, Final, Protocol

from clampd.daemon.view._hub import JobView, JointView, StationView, ViewHub
from clampd.protocol import LiveCue, LiveProgress, LiveSnug, LiveStop, RundownResult, WrenchStatus

if TYPE_CHECKING:
    from clampd.daemon.runtime._station import StationState

__all__ = [
    "BROKER_POLL_S",
    "BoardPort",
    "ResultSinkPort",
    "ResultTee",
    "StatusTee",
    "follow_broker",
    "station_view_of",
]

# The broker chip and the backlog on the page: a person glancing at it does not notice half a
# second, and a backlog count costs one SQLite query in the outbox thread (our choice).
BROKER_POLL_S: Final = 0.5

LiveEvent = LiveProgress | LiveCue | LiveSnug | LiveStop


class ResultSinkPort(Protocol):
    """The runtime's ``ResultSink`` (durable put)."""

    async def put_result(self, payload: RundownResult) -> bool: ...


class BoardPort(Protocol):
    """The runtime's ``StatusSink`` and ``LiveSink`` (the MQTT status board)."""

    def offer_status(self, status: WrenchStatus) -> None: ...

    def publish_live(self, event: LiveEvent) -> None: ...


def station_view_of(state: StationState, *, name: str = "") -> StationView:
    """The station state as the page shows it: one job per distinct selection in force."""
    seen: set[int] = set()
    jobs: list[JobView] = []
    for wrench_id in state.wrench_ids:
        job = state.job_for(wrench_id)
        if job is None or id(job) in seen:
            continue
        seen.add(id(job))
        jobs.append(
            JobView(
                wrench_id=job.wrench_id,
                program=job.program,
                part_id=job.part_id,
                joints=tuple(
                    JointView(position=j.position, state=j.state.value) for j in job.joints
                ),
                locked=state.is_locked(job.wrench_id) if job.wrench_id else state.station_locked,
            )
        )
    return StationView(
        station_id=state.station_id, name=name, locked=state.station_locked, jobs=tuple(jobs)
    )


class ResultTee:
    """A ``ResultSink``: durable put first (its errors propagate unchanged), then the view."""

    def __init__(self, sink: ResultSinkPort, hub: ViewHub) -> None:
        self._sink = sink
        self._hub = hub

    async def put_result(self, payload: RundownResult) -> bool:
        """Store, then show; True if the result was new (as the wrapped sink says)."""
        new = await self._sink.put_result(payload)
        self._hub.on_result(payload)
        return new


class StatusTee:
    """``StatusSink`` + ``LiveSink``: the MQTT board first, then the view; neither blocks."""

    def __init__(self, board: BoardPort, hub: ViewHub) -> None:
        self._board = board
        self._hub = hub

    def offer_status(self, status: WrenchStatus) -> None:
        """Hand the wrench status to both."""
        self._board.offer_status(status)
        self._hub.on_wrench_status(status)

    def publish_live(self, event: LiveEvent) -> None:
        """Hand the live event to both."""
        self._board.publish_live(event)
        self._hub.on_live(event)


async def follow_broker(
    hub: ViewHub,
    online: Callable[[], bool],
    backlog: Callable[[], Awaitable[int]],
    *,
    interval_s: float = BROKER_POLL_S,
) -> None:
    """Forever: read the broker link and the backlog, tell the hub (it sends only changes)."""
    while True:
        hub.on_broker(online(), await backlog())
        await asyncio.sleep(interval_s)
