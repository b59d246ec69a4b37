"""The station runtime as a technician and an MES meet it: what a walk through ``clampd run``
and ``clampd check-config`` showed, checked against the real parts.

Nothing is faked but the radio: the real mosquitto (fixture ``broker``), the virtual GATT wrench
on bumble's in-process link with unmodified bleak on top, the real daemon (``Station``), a real
SQLite outbox. Where a sensor speaks a declarative profile, the test serves that profile from a
real bumble GATT server of its own (the simulator's wrench serves profile v1 only).

Sources beside the checks:
- protocol/MQTT.md (our published contract): the retained ``wrench/<id>/status`` carries
  ``locked``; a station-wide lock (``wrench_id`` null) locks every wrench; reason codes;
- protocol/PROFILE.md (our sensor profile): frame flag bits ``OVERLOAD`` and
  ``GYRO_SATURATED``, the info record's rated torque;
- protocol/profiles/bench-stick.toml (our example declarative profile): its UUIDs and layout;
- the D-Bus specification, "Well-known Message Bus Instances": the system bus address is
  read from ``DBUS_SYSTEM_BUS_ADDRESS`` (from memory), which is where BlueZ is reached.
The station, programs and joints are demo data of an invented scenario, for testing software
only; real joints follow the joint designer's specification, local codes and licensed practice.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import numpy as np

from clampd.daemon.runtime import NullCuePlayer, parse_config
from clampd.daemon.runtime._supervisor import Station
from clampd.simulators import (
    Bench,
    OperatorParams,
    SensorParams,
    VirtualWrenchSensor,
)
from clampd.simulators._broker import LocalBroker
from clampd.simulators._mes import MesStandIn
from clampd.simulators._station_rig import wait_for_status
from clampd.simulators.ble import VirtualAir, WrenchIdentity

# Demo scenario: Harrow Vale Cycles (invented), frame shop, station fs-40: a wheel-hub
# bench with one wireless wrench in reach and a second one out at calibration.
STATION_ID = "fs-40"
PRESENT = "w-040-a"
AWAY = "w-040-b"
AWAY_ADDRESS = "C0:DE:00:00:40:0B"


def station_toml(prefix: str, broker_url: str, outbox: Path, wrenches: str) -> str:
    return f"""
[station]
id = "{STATION_ID}"
name = "Frame shop, hub bench 40 (demo)"
topic_prefix = "{prefix}"

[broker]
url = "{broker_url}"

{wrenches}

[[program]]
id = "hub-m8"
strategy = "torque"
snug_torque = "6 N*m"
target_torque = "22 N*m"
torque_window = ["19 N*m", "25 N*m"]
angle_window = ["2 deg", "120 deg"]

[cues]
output = "none"

[outbox]
path = "{outbox}"

[view]
enabled = false
"""


def wrench_table(wrench_id: str, address: str, **extra: str) -> str:
    lines = [
        "[[wrench]]",
        f'id = "{wrench_id}"',
        f'address = "{address}"',
        'torque_max = "100 N*m"',
        "calibration_due = 2099-01-31",
        *(f"{k} = {v}" for k, v in extra.items()),
    ]
    return "\n".join(lines) + "\n"


@contextlib.asynccontextmanager
async def running_station(
    broker: LocalBroker, prefix: str, text: str, bleak_kwargs: dict[str, Any]
) -> AsyncIterator[tuple[Station, MesStandIn]]:
    """``Station(config).run(stop)`` (what ``clampd run`` starts) and the MES stand-in."""
    config = parse_config(text, env={}).config
    station = Station(
        config, bleak_kwargs=lambda _w: dict(bleak_kwargs), cue_player=NullCuePlayer()
    )
    stop = asyncio.Event()
    task = asyncio.create_task(station.run(stop), name="clampd.test.station")
    try:
        async with MesStandIn(broker.host, broker.port, prefix) as mes:
            await wait_for_status(mes, "status", lambda s: s.get("state") == "online", 30)
            yield station, mes
    finally:
        stop.set()
        async with asyncio.timeout(30):
            await task


def idle_sensor(seed: int, **params: Any) -> VirtualWrenchSensor:
    """A wrench lying on the bench: streaming, nobody pulling on it."""
    rng = np.random.default_rng(seed)
    bench = Bench([], OperatorParams(), rng)
    return VirtualWrenchSensor(SensorParams(serial="SIM-040-A", **params), rng, bench)


def status_topic(wrench_id: str) -> str:
    return f"wrench/{wrench_id}/status"


# -- 1. a lock shows in the wrench status -------------------------------------------------


async def test_lock_and_unlock_republish_the_retained_wrench_status(
    broker: LocalBroker, topic_prefix: str, tmp_path: Path
) -> None:
    async with VirtualAir() as air:
        wrench = await air.add_wrench(
            idle_sensor(40), name="W-040A", identity=WrenchIdentity(serial="SIM-040-A")
        )
        text = station_toml(
            topic_prefix,
            broker.url,
            tmp_path / "outbox.sqlite3",
            wrench_table(PRESENT, wrench.address) + wrench_table(AWAY, AWAY_ADDRESS),
        )
        async with running_station(broker, topic_prefix, text, air.bleak_kwargs()) as (_, mes):
            # One wrench connected and streaming, one out of reach (never connected).
            await wait_for_status(
                mes, status_topic(PRESENT), lambda s: s.get("connected") is True, 30
            )
            await wait_for_status(mes, status_topic(AWAY), lambda s: "locked" in s, 30)
            for w in (PRESENT, AWAY):
                assert mes.statuses[f"{topic_prefix}/{status_topic(w)}"]["locked"] is False

            # Per wrench: only that wrench's status says locked (MQTT.md, lock command).
            reply = await mes.lock(PRESENT, reason="torque audit")
            assert reply["status"] == "ok", reply
            await wait_for_status(mes, status_topic(PRESENT), lambda s: s["locked"] is True, 10)
            away = mes.statuses[f"{topic_prefix}/{status_topic(AWAY)}"]
            assert away["locked"] is False

            # Station-wide (wrench_id null): every wrench, connected or not.
            reply = await mes.lock(None, reason="shift change")
            assert reply["status"] == "ok", reply
            await wait_for_status(mes, status_topic(AWAY), lambda s: s["locked"] is True, 10)

            # Unlock of all lifts every lock (MQTT.md, unlock command).
            reply = await mes.unlock(None)
            assert reply["status"] == "ok", reply
            for w in (PRESENT, AWAY):
                await wait_for_status(mes, status_topic(w), lambda s: s["locked"] is False, 10)
