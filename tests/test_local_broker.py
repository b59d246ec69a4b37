"""The test broker fixture itself: real mosquitto (or amqtt), restartable, persistent."""

from __future__ import annotations

import asyncio
import os

import aiomqtt

from clampd.simulators._broker import LocalBroker


async def test_broker_round_trip_and_restart_keeps_retained(
    broker: LocalBroker, topic_prefix: str
) -> None:
    if os.environ.get("CLAMPD_REQUIRE_MOSQUITTO") == "1":
        assert broker.kind == "mosquitto"
    topic = f"{topic_prefix}/retained"
    async with aiomqtt.Client(broker.host, broker.port, protocol=aiomqtt.ProtocolVersion.V311) as c:
        await c.publish(topic, b"kept", qos=1, retain=True)
    await broker.stop()
    await broker.start()
    async with aiomqtt.Client(broker.host, broker.port, protocol=aiomqtt.ProtocolVersion.V311) as c:
        await c.subscribe(topic, qos=1)
        async with asyncio.timeout(5):
            message = await anext(aiter(c.messages))
    assert message.payload == b"kept"
    assert message.retain
