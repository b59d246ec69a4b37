"""The station's MQTT session: the only module that imports aiomqtt.

Theory of operation
-------------------
``MqttSession`` keeps one connection to the plant broker for the daemon's lifetime. A single
task (``clampd.mqtt.session``) runs the reconnect loop in the shape STYLE.md prescribes: enter
the client, announce, read, and on any loss wait ``next_delay(attempt, rng)`` and enter the
*same* client again (aiomqtt clients are reusable but not re-entrant). On every (re)connect it

1. registers the last will: the retained station status with ``state: "offline"`` (QoS 1), so
   a dashboard learns of a dead station from the broker (MQTT 5.0 §3.1.2.5);
2. subscribes to ``{prefix}/cmd/+`` at QoS 1;
3. publishes the retained ``online`` status built by the caller's ``status_provider``.

Protocol level: MQTT 5 first. When the broker refuses it with a CONNACK saying the protocol
version is unsupported (5.0 reason 0x84 = 132, or the 3.1.1 return code 1), and the config says
``protocol = "auto"``, the session switches to 3.1.1 for the rest of its life and says so in
``state.protocol``. Some 3.1.1-only brokers do not refuse but choke on the MQTT 5 CONNECT and
never answer; so when the port accepts TCP but the MQTT 5 handshake gives no CONNACK, the next
attempt is made with 3.1.1, and the first level that connects is kept. A broker that is simply
down (no TCP) never causes a switch. aiomqtt fixes the level when a client is built, so there
is at most one client per level, each created once and re-entered.

The station's own session is *clean* (no persistent session): a command that reaches the
broker while the station is offline is not queued for it. Running a ``lock`` or
``select_program`` minutes late, after the MES has given up waiting for its reply, is worse
than the MES seeing no reply and asking again. Results do not depend on the broker's session:
they wait in the durable outbox (see ``_flusher.py``).

Publishing
----------
``publish`` returns only after the broker acknowledged a QoS 1 message (PUBACK) and raises
``BrokerUnavailable`` when there is no connection, when it is lost before the PUBACK, or when
the PUBACK does not come in time; the caller keeps what it tried to send. A PUBACK with a
failure reason code (MQTT 5.0 §3.4.2.1, e.g. 0x87 Not authorized from a broker ACL) is no
acknowledgement: aiomqtt 2.5 would complete the publish on it, so ``_Client`` leaves such a
publish unconfirmed and it ends as ``BrokerUnavailable`` (mosquitto 2.0 drops the connection
right after, measured; otherwise at the ack timeout). Live events take a
separate path (``publish_live``): QoS 0, at most one message per wrench per
``LIVE_INTERVAL_S`` with the latest progress winning, and dropped while offline.

Errors from aiomqtt and paho are translated here, once, into ``MqttSessionError`` subclasses;
nothing else in clampd sees or parses them.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import dataclasses
import datetime as dt
import enum
import logging
import random
import ssl
from collections.abc import AsyncIterator, Callable
from types import TracebackType
from typing import Any, Literal, Self

import aiomqtt
from aiomqtt.exceptions import MqttConnectError
from paho.mqtt import client as paho_client
from paho.mqtt.client import MQTT_CLEAN_START_FIRST_ONLY
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from paho.mqtt.reasoncodes import ReasonCode
from paho.mqtt.subscribeoptions import SubscribeOptions
from pydantic import BaseModel

from clampd.daemon.runtime._backoff import next_delay
from clampd.daemon.runtime._config import BrokerConfig, check_broker_transport
from clampd.protocol import (
    CommandProperties,
    LiveEvent,
    LiveProgress,
    ReplyAddress,
    StationStatus,
    Topics,
)
from clampd.protocol import StationState as LinkState

__all__ = [
    "ACK_TIMEOUT_S",
    "LIVE_INTERVAL_S",
    "BrokerRefusedError",
    "BrokerUnavailable",
    "IncomingCommand",
    "LiveLimiter",
    "MqttSession",
    "MqttSessionError",
    "SessionState",
    "SessionStats",
    "TlsSetupError",
]

_log = logging.getLogger(__name__)

# At most 20 live messages per second per wrench. A progress display redraws at the rate a
# person can follow (a few Hz); 20/s keeps a bar graph smooth while a 1 kHz sensor stream
# would otherwise push 1 000 messages/s per wrench onto the plant network (our own choice).
LIVE_INTERVAL_S = 0.05
# Discrete live events (snug, cue, stop) of one wrench waiting for their slot. A rundown makes
# at most about four of them, so eight is never reached in normal work (our own bound).
_MAX_MARKS_PER_WRENCH = 8
# Commands waiting for the handler. An MES sends a few commands per part; a backlog of 256
# means a flood or a stuck handler, so further commands are dropped and counted instead of
# growing memory without bound (our own bound).
_COMMAND_QUEUE = 256
# How long to wait for a CONNACK, SUBACK or PUBACK. aiomqtt's own default of 10 s; on
# loopback an ack takes well under a millisecond (NOTES-ble-mqtt.md: p99 < 1 ms), and a
# plant broker that needs longer is as good as unavailable for a station.
ACK_TIMEOUT_S = 10.0
# CONNACK codes meaning "this broker does not speak the protocol level asked for":
# MQTT 5.0 reason 0x84 Unsupported Protocol Version (§3.2.2.2) and MQTT 3.1.1 return code 1
# Unacceptable protocol version (§3.2.2.3). amqtt answers an MQTT 5 CONNECT with 132
# (measured, NOTES-ble-mqtt.md).
_PROTOCOL_REFUSED = frozenset({1, 132})

ProtocolLevel = Literal["5", "3.1.1"]


class MqttSessionError(Exception):
    """Base of the session's errors."""


class BrokerUnavailable(MqttSessionError):  # noqa: N818 -- name agreed in the runtime's interface
    """No broker to publish to: not connected, the connection was lost before the PUBACK, or
    the PUBACK did not come in time. The message may or may not have reached the broker; the
    caller still owns it and may send it again (QoS 1 allows duplicates)."""


class TlsSetupError(MqttSessionError):
    """The configured CA, certificate or key cannot be loaded (the config's fault)."""


class BrokerRefusedError(MqttSessionError):
    """The broker answered CONNECT with a refusal (bad credentials, not authorised, ...).

    Kept in ``SessionState.last_error``; the session keeps retrying with back-off because an
    operator may fix the broker side while the station runs.
    """

    def __init__(self, code: int, text: str) -> None:
        super().__init__(f"broker refused the connection: [{code}] {text}")
        self.code = code


class Phase(enum.Enum):
    """Where the reconnect loop is."""

    IDLE = "idle"
    CONNECTING = "connecting"
    ONLINE = "online"
    WAITING = "waiting"  # lost or refused; sleeping before the next attempt
    CLOSED = "closed"


@dataclasses.dataclass(slots=True)
class SessionStats:
    """Counters for the status view and the tests; they only ever grow."""

    connects: int = 0
    connection_losses: int = 0
    fallbacks: int = 0
    published: int = 0
    publish_failures: int = 0
    live_sent: int = 0
    live_coalesced: int = 0
    live_dropped: int = 0
    commands_received: int = 0
    commands_dropped: int = 0
    publishes_refused: int = 0


@dataclasses.dataclass(slots=True)
class SessionState:
    """Observable connection state: read by the status view, awaited by the flusher.

    ``online`` is set exactly while a connection is up and announced; ``generation`` counts
    announced connections, so a waiter can tell a reconnect from the connection it saw fail.
    """

    phase: Phase = Phase.IDLE
    protocol: ProtocolLevel | None = None
    generation: int = 0
    last_error: str | None = None
    last_refusal: BrokerRefusedError | None = None  # the broker's last CONNACK refusal
    online: asyncio.Event = dataclasses.field(default_factory=asyncio.Event)
    stats: SessionStats = dataclasses.field(default_factory=SessionStats)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class IncomingCommand:
    """One message from a command topic, before any validation (the payload is untrusted)."""

    topic: str
    payload: bytes
    properties: CommandProperties
    retained: bool


class LiveLimiter:
    """Per-wrench rate limit for live events: pure, clock passed in, no I/O.

    Each wrench may send one message per ``interval_s``. Progress events coalesce, the latest
    wins: a display wants the newest torque, not a queue of stale ones. Discrete events (snug,
    cue, stop) are never coalesced with each other and go before progress in the next free
    slot, because each one marks a moment the display must show. When a wrench's slot is free
    an offered event is released at once, so a slow stream is not delayed at all.
    """

    __slots__ = ("_interval", "_last", "_marks", "_progress")

    def __init__(self, interval_s: float = LIVE_INTERVAL_S) -> None:
        if not interval_s > 0:
            raise ValueError(f"interval_s must be > 0, got {interval_s}")
        self._interval = interval_s
        self._last: dict[str, float] = {}
        self._progress: dict[str, LiveProgress] = {}
        self._marks: dict[str, collections.deque[LiveEvent]] = {}

    def offer(self, event: LiveEvent, now: float) -> tuple[LiveEvent | None, int]:
        """Take an event; return (event to send now or None, events dropped by it)."""
        wid = event.wrench_id
        last = self._last.get(wid)
        free = (last is None or now >= last + self._interval) and not self._marks.get(wid)
        if isinstance(event, LiveProgress):
            superseded = self._progress.pop(wid, None) is not None
            if free:
                self._last[wid] = now
                return event, int(superseded)
            self._progress[wid] = event
            return None, int(superseded)
        if free:
            self._last[wid] = now
            return event, 0
        queue = self._marks.setdefault(wid, collections.deque(maxlen=_MAX_MARKS_PER_WRENCH))
        full = len(queue) == queue.maxlen
        queue.append(event)
        return None, int(full)

    def take_due(self, now: float) -> list[LiveEvent]:
        """Events whose wrench's slot is free at ``now``, at most one per wrench."""
        out: list[LiveEvent] = []
        for wid in list(self._marks.keys() | self._progress.keys()):
            last = self._last.get(wid)
            # The same sum as next_due(), so waking at next_due() always releases.
            if last is not None and now < last + self._interval:
                continue
            marks = self._marks.get(wid)
            if marks:
                out.append(marks.popleft())
                if not marks:
                    del self._marks[wid]
            else:
                out.append(self._progress.pop(wid))
            self._last[wid] = now
        return out

    def next_due(self) -> float | None:
        """Earliest time a held event may go, or None when nothing is held."""
        held = self._marks.keys() | self._progress.keys()
        return min((self._last.get(w, 0.0) + self._interval for w in held), default=None)

    def clear(self) -> int:
        """Forget everything held (the connection went away); return how many were dropped."""
        n = len(self._progress) + sum(len(q) for q in self._marks.values())
        self._progress.clear()
        self._marks.clear()
        return n


def _correlation_properties(correlation_data: bytes | None) -> Properties | None:
    if correlation_data is None:
        return None
    props = Properties(PacketTypes.PUBLISH)  # type: ignore[no-untyped-call]
    props.CorrelationData = correlation_data
    return props


def _command_properties(props: Properties | None) -> CommandProperties:
    if props is None:
        return CommandProperties()
    topic = getattr(props, "ResponseTopic", None)
    data = getattr(props, "CorrelationData", None)
    return CommandProperties(
        response_topic=topic if isinstance(topic, str) else None,
        correlation_data=bytes(data) if isinstance(data, bytes | bytearray) else None,
    )


def _reason_value(rc: object) -> int | None:
    value = getattr(rc, "value", rc)
    return value if isinstance(value, int) else None


def _tls_context(broker: BrokerConfig) -> ssl.SSLContext:
    """Verify the broker against ``tls_ca`` (else the system's trust store), hostname
    included; present ``tls_cert``/``tls_key`` when the broker wants client certificates."""
    ctx = ssl.create_default_context(cafile=str(broker.tls_ca) if broker.tls_ca else None)
    if broker.tls_cert is not None and broker.tls_key is not None:
        ctx.load_cert_chain(str(broker.tls_cert), str(broker.tls_key))
    return ctx


def _reason_text(exc: MqttConnectError) -> str:
    rc = exc.rc
    return str(rc) if rc is not None and not isinstance(rc, int) else str(exc)


def _utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


class MqttSession:
    """The daemon's connection to the plant broker; use as ``async with MqttSession(...)``.

    ``status_provider(at)`` builds the retained ``online`` status announced on each connect
    (default: online, unlocked, no selection). ``rng`` drives the reconnect back-off (seed it
    in tests). Entering never waits for the broker: the session connects in the background
    and ``state.online`` tells when it is up. Raises ``PlaintextRemoteError`` at construction
    for mqtt:// to a non-loopback host without the opt-in (the config's mistake).
    """

    def __init__(
        self,
        broker: BrokerConfig,
        topics: Topics,
        *,
        station_id: str,
        client_id: str,
        software_version: str | None = None,
        status_provider: Callable[[dt.datetime], StationStatus] | None = None,
        rng: random.Random | None = None,
        live_interval_s: float = LIVE_INTERVAL_S,
        ack_timeout_s: float = ACK_TIMEOUT_S,
    ) -> None:
        check_broker_transport(broker.url, broker.allow_plaintext_remote)
        self.broker = broker
        self.topics = topics
        self.station_id = station_id
        self.client_id = client_id
        self.software_version = software_version
        self._status_provider = status_provider or self._default_status
        self._rng = rng or random.Random()
        self.state = SessionState()
        self._level: ProtocolLevel = "3.1.1" if broker.protocol == "3.1.1" else "5"
        self._ack_timeout_s = ack_timeout_s
        self._ever_connected = False  # once a level worked, never switch it again
        self._fallback_final = False  # a CONNACK said "unsupported version": stay on 3.1.1
        self._clients: dict[ProtocolLevel, aiomqtt.Client] = {}
        self._client: aiomqtt.Client | None = None  # set exactly while announced
        self._lost = asyncio.Event()  # set when the announced connection ends
        self._password: str | None = None
        self._tls: ssl.SSLContext | None = None
        self._started_at = _utcnow()
        self._incoming: asyncio.Queue[IncomingCommand] = asyncio.Queue(_COMMAND_QUEUE)
        self._limiter = LiveLimiter(live_interval_s)
        self._live_wake = asyncio.Event()
        self._limiter_ready: collections.deque[LiveEvent] = collections.deque()
        self._stack: contextlib.AsyncExitStack | None = None
        self._closing = False
        self._tasks: list[asyncio.Task[None]] = []

    # -- lifecycle --------------------------------------------------------------------
    async def __aenter__(self) -> Self:
        # Reading a password file and TLS certificates is disk I/O: keep it off the loop.
        self._password = await asyncio.to_thread(self.broker.read_password)
        if self.broker.tls:
            try:
                self._tls = await asyncio.to_thread(_tls_context, self.broker)
            except (OSError, ssl.SSLError) as exc:
                b = self.broker
                files = f"tls_ca={b.tls_ca}, tls_cert={b.tls_cert}, tls_key={b.tls_key}"
                raise TlsSetupError(f"TLS files ({files}) are unusable: {exc}") from exc
        self._started_at = _utcnow()
        stack = contextlib.AsyncExitStack()
        tg = await stack.enter_async_context(asyncio.TaskGroup())
        self._tasks = [
            tg.create_task(self._run(), name="clampd.mqtt.session"),
            tg.create_task(self._live_pump(), name="clampd.mqtt.live"),
        ]
        self._stack = stack
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        # A clean shutdown sends a normal DISCONNECT, after which the broker does not publish
        # the will (MQTT 5.0 §3.1.2.5): say "offline" ourselves first, best effort.
        with contextlib.suppress(MqttSessionError):
            offline = StationStatus.offline(self.station_id, _utcnow())
            await self._publish_route(offline)
        self._closing = True
        for task in self._tasks:
            task.cancel()
        stack, self._stack = self._stack, None
        if stack is not None:
            await stack.aclose()
        self.state.phase = Phase.CLOSED
        self.state.online.clear()

    # -- public API -------------------------------------------------------------------
    @property
    def _where(self) -> str:
        return f"{self.broker.host}:{self.broker.port}"

    @property
    def protocol(self) -> ProtocolLevel | None:
        """MQTT level of the current (or last) connection: "5" or "3.1.1"."""
        return self.state.protocol

    async def wait_online(self) -> int:
        """Wait until a connection is up and announced; return its generation number."""
        await self.state.online.wait()
        return self.state.generation

    async def publish(
        self,
        topic: str,
        payload: bytes,
        *,
        qos: Literal[0, 1],
        retain: bool = False,
        correlation_data: bytes | None = None,
    ) -> None:
        """Publish and, for QoS 1, return after the broker's PUBACK.

        ``correlation_data`` goes out as the MQTT 5 property (ignored on 3.1.1, which has no
        properties). Raises ``BrokerUnavailable`` when offline or when the connection goes
        before the acknowledgement; the message then may or may not have arrived.
        """
        client = self._client
        if client is None:
            self.state.stats.publish_failures += 1
            raise BrokerUnavailable(f"not connected to {self.broker.host}:{self.broker.port}")
        props = _correlation_properties(correlation_data) if self.state.protocol == "5" else None
        lost = self._lost
        pub = asyncio.create_task(
            client.publish(topic, payload, qos=qos, retain=retain, properties=props)
        )
        waiter = asyncio.create_task(lost.wait())
        try:
            await asyncio.wait((pub, waiter), return_when=asyncio.FIRST_COMPLETED)
        finally:
            waiter.cancel()
            if not pub.done():
                pub.cancel()
                # Let the cancellation land (a cancel only takes effect when the task runs).
                await asyncio.wait((pub,))
        if pub.cancelled():
            self.state.stats.publish_failures += 1
            raise BrokerUnavailable("connection lost before the broker acknowledged")
        error = pub.exception()
        if isinstance(error, aiomqtt.MqttError):
            self.state.stats.publish_failures += 1
            raise BrokerUnavailable(f"publish to {topic!r} failed: {error}") from None
        if error is not None:
            raise error
        self.state.stats.published += 1

    async def publish_model(self, payload: BaseModel) -> None:
        """Publish a station payload to its topic, QoS and retain from the topic table."""
        await self._publish_route(payload)

    async def publish_reply(self, address: ReplyAddress, payload: bytes) -> None:
        """Send a command's reply where the command asked for it (QoS 1, not retained).

        MQTT 5 Correlation Data is echoed as a property when the session speaks 5; the
        payload already carries ``correlation_id`` for 3.1.1 clients.
        """
        await self.publish(
            address.topic, payload, qos=1, retain=False, correlation_data=address.correlation_data
        )

    async def publish_status(self) -> None:
        """Publish the current retained ``online`` status (after a lock, select, ...)."""
        await self._publish_route(self._status_provider(_utcnow()))

    def publish_live(self, event: LiveEvent) -> None:
        """Hand a live event to the rate-limited QoS 0 path; never blocks, never raises.

        Dropped at once while offline: live events are for display only (MQTT.md).
        """
        stats = self.state.stats
        if self._client is None:
            stats.live_dropped += 1
            return
        now = asyncio.get_running_loop().time()
        send, coalesced = self._limiter.offer(event, now)
        stats.live_coalesced += coalesced
        if send is not None:
            self._limiter_ready.append(send)
        self._live_wake.set()

    async def commands(self) -> AsyncIterator[IncomingCommand]:
        """Messages from this station's command topics, across reconnects, in arrival order."""
        while True:
            yield await self._incoming.get()

    # -- internals --------------------------------------------------------------------
    def _default_status(self, at: dt.datetime) -> StationStatus:
        return StationStatus(
            station=self.station_id,
            state=LinkState.ONLINE,
            software_version=self.software_version,
            locked=False,
            selection=None,
            at=at,
        )

    async def _publish_route(self, payload: BaseModel) -> None:
        route = self.topics.route(payload)
        qos: Literal[0, 1] = 0 if route.qos == 0 else 1
        await self.publish(route.topic, _json(payload), qos=qos, retain=route.retain)

    def _client_for(self, level: ProtocolLevel) -> aiomqtt.Client:
        client = self._clients.get(level)
        if client is not None:
            return client
        b = self.broker
        will = StationStatus.offline(self.station_id, self._started_at)
        status_topic = self.topics.station_status()
        v5 = level == "5"
        client = _Client(
            b.host,
            b.port,
            username=b.username,
            password=self._password,
            identifier=self.client_id,
            protocol=aiomqtt.ProtocolVersion.V5 if v5 else aiomqtt.ProtocolVersion.V311,
            will=aiomqtt.Will(status_topic, will.to_json_bytes(), qos=1, retain=True),
            # A clean session on purpose: see the module docstring (no stale commands). paho
            # refuses any clean_start other than its default on 3.1.1.
            clean_session=None if v5 else True,
            clean_start=True if v5 else MQTT_CLEAN_START_FIRST_ONLY,
            keepalive=b.keepalive_s,
            timeout=self._ack_timeout_s,
            tls_context=self._tls,
            on_refused=self._publish_refused,
        )
        self._clients[level] = client
        return client

    def _publish_refused(self, mid: int, reason: str) -> None:
        self.state.stats.publishes_refused += 1
        _log.warning("broker %s refused a publish (message id %d): %s", self._where, mid, reason)

    async def _run(self) -> None:
        attempt = 0
        while True:
            self.state.phase = Phase.CONNECTING
            level = self._level
            client = self._client_for(level)
            try:
                async with client:
                    attempt = 0
                    await self._announce(client, level)
                    async for message in client.messages:
                        self._enqueue(message)
            except MqttConnectError as exc:
                code = _reason_value(exc.rc)
                if code in _PROTOCOL_REFUSED and self._may_fall_back(level):
                    self._fall_back(f"refused MQTT 5 (code {code})", final=True)
                    continue
                refusal = BrokerRefusedError(code or -1, _reason_text(exc))
                self.state.last_refusal = refusal
                self.state.last_error = str(refusal)
                _log.error("%s", self.state.last_error)
            except aiomqtt.MqttError as exc:
                self.state.last_error = f"connection to {self._where}: {exc}"
                if not self._ever_connected and await self._tcp_reachable():
                    # Reachable, but the handshake failed without a CONNACK. Some 3.1.1-only
                    # brokers choke on an MQTT 5 CONNECT instead of refusing it (amqtt 0.12
                    # misreads the v5 will properties and waits for bytes that never come).
                    if self._may_fall_back(level):
                        self._fall_back("gave no CONNACK to MQTT 5", final=False)
                        continue
                    if level == "3.1.1" and not self._fallback_final:
                        self._level = "5"  # the evidence was not about the protocol
                _log.warning("MQTT %s; reconnecting", self.state.last_error)
            finally:
                self._went_offline()
            delay = next_delay(attempt, self._rng)
            attempt += 1
            self.state.phase = Phase.WAITING
            await asyncio.sleep(delay)

    def _may_fall_back(self, level: ProtocolLevel) -> bool:
        return level == "5" and self.broker.protocol == "auto" and not self._ever_connected

    def _fall_back(self, why: str, *, final: bool) -> None:
        _log.warning("broker %s %s; falling back to MQTT 3.1.1", self._where, why)
        self._level = "3.1.1"
        self._fallback_final = final
        self.state.stats.fallbacks += 1

    async def _tcp_reachable(self) -> bool:
        """True when the broker's port accepts a connection, through TLS for mqtts:// (so a
        certificate problem never looks like a protocol problem); no MQTT is spoken."""
        try:
            async with asyncio.timeout(self._ack_timeout_s):
                _, writer = await asyncio.open_connection(
                    self.broker.host, self.broker.port, ssl=self._tls
                )
        except (OSError, TimeoutError):
            return False
        writer.close()
        with contextlib.suppress(OSError):
            await writer.wait_closed()
        return True

    async def _announce(self, client: aiomqtt.Client, level: ProtocolLevel) -> None:
        if level == "5":
            # Retain As Published (MQTT 5.0 §3.8.3.1): a command published retained reaches
            # the station with its retain flag set even while the station is connected, so
            # it is refused at once instead of being carried out live and then replayed at
            # every reconnect. MQTT 3.1.1 has no such option: there only the stored copy
            # shows the flag.
            await client.subscribe(
                self.topics.command_filter(),
                options=SubscribeOptions(qos=1, retainAsPublished=True),
            )
        else:
            await client.subscribe(self.topics.command_filter(), qos=1)
        self._lost = asyncio.Event()
        self._client = client
        self.state.protocol = level
        try:
            await self.publish_status()
        except BrokerUnavailable as exc:
            raise aiomqtt.MqttError(f"announcing online status failed: {exc}") from None
        self._ever_connected = True
        self.state.generation += 1
        self.state.stats.connects += 1
        self.state.phase = Phase.ONLINE
        self.state.last_error = None
        self.state.last_refusal = None
        self.state.online.set()
        _log.info(
            "MQTT %s connected to %s:%s as %r (connection %d)",
            level,
            self.broker.host,
            self.broker.port,
            self.client_id,
            self.state.generation,
        )

    def _went_offline(self) -> None:
        was_online = self.state.online.is_set()
        self.state.online.clear()
        self._client = None
        self._lost.set()
        self.state.stats.live_dropped += self._limiter.clear() + len(self._limiter_ready)
        self._limiter_ready.clear()
        if was_online and not self._closing:
            self.state.stats.connection_losses += 1

    def _enqueue(self, message: aiomqtt.Message) -> None:
        payload = message.payload
        cmd = IncomingCommand(
            topic=str(message.topic),
            payload=payload if isinstance(payload, bytes) else str(payload).encode(),
            properties=_command_properties(message.properties),
            retained=bool(message.retain),
        )
        self.state.stats.commands_received += 1
        try:
            self._incoming.put_nowait(cmd)
        except asyncio.QueueFull:
            self.state.stats.commands_dropped += 1
            _log.warning(
                "command queue full (%d); dropped a command on %s", _COMMAND_QUEUE, cmd.topic
            )

    async def _live_pump(self) -> None:
        loop = asyncio.get_running_loop()
        while True:
            due = self._limiter.next_due()
            timeout = None if due is None else max(0.0, due - loop.time())
            with contextlib.suppress(TimeoutError):
                async with asyncio.timeout(timeout):
                    await self._live_wake.wait()
            self._live_wake.clear()
            batch = list(self._limiter_ready)
            self._limiter_ready.clear()
            batch.extend(self._limiter.take_due(loop.time()))
            for event in batch:
                try:
                    await self._publish_route(event)
                except MqttSessionError:
                    self.state.stats.live_dropped += 1
                else:
                    self.state.stats.live_sent += 1


class _Client(aiomqtt.Client):
    """aiomqtt's client, except that a refused PUBACK is not taken for a delivery.

    aiomqtt 2.5 confirms a publish on any PUBACK, whatever its reason code; a result the
    broker's ACL discarded would then be marked sent in the outbox and lost. A failure code
    leaves the publish unconfirmed (see the module docstring) and is reported to
    ``on_refused``.
    """

    def __init__(self, *args: Any, on_refused: Callable[[int, str], None], **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._on_refused = on_refused

    def _on_publish(
        self,
        client: paho_client.Client,
        userdata: Any,
        mid: int,
        reason_code: ReasonCode,
        properties: Properties,
    ) -> None:
        if reason_code.is_failure:
            self._on_refused(mid, str(reason_code))
            return
        super()._on_publish(client, userdata, mid, reason_code, properties)


def _json(payload: BaseModel) -> bytes:
    return payload.model_dump_json().encode()
