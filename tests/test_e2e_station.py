"""The whole station end to end: real mosquitto, the virtual GATT wrench, the real daemon.

Nothing is faked but the radio. The simulated technician tightens only what he is handed
and stops only on the cue the station writes to the tool's control characteristic; the MES
stand-in selects work by MQTT command and checks every result against the JSON Schema that
``clampd schema`` prints. The SIGKILL test runs ``clampd run`` as a real subprocess that
joins the test's virtual link through a TCP HCI hub.

Sources beside the checks:
- protocol/MQTT.md (our published contract): OK exactly when ``reasons`` is empty, reason
  codes, at-least-once delivery de-duplicated on ``id``, error codes of refused commands,
  retained ``status`` and its ``offline`` form;
- the program's own windows as published in the result (judgement rule: inside every window
  and no fault, DESIGN.md);
- sd_notify(3) for READY=1 / STOPPING=1; SIGKILL per POSIX (no handler runs).
The station, programs and joints are the demo scenario's invented data, for testing software
only; real joints follow the joint designer's specification, local codes and licensed practice.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import json
import signal
import socket
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from clampd.daemon.runtime import NullCuePlayer, Outbox, parse_config
from clampd.daemon.runtime._config import StationConfig
from clampd.daemon.runtime._demo import Technician, load_scenario
from clampd.daemon.runtime._supervisor import Station
from clampd.simulators import OperatorParams
from clampd.simulators import _station_rig as station_rig
from clampd.simulators._broker import LocalBroker
from clampd.simulators._mes import MesStandIn, ReceivedResult
from clampd.simulators._station_rig import (
    WrenchRig,
    daemon_process,
    eventually,
    kill_daemon,
    station_overrides,
    stop_daemon,
    wait_for_status,
    wait_until_ready,
)

SCENARIO = load_scenario()
GROUPS = {g.wrench_id: g for g in SCENARIO.groups}
# The scenario's wrenches in the order of its station file, with their rated torque
# (simulators/scenario/station.toml, torque_max).
CAPACITY_NM = {"wr-07": 100.0, "wr-11": 40.0}


def technician(rng: np.random.Generator) -> Technician:
    """The demo's technician; his wrench's deflection as in the scenario's station file."""
    return Technician(rng, deflection_deg_per_nm=0.02)


def virtual_wrenches(seed: int = 11) -> contextlib.AbstractAsyncContextManager[WrenchRig]:
    """Both scenario wrenches on a virtual link, each with a technician waiting for work."""
    return station_rig.virtual_wrenches(GROUPS, CAPACITY_NM, technician, seed=seed)


@dataclasses.dataclass
class Live:
    rig: WrenchRig
    station: Station
    mes: MesStandIn
    results: asyncio.Queue[ReceivedResult]
    stop: asyncio.Event
    task: asyncio.Task[None]

    async def next_result(self, timeout_s: float = 60.0) -> ReceivedResult:
        async with asyncio.timeout(timeout_s):
            return await self.results.get()


@contextlib.asynccontextmanager
async def station_in_process(
    broker: LocalBroker, prefix: str, base_dir: Path, journal: Path, seed: int = 11
) -> AsyncIterator[Live]:
    """The daemon in this process (the code ``clampd run`` starts), the MES beside it; the
    station is stopped at the end of the block unless the block stopped it already."""
    async with virtual_wrenches(seed) as rig:
        env = station_overrides(
            prefix=prefix, broker_url=broker.url, journal=journal, addresses=rig.addresses
        )
        config: StationConfig = parse_config(
            SCENARIO.station_toml, env=env, base_dir=base_dir
        ).config
        # One central per wrench, as a station with one radio per tool would have: the two
        # connects never wait for each other.
        centrals = {w: await rig.air.add_central() for w in rig.wrenches}
        station = Station(
            config,
            bleak_kwargs=lambda w: centrals[w.id].bleak_kwargs(),
            cue_player=NullCuePlayer(),
        )
        stop = asyncio.Event()
        results: asyncio.Queue[ReceivedResult] = asyncio.Queue()
        task = asyncio.create_task(station.run(stop), name="clampd.test.station")
        try:
            async with MesStandIn(
                broker.host, broker.port, prefix, on_result=results.put_nowait
            ) as mes:
                await wait_until_ready(mes, rig.wrenches)
                yield Live(rig, station, mes, results, stop, task)
        finally:
            stop.set()
            async with asyncio.timeout(30):
                await task


@pytest.fixture
async def live(broker: LocalBroker, topic_prefix: str, tmp_path: Path) -> AsyncIterator[Live]:
    """The daemon in this process, the MES beside it, the journal in the test's folder."""
    async with station_in_process(
        broker, topic_prefix, tmp_path, tmp_path / "journal.sqlite3"
    ) as live:
        yield live


def inside_windows(result: dict[str, Any]) -> bool:
    """The judgement rule applied by the test itself to the published figures."""
    w = result["windows"]
    torque, angle = result["final_torque_nm"], result["final_angle_deg"]
    return (
        w["torque_min_nm"] <= torque <= w["torque_max_nm"]
        and angle is not None
        and w["angle_min_deg"] <= angle <= w["angle_max_deg"]
    )


# -- select → tighten → result on the broker ----------------------------------------------------


async def test_selected_program_gives_ok_for_a_good_joint_and_nok_out_of_window(
    live: Live,
) -> None:
    mes = live.mes
    reply = await mes.select_program(
        "spindle-m10-8.8",
        "DK48-2026-000901",
        ["spindle-bolt-1", "spindle-bolt-2"],
        wrench_id="wr-07",
    )
    assert reply["status"] == "ok", reply
    status = await wait_for_status(mes, "status", lambda s: s.get("selection") is not None)
    assert status["selection"]["next_position"] == "spindle-bolt-1"

    # A good joint: the technician stops on the tool's cue.
    live.rig.hand_over("wr-07")
    good = await live.next_result()
    assert good.valid, good.errors
    p = good.payload
    assert p is not None
    assert (p["part_id"], p["joint_position"], p["program"]["program_id"]) == (
        "DK48-2026-000901",
        "spindle-bolt-1",
        "spindle-m10-8.8",
    )
    assert p["strategy"] == "torque_angle"
    assert p["stop_trigger"] == "angle_reached"
    assert p["status"] == "OK", p["reasons"]
    assert p["reasons"] == []
    assert inside_windows(p)
    tech = live.rig.techs["wr-07"]
    await eventually(lambda: bool(tech.stop_reasons), 10)
    assert tech.stop_reasons[0] == "stop-cue"  # heard over GATT, nowhere else

    # Forced out of its window: deaf to the cues, he pulls on to 85 deg from the first
    # contact, which is 36-52 deg past snug on these joints (window 17-24 deg).
    live.rig.hand_over(
        "wr-07",
        OperatorParams(steady_rate_dps=30.0, ignore_cues=True, stop_at_angle_deg=85.0),
    )
    bad = await live.next_result()
    assert bad.valid, bad.errors
    q = bad.payload
    assert q is not None
    assert q["joint_position"] == "spindle-bolt-2"
    assert q["status"] == "NOK"
    assert not inside_windows(q)
    assert "angle_high" in q["reasons"]
    # Exactly these two results, once each.
    assert [r.id for r in mes.unique_results()] == [good.id, bad.id]
    assert not mes.duplicates


async def test_bad_and_unauthorised_commands_get_error_replies_and_the_station_goes_on(
    live: Live,
) -> None:
    mes = live.mes
    cmd = f"{mes.prefix}/cmd"
    cases: list[tuple[str, bytes, dict[str, Any], str]] = [
        (f"{cmd}/select_program", b"{not json", {}, "bad_json"),
        (f"{cmd}/select_program", b"[" * 100 + b"]" * 100, {}, "too_deep"),
        (f"{cmd}/select_program", b"\xff\xfe", {}, "bad_encoding"),
        (f"{cmd}/self_destruct", b"{}", {}, "unknown_command"),
        (
            f"{cmd}/select_program",
            json.dumps({"schema_version": "1", "program_id": 7}).encode(),
            {},
            "invalid_fields",
        ),
        # A reply topic inside the station's own tree: refused (MQTT.md, reply topics).
        (
            f"{cmd}/ping",
            b'{"schema_version": "1"}',
            {"response_topic": f"{mes.prefix}/result"},
            "bad_reply_topic",
        ),
        # A lock dressed up as a ping, and a schema from the future.
        (f"{cmd}/ping", b'{"schema_version": "1", "kind": "lock"}', {}, "kind_mismatch"),
        (f"{cmd}/lock", b'{"schema_version": "2"}', {}, "unsupported_version"),
    ]
    for topic, payload, extra, code in cases:
        reply = await mes.send_raw(topic, payload, **extra)
        assert (reply["status"], reply["code"]) == ("error", code), (topic, payload[:20], reply)
    refused = [
        (await mes.select_program("no-such-program", "P-1", ["a"]))["code"],
        (await mes.select_program("spindle-m10-8.8", "P-1", ["a"], wrench_id="wr-99"))["code"],
        (await mes.abort("wr-07"))["code"],
    ]
    assert refused == ["unknown_program", "unknown_wrench", "nothing_to_abort"]
    # None of the refused commands changed anything: nothing is locked, and it answers.
    pong = await mes.ping()
    assert pong["status"] == "ok"
    status = await wait_for_status(mes, "status", lambda s: s.get("state") == "online")
    assert status["locked"] is False
    # And it still does its job: a rundown after all that is judged and delivered.
    ok = await mes.select_program("guard-m8-torque", "P-2", ["guard-screw-1"], wrench_id="wr-11")
    assert ok["status"] == "ok"
    live.rig.hand_over("wr-11")
    result = await live.next_result()
    assert result.valid
    assert result.payload is not None
    assert result.payload["joint_position"] == "guard-screw-1"


async def test_link_dropped_mid_rundown_is_nok_link_lost_and_the_link_comes_back(
    live: Live,
) -> None:
    mes = live.mes
    reply = await mes.select_program(
        "spindle-m10-8.8",
        "DK48-2026-000902",
        ["spindle-bolt-1", "spindle-bolt-2"],
        wrench_id="wr-07",
    )
    assert reply["status"] == "ok"
    worker = live.station.slots["wr-07"].worker
    wrench = live.rig.wrenches["wr-07"]
    live.rig.hand_over("wr-07", OperatorParams(steady_rate_dps=20.0))
    await eventually(lambda: worker.in_rundown)
    await asyncio.sleep(0.3)  # well into the rundown
    await wrench.go_out_of_range()
    live.rig.techs["wr-07"].put_down()  # the tool went dark: the technician lets go
    lost = await live.next_result()
    assert lost.payload is not None
    assert lost.valid, lost.errors
    assert lost.payload["status"] == "NOK"
    assert "link_lost" in lost.payload["reasons"]
    assert lost.payload["stop_trigger"] == "link_lost"
    assert lost.payload["curve"]["raw_sample_count"] > 0  # the partial curve is kept
    await wait_for_status(mes, "wrench/wr-07/status", lambda s: s.get("connected") is False)
    await wrench.come_back_in_range()
    await wait_for_status(mes, "wrench/wr-07/status", lambda s: s.get("connected") is True)
    # The station marked the lost position NOK and moved on; the next joint is judged again.
    live.rig.hand_over("wr-07")
    again = await live.next_result()
    assert again.payload is not None
    assert again.payload["joint_position"] == "spindle-bolt-2"
    assert again.payload["status"] == "OK", again.payload["reasons"]


# -- SIGKILL between the durable write and the publish ----------------------------------------


@contextlib.asynccontextmanager
async def notify_socket(path: Path) -> AsyncIterator[list[str]]:
    """An sd_notify socket read continuously (a datagram queue holds only a few messages:
    net.unix.max_dgram_qlen is 10 by default, and the watchdog pets would fill it)."""
    got: list[str] = []
    with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as sock:
        sock.bind(str(path))
        sock.setblocking(False)
        loop = asyncio.get_running_loop()

        async def read() -> None:
            while True:
                got.append((await loop.sock_recv(sock, 4096)).decode())

        task = asyncio.create_task(read())
        try:
            yield got
        finally:
            task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await task


def journal_entries(path: Path) -> list[Any]:
    if not path.exists():  # never create the daemon's journal from the test
        return []
    with Outbox(path) as ob:
        return ob.list(limit=100, newest_first=False)


async def wait_journal(path: Path, check: Any, timeout_s: float = 60.0) -> list[Any]:
    async with asyncio.timeout(timeout_s):
        while True:
            entries = await asyncio.to_thread(journal_entries, path)
            if check(entries):
                return entries
            await asyncio.sleep(0.1)


def vm_rss_kib(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    raise AssertionError("no VmRSS")


@pytest.mark.slow
async def test_result_written_but_not_published_survives_sigkill_exactly_once(
    broker: LocalBroker, topic_prefix: str, tmp_path: Path
) -> None:
    config = tmp_path / "station.toml"
    config.write_text(SCENARIO.station_toml)
    journal = tmp_path / "journal" / "outbox.sqlite3"
    log = tmp_path / "daemon.log"
    async with virtual_wrenches(seed=5) as rig, rig.hub() as hub:
        env = station_overrides(
            prefix=topic_prefix, broker_url=broker.url, journal=journal, addresses=rig.addresses
        )
        async with notify_socket(tmp_path / "notify.sock") as notes:
            env["NOTIFY_SOCKET"] = str(tmp_path / "notify.sock")
            # A 0.6 s watchdog: the daemon pets every 0.2 s while its loop turns (sd_notify(3)).
            env["WATCHDOG_USEC"] = "600000"
            async with daemon_process(config, hub.spec, env, log) as daemon:
                async with MesStandIn(broker.host, broker.port, topic_prefix) as mes:
                    await wait_until_ready(mes, rig.wrenches)
                    assert any(n.startswith("READY=1") for n in notes)
                    ready_before_kill = len([n for n in notes if n.startswith("READY=1")])
                    rss_kib = vm_rss_kib(daemon.pid)  # two wrenches connected and streaming
                    reply = await mes.select_program(
                        "guard-m8-torque", "DK48-2026-000903", ["guard-screw-1"], wrench_id="wr-11"
                    )
                    assert reply["status"] == "ok"
                # The broker goes away; the result can be written but not published.
                await broker.stop()
                rig.hand_over("wr-11")
                entries = await wait_journal(journal, lambda es: len(es) == 1)
                assert not entries[0].sent
                written_id = entries[0].id
                assert await kill_daemon(daemon) == -signal.SIGKILL
            # Back up: broker first, the MES listening, then the daemon again.
            await broker.start()
            async with (
                MesStandIn(broker.host, broker.port, topic_prefix) as mes,
                daemon_process(config, hub.spec, env, log) as daemon,
            ):
                (result,) = await mes.wait_results(1, timeout_s=60)
                assert result.id == written_id
                assert result.valid, result.errors
                await wait_journal(journal, lambda es: all(e.sent for e in es))
                # A little longer: nothing else may arrive (exactly one delivery).
                await asyncio.sleep(1.0)
                assert [r.id for r in mes.results] == [written_id]
                assert await stop_daemon(daemon) == 0
                status = await wait_for_status(mes, "status", lambda s: s.get("state") == "offline")
                assert status["state"] == "offline"
            # Both runs said READY; the watchdog was petted; only the clean stop said STOPPING.
            assert len([n for n in notes if n.startswith("READY=1")]) == ready_before_kill + 1
            assert "WATCHDOG=1" in notes
            assert notes.count("STOPPING=1") == 1
    # Resident memory of `clampd run` with two wrenches, for the report (-s shows it).
    print(f"\nclampd run VmRSS with two wrenches streaming: {rss_kib / 1024:.1f} MiB")
    assert rss_kib > 0


# -- isolation and shutdown ------------------------------------------------------------------


async def test_a_wrench_that_vanishes_does_not_stop_the_other(live: Live) -> None:
    mes = live.mes
    await live.rig.wrenches["wr-11"].go_out_of_range()
    await wait_for_status(mes, "wrench/wr-11/status", lambda s: s.get("connected") is False)
    reply = await mes.select_program(
        "spindle-m10-8.8", "DK48-2026-000904", ["spindle-bolt-1"], wrench_id="wr-07"
    )
    assert reply["status"] == "ok"
    live.rig.hand_over("wr-07")
    result = await live.next_result()
    assert result.payload is not None
    assert result.payload["status"] == "OK", result.payload["reasons"]
    # Its link task keeps retrying on its own and the daemon never stopped.
    assert not live.task.done()
    assert live.station.slots["wr-11"].restarts == 0
    assert live.station.slots["wr-11"].parked is None


async def test_stop_during_a_rundown_lets_it_finish_flushes_and_says_offline(
    live: Live,
) -> None:
    mes = live.mes
    reply = await mes.select_program(
        "guard-m8-torque", "DK48-2026-000905", ["guard-screw-1"], wrench_id="wr-11"
    )
    assert reply["status"] == "ok"
    worker = live.station.slots["wr-11"].worker
    live.rig.hand_over("wr-11")
    await eventually(lambda: worker.in_rundown)
    live.stop.set()  # what SIGTERM does in `clampd run`
    async with asyncio.timeout(30):
        await live.task
    # The rundown in progress was finished (not cut off), stored, and flushed before exit.
    result = await live.next_result(timeout_s=10)
    assert result.payload is not None
    assert result.payload["joint_position"] == "guard-screw-1"
    assert result.payload["status"] == "OK", result.payload["reasons"]
    assert live.station.unsent_at_stop == 0
    status = await wait_for_status(mes, "status", lambda s: s.get("state") == "offline")
    assert status["state"] == "offline"


# -- clampd run refuses bad input ---------------------------------------------------------------


@pytest.mark.parametrize(
    ("text", "extra", "message"),
    [
        ("[station]\nid = 'st 1'\n", [], "station.id: String should match pattern"),
        (None, ["--ble-hci", "carrier-pigeon:coop"], "--ble-hci carrier-pigeon:coop"),
    ],
    ids=["bad-config", "bad-hci-spec"],
)
def test_run_refuses_bad_input_with_one_line(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    text: str | None,
    extra: list[str],
    message: str,
) -> None:
    from clampd.daemon.cli import main

    config = tmp_path / "station.toml"
    if text is None:
        # A valid station whose broker is never reached: the HCI spec fails first.
        text = SCENARIO.station_toml.replace(
            'path = "journal/outbox.sqlite3"', f'path = "{tmp_path / "j.sqlite3"}"'
        )
    config.write_text(text)
    assert main(["run", "--config", str(config), *extra]) == 2
    err = capsys.readouterr().err
    assert err.startswith("clampd run: ")
    assert message in err
    assert err.count("\n") == 1
    if text.startswith("[station]"):
        assert "(and 3 more)" in err  # name, topic_prefix and broker are missing too
    assert not (tmp_path / "j.sqlite3").exists()  # nothing started, nothing written


async def test_a_worker_that_fails_is_restarted_alone(live: Live) -> None:
    """A bug escaping one wrench's worker (injected once, on top of the real connection)
    restarts that worker only; the other wrench and the daemon never notice."""
    mes = live.mes
    slot = live.station.slots["wr-11"]
    worker = slot.worker
    failed = asyncio.Event()

    def fail_once(item: object) -> None:
        if not failed.is_set():
            failed.set()
            raise RuntimeError("injected fault in the worker")

    original = worker._handle

    async def handle(item: Any) -> None:
        fail_once(item)
        await original(item)

    worker._handle = handle  # type: ignore[method-assign]
    await eventually(lambda: slot.restarts == 1)
    worker._handle = original  # type: ignore[method-assign]
    # The other wrench went on working throughout.
    reply = await mes.select_program(
        "spindle-m10-8.8", "DK48-2026-000906", ["spindle-bolt-1"], wrench_id="wr-07"
    )
    assert reply["status"] == "ok"
    live.rig.hand_over("wr-07")
    first = await live.next_result()
    assert first.payload is not None
    assert first.payload["status"] == "OK", first.payload["reasons"]
    # The restarted wrench reconnects and is judged again.
    await wait_for_status(mes, "wrench/wr-11/status", lambda s: s.get("connected") is True)
    reply = await mes.select_program(
        "guard-m8-torque", "DK48-2026-000906", ["guard-screw-1"], wrench_id="wr-11"
    )
    assert reply["status"] == "ok"
    live.rig.hand_over("wr-11")
    second = await live.next_result()
    assert second.payload is not None
    assert second.payload["wrench"]["wrench_id"] == "wr-11"
    assert second.payload["status"] == "OK", second.payload["reasons"]
    assert live.station.slots["wr-07"].restarts == 0
    assert not live.task.done()


async def test_each_result_updates_the_retained_quality_statistics(
    live: Live, broker: LocalBroker, topic_prefix: str
) -> None:
    import aiomqtt

    from clampd.protocol import QualityStats

    reply = await live.mes.select_program(
        "spindle-m10-8.8", "DK48-2026-000902", ["spindle-bolt-1"], wrench_id="wr-07"
    )
    assert reply["status"] == "ok", reply
    live.rig.hand_over("wr-07")
    result = await live.next_result()
    assert result.valid, result.errors
    # A subscriber arriving afterwards gets the group's statistics: the topic is retained.
    topic = f"{topic_prefix}/stats/spindle-m10-8.8/wr-07"
    async with aiomqtt.Client(broker.host, broker.port) as client:
        await client.subscribe(topic, qos=1)
        async with asyncio.timeout(20):
            message = await anext(aiter(client.messages))
    assert message.retain
    assert isinstance(message.payload, bytes)
    stats = QualityStats.model_validate_json(message.payload)
    assert (stats.program_id, stats.wrench_id, stats.count) == ("spindle-m10-8.8", "wr-07", 1)
    assert stats.ok_count + stats.nok_count == 1
