"""The result flusher: outbox (real SQLite file) → session → real mosquitto → MES subscriber.

External references used below:
- MQTT Version 5.0, OASIS Standard (2019): §4.3.2 (QoS 1: at least once; the sender may
  send again, so duplicates are allowed and must be tolerated), §4.6 (message ordering: a
  server forwards a client's messages on one topic in the order received, for the same
  QoS), §3.1.2.4 + §3.1.2.11.2 (Clean Start 0 with a Session Expiry Interval keeps the
  subscriber's session, so the broker queues QoS 1 messages for it while it is offline).
- Measured on these machines (../shared/NOTES-ble-mqtt.md): a persistent MQTT 5 session needs
  both Clean Start 0 and the Session Expiry Interval property, and mosquitto keeps it across
  its own restart when persistence is on (the fixture's config).

The check of "delivered, in order, none lost": the MES's received result ids, with repeats
removed keeping the first arrival, equal the order the results were put into the outbox.

Demo scenario: Brackenfield Garden Machines, mower deck assembly, station 120 (invented).
"""

from __future__ import annotations

import asyncio
import random
from collections.abc import AsyncIterator
from pathlib import Path

import aiomqtt
import pytest
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from clampd.daemon.runtime import AsyncOutbox, BrokerConfig, MqttSession, ResultFlusher
from clampd.protocol import RundownResult, Topics, new_uuid7
from clampd.simulators._broker import LocalBroker

EXAMPLE = Path(__file__).resolve().parents[1] / "protocol" / "examples" / "RundownResult.json"
STATION = "st-120"
# One hour: far longer than any outage in these tests (MQTT 5.0 §3.1.2.11.2).
SESSION_EXPIRY_S = 3600


def _result(n: int) -> RundownResult:
    base = RundownResult.model_validate_json(EXAMPLE.read_bytes())
    return base.model_copy(update={"id": new_uuid7(), "part_id": f"DK-{n:04d}"})


async def _put(outbox: AsyncOutbox, topics: Topics, n: int) -> str:
    r = _result(n)
    await outbox.put(r.id, topics.result(), r.to_json_bytes(), part_id=r.part_id)
    return r.id


def _mes_client(broker: LocalBroker, ident: str) -> aiomqtt.Client:
    """An MES subscriber with a persistent session (Clean Start 0 + Session Expiry)."""
    props = Properties(PacketTypes.CONNECT)  # type: ignore[no-untyped-call]
    props.SessionExpiryInterval = SESSION_EXPIRY_S
    return aiomqtt.Client(
        broker.host,
        broker.port,
        identifier=ident,
        protocol=aiomqtt.ProtocolVersion.V5,
        clean_start=False,
        properties=props,
    )


class Mes:
    """Collects result ids as the MES receives them (repeats kept, for inspection)."""

    def __init__(self, client: aiomqtt.Client, topic: str) -> None:
        self.client = client
        self.topic = topic
        self.ids: list[str] = []
        self.changed = asyncio.Event()

    def unique(self) -> list[str]:
        return list(dict.fromkeys(self.ids))  # first arrival of each id, in arrival order

    async def wait_for(self, ids: list[str], timeout_s: float) -> None:
        async with asyncio.timeout(timeout_s):
            while not set(ids) <= set(self.ids):
                self.changed.clear()
                await self.changed.wait()

    async def listen(self) -> None:
        """Read until the connection drops (MqttError ends the iteration)."""
        try:
            async for msg in self.client.messages:
                self.ids.append(RundownResult.model_validate_json(bytes(msg.payload)).id)
                self.changed.set()
        except aiomqtt.MqttError:
            return


@pytest.fixture
async def outbox(tmp_path: Path) -> AsyncIterator[AsyncOutbox]:
    async with AsyncOutbox(tmp_path / "outbox.db") as ob:
        yield ob


def _session(broker: LocalBroker, topics: Topics) -> MqttSession:
    return MqttSession(
        BrokerConfig(url=broker.url),
        topics,
        station_id=STATION,
        client_id=f"clampd-{topics.prefix.replace('/', '-')}",
        rng=random.Random(11),
    )


async def test_delivers_in_order_and_marks_each_sent(
    broker: LocalBroker, topic_prefix: str, outbox: AsyncOutbox
) -> None:
    topics = Topics(topic_prefix)
    before = [await _put(outbox, topics, n) for n in range(20)]
    mes = Mes(_mes_client(broker, f"mes-{topic_prefix}"), topics.result())
    async with (
        _session(broker, topics) as session,
        mes.client,
        asyncio.TaskGroup() as tg,
    ):
        await mes.client.subscribe(topics.result(), qos=1)
        listener = tg.create_task(mes.listen())
        flusher = ResultFlusher(outbox, session, rng=random.Random(1))
        runner = tg.create_task(flusher.run())
        await asyncio.wait_for(flusher.wait_sent(20), 30)
        after = [await _put(outbox, topics, n) for n in range(20, 30)]
        await mes.wait_for(before + after, 30)
        await asyncio.wait_for(flusher.wait_sent(30), 30)
        runner.cancel()
        listener.cancel()
    assert mes.unique() == before + after
    assert await flusher.backlog() == 0
    for rid in before + after:
        entry = await outbox.get(rid)
        assert entry is not None
        assert entry.sent_at is not None
        assert entry.sent_at >= entry.created_at
    stats = flusher.stats()
    assert stats.sent == 30
    assert stats.failures == 0
    assert stats.latency_p50_s is not None
    assert stats.latency_p99_s is not None
    assert 0.0 <= stats.latency_p50_s <= stats.latency_p99_s <= (stats.latency_max_s or 0.0)
    assert len(flusher.latencies()) == 30


async def test_broker_stopped_while_streaming_loses_nothing_and_keeps_order(
    broker: LocalBroker, topic_prefix: str, outbox: AsyncOutbox
) -> None:
    """The broker goes away with results in flight (a PUBACK may never come): the flusher
    resumes from the first unsent result after the reconnect. Repeats are allowed (QoS 1,
    MQTT 5.0 §4.3.2), losses and reordering are not."""
    topics = Topics(topic_prefix)
    ids = [await _put(outbox, topics, n) for n in range(300)]
    mes = Mes(_mes_client(broker, f"mes-{topic_prefix}"), topics.result())
    session = _session(broker, topics)
    flusher = ResultFlusher(outbox, session, rng=random.Random(3))
    async with session, asyncio.TaskGroup() as tg:
        async with mes.client:
            await mes.client.subscribe(topics.result(), qos=1)
            listener = tg.create_task(mes.listen())
            runner = tg.create_task(flusher.run(), name="test.flusher")
            await asyncio.wait_for(flusher.wait_sent(50), 30)
            await broker.stop()
            await listener
        unsent_while_down = await outbox.count_unsent()
        await broker.start()
        async with mes.client:
            listener = tg.create_task(mes.listen())
            await asyncio.wait_for(flusher.wait_sent(300), 120)
            await mes.wait_for(ids, 60)
            runner.cancel()
            listener.cancel()
    assert 0 < unsent_while_down <= 250
    assert mes.unique() == ids
    assert await outbox.count_unsent() == 0
    assert flusher.sent == 300


@pytest.mark.slow
async def test_broker_down_for_30_s_mid_shift_loses_nothing_and_keeps_order(
    broker: LocalBroker, topic_prefix: str, outbox: AsyncOutbox
) -> None:
    """Results put while the broker is stopped for 30 s are all delivered after it returns,
    in put order, and none is marked sent before the broker took it."""
    topics = Topics(topic_prefix)
    mes = Mes(_mes_client(broker, f"mes-{topic_prefix}"), topics.result())
    session = _session(broker, topics)
    flusher = ResultFlusher(outbox, session, rng=random.Random(2))
    async with session, asyncio.TaskGroup() as tg:
        runner = tg.create_task(flusher.run(), name="test.flusher")
        async with mes.client:
            await mes.client.subscribe(topics.result(), qos=1)
            listener = tg.create_task(mes.listen())
            await asyncio.wait_for(session.wait_online(), 10)
            shift = [await _put(outbox, topics, n) for n in range(10)]
            await mes.wait_for(shift, 30)
            await asyncio.wait_for(flusher.wait_sent(10), 30)
            await broker.stop()  # SIGTERM: mosquitto saves the MES's session and queue
            await listener
        # Mid-shift outage of 30 s: one result a second, none can be delivered.
        outage: list[str] = []
        for n in range(10, 40):
            outage.append(await _put(outbox, topics, n))
            await asyncio.sleep(1.0)
        assert await outbox.count_unsent() == 30
        assert flusher.sent == 10
        for rid in outage:
            entry = await outbox.get(rid)
            assert entry is not None
            assert entry.sent_at is None
        await broker.start()
        async with mes.client:  # the same persistent session: queued messages come now
            listener = tg.create_task(mes.listen())
            await asyncio.wait_for(flusher.wait_sent(40), 120)
            await mes.wait_for(shift + outage, 60)
            runner.cancel()
            listener.cancel()
    assert mes.unique() == shift + outage
    assert await outbox.count_unsent() == 0
    assert session.state.stats.connection_losses == 1
    assert session.state.generation == 2
