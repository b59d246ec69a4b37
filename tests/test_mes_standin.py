"""The MES stand-in against a real broker: schema checks, de-duplication, reply addressing.

The far side here is a plain aiomqtt client playing the station's command responder, so the
test checks only what the stand-in itself promises. Sources beside the checks:
- protocol/MQTT.md (our published contract): results on ``PREFIX/result``, de-duplication on
  ``id``, replies to the MQTT 5 Response Topic with Correlation Data echoed, 3.1.1 replies
  addressed by ``reply_to``/``correlation_id`` in the payload;
- MQTT 5.0 §4.10 (request/response: Response Topic, Correlation Data);
- JSON Schema Draft 2020-12, applied by the ``jsonschema`` reference library.
The example result is the demo scenario's invented data (protocol/examples/).
"""

from __future__ import annotations

import asyncio
import contextlib
import copy
import json
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import aiomqtt
import pytest
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from clampd.protocol import CommandName
from clampd.simulators._broker import LocalBroker
from clampd.simulators._mes import MesStandIn, ReceivedResult, ReplyTimeoutError

EXAMPLE = Path(__file__).resolve().parents[1] / "protocol" / "examples" / "RundownResult.json"


def example_result() -> dict[str, Any]:
    data: dict[str, Any] = json.loads(EXAMPLE.read_text())
    return data


@contextlib.asynccontextmanager
async def responder(
    broker: LocalBroker, prefix: str, *, v5: bool
) -> AsyncIterator[list[dict[str, Any]]]:
    """A minimal station command path: answer every command as MQTT.md says, record it."""
    seen: list[dict[str, Any]] = []
    proto = aiomqtt.ProtocolVersion.V5 if v5 else aiomqtt.ProtocolVersion.V311
    async with aiomqtt.Client(broker.host, broker.port, protocol=proto) as client:
        await client.subscribe(f"{prefix}/cmd/+", qos=1)

        async def serve() -> None:
            async for msg in client.messages:
                assert isinstance(msg.payload, bytes)
                body = json.loads(msg.payload)
                seen.append({"topic": str(msg.topic), "body": body, "props": msg.properties})
                reply = {
                    "schema_version": "1",
                    "kind": "reply",
                    "status": "ok",
                    "correlation_id": body.get("correlation_id"),
                }
                props = msg.properties
                topic = getattr(props, "ResponseTopic", None) or body.get("reply_to")
                out = None
                if v5:
                    out = Properties(PacketTypes.PUBLISH)  # type: ignore[no-untyped-call]
                    out.CorrelationData = props.CorrelationData  # type: ignore[union-attr]
                await client.publish(topic, json.dumps(reply), qos=1, properties=out)

        task = asyncio.create_task(serve())
        try:
            yield seen
        finally:
            task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await task


async def publish(broker: LocalBroker, topic: str, payload: bytes) -> None:
    async with aiomqtt.Client(broker.host, broker.port) as client:
        await client.publish(topic, payload, qos=1)


async def test_results_are_schema_checked_and_deduplicated(
    broker: LocalBroker, topic_prefix: str
) -> None:
    shown: list[ReceivedResult] = []
    good = example_result()
    # OK with a reason breaks the schema's if/then rule (MQTT.md: OK exactly when no reasons).
    bad = copy.deepcopy(good)
    bad["id"] = "0196c36e-4f0a-7b21-9c3d-5e8f1a2b3c4e"
    bad["reasons"] = ["torque_low"]
    async with MesStandIn(broker.host, broker.port, topic_prefix, on_result=shown.append) as mes:
        for payload in (good, good, bad):
            await publish(broker, f"{topic_prefix}/result", json.dumps(payload).encode())
        await publish(broker, f"{topic_prefix}/result", b"{not json")
        # Published one after another, each acknowledged first: they arrive in this order,
        # so three distinct ids mean all four messages are in.
        results = await mes.wait_results(3, timeout_s=10)
    assert [r.id for r in results] == [good["id"], bad["id"], None]
    assert results[0].valid
    assert results[0].status == "OK"
    assert not results[1].valid
    assert results[1].errors == ("reasons: ['torque_low'] is expected to be empty",)
    assert not results[2].valid
    assert results[2].errors[0].startswith("not JSON")
    # The duplicate was counted, shown once, and kept in the raw list.
    assert mes.duplicates == {good["id"]: 1}
    assert [r.id for r in shown] == [good["id"], bad["id"], None]
    assert len(mes.results) == 4
    # The example's finished_at is in the past: the latency is positive.
    latency = results[0].latency_s
    assert latency is not None
    assert latency > 0


@pytest.mark.parametrize("v5", [True, False], ids=["mqtt5", "mqtt311"])
async def test_commands_carry_a_reply_address_and_get_their_reply(
    broker: LocalBroker, topic_prefix: str, v5: bool
) -> None:
    async with (
        responder(broker, topic_prefix, v5=v5) as seen,
        MesStandIn(broker.host, broker.port, topic_prefix, protocol="5" if v5 else "3.1.1") as mes,
    ):
        reply = await mes.select_program("spindle-m10-8.8", "DK48-0001", ["b1", "b2"])
        ping = await mes.ping()
    assert reply["status"] == "ok"
    assert ping["correlation_id"] != reply["correlation_id"]
    first = seen[0]
    assert first["topic"] == f"{topic_prefix}/cmd/select_program"
    body = first["body"]
    assert body["schema_version"] == "1"
    assert body["joint_positions"] == ["b1", "b2"]
    assert body["correlation_id"] == reply["correlation_id"]
    if v5:
        # MQTT 5 §4.10: the address travels as properties; the payload stays 3.1.1-compatible.
        assert first["props"].ResponseTopic == mes.reply_topic
        assert "reply_to" not in body
    else:
        assert body["reply_to"] == mes.reply_topic
    # The reply topic sits under PREFIX/reply/, the one place a station may reply to.
    assert mes.reply_topic.startswith(f"{topic_prefix}/reply/")


async def test_a_command_nobody_answers_times_out_with_a_typed_error(
    broker: LocalBroker, topic_prefix: str
) -> None:
    async with MesStandIn(broker.host, broker.port, topic_prefix) as mes:
        with pytest.raises(ReplyTimeoutError, match="no reply"):
            await mes.command(CommandName.PING, {}, timeout_s=0.3)
