"""The wrench worker end to end: simulated operator and joint, the virtual wrench as a real GATT
server, unmodified bleak on the bumble backend, the real engine, a real SQLite outbox.

Nothing is faked but the radio (bumble's in-process link). The operator hears only what the
worker writes to the tool's control characteristic (a CUE write, PROFILE.md opcode 0x05): the
station's speaker is a ``NullCuePlayer`` here, so an operator who stops at target proves the
cue travelled over GATT.

Sources beside the checks: protocol/PROFILE.md (frames, cue opcode and patterns), the MQTT
contract in protocol/MQTT.md (reasons, stop triggers, UTC times). The joints are drawn from
the simulator's VDI 2230-based model; the programs are demo values of our own scenario, for
testing software only. Real joints follow the joint designer's specification, local codes and
licensed practice.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import datetime as dt
import json
import random
import time
from collections.abc import AsyncIterator, Awaitable, Callable, Iterable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from clampd.daemon.engine import Program, program_from_mapping
from clampd.daemon.runtime import (
    AsyncOutbox,
    BleakWrenchLink,
    Entry,
    Notification,
    NullCuePlayer,
    OutboxFullError,
    OutboxResultSink,
    WorkOrder,
    WrenchConfig,
    WrenchWorker,
)
from clampd.daemon.runtime._ble import LinkItem
from clampd.daemon.runtime._wrench import LiveEventPayload, WrenchLinkPort
from clampd.protocol import (
    Judgement,
    LiveCue,
    LiveProgress,
    LiveSnug,
    RundownResult,
    Topics,
    WrenchInfo,
    WrenchStatus,
    decode_info,
    encode_start,
    new_uuid7,
)
from clampd.simulators import (
    Bench,
    CuePattern,
    JointModel,
    JointPopulation,
    OperatorParams,
    SensorParams,
    VirtualWrenchSensor,
)
from clampd.simulators.ble import VirtualAir, WrenchIdentity, WrenchPeripheral

# Demo scenario: station "st-210" of an invented gearbox line, cover screws M10 8.8.
STATION = "st-210"
PREFIX = "demo/gearbox/line-1/st-210"
# A torque program for an M10 8.8 joint of the simulator's default population: target well
# below yield (the simulated joints yield near 60-70 N*m), windows of our own demo choice.
TORQUE_PROGRAM = {
    "id": "cover-m10-torque",
    "strategy": "torque",
    "snug_torque": "8 N*m",
    "target_torque": "35 N*m",
    "torque_window": ["31 N*m", "41 N*m"],
    "angle_window": ["3 deg", "90 deg"],
}
# Torque plus angle: 14 deg after a 10 N*m snug, window 11-17 deg; the simulated joints climb
# about 3 N*m per degree after snug, so the target stays below yield (demo values). A short
# timeout ends a rundown released before its target quickly.
ANGLE_PROGRAM = {
    "id": "cover-m10-angle",
    "strategy": "torque-angle",
    "snug_torque": "10 N*m",
    "target_angle": "14 deg",
    "angle_window": ["11 deg", "17 deg"],
    "torque_window": ["15 N*m", "60 N*m"],
    "timeout": "1.5 s",
}
# Short free run-down before the head seats, so a rundown takes about a second of real time
# (the virtual wrench streams in real time).
QUICK_JOINTS = JointPopulation(contact_angle_deg=(15.0, 25.0))


class Station:
    """The station state as the worker sees it (a plain implementation of ``StationPort``):
    a selection of positions worked through in order; only an OK result advances."""

    def __init__(self, program: Program, part_id: str, positions: list[str]) -> None:
        self.program = program
        self.part_id = part_id
        self.positions = positions
        self.next = 0
        self.locked = False
        self.done: list[tuple[str, Judgement]] = []

    def work_order(self, wrench_id: str) -> WorkOrder | None:
        if self.next >= len(self.positions):
            return None
        return WorkOrder(
            program=self.program, part_id=self.part_id, joint_position=self.positions[self.next]
        )

    def is_locked(self, wrench_id: str) -> bool:
        return self.locked

    def position_done(self, wrench_id: str, joint_position: str, status: Judgement) -> None:
        self.done.append((joint_position, status))
        if status is Judgement.OK and self.positions[self.next] == joint_position:
            self.next += 1


@dataclasses.dataclass
class Sinks:
    """Live events and statuses as the MQTT side would receive them."""

    live: list[tuple[str, LiveEventPayload]] = dataclasses.field(default_factory=list)
    statuses: list[WrenchStatus] = dataclasses.field(default_factory=list)

    def publish_live(self, event: LiveEventPayload) -> None:
        self.live.append((event.wrench_id, event))

    def offer_status(self, status: WrenchStatus) -> None:
        self.statuses.append(status)


@dataclasses.dataclass
class Rig:
    air: VirtualAir
    sensor: VirtualWrenchSensor
    bench: Bench
    wrench: WrenchPeripheral
    link: BleakWrenchLink
    worker: WrenchWorker
    station: Station
    sinks: Sinks
    outbox: AsyncOutbox
    task: asyncio.Task[None]

    async def results(self, n: int, timeout_s: float = 30.0) -> list[Entry]:
        """Wait until the outbox holds ``n`` results; return them in append order."""
        async with asyncio.timeout(timeout_s):
            while True:
                entries = await self.outbox.list()
                if len(entries) >= n:
                    return sorted(entries, key=lambda e: e.seq)
                await asyncio.sleep(0.05)

    async def until(self, condition: Callable[[], bool], timeout_s: float = 20.0) -> None:
        """Wait until ``condition()`` holds (polled: the rig has no event for everything)."""
        async with asyncio.timeout(timeout_s):
            while True:
                if condition():
                    return
                await asyncio.sleep(0.01)

    async def parts_done(self, n: int, timeout_s: float = 10.0) -> None:
        """Wait until the simulated operator has finished ``n`` parts."""
        async with asyncio.timeout(timeout_s):
            while True:
                if self.bench.parts_done >= n:
                    return
                await asyncio.sleep(0.05)


def payload_of(entry: Entry) -> RundownResult:
    return RundownResult.model_validate_json(entry.payload, strict=False)


def wrench_config(address: str, **extra: Any) -> WrenchConfig:
    return WrenchConfig.model_validate(
        {
            "id": "w-210-a",
            "address": address,
            "torque_max": "100 N*m",
            "calibration_due": "2099-01-31",
            **extra,
        }
    )


@dataclasses.dataclass
class Setup:
    program: dict[str, Any] = dataclasses.field(default_factory=lambda: dict(TORQUE_PROGRAM))
    operator: OperatorParams = dataclasses.field(
        # A technician who listens for the verdict and pulls again when the tool has not said
        # done (the stop cue aims at the target, so about half of all stops fall just short);
        # one who walks away instead leaves the rundown open until its timeout.
        default_factory=lambda: OperatorParams(
            steady_rate_dps=30.0, part_pause_s=(0.4, 0.6), start_delay_s=0.5, confirm_wait_s=1.0
        )
    )
    joints: int = 1
    positions: tuple[str, ...] = ("bolt-1", "bolt-2", "bolt-3")
    config: dict[str, Any] = dataclasses.field(default_factory=dict)
    seed: int = 7
    outbox_cap_bytes: int | None = None


@pytest.fixture
async def rig(request: pytest.FixtureRequest, tmp_path: Path) -> AsyncIterator[Rig]:
    setup: Setup = getattr(request, "param", Setup())
    rng = np.random.default_rng(setup.seed)
    joints: Iterable[JointModel] = [
        JointModel.sample(rng, QUICK_JOINTS) for _ in range(setup.joints)
    ]
    bench = Bench(joints, setup.operator, rng, deflection_deg_per_nm=0.02)
    sensor = VirtualWrenchSensor(SensorParams(serial="SIM-210-A"), rng, bench)
    options = {} if setup.outbox_cap_bytes is None else {"size_cap_bytes": setup.outbox_cap_bytes}
    async with VirtualAir() as air, AsyncOutbox(tmp_path / "outbox.sqlite3", **options) as outbox:
        wrench = await air.add_wrench(
            sensor, name="W-210A", identity=WrenchIdentity(serial="SIM-210-A")
        )
        config = wrench_config(wrench.address, **setup.config)
        link = BleakWrenchLink(
            config.address,
            wrench_id=config.id,
            allowed=[config.address],
            bleak_kwargs=air.bleak_kwargs(),
            connect_timeout_s=1.0,
        )
        station = Station(program_from_mapping(setup.program), "GB-0042", list(setup.positions))
        sinks = Sinks()
        worker = WrenchWorker(
            config,
            station_id=STATION,
            link=link,
            station=station,
            results=OutboxResultSink(outbox, Topics(PREFIX)),
            live=sinks,
            status=sinks,
            cues=NullCuePlayer(),
            rng=random.Random(setup.seed),
        )
        task = asyncio.create_task(worker.run(), name="clampd[w-210-a].link")
        try:
            yield Rig(air, sensor, bench, wrench, link, worker, station, sinks, outbox, task)
        finally:
            task.cancel()
            with pytest.raises(asyncio.CancelledError):
                await task


async def test_operator_stops_on_the_tool_cue_and_the_result_is_ok_and_durable(rig: Rig) -> None:
    (entry,) = await rig.results(1)
    result = payload_of(entry)
    assert result.status is Judgement.OK, result.reasons
    assert result.reasons == []
    # Identity and traceability from the station context.
    assert (result.station, result.wrench.wrench_id, result.wrench.serial) == (
        STATION,
        "w-210-a",
        "SIM-210-A",
    )
    assert (result.program.program_id, result.program.version) == ("cover-m10-torque", 1)
    assert (result.part_id, result.joint_position) == ("GB-0042", "bolt-1")
    assert result.stop_trigger.value == "torque_reached"
    assert 31.0 <= result.final_torque_nm <= 41.0  # the program's window
    # The outbox row is the durable record: journal columns and the result topic
    # (MQTT.md: {prefix}/result, QoS 1).
    assert entry.topic == f"{PREFIX}/result"
    assert (entry.station, entry.wrench, entry.program, entry.part_id, entry.status) == (
        STATION,
        "w-210-a",
        "cover-m10-torque",
        "GB-0042",
        "OK",
    )
    assert json.loads(entry.payload)["id"] == entry.id
    # The operator heard the stop cue from the tool (GATT write) and stopped because of it.
    patterns = [p for _, p, _ in rig.sensor.cues]
    assert CuePattern.STOP in patterns
    await rig.parts_done(1)
    assert rig.bench.stop_reasons[0] == "stop-cue"
    # After the rundown the tool also got the OK pattern.
    assert CuePattern.OK in patterns
    # The station advanced to the next position only after the durable put.
    assert rig.station.done == [("bolt-1", Judgement.OK)]
    assert rig.station.next == 1
    # Times are UTC and the rundown took a plausible wall time.
    assert result.started_at.utcoffset() == dt.timedelta(0)
    assert dt.timedelta(0) < result.finished_at - result.started_at < dt.timedelta(seconds=20)
    # Live events: snug then the cues, all carrying the result's id.
    kinds = [type(ev).__name__ for _, ev in rig.sinks.live]
    assert "LiveSnug" in kinds
    assert "LiveStop" in kinds
    assert {ev.rundown_id for _, ev in rig.sinks.live} == {result.id}
    cue_events = [ev for _, ev in rig.sinks.live if isinstance(ev, LiveCue)]
    assert [c.cue.value for c in cue_events][-1] == "stop"
    snug = next(ev for _, ev in rig.sinks.live if isinstance(ev, LiveSnug))
    assert snug.torque_nm >= 8.0
    # Progress after snug carries the angle counted so far; it ends near the final angle
    # (the final angle is taken at the peak torque; 0.5 deg allows the last turning samples).
    angles = [
        ev.angle_deg
        for _, ev in rig.sinks.live
        if isinstance(ev, LiveProgress) and ev.angle_deg is not None
    ]
    assert angles
    assert result.final_angle_deg is not None
    assert max(angles) <= result.final_angle_deg + 0.5
    assert angles == sorted(angles)  # counted angle never decreases
    # Status: connected with the battery and serial the wrench reported.
    connected = [s for s in rig.sinks.statuses if s.connected]
    assert connected
    assert connected[-1].battery_pct is not None
    assert connected[-1].serial == "SIM-210-A"
    assert rig.worker.stats.frames_corrupt == 0
    assert len(rig.worker.cue_latency.snapshot()) >= 1


@pytest.mark.parametrize(
    "rig",
    [
        Setup(
            program=dict(ANGLE_PROGRAM),
            # Ignores every cue and stops by feel soon after snug: far short of the window.
            operator=OperatorParams(
                steady_rate_dps=30.0, ignore_cues=True, stop_at_torque_nm=11.0, start_delay_s=0.5
            ),
        )
    ],
    indirect=True,
)
async def test_operator_who_ignores_cues_and_stops_short_is_nok_angle_low(rig: Rig) -> None:
    (entry,) = await rig.results(1)
    result = payload_of(entry)
    assert result.status is Judgement.NOK
    assert "angle_low" in {r.value for r in result.reasons}
    assert result.final_angle_deg is not None
    assert result.final_angle_deg < 11.0  # below the window's minimum
    assert result.windows is not None
    assert (result.windows.angle_min_deg, result.windows.angle_max_deg) == (11.0, 17.0)
    assert result.strategy.value == "torque_angle"
    assert entry.status == "NOK"
    # A NOK result is stored and reported, but the position stays to be redone.
    assert rig.station.done == [("bolt-1", Judgement.NOK)]
    assert rig.station.next == 0
    assert CuePattern.NOK in [p for _, p, _ in rig.sensor.cues]


# The operator listens for the verdict and pulls again when none comes (a stop just short of
# the target would otherwise leave the redone joint open until its timeout).
_LISTENS = OperatorParams(
    steady_rate_dps=30.0, part_pause_s=(0.4, 0.6), start_delay_s=0.5, confirm_wait_s=1.0
)


@pytest.mark.parametrize("rig", [Setup(joints=2, operator=_LISTENS)], indirect=True)
async def test_link_lost_mid_rundown_is_nok_with_partial_curve_and_the_link_comes_back(
    rig: Rig,
) -> None:
    # Drop the radio once torque is past snug (the live snug event says so).
    await rig.until(lambda: any(isinstance(ev, LiveSnug) for _, ev in rig.sinks.live))
    await rig.wrench.go_out_of_range()
    (lost,) = await rig.results(1)
    first = payload_of(lost)
    assert first.status is Judgement.NOK
    # The loss ends it; the windows are judged on what was reached (short of them here).
    assert first.reasons[0].value == "link_lost"
    assert first.stop_trigger.value == "link_lost"
    assert first.snug_torque_nm is not None
    assert first.peak_torque_nm >= 8.0  # the partial curve up to the loss is kept
    assert first.curve.raw_sample_count > 10
    assert max(first.curve.torque_nm) == pytest.approx(first.peak_torque_nm)
    assert rig.worker.stats.links_lost == 1
    assert any(not s.connected for s in rig.sinks.statuses[1:])
    assert rig.station.done == [("bolt-1", Judgement.NOK)]

    # Back in range: the reconnect loop finds it without help. The operator finishes the
    # interrupted joint (judged on its own, whatever it shows), then the next joint is OK.
    await rig.wrench.come_back_in_range()
    ok: RundownResult | None = None
    async with asyncio.timeout(60):
        while ok is None:
            entries = await rig.results(len(await rig.outbox.list()) + 1, timeout_s=60.0)
            ok = next((r for r in map(payload_of, entries[1:]) if r.status is Judgement.OK), None)
    assert ok.joint_position == "bolt-1"  # the NOK position is redone first
    assert rig.link.connections == 2
    assert rig.wrench.connections == 2
    assert rig.sinks.statuses[-1].connected


@pytest.mark.parametrize("rig", [Setup()], indirect=True)
async def test_corrupt_notifications_are_counted_and_the_worker_keeps_judging(rig: Rig) -> None:
    await rig.until(lambda: rig.worker.stats.frames >= 5)
    # Injected at the seam, on top of the real connection (PROFILE.md "must" rules broken):
    bad = [
        b"",  # empty
        b"\x02" + bytes(19),  # version 2
        b"\x01\x00",  # shorter than the header
        bytes.fromhex("01000000000000000000e8030200000ad7233ccdcccc3d"),  # count 2, no samples
        bytes.fromhex("0110000000000000e80301000ad7233ccdcccc3d0000000000000000"),  # reserved flag
    ]
    for data in bad:
        rig.link.inject(Notification(time.monotonic(), data))
    (entry,) = await rig.results(1)
    assert rig.worker.stats.frames_corrupt == len(bad)
    assert payload_of(entry).status is Judgement.OK
    assert rig.task.done() is False


@pytest.mark.parametrize("rig", [Setup()], indirect=True)
async def test_locked_tool_gets_the_locked_cue_and_its_rundown_is_recorded_nok(rig: Rig) -> None:
    rig.station.locked = True
    (entry,) = await rig.results(1)
    result = payload_of(entry)
    assert result.status is Judgement.NOK
    assert "aborted" in {r.value for r in result.reasons}
    assert CuePattern.LOCKED in [p for _, p, _ in rig.sensor.cues]
    assert rig.station.next == 0
    assert any(s.locked for s in rig.sinks.statuses)


@pytest.mark.parametrize(
    "rig",
    [Setup(config={"calibration_due": "2020-01-31", "block_when_calibration_overdue": True})],
    indirect=True,
)
async def test_overdue_calibration_is_flagged_and_blocks_when_configured(rig: Rig) -> None:
    (entry,) = await rig.results(1)
    result = payload_of(entry)
    assert result.status is Judgement.NOK
    assert "calibration_overdue" in {r.value for r in result.reasons}
    assert result.wrench.calibration.state.value == "overdue"
    assert result.wrench.calibration.due_date == dt.date(2020, 1, 31)
    assert rig.sinks.statuses[-1].calibration.state.value == "overdue"
    assert CuePattern.LOCKED in [p for _, p, _ in rig.sensor.cues]


@pytest.mark.parametrize(
    "rig",
    [Setup(config={"calibration_due": "2020-01-31", "block_when_calibration_overdue": False})],
    indirect=True,
)
async def test_overdue_calibration_without_blocking_is_only_flagged(rig: Rig) -> None:
    (entry,) = await rig.results(1)
    result = payload_of(entry)
    assert result.status is Judgement.OK, result.reasons
    assert result.wrench.calibration.state.value == "overdue"


@pytest.mark.parametrize("rig", [Setup()], indirect=True)
async def test_abort_request_ends_the_rundown_nok_aborted(rig: Rig) -> None:
    assert rig.worker.request_abort() is False  # nothing in progress yet
    await rig.until(lambda: any(isinstance(ev, LiveSnug) for _, ev in rig.sinks.live))
    assert rig.worker.request_abort() is True
    (entry,) = await rig.results(1)
    result = payload_of(entry)
    assert result.reasons[0].value == "aborted"
    assert result.stop_trigger.value == "aborted"


@pytest.mark.parametrize("rig", [Setup(outbox_cap_bytes=256 * 1024)], indirect=True)
async def test_a_result_refused_by_a_full_outbox_is_held_and_stored_once_room_is_made(
    rig: Rig,
) -> None:
    # The broker has been away: unsent results fill the outbox up to its cap (real refusals).
    filler: list[str] = []
    with contextlib.suppress(OutboxFullError):
        while True:
            rid = new_uuid7()
            await rig.outbox.put(rid, f"{PREFIX}/result", b"x" * 20_000, status="OK")
            filler.append(rid)
    assert filler
    await rig.until(lambda: rig.worker.stats.rundowns >= 1 and rig.worker.unstored_results == 1)
    await asyncio.sleep(0.2)
    # Held, not dropped, and the position is not advanced before the result is durable.
    assert rig.worker.unstored_results == 1
    assert rig.worker.stats.results_stored == 0
    assert rig.station.done == []
    # The flusher gets PUBACKs for the backlog: sent rows may be evicted, the retry fits.
    for rid in filler:
        await rig.outbox.mark_sent(rid)
    await rig.until(lambda: rig.worker.stats.results_stored == 1, timeout_s=10)
    assert rig.worker.unstored_results == 0
    stored = [e for e in await rig.outbox.list() if e.wrench == "w-210-a"]
    assert len(stored) == 1
    assert payload_of(stored[0]).joint_position == "bolt-1"
    assert rig.station.done == [("bolt-1", payload_of(stored[0]).status)]


@pytest.mark.parametrize("rig", [Setup(joints=2)], indirect=True)
async def test_a_program_change_applies_from_the_next_rundown_only(rig: Rig) -> None:
    await rig.until(lambda: any(isinstance(ev, LiveSnug) for _, ev in rig.sinks.live))
    # Mid-rundown: the MES selects another program; this rundown keeps the one it started with.
    rig.station.program = program_from_mapping({**TORQUE_PROGRAM, "id": "cover-m10-rework"})
    entries = await rig.results(2, timeout_s=40.0)
    first, second = (payload_of(e) for e in entries)
    assert first.program.program_id == "cover-m10-torque"
    assert second.program.program_id == "cover-m10-rework"


@pytest.mark.parametrize("rig", [Setup(positions=())], indirect=True)
async def test_with_nothing_selected_torque_gets_the_locked_cue_and_no_result(
    rig: Rig, blockbuster: object
) -> None:
    await rig.until(lambda: CuePattern.LOCKED in [p for _, p, _ in rig.sensor.cues])
    assert rig.worker.stats.samples_unassigned > 0
    assert rig.worker.stats.rundowns == 0
    assert await rig.outbox.list() == []
    assert rig.worker.engine is None  # no program, no engine: nothing to judge against


# Frames handed over without letting the loop run, at most: 2 000 frames of 22 samples at
# 1 kHz are 44 s of sensor time, far more than the operator's pause between parts.
_HELD_FRAMES_MAX = 2_000


class FramesLink:
    """The link port without a radio: the simulated sensor's v1 frames handed to the worker as
    fast as it takes them; cue writes go back to the sensor (where the simulated operator
    hears them). Only the radio is left out. ``hold(n)`` is asked before each frame whether
    to let the event loop run first (True) or hand the frame over at once (False)."""

    address = "F0:00:00:00:02:10"
    battery_pct: int | None = None

    def __init__(self, sensor: VirtualWrenchSensor, hold: Callable[[], bool]) -> None:
        self._sensor = sensor
        self._hold = hold
        self.info: WrenchInfo | None = decode_info(sensor.info_value())
        sensor.on_control(encode_start())

    @property
    def connected(self) -> bool:
        return True

    async def notifications(self, *, idle_s: float | None = None) -> AsyncIterator[LinkItem]:
        while True:
            if self._hold():
                await asyncio.sleep(0)  # one loop turn: the worker's results task runs
            data, _span = self._sensor.next_notification()
            yield Notification(time.monotonic(), data)

    async def write_control(self, data: bytes) -> None:
        self._sensor.on_control(data)

    async def connect_forever(
        self, serve: Callable[[WrenchLinkPort], Awaitable[None]], *, rng: random.Random | None
    ) -> None:
        await serve(self)


async def test_a_rundown_started_while_the_last_result_is_mapped_gets_the_next_position(
    tmp_path: Path,
) -> None:
    # The first result is mapped to its payload in a thread before it is stored; the station
    # advances to the next joint position only once it is stored. The second rundown is made
    # to start exactly then: its frames are handed over without letting the loop run, so the
    # mapping cannot finish first. It must still be recorded at the next position.
    rng = np.random.default_rng(7)
    bench = Bench(
        [JointModel.sample(rng, QUICK_JOINTS) for _ in range(2)],
        # Stops by feel (the frames come faster than real time, so the engine's cue timing
        # does not apply): past the 35 N*m target after a reaction time, inside the window.
        OperatorParams(
            steady_rate_dps=30.0,
            part_pause_s=(0.4, 0.6),
            start_delay_s=0.2,
            ignore_cues=True,
            stop_at_torque_nm=31.0,
        ),
        rng,
        deflection_deg_per_nm=0.02,
    )
    sensor = VirtualWrenchSensor(SensorParams(serial="SIM-210-A"), rng, bench)
    # The demo torque program with room above for a stop by feel (demo values).
    program = program_from_mapping({**TORQUE_PROGRAM, "torque_window": ["31 N*m", "55 N*m"]})
    station = Station(program, "GB-0042", ["bolt-1", "bolt-2"])
    sinks = Sinks()
    worker: WrenchWorker | None = None
    phase = "first"  # -> "mapping" (first result in the thread) -> "second"
    held: list[int] = []  # frames handed over while the loop was held
    stored = asyncio.Event()

    def hold() -> bool:
        nonlocal phase
        assert worker is not None
        if worker.stats.results_stored >= 2:
            stored.set()
        # Finished and taken off the queue, not yet handed to the outbox: being mapped.
        if (
            phase == "first"
            and worker.stats.rundowns == 1
            and not worker.in_rundown
            and worker.unstored_results == 0
            and worker.stats.results_stored == 0
        ):
            phase = "mapping"
        if phase == "mapping":
            held.append(1)
            if not worker.in_rundown and len(held) < _HELD_FRAMES_MAX:
                return False  # keep the loop from running until the second rundown starts
            phase = "second" if worker.in_rundown else "gave up"
        return True

    async with AsyncOutbox(tmp_path / "outbox.sqlite3") as outbox:
        config = wrench_config(FramesLink.address)
        worker = WrenchWorker(
            config,
            station_id=STATION,
            link=FramesLink(sensor, hold),
            station=station,
            results=OutboxResultSink(outbox, Topics(PREFIX)),
            live=sinks,
            status=sinks,
            cues=NullCuePlayer(),
        )
        task = asyncio.create_task(worker.run(), name="clampd[w-210-a].link")
        try:
            async with asyncio.timeout(60):
                await stored.wait()
        finally:
            task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await task
        entries = sorted(await outbox.list(), key=lambda e: e.seq)
    assert phase == "second", "the second rundown never started while the first was mapped"
    first, second = (payload_of(e) for e in entries[:2])
    assert first.status is Judgement.OK, first.reasons  # only an OK result advances (Station)
    assert (first.joint_position, second.joint_position) == ("bolt-1", "bolt-2")
    assert station.done[:2] == [("bolt-1", Judgement.OK), ("bolt-2", second.status)]
