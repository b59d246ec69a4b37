"""Every input from outside, fuzzed: nothing crashes the daemon, every rejection says why.

Inputs and the one error type each may raise (anything else escaping is a bug):

=============================  =====================================  ======================
input                          entry point                            typed error
=============================  =====================================  ======================
BLE notification bytes         ``decode_frame`` → ``SequenceChecker``  ``FrameError``,
                               → ``Engine.feed``                      ``SensorDataError``
declarative sensor profile     ``load_profile(text)``                 ``ProfileError``
station configuration          ``parse_config(text, env=...)``        ``ConfigError``
MQTT command (topic, payload)  ``parse_command`` / ``CommandHandler``  ``CommandError`` → an
                                                                      error ``Reply``
=============================  =====================================  ======================

Hypothesis drives each one with structure-aware inputs (mutations of the shipped examples,
JSON trees, frames packed field by field) as well as plain random bytes; explicit cases
cover oversized and deeply nested payloads, wrong types, unknown program ids and command
topics outside the station's prefix. The broker-level version of the command checks (real
mosquitto, one reply per message) lives in ``tests/test_commands.py``; here the handler is
driven directly so that hypothesis can run hundreds of examples.

External references used below:
- RFC 8259 (JSON): §2 grammar, §4 "names within an object SHOULD be unique" (the station
  refuses duplicates), §6 (NaN and Infinity are not JSON), §9 (a parser may limit nesting).
- TOML v1.0.0 (arrays and inline tables nest without a limit in the grammar).
- MQTT Version 5.0, OASIS Standard (2019) §4.7.1 (``+``, ``#`` are wildcards, never part of
  a topic name) and §4.7.3 (topic names are UTF-8, no NUL).
- protocol/PROFILE.md (samples frame layout) — the frames below are packed from it with
  ``struct``, independently of the decoder.

Demo scenario: Brackenfield Garden Machines, mower deck assembly, station 120 (invented).
"""

from __future__ import annotations

import asyncio
import contextlib
import datetime as dt
import functools
import json
import math
import struct
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from clampd.daemon.engine import Engine, EngineSettings, SensorDataError, parse_program
from clampd.daemon.runtime import (
    BrokerConfig,
    CommandHandler,
    ConfigError,
    IncomingCommand,
    MqttSession,
    StationState,
    parse_config,
)
from clampd.protocol import (
    MAX_COMMAND_BYTES,
    CommandError,
    CommandName,
    CommandProperties,
    ErrorCode,
    FrameError,
    ProfileError,
    ReplyStatus,
    SequenceChecker,
    Topics,
    axis_rate,
    decode_frame,
    load_profile,
    parse_command,
)

ROOT = Path(__file__).resolve().parents[1]
STATION = "st-120"
PREFIX = f"brackenfield/deck-assembly/line-3/{STATION}"
TOPICS = Topics(PREFIX)
PROGRAM = parse_program((ROOT / "tests" / "data" / "program_torque_angle.toml").read_text())
PROFILE_TEXT = (ROOT / "protocol" / "profiles" / "bench-stick.toml").read_text(encoding="utf-8")
CONFIG_TEXT = (ROOT / "deploy" / "station.example.toml").read_text(encoding="utf-8")
_AT = dt.datetime(2026, 5, 12, 7, 41, tzinfo=dt.UTC)  # any fixed time: status snapshots
DECK: dict[str, Any] = {
    "id": "deck-m8",
    "strategy": "torque",
    "snug_torque": "4 N*m",
    "target_torque": "18 N*m",
}
# The documented error codes (protocol/MQTT.md, "Commands and replies").
DOCUMENTED_CODES = {
    "bad_topic",
    "too_large",
    "bad_encoding",
    "bad_json",
    "too_deep",
    "not_an_object",
    "unknown_command",
    "kind_mismatch",
    "unsupported_version",
    "invalid_fields",
    "bad_reply_topic",
    "unknown_program",
    "unknown_wrench",
    "wrench_not_fit",
    "busy",
    "locked",
    "nothing_to_abort",
    "internal",
}

_T = TypeVar("_T")
_E = TypeVar("_E", bound=BaseException)


def _raised(call: Callable[[], _T], kind: type[_E]) -> _T | _E:
    """The call's result, or the error of ``kind`` it raised (any other error propagates)."""
    try:
        return call()
    except kind as exc:
        return exc


# -- BLE frames: decoder, sequence check and engine ----------------------------------------

i16 = st.integers(-32768, 32767)
f32_any = st.floats(width=32, allow_nan=True, allow_infinity=True)


@st.composite
def frames(draw: st.DrawFn) -> bytes:
    """A samples frame packed field by field from PROFILE.md, with any header values, any
    scales (NaN, inf, 0, negative) and any counts, then possibly cut, padded or flipped."""
    n = draw(st.integers(0, 30))
    header = struct.pack(
        "<BBHIHBBff",
        draw(st.sampled_from([1, 1, 1, 0, 2, 255])),  # version: mostly valid
        draw(st.integers(0, 255)),  # flags, reserved bits included
        draw(st.integers(0, 0xFFFF)),  # sequence
        draw(st.integers(0, 0xFFFF_FFFF)),  # timestamp_us
        draw(st.integers(0, 0xFFFF)),  # period_us
        draw(st.integers(0, 255)) if draw(st.booleans()) else n,  # count, mostly honest
        draw(st.sampled_from([0, 0, 0, 1])),  # reserved byte
        draw(st.one_of(st.just(0.01), f32_any)),  # torque_scale
        draw(st.one_of(st.just(0.1), f32_any)),  # rate_scale
    )
    body = b"".join(
        struct.pack("<hhhh", draw(i16), draw(i16), draw(i16), draw(i16)) for _ in range(n)
    )
    data = bytearray(header + body)
    match draw(st.integers(0, 4)):
        case 0 if data:
            del data[draw(st.integers(0, len(data) - 1)) :]
        case 1:
            data += draw(st.binary(max_size=8))
        case 2 if data:
            data[draw(st.integers(0, len(data) - 1))] ^= 1 << draw(st.integers(0, 7))
        case _:
            pass
    return bytes(data)


@settings(max_examples=400, deadline=None)
@given(stream=st.lists(st.one_of(frames(), st.binary(max_size=300)), min_size=1, max_size=25))
def test_any_notification_stream_raises_only_typed_errors(stream: list[bytes]) -> None:
    """What the wrench worker does per notification: decode, check the sequence, feed the
    engine. A bad frame is dropped with its typed error; nothing else may escape."""
    checker = SequenceChecker()
    engine = Engine(PROGRAM, EngineSettings())
    fed = 0
    last_t = 0.0
    for data in stream:
        frame = _raised(functools.partial(decode_frame, data), FrameError)
        if isinstance(frame, FrameError):
            assert str(frame)  # says why
            continue
        assert frame.torque_nm.shape == (frame.count,)
        check = checker.feed(frame)
        if not check.accepted:
            continue
        times, torque, rate = check.times_s(), frame.torque_nm, axis_rate(frame, "z", +1)
        fed_or_error = _raised(functools.partial(engine.feed, times, torque, rate), SensorDataError)
        if isinstance(fed_or_error, SensorDataError):
            assert str(fed_or_error)
            continue
        fed += 1
        last_t = float(check.times_s()[-1])
    # The link can always be declared lost, ending any rundown without an exception.
    engine.link_lost(last_t + 1.0 if fed else 0.0)


# -- declarative profiles --------------------------------------------------------------------

toml_values = st.one_of(
    st.integers(-(2**70), 2**70).map(str),
    st.floats(allow_nan=True).map(lambda f: "nan" if math.isnan(f) else repr(f)),
    st.text(max_size=20).map(json.dumps),
    st.sampled_from(["true", "false", "[]", "{}", '""', "[1, 2]", "{ a = 1 }", "1979-05-27"]),
    st.sampled_from(['"u8"', '"i64"', '"f16"', '"sequence"', '"ms"', '"furlong"', '"-1 ms"']),
)


@st.composite
def mutated(draw: st.DrawFn, text: str) -> str:
    """The shipped text with a few lines changed: a value replaced, a line dropped or
    doubled, a line of random text inserted."""
    lines = text.splitlines()
    for _ in range(draw(st.integers(1, 4))):
        i = draw(st.integers(0, len(lines) - 1))
        match draw(st.integers(0, 4)):
            case 0 if "=" in lines[i]:
                key = lines[i].split("=", 1)[0]
                lines[i] = f"{key}= {draw(toml_values)}"
            case 1:
                del lines[i]
            case 2:
                lines.insert(i, lines[i])
            case 3:
                lines.insert(i, draw(st.text(max_size=40)))
            case _:
                j = draw(st.integers(0, max(0, len(lines[i]) - 1)))
                lines[i] = lines[i][:j] + draw(st.text(max_size=3)) + lines[i][j:]
        if not lines:
            lines = [""]
    return "\n".join(lines)


@settings(max_examples=300, deadline=None)
@given(text=mutated(PROFILE_TEXT))
def test_any_profile_description_raises_only_profile_errors(text: str) -> None:
    source = text if "=" in text else text + "\nx = 1"  # a str with '=' is read as TOML
    profile = _raised(lambda: load_profile(source), ProfileError)
    if isinstance(profile, ProfileError):
        assert profile.problems  # says what and where
        assert all(message for _, message in profile.problems)
        return
    # A description that loads must decode any bytes with nothing but FrameError.
    for data in (b"", b"\xb5", b"\xb5\x01\x00\x00\x00\x00\x02" + b"\x00" * 12, bytes(range(64))):
        with contextlib.suppress(FrameError):
            profile.decode(data)


# -- station configuration -----------------------------------------------------------------


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(text=mutated(CONFIG_TEXT))
def test_any_station_file_raises_only_config_errors(text: str) -> None:
    error = _raised(lambda: parse_config(text, env={}, check_files=False), ConfigError)
    if isinstance(error, ConfigError):
        assert error.problems
        assert all(p.message for p in error.problems)


env_names = st.lists(
    st.sampled_from(["STATION", "BROKER", "WRENCH", "0", "7", "URL", "ID", "", "X", "CUES"]),
    min_size=1,
    max_size=4,
).map(lambda parts: "CLAMPD__" + "__".join(parts))


@settings(max_examples=300, deadline=None)
@given(env=st.dictionaries(env_names, st.text(max_size=30), max_size=4))
def test_any_environment_override_raises_only_config_errors(env: dict[str, str]) -> None:
    error = _raised(lambda: parse_config(CONFIG_TEXT, env=env, check_files=False), ConfigError)
    if isinstance(error, ConfigError):
        assert error.problems
        assert all(str(p) for p in error.problems)


@pytest.mark.parametrize(
    "nest",
    ["a = " + "[" * 50_000 + "]" * 50_000, "a = " + "{b = " * 5_000 + "1" + "}" * 5_000],
    ids=["arrays", "inline-tables"],
)
def test_toml_nested_too_deep_is_a_typed_error_not_a_crash(nest: str) -> None:
    """tomllib parses nesting recursively; the loaders must turn the stack's exhaustion
    into their own error rather than let a RecursionError out."""
    with pytest.raises(ConfigError, match="nested too deeply"):
        parse_config(nest, env={})
    with pytest.raises(ProfileError, match="nested too deeply"):
        load_profile(nest)


# -- MQTT commands ---------------------------------------------------------------------------

json_leaves = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-(2**70), 2**70),
    st.floats(allow_nan=False, allow_infinity=False),
    st.text(max_size=80),
)
json_values = st.recursive(
    json_leaves,
    lambda inner: st.one_of(
        st.lists(inner, max_size=5), st.dictionaries(st.text(max_size=15), inner, max_size=5)
    ),
    max_leaves=20,
)
GOOD: dict[CommandName, dict[str, Any]] = {
    CommandName.SELECT_PROGRAM: {
        "schema_version": "1",
        "program_id": "deck-m8",
        "part_id": "DK-2026-0412",
        "joint_positions": ["J1", "J2"],
    },
    CommandName.LOCK: {"schema_version": "1", "reason": "jig change"},
    CommandName.UNLOCK: {"schema_version": "1"},
    CommandName.ABORT: {"schema_version": "1", "wrench_id": "w-blue"},
    CommandName.PING: {"schema_version": "1"},
}
FIELDS = sorted(
    {k for body in GOOD.values() for k in body}
    | {"kind", "reply_to", "correlation_id", "program_version", "wrench_id", "extra"}
)


@st.composite
def commands(draw: st.DrawFn) -> tuple[str, bytes]:
    """A valid command with some fields replaced by any JSON value, dropped or added."""
    name = draw(st.sampled_from(list(CommandName)))
    body: dict[str, Any] = dict(GOOD[name])
    for _ in range(draw(st.integers(0, 3))):
        key = draw(st.sampled_from(FIELDS))
        if draw(st.booleans()):
            body[key] = draw(json_values)
        else:
            body.pop(key, None)
    return TOPICS.command(name), json.dumps(body).encode()


topic_strings = st.one_of(
    st.sampled_from([c.value for c in CommandName] + ["bogus", "", "cmd"]).map(
        lambda n: f"{PREFIX}/cmd/{n}"
    ),
    st.text(max_size=80),
    st.sampled_from(
        [
            f"{PREFIX[:-1]}1/cmd/lock",  # another station
            f"{PREFIX}-b/cmd/lock",  # a prefix that only starts like ours
            f"{PREFIX}/cmd/lock/extra",
            f"{PREFIX}/cmd/+",
            f"{PREFIX}/cmd/#",
            f"{PREFIX}/cmd/lo\0ck",
            f"x/{PREFIX}/cmd/lock",
            f"$SYS/{PREFIX}/cmd/lock",
        ]
    ),
)


def _check_refusal(exc: CommandError) -> None:
    assert exc.code.value in DOCUMENTED_CODES
    assert exc.text  # says why
    reply = exc.reply.topic
    assert reply
    assert not set(reply) & {"+", "#", "\0"}
    own = TOPICS.is_own_topic(reply)
    default = TOPICS.reply_default()
    assert not own or reply == default or reply.startswith(default + "/")


@settings(max_examples=500, deadline=None)
@given(
    message=st.one_of(
        commands(),
        st.tuples(topic_strings, st.binary(max_size=400)),
        st.tuples(topic_strings, json_values.map(lambda v: json.dumps(v).encode())),
    ),
    response_topic=st.one_of(st.none(), st.text(max_size=40), st.just(f"{PREFIX}/result")),
)
def test_any_command_parses_or_is_refused_with_a_documented_code(
    message: tuple[str, bytes], response_topic: str | None
) -> None:
    topic, payload = message
    props = CommandProperties(response_topic=response_topic, correlation_data=b"c")
    try:
        command = parse_command(TOPICS, topic, payload, props)
    except CommandError as exc:
        _check_refusal(exc)
        return
    assert topic == TOPICS.command(command.name)
    assert command.payload.kind == command.name.value


def _offline_session() -> MqttSession:
    """The real session, never entered: every reply it is asked to send fails with
    BrokerUnavailable, which the handler counts (and no connection is ever attempted)."""
    return MqttSession(
        BrokerConfig(url="mqtt://127.0.0.1:1"), TOPICS, station_id=STATION, client_id="fuzz"
    )


@settings(
    max_examples=300,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)
@given(
    batch=st.lists(
        st.one_of(commands(), st.tuples(topic_strings, st.binary(max_size=200))),
        min_size=1,
        max_size=6,
    ),
    retained=st.booleans(),
)
def test_the_handler_answers_every_message_and_changes_state_only_when_ok(
    batch: list[tuple[str, bytes]], retained: bool
) -> None:
    async def run() -> None:
        state = StationState.from_tables(STATION, [DECK], {"w-blue": 60.0, "w-red": 25.0})
        handler = CommandHandler(_offline_session(), state, TOPICS)
        for topic, payload in batch:
            before = state.status(_AT).model_dump()
            reply = await handler.handle(
                IncomingCommand(
                    topic=topic, payload=payload, properties=CommandProperties(), retained=retained
                )
            )
            assert (reply.status is ReplyStatus.ERROR) == (reply.code is not None)
            assert reply.text
            if reply.status is ReplyStatus.ERROR:
                assert reply.code is not None
                assert reply.code.value in DOCUMENTED_CODES
                assert reply.code is not ErrorCode.INTERNAL, reply.text
                assert state.status(_AT).model_dump() == before, "a refused command acted"
            else:
                assert not retained
        counters = handler.counters
        assert counters.received == len(batch)
        assert counters.ok + counters.refused == len(batch)
        assert counters.internal_errors == 0
        assert counters.replies_failed == len(batch)  # offline: counted, not raised

    asyncio.run(run())


# -- explicit hostile cases -----------------------------------------------------------------


def _body(**fields: Any) -> bytes:
    return json.dumps({"schema_version": "1", **fields}).encode()


@pytest.mark.parametrize(
    ("topic", "payload", "code"),
    [
        (TOPICS.command(CommandName.PING), b" " * (MAX_COMMAND_BYTES + 1), "too_large"),
        (TOPICS.command(CommandName.PING), b"[" * (1 << 20), "too_large"),
        (TOPICS.command(CommandName.PING), b"[" * 9 + b"]" * 9, "too_deep"),
        (TOPICS.command(CommandName.PING), b"[" * 8000 + b"]" * 8000, "too_deep"),
        (TOPICS.command(CommandName.PING), b'{"a":' * 2000 + b"1" + b"}" * 2000, "too_deep"),
        (TOPICS.command(CommandName.PING), b"\xff\xfe{}", "bad_encoding"),
        (TOPICS.command(CommandName.PING), b'{"schema_version": "1",}', "bad_json"),
        (TOPICS.command(CommandName.PING), b'{"schema_version": NaN}', "bad_json"),
        (
            TOPICS.command(CommandName.PING),
            b'{"schema_version": "1", "schema_version": "1"}',
            "bad_json",
        ),
        (TOPICS.command(CommandName.PING), b'"ping"', "not_an_object"),
        (TOPICS.command(CommandName.PING), _body(kind="lock"), "kind_mismatch"),
        (TOPICS.command(CommandName.PING), b'{"schema_version": "2"}', "unsupported_version"),
        (TOPICS.command(CommandName.PING), b'{"schema_version": 1}', "unsupported_version"),
        (TOPICS.command(CommandName.LOCK), _body(wrench_id=7), "invalid_fields"),
        (TOPICS.command(CommandName.LOCK), _body(wrench_id="w blue"), "invalid_fields"),
        (TOPICS.command(CommandName.LOCK), _body(reason=["x"]), "invalid_fields"),
        (
            TOPICS.command(CommandName.SELECT_PROGRAM),
            _body(program_id="deck-m8", part_id="P", joint_positions="J1"),
            "invalid_fields",
        ),
        (
            TOPICS.command(CommandName.SELECT_PROGRAM),
            _body(program_id="deck-m8", part_id="P", joint_positions=["J1"], program_version="1"),
            "invalid_fields",
        ),
        (TOPICS.command(CommandName.PING), _body(reply_to=f"{PREFIX}/status"), "bad_reply_topic"),
        (TOPICS.command(CommandName.PING), _body(reply_to="mes/#"), "bad_reply_topic"),
        (f"{PREFIX}/cmd/reboot", _body(), "unknown_command"),
        ("brackenfield/deck-assembly/line-3/st-121/cmd/lock", _body(), "bad_topic"),
        (f"{PREFIX}-b/cmd/lock", _body(), "bad_topic"),
        (f"{PREFIX}/result", _body(), "bad_topic"),
    ],
)
def test_hostile_command_is_refused_with_its_code_and_a_reason(
    topic: str, payload: bytes, code: str
) -> None:
    with pytest.raises(CommandError) as info:
        parse_command(TOPICS, topic, payload)
    assert info.value.code.value == code
    _check_refusal(info.value)


@pytest.mark.parametrize(
    ("name", "fields", "code"),
    [
        (
            CommandName.SELECT_PROGRAM,
            {"program_id": "no-such-program", "part_id": "P-1", "joint_positions": ["J1"]},
            "unknown_program",
        ),
        (
            CommandName.SELECT_PROGRAM,
            {
                "program_id": "deck-m8",
                "program_version": 99,
                "part_id": "P",
                "joint_positions": ["J1"],
            },
            "unknown_program",
        ),
        (CommandName.LOCK, {"wrench_id": "w-green"}, "unknown_wrench"),
        (CommandName.ABORT, {"wrench_id": "w-blue"}, "nothing_to_abort"),
    ],
)
def test_commands_naming_what_the_station_lacks_are_refused_and_change_nothing(
    name: CommandName, fields: dict[str, Any], code: str
) -> None:
    async def run() -> None:
        state = StationState.from_tables(STATION, [DECK], {"w-blue": 60.0})
        handler = CommandHandler(_offline_session(), state, TOPICS)
        before = state.status(_AT).model_dump()
        reply = await handler.handle(
            IncomingCommand(
                topic=TOPICS.command(name),
                payload=_body(**fields),
                properties=CommandProperties(),
                retained=False,
            )
        )
        assert reply.code is not None
        assert reply.code.value == code
        assert reply.text
        assert state.status(_AT).model_dump() == before

    asyncio.run(run())
