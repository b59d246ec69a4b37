"""The published command examples work under the shipped broker ACL, end to end.

A command example that names a reply topic (``reply_to``, the MQTT 3.1.1 way) is what an MES
integrator copies. Here the MES gateway publishes each such example, byte for byte, on the
station's command topic of a real mosquitto running ``deploy/mosquitto/clampd-broker.conf``
with the shipped ``deploy/mosquitto/clampd.acl`` (site lines changed only, as in
tests/test_security_acl.py); the product's session and command handler answer; the reply must
reach the MES on the example's own ``reply_to``. A reply topic the ACL refuses never arrives
(mosquitto drops a refused publish), so the wait runs out and the test fails.

External reference: mosquitto.conf(5), mosquitto 2.0 (``pattern write`` with ``%u``,
``use_identity_as_username``); protocol/MQTT.md for where replies go.

Demo scenario: Brackenfield Garden Machines, deck assembly line 3, station st-120 (invented).
"""

from __future__ import annotations

import asyncio
import json
import sys
from collections.abc import AsyncIterator
from pathlib import Path

import aiomqtt
import pytest
from security_pki import Pki, deploy_broker_config, make_pki, run_mosquitto, station_session

from clampd.daemon.runtime import CommandHandler, StationState
from clampd.protocol import CommandName, Reply, ReplyStatus, Topics

EXAMPLES = Path(__file__).resolve().parents[1] / "protocol" / "examples"
LINE = "brackenfield/deck-assembly/line-3"
ST = "st-120"
WAIT_S = 20.0  # safety net for a loopback broker; a refused reply fails the test by running out
# The program and wrench the select_program example names (the demo station's spindle bolts).
SPINDLE = {
    "id": "spindle-m10-8.8",
    "version": 3,
    "strategy": "torque-angle",
    "snug_torque": "12 N*m",
    "target_angle": "30 deg",
}

pytestmark = pytest.mark.skipif(
    sys.platform != "linux", reason="mosquitto runs as a child process on Linux"
)


def _examples_with_reply_to() -> dict[str, bytes]:
    """File name → bytes of every example that names a reply topic (read once, at collection)."""
    found = {p.name: p.read_bytes() for p in sorted(EXAMPLES.glob("*.json"))}
    return {name: raw for name, raw in found.items() if "reply_to" in json.loads(raw)}


REPLY_EXAMPLES = _examples_with_reply_to()


def test_there_are_examples_that_name_a_reply_topic() -> None:
    # Guards the parametrisation below against matching nothing.
    assert list(REPLY_EXAMPLES) == ["SelectProgram.json"]


@pytest.fixture(scope="module")
def pki(tmp_path_factory: pytest.TempPathFactory) -> Pki:
    return make_pki(tmp_path_factory.mktemp("pki"))


@pytest.fixture
async def acl_port(pki: Pki, tmp_path: Path) -> AsyncIterator[int]:
    from clampd.simulators._broker import free_port

    port = free_port()
    workdir = tmp_path / "broker"
    workdir.mkdir()
    async with run_mosquitto(deploy_broker_config(port, workdir, pki), workdir, port):
        yield port


def _mes(port: int, pki: Pki) -> aiomqtt.Client:
    ident = pki.client("mes-gateway")
    return aiomqtt.Client(
        "127.0.0.1",
        port,
        identifier="mes-gateway",
        protocol=aiomqtt.ProtocolVersion.V311,
        tls_params=aiomqtt.TLSParameters(
            ca_certs=str(pki.ca), certfile=str(ident.cert), keyfile=str(ident.key)
        ),
    )


@pytest.mark.parametrize("name", list(REPLY_EXAMPLES))
async def test_the_station_answers_an_example_on_its_reply_topic(
    name: str, acl_port: int, pki: Pki
) -> None:
    raw = REPLY_EXAMPLES[name]
    doc = json.loads(raw)
    reply_to = doc["reply_to"]
    command = CommandName(doc["kind"])
    topics = Topics(f"{LINE}/{ST}")
    state = StationState.from_tables(ST, [SPINDLE], {"wr-07": 100.0})
    session = station_session(acl_port, pki, topics, state, ST, seed=7)
    async with _mes(acl_port, pki) as mes, session, asyncio.TaskGroup() as tg:
        await mes.subscribe(reply_to, qos=1)
        handler = CommandHandler(session, state, topics)
        task = tg.create_task(handler.run(), name="clampd.commands")
        async with asyncio.timeout(WAIT_S):
            await session.wait_online()
        await mes.publish(topics.command(command), raw, qos=1)
        async with asyncio.timeout(WAIT_S):
            msg = await anext(aiter(mes.messages))
        task.cancel()
    assert msg.topic.value == reply_to
    assert isinstance(msg.payload, bytes)
    reply = Reply.model_validate_json(msg.payload)
    assert reply.status is ReplyStatus.OK, reply.text
    assert reply.command is command
    assert reply.correlation_id == doc["correlation_id"]
    assert handler.counters.replies_failed == 0
