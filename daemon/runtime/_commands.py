"""Carry out MES commands against the station state and answer every one of them.

Theory of operation
-------------------
``CommandHandler.run`` reads ``session.commands()`` and, for each message, in order:

1. parses it with the protocol's ``parse_command`` (topic under this station's ``cmd/``,
   size, encoding, depth, strict JSON, strict fields, reply topic outside the station's tree);
2. refuses a *retained* command (``bad_topic``): MQTT.md forbids them, because the broker would
   hand a retained ``lock`` or ``select_program`` to the station again on every reconnect;
3. applies it to ``StationState`` (select program, lock, unlock, abort, ping);
4. replies, always: ``ok`` with a short text saying what was done, or ``error`` with the
   machine-readable code and a text. The reply goes where the command asked (MQTT 5 Response
   Topic with Correlation Data, the payload's ``reply_to``, else ``{prefix}/reply``);
5. after a change, republishes the retained station status.

Nothing a message contains can end the handler: the protocol's parser raises only
``CommandError``, the state only ``StationStateError``, and anything else (our own bug) is
logged and answered with ``internal``. When the reply cannot be sent (broker gone), it is
logged and counted; the command's effect stands.

Authorisation
-------------
An MQTT PUBLISH as a subscriber receives it does not carry the sender's client id or user
name (MQTT 5.0 §3.3), so any "sender" the station could check would be one the sender wrote
itself. Who may send which command is therefore the broker's job: its ACL grants each command
topic separately (one topic per command, MQTT.md; deploy/ has examples). The station enforces
what only it can: it acts only on its own command topics, refuses retained commands, and never
lets a reply topic point into its own tree.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as dt
import logging
from collections.abc import AsyncIterator, Callable
from typing import Protocol

from clampd.daemon.runtime._mqtt import BrokerUnavailable, IncomingCommand
from clampd.daemon.runtime._station import StationState, StationStateError
from clampd.protocol import (
    Abort,
    Command,
    CommandError,
    ErrorCode,
    Lock,
    Ping,
    Reply,
    ReplyAddress,
    ReplyStatus,
    SelectProgram,
    Topics,
    Unlock,
    error_reply,
    ok_reply,
    parse_command,
)

__all__ = ["CommandCounters", "CommandHandler", "CommandSession"]

_log = logging.getLogger(__name__)


class CommandSession(Protocol):
    """The narrow port the handler needs from the MQTT session."""

    def commands(self) -> AsyncIterator[IncomingCommand]:
        """Incoming command messages, in arrival order."""
        ...

    async def publish_reply(self, address: ReplyAddress, payload: bytes) -> None:
        """Send a reply (QoS 1); raise ``BrokerUnavailable`` when it cannot."""
        ...

    async def publish_status(self) -> None:
        """Republish the retained station status; raise ``BrokerUnavailable`` when offline."""
        ...


@dataclasses.dataclass(slots=True)
class CommandCounters:
    """How commands fared; only ever grows."""

    received: int = 0
    ok: int = 0
    refused: int = 0
    internal_errors: int = 0
    replies_sent: int = 0
    replies_failed: int = 0


def _utcnow() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


def _who(wrench_id: str | None) -> str:
    return "every wrench" if wrench_id is None else f"wrench {wrench_id}"


class CommandHandler:
    """Applies commands to ``state`` and answers each through ``session``.

    ``clock`` gives the reply's UTC time (inject a fixed one in tests).
    """

    def __init__(
        self,
        session: CommandSession,
        state: StationState,
        topics: Topics,
        *,
        clock: Callable[[], dt.datetime] = _utcnow,
    ) -> None:
        self._session = session
        self._state = state
        self._topics = topics
        self._clock = clock
        self.counters = CommandCounters()

    async def run(self) -> None:
        """Handle commands until cancelled."""
        async for message in self._session.commands():
            await self.handle(message)

    async def handle(self, message: IncomingCommand) -> Reply:
        """Apply one message and send its reply; return the reply. Never raises for any
        message content (only cancellation ends it)."""
        self.counters.received += 1
        station = self._state.station_id
        changed = False
        address: ReplyAddress | None = None
        try:
            command = parse_command(
                self._topics, message.topic, message.payload, message.properties
            )
            address = command.reply
            if message.retained:
                raise CommandError(
                    ErrorCode.BAD_TOPIC,
                    "retained command refused: the broker would replay it on every reconnect; "
                    "publish commands with retain=false",
                    reply=command.reply,
                    command=command.name,
                )
            try:
                text, changed = self._apply(command)
            except StationStateError as exc:
                raise CommandError(
                    exc.code, str(exc), reply=command.reply, command=command.name
                ) from None
            reply = ok_reply(command, station, self._clock(), text)
            self.counters.ok += 1
        except CommandError as exc:
            address = exc.reply
            reply = error_reply(exc, station, self._clock())
            self.counters.refused += 1
            _log.info("command on %s refused: %s", message.topic[:200], exc)
        except Exception:
            # Our own bug, never the sender's: answer, keep the daemon running, leave a trace.
            self.counters.internal_errors += 1
            _log.exception("command on %s failed inside the station", message.topic[:200])
            if address is None:
                address = ReplyAddress(topic=self._topics.reply_default(), via="default")
            reply = Reply(
                station=station,
                command=None,
                status=ReplyStatus.ERROR,
                code=ErrorCode.INTERNAL,
                text="internal error in the station; see its log",
                correlation_id=address.correlation_id,
                at=self._clock(),
            )
        await self._send(address, reply)
        if changed:
            # Offline: the session announces the status again on its next connect.
            with contextlib.suppress(BrokerUnavailable):
                await self._session.publish_status()
        return reply

    async def _send(self, address: ReplyAddress, reply: Reply) -> None:
        try:
            await self._session.publish_reply(address, reply.to_json_bytes())
        except BrokerUnavailable as exc:
            self.counters.replies_failed += 1
            _log.warning("reply to %s not sent: %s", address.topic[:200], exc)
        else:
            self.counters.replies_sent += 1

    def _apply(self, command: Command) -> tuple[str, bool]:
        """Carry out a parsed command; return (reply text, whether state changed)."""
        state = self._state
        match command.payload:
            case SelectProgram() as p:
                job = state.select(
                    program_id=p.program_id,
                    program_version=p.program_version,
                    part_id=p.part_id,
                    joint_positions=p.joint_positions,
                    wrench_id=p.wrench_id,
                )
                return (
                    f"selected program {job.program.id} v{job.program.version} for part "
                    f"{job.part_id} on {_who(p.wrench_id)}: {len(job.joints)} joint "
                    f"positions, next {job.next_position}"
                ), True
            case Lock() as p:
                state.lock(p.wrench_id, p.reason)
                return f"locked {_who(p.wrench_id)}", True
            case Unlock() as p:
                state.unlock(p.wrench_id)
                still = state.station_locked
                return f"unlocked {_who(p.wrench_id)}" + (
                    "; the station lock still holds" if still else ""
                ), True
            case Abort() as p:
                asked = state.request_abort(p.wrench_id, p.reason)
                return f"abort requested on wrench {', '.join(asked)}", True
            case Ping():
                return (
                    f"pong from {state.station_id}: {len(state.programs)} programs, "
                    f"{len(state.wrench_ids)} wrenches, "
                    f"{'locked' if state.station_locked else 'unlocked'}"
                ), False
