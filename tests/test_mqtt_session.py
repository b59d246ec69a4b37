"""The MQTT session adapter against a real broker (mosquitto from the ``broker`` fixture).

External references used below:
- MQTT Version 5.0, OASIS Standard (2019): §3.1.2.5 (the will is published when the network
  connection closes without a DISCONNECT), §3.1.2.11.2 (Session Expiry Interval), §3.2.2.2
  (CONNACK reason 0x84 Unsupported Protocol Version), §3.3.1.3 (retained messages are sent to
  new subscribers with RETAIN set), §3.3.2.3.5–6 (Response Topic, Correlation Data).
- MQTT Version 3.1.1, OASIS Standard (2014): §3.1.2.2 (protocol level 4).
- amqtt 0.12 speaks MQTT 3.1.1 only and refuses an MQTT 5 CONNECT with code 132 (measured on
  these machines, ../shared/NOTES-ble-mqtt.md): it is the real 3.1.1-only peer for fallback.
"""

from __future__ import annotations

import asyncio
import gc
import itertools
import os
import random
import signal
import sys
import textwrap
import warnings
from collections.abc import AsyncIterator
from pathlib import Path

import aiomqtt
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from clampd.daemon.runtime import (
    LIVE_INTERVAL_S,
    BrokerConfig,
    BrokerUnavailable,
    IncomingCommand,
    LiveLimiter,
    MqttSession,
    PlaintextRemoteError,
    TlsSetupError,
)
from clampd.protocol import (
    CommandName,
    CueKind,
    LiveCue,
    LiveEvent,
    LiveProgress,
    StationState,
    StationStatus,
    Topics,
    new_uuid7,
)
from clampd.simulators._broker import LocalBroker, free_port

STATION = "st-120"


def _config(broker: LocalBroker, **extra: object) -> BrokerConfig:
    return BrokerConfig.model_validate({"url": broker.url, **extra})


def _session(broker: LocalBroker, prefix: str, **extra: object) -> MqttSession:
    return MqttSession(
        _config(broker, **extra),
        Topics(prefix),
        station_id=STATION,
        client_id=f"clampd-{prefix.replace('/', '-')}",
        software_version="0.test",
        rng=random.Random(7),
    )


def _v5_props(kind: int) -> Properties:
    return Properties(kind)  # type: ignore[no-untyped-call]


async def _retained(broker: LocalBroker, topic: str, *, v5: bool = True) -> aiomqtt.Message:
    """What a subscriber that arrives now receives first on ``topic`` (a retained message)."""
    proto = aiomqtt.ProtocolVersion.V5 if v5 else aiomqtt.ProtocolVersion.V311
    async with aiomqtt.Client(broker.host, broker.port, protocol=proto) as late:
        await late.subscribe(topic, qos=1)
        async with asyncio.timeout(10):
            return await anext(aiter(late.messages))


async def _next_command(session: MqttSession) -> IncomingCommand:
    async with asyncio.timeout(10):
        return await anext(aiter(session.commands()))


async def test_connects_with_mqtt5_and_announces_online_retained(
    broker: LocalBroker, topic_prefix: str
) -> None:
    """MQTT 5 is tried first and kept; the online status is retained (MQTT 5.0 §3.3.1.3)."""
    assert 5 in broker.protocol_versions, "this test needs mosquitto"
    async with _session(broker, topic_prefix) as session:
        generation = await asyncio.wait_for(session.wait_online(), 10)
        assert generation == 1
        assert session.protocol == "5"
        msg = await _retained(broker, Topics(topic_prefix).station_status())
    assert msg.retain
    status = StationStatus.model_validate_json(bytes(msg.payload))
    assert status.state is StationState.ONLINE
    assert status.station == STATION
    assert status.software_version == "0.test"


async def test_clean_shutdown_says_offline_itself(broker: LocalBroker, topic_prefix: str) -> None:
    """A normal DISCONNECT suppresses the will (MQTT 5.0 §3.1.2.5), so the station publishes
    ``offline`` before it leaves."""
    async with _session(broker, topic_prefix) as session:
        await asyncio.wait_for(session.wait_online(), 10)
    msg = await _retained(broker, Topics(topic_prefix).station_status())
    assert StationStatus.model_validate_json(bytes(msg.payload)).state is StationState.OFFLINE


_CHILD = textwrap.dedent(
    """
    import asyncio, random, sys
    from clampd.daemon.runtime import BrokerConfig, MqttSession
    from clampd.protocol import Topics

    async def main() -> None:
        cfg = BrokerConfig(url=sys.argv[1])
        async with MqttSession(cfg, Topics(sys.argv[2]), station_id="st-120",
                               client_id="clampd-will-test", rng=random.Random(1)) as s:
            await s.wait_online()
            print("online", flush=True)
            await asyncio.sleep(3600)

    asyncio.run(main())
    """
)


async def test_last_will_offline_after_the_process_is_killed(
    broker: LocalBroker, topic_prefix: str
) -> None:
    """SIGKILL gives no DISCONNECT: the broker publishes the registered will, retained."""
    child = await asyncio.create_subprocess_exec(
        sys.executable,
        "-c",
        _CHILD,
        broker.url,
        topic_prefix,
        stdout=asyncio.subprocess.PIPE,
    )
    try:
        assert child.stdout is not None
        async with asyncio.timeout(30):
            line = await child.stdout.readline()
        assert line.strip() == b"online"
        first = await _retained(broker, Topics(topic_prefix).station_status())
        assert StationStatus.model_validate_json(bytes(first.payload)).state is StationState.ONLINE
    finally:
        child.send_signal(signal.SIGKILL)
        await child.wait()
    assert child.returncode == -signal.SIGKILL
    # The broker notices the closed socket and publishes the will; poll the retained value.
    state = StationState.ONLINE
    async with asyncio.timeout(15):
        while state is StationState.ONLINE:
            msg = await _retained(broker, Topics(topic_prefix).station_status())
            assert msg.retain
            status = StationStatus.model_validate_json(bytes(msg.payload))
            state = status.state
            await asyncio.sleep(0.05)
    assert state is StationState.OFFLINE
    assert status.locked  # the will declares the station locked: nothing runs without it


@pytest.fixture
async def amqtt_broker() -> AsyncIterator[tuple[str, int]]:
    """amqtt in-process, built directly so CLAMPD_REQUIRE_MOSQUITTO cannot swap it out."""
    from amqtt.broker import Broker

    port = free_port()
    config = {
        "listeners": {"default": {"type": "tcp", "bind": f"127.0.0.1:{port}"}},
        "plugins": {"amqtt.plugins.authentication.AnonymousAuthPlugin": {"allow_anonymous": True}},
    }
    b = Broker(config)
    await b.start()
    try:
        yield "127.0.0.1", port
    finally:
        await b.shutdown()
        # amqtt does not close the server side of a connection whose CONNECT it could not
        # read (our MQTT 5 attempt, the TCP probe): close those writers here, or Python
        # reports the unclosed sockets at some later, unrelated moment.
        for obj in gc.get_objects():
            if isinstance(obj, asyncio.StreamWriter):
                name = obj.get_extra_info("sockname")
                if isinstance(name, tuple) and name[1] == port:
                    obj.close()
        await asyncio.sleep(0.1)  # the loop closes the sockets in the transports' callbacks


# The same amqtt leak, when Python collects the sockets while the test still runs.
_AMQTT_LEAKS = pytest.mark.filterwarnings("ignore::pytest.PytestUnraisableExceptionWarning")


@_AMQTT_LEAKS
async def test_falls_back_to_mqtt311_when_the_broker_refuses_5(
    amqtt_broker: tuple[str, int], topic_prefix: str
) -> None:
    """amqtt cannot take an MQTT 5 CONNECT (refuses with 132, MQTT 5.0 §3.2.2.2, or with a
    will never answers at all): the session switches to 3.1.1, remembers it, and publishes
    and receives commands there."""
    host, port = amqtt_broker
    topics = Topics(topic_prefix)
    cfg = BrokerConfig(url=f"mqtt://{host}:{port}")
    # A short CONNACK wait: amqtt never answers our MQTT 5 CONNECT (it chokes on the will).
    session = MqttSession(
        cfg,
        topics,
        station_id=STATION,
        client_id="clampd-fallback",
        rng=random.Random(3),
        ack_timeout_s=1.0,
    )
    async with (
        session,
        aiomqtt.Client(host, port, protocol=aiomqtt.ProtocolVersion.V311) as mes,
    ):
        await asyncio.wait_for(session.wait_online(), 10)
        assert session.protocol == "3.1.1"
        assert session.state.stats.fallbacks == 1
        await mes.subscribe(f"{topic_prefix}/result", qos=1)
        await session.publish(f"{topic_prefix}/result", b'{"n": 1}', qos=1)
        async with asyncio.timeout(10):
            got = await anext(aiter(mes.messages))
        assert got.payload == b'{"n": 1}'
        await mes.publish(topics.command(CommandName.PING), b'{"schema_version": "1"}', qos=1)
        cmd = await _next_command(session)
        assert cmd.topic == topics.command(CommandName.PING)
        assert cmd.properties.response_topic is None  # 3.1.1 carries no properties


@_AMQTT_LEAKS
async def test_configured_mqtt5_does_not_fall_back(
    amqtt_broker: tuple[str, int], topic_prefix: str
) -> None:
    """``protocol = "5"`` means 5 only: the refusal is kept as the last error, no fallback."""
    host, port = amqtt_broker
    cfg = BrokerConfig(url=f"mqtt://{host}:{port}", protocol="5")
    session = MqttSession(
        cfg,
        Topics(topic_prefix),
        station_id=STATION,
        client_id="c5",
        rng=random.Random(3),
        ack_timeout_s=1.0,
    )
    async with session:
        async with asyncio.timeout(10):
            while session.state.last_error is None:  # noqa: ASYNC110 -- a value, no event
                await asyncio.sleep(0.01)
        assert session.state.last_error.startswith(f"connection to {host}:{port}")
        assert session.state.stats.fallbacks == 0
        assert not session.state.online.is_set()
        with pytest.raises(BrokerUnavailable):
            await session.publish(f"{topic_prefix}/result", b"{}", qos=1)


async def test_publish_without_broker_raises_typed_error(topic_prefix: str) -> None:
    """Nothing listens on the port: ``publish`` says so with our error, at once."""
    cfg = BrokerConfig(url=f"mqtt://127.0.0.1:{free_port()}")
    session = MqttSession(
        cfg, Topics(topic_prefix), station_id=STATION, client_id="c", rng=random.Random(1)
    )
    async with session:
        with pytest.raises(BrokerUnavailable, match="not connected"):
            await session.publish(f"{topic_prefix}/result", b"{}", qos=1)
    assert session.state.stats.publish_failures >= 1


def test_plaintext_to_a_remote_broker_is_refused(topic_prefix: str) -> None:
    """mqtt:// to a non-loopback host needs the explicit opt-in, also at the session."""
    allowed = BrokerConfig(url="mqtt://mes.example.net", allow_plaintext_remote=True)
    sneaky = allowed.model_copy(update={"allow_plaintext_remote": False})
    with pytest.raises(PlaintextRemoteError, match=r"mes\.example\.net"):
        MqttSession(sneaky, Topics(topic_prefix), station_id=STATION, client_id="c")


async def test_command_properties_and_correlated_reply(
    broker: LocalBroker, topic_prefix: str
) -> None:
    """Response Topic and Correlation Data (MQTT 5.0 §3.3.2.3.5–6) reach the handler side,
    and the reply echoes the correlation data as a property."""
    topics = Topics(topic_prefix)
    reply_topic = f"{topic_prefix}-mes/replies"
    async with (
        _session(broker, topic_prefix) as session,
        aiomqtt.Client(broker.host, broker.port, protocol=aiomqtt.ProtocolVersion.V5) as mes,
    ):
        await asyncio.wait_for(session.wait_online(), 10)
        await mes.subscribe(reply_topic, qos=1)
        props = _v5_props(PacketTypes.PUBLISH)
        props.ResponseTopic = reply_topic
        props.CorrelationData = b"\x00\xffjob-9"
        await mes.publish(
            topics.command(CommandName.PING), b'{"schema_version":"1"}', qos=1, properties=props
        )
        cmd = await _next_command(session)
        assert cmd.properties.response_topic == reply_topic
        assert cmd.properties.correlation_data == b"\x00\xffjob-9"
        assert not cmd.retained
        from clampd.protocol import ReplyAddress

        await session.publish_reply(
            ReplyAddress(topic=reply_topic, via="mqtt5", correlation_data=b"\x00\xffjob-9"),
            b'{"r": 1}',
        )
        async with asyncio.timeout(10):
            answer = await anext(aiter(mes.messages))
    assert answer.payload == b'{"r": 1}'
    assert answer.properties is not None
    assert getattr(answer.properties, "CorrelationData", None) == b"\x00\xffjob-9"


async def test_reconnects_resubscribes_and_announces_again(
    broker: LocalBroker, topic_prefix: str
) -> None:
    """After the broker restarts, the same session is online again (generation 2), its
    status retained anew and its command subscription back."""
    topics = Topics(topic_prefix)
    async with _session(broker, topic_prefix) as session:
        assert await asyncio.wait_for(session.wait_online(), 10) == 1
        await broker.stop()
        async with asyncio.timeout(10):
            while session.state.online.is_set():  # noqa: ASYNC110 -- waits for a clear
                await asyncio.sleep(0.01)
        with pytest.raises(BrokerUnavailable):
            await session.publish(f"{topic_prefix}/result", b"{}", qos=1)
        broker.wipe()  # forget the retained status: the new one must come from the session
        await broker.start()
        assert await asyncio.wait_for(session.wait_online(), 60) == 2
        assert session.state.stats.connection_losses == 1
        msg = await _retained(broker, topics.station_status())
        assert StationStatus.model_validate_json(bytes(msg.payload)).state is StationState.ONLINE
        async with aiomqtt.Client(broker.host, broker.port) as mes:
            await mes.publish(topics.command(CommandName.LOCK), b"{}", qos=1)
        cmd = await _next_command(session)
        assert cmd.topic == topics.command(CommandName.LOCK)


def _progress(wrench: str, rid: str, t_s: float) -> LiveProgress:
    return LiveProgress(
        station=STATION, wrench_id=wrench, rundown_id=rid, t_s=t_s, torque_nm=t_s, angle_deg=None
    )


async def test_live_events_are_rate_limited_and_the_latest_wins(
    broker: LocalBroker, topic_prefix: str
) -> None:
    """A burst of 300 progress events leaves as at most one per interval, and the last one
    offered is the last one received (latest wins). QoS 0 (MQTT.md)."""
    topics = Topics(topic_prefix)
    rid = new_uuid7()
    async with (
        _session(broker, topic_prefix) as session,
        aiomqtt.Client(broker.host, broker.port, protocol=aiomqtt.ProtocolVersion.V5) as mes,
    ):
        await asyncio.wait_for(session.wait_online(), 10)
        await mes.subscribe(topics.live("w1"), qos=0)
        loop = asyncio.get_running_loop()
        start = loop.time()
        for i in range(300):
            session.publish_live(_progress("w1", rid, i / 1000))
            if i % 30 == 0:
                await asyncio.sleep(0.01)
        span = loop.time() - start
        received: list[float] = []
        async with asyncio.timeout(10):
            async for msg in mes.messages:
                received.append(LiveProgress.model_validate_json(bytes(msg.payload)).t_s)
                if received[-1] == 0.299:
                    break
    assert received == sorted(received)
    assert len(received) <= span / LIVE_INTERVAL_S + 2
    stats = session.state.stats
    assert stats.live_sent == len(received)
    assert stats.live_coalesced == 300 - len(received)


def test_live_events_are_dropped_while_offline(topic_prefix: str) -> None:
    """No connection: a live event is counted as dropped, never queued."""

    async def go() -> int:
        cfg = BrokerConfig(url=f"mqtt://127.0.0.1:{free_port()}")
        session = MqttSession(cfg, Topics(topic_prefix), station_id=STATION, client_id="c")
        session.publish_live(_progress("w1", new_uuid7(), 0.0))
        return session.state.stats.live_dropped

    assert asyncio.run(go()) == 1


_events = st.lists(
    st.tuples(
        st.sampled_from(["w1", "w2"]),
        st.booleans(),  # True: a discrete cue, False: progress
        st.floats(min_value=0.0, max_value=0.2),  # time step
    ),
    max_size=60,
)


@given(_events)
@settings(max_examples=200, deadline=None)
def test_limiter_spacing_order_and_latest_wins(events: list[tuple[str, bool, float]]) -> None:
    """Pure limiter: per wrench never two sends closer than the interval, cues never lost
    or reordered (while below the bound), and the last progress always goes out."""
    lim = LiveLimiter(0.05)
    rid = new_uuid7()
    now = 0.0
    sent: list[tuple[float, LiveEvent]] = []
    offered: dict[str, list[LiveEvent]] = {"w1": [], "w2": []}
    for n, (wrench, is_cue, step) in enumerate(events):
        now += step
        sent.extend((now, e) for e in lim.take_due(now))
        event: LiveEvent
        if is_cue:
            event = LiveCue(
                station=STATION,
                wrench_id=wrench,
                rundown_id=rid,
                t_s=float(n),
                cue=CueKind.APPROACH,
                torque_nm=1.0,
            )
        else:
            event = _progress(wrench, rid, float(n))
        offered[wrench].append(event)
        out, _ = lim.offer(event, now)
        if out is not None:
            sent.append((now, out))
    while (due := lim.next_due()) is not None:
        now = max(now, due)
        sent.extend((now, e) for e in lim.take_due(now))
    for wrench in ("w1", "w2"):
        mine = [(t, e) for t, e in sent if e.wrench_id == wrench]
        times = [t for t, _ in mine]
        assert all(b - a >= 0.05 - 1e-12 for a, b in itertools.pairwise(times))
        cues_in = [e for e in offered[wrench] if isinstance(e, LiveCue)]
        cues_out = [e for _, e in mine if isinstance(e, LiveCue)]
        if len(cues_in) <= 8:
            assert cues_out == cues_in
        progress_in = [e for e in offered[wrench] if isinstance(e, LiveProgress)]
        progress_out = [e for _, e in mine if isinstance(e, LiveProgress)]
        if progress_in:
            assert progress_out[-1] == progress_in[-1]
        assert len({id(e) for _, e in mine}) == len(mine)


def test_session_module_is_the_only_aiomqtt_importer() -> None:
    """STYLE.md: only the MQTT adapter imports aiomqtt (read the daemon's sources)."""
    import pathlib

    root = pathlib.Path(__file__).resolve().parents[1] / "daemon"
    users = sorted(
        str(p.relative_to(root))
        for p in root.rglob("*.py")
        if "import aiomqtt" in p.read_text() or "from aiomqtt" in p.read_text()
    )
    assert users == [os.path.join("runtime", "_mqtt.py")]


async def test_no_blocking_call_in_the_event_loop(
    broker: LocalBroker, topic_prefix: str, blockbuster: object
) -> None:
    """Connect, announce, publish, receive a command and a live event with blockbuster
    watching clampd's frames: any blocking file, socket or sleep call in the loop fails."""
    topics = Topics(topic_prefix)
    async with _session(broker, topic_prefix) as session:
        await asyncio.wait_for(session.wait_online(), 10)
        await session.publish(f"{topic_prefix}/result", b'{"n": 1}', qos=1)
        session.publish_live(_progress("w1", new_uuid7(), 0.0))
        async with aiomqtt.Client(broker.host, broker.port) as mes:
            await mes.publish(topics.command(CommandName.PING), b"{}", qos=1)
        cmd = await _next_command(session)
    assert cmd.payload == b"{}"
    assert session.state.stats.published >= 2  # online status and the result


async def test_password_file_login_and_refusal(tmp_path: Path, topic_prefix: str) -> None:
    """mosquitto with a password file: the right password (read from our password_file)
    connects; a wrong one is refused by CONNACK (MQTT 5.0 §3.2.2.2: 0x86 = 134 Bad User Name
    or Password, or 0x87 = 135 Not authorized; mosquitto 2.0 answers 135, measured here),
    kept as the last refusal, never online, and publish says so."""
    hashed = tmp_path / "broker-passwd"
    proc = await asyncio.create_subprocess_exec(
        "mosquitto_passwd", "-b", "-c", str(hashed), "st-120", "deck-line-3"
    )
    assert await proc.wait() == 0
    good = tmp_path / "good.secret"
    good.write_text("deck-line-3\n")
    bad = tmp_path / "bad.secret"
    bad.write_text("deck-line-4\n")
    (tmp_path / "broker").mkdir()
    async with LocalBroker(
        workdir=tmp_path / "broker", extra_config=f"password_file {hashed}\n"
    ) as broker:
        ok = _session(broker, topic_prefix, username="st-120", password_file=str(good))
        async with ok:
            await asyncio.wait_for(ok.wait_online(), 10)
            assert ok.protocol == "5"
        refused = _session(broker, topic_prefix, username="st-120", password_file=str(bad))
        async with refused:
            async with asyncio.timeout(10):
                while refused.state.last_error is None:  # noqa: ASYNC110 -- a value, no event
                    await asyncio.sleep(0.01)
            refusal = refused.state.last_refusal
            assert refusal is not None
            assert refusal.code in (134, 135)
            assert refused.state.last_error == str(refusal)
            assert refused.state.stats.fallbacks == 0  # a refusal of credentials is no reason
            with pytest.raises(BrokerUnavailable):
                await refused.publish(f"{topic_prefix}/result", b"{}", qos=1)
        assert not refused.state.online.is_set()


async def _openssl(*args: str) -> None:
    proc = await asyncio.create_subprocess_exec(
        "openssl", *args, stdout=asyncio.subprocess.DEVNULL, stderr=asyncio.subprocess.DEVNULL
    )
    assert await proc.wait() == 0, f"openssl {args[0]} failed"


async def _make_pki(d: Path) -> tuple[Path, Path, Path]:
    """A throw-away CA and a server certificate for 127.0.0.1 (RFC 5280 §4.2.1.6: an IP
    address in subjectAltName is what a client checks for an IP host)."""
    ec = ("-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes")
    ca, ca_key = d / "ca.pem", d / "ca.key"
    await _openssl(
        "req", "-x509", *ec, "-keyout", str(ca_key), "-out", str(ca), "-days", "2",
        "-subj", "/CN=clampd test CA", "-addext", "basicConstraints=critical,CA:TRUE",
        "-addext", "keyUsage=critical,keyCertSign,cRLSign",
    )  # fmt: skip
    key, csr, cert = d / "server.key", d / "server.csr", d / "server.pem"
    await _openssl("req", *ec, "-keyout", str(key), "-out", str(csr), "-subj", "/CN=127.0.0.1")
    ext = d / "server.ext"
    ext.write_text("subjectAltName=IP:127.0.0.1\n")
    await _openssl(
        "x509", "-req", "-in", str(csr), "-CA", str(ca), "-CAkey", str(ca_key),
        "-CAcreateserial", "-out", str(cert), "-days", "2", "-extfile", str(ext),
    )  # fmt: skip
    return ca, cert, key


# paho does not close its client socket when the TLS handshake fails during connect; Python
# reports it when it collects the socket (the fd is freed then). paho's, not ours.
@pytest.mark.filterwarnings("ignore::pytest.PytestUnraisableExceptionWarning")
async def test_tls_with_the_configured_ca_and_refusal_without_it(
    tmp_path: Path, topic_prefix: str
) -> None:
    """mqtts:// to a mosquitto TLS listener: verified against ``tls_ca`` it connects; against
    the system trust store the certificate fails, the session stays offline, and a TLS
    failure is never mistaken for a protocol refusal (no fallback)."""
    ca, cert, key = await _make_pki(tmp_path)
    (tmp_path / "broker").mkdir()
    extra = f"certfile {cert}\nkeyfile {key}\n"
    async with LocalBroker(workdir=tmp_path / "broker", extra_config=extra) as broker:
        url = f"mqtts://127.0.0.1:{broker.port}"
        topics = Topics(topic_prefix)
        good = MqttSession(
            BrokerConfig(url=url, tls_ca=ca),
            topics,
            station_id=STATION,
            client_id="clampd-tls",
            rng=random.Random(4),
        )
        async with good:
            await asyncio.wait_for(good.wait_online(), 10)
            assert good.protocol == "5"
            await good.publish(f"{topic_prefix}/result", b"{}", qos=1)
        untrusted = MqttSession(
            BrokerConfig(url=url),
            topics,
            station_id=STATION,
            client_id="clampd-tls-untrusted",
            rng=random.Random(4),
            ack_timeout_s=2.0,
        )
        async with untrusted:
            async with asyncio.timeout(10):
                while untrusted.state.last_error is None:  # noqa: ASYNC110 -- a value
                    await asyncio.sleep(0.01)
            assert "CERTIFICATE_VERIFY_FAILED" in untrusted.state.last_error
            assert untrusted.state.stats.fallbacks == 0
            assert not untrusted.state.online.is_set()
    # Collect paho's unclosed socket now, quietly, rather than at some unrelated moment.
    del good, untrusted
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ResourceWarning)
        gc.collect()


def test_unreadable_tls_files_are_a_typed_error(tmp_path: Path, topic_prefix: str) -> None:
    cfg = BrokerConfig(url="mqtts://127.0.0.1:8883", tls_ca=tmp_path / "missing-ca.pem")
    session = MqttSession(cfg, Topics(topic_prefix), station_id=STATION, client_id="c")

    async def enter() -> None:
        async with session:
            pass

    with pytest.raises(TlsSetupError, match=r"missing-ca\.pem"):
        asyncio.run(enter())
