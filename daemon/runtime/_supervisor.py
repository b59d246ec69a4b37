"""The station supervisor: every long-lived task of the daemon in one ``asyncio.TaskGroup``.

Theory of operation
-------------------
``Station(config).run(stop)`` is the whole daemon. It opens the durable outbox and the MQTT
session (both ``async with``), builds the station state, the command handler, the result
flusher and one ``WrenchWorker`` per configured wrench, and runs them as tasks of one task
group, each named after what it serves:

=========================  ===========================================================
``clampd[WRENCH].link``    the wrench's link, engine and results (``WrenchWorker.run``)
``clampd.flusher``         outbox → broker, in order, ``mark_sent`` after the PUBACK
``clampd.commands``        MQTT commands → station state, one reply per command
``clampd.status``          retained wrench and station status, latest wins
``clampd.watchdog``        ``WATCHDOG=1`` to systemd while the loop is alive
``clampd.outbox``          retention pruning of the journal
=========================  ===========================================================

(the MQTT session runs its own ``clampd.mqtt.*`` tasks inside its context.)

Isolation: one failing wrench never stops the others. A link error is the link's business
(``connect_forever`` retries it); a wrench whose address the station refuses is reported and
parked; anything else escaping a worker is a bug, logged with its traceback, and that worker
alone is started again after ``next_delay``. Only the supervisor's own tasks may end the group.

Shutdown (SIGTERM/SIGINT set ``stop``): systemd hears ``STOPPING=1``; a rundown in progress
may finish for ``finish_grace_s`` (the technician is mid-pull; cutting the record off is
worse than waiting a moment), then it is aborted and stored NOK ``aborted``; the task group
is cancelled; the outbox is flushed for up to ``flush_timeout_s`` while the broker is
reachable; leaving the session publishes the retained ``offline`` status. Whatever could not
be flushed stays in the outbox and goes out after the next start: nothing is lost.

Readiness: ``READY=1`` once the outbox is open and every task is started (the broker and
the wrenches may still be connecting: the daemon is doing its job, which includes waiting
for them). The status line names the station and how many wrenches are configured.

These results support, never replace, the joint designer's specification, local codes and
licensed practice.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import datetime as dt
import logging
import random
from collections.abc import Callable
from pathlib import Path
from typing import Any, Final

from clampd.daemon import engine
from clampd.daemon.runtime._backoff import next_delay
from clampd.daemon.runtime._ble import BleakWrenchLink, LinkRefusedError
from clampd.daemon.runtime._config import StationConfig, WrenchConfig
from clampd.daemon.runtime._cues import CuePlayer, make_player
from clampd.daemon.runtime._mqtt import BrokerUnavailable, MqttSession
from clampd.daemon.runtime._outbox import AsyncOutbox, Entry
from clampd.daemon.runtime._results import OutboxResultSink
from clampd.daemon.runtime._systemd import SystemdNotifier
from clampd.daemon.runtime._wrench import (
    LiveEventPayload,
    WorkOrder,
    WrenchWorker,
    engine_settings,
)
from clampd.protocol import (
    Abort,
    Command,
    CommandError,
    ErrorCode,
    Judgement,
    Lock,
    Ping,
    Selection,
    SelectProgram,
    StationState,
    StationStatus,
    Topics,
    Unlock,
    WrenchStatus,
    error_reply,
    ok_reply,
    parse_command,
)

__all__ = [
    "FINISH_GRACE_S",
    "FLUSH_TIMEOUT_S",
    "BleakKwargs",
    "Station",
    "resident_memory_kib",
]

_log = logging.getLogger(__name__)

# A hand rundown takes one to a few seconds from snug to stop (common practice, no source);
# five seconds lets one in progress finish at shutdown before it is aborted (our choice,
# well inside systemd's default 90 s stop timeout).
FINISH_GRACE_S: Final = 5.0
# Flushing the outbox at shutdown: a loopback broker acknowledges in well under a
# millisecond (NOTES-ble-mqtt.md), a plant broker in tens; ten seconds moves thousands of
# results, and what is left goes out after the next start (our choice).
FLUSH_TIMEOUT_S: Final = 10.0
# Journal pruning: retention is counted in days, so once an hour is plenty (our choice).
_PRUNE_EVERY_S: Final = 3600.0
# How often the shutdown path looks whether the rundowns in progress ended.
_POLL_S: Final = 0.05

BleakKwargs = Callable[[WrenchConfig], dict[str, Any]]
"""Per wrench, keyword arguments for ``BleakClient`` (the virtual link's backend in the demo
and the tests; nothing in production)."""


def resident_memory_kib() -> int | None:
    """This process's resident set size in KiB, from ``/proc/self/status`` (Linux ``VmRSS``).

    None where there is no procfs. The figure the demo and the benchmarks report.
    """
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1])
    except (OSError, ValueError, IndexError):
        return None
    return None


class _Stopped(Exception):  # noqa: N818 -- a signal to the task group, not an error
    """Raised inside the task group to end it cleanly."""


class _StatusBoard:
    """Wrench status, latest wins per wrench; a task publishes what changed (retained).

    Implements the worker's ``StatusSink`` and ``LiveSink`` ports; neither blocks the worker.
    Live events go straight on to the session's rate-limited QoS 0 path.
    """

    def __init__(self, session: MqttSession) -> None:
        self._session = session
        self._latest: dict[str, WrenchStatus] = {}
        self._dirty: set[str] = set()
        self._wake = asyncio.Event()

    def offer_status(self, status: WrenchStatus) -> None:
        self._latest[status.wrench_id] = status
        self._dirty.add(status.wrench_id)
        self._wake.set()

    def publish_live(self, event: LiveEventPayload) -> None:
        self._session.publish_live(event)

    def offer(self, wrench_id: str, event: LiveEventPayload) -> None:
        del wrench_id
        self._session.publish_live(event)

    def latest(self, wrench_id: str) -> WrenchStatus | None:
        return self._latest.get(wrench_id)

    async def run(self) -> None:
        seen_generation = -1
        while True:
            generation = await self._session.wait_online()
            if generation != seen_generation:
                # A new connection: the broker may have lost retained messages (restarted
                # without persistence), so every wrench's status is published again.
                self._dirty |= set(self._latest)
                seen_generation = generation
            for wrench_id in sorted(self._dirty):
                try:
                    await self._session.publish_model(self._latest[wrench_id])
                except BrokerUnavailable:
                    break  # offline again; the next generation republishes everything
                self._dirty.discard(wrench_id)
            if not self._dirty:
                self._wake.clear()
                await self._wake.wait()
            else:
                await asyncio.sleep(_POLL_S)


# -- station state, commands and flushing ---------------------------------------------------
# The station's own bookkeeping, kept small: what each wrench should do next, lock flags,
# the published status, the command path and the outbox flusher.


@dataclasses.dataclass(slots=True)
class _Selection:
    program: engine.Program
    part_id: str
    positions: list[str]
    next_index: int = 0

    def next_position(self) -> str | None:
        return self.positions[self.next_index] if self.next_index < len(self.positions) else None


class _Board:
    """Per wrench: the selection in force and the lock flag. Implements ``StationPort``.

    Policy: the station moves to the next position once a result for the current one is
    stored, OK or NOK; what happens after a NOK (rework, review) is the MES's decision, which
    it makes by selecting the positions to redo.
    """

    def __init__(self, station_id: str, programs: dict[str, engine.Program], wrenches: list[str]):
        self.station_id = station_id
        self.programs = programs
        self.wrenches = wrenches
        self.selection: dict[str, _Selection] = {}
        self.locked: set[str] = set()
        self._latest: str | None = None  # wrench of the latest selection, shown in the status

    # StationPort
    def work_order(self, wrench_id: str) -> WorkOrder | None:
        sel = self.selection.get(wrench_id)
        position = None if sel is None else sel.next_position()
        if sel is None or position is None:
            return None
        return WorkOrder(program=sel.program, part_id=sel.part_id, joint_position=position)

    def is_locked(self, wrench_id: str) -> bool:
        return wrench_id in self.locked

    def position_done(self, wrench_id: str, joint_position: str, status: Judgement) -> None:
        del status
        sel = self.selection.get(wrench_id)
        if sel is not None and sel.next_position() == joint_position:
            sel.next_index += 1

    # what commands change
    def select(self, cmd: SelectProgram) -> str:
        program = self.programs.get(cmd.program_id)
        if program is None or (
            cmd.program_version is not None and cmd.program_version != program.version
        ):
            raise _Refused(ErrorCode.UNKNOWN_PROGRAM, f"no program {cmd.program_id!r} here")
        targets = self._targets(cmd.wrench_id)
        for w in targets:
            self.selection[w] = _Selection(program, cmd.part_id, list(cmd.joint_positions))
        self._latest = targets[0]
        return f"{cmd.program_id} for {cmd.part_id} on {', '.join(targets)}"

    def lock(self, wrench_id: str | None, *, locked: bool) -> str:
        targets = self._targets(wrench_id)
        for w in targets:
            if locked:
                self.locked.add(w)
            else:
                self.locked.discard(w)
        return f"{'locked' if locked else 'unlocked'} {', '.join(targets)}"

    def _targets(self, wrench_id: str | None) -> list[str]:
        if wrench_id is None:
            return list(self.wrenches)
        if wrench_id not in self.wrenches:
            raise _Refused(ErrorCode.UNKNOWN_WRENCH, f"no wrench {wrench_id!r} at this station")
        return [wrench_id]

    def status(self, at: dt.datetime, software_version: str | None) -> StationStatus:
        sel = None if self._latest is None else self.selection.get(self._latest)
        return StationStatus(
            station=self.station_id,
            state=StationState.ONLINE,
            software_version=software_version,
            locked=bool(self.wrenches) and set(self.wrenches) <= self.locked,
            selection=None
            if sel is None
            else Selection(
                program_id=sel.program.id,
                program_version=sel.program.version,
                part_id=sel.part_id,
                joint_positions=sel.positions,
                next_position=sel.next_position(),
            ),
            at=at,
        )


class _Refused(Exception):  # noqa: N818 -- carries an error code for the reply, like CommandError
    def __init__(self, code: ErrorCode, text: str) -> None:
        super().__init__(text)
        self.code = code
        self.text = text


@dataclasses.dataclass(slots=True)
class _WorkerSlot:
    config: WrenchConfig
    worker: WrenchWorker
    restarts: int = 0
    parked: str | None = None  # why this wrench is not served (a configuration mistake)


class Station:
    """The daemon for one station (see the module docstring).

    ``bleak_kwargs`` gives per-wrench keyword arguments for bleak (the virtual link's backend
    in the demo and the tests; None in production). ``cue_player`` replaces the configured
    one (the demo and the tests use a silent player). ``rng`` seeds every back-off.
    Construction validates nothing new: ``config`` was validated when it was loaded.
    """

    def __init__(
        self,
        config: StationConfig,
        *,
        bleak_kwargs: BleakKwargs | None = None,
        cue_player: CuePlayer | None = None,
        notifier: SystemdNotifier | None = None,
        software_version: str | None = None,
        rng: random.Random | None = None,
        finish_grace_s: float = FINISH_GRACE_S,
        flush_timeout_s: float = FLUSH_TIMEOUT_S,
        config_dir: Path | None = None,
    ) -> None:
        self.config = config
        self.topics = Topics(config.station.topic_prefix)
        self._bleak_kwargs = bleak_kwargs
        self._cue_player = cue_player
        self.notifier = notifier if notifier is not None else SystemdNotifier()
        self.software_version = software_version or _version()
        self._rng = rng if rng is not None else random.Random()
        self._finish_grace_s = finish_grace_s
        self._flush_timeout_s = flush_timeout_s
        self._config_dir = config_dir
        self.slots: dict[str, _WorkerSlot] = {}
        self.session: MqttSession | None = None
        self.outbox: AsyncOutbox | None = None
        self.ready = asyncio.Event()
        """Set once every task runs (what READY=1 tells systemd)."""
        self.flushed_at_stop = 0
        """Results the shutdown flush delivered."""
        self.unsent_at_stop: int | None = None
        """Results left in the outbox after the shutdown flush (None until it ran)."""
        self.results_sent = 0
        self.commands_done = 0
        self.commands_refused = 0
        self.board = _Board(config.station.id, {}, [])
        self._status_changed = asyncio.Event()
        self._send_lock = asyncio.Lock()

    # -- the whole daemon ----------------------------------------------------------------

    async def run(self, stop: asyncio.Event) -> None:
        """Run until ``stop`` is set, then shut down as the module docstring describes."""
        cfg = self.config
        warnings: list[str] = []
        player = self._cue_player
        if player is None:
            player, warnings = make_player(
                cfg.cues.output, wav_dir=cfg.cues.wav_dir, volume=cfg.cues.volume
            )
        for w in warnings:
            _log.warning("cues: %s", w)
        outbox_cfg = cfg.outbox
        async with (
            AsyncOutbox(
                outbox_cfg.path,
                retention_days=outbox_cfg.retention_days,
                size_cap_bytes=outbox_cfg.size_cap_bytes,
            ) as outbox,
            MqttSession(
                cfg.broker,
                self.topics,
                station_id=cfg.station.id,
                client_id=cfg.client_id,
                software_version=self.software_version,
                status_provider=self._station_status,
                rng=random.Random(self._rng.random()),
            ) as session,
        ):
            self.outbox, self.session = outbox, session
            board = _StatusBoard(session)
            self._build(outbox, session, board, player)
            try:
                async with asyncio.TaskGroup() as tg:
                    for slot in self.slots.values():
                        tg.create_task(
                            self._serve_wrench(slot), name=f"clampd[{slot.config.id}].link"
                        )
                    self._start_tasks(tg, board)
                    tg.create_task(self._watchdog(), name="clampd.watchdog")
                    tg.create_task(self._prune(outbox), name="clampd.outbox")
                    self.ready.set()
                    self.notifier.ready(
                        f"station {cfg.station.id}: {len(self.slots)} wrench(es) configured"
                    )
                    _log.info(
                        "station %s running: %d wrench(es), broker %s",
                        cfg.station.id,
                        len(self.slots),
                        cfg.broker.url,
                    )
                    await stop.wait()
                    self.notifier.stopping()
                    _log.info("stopping: finishing rundowns in progress")
                    await self._wind_down()
                    raise _Stopped
            except* _Stopped:
                pass
            await self._final_flush(outbox, session)
            _log.info(
                "stopped: %d result(s) flushed at stop, %s left in the outbox",
                self.flushed_at_stop,
                self.unsent_at_stop,
            )

    # -- assembly ---------------------------------------------------------------------------

    def _build(
        self, outbox: AsyncOutbox, session: MqttSession, board: _StatusBoard, player: CuePlayer
    ) -> None:
        cfg = self.config
        sink = OutboxResultSink(outbox, self.topics)
        allowed = [w.address for w in cfg.wrench]
        self._build_state()
        for wcfg in cfg.wrench:
            kwargs = self._bleak_kwargs(wcfg) if self._bleak_kwargs is not None else None
            link = BleakWrenchLink(
                wcfg.address, wrench_id=wcfg.id, allowed=allowed, bleak_kwargs=kwargs
            )
            worker = WrenchWorker(
                wcfg,
                station_id=cfg.station.id,
                link=link,
                station=self._station_port(),
                results=sink,
                live=board,
                status=board,
                cues=player,
                settings=engine_settings(
                    wcfg,
                    reaction_time_s=cfg.cues.reaction_time_s,
                    cue_latency_s=cfg.cues.latency_s,
                ),
                rng=random.Random(self._rng.random()),
            )
            self.slots[wcfg.id] = _WorkerSlot(wcfg, worker)

    # -- station state, commands, flushing ---------------------------------------------------

    def _build_state(self) -> None:
        cfg = self.config
        programs = {p["id"]: engine.program_from_mapping(p) for p in cfg.program}
        self.board = _Board(cfg.station.id, programs, [w.id for w in cfg.wrench])

    def _station_port(self) -> _Board:
        return self.board

    def _station_status(self, at: dt.datetime) -> StationStatus:
        return self.board.status(at, self.software_version)

    def _start_tasks(self, tg: asyncio.TaskGroup, board: _StatusBoard) -> None:
        assert self.session is not None
        assert self.outbox is not None
        tg.create_task(self._flush(self.outbox, self.session), name="clampd.flusher")
        tg.create_task(self._commands(self.session), name="clampd.commands")
        tg.create_task(board.run(), name="clampd.status")
        tg.create_task(self._status_pump(self.session), name="clampd.station-status")

    async def _commands(self, session: MqttSession) -> None:
        """Every command gets exactly one reply; nothing a command holds can end this loop."""
        async for incoming in session.commands():
            now = dt.datetime.now(dt.UTC)
            station_id = self.config.station.id
            try:
                command = parse_command(
                    self.topics, incoming.topic, incoming.payload, incoming.properties
                )
            except CommandError as exc:
                self.commands_refused += 1
                _log.warning("command on %s refused: %s", incoming.topic, exc)
                reply = error_reply(exc, station_id, now)
                address = exc.reply
            else:
                address = command.reply
                try:
                    text = self._apply(command)
                except _Refused as exc:
                    self.commands_refused += 1
                    _log.warning("command %s refused: %s", command.name.value, exc.text)
                    reply = error_reply(
                        CommandError(exc.code, exc.text, reply=address, command=command.name),
                        station_id,
                        now,
                    )
                else:
                    self.commands_done += 1
                    reply = ok_reply(command, station_id, now, text)
            try:
                await session.publish_reply(address, reply.model_dump_json().encode())
            except BrokerUnavailable as exc:
                _log.warning("reply to %s lost: %s", address.topic, exc)

    def _apply(self, command: Command) -> str | None:
        payload = command.payload
        board = self.board
        match payload:
            case SelectProgram():
                text = board.select(payload)
            case Lock():
                text = board.lock(payload.wrench_id, locked=True)
            case Unlock():
                text = board.lock(payload.wrench_id, locked=False)
            case Abort():
                targets = board._targets(payload.wrench_id)
                aborted = [w for w in targets if self.slots[w].worker.request_abort()]
                if not aborted:
                    raise _Refused(ErrorCode.NOTHING_TO_ABORT, "no rundown in progress")
                text = f"aborting the rundown on {', '.join(aborted)}"
            case Ping():
                return "pong"
        self._status_changed.set()
        return text

    async def _flush(self, outbox: AsyncOutbox, session: MqttSession) -> None:
        """Outbox → broker in append order; ``mark_sent`` only after the PUBACK."""
        while True:
            await session.wait_online()
            await outbox.wait_pending()
            try:
                for entry in await outbox.pending(100):
                    # Publish and mark as one step that a shutdown lets finish: cancelled
                    # between the PUBACK and mark_sent, the final flush would send it twice.
                    await asyncio.shield(self._send(outbox, session, entry))
            except BrokerUnavailable as exc:
                _log.info("flusher: %s; resuming after the reconnect", exc)
                await asyncio.sleep(_POLL_S)

    async def _send(self, outbox: AsyncOutbox, session: MqttSession, entry: Entry) -> None:
        async with self._send_lock:
            if (await outbox.get(entry.id) or entry).sent:
                return  # the shutdown flush took it meanwhile
            await session.publish(entry.topic, entry.payload, qos=1)
            await outbox.mark_sent(entry.id)
            self.results_sent += 1

    async def _status_pump(self, session: MqttSession) -> None:
        while True:
            await self._status_changed.wait()
            self._status_changed.clear()
            with contextlib.suppress(BrokerUnavailable):
                await session.publish_status()

    # -- wrenches -------------------------------------------------------------------------

    async def _serve_wrench(self, slot: _WorkerSlot) -> None:
        """One wrench for the daemon's lifetime; its failures stay its own."""
        attempt = 0
        while True:
            try:
                await slot.worker.run()
            except LinkRefusedError as exc:
                slot.parked = str(exc)
                _log.error(
                    "%s: %s; this wrench is not served until the config is fixed",
                    slot.config.id,
                    exc,
                )
                await asyncio.Event().wait()  # parked for good; the other wrenches go on
            except Exception:
                slot.restarts += 1
                _log.exception(
                    "%s %s: worker failed (a bug); restarting it",
                    slot.config.id,
                    slot.config.address,
                )
                await asyncio.sleep(next_delay(attempt, self._rng))
                attempt += 1

    async def _wind_down(self) -> None:
        """Let rundowns in progress finish for the grace period, then abort them."""
        with contextlib.suppress(TimeoutError):
            async with asyncio.timeout(self._finish_grace_s):
                await self._no_rundown()
        if any(s.worker.in_rundown for s in self.slots.values()):
            for slot in self.slots.values():
                if slot.worker.request_abort():
                    _log.warning("%s: rundown aborted at shutdown", slot.config.id)
            # The abort lands on the worker's next idle tick (IDLE_S) and is stored NOK.
            with contextlib.suppress(TimeoutError):
                async with asyncio.timeout(self._finish_grace_s):
                    await self._no_rundown()
        # A result refused by a full outbox is still in memory: say so, it is lost at exit.
        for slot in self.slots.values():
            if slot.worker.unstored_results:
                _log.error(
                    "%s: %d judged result(s) could not be stored (outbox full) and are lost",
                    slot.config.id,
                    slot.worker.unstored_results,
                )

    async def _no_rundown(self) -> None:
        # Polled: the worker has no "rundown ended" event to wait on, and the check is a
        # few attribute reads every 50 ms during shutdown only.
        while any(s.worker.in_rundown for s in self.slots.values()):  # noqa: ASYNC110
            await asyncio.sleep(_POLL_S)

    async def _final_flush(self, outbox: AsyncOutbox, session: MqttSession) -> None:
        """Deliver what the outbox holds while the broker is reachable, for a bounded time."""
        sent = 0
        if session.state.online.is_set():
            with contextlib.suppress(TimeoutError, BrokerUnavailable):
                async with asyncio.timeout(self._flush_timeout_s):
                    while entries := await outbox.pending(100):
                        for entry in entries:
                            before = self.results_sent
                            await self._send(outbox, session, entry)
                            sent += self.results_sent - before
        self.flushed_at_stop = sent
        self.unsent_at_stop = await outbox.count_unsent()

    # -- small tasks -------------------------------------------------------------------------

    async def _watchdog(self) -> None:
        interval = self.notifier.watchdog_interval_s
        if interval is None:
            return
        while True:
            # This task runs only while the loop turns: a blocked loop stops the pets and
            # systemd restarts the daemon (WatchdogSec in deploy/clampd.service).
            self.notifier.watchdog()
            await asyncio.sleep(interval)

    async def _prune(self, outbox: AsyncOutbox) -> None:
        while True:
            removed = await outbox.prune()
            if removed:
                _log.info("journal: %d sent result(s) past retention removed", removed)
            await asyncio.sleep(_PRUNE_EVERY_S)


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("clampd")
    except PackageNotFoundError:
        return "0+unknown"
