"""Turn an incoming MQTT command (topic, payload bytes, MQTT 5 properties) into a typed command.

The payload comes from the plant network and is untrusted. Checks run cheapest first, and
every failure is a ``CommandError`` with a stable ``ErrorCode``, a one-line text and the
address to reply to — so the station can always answer, and nothing is silently dropped:

1. the topic is one of this station's command topics (``bad_topic``);
2. the payload is at most ``MAX_COMMAND_BYTES`` (``too_large``), UTF-8 (``bad_encoding``),
   nested at most ``MAX_DEPTH`` deep (``too_deep``), strict JSON without NaN or duplicate keys
   (``bad_json``), and an object (``not_an_object``);
3. ``kind``, when present, agrees with the topic (``kind_mismatch``), ``schema_version`` is one
   we speak (``unsupported_version``), and the fields validate strictly (``invalid_fields``);
4. the reply topic, if one is asked for, is a publishable topic outside this station's own
   tree except its ``reply`` branch (``bad_reply_topic``): a command must not be able to make
   the station publish onto its own result or status topics.

Where the reply goes: the MQTT 5 Response Topic property wins (with its Correlation Data
echoed), then the payload's ``reply_to`` (MQTT 3.1.1 clients), then ``{prefix}/reply``.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import json
import re
from typing import Any, Literal, NoReturn

from pydantic import TypeAdapter, ValidationError

from clampd.protocol._commands import (
    CORRELATION_ID_PATTERN,
    CommandName,
    CommandPayload,
    ErrorCode,
)
from clampd.protocol._payloads import Reply, ReplyStatus
from clampd.protocol._topics import TopicError, Topics, UnknownCommandError, check_topic_name

__all__ = [
    "MAX_COMMAND_BYTES",
    "MAX_DEPTH",
    "Command",
    "CommandError",
    "CommandProperties",
    "ReplyAddress",
    "error_reply",
    "ok_reply",
    "parse_command",
]

# The largest legal command (select_program with 64 joint positions of 64 characters, a
# 128-character part id and reply fields) is under 5 kB; 16 KiB leaves room for whitespace and
# bounds the memory and CPU an untrusted sender can make us spend before validation.
MAX_COMMAND_BYTES = 16 * 1024
# The deepest legal command is 2 levels (object → joint_positions list); 8 leaves slack and
# stops pathological nesting long before the JSON parser's recursion limit.
MAX_DEPTH = 8
# Longest error text in a reply; pydantic's messages for many bad fields can run long.
_MAX_TEXT = 500

_COMMAND_ADAPTER: TypeAdapter[CommandPayload] = TypeAdapter(CommandPayload)
_SCHEMA_VERSIONS = frozenset({"1"})
_CORRELATION_RE = re.compile(CORRELATION_ID_PATTERN)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class CommandProperties:
    """The MQTT 5 PUBLISH properties a command may carry (none for 3.1.1 clients)."""

    response_topic: str | None = None
    correlation_data: bytes | None = None


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ReplyAddress:
    """Where and how to answer a command."""

    topic: str
    via: Literal["mqtt5", "payload", "default"]
    correlation_data: bytes | None = None  # echo as the MQTT 5 Correlation Data property
    correlation_id: str | None = None  # echo in the reply payload


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Command:
    """A validated command and the address its reply goes to."""

    name: CommandName
    payload: CommandPayload
    reply: ReplyAddress


class CommandError(Exception):
    """A command was refused: the sender's fault, answered with ``code`` and ``text``.

    ``reply`` is the best address that could be worked out before the failure; ``command`` is
    the command named by the topic when the topic was valid.
    """

    def __init__(
        self,
        code: ErrorCode,
        text: str,
        *,
        reply: ReplyAddress,
        command: CommandName | None = None,
    ) -> None:
        super().__init__(f"{code.value}: {text}")
        self.code = code
        self.text = text[:_MAX_TEXT]
        self.reply = reply
        self.command = command


def _max_depth(text: str) -> int:
    """Deepest nesting of objects and arrays, ignoring brackets inside strings."""
    depth = deepest = 0
    in_string = escaped = False
    for ch in text:
        if in_string:
            if escaped:
                escaped = False
            elif ch == "\\":
                escaped = True
            elif ch == '"':
                in_string = False
        elif ch == '"':
            in_string = True
        elif ch in "[{":
            depth += 1
            deepest = max(deepest, depth)
        elif ch in "]}":
            depth -= 1
    return deepest


def _no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    obj: dict[str, Any] = {}
    for key, value in pairs:
        if key in obj:
            raise ValueError(f"duplicate key {key!r}")
        obj[key] = value
    return obj


def _no_constants(name: str) -> NoReturn:
    raise ValueError(f"{name} is not valid JSON")


def _summarise(exc: ValidationError) -> str:
    parts = []
    for err in exc.errors(include_url=False, include_input=False)[:3]:
        loc = ".".join(str(p) for p in err["loc"]) or "(payload)"
        parts.append(f"{loc}: {err['msg']}")
    more = exc.error_count() - len(parts)
    return "; ".join(parts) + (f"; and {more} more" if more > 0 else "")


def _reply_address(
    topics: Topics,
    props: CommandProperties,
    reply_to: object,
    correlation_id: str | None,
) -> ReplyAddress:
    via: Literal["mqtt5", "payload"]
    if props.response_topic is not None:
        topic, via = props.response_topic, "mqtt5"
    elif isinstance(reply_to, str):
        topic, via = reply_to, "payload"
    else:
        return ReplyAddress(
            topic=topics.reply_default(),
            via="default",
            correlation_data=props.correlation_data,
            correlation_id=correlation_id,
        )
    check_topic_name(topic, what="reply topic")
    default = topics.reply_default()
    if topics.is_own_topic(topic) and not (topic == default or topic.startswith(default + "/")):
        raise TopicError(f"reply topic {topic!r} lies in the station's own tree")
    return ReplyAddress(
        topic=topic,
        via=via,
        correlation_data=props.correlation_data,
        correlation_id=correlation_id,
    )


def parse_command(
    topics: Topics, topic: str, payload: bytes, props: CommandProperties | None = None
) -> Command:
    """Validate one incoming command; raise ``CommandError`` (the sender's fault) otherwise.

    Never raises anything else for any ``payload`` bytes and any ``topic`` string.
    """
    props = props or CommandProperties()
    fallback = ReplyAddress(
        topic=topics.reply_default(), via="default", correlation_data=props.correlation_data
    )
    try:
        name = topics.parse_command_topic(topic)
    except UnknownCommandError as exc:
        raise CommandError(ErrorCode.UNKNOWN_COMMAND, str(exc), reply=fallback) from None
    except TopicError as exc:
        raise CommandError(ErrorCode.BAD_TOPIC, str(exc), reply=fallback) from None

    def fail(code: ErrorCode, text: str, reply: ReplyAddress | None = None) -> NoReturn:
        raise CommandError(code, text, reply=reply or fallback, command=name)

    # Where to answer if the payload turns out bad: the MQTT 5 response topic is known already.
    if props.response_topic is not None:
        try:
            fallback = _reply_address(topics, props, None, None)
        except TopicError as exc:
            fail(ErrorCode.BAD_REPLY_TOPIC, str(exc))

    if len(payload) > MAX_COMMAND_BYTES:
        fail(ErrorCode.TOO_LARGE, f"{len(payload)} bytes, at most {MAX_COMMAND_BYTES} accepted")
    try:
        text = payload.decode("utf-8")
    except UnicodeDecodeError as exc:
        fail(ErrorCode.BAD_ENCODING, f"payload is not UTF-8 (byte {exc.start})")
    depth = _max_depth(text)
    if depth > MAX_DEPTH:
        fail(ErrorCode.TOO_DEEP, f"nested {depth} deep, at most {MAX_DEPTH} accepted")
    try:
        obj = json.loads(text, object_pairs_hook=_no_duplicates, parse_constant=_no_constants)
    except (ValueError, RecursionError) as exc:
        fail(ErrorCode.BAD_JSON, f"payload is not valid JSON: {exc}")
    if not isinstance(obj, dict):
        fail(ErrorCode.NOT_AN_OBJECT, f"payload is a JSON {type(obj).__name__}, not an object")

    # From here the sender's correlation id and reply topic are known: use them for errors too.
    cid = obj.get("correlation_id")
    correlation_id = cid if isinstance(cid, str) and _CORRELATION_RE.fullmatch(cid) else None
    try:
        reply = _reply_address(topics, props, obj.get("reply_to"), correlation_id)
    except TopicError as exc:
        fail(
            ErrorCode.BAD_REPLY_TOPIC,
            str(exc),
            dataclasses.replace(fallback, correlation_id=correlation_id),
        )

    kind = obj.setdefault("kind", name.value)
    if kind != name.value:
        fail(ErrorCode.KIND_MISMATCH, f"kind {kind!r} sent on the {name.value!r} topic", reply)
    version = obj.get("schema_version")
    if "schema_version" in obj and not (isinstance(version, str) and version in _SCHEMA_VERSIONS):
        fail(
            ErrorCode.UNSUPPORTED_VERSION,
            f"schema_version {version!r} not supported (supported: {sorted(_SCHEMA_VERSIONS)})",
            reply,
        )
    try:
        command = _COMMAND_ADAPTER.validate_python(obj, strict=True)
    except ValidationError as exc:
        fail(ErrorCode.INVALID_FIELDS, _summarise(exc), reply)
    return Command(name=name, payload=command, reply=reply)


def ok_reply(command: Command, station: str, at: dt.datetime, text: str | None = None) -> Reply:
    """The reply to a command the station carried out."""
    return Reply(
        station=station,
        command=command.name,
        status=ReplyStatus.OK,
        code=None,
        text=text,
        correlation_id=command.reply.correlation_id,
        at=at,
    )


def error_reply(error: CommandError, station: str, at: dt.datetime) -> Reply:
    """The reply to a refused command (``error`` from ``parse_command`` or from the station)."""
    return Reply(
        station=station,
        command=error.command,
        status=ReplyStatus.ERROR,
        code=error.code,
        text=error.text or error.code.value,
        correlation_id=error.reply.correlation_id,
        at=at,
    )
