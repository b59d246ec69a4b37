"""The station's MQTT topic tree: one table from payload type to topic, QoS and retain.

Every topic lives under a configurable prefix, typically an ISA-95-style path
``site/area/line/station`` (e.g. ``brackenfield/deck-assembly/line-3/st-120``)::

    {prefix}/result                                   RundownResult     QoS 1
    {prefix}/status                                   StationStatus     QoS 1, retained, last will
    {prefix}/wrench/{wrench_id}/status                WrenchStatus      QoS 1, retained
    {prefix}/wrench/{wrench_id}/live                  Live*             QoS 0
    {prefix}/stats/{program_id}/{wrench_id}           QualityStats      QoS 1, retained
    {prefix}/alarm                                    Alarm             QoS 1
    {prefix}/cmd/{command}                            commands (in)     QoS 1
    {prefix}/reply                                    Reply (default)   QoS 1

Why these choices:
- Results are QoS 1 and not retained: each is an event that must arrive at least once (the MES
  de-duplicates by id); a retained result would be replayed to every new subscriber as if new.
- Status topics are retained so a dashboard that connects later sees the current state at once;
  the station's last will publishes ``offline`` on the same topic (MQTT 5.0 §3.1.2.5).
- Live events are QoS 0: they are superseded within a fraction of a second and must never queue
  up behind results on a slow link.
- One command per topic lets a broker ACL grant an MES ``lock`` but not ``select_program``.

``Topics`` builds concrete topics and parses incoming command topics. Prefixes and topic levels
are validated here once (no wildcards, no empty levels, no NUL, no leading ``$``), so nothing
downstream has to think about topic syntax. Errors are ``TopicError`` (a ``ValueError``).
"""

from __future__ import annotations

import dataclasses
import re
from collections.abc import Mapping
from typing import Literal

from pydantic import BaseModel

from clampd.protocol._commands import Abort, CommandName, Lock, Ping, SelectProgram, Unlock
from clampd.protocol._fields import IDENT_PATTERN
from clampd.protocol._payloads import (
    Alarm,
    LiveCue,
    LiveProgress,
    LiveSnug,
    LiveStop,
    QualityStats,
    Reply,
    RundownResult,
    StationStatus,
    WrenchStatus,
)

__all__ = [
    "TOPIC_TABLE",
    "Route",
    "TopicError",
    "TopicSpec",
    "Topics",
    "UnknownCommandError",
    "check_topic_name",
]

# MQTT 5.0 §1.5.4: a UTF-8 string is at most 65 535 bytes.
_MAX_TOPIC_BYTES = 65_535
_IDENT_RE = re.compile(IDENT_PATTERN)
_FIELD_RE = re.compile(r"\{([a-z_]+)\}")


class TopicError(ValueError):
    """A topic or prefix is malformed, or a topic lies outside this station's tree."""


class UnknownCommandError(TopicError):
    """A topic under this station's command branch names no command the station knows."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class TopicSpec:
    """Where one payload type goes: pattern under the prefix, QoS, retain, and direction.

    ``pattern`` levels in braces are filled from the payload's fields of the same name.
    ``direction`` is seen from the station: ``publish`` (station → MES) or ``subscribe``.
    """

    name: str
    pattern: str
    qos: Literal[0, 1, 2]
    retain: bool
    direction: Literal["publish", "subscribe"]
    summary: str

    def __post_init__(self) -> None:
        if self.qos not in (0, 1, 2):
            raise TopicError(f"{self.name}: QoS must be 0, 1 or 2, got {self.qos}")
        for level in self.pattern.split("/"):
            if not level or any(c in level for c in "+#\0"):
                raise TopicError(f"{self.name}: bad pattern level {level!r} in {self.pattern!r}")

    @property
    def parameters(self) -> tuple[str, ...]:
        """Names of the pattern's placeholders, in order."""
        return tuple(_FIELD_RE.findall(self.pattern))


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Route:
    """A concrete destination for one payload."""

    topic: str
    qos: Literal[0, 1, 2]
    retain: bool


def _spec(
    model: type[BaseModel],
    pattern: str,
    qos: Literal[0, 1, 2],
    *,
    retain: bool = False,
    direction: Literal["publish", "subscribe"] = "publish",
    summary: str,
) -> tuple[type[BaseModel], TopicSpec]:
    return model, TopicSpec(
        name=model.__name__,
        pattern=pattern,
        qos=qos,
        retain=retain,
        direction=direction,
        summary=summary,
    )


_LIVE = "wrench/{wrench_id}/live"
_LIVE_SUMMARY = "Live rundown events of one wrench, rate-limited; may be lost."

TOPIC_TABLE: Mapping[type[BaseModel], TopicSpec] = dict(
    [
        _spec(RundownResult, "result", 1, summary="Each judged rundown, once per rundown."),
        _spec(
            StationStatus,
            "status",
            1,
            retain=True,
            summary="Station online/offline (also the last will), lock and selection.",
        ),
        _spec(
            WrenchStatus,
            "wrench/{wrench_id}/status",
            1,
            retain=True,
            summary="Link, battery, lock and calibration of one wrench.",
        ),
        _spec(LiveProgress, _LIVE, 0, summary=_LIVE_SUMMARY),
        _spec(LiveCue, _LIVE, 0, summary=_LIVE_SUMMARY),
        _spec(LiveSnug, _LIVE, 0, summary=_LIVE_SUMMARY),
        _spec(LiveStop, _LIVE, 0, summary=_LIVE_SUMMARY),
        _spec(
            QualityStats,
            "stats/{program_id}/{wrench_id}",
            1,
            retain=True,
            summary="Running statistics per program and wrench.",
        ),
        _spec(Alarm, "alarm", 1, summary="Alarms raised and cleared."),
        _spec(Reply, "reply", 1, summary="Replies to commands when no reply topic was given."),
        _spec(
            SelectProgram,
            f"cmd/{CommandName.SELECT_PROGRAM}",
            1,
            direction="subscribe",
            summary="Select program, part and joint positions.",
        ),
        _spec(Lock, f"cmd/{CommandName.LOCK}", 1, direction="subscribe", summary="Lock."),
        _spec(Unlock, f"cmd/{CommandName.UNLOCK}", 1, direction="subscribe", summary="Unlock."),
        _spec(
            Abort, f"cmd/{CommandName.ABORT}", 1, direction="subscribe", summary="Abort rundown."
        ),
        _spec(Ping, f"cmd/{CommandName.PING}", 1, direction="subscribe", summary="Ping."),
    ]
)


def check_topic_name(topic: str, *, what: str = "topic") -> str:
    """Return ``topic`` if it is a valid MQTT topic name to publish to, else raise TopicError.

    Rules (MQTT 5.0 §4.7): non-empty, at most 65 535 UTF-8 bytes, no wildcard ``+``/``#``, no
    NUL. Stricter than MQTT on purpose: no empty levels (``a//b`` is legal MQTT but almost always
    a bug), no leading ``$`` (reserved for broker topics such as ``$SYS``) and no control
    characters.
    """
    if not topic:
        raise TopicError(f"{what} is empty")
    if len(topic.encode("utf-8", "surrogatepass")) > _MAX_TOPIC_BYTES:
        raise TopicError(f"{what} is longer than {_MAX_TOPIC_BYTES} bytes")
    if topic.startswith("$"):
        raise TopicError(f"{what} {topic!r} starts with '$' (reserved for the broker)")
    for ch in topic:
        if ch in "+#":
            raise TopicError(f"{what} {topic!r} contains the wildcard {ch!r}")
        if ord(ch) < 0x20 or 0x7F <= ord(ch) <= 0x9F or 0xD800 <= ord(ch) <= 0xDFFF:
            raise TopicError(f"{what} {topic!r} contains a control or surrogate character")
    if "" in topic.split("/"):
        raise TopicError(f"{what} {topic!r} has an empty level")
    return topic


def _level(value: str, field: str) -> str:
    if not _IDENT_RE.fullmatch(value):
        raise TopicError(f"{field} {value!r} cannot be a topic level (allowed: {IDENT_PATTERN})")
    return value


class Topics:
    """Concrete topics of one station under ``prefix``; raises TopicError on a bad prefix."""

    __slots__ = ("_command_root", "prefix")

    def __init__(self, prefix: str) -> None:
        self.prefix = check_topic_name(prefix, what="topic prefix")
        self._command_root = f"{self.prefix}/cmd/"

    def __repr__(self) -> str:
        return f"Topics({self.prefix!r})"

    def _join(self, pattern: str, **fields: str) -> str:
        def fill(m: re.Match[str]) -> str:
            name = m.group(1)
            if name not in fields:
                raise TopicError(f"pattern {pattern!r} needs {name}")
            return _level(fields[name], name)

        return f"{self.prefix}/{_FIELD_RE.sub(fill, pattern)}"

    def result(self) -> str:
        """Topic of results."""
        return self._join("result")

    def station_status(self) -> str:
        """Retained station status, also the last-will topic."""
        return self._join("status")

    def wrench_status(self, wrench_id: str) -> str:
        """Retained status of one wrench."""
        return self._join("wrench/{wrench_id}/status", wrench_id=wrench_id)

    def live(self, wrench_id: str) -> str:
        """Live events of one wrench."""
        return self._join(_LIVE, wrench_id=wrench_id)

    def stats(self, program_id: str, wrench_id: str) -> str:
        """Retained statistics of one program on one wrench."""
        return self._join(
            "stats/{program_id}/{wrench_id}", program_id=program_id, wrench_id=wrench_id
        )

    def alarm(self) -> str:
        """Alarm events."""
        return self._join("alarm")

    def reply_default(self) -> str:
        """Where replies go when a command names no reply topic."""
        return self._join("reply")

    def command(self, name: CommandName) -> str:
        """Topic an MES publishes command ``name`` to."""
        return self._command_root + CommandName(name).value

    def command_filter(self) -> str:
        """Subscription filter covering every command topic."""
        return self._command_root + "+"

    def route(self, payload: BaseModel) -> Route:
        """Topic, QoS and retain for a payload the station publishes, from ``TOPIC_TABLE``.

        Pattern placeholders are filled from the payload's fields of the same name. Raises
        TopicError for a payload type the station does not publish (our own misuse).
        """
        spec = TOPIC_TABLE.get(type(payload))
        if spec is None or spec.direction != "publish":
            raise TopicError(f"{type(payload).__name__} is not a payload the station publishes")
        fields = {name: str(getattr(payload, name)) for name in spec.parameters}
        return Route(topic=self._join(spec.pattern, **fields), qos=spec.qos, retain=spec.retain)

    def parse_command_topic(self, topic: str) -> CommandName:
        """Name the command that ``topic`` carries; TopicError if it is not one of ours."""
        if not topic.startswith(self._command_root):
            raise TopicError(f"topic {topic!r} is not under {self._command_root!r}")
        tail = topic[len(self._command_root) :]
        if not tail or "/" in tail:
            raise TopicError(f"topic {topic!r} is not one level below {self._command_root!r}")
        try:
            return CommandName(tail)
        except ValueError:
            known = ", ".join(c.value for c in CommandName)
            raise UnknownCommandError(f"unknown command {tail!r} (known: {known})") from None

    def is_own_topic(self, topic: str) -> bool:
        """True when ``topic`` lies in this station's tree (at or below the prefix)."""
        return topic == self.prefix or topic.startswith(self.prefix + "/")
