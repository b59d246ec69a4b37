"""The station view as one service the supervisor starts: hub, server and the runtime adapters.

Why a service object: the supervisor should wire the view with a handful of lines and no
knowledge of its insides. ``ViewService`` owns the ``ViewHub`` and the ``ViewServer`` and
hands out the adapters that sit on the runtime's existing ports:

.. code-block:: python

    view = ViewService(station_id, name=..., bind=cfg.view.bind, port=cfg.view.port)
    sink = view.results(OutboxResultSink(outbox, topics))     # ResultSink: store, then show
    board = view.board(status_board)                          # StatusSink + LiveSink
    view.watch_state(station_state)                           # selections, joints, locks
    tg.create_task(view.run(online=..., backlog=flusher.backlog), name="clampd.view")
    await view.ready.wait(); view.url                         # the page's address

``announce_view`` is the ``clampd demo`` extra that prints that address.

The view is optional: when it cannot listen (address in use, assets missing) ``run`` logs
the reason and returns, and the daemon goes on without it — a station must tighten even when
its screen cannot be served.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import sys
from collections.abc import AsyncIterator, Awaitable, Callable
from typing import TYPE_CHECKING, Protocol, TextIO

from clampd.daemon.view._feeds import (
    BROKER_POLL_S,
    BoardPort,
    ResultSinkPort,
    ResultTee,
    StatusTee,
    follow_broker,
    station_view_of,
)
from clampd.daemon.view._hub import ViewHub
from clampd.daemon.view._server import ViewServer, ViewServerError

if TYPE_CHECKING:
    from clampd.daemon.runtime._station import StateChange, StationState

__all__ = ["HasView", "ViewService", "announce_view"]

_log = logging.getLogger(__name__)


class ViewService:
    """Hub, server and adapters of the station view (see the module docstring)."""

    def __init__(
        self,
        station_id: str,
        *,
        name: str = "",
        bind: str = "127.0.0.1",
        port: int = 0,
        broker_poll_s: float = BROKER_POLL_S,
    ) -> None:
        self.hub = ViewHub(station_id, name=name)
        self.server = ViewServer(self.hub, host=bind, port=port)
        self._name = name
        self._poll_s = broker_poll_s
        self._unsubscribe: Callable[[], None] | None = None
        self.ready = asyncio.Event()
        """Set once the page is served (``url`` is then final)."""
        self.failed: str | None = None
        """Why the view is not served, when it could not start."""

    @property
    def url(self) -> str:
        """The page's address (the bound port once ``ready`` is set)."""
        return self.server.url

    def results(self, sink: ResultSinkPort) -> ResultTee:
        """Wrap the durable result sink: a result is shown once it is stored."""
        return ResultTee(sink, self.hub)

    def board(self, board: BoardPort) -> StatusTee:
        """Wrap the status board: wrench status and live events go to both."""
        return StatusTee(board, self.hub)

    def watch_state(self, state: StationState) -> None:
        """Show the station state now and after every change."""
        if self._unsubscribe is not None:
            self._unsubscribe()

        def changed(change: StateChange) -> None:
            del change
            self.hub.on_station(station_view_of(state, name=self._name))

        self.hub.on_station(station_view_of(state, name=self._name))
        self._unsubscribe = state.subscribe(changed)

    async def run(
        self, *, online: Callable[[], bool], backlog: Callable[[], Awaitable[int]]
    ) -> None:
        """Serve the page and follow the broker until cancelled (see the module docstring)."""
        try:
            await self.server.start()
        except ViewServerError as exc:
            self.failed = str(exc)
            _log.error("station view not served: %s", exc)
            return
        self.ready.set()
        try:
            await follow_broker(self.hub, online, backlog, interval_s=self._poll_s)
        finally:
            await self.server.close()
            if self._unsubscribe is not None:
                self._unsubscribe()
                self._unsubscribe = None


class HasView(Protocol):
    """A station that may serve the view (``Station.view``)."""

    @property
    def view(self) -> ViewService | None:
        """The station's view service, None when ``[view] enabled = false``."""
        ...


@contextlib.asynccontextmanager
async def announce_view(
    station: HasView, mes: object, *, out: TextIO | None = None, wait_s: float = 5.0
) -> AsyncIterator[list[str]]:
    """A ``clampd demo`` extra: print the page's address as soon as it is served, and give
    the line for the closing report. ``mes`` is unused (the extra's signature)."""
    del mes
    view = station.view
    if view is None:
        yield ["station view: off ([view] enabled = false)"]
        return
    try:
        async with asyncio.timeout(wait_s):
            await view.ready.wait()
    except TimeoutError:
        yield [f"station view: not served ({view.failed or 'did not start'})"]
        return
    line = f"station view: {view.url}"
    print(line, file=out if out is not None else sys.stdout, flush=True)
    yield [line]
