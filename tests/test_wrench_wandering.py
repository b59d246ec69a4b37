"""A wrench that keeps leaving radio range and coming back, under the running station.

The station supervisor (the code ``clampd run`` starts) runs in this process against the
real mosquitto and the demo scenario's two virtual GATT wrenches. Wrench wr-07 drops its
link three times in the middle of a rundown (a supervision timeout, as a radio would) and
once while idle; each time it comes back on its own and the next joint is tightened on it.
Checked against the published contract and the design rules, not against the code:

- a rundown cut by a lost link is NOK with reason ``link_lost`` and stop trigger
  ``link_lost``, and keeps its partial curve (DESIGN.md, judgement: "a partial rundown, a
  lost link ... is NOK, never silently OK"; protocol/MQTT.md reason codes);
- a loss while idle produces no result (nothing was tightened, nothing is invented);
- the link is re-established by the wrench's own reconnect loop: the worker is never
  restarted or parked, and the other wrench is never disturbed;
- every later rundown is judged on its own (OK inside the program's windows here);
- every result is stored in the outbox exactly once and reaches the MES exactly once
  (protocol/MQTT.md: ids are unique; QoS 1 may repeat, which a clean run does not).

The station, programs and joints are the demo scenario's invented data, for testing
software only; real joints follow the joint designer's specification, local codes and
licensed practice.
"""

from __future__ import annotations

import asyncio
from collections.abc import AsyncIterator
from pathlib import Path

import pytest
from test_e2e_station import Live, station_in_process

from clampd.daemon.runtime import Outbox
from clampd.simulators import OperatorParams
from clampd.simulators._broker import LocalBroker
from clampd.simulators._mes import ReceivedResult
from clampd.simulators._station_rig import eventually, wait_for_status

WRENCH = "wr-07"
STATUS = f"wrench/{WRENCH}/status"
LOSSES_IN_RUNDOWN = 3
# A slow pull (deg/s) so that the cut lands well inside the rundown, as in the end-to-end
# link-loss test; the scenario's technician pulls at 30 deg/s (simulators/scenario).
SLOW_PULL_DPS = 20.0


@pytest.fixture
def journal(tmp_path: Path) -> Path:
    return tmp_path / "journal" / "outbox.sqlite3"


@pytest.fixture
async def running(
    broker: LocalBroker, topic_prefix: str, tmp_path: Path, journal: Path
) -> AsyncIterator[Live]:
    async with station_in_process(broker, topic_prefix, tmp_path, journal, seed=23) as live:
        yield live
        live.stop.set()
        async with asyncio.timeout(30):
            await live.task
        assert live.station.unsent_at_stop == 0


@pytest.mark.slow
async def test_a_wrench_that_keeps_leaving_and_returning_loses_no_result(
    running: Live, journal: Path
) -> None:
    mes, rig = running.mes, running.rig
    slot = running.station.slots[WRENCH]
    worker = slot.worker
    wrench = rig.wrenches[WRENCH]
    positions = [f"spindle-bolt-{i}" for i in range(1, 2 * LOSSES_IN_RUNDOWN + 2)]
    reply = await mes.select_program(
        "spindle-m10-8.8", "DK48-2026-000977", positions, wrench_id=WRENCH
    )
    assert reply["status"] == "ok", reply
    got: list[ReceivedResult] = []

    async def leave_and_return() -> None:
        await wrench.go_out_of_range()
        await wait_for_status(mes, STATUS, lambda s: s.get("connected") is False)
        await wrench.come_back_in_range()
        await wait_for_status(mes, STATUS, lambda s: s.get("connected") is True)

    # Once while idle: nothing was tightened, so no result may appear.
    await leave_and_return()
    for _ in range(LOSSES_IN_RUNDOWN):
        rig.hand_over(WRENCH, OperatorParams(steady_rate_dps=SLOW_PULL_DPS))
        await eventually(lambda: worker.in_rundown)
        await asyncio.sleep(0.3)  # well into the rundown (snug is reached within ~0.1 s)
        await wrench.go_out_of_range()
        rig.techs[WRENCH].put_down()  # the tool went dark: the technician lets go
        lost = await running.next_result()
        got.append(lost)
        p = lost.payload
        assert p is not None
        assert lost.valid, lost.errors
        assert p["status"] == "NOK"
        assert "link_lost" in p["reasons"]
        assert p["stop_trigger"] == "link_lost"
        assert p["curve"]["raw_sample_count"] > 0  # the partial curve is kept
        await wait_for_status(mes, STATUS, lambda s: s.get("connected") is False)
        await wrench.come_back_in_range()
        await wait_for_status(mes, STATUS, lambda s: s.get("connected") is True)
        # Back on its own: the next joint is judged on its own merits.
        rig.hand_over(WRENCH)
        again = await running.next_result()
        got.append(again)
        q = again.payload
        assert q is not None
        assert again.valid, again.errors
        assert "link_lost" not in q["reasons"]
        assert q["status"] == "OK", q["reasons"]
    # Each result took the next position: a lost joint is marked NOK and the station moves on.
    assert [r.payload["joint_position"] for r in got if r.payload] == positions[: len(got)]
    # The link came back through the wrench's own reconnect loop every time.
    assert slot.restarts == 0
    assert slot.parked is None
    assert running.station.slots["wr-11"].restarts == 0
    # Every result stored exactly once, all sent, and the MES saw each id exactly once.
    # The journal file has no event to wait on: poll it off the loop (a bound, not a timing).
    async with asyncio.timeout(60):
        while not await asyncio.to_thread(_all_sent, journal, len(got)):  # noqa: ASYNC110
            await asyncio.sleep(0.05)
    stored, sound = await asyncio.to_thread(_stored, journal)
    assert sound  # PRAGMA integrity_check (sqlite.org/pragma.html)
    assert sorted(stored) == sorted(r.id for r in got if r.id)
    assert len(set(stored)) == len(stored) == 2 * LOSSES_IN_RUNDOWN
    await asyncio.sleep(0.5)  # a repeat, if any, would arrive now
    assert not mes.duplicates
    assert [r.id for r in mes.unique_results()] == [r.id for r in got]


def _stored(journal: Path) -> tuple[list[str], bool]:
    with Outbox(journal, create=False) as ob:
        return [e.id for e in ob.iter_all()], ob.integrity_ok()


def _all_sent(journal: Path, n: int) -> bool:
    with Outbox(journal, create=False) as ob:
        entries = ob.list(limit=100, newest_first=False)
    return len(entries) == n and all(e.sent for e in entries)
