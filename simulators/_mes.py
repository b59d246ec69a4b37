"""The MES stand-in: the plant side of the MQTT interface, as an integrator would write it.

Theory of operation
-------------------
``MesStandIn`` is an MQTT client of its own (aiomqtt, independent of the station's session
code) that does what protocol/MQTT.md asks of a consumer and nothing more:

- it subscribes to the station's ``result``, ``status`` and ``wrench/+/status`` topics and
  to a reply topic of its own under ``PREFIX/reply/`` (the one place outside the command tree
  a station may be asked to reply to);
- every message on ``result`` is checked against the JSON Schema that ``clampd schema``
  prints (``jsonschema``, Draft 2020-12), *not* against the station's pydantic models, so the
  published contract is what is tested; a result that fails is kept with its errors, never
  dropped;
- results are de-duplicated on ``id`` (MQTT.md: delivery is at least once), and duplicates
  are counted so a test can tell "exactly one id" from "at least one";
- commands (``select_program``, ``lock``, ``unlock``, ``abort``, ``ping``, or raw bytes on
  any command topic) carry a fresh ``correlation_id``; on MQTT 5 the reply topic and the
  correlation data also travel as properties, on 3.1.1 only in the payload. ``send`` waits
  for the one reply with that correlation id and returns it.

The stand-in lives in the simulators because it is test and demo equipment, an independent
peer: it imports the protocol's models and schema (the published contract), never the daemon.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import dataclasses
import datetime as dt
import enum
import itertools
import json
import logging
import time
import uuid
from collections.abc import Callable
from types import TracebackType
from typing import Any, Literal, Self

import aiomqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from clampd.protocol import CommandName, Topics
from clampd.protocol._schema import json_schemas

__all__ = [
    "MesError",
    "MesStandIn",
    "ReceivedResult",
    "ReplyTimeoutError",
]

_log = logging.getLogger(__name__)

# How long ``send`` waits for a reply. A station answers a command within milliseconds on
# loopback (the session's command path is one queue hop); 10 s matches the session's own ack
# timeout (aiomqtt's default), beyond which the station is as good as absent (our choice).
REPLY_TIMEOUT_S = 10.0
# Replies and results a waiting caller has not taken yet; a demo makes a few per part, so a
# bound of thousands only guards memory against a flood (our own bound).
_BACKLOG = 4096


class MesError(Exception):
    """The stand-in could not do what it was asked (no connection, bad arguments)."""


class ReplyTimeoutError(MesError):
    """No reply with the command's correlation id arrived in time."""


class _Level(enum.Enum):
    V5 = "5"
    V311 = "3.1.1"


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ReceivedResult:
    """One result message as the MES saw it.

    ``payload`` is the decoded JSON (or None when it was not JSON); ``errors`` lists what the
    schema found wrong (empty when valid); ``received_at`` is the wall clock at arrival, so
    ``latency_s`` says how long after the rundown finished the MES had it.
    """

    payload: dict[str, Any] | None
    raw: bytes
    errors: tuple[str, ...]
    received_at: float

    @property
    def valid(self) -> bool:
        """True when the message is JSON and validates against the published schema."""
        return self.payload is not None and not self.errors

    @property
    def id(self) -> str | None:
        """The result id, when there is one."""
        rid = None if self.payload is None else self.payload.get("id")
        return rid if isinstance(rid, str) else None

    @property
    def status(self) -> str | None:
        """``OK`` or ``NOK`` as published (None when absent)."""
        value = None if self.payload is None else self.payload.get("status")
        return value if isinstance(value, str) else None

    @property
    def latency_s(self) -> float | None:
        """Seconds from the rundown's ``finished_at`` to arrival here (None if unreadable)."""
        text = None if self.payload is None else self.payload.get("finished_at")
        if not isinstance(text, str):
            return None
        try:
            finished = dt.datetime.fromisoformat(text.replace("Z", "+00:00"))
        except ValueError:
            return None
        return self.received_at - finished.timestamp()


class MesStandIn:
    """An MES for one station: ``async with MesStandIn(host, port, prefix) as mes``.

    ``protocol`` is ``"5"``, ``"3.1.1"`` or ``"auto"`` (MQTT 5, falling back to 3.1.1 when the
    broker refuses it). ``on_result``, ``on_status`` and ``on_live`` are called in the reader
    task for every new result, status message and live event (for a live display; live
    events are subscribed to only when ``on_live`` is given); they must not block.
    Raises ``MesError`` on entry when the broker cannot be reached.
    """

    def __init__(
        self,
        host: str,
        port: int,
        prefix: str,
        *,
        protocol: Literal["5", "3.1.1", "auto"] = "auto",
        client_id: str | None = None,
        on_result: Callable[[ReceivedResult], None] | None = None,
        on_status: Callable[[str, dict[str, Any]], None] | None = None,
        on_live: Callable[[str, dict[str, Any]], None] | None = None,
    ) -> None:
        self.host = host
        self.port = port
        self.topics = Topics(prefix)
        self.prefix = self.topics.prefix
        self._protocol = protocol
        self.client_id = client_id or f"mes-standin-{uuid.uuid4().hex[:8]}"
        self.reply_topic = f"{self.prefix}/reply/{self.client_id}"
        self.level: _Level | None = None
        self._on_result = on_result
        self._on_status = on_status
        self._on_live = on_live
        self._schema = json_schemas()["RundownResult"]
        self._validator: Any = None
        self._client: aiomqtt.Client | None = None
        self._stack: contextlib.AsyncExitStack | None = None
        self._reader: asyncio.Task[None] | None = None
        self._replies: dict[str, asyncio.Future[dict[str, Any]]] = {}
        # Keys of raw sends whose payload may carry no readable correlation id: on 3.1.1
        # their reply can only be matched by order (the oldest waiter takes it).
        self._anonymous: collections.deque[str] = collections.deque()
        self._counter = itertools.count(1)
        self.results: list[ReceivedResult] = []
        """Every result message in arrival order, duplicates included."""
        self.duplicates: collections.Counter[str] = collections.Counter()
        """How often each result id arrived more than once."""
        self.statuses: dict[str, dict[str, Any]] = {}
        """Latest retained status per topic (station and wrenches)."""
        self.stray_replies: list[dict[str, Any]] = []
        """Replies nobody waited for (e.g. to a command whose correlation id was unreadable)."""
        self._new_result = asyncio.Condition()

    # -- lifecycle ------------------------------------------------------------------------

    async def __aenter__(self) -> Self:
        from jsonschema import Draft202012Validator

        self._validator = Draft202012Validator(self._schema)
        levels = {
            "5": [_Level.V5],
            "3.1.1": [_Level.V311],
            "auto": [_Level.V5, _Level.V311],
        }[self._protocol]
        last: Exception | None = None
        for level in levels:
            stack = contextlib.AsyncExitStack()
            client = self._make_client(level)
            try:
                await stack.enter_async_context(client)
            except aiomqtt.MqttError as exc:
                await stack.aclose()
                last = exc
                continue
            self._client, self._stack, self.level = client, stack, level
            break
        else:
            raise MesError(f"MES stand-in cannot connect to {self.host}:{self.port}: {last}")
        for topic in (
            self.topics.result(),
            self.topics.station_status(),
            f"{self.prefix}/wrench/+/status",
            self.reply_topic,
            self.topics.reply_default(),
        ):
            await client.subscribe(topic, qos=1)
        if self._on_live is not None:
            # Live events are QoS 0 by contract (MQTT.md): display only, may be lost.
            await client.subscribe(f"{self.prefix}/wrench/+/live", qos=0)
        self._reader = asyncio.create_task(self._read(client), name="clampd.mes-standin")
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        reader, self._reader = self._reader, None
        if reader is not None:
            reader.cancel()
            with contextlib.suppress(asyncio.CancelledError, aiomqtt.MqttError):
                await reader
        for fut in self._replies.values():
            fut.cancel()
        self._replies.clear()
        stack, self._stack = self._stack, None
        self._client = None
        if stack is not None:
            with contextlib.suppress(aiomqtt.MqttError):
                await stack.aclose()

    def _make_client(self, level: _Level) -> aiomqtt.Client:
        return aiomqtt.Client(
            self.host,
            self.port,
            identifier=self.client_id,
            protocol=(
                aiomqtt.ProtocolVersion.V5 if level is _Level.V5 else aiomqtt.ProtocolVersion.V311
            ),
            # The MES side of a demo keeps no session: what it misses while away is the
            # station outbox's business (delivered again after the station reconnects).
            clean_session=None if level is _Level.V5 else True,
        )

    # -- commands ----------------------------------------------------------------------------

    async def select_program(
        self,
        program_id: str,
        part_id: str,
        joint_positions: list[str],
        *,
        wrench_id: str | None = None,
        program_version: int | None = None,
    ) -> dict[str, Any]:
        """Select a program for a part and its joint positions; return the station's reply."""
        body: dict[str, Any] = {
            "program_id": program_id,
            "program_version": program_version,
            "part_id": part_id,
            "joint_positions": joint_positions,
            "wrench_id": wrench_id,
        }
        return await self.command(CommandName.SELECT_PROGRAM, body)

    async def lock(self, wrench_id: str | None = None, reason: str | None = None) -> dict[str, Any]:
        """Lock one wrench (or all); return the reply."""
        return await self.command(CommandName.LOCK, {"wrench_id": wrench_id, "reason": reason})

    async def unlock(self, wrench_id: str | None = None) -> dict[str, Any]:
        """Unlock one wrench (or all); return the reply."""
        return await self.command(CommandName.UNLOCK, {"wrench_id": wrench_id})

    async def abort(
        self, wrench_id: str | None = None, reason: str | None = None
    ) -> dict[str, Any]:
        """Abort the rundown in progress; return the reply."""
        return await self.command(CommandName.ABORT, {"wrench_id": wrench_id, "reason": reason})

    async def ping(self) -> dict[str, Any]:
        """Check the command path end to end; return the reply."""
        return await self.command(CommandName.PING, {})

    async def command(
        self, name: CommandName, body: dict[str, Any], *, timeout_s: float = REPLY_TIMEOUT_S
    ) -> dict[str, Any]:
        """Send a well-formed command with this MES's reply address; wait for its reply."""
        correlation = self._next_correlation()
        payload = {"schema_version": "1", **body, "correlation_id": correlation}
        if self.level is _Level.V311:
            payload["reply_to"] = self.reply_topic
        return await self.send_raw(
            self.topics.command(name),
            json.dumps(payload).encode(),
            correlation_id=correlation,
            timeout_s=timeout_s,
        )

    async def send_raw(
        self,
        topic: str,
        payload: bytes,
        *,
        correlation_id: str | None = None,
        timeout_s: float = REPLY_TIMEOUT_S,
        response_topic: str | None = None,
        retain: bool = False,
    ) -> dict[str, Any]:
        """Publish arbitrary bytes to ``topic`` and wait for the reply.

        ``response_topic`` replaces this MES's own reply topic in the MQTT 5 property (to
        try one the station must refuse); ``retain`` publishes retained (which MQTT.md
        forbids for commands, to check that the station refuses it).

        The reply is matched by ``correlation_id`` (MQTT 5 carries it as correlation data,
        so even a payload the station cannot read gets its reply back here); without an id
        on 3.1.1 the next stray reply on the station's default reply topic is returned.
        Raises ``ReplyTimeoutError`` when nothing comes.
        """
        client = self._require_client()
        key = correlation_id or self._next_correlation()
        loop = asyncio.get_running_loop()
        fut: asyncio.Future[dict[str, Any]] = loop.create_future()
        self._replies[key] = fut
        if correlation_id is None:
            self._anonymous.append(key)
        props: Properties | None = None
        if self.level is _Level.V5:
            props = Properties(PacketTypes.PUBLISH)  # type: ignore[no-untyped-call]
            props.ResponseTopic = response_topic or self.reply_topic
            props.CorrelationData = key.encode()
        try:
            await client.publish(topic, payload, qos=1, retain=retain, properties=props)
            async with asyncio.timeout(timeout_s):
                return await fut
        except TimeoutError:
            raise ReplyTimeoutError(f"no reply to {topic} within {timeout_s} s") from None
        except aiomqtt.MqttError as exc:
            raise MesError(f"publish to {topic} failed: {exc}") from None
        finally:
            self._replies.pop(key, None)
            with contextlib.suppress(ValueError):
                self._anonymous.remove(key)

    # -- results -----------------------------------------------------------------------------

    def unique_results(self) -> list[ReceivedResult]:
        """Results in arrival order, the first arrival of each id only."""
        seen: set[str | None] = set()
        out: list[ReceivedResult] = []
        for r in self.results:
            if r.id is not None and r.id in seen:
                continue
            seen.add(r.id)
            out.append(r)
        return out

    async def wait_results(self, n: int, *, timeout_s: float = 60.0) -> list[ReceivedResult]:
        """Wait until ``n`` distinct result ids arrived; return them in arrival order.

        Raises ``TimeoutError`` when fewer arrive in ``timeout_s`` (the caller's test fails).
        """
        async with asyncio.timeout(timeout_s), self._new_result:
            await self._new_result.wait_for(lambda: len(self.unique_results()) >= n)
        return self.unique_results()

    # -- internals ---------------------------------------------------------------------------

    def _require_client(self) -> aiomqtt.Client:
        if self._client is None:
            raise MesError("MES stand-in used outside 'async with'")
        return self._client

    def _next_correlation(self) -> str:
        return f"{self.client_id}-{next(self._counter):06d}"

    async def _read(self, client: aiomqtt.Client) -> None:
        async for message in client.messages:
            topic = str(message.topic)
            raw = message.payload if isinstance(message.payload, bytes) else b""
            if topic == self.topics.result():
                await self._take_result(raw)
            elif topic in (self.reply_topic, self.topics.reply_default()):
                self._take_reply(raw, message.properties)
            elif topic.endswith("/live"):
                self._take_live(topic, raw)
            else:
                self._take_status(topic, raw)

    async def _take_result(self, raw: bytes) -> None:
        received_at = time.time()
        payload: dict[str, Any] | None
        errors: tuple[str, ...]
        try:
            decoded = json.loads(raw)
        except (UnicodeDecodeError, json.JSONDecodeError) as exc:
            payload, errors = None, (f"not JSON: {exc}",)
        else:
            if isinstance(decoded, dict):
                payload = decoded
                # ~16 ms of pure Python for a 256-point curve (measured): off the loop, which
                # in the demo also runs the station and the virtual wrenches.
                errors = await asyncio.to_thread(self._check, decoded)
            else:
                payload, errors = None, ("not a JSON object",)
        result = ReceivedResult(payload=payload, raw=raw, errors=errors, received_at=received_at)
        if result.id is not None and any(r.id == result.id for r in self.results):
            self.duplicates[result.id] += 1
        self.results.append(result)
        if len(self.results) > _BACKLOG:
            del self.results[0]
        if errors:
            _log.error("MES: result failed the schema: %s", "; ".join(errors[:3]))
        if self._on_result is not None and result.id not in self.duplicates:
            self._on_result(result)
        async with self._new_result:
            self._new_result.notify_all()

    def _check(self, result: dict[str, Any]) -> tuple[str, ...]:
        return tuple(
            f"{'/'.join(map(str, e.absolute_path)) or '(root)'}: {e.message}"
            for e in self._validator.iter_errors(result)
        )

    def _take_reply(self, raw: bytes, properties: Properties | None) -> None:
        try:
            reply = json.loads(raw)
        except (UnicodeDecodeError, json.JSONDecodeError):
            _log.error("MES: unreadable reply %r", raw[:80])
            return
        if not isinstance(reply, dict):
            return
        keys: list[str] = []
        data = getattr(properties, "CorrelationData", None) if properties is not None else None
        if isinstance(data, bytes | bytearray):
            keys.append(bytes(data).decode(errors="replace"))
        if isinstance(reply.get("correlation_id"), str):
            keys.append(reply["correlation_id"])
        if not keys and self._anonymous:
            keys.append(self._anonymous[0])
        for key in keys:
            fut = self._replies.get(key)
            if fut is not None and not fut.done():
                fut.set_result(reply)
                return
        self.stray_replies.append(reply)
        if len(self.stray_replies) > _BACKLOG:
            del self.stray_replies[0]

    def _take_live(self, topic: str, raw: bytes) -> None:
        if self._on_live is None:
            return
        try:
            event = json.loads(raw)
        except (UnicodeDecodeError, json.JSONDecodeError):
            return
        if isinstance(event, dict):
            self._on_live(topic, event)

    def _take_status(self, topic: str, raw: bytes) -> None:
        try:
            status = json.loads(raw) if raw else None
        except (UnicodeDecodeError, json.JSONDecodeError):
            return
        if isinstance(status, dict):
            self.statuses[topic] = status
            if self._on_status is not None:
                self._on_status(topic, status)
