"""MQTT topics, payload models and command parsing (issue 2, part 5).

External references used below:
- MQTT Version 5.0, OASIS Standard (2019): §4.7.1 (``+``/``#`` are wildcards, not allowed in a
  topic name), §4.7.2 (topics starting with ``$`` are the broker's), §4.7.3 (topic names are
  UTF-8 strings, at most 65 535 bytes per §1.5.4, no NUL), §3.3.2.3.5–6 (Response Topic,
  Correlation Data).
- RFC 9562 §5.7 (UUIDv7 layout), checked with the standard library's ``uuid`` module.
- ISO 8601 / RFC 3339 timestamps, read back with ``datetime.fromisoformat``.
"""

from __future__ import annotations

import asyncio
import datetime as dt
import json
import time
import uuid
from pathlib import Path
from typing import Any

import aiomqtt
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties
from pydantic import BaseModel, ValidationError

from clampd.protocol import (
    MAX_COMMAND_BYTES,
    TOPIC_TABLE,
    Abort,
    Command,
    CommandError,
    CommandName,
    CommandProperties,
    ErrorCode,
    Judgement,
    Lock,
    Ping,
    Reason,
    Reply,
    ReplyStatus,
    RundownResult,
    SelectProgram,
    StationState,
    StationStatus,
    TopicError,
    Topics,
    Unlock,
    error_reply,
    new_uuid7,
    ok_reply,
    parse_command,
)
from clampd.simulators._broker import LocalBroker

EXAMPLES = Path(__file__).resolve().parents[1] / "protocol" / "examples"
PREFIX = "brackenfield/deck-assembly/line-3/st-120"
TOPICS = Topics(PREFIX)
AT = dt.datetime(2026, 5, 12, 7, 41, 5, tzinfo=dt.UTC)


def _example(name: str) -> dict[str, Any]:
    data: dict[str, Any] = json.loads((EXAMPLES / f"{name}.json").read_text())
    return data


# ---------------------------------------------------------------- topics


@pytest.mark.parametrize(
    "prefix",
    [
        "",
        "a//b",
        "a/",
        "/a",
        "a/+/b",
        "a/#",
        "plant/line+1",
        "$SYS/clampd",
        "a\x00b",
        "a\nb",
        "x" * 65_536,
    ],
)
def test_bad_prefixes_are_refused(prefix: str) -> None:
    """MQTT 5.0 §4.7: no wildcards, no NUL, at most 65 535 bytes; ``$`` is the broker's.
    Empty levels and control characters are refused by our own, stricter rule."""
    with pytest.raises(TopicError):
        Topics(prefix)


def test_concrete_topics_follow_the_table() -> None:
    assert TOPICS.result() == f"{PREFIX}/result"
    assert TOPICS.station_status() == f"{PREFIX}/status"
    assert TOPICS.wrench_status("wr-07") == f"{PREFIX}/wrench/wr-07/status"
    assert TOPICS.live("wr-07") == f"{PREFIX}/wrench/wr-07/live"
    assert TOPICS.stats("spindle-m10-8.8", "wr-07") == f"{PREFIX}/stats/spindle-m10-8.8/wr-07"
    assert TOPICS.alarm() == f"{PREFIX}/alarm"
    assert TOPICS.reply_default() == f"{PREFIX}/reply"
    assert TOPICS.command(CommandName.LOCK) == f"{PREFIX}/cmd/lock"
    assert TOPICS.command_filter() == f"{PREFIX}/cmd/+"


@pytest.mark.parametrize("level", ["wr/07", "+", "#", "", "wr 07", "-lead", "wr-07\n"])
def test_identifiers_that_cannot_be_a_topic_level_are_refused(level: str) -> None:
    with pytest.raises(TopicError):
        TOPICS.wrench_status(level)


def test_delivery_rules_of_the_table() -> None:
    """Results at least once and not retained; status retained; live events fire-and-forget."""
    by_name = {spec.name: spec for spec in TOPIC_TABLE.values()}
    assert (by_name["RundownResult"].qos, by_name["RundownResult"].retain) == (1, False)
    assert by_name["StationStatus"].retain
    assert by_name["WrenchStatus"].retain
    assert by_name["QualityStats"].retain
    assert not by_name["Alarm"].retain
    for live in ("LiveProgress", "LiveCue", "LiveSnug", "LiveStop"):
        assert (by_name[live].qos, by_name[live].retain) == (0, False)
    commands = {s.name for s in TOPIC_TABLE.values() if s.direction == "subscribe"}
    assert commands == {"SelectProgram", "Lock", "Unlock", "Abort", "Ping"}
    assert {s.pattern for s in TOPIC_TABLE.values() if s.direction == "subscribe"} == {
        f"cmd/{c.value}" for c in CommandName
    }


@pytest.mark.parametrize(
    ("model", "example", "topic"),
    [
        (RundownResult, "RundownResult", f"{PREFIX}/result"),
        (StationStatus, "StationStatus.offline", f"{PREFIX}/status"),
    ],
)
def test_route_fills_the_pattern_from_the_payload(
    model: type[BaseModel], example: str, topic: str
) -> None:
    payload = model.model_validate_json(json.dumps(_example(example)))
    route = TOPICS.route(payload)
    spec = TOPIC_TABLE[model]
    assert (route.topic, route.qos, route.retain) == (topic, spec.qos, spec.retain)


def test_route_of_every_published_example() -> None:
    for model, spec in TOPIC_TABLE.items():
        if spec.direction != "publish":
            continue
        payload = model.model_validate_json((EXAMPLES / f"{spec.name}.json").read_bytes())
        route = TOPICS.route(payload)
        expected = spec.pattern
        for name in spec.parameters:
            expected = expected.replace("{" + name + "}", str(getattr(payload, name)))
        assert route.topic == f"{PREFIX}/{expected}"


def test_route_refuses_a_command() -> None:
    with pytest.raises(TopicError, match="not a payload the station publishes"):
        TOPICS.route(Ping(schema_version="1"))


@pytest.mark.parametrize(
    "topic",
    [
        f"{PREFIX}/cmdx/lock",
        f"{PREFIX}/cmd/lock/extra",
        f"{PREFIX}x/cmd/lock",
        "other/plant/cmd/lock",
        f"{PREFIX}/cmd/",
    ],
)
def test_command_topics_outside_the_tree_are_refused(topic: str) -> None:
    with pytest.raises(TopicError):
        TOPICS.parse_command_topic(topic)
    with pytest.raises(CommandError) as info:
        parse_command(TOPICS, topic, b'{"schema_version": "1"}')
    assert info.value.code is ErrorCode.BAD_TOPIC


# ---------------------------------------------------------------- result model


def test_uuid7_ids_follow_rfc_9562() -> None:
    before_ms = time.time_ns() // 1_000_000
    value = new_uuid7()
    after_ms = time.time_ns() // 1_000_000
    parsed = uuid.UUID(value)
    assert parsed.version == 7
    assert parsed.variant == uuid.RFC_4122
    assert before_ms <= parsed.int >> 80 <= after_ms  # unix_ts_ms, the top 48 bits
    assert str(parsed) == value


def test_result_round_trips_and_writes_utc_iso_times() -> None:
    raw = (EXAMPLES / "RundownResult.json").read_bytes()
    result = RundownResult.model_validate_json(raw)
    again = RundownResult.model_validate_json(result.to_json_bytes())
    assert again == result
    wire = json.loads(result.to_json_bytes())
    started = dt.datetime.fromisoformat(wire["started_at"])
    assert started.utcoffset() == dt.timedelta(0)
    assert wire["curve"]["units"] == {"t": "s", "angle": "deg", "torque": "N*m"}
    assert uuid.UUID(wire["id"]).version == 7


def _result_with(**changes: Any) -> bytes:
    data = _example("RundownResult")
    for dotted, value in changes.items():
        target = data
        *path, last = dotted.split("__")
        for key in path:
            target = target[key]
        target[last] = value
    return json.dumps(data).encode()


@pytest.mark.parametrize(
    ("changes", "message"),
    [
        ({"reasons": ["torque_low"]}, "status OK must have no reasons"),
        ({"status": "NOK"}, "status OK must have no reasons, NOK at least one"),
        ({"status": "NOK", "reasons": ["aborted", "aborted"]}, "reasons repeat"),
        ({"started_at": "2026-05-12T09:41:03+02:00"}, "UTC"),
        ({"started_at": "2026-05-12T07:41:03"}, "timezone"),
        ({"finished_at": "2026-05-12T07:41:00Z"}, "before started_at"),
        ({"curve__t_s": [0.0, 0.1]}, "differ in length"),
        ({"curve__raw_sample_count": 10}, "raw samples"),
        ({"curve__method": "none"}, "every raw sample"),
        ({"final_torque_nm": "47.5"}, "valid number"),
        ({"joint_rate_r2": 1.5}, "less than or equal to 1"),
        ({"id": str(uuid.uuid4())}, "should match pattern"),
        ({"reasons": ["torque_wobbly"], "status": "NOK"}, "Input should be"),
        ({"extra_field": 1}, "Extra inputs"),
        ({"peak_torque_nm": 1.0}, "peak torque is below final torque"),
    ],
)
def test_result_refuses_inconsistent_payloads(changes: dict[str, Any], message: str) -> None:
    with pytest.raises(ValidationError, match=message):
        RundownResult.model_validate_json(_result_with(**changes))


def test_nan_never_reaches_the_wire() -> None:
    """JSON (RFC 8259 §6) has no NaN; the model refuses it before serialisation."""
    with pytest.raises(ValidationError, match="finite"):
        RundownResult.model_validate_json(
            _result_with(final_torque_nm=1.0).replace(
                b'"final_torque_nm": 1.0', b'"final_torque_nm": NaN'
            )
        )


def test_nok_result_carries_reasons() -> None:
    nok = RundownResult.model_validate_json(
        _result_with(status="NOK", reasons=["angle_high", "calibration_overdue"])
    )
    assert nok.status is Judgement.NOK
    assert nok.reasons == [Reason.ANGLE_HIGH, Reason.CALIBRATION_OVERDUE]


def test_last_will_is_an_offline_station_status() -> None:
    will = StationStatus.offline("st-120", AT)
    assert will.state is StationState.OFFLINE
    route = TOPICS.route(will)
    assert route.retain
    assert route.topic == TOPICS.station_status()
    assert json.loads(will.to_json_bytes())["state"] == "offline"


def test_reply_is_error_exactly_with_a_code() -> None:
    with pytest.raises(ValidationError, match="exactly when"):
        Reply(
            station="st-120",
            command=CommandName.PING,
            status=ReplyStatus.OK,
            code=ErrorCode.BUSY,
            text=None,
            correlation_id=None,
            at=AT,
        )


# ---------------------------------------------------------------- commands


def _parse(name: CommandName, payload: bytes, props: CommandProperties | None = None) -> Command:
    return parse_command(TOPICS, TOPICS.command(name), payload, props)


def _code(name: CommandName, payload: bytes, props: CommandProperties | None = None) -> ErrorCode:
    with pytest.raises(CommandError) as info:
        _parse(name, payload, props)
    assert info.value.text  # every refusal says why, in words
    return info.value.code


@pytest.mark.parametrize(
    ("name", "payload", "code"),
    [
        (CommandName.LOCK, b" " * MAX_COMMAND_BYTES + b'{"schema_version":"1"}', "too_large"),
        (CommandName.LOCK, b'{"schema_version":"1","reason":"\xff"}', "bad_encoding"),
        (CommandName.LOCK, b'{"schema_version":"1",', "bad_json"),
        (CommandName.LOCK, b'{"schema_version":"1"} x', "bad_json"),
        (CommandName.LOCK, b'{"schema_version":"1","schema_version":"1"}', "bad_json"),
        (CommandName.SELECT_PROGRAM, b'{"schema_version":"1","program_version":NaN}', "bad_json"),
        (CommandName.LOCK, b"[" * 9 + b"]" * 9, "too_deep"),
        (CommandName.LOCK, b'{"a":' * 9 + b"1" + b"}" * 9, "too_deep"),
        (CommandName.LOCK, b'"lock"', "not_an_object"),
        (CommandName.LOCK, b"null", "not_an_object"),
        (CommandName.LOCK, b'{"schema_version":"1","kind":"unlock"}', "kind_mismatch"),
        (CommandName.LOCK, b'{"schema_version":"2"}', "unsupported_version"),
        (CommandName.LOCK, b'{"schema_version":1}', "unsupported_version"),
        (CommandName.LOCK, b"{}", "invalid_fields"),
        (CommandName.LOCK, b'{"schema_version":"1","wrench_ld":"wr-07"}', "invalid_fields"),
        (CommandName.LOCK, b'{"schema_version":"1","wrench_id":7}', "invalid_fields"),
        (CommandName.LOCK, b'{"schema_version":"1","wrench_id":"wr/07"}', "invalid_fields"),
        (
            CommandName.SELECT_PROGRAM,
            (
                b'{"schema_version":"1","program_id":"p","program_version":"3",'
                b'"part_id":"x","joint_positions":["a"]}'
            ),
            "invalid_fields",
        ),
        (
            CommandName.SELECT_PROGRAM,
            b'{"schema_version":"1","program_id":"p","part_id":"x","joint_positions":["a","a"]}',
            "invalid_fields",
        ),
        (
            CommandName.SELECT_PROGRAM,
            b'{"schema_version":"1","program_id":"p","part_id":"x","joint_positions":[]}',
            "invalid_fields",
        ),
        (CommandName.PING, b'{"schema_version":"1","reply_to":"a/+/b"}', "bad_reply_topic"),
        (CommandName.PING, b'{"schema_version":"1","reply_to":"$SYS/x"}', "bad_reply_topic"),
        (
            CommandName.PING,
            f'{{"schema_version":"1","reply_to":"{PREFIX}/result"}}'.encode(),
            "bad_reply_topic",
        ),
    ],
)
def test_bad_commands_get_a_typed_error(name: CommandName, payload: bytes, code: str) -> None:
    assert _code(name, payload) == ErrorCode(code)


def test_unknown_command_under_the_command_branch() -> None:
    with pytest.raises(CommandError) as info:
        parse_command(TOPICS, f"{PREFIX}/cmd/launch", b'{"schema_version":"1"}')
    assert info.value.code is ErrorCode.UNKNOWN_COMMAND
    assert info.value.command is None
    assert "launch" in info.value.text


def test_bad_response_topic_property_is_refused() -> None:
    props = CommandProperties(response_topic=f"{PREFIX}/status", correlation_data=b"\x01")
    assert _code(CommandName.PING, b'{"schema_version":"1"}', props) is ErrorCode.BAD_REPLY_TOPIC


def test_brackets_inside_strings_do_not_count_as_depth() -> None:
    cmd = _parse(CommandName.LOCK, b'{"schema_version":"1","reason":"[[[[[[[[[[{{{{{{{{{{\\""}')
    assert isinstance(cmd.payload, Lock)
    assert cmd.payload.reason == '[[[[[[[[[[{{{{{{{{{{"'


def test_kind_may_be_left_to_the_topic() -> None:
    cmd = _parse(CommandName.UNLOCK, b'{"schema_version":"1","wrench_id":"wr-07"}')
    assert cmd.name is CommandName.UNLOCK
    assert cmd.payload == Unlock(schema_version="1", wrench_id="wr-07")


def test_reply_address_precedence() -> None:
    """MQTT 5 Response Topic wins over ``reply_to``; then ``reply_to``; then the default."""
    body = b'{"schema_version":"1","reply_to":"mes/replies/line-3","correlation_id":"job-9"}'
    v5 = _parse(
        CommandName.PING,
        body,
        CommandProperties(response_topic="mes/v5/replies", correlation_data=b"\x00\xff"),
    )
    assert (v5.reply.topic, v5.reply.via, v5.reply.correlation_data) == (
        "mes/v5/replies",
        "mqtt5",
        b"\x00\xff",
    )
    assert v5.reply.correlation_id == "job-9"
    v311 = _parse(CommandName.PING, body)
    assert (v311.reply.topic, v311.reply.via) == ("mes/replies/line-3", "payload")
    plain = _parse(CommandName.PING, b'{"schema_version":"1"}')
    assert (plain.reply.topic, plain.reply.via) == (TOPICS.reply_default(), "default")
    inside = _parse(
        CommandName.PING, f'{{"schema_version":"1","reply_to":"{PREFIX}/reply/mes-a"}}'.encode()
    )
    assert inside.reply.topic == f"{PREFIX}/reply/mes-a"


def test_a_refused_command_still_knows_where_to_reply() -> None:
    """Bad input loses nothing: the error carries the sender's reply topic and correlation."""
    with pytest.raises(CommandError) as info:
        _parse(
            CommandName.LOCK,
            b'{"schema_version":"1","wrench_id":7,"reply_to":"mes/r","correlation_id":"c-1"}',
        )
    err = info.value
    assert (err.code, err.command) == (ErrorCode.INVALID_FIELDS, CommandName.LOCK)
    assert (err.reply.topic, err.reply.correlation_id) == ("mes/r", "c-1")
    assert "wrench_id" in err.text
    reply = error_reply(err, "st-120", AT)
    wire = json.loads(reply.to_json_bytes())
    assert wire["status"] == "error"
    assert wire["code"] == "invalid_fields"
    assert wire["correlation_id"] == "c-1"
    assert Reply.model_validate_json(reply.to_json_bytes()) == reply


def test_ok_reply_echoes_the_correlation_id() -> None:
    cmd = _parse(CommandName.PING, b'{"schema_version":"1","correlation_id":"mes-health-1"}')
    reply = ok_reply(cmd, "st-120", AT, text="pong")
    assert (reply.status, reply.command, reply.correlation_id) == (
        ReplyStatus.OK,
        CommandName.PING,
        "mes-health-1",
    )


@pytest.mark.parametrize("name", ["SelectProgram", "Lock", "Unlock", "Abort", "Ping"])
def test_shipped_command_examples_parse(name: str) -> None:
    spec = next(s for s in TOPIC_TABLE.values() if s.name == name)
    cmd = parse_command(
        TOPICS, f"{PREFIX}/{spec.pattern}", (EXAMPLES / f"{name}.json").read_bytes()
    )
    assert type(cmd.payload).__name__ == name


# hypothesis: arbitrary input only ever raises CommandError

_json = st.recursive(
    st.none()
    | st.booleans()
    | st.integers()
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(max_size=20),
    lambda children: (
        st.lists(children, max_size=5)
        | st.dictionaries(
            st.sampled_from(
                [
                    "schema_version",
                    "kind",
                    "wrench_id",
                    "program_id",
                    "part_id",
                    "joint_positions",
                    "reply_to",
                    "correlation_id",
                    "reason",
                    "program_version",
                    "x",
                ]
            )
            | st.text(max_size=8),
            children,
            max_size=6,
        )
    ),
    max_leaves=30,
)
_names = st.sampled_from(list(CommandName))


def _outcome(topic: str, payload: bytes) -> Command | CommandError:
    """The parse result or its CommandError; anything else propagates and fails the test."""
    try:
        return parse_command(TOPICS, topic, payload)
    except CommandError as exc:
        return exc


@settings(max_examples=500, deadline=None)
@given(name=_names, payload=st.binary(max_size=300))
def test_arbitrary_bytes_only_raise_command_error(name: CommandName, payload: bytes) -> None:
    outcome = _outcome(TOPICS.command(name), payload)
    if isinstance(outcome, CommandError):
        assert isinstance(outcome.code, ErrorCode)
        assert outcome.command is name
    else:
        assert outcome.name is name


@settings(max_examples=500, deadline=None)
@given(name=_names, value=_json, reply_to=st.none() | st.text(max_size=30))
def test_arbitrary_json_only_raises_command_error(
    name: CommandName, value: object, reply_to: str | None
) -> None:
    if isinstance(value, dict) and reply_to is not None:
        value["reply_to"] = reply_to
    outcome = _outcome(TOPICS.command(name), json.dumps(value).encode())
    if isinstance(outcome, CommandError):
        assert isinstance(outcome.code, ErrorCode)
        assert outcome.reply.topic  # always somewhere to answer
    else:
        assert outcome.name is name


@settings(max_examples=200, deadline=None)
@given(topic=st.text(max_size=80), payload=st.binary(max_size=50))
def test_arbitrary_topics_only_raise_command_error(topic: str, payload: bytes) -> None:
    outcome = _outcome(topic, payload)
    assert isinstance(outcome, CommandError)  # no random text is one of our command topics
    assert outcome.code in {ErrorCode.BAD_TOPIC, ErrorCode.UNKNOWN_COMMAND}
    assert outcome.reply.topic == TOPICS.reply_default()


_ident = st.from_regex(r"\A[A-Za-z0-9][A-Za-z0-9._-]{0,20}\Z")
_printable = st.from_regex(r"\A[!-~]{1,40}\Z")
_text = st.text(min_size=1, max_size=60)
_common = {
    "schema_version": st.just("1"),
    "correlation_id": st.none() | _printable,
    "reply_to": st.none() | st.sampled_from(["mes/replies/line-3", f"{PREFIX}/reply/x"]),
}
_commands = st.one_of(
    st.builds(
        SelectProgram,
        program_id=_ident,
        program_version=st.none() | st.integers(1, 10_000),
        part_id=_printable,
        joint_positions=st.lists(_ident, min_size=1, max_size=10, unique=True),
        wrench_id=st.none() | _ident,
        **_common,
    ),
    st.builds(Lock, wrench_id=st.none() | _ident, reason=st.none() | _text, **_common),
    st.builds(Unlock, wrench_id=st.none() | _ident, **_common),
    st.builds(Abort, wrench_id=st.none() | _ident, reason=st.none() | _text, **_common),
    st.builds(Ping, **_common),
)


@settings(max_examples=300, deadline=None)
@given(command=_commands, drop_kind=st.booleans())
def test_valid_commands_round_trip(
    command: SelectProgram | Lock | Unlock | Abort | Ping, drop_kind: bool
) -> None:
    wire = json.loads(command.to_json_bytes())
    if drop_kind:
        del wire["kind"]
    name = CommandName(command.kind)
    parsed = _parse(name, json.dumps(wire).encode())
    assert parsed.payload == command
    assert parsed.name is name
    assert parsed.reply.correlation_id == command.correlation_id


# ---------------------------------------------------------------- through a real broker


def _publish_properties() -> Properties:
    return Properties(PacketTypes.PUBLISH)  # type: ignore[no-untyped-call]  # paho is untyped


@pytest.mark.parametrize("level", [5, 4], ids=["mqtt5", "mqtt311"])
async def test_request_reply_and_retained_status_through_a_real_broker(
    broker: LocalBroker, topic_prefix: str, level: int
) -> None:
    """A command travels MES → broker → station and its reply comes back with the correlation.

    MQTT 5 when the broker speaks it (Response Topic and Correlation Data properties, MQTT 5.0
    §3.3.2.3.5–6), else 3.1.1 with ``reply_to`` and ``correlation_id`` in the payload. The
    retained station status reaches a subscriber that arrives after it was published.
    """
    topics = Topics(topic_prefix)
    if level not in broker.protocol_versions:
        pytest.skip(f"the {broker.kind} broker here does not speak MQTT level {level}")
    v5 = level == 5
    proto = aiomqtt.ProtocolVersion.V5 if v5 else aiomqtt.ProtocolVersion.V311
    reply_topic = f"{topic_prefix}-mes/replies"
    status = StationStatus.model_validate_json((EXAMPLES / "StationStatus.json").read_bytes())
    route = topics.route(status)

    async with (
        aiomqtt.Client(broker.host, broker.port, protocol=proto, identifier="st") as station,
        aiomqtt.Client(broker.host, broker.port, protocol=proto, identifier="mes") as mes,
    ):
        await station.publish(
            route.topic, status.to_json_bytes(), qos=route.qos, retain=route.retain
        )
        await station.subscribe(topics.command_filter(), qos=1)
        await mes.subscribe(reply_topic, qos=1)
        body = SelectProgram.model_validate_json((EXAMPLES / "SelectProgram.json").read_bytes())
        props = None
        if v5:
            props = _publish_properties()
            props.ResponseTopic = reply_topic
            props.CorrelationData = b"\x07corr"
            body = body.model_copy(update={"reply_to": None, "correlation_id": "job-42"})
        else:
            body = body.model_copy(update={"reply_to": reply_topic, "correlation_id": "job-42"})
        await mes.publish(
            topics.command(CommandName.SELECT_PROGRAM),
            body.to_json_bytes(),
            qos=1,
            properties=props,
        )

        async with asyncio.timeout(5):
            incoming = await anext(aiter(station.messages))
        in_props = incoming.properties
        cmd = parse_command(
            topics,
            str(incoming.topic),
            bytes(incoming.payload),
            CommandProperties(
                response_topic=getattr(in_props, "ResponseTopic", None),
                correlation_data=getattr(in_props, "CorrelationData", None),
            ),
        )
        assert cmd.payload == body
        assert cmd.reply.topic == reply_topic
        assert cmd.reply.via == ("mqtt5" if v5 else "payload")
        out_props = None
        if cmd.reply.correlation_data is not None:
            out_props = _publish_properties()
            out_props.CorrelationData = cmd.reply.correlation_data
        reply = ok_reply(cmd, "st-120", AT)
        await station.publish(cmd.reply.topic, reply.to_json_bytes(), qos=1, properties=out_props)

        async with asyncio.timeout(5):
            answer = await anext(aiter(mes.messages))
        got = Reply.model_validate_json(bytes(answer.payload))
        assert got.correlation_id == "job-42"
        assert got.status is ReplyStatus.OK
        if v5:
            assert answer.properties is not None
            assert getattr(answer.properties, "CorrelationData", None) == b"\x07corr"

    async with aiomqtt.Client(broker.host, broker.port, protocol=proto) as late:
        await late.subscribe(topics.station_status(), qos=1)
        async with asyncio.timeout(5):
            kept = await anext(aiter(late.messages))
    assert kept.retain
    assert StationStatus.model_validate_json(bytes(kept.payload)) == status
