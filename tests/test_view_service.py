"""The station view as the supervisor wires it: real station state, a real SQLite outbox behind
the result sink, the real server on 127.0.0.1, and the broker/backlog follower."""

from __future__ import annotations

import asyncio
import contextlib
import io
import json
from pathlib import Path

from view_support import PART, POSITIONS, PROGRAM, STATION, WRENCH, get, play, trace

from clampd.daemon.runtime import AsyncOutbox, OutboxResultSink, StationState
from clampd.daemon.view import ViewHub, ViewService, announce_view
from clampd.protocol import Topics

PREFIX = "tarnwick/bogie/line-1/bg-12"


async def test_the_service_shows_state_results_and_backlog(tmp_path: Path) -> None:
    state = StationState(STATION, {PROGRAM.id: PROGRAM}, {WRENCH: 100.0})
    view = ViewService(STATION, name="bench", broker_poll_s=0.02)
    online = asyncio.Event()
    async with AsyncOutbox(tmp_path / "outbox.sqlite3") as outbox:
        sink = view.results(OutboxResultSink(outbox, Topics(PREFIX)))
        view.watch_state(state)
        task = asyncio.create_task(view.run(online=online.is_set, backlog=outbox.count_unsent))
        try:
            await asyncio.wait_for(view.ready.wait(), 5)
            port = view.server.port
            # ready means serving; the follower's first backlog read may still be under way
            for _ in range(200):
                snap = json.loads((await get(port, "/snapshot.json"))[2])
                if snap["broker"]["backlog"] is not None:
                    break
                await asyncio.sleep(0.02)
            assert snap["jobs"] == []
            assert snap["broker"] == {"connected": False, "backlog": 0}
            # A selection made by command shows at once (the state's listener).
            state.select(program_id=PROGRAM.id, part_id=PART, joint_positions=list(POSITIONS))
            snap = json.loads((await get(port, "/snapshot.json"))[2])
            assert snap["jobs"][0]["part_id"] == PART
            assert snap["jobs"][0]["next_position"] == "S1"
            # A stored result: on the page and in the backlog (nothing is sent here).
            played = await play(ViewHub(STATION), trace(1), position="S1", realtime=False)
            await sink.put_result(played.payload)
            state.record_result(WRENCH, ok=True)
            online.set()
            for _ in range(200):
                snap = json.loads((await get(port, "/snapshot.json"))[2])
                if snap["broker"] == {"connected": True, "backlog": 1}:
                    break
                await asyncio.sleep(0.02)
            assert snap["broker"] == {"connected": True, "backlog": 1}
            assert snap["results"][0]["id"] == played.payload.id
            assert [j["state"] for j in snap["jobs"][0]["joints"]] == [
                "ok",
                "pending",
                "pending",
                "pending",
            ]
        finally:
            task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await task
    assert view.server.streams == 0


async def test_a_view_that_cannot_listen_leaves_the_daemon_running(tmp_path: Path) -> None:
    first = ViewService(STATION)
    online = asyncio.Event()

    async def no_backlog() -> int:
        return 0

    task = asyncio.create_task(first.run(online=online.is_set, backlog=no_backlog))
    try:
        await asyncio.wait_for(first.ready.wait(), 5)
        second = ViewService(STATION, port=first.server.port)
        # run() returns (it does not raise into the supervisor's task group) and says why.
        await asyncio.wait_for(second.run(online=online.is_set, backlog=no_backlog), 5)
        assert second.failed is not None
        assert "cannot listen" in second.failed
        assert not second.ready.is_set()
    finally:
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task


class _Station:
    """What ``announce_view`` reads of the supervisor's ``Station``."""

    def __init__(self, view: ViewService | None) -> None:
        self.view = view


async def test_the_demo_extra_prints_the_pages_address_once_served() -> None:
    out = io.StringIO()
    async with announce_view(_Station(None), None, out=out) as lines:
        assert lines == ["station view: off ([view] enabled = false)"]
    view = ViewService(STATION)
    online = asyncio.Event()

    async def no_backlog() -> int:
        return 0

    task = asyncio.create_task(view.run(online=online.is_set, backlog=no_backlog))
    try:
        async with announce_view(_Station(view), None, out=out) as lines:
            assert lines == [f"station view: {view.url}"]
            assert view.url.startswith("http://127.0.0.1:")
            assert not view.url.endswith(":0/")
            assert out.getvalue() == f"station view: {view.url}\n"
            assert (await get(view.server.port, "/"))[0] == 200
        blocked = ViewService(STATION, port=view.server.port)
        await blocked.run(online=online.is_set, backlog=no_backlog)
        async with announce_view(_Station(blocked), None, out=out, wait_s=0.05) as lines:
            assert lines[0].startswith("station view: not served (view: cannot listen")
    finally:
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
