"""The command handler end to end: MES → real mosquitto → session → handler → state → reply.

External references used below:
- MQTT Version 5.0, OASIS Standard (2019): §3.3.2.3.5 (Response Topic), §3.3.2.3.6
  (Correlation Data echoed by the responder), §3.3.1.3 (RETAIN: a retained message is handed
  to every new subscriber, which is why a retained command must not run).
- RFC 8259 §2 (JSON texts) and §8.1 (UTF-8): the malformed payloads below break these.
- The interface this station documents (protocol/MQTT.md) names the error codes; the checks
  compare replies with the codes defined there, not with values made up here.

Demo scenario: Brackenfield Garden Machines, mower deck assembly, station 120 (invented).
"""

from __future__ import annotations

import asyncio
import json
import random
from collections.abc import AsyncIterator
from dataclasses import dataclass
from typing import Any

import aiomqtt
import pytest
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from clampd.daemon.runtime import (
    BrokerConfig,
    CommandHandler,
    IncomingCommand,
    MqttSession,
    StateChange,
    StationState,
)
from clampd.protocol import (
    CommandName,
    CommandProperties,
    ErrorCode,
    Reply,
    ReplyStatus,
    StationStatus,
    Topics,
)
from clampd.simulators._broker import LocalBroker

STATION = "st-120"
DECK: dict[str, Any] = {
    "id": "deck-m8",
    "strategy": "torque",
    "snug_torque": "4 N*m",
    "target_torque": "18 N*m",
}


@dataclass
class Rig:
    topics: Topics
    state: StationState
    session: MqttSession
    handler: CommandHandler
    mes: aiomqtt.Client
    replies: asyncio.Queue[aiomqtt.Message]

    async def send(
        self,
        name: str,
        payload: bytes,
        *,
        props: Properties | None = None,
        retain: bool = False,
    ) -> None:
        await self.mes.publish(
            f"{self.topics.prefix}/cmd/{name}", payload, qos=1, retain=retain, properties=props
        )

    async def reply(self) -> tuple[Reply, aiomqtt.Message]:
        async with asyncio.timeout(10):
            msg = await self.replies.get()
        return Reply.model_validate_json(bytes(msg.payload)), msg


@pytest.fixture
async def rig(broker: LocalBroker, topic_prefix: str) -> AsyncIterator[Rig]:
    topics = Topics(topic_prefix)
    state = StationState.from_tables(STATION, [DECK], {"w-blue": 60.0})
    session = MqttSession(
        BrokerConfig(url=broker.url),
        topics,
        station_id=STATION,
        client_id=f"clampd-{topic_prefix.replace('/', '-')}",
        status_provider=state.status,
        rng=random.Random(5),
    )
    replies: asyncio.Queue[aiomqtt.Message] = asyncio.Queue()
    async with (
        session,
        aiomqtt.Client(broker.host, broker.port, protocol=aiomqtt.ProtocolVersion.V5) as mes,
        asyncio.TaskGroup() as tg,
    ):
        await asyncio.wait_for(session.wait_online(), 10)
        handler = CommandHandler(session, state, topics)
        await mes.subscribe(f"{topic_prefix}/reply", qos=1)
        await mes.subscribe(f"{topic_prefix}-mes/#", qos=1)

        async def pump() -> None:
            async for m in mes.messages:
                await replies.put(m)

        tasks = [
            tg.create_task(handler.run(), name="test.handler"),
            tg.create_task(pump(), name="test.pump"),
        ]
        yield Rig(topics, state, session, handler, mes, replies)
        for t in tasks:
            t.cancel()


def _cmd(**fields: Any) -> bytes:
    return json.dumps({"schema_version": "1", **fields}).encode()


@pytest.mark.parametrize(
    ("name", "payload", "code"),
    [
        ("ping", b'{"schema_version": "1"', ErrorCode.BAD_JSON),
        ("ping", b'{"schema_version": "1", "schema_version": "1"}', ErrorCode.BAD_JSON),
        ("ping", b'{"schema_version": "1", "x": NaN}', ErrorCode.BAD_JSON),
        ("ping", b"\xff\xfe{}", ErrorCode.BAD_ENCODING),
        ("ping", b"[1, 2]", ErrorCode.NOT_AN_OBJECT),
        ("ping", b"[" * 40 + b"]" * 40, ErrorCode.TOO_DEEP),
        ("ping", b'{"schema_version": "1", "pad": "' + b"x" * 20_000 + b'"}', ErrorCode.TOO_LARGE),
        ("ping", _cmd(schema_version="2"), ErrorCode.UNSUPPORTED_VERSION),
        ("lock", _cmd(kind="unlock"), ErrorCode.KIND_MISMATCH),
        ("lock", _cmd(wrench_ld="w-blue"), ErrorCode.INVALID_FIELDS),
        (
            "select_program",
            _cmd(program_id="deck-m8", program_version="1", part_id="P", joint_positions=["J1"]),
            ErrorCode.INVALID_FIELDS,
        ),
        ("self_destruct", _cmd(), ErrorCode.UNKNOWN_COMMAND),
        (
            "select_program",
            _cmd(program_id="hull-m30", part_id="P", joint_positions=["J1"]),
            ErrorCode.UNKNOWN_PROGRAM,
        ),
        ("lock", _cmd(wrench_id="w-green"), ErrorCode.UNKNOWN_WRENCH),
        ("abort", _cmd(), ErrorCode.NOTHING_TO_ABORT),
        ("ping", _cmd(reply_to="nowhere/+/x"), ErrorCode.BAD_REPLY_TOPIC),
    ],
    ids=lambda v: v.value if isinstance(v, ErrorCode) else None,
)
async def test_bad_commands_get_error_replies_and_the_station_keeps_going(
    rig: Rig, name: str, payload: bytes, code: ErrorCode
) -> None:
    await rig.send(name, payload)
    reply, msg = await rig.reply()
    assert msg.topic.value == rig.topics.reply_default()
    assert reply.status is ReplyStatus.ERROR
    assert reply.code is code
    assert reply.text
    assert rig.handler.counters.refused == 1
    # Still alive: a valid ping afterwards is answered.
    await rig.send("ping", _cmd(correlation_id="after"))
    ok, _ = await rig.reply()
    assert ok.status is ReplyStatus.OK
    assert ok.correlation_id == "after"
    assert rig.session.state.online.is_set()


async def test_reply_topic_into_the_station_tree_is_refused(rig: Rig) -> None:
    """A command may not make the station publish onto its own result topic."""
    await rig.send("ping", _cmd(reply_to=rig.topics.result(), correlation_id="c-1"))
    reply, msg = await rig.reply()
    assert msg.topic.value == rig.topics.reply_default()
    assert reply.code is ErrorCode.BAD_REPLY_TOPIC
    assert reply.correlation_id == "c-1"


async def test_select_program_with_mqtt5_properties_updates_state_and_status(
    rig: Rig, broker: LocalBroker
) -> None:
    props = Properties(PacketTypes.PUBLISH)  # type: ignore[no-untyped-call]
    props.ResponseTopic = f"{rig.topics.prefix}-mes/replies"
    props.CorrelationData = b"\x01order-4471"
    await rig.send(
        "select_program",
        _cmd(program_id="deck-m8", part_id="DK-2026-0412", joint_positions=["J1", "J2", "J3"]),
        props=props,
    )
    reply, msg = await rig.reply()
    assert msg.topic.value == f"{rig.topics.prefix}-mes/replies"
    assert reply.status is ReplyStatus.OK
    assert reply.command is CommandName.SELECT_PROGRAM
    assert msg.properties is not None
    assert getattr(msg.properties, "CorrelationData", None) == b"\x01order-4471"
    job = rig.state.job_for("w-blue")
    assert job is not None
    assert job.part_id == "DK-2026-0412"
    # The retained status now shows the selection to a subscriber arriving later.
    async with aiomqtt.Client(broker.host, broker.port) as late:
        await late.subscribe(rig.topics.station_status(), qos=1)
        async with asyncio.timeout(10):
            async for m in late.messages:
                status = StationStatus.model_validate_json(bytes(m.payload))
                if status.selection is not None:
                    break
    assert status.selection is not None
    assert status.selection.part_id == "DK-2026-0412"
    assert status.selection.next_position == "J1"


async def test_payload_reply_address_for_mqtt311_clients(rig: Rig) -> None:
    """3.1.1 has no properties: ``reply_to`` and ``correlation_id`` travel in the payload."""
    reply_topic = f"{rig.topics.prefix}-mes/line-controller"
    await rig.send("lock", _cmd(reply_to=reply_topic, correlation_id="lc-77", reason="jam"))
    reply, msg = await rig.reply()
    assert msg.topic.value == reply_topic
    assert reply.correlation_id == "lc-77"
    assert reply.status is ReplyStatus.OK
    assert rig.state.is_locked("w-blue")


async def test_retained_commands_are_refused_and_not_applied(rig: Rig, broker: LocalBroker) -> None:
    """A retained lock would run again on every reconnect. A fresh subscription gets the
    stored copy with RETAIN 1 (MQTT 5.0 §3.3.1.3): the station refuses that one. The live
    copy reaches existing subscribers with RETAIN 0 unless the subscription asked for Retain
    As Published (§3.8.3.1), which the station does over MQTT 5: it refuses the live copy
    too. Over MQTT 3.1.1 (no such option) the live copy runs once."""
    await rig.send("lock", _cmd(correlation_id="live"), retain=True)
    live, _ = await rig.reply()
    if rig.session.protocol == "5":
        assert live.status is ReplyStatus.ERROR
        assert live.code is ErrorCode.BAD_TOPIC
        assert "retained" in (live.text or "")
        assert not rig.state.is_locked("w-blue")
    else:
        assert live.status is ReplyStatus.OK
        rig.state.unlock()
    fresh = MqttSession(
        BrokerConfig(url=broker.url),
        rig.topics,
        station_id=STATION,
        client_id=f"clampd-fresh-{rig.topics.prefix.replace('/', '-')}",
        rng=random.Random(9),
    )
    try:
        async with fresh:
            await asyncio.wait_for(fresh.wait_online(), 10)
            async with asyncio.timeout(10):
                stored = await anext(aiter(fresh.commands()))
            assert stored.retained
            reply = await CommandHandler(fresh, rig.state, rig.topics).handle(stored)
    finally:
        # Remove the retained command (an empty retained payload clears it).
        await rig.mes.publish(rig.topics.command(CommandName.LOCK), b"", qos=1, retain=True)
    assert reply.code is ErrorCode.BAD_TOPIC
    assert "retained" in (reply.text or "")
    assert reply.correlation_id == "live"
    assert not rig.state.is_locked("w-blue")


async def test_topics_outside_the_station_prefix_are_refused(rig: Rig) -> None:
    foreign = IncomingCommand(
        topic="otherplant/line-9/st-1/cmd/unlock",
        payload=_cmd(),
        properties=CommandProperties(),
        retained=False,
    )
    rig.state.lock()
    reply = await rig.handler.handle(foreign)
    assert reply.code is ErrorCode.BAD_TOPIC
    assert rig.state.station_locked  # not applied
    sent, msg = await rig.reply()
    assert sent == reply
    assert msg.topic.value == rig.topics.reply_default()


async def test_a_bug_inside_the_station_gives_internal_and_keeps_running(rig: Rig) -> None:
    def broken(change: StateChange) -> None:
        raise RuntimeError(f"listener bug on {change.kind}")

    leave = rig.state.subscribe(broken)
    await rig.send("lock", _cmd(correlation_id="x-1"))
    reply, _ = await rig.reply()
    assert reply.code is ErrorCode.INTERNAL
    assert rig.handler.counters.internal_errors == 1
    leave()
    await rig.send("ping", _cmd())
    ok, _ = await rig.reply()
    assert ok.status is ReplyStatus.OK


async def test_random_garbage_always_gets_exactly_one_reply(rig: Rig) -> None:
    """Seeded fuzz: mutated commands and random bytes; each gets one reply, none stops us."""
    rng = random.Random(2026)
    base = _cmd(program_id="deck-m8", part_id="P-1", joint_positions=["J1", "J2"])
    names = [*(c.value for c in CommandName), "bogus"]
    n = 60
    for _ in range(n):
        body = bytearray(base)
        for _ in range(rng.randint(1, 6)):
            body[rng.randrange(len(body))] = rng.randrange(256)
        if rng.random() < 0.3:
            body = bytearray(rng.randbytes(rng.randint(0, 300)))
        await rig.send(rng.choice(names), bytes(body))
    for _ in range(n):
        reply, _ = await rig.reply()
        assert (reply.status is ReplyStatus.ERROR) == (reply.code is not None)
    assert rig.replies.empty()
    await rig.send("ping", _cmd())
    ok, _ = await rig.reply()
    assert ok.status is ReplyStatus.OK
    # The handler works one message at a time, so every garbage reply was counted before
    # the ping was read.
    counters = rig.handler.counters
    assert counters.received == n + 1
    assert counters.replies_sent >= n
    assert counters.internal_errors == 0
