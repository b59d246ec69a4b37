"""The deploy ACL example, proved against mosquitto: each station stays inside its prefix.

The broker runs ``deploy/mosquitto/clampd-broker.conf`` with the shipped
``deploy/mosquitto/clampd.acl`` (site lines changed only: port, certificate paths,
persistence folder, logging; ``security_pki.deploy_broker_config``). Clients authenticate
with certificates made for this run; ``use_identity_as_username`` turns the certificate's CN
into the user name the ACL's ``%u`` matches. The topic tree checked is the one
``clampd.protocol.Topics`` builds (protocol/MQTT.md), so a topic added to the tree without
its ACL line fails here.

External references used below:
- mosquitto.conf(5), mosquitto 2.0: ``acl_file``, ``pattern`` with ``%u``, ``topic read``/
  ``write``; reading is checked per message delivered (a subscription to a wider filter is
  granted, foreign messages are simply never delivered — observed here with 2.0.11).
- MQTT Version 5.0, OASIS Standard (2019): §4.6 (a server keeps the order of messages it
  forwards to one subscriber), which the "marker" checks below rely on: a refused message,
  had it been forwarded, would arrive before a marker sent after it.

Demo scenario: Brackenfield Garden Machines, mower deck assembly, line 3, stations 120 and
121, the MES gateway (invented).
"""

from __future__ import annotations

import asyncio
import contextlib
import random
import sys
from collections.abc import AsyncIterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import aiomqtt
import pytest
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from security_pki import (
    DEPLOY,
    Identity,
    Pki,
    deploy_broker_config,
    make_pki,
    run_mosquitto,
    station_session,
    wait_until,
)

from clampd.daemon.runtime import (
    AsyncOutbox,
    BrokerConfig,
    CommandHandler,
    MqttSession,
    ResultFlusher,
    StationState,
)
from clampd.protocol import CommandName, Reply, ReplyStatus, Topics, new_uuid7

LINE = "brackenfield/deck-assembly/line-3"
ST = "st-120"
OTHER = "st-121"
WAIT_S = 20.0  # safety net for a loopback broker; never the thing asserted
DECK: dict[str, Any] = {
    "id": "deck-m8",
    "strategy": "torque",
    "snug_torque": "4 N*m",
    "target_torque": "18 N*m",
}

pytestmark = pytest.mark.skipif(
    sys.platform != "linux", reason="mosquitto runs as a child process on Linux"
)


@pytest.fixture(scope="module")
def pki(tmp_path_factory: pytest.TempPathFactory) -> Pki:
    return make_pki(tmp_path_factory.mktemp("pki"))


@dataclass
class AclBroker:
    port: int
    pki: Pki
    log: Path

    def client(self, cn: str, *, suffix: str = "") -> aiomqtt.Client:
        ident = self.pki.client(cn)
        return _client(self.port, self.pki, ident, f"{cn}{suffix}")


def _client(port: int, pki: Pki, ident: Identity, client_id: str) -> aiomqtt.Client:
    return aiomqtt.Client(
        "127.0.0.1",
        port,
        identifier=client_id,
        protocol=aiomqtt.ProtocolVersion.V5,
        tls_params=aiomqtt.TLSParameters(
            ca_certs=str(pki.ca), certfile=str(ident.cert), keyfile=str(ident.key)
        ),
    )


@pytest.fixture
async def acl_broker(pki: Pki, tmp_path: Path) -> AsyncIterator[AclBroker]:
    from clampd.simulators._broker import free_port

    port = free_port()
    workdir = tmp_path / "broker"
    workdir.mkdir()
    async with run_mosquitto(deploy_broker_config(port, workdir, pki), workdir, port) as log:
        yield AclBroker(port=port, pki=pki, log=log)


async def _collect_until(
    client: aiomqtt.Client, marker_topic: str, marker: bytes
) -> list[tuple[str, bytes]]:
    """Everything ``client`` receives up to and including the marker message."""
    got: list[tuple[str, bytes]] = []
    async with asyncio.timeout(WAIT_S):
        async for msg in client.messages:
            payload = msg.payload if isinstance(msg.payload, bytes) else b""
            got.append((msg.topic.value, payload))
            if msg.topic.value == marker_topic and payload == marker:
                return got
    raise AssertionError("unreachable")


def _station_topics(station: str) -> list[str]:
    """Every topic a station publishes to, built by the product's own topic table."""
    t = Topics(f"{LINE}/{station}")
    return [
        t.result(),
        t.station_status(),
        t.wrench_status("w-blue"),
        t.live("w-blue"),
        t.stats("deck-m8", "w-blue"),
        t.alarm(),
        t.reply_default(),
        f"{t.reply_default()}/mes-7",
        f"mes/reply/{station}/order-4471",
    ]


async def test_a_station_may_publish_on_every_topic_of_its_own_tree(acl_broker: AclBroker) -> None:
    """Positive control: without it the refusals below could be a broker that drops all."""
    topics = _station_topics(ST)
    async with acl_broker.client("mes-gateway") as mes, acl_broker.client(ST) as station:
        await mes.subscribe("#", qos=1)
        await mes.subscribe("mes/reply/#", qos=1)
        for topic in topics:
            await station.publish(topic, topic.encode(), qos=1)
        marker = f"{LINE}/{ST}/result"
        await station.publish(marker, b"marker", qos=1)
        got = await _collect_until(mes, marker, b"marker")
    received = {t for t, p in got if p == t.encode()}
    assert received == set(topics)


@pytest.mark.parametrize(
    "topic",
    [
        f"{LINE}/{OTHER}/result",  # another station's results
        f"{LINE}/{OTHER}/status",  # another station's retained status
        f"{LINE}/{OTHER}/cmd/lock",  # commanding another station
        f"{LINE}/{ST}/cmd/unlock",  # commanding itself (commands come from the MES only)
        f"{LINE}/{ST}/result/extra",  # below its result topic
        f"{LINE}/{ST}/firmware",  # a topic the tree does not have
        f"{LINE}/x/{ST}/result",  # its id at another level
        f"{LINE}/{ST}-b/result",  # a station id that merely starts with its own
        f"mes/reply/{OTHER}/order-1",  # answering in another station's name
        "mes/reply/order-1",  # outside any station's reply branch
        "mes/orders",  # the MES's own tree
    ],
)
async def test_a_station_may_not_publish_outside_its_prefix(
    acl_broker: AclBroker, topic: str
) -> None:
    async with acl_broker.client("mes-gateway") as mes:
        await mes.subscribe("#", qos=1)
        # The broker may answer a refused QoS 1 publish by closing the connection
        # (mosquitto 2.0.11 with MQTT 5 does): either way it must not forward it.
        with contextlib.suppress(aiomqtt.MqttError):
            async with acl_broker.client(ST, suffix="-rogue") as station:
                await station.publish(topic, b"forbidden", qos=1)
        async with acl_broker.client(ST) as station:
            marker = f"{LINE}/{ST}/result"
            await station.publish(marker, b"marker", qos=1)
        got = await _collect_until(mes, marker, b"marker")
    assert [t for t, p in got if p == b"forbidden"] == []


async def test_a_station_reads_only_its_own_commands(acl_broker: AclBroker) -> None:
    """Whatever filter a station subscribes to, only its own commands reach it; it reads no
    results, status or replies of any station (not even its own)."""
    own = Topics(f"{LINE}/{ST}")
    other = Topics(f"{LINE}/{OTHER}")
    filters = [own.command_filter(), other.command_filter(), "+/+/+/+/cmd/+", "#"]
    async with (
        acl_broker.client("mes-gateway") as mes,
        acl_broker.client(ST) as station,
        acl_broker.client(OTHER) as neighbour,
    ):
        for f in filters:
            await station.subscribe(f, qos=1)
        await neighbour.publish(other.result(), b"neighbour result", qos=1)
        await neighbour.publish(other.station_status(), b"neighbour status", qos=1)
        await mes.publish(other.command(CommandName.LOCK), b"lock 121", qos=1)
        await mes.publish(own.command(CommandName.PING), b"ping 120", qos=1)
        got = await _collect_until(station, own.command(CommandName.PING), b"ping 120")
    # One delivery per matching granted subscription is allowed (MQTT 5.0 §3.3.4: without
    # subscription identifiers a server may send one copy per overlapping subscription).
    assert {t for t, _ in got} == {own.command(CommandName.PING)}


async def test_the_mes_commands_a_station_and_reads_its_reply_under_the_station_branch(
    acl_broker: AclBroker, pki: Pki
) -> None:
    """The product end to end under the ACL: session subscribes and announces, the handler
    answers to the MES's response topic below ``mes/reply/<station-id>/``."""
    topics = Topics(f"{LINE}/{ST}")
    state = StationState.from_tables(ST, [DECK], {"w-blue": 60.0})
    session = station_session(acl_broker.port, pki, topics, state, ST, seed=3)
    reply_topic = f"mes/reply/{ST}/order-4471"
    async with acl_broker.client("mes-gateway") as mes, session, asyncio.TaskGroup() as tg:
        await mes.subscribe(reply_topic, qos=1)
        handler = CommandHandler(session, state, topics)
        task = tg.create_task(handler.run(), name="clampd.commands")
        async with asyncio.timeout(WAIT_S):
            await session.wait_online()
        props = Properties(PacketTypes.PUBLISH)  # type: ignore[no-untyped-call]
        props.ResponseTopic = reply_topic
        props.CorrelationData = b"order-4471"
        await mes.publish(
            topics.command(CommandName.LOCK),
            b'{"schema_version": "1", "reason": "jig change"}',
            qos=1,
            properties=props,
        )
        async with asyncio.timeout(WAIT_S):
            msg = await anext(aiter(mes.messages))
        task.cancel()
    assert isinstance(msg.payload, bytes)
    reply = Reply.model_validate_json(msg.payload)
    assert reply.status is ReplyStatus.OK
    assert reply.command is CommandName.LOCK
    assert state.station_locked
    assert handler.counters.replies_failed == 0


async def test_a_result_the_acl_refuses_is_never_marked_sent(pki: Pki, tmp_path: Path) -> None:
    """An ACL that lacks the result line (a plausible site mistake) refuses results while the
    station's status goes through. The broker answers PUBACK 0x87 Not authorized (MQTT 5.0
    §3.4.2.1): the result must stay unsent in the outbox, never be marked delivered."""
    from clampd.simulators._broker import free_port

    shipped = (DEPLOY / "clampd.acl").read_text(encoding="utf-8")
    line = "pattern write +/+/+/%u/result"
    assert shipped.count(line) == 1
    acl = tmp_path / "no-result.acl"
    acl.write_text(shipped.replace(line, "# (result line missing)"), encoding="utf-8")
    port = free_port()
    workdir = tmp_path / "broker"
    workdir.mkdir()
    topics = Topics(f"{LINE}/{ST}")
    ident = pki.client(ST)
    session = MqttSession(
        BrokerConfig(
            url=f"mqtts://127.0.0.1:{port}", tls_ca=pki.ca, tls_cert=ident.cert, tls_key=ident.key
        ),
        topics,
        station_id=ST,
        client_id=f"clampd-{ST}",
        rng=random.Random(4),
    )
    rid = str(new_uuid7())
    config = deploy_broker_config(port, workdir, pki, acl=acl)
    async with (
        run_mosquitto(config, workdir, port),
        AsyncOutbox(tmp_path / "outbox.sqlite3") as outbox,
    ):
        await outbox.put(rid, topics.result(), b'{"id": "x"}', station=ST)
        flusher = ResultFlusher(outbox, session, rng=random.Random(5))
        async with session, asyncio.TaskGroup() as tg:
            task = tg.create_task(flusher.run(), name="clampd.flusher")
            async with asyncio.timeout(WAIT_S):
                await session.wait_online()
            # Until the flusher either took it for delivered or had it refused twice.
            await wait_until(
                lambda: session.state.stats.publishes_refused >= 2 or flusher.sent > 0,
                "two refusals or a delivery",
            )
            task.cancel()
        entry = await outbox.get(rid)
        assert entry is not None
        assert not entry.sent
        assert await outbox.count_unsent() == 1
        assert await outbox.integrity_ok()
    assert flusher.sent == 0
    assert session.state.stats.publishes_refused >= 2
