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
import dataclasses
import datetime as dt
import json
import random
from collections.abc import AsyncIterator, Iterable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from clampd.daemon.engine import Program, program_from_mapping
from clampd.daemon.runtime import (
    AsyncOutbox,
    BleakWrenchLink,
    Entry,
    NullCuePlayer,
    OutboxResultSink,
    WorkOrder,
    WrenchConfig,
    WrenchWorker,
)
from clampd.daemon.runtime._wrench import LiveEventPayload
from clampd.protocol import (
    Judgement,
    LiveCue,
    LiveSnug,
    RundownResult,
    Topics,
    WrenchStatus,
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
# Torque plus angle: 30 deg after a 10 N*m snug, window 25-35 deg (demo values).
ANGLE_PROGRAM = {
    "id": "cover-m10-angle",
    "strategy": "torque-angle",
    "snug_torque": "10 N*m",
    "target_angle": "30 deg",
    "angle_window": ["25 deg", "35 deg"],
    "torque_window": ["15 N*m", "60 N*m"],
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

    def offer(self, wrench_id: str, event: LiveEventPayload) -> None:
        self.live.append((wrench_id, event))

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
        default_factory=lambda: OperatorParams(
            steady_rate_dps=30.0, part_pause_s=(0.4, 0.6), start_delay_s=0.5
        )
    )
    joints: int = 1
    positions: tuple[str, ...] = ("bolt-1", "bolt-2", "bolt-3")
    config: dict[str, Any] = dataclasses.field(default_factory=dict)
    seed: int = 7


@pytest.fixture
async def rig(request: pytest.FixtureRequest, tmp_path: Path) -> AsyncIterator[Rig]:
    setup: Setup = getattr(request, "param", Setup())
    rng = np.random.default_rng(setup.seed)
    joints: Iterable[JointModel] = [
        JointModel.sample(rng, QUICK_JOINTS) for _ in range(setup.joints)
    ]
    bench = Bench(joints, setup.operator, rng, deflection_deg_per_nm=0.02)
    sensor = VirtualWrenchSensor(SensorParams(serial="SIM-210-A"), rng, bench)
    async with VirtualAir() as air, AsyncOutbox(tmp_path / "outbox.sqlite3") as outbox:
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
    # Status: connected with the battery and serial the wrench reported.
    connected = [s for s in rig.sinks.statuses if s.connected]
    assert connected
    assert connected[-1].battery_pct is not None
    assert connected[-1].serial == "SIM-210-A"
    assert rig.worker.stats.frames_corrupt == 0
    assert len(rig.worker.cue_latency.snapshot()) >= 1
