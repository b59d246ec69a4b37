"""Commands an MES sends to a station, and the machine-readable error codes of its replies.

Commands arrive from the plant network and are untrusted: every model is strict (no coercion
of "12" to 12), forbids unknown fields (a misspelt ``wrench_ld`` must not silently mean "all
wrenches") and bounds every string and list. Parsing bytes into these models, with size and
depth caps, lives in ``_inbound.py``.

Every command carries ``schema_version`` and may carry ``reply_to`` + ``correlation_id`` for
MQTT 3.1.1 clients, which have no Response Topic / Correlation Data properties (MQTT 5.0
§4.10). ``kind`` names the command; it may be left out because the command topic already says
it, and must agree with the topic when given.
"""

from __future__ import annotations

import enum
from typing import Annotated, Literal

from pydantic import Field, StringConstraints, field_validator

from clampd.protocol._fields import Ident, InboundModel, PartId, Text

__all__ = [
    "CORRELATION_ID_PATTERN",
    "MAX_JOINT_POSITIONS",
    "Abort",
    "CommandName",
    "CommandPayload",
    "ErrorCode",
    "Lock",
    "Ping",
    "SelectProgram",
    "Unlock",
]

# An MES correlation id: a UUID, a job number, a counter. 128 printable ASCII characters is
# ample and keeps a reply small.
CORRELATION_ID_PATTERN = r"^[!-~]{1,128}$"
CorrelationId = Annotated[str, StringConstraints(pattern=CORRELATION_ID_PATTERN)]
# A topic a 3.1.1 client wants its reply on; checked further against the station's prefix in
# _inbound.py (MQTT allows 65 535 bytes; 256 is plenty for a plant topic tree).
ReplyTopic = Annotated[str, StringConstraints(min_length=1, max_length=256)]

# The most joint positions one part selection names (a wheel hub has 5–10 bolts, a cylinder
# head 10–26; 64 leaves room and keeps a command under a few kB; common practice, no source).
MAX_JOINT_POSITIONS = 64


class CommandName(enum.StrEnum):
    """The command topics under ``{prefix}/cmd/``, one per command."""

    SELECT_PROGRAM = "select_program"
    LOCK = "lock"
    UNLOCK = "unlock"
    ABORT = "abort"
    PING = "ping"


class ErrorCode(enum.StrEnum):
    """Why a command was refused: stable, machine-readable, for an MES to branch on.

    The first group is found while parsing (the sender's fault); the second by the station
    when it acts on a well-formed command.
    """

    BAD_TOPIC = "bad_topic"
    TOO_LARGE = "too_large"
    BAD_ENCODING = "bad_encoding"
    BAD_JSON = "bad_json"
    TOO_DEEP = "too_deep"
    NOT_AN_OBJECT = "not_an_object"
    UNKNOWN_COMMAND = "unknown_command"
    KIND_MISMATCH = "kind_mismatch"
    UNSUPPORTED_VERSION = "unsupported_version"
    INVALID_FIELDS = "invalid_fields"
    BAD_REPLY_TOPIC = "bad_reply_topic"
    # found by the station when acting on a well-formed command
    UNKNOWN_PROGRAM = "unknown_program"
    UNKNOWN_WRENCH = "unknown_wrench"
    WRENCH_NOT_FIT = "wrench_not_fit"
    BUSY = "busy"
    LOCKED = "locked"
    NOTHING_TO_ABORT = "nothing_to_abort"
    INTERNAL = "internal"


class _CommandBase(InboundModel):
    schema_version: Literal["1"]
    reply_to: ReplyTopic | None = Field(
        default=None,
        description="For MQTT 3.1.1 clients: topic for the reply. MQTT 5 clients set the "
        "Response Topic property instead, which wins when both are given.",
    )
    correlation_id: CorrelationId | None = Field(
        default=None, description="Echoed unchanged in the reply."
    )


class SelectProgram(_CommandBase):
    """Choose the tightening program, the part being built and the joint positions to do.

    The station works through ``joint_positions`` in order; each result names its position.
    """

    kind: Literal["select_program"] = "select_program"
    program_id: Ident
    program_version: int | None = Field(
        default=None, ge=1, description="Exact version required; null takes the current one."
    )
    part_id: PartId
    joint_positions: list[Ident] = Field(
        min_length=1, max_length=MAX_JOINT_POSITIONS, json_schema_extra={"uniqueItems": True}
    )
    wrench_id: Ident | None = Field(
        default=None, description="Wrench to use; null lets the station choose."
    )

    @field_validator("joint_positions")
    @classmethod
    def _unique_positions(cls, value: list[str]) -> list[str]:
        if len(set(value)) != len(value):
            raise ValueError("joint positions must be unique")
        return value


class Lock(_CommandBase):
    """Stop accepting rundowns (wrench cue "locked") until an ``unlock``."""

    kind: Literal["lock"] = "lock"
    wrench_id: Ident | None = Field(default=None, description="null locks every wrench.")
    reason: Text | None = None


class Unlock(_CommandBase):
    """Accept rundowns again."""

    kind: Literal["unlock"] = "unlock"
    wrench_id: Ident | None = Field(default=None, description="null unlocks every wrench.")


class Abort(_CommandBase):
    """End the rundown in progress; it is reported NOK with reason ``aborted``."""

    kind: Literal["abort"] = "abort"
    wrench_id: Ident | None = Field(default=None, description="null aborts on every wrench.")
    reason: Text | None = None


class Ping(_CommandBase):
    """Ask for a reply, to check the station's command path end to end."""

    kind: Literal["ping"] = "ping"


CommandPayload = Annotated[
    SelectProgram | Lock | Unlock | Abort | Ping, Field(discriminator="kind")
]
