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
``clampd.status``          retained wrench status, latest wins per wrench
``clampd.station-status``  retained station status after a joint position is done
``clampd.watchdog``        ``WATCHDOG=1`` to systemd while the loop is alive
``clampd.outbox``          retention pruning of the journal
``clampd.quality``         retained quality statistics and alarms (``_quality.py``)
``clampd.alarms``          time, outbox and calibration observed for the alarms
``clampd[WRENCH].state``   tells the station state when that wrench's rundown starts
``clampd.view``            the station view, a local read-only web page (``[view]``)
=========================  ===========================================================

(the MQTT session runs its own ``clampd.mqtt.*`` tasks inside its context.)

Isolation: one failing wrench never stops the others. A link error is the link's business
(``connect_forever`` retries it); a wrench whose address the station refuses is reported and
parked; anything else escaping a worker is a bug, logged with its traceback, and that worker
alone is started again after ``next_delay``. Only the supervisor's own tasks may end the group.

Shutdown (SIGTERM/SIGINT set ``stop``): systemd hears ``STOPPING=1``; a rundown in progress
may finish for ``finish_grace_s`` (the technician is mid-pull; cutting the record off is
worse than waiting a moment), then it is aborted and judged NOK ``aborted``; the supervisor
waits until every judged result is durable, then lets the flusher deliver the outbox for up
to ``flush_timeout_s`` while the broker is reachable (cancelled only once the outbox is empty
or the time is up, so a result is not sent twice in the normal case); then the task group is
cancelled and leaving the session
publishes the retained ``offline`` status. Whatever could not be delivered stays in the
outbox and goes out after the next start: nothing judged is lost.

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
from typing import Any, Final, Protocol, TypeVar

from clampd.daemon.runtime._alarms import AlarmEvaluator
from clampd.daemon.runtime._backoff import next_delay
from clampd.daemon.runtime._ble import BleakWrenchLink, LinkRefusedError
from clampd.daemon.runtime._commands import CommandHandler
from clampd.daemon.runtime._config import StationConfig, WrenchConfig, sensor_profile
from clampd.daemon.runtime._cues import CuePlayer, make_player
from clampd.daemon.runtime._flusher import ResultFlusher
from clampd.daemon.runtime._mqtt import BrokerUnavailable, MqttSession
from clampd.daemon.runtime._outbox import AsyncOutbox
from clampd.daemon.runtime._quality import QualityFeed
from clampd.daemon.runtime._results import OutboxResultSink, ResultSink
from clampd.daemon.runtime._station import StateChange, StationState
from clampd.daemon.runtime._systemd import SystemdNotifier
from clampd.daemon.runtime._wrench import (
    LiveEventPayload,
    StatusSink,
    WorkOrder,
    WrenchWorker,
    engine_settings,
)
from clampd.daemon.view import ViewService
from clampd.protocol import SAMPLES_UUID, Judgement, StationStatus, Topics, WrenchStatus

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
# How often the shutdown path looks whether the rundowns in progress ended, and how often the
# watcher tells the station state that a rundown started: the worker's own idle tick is
# 0.1 s, so 50 ms adds no noticeable lag to "busy" (our choice).
_POLL_S: Final = 0.05
_WATCH_S: Final = 0.05
# How often the status task looks for a new connection when nothing else wakes it: a wrench
# status republished within a second of a broker restart is soon enough for a dashboard.
_RECHECK_S: Final = 1.0

_E = TypeVar("_E", bound=BaseException)

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


class _LivePort(Protocol):
    """The worker's live-event port as this module hands it over."""

    def publish_live(self, event: LiveEventPayload) -> None: ...


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
                status = self._latest[wrench_id]
                try:
                    await self._session.publish_model(status)
                except BrokerUnavailable:
                    break  # offline again; the next generation republishes everything
                if self._latest[wrench_id] is status:
                    # Only when no newer status came in while this one was being sent.
                    self._dirty.discard(wrench_id)
            if not self._dirty:
                self._wake.clear()
                # Also look again now and then: a reconnect brings no status offer of its own.
                with contextlib.suppress(TimeoutError):
                    async with asyncio.timeout(_RECHECK_S):
                        await self._wake.wait()
            else:
                await asyncio.sleep(_POLL_S)


class _StationPort:
    """The worker's view of the station state (``StationPort``), and the way back.

    ``StationState`` speaks in jobs and joint slots; a worker asks for a ``WorkOrder``. Once a
    result is stored the worker calls ``position_done``: the rundown is over for the state
    (so a new selection is no longer refused as busy) and the job's next position is marked.
    Rundown starts are noticed by the supervisor's watcher (``Station._watch``), because the
    worker reports none.
    """

    def __init__(self, state: StationState) -> None:
        self._state = state

    def work_order(self, wrench_id: str) -> WorkOrder | None:
        job = self._state.job_for(wrench_id)
        position = None if job is None else job.next_position
        if job is None or position is None:
            return None
        return WorkOrder(program=job.program, part_id=job.part_id, joint_position=position)

    def is_locked(self, wrench_id: str) -> bool:
        return self._state.is_locked(wrench_id)

    def position_done(self, wrench_id: str, joint_position: str, status: Judgement) -> None:
        state = self._state
        if state.in_rundown(wrench_id):
            state.rundown_ended(wrench_id)
        job = state.job_for(wrench_id)
        if job is not None and job.next_position == joint_position:
            state.record_result(wrench_id, ok=status is Judgement.OK)


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
        self.state = StationState(config.station.id, {}, {})
        self.view: ViewService | None = None
        """The station view (a local web page), None when ``[view] enabled = false``."""
        if config.view.enabled:
            self.view = ViewService(
                config.station.id,
                name=config.station.name,
                bind=config.view.bind,
                port=config.view.port,
            )
        self.flusher: ResultFlusher | None = None
        self.quality: QualityFeed | None = None
        self.commands: CommandHandler | None = None
        self._status_changed = asyncio.Event()

    # -- the whole daemon ----------------------------------------------------------------

    async def run(self, stop: asyncio.Event) -> None:
        """Run until ``stop`` is set, then shut down as the module docstring describes."""
        cfg = self.config
        warnings: list[str] = []
        player = self._cue_player
        if player is None:
            # Off the loop: it renders the sounds and may open a sound device.
            made, warnings = await asyncio.to_thread(
                make_player, cfg.cues.output, wav_dir=cfg.cues.wav_dir, volume=cfg.cues.volume
            )
            player = made
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
            assert self.quality is not None
            replayed = await self.quality.replay(outbox)
            _log.info("quality: %d journal result(s) replayed into the charts", replayed)
            try:
                async with asyncio.TaskGroup() as tg:
                    for slot in self.slots.values():
                        tg.create_task(
                            self._serve_wrench(slot), name=f"clampd[{slot.config.id}].link"
                        )
                    self._start_tasks(tg, board)
                    tg.create_task(self._watchdog(), name="clampd.watchdog")
                    tg.create_task(self._prune(outbox), name="clampd.outbox")
                    tg.create_task(self.quality.run(session), name="clampd.quality")
                    tg.create_task(self.quality.watch(outbox, cfg.wrench), name="clampd.alarms")
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
                    await self._drain()
                    raise _Stopped
            except* _Stopped:
                pass
            self.unsent_at_stop = await outbox.count_unsent()
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
        self.quality = QualityFeed(
            OutboxResultSink(outbox, self.topics),
            alarms=AlarmEvaluator(cfg.station.id, cfg.alarms),
        )
        sink: ResultSink = self.quality
        ports: StatusSink = board
        live: _LivePort = board
        if self.view is not None:
            # The view sees what the MQTT side sees, after it: stored results, wrench
            # status and live events (its adapters never block the worker).
            sink = self.view.results(sink)
            tee = self.view.board(board)
            ports, live = tee, tee
        ports = self.quality.status_port(ports)  # link and battery alarms read every status
        allowed = [w.address for w in cfg.wrench]
        self._build_state()
        if self.view is not None:
            self.view.watch_state(self.state)
        for wcfg in cfg.wrench:
            kwargs = self._bleak_kwargs(wcfg) if self._bleak_kwargs is not None else None
            # A declarative profile names its own samples characteristic and has no info
            # record or control characteristic (validated when the config was loaded).
            profile = sensor_profile(wcfg.profile)
            link = BleakWrenchLink(
                wcfg.address,
                wrench_id=wcfg.id,
                allowed=allowed,
                bleak_kwargs=kwargs,
                samples_uuid=SAMPLES_UUID if profile is None else profile.samples_uuid,
                v1_control=profile is None,
            )
            worker = WrenchWorker(
                wcfg,
                station_id=cfg.station.id,
                link=link,
                station=self._station_port(),
                results=sink,
                live=live,
                status=ports,
                cues=player,
                settings=engine_settings(
                    wcfg,
                    reaction_time_s=cfg.cues.reaction_time_s,
                    cue_latency_s=cfg.cues.latency_s,
                ),
                rng=random.Random(self._rng.random()),
            )
            self.slots[wcfg.id] = _WorkerSlot(wcfg, worker)

    # -- station state, commands, flushing -------------------------------------------------

    def _build_state(self) -> None:
        cfg = self.config
        self.state = StationState.from_tables(
            cfg.station.id, cfg.program, {w.id: w.torque_max_nm for w in cfg.wrench}
        )
        self.state.subscribe(self._on_change)

    def _station_port(self) -> _StationPort:
        return _StationPort(self.state)

    def _station_status(self, at: dt.datetime) -> StationStatus:
        return self.state.status(at, software_version=self.software_version)

    def _on_change(self, change: StateChange) -> None:
        """State listener: hand aborts to the worker, republish the wrench status on a lock
        or unlock and the station status on progress."""
        if change.kind == "abort" and change.wrench_id is not None:
            slot = self.slots.get(change.wrench_id)
            if slot is not None and self.state.take_abort(change.wrench_id) is not None:
                slot.worker.request_abort()
        elif change.kind in ("lock", "unlock"):
            # The lock is part of each wrench's retained status; a station-wide change
            # (wrench_id None) touches every wrench.
            for slot in self.slots.values():
                if change.wrench_id in (None, slot.config.id):
                    slot.worker.refresh_status()
        elif change.kind == "joint":
            # Commands republish the status themselves; a finished joint does not.
            self._status_changed.set()

    def _start_tasks(self, tg: asyncio.TaskGroup, board: _StatusBoard) -> None:
        assert self.session is not None
        assert self.outbox is not None
        self.flusher = ResultFlusher(
            self.outbox, self.session, rng=random.Random(self._rng.random())
        )
        self.commands = CommandHandler(self.session, self.state, self.topics)
        tg.create_task(self.flusher.run(), name="clampd.flusher")
        tg.create_task(self.commands.run(), name="clampd.commands")
        tg.create_task(board.run(), name="clampd.status")
        tg.create_task(self._status_pump(self.session), name="clampd.station-status")
        for slot in self.slots.values():
            tg.create_task(self._watch(slot), name=f"clampd[{slot.config.id}].state")
        if self.view is not None:
            session = self.session
            tg.create_task(
                self.view.run(online=session.state.online.is_set, backlog=self.flusher.backlog),
                name="clampd.view",
            )

    async def _watch(self, slot: _WorkerSlot) -> None:
        """Tell the station state when a rundown starts (and ends, if no result came)."""
        wrench_id = slot.config.id
        while True:
            running = slot.worker.in_rundown
            if running and not self.state.in_rundown(wrench_id):
                self.state.rundown_started(wrench_id)
            elif not running and self.state.in_rundown(wrench_id):
                # Normally ended by position_done once the result is stored; this covers a
                # result the outbox refused (kept in memory by the worker).
                self.state.rundown_ended(wrench_id)
            await asyncio.sleep(_WATCH_S)

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
            except Exception as exc:  # the worker's task group wraps what escapes in a group
                refused = _first(exc, LinkRefusedError)
                if refused is not None:
                    slot.parked = str(refused)
                    _log.error(
                        "%s: %s; not served until the config is fixed", slot.config.id, refused
                    )
                    await asyncio.Event().wait()  # parked for good; the other wrenches go on
                slot.restarts += 1
                _log.exception(
                    "%s %s: worker failed (a bug); restarting it",
                    slot.config.id,
                    slot.config.address,
                )
                await asyncio.sleep(next_delay(attempt, self._rng))
                attempt += 1

    async def _wind_down(self) -> None:
        """Let rundowns in progress finish for the grace period, abort what is left, then
        give the judged results time to become durable (bounded by the flush timeout)."""
        with contextlib.suppress(TimeoutError):
            async with asyncio.timeout(self._finish_grace_s):
                await self._no_rundown()
        if any(s.worker.in_rundown for s in self.slots.values()):
            for slot in self.slots.values():
                if slot.worker.request_abort():
                    _log.warning("%s: rundown aborted at shutdown", slot.config.id)
            # The abort lands at the worker's next frame or idle tick (IDLE_S), judged NOK.
        with contextlib.suppress(TimeoutError):
            async with asyncio.timeout(self._finish_grace_s + self._flush_timeout_s):
                await self._no_rundown()
        for slot in self.slots.values():
            if slot.worker.unstored_results:
                _log.error(
                    "%s: %d judged result(s) not stored when the daemon stopped (refused by "
                    "the outbox, or still being stored); they are lost",
                    slot.config.id,
                    slot.worker.unstored_results,
                )

    async def _no_rundown(self) -> None:
        # Settled: no rundown in progress and every judged result durable. A finished
        # rundown is mapped and stored by the worker's results task a moment later, so
        # "not in a rundown" alone would race the store.
        # Polled: the worker has no "settled" event, and this runs during shutdown only.
        while not all(_settled(s.worker) for s in self.slots.values()):  # noqa: ASYNC110
            await asyncio.sleep(_POLL_S)

    async def _drain(self) -> None:
        """Let the flusher deliver what the outbox holds while the broker is reachable, for
        a bounded time, before the task group is cancelled: cancelling it between a PUBACK
        and ``mark_sent`` would send that result again after the next start."""
        flusher = self.flusher
        if flusher is None:
            return
        before = flusher.sent
        with contextlib.suppress(TimeoutError):
            async with asyncio.timeout(self._flush_timeout_s):
                while (backlog := await flusher.backlog()) > 0:
                    await flusher.wait_sent(flusher.sent + backlog)
        self.flushed_at_stop = flusher.sent - before

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


def _first(exc: BaseException, kind: type[_E]) -> _E | None:
    """``exc`` itself or the first exception of ``kind`` inside (nested) exception groups."""
    if isinstance(exc, kind):
        return exc
    if isinstance(exc, BaseExceptionGroup):
        for inner in exc.exceptions:
            found = _first(inner, kind)
            if found is not None:
                return found
    return None


def _settled(worker: WrenchWorker) -> bool:
    # Nothing in progress and the result of every rundown started so far durable. (The
    # worker's ``unstored_results`` leaves out the one being mapped in a thread, so the
    # counters say it: every started rundown ends in exactly one stored result.)
    stats = worker.stats
    return not worker.in_rundown and stats.results_stored >= stats.rundowns


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("clampd")
    except PackageNotFoundError:
        return "0+unknown"
