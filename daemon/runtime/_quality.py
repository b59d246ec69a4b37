"""What the running station tells people over MQTT: quality statistics and alarms.

Every result the station stores also feeds one ``QualityTracker`` (pure, in
``clampd.daemon.quality``): what it returns goes out as the retained ``QualityStats`` of its
program × wrench group and as ``trend_drift`` alarms. The tracker keeps its windows in memory,
so at start the most recent journal entries are replayed into it (without publishing) and the
charts pick up where they stood before a restart.

The station's condition alarms (``wrench_lost``, ``battery_low``, ``nok_streak``,
``outbox_backlog``, ``calibration_due_soon``, ``calibration_overdue``) come from one
``AlarmEvaluator`` (pure, ``_alarms.py``), which this module feeds with observations, each
stamped with the UTC time it was made:

- every stored result (``nok_streak``), also replayed from the journal at start: a streak
  still open then is raised again under the id it had;
- every wrench status the workers offer, through ``status_port`` (link up or down,
  battery level);
- from the ``watch`` task: a tick at least every second and at a lost link's deadline
  (``wrench_lost``), the outbox's unsent count and oldest age every ``_OUTBOX_POLL_S``, and
  each wrench's calibration due date against today at start and then hourly.

Publishing is best effort and never holds up a wrench: outputs wait in memory while the
broker is away — the latest statistics per group (retained, so only the latest matters) and
a bounded queue of alarms — and go out once the session is online again. The results
themselves travel through the durable outbox; statistics can always be recomputed from it
(``clampd stats``). Alarm state lives in memory: after a restart the station raises again
what it can read back (a NOK streak from the journal, calibration from the config, a
backlog from the outbox, a lost wrench once it was seen and lost again).
"""

from __future__ import annotations

import asyncio
import collections
import datetime as dt
import logging
import time
from collections.abc import Callable, Sequence
from typing import Final, Protocol

from pydantic import ValidationError

from clampd.daemon.quality import QualityInputError, QualityTracker
from clampd.daemon.runtime._alarms import (
    AlarmEvaluator,
    AlarmInputError,
    BatteryReading,
    CalibrationCheck,
    LinkSeen,
    Observation,
    OutboxLevel,
    ResultStored,
    Tick,
)
from clampd.daemon.runtime._config import WrenchConfig
from clampd.daemon.runtime._mqtt import BrokerUnavailable, MqttSession
from clampd.daemon.runtime._outbox import AsyncOutbox, OutboxError
from clampd.daemon.runtime._results import ResultSink
from clampd.protocol import Alarm, AlarmState, QualityStats, RundownResult, WrenchStatus

__all__ = ["QualityFeed", "StatusPort"]

_log = logging.getLogger(__name__)

# Results replayed at start: the tracker's window (50) plus its chart baseline and history
# (20 subgroups of 5 and 60 points) per group, for a station with a handful of groups.
_REPLAY_LIMIT = 2000
# Alarms kept while the broker is away; beyond this the oldest are dropped (and logged):
# an alarm is an event for people, the journal keeps the results it was raised on.
_ALARM_BACKLOG = 500
# The watch task looks at the clock at least this often: a lost wrench is raised within a
# second of its deadline, and an idle station costs one wake-up a second (our choice).
_TICK_S: Final = 1.0
# The outbox is counted this often: two indexed queries in a thread, cheap; the backlog
# alarm's age threshold is minutes, so ten seconds is prompt enough (our choice).
_OUTBOX_POLL_S: Final = 10.0
# Calibration is looked at hourly, so a new day is noticed within the hour (our choice;
# the due-date rules work in whole days).
_CALIBRATION_EVERY_S: Final = 3600.0


def _utc_now() -> dt.datetime:
    return dt.datetime.now(dt.UTC)


class StatusPort(Protocol):
    """Where wrench status goes (the worker's ``StatusSink``): never blocks."""

    def offer_status(self, status: WrenchStatus) -> None:
        """Hand over the wrench's current status."""
        ...


class _StatusTee:
    """A ``StatusPort`` that passes every status on, then reads link and battery from it."""

    def __init__(self, inner: StatusPort, feed: QualityFeed) -> None:
        self._inner = inner
        self._feed = feed

    def offer_status(self, status: WrenchStatus) -> None:
        self._inner.offer_status(status)
        self._feed.observe(
            LinkSeen(wrench_id=status.wrench_id, connected=status.connected, at=status.at)
        )
        if status.battery_pct is not None:
            self._feed.observe(
                BatteryReading(wrench_id=status.wrench_id, pct=status.battery_pct, at=status.at)
            )


class QualityFeed:
    """A ``ResultSink`` in front of another: stores first, then feeds the tracker and the
    alarm evaluator; publishes what they produce (``run``)."""

    def __init__(
        self,
        inner: ResultSink,
        tracker: QualityTracker | None = None,
        alarms: AlarmEvaluator | None = None,
        *,
        clock: Callable[[], dt.datetime] = _utc_now,
    ) -> None:
        self._inner = inner
        self.tracker = tracker or QualityTracker()
        self.alarms = alarms
        """The condition alarms' evaluator; None: only trend alarms are raised."""
        self._clock = clock
        self._stats: dict[tuple[str, str], QualityStats] = {}
        self._alarms: collections.deque[Alarm] = collections.deque(maxlen=_ALARM_BACKLOG)
        self._wake = asyncio.Event()

    async def put_result(self, payload: RundownResult) -> bool:
        new = await self._inner.put_result(payload)
        if new:
            self._take(self.tracker.add(payload))
            self.observe(ResultStored(result=payload))
        return new

    async def replay(self, outbox: AsyncOutbox) -> int:
        """Feed the newest journal entries to the tracker and the evaluator, oldest first;
        publish nothing but the alarms still open after them (raised again, same ids)."""
        entries = await outbox.list(limit=_REPLAY_LIMIT, newest_first=True)
        fed = 0
        for entry in reversed(entries):
            try:
                result = RundownResult.model_validate_json(entry.payload, strict=False)
                self.tracker.add(result)
            except (ValidationError, ValueError, QualityInputError) as exc:
                _log.warning("quality: journal entry %s not replayed: %s", entry.id, exc)
                continue
            if self.alarms is not None:
                self.alarms.feed(ResultStored(result=result))
            fed += 1
        if self.alarms is not None:
            self._take(self.alarms.active())
        return fed

    def observe(self, observation: Observation) -> None:
        """Feed one observation to the evaluator and queue what it raises or clears.

        Never raises: an observation the evaluator refuses is logged and dropped (it came
        from our own code, and no wrench may stop over an alarm)."""
        if self.alarms is None:
            return
        try:
            self._take(self.alarms.feed(observation))
        except AlarmInputError as exc:
            _log.error("alarms: observation refused (a bug): %s", exc)

    def status_port(self, inner: StatusPort) -> StatusPort:
        """``inner`` with every wrench status also read for link and battery alarms."""
        return _StatusTee(inner, self)

    def _take(self, outputs: Sequence[QualityStats | Alarm]) -> None:
        for out in outputs:
            if isinstance(out, QualityStats):
                self._stats[(out.program_id, out.wrench_id)] = out
            else:
                if len(self._alarms) == self._alarms.maxlen:
                    _log.warning("quality: alarm backlog full, dropping %s", self._alarms[0].id)
                self._alarms.append(out)
                _log.log(
                    logging.WARNING if out.state is AlarmState.RAISED else logging.INFO,
                    "alarm %s %s%s: %s",
                    out.code.value,
                    out.state.value,
                    "" if out.wrench_id is None else f" ({out.wrench_id})",
                    out.text,
                )
        if outputs:
            self._wake.set()

    async def watch(
        self,
        outbox: AsyncOutbox,
        wrenches: Sequence[WrenchConfig],
        *,
        outbox_poll_s: float = _OUTBOX_POLL_S,
    ) -> None:
        """Observe time, the outbox and calibration for the evaluator, forever (a task).

        Returns at once when there is no evaluator. An outbox that cannot be read is logged
        and asked again at the next poll (every ``outbox_poll_s``).
        """
        alarms = self.alarms
        if alarms is None:
            return
        loop = asyncio.get_running_loop()
        next_outbox = next_calibration = loop.time()
        while True:
            if loop.time() >= next_calibration:
                now = self._clock()
                for w in wrenches:
                    self.observe(
                        CalibrationCheck(
                            wrench_id=w.id,
                            due=w.calibration_due,
                            today=now.date(),
                            at=now,
                            blocked=w.block_when_calibration_overdue,
                        )
                    )
                next_calibration = loop.time() + _CALIBRATION_EVERY_S
            if loop.time() >= next_outbox:
                await self._poll_outbox(outbox)
                next_outbox = loop.time() + outbox_poll_s
            now = self._clock()
            self.observe(Tick(at=now))
            delay = min(_TICK_S, next_outbox - loop.time())
            deadline = alarms.next_deadline()
            if deadline is not None:
                delay = min(delay, (deadline - self._clock()).total_seconds())
            await asyncio.sleep(max(delay, 0.0))

    async def _poll_outbox(self, outbox: AsyncOutbox) -> None:
        try:
            unsent = await outbox.count_unsent()
            oldest = await outbox.list(limit=1, newest_first=False, unsent_only=True)
        except OutboxError as exc:
            _log.warning("alarms: outbox not readable for the backlog check: %s", exc)
            return
        # created_at is the host's UNIX time at storing (the outbox's own clock).
        age = max(time.time() - oldest[0].created_at, 0.0) if oldest else None
        self.observe(OutboxLevel(unsent=unsent, oldest_age_s=age, at=self._clock()))

    async def run(self, session: MqttSession) -> None:
        """Publish what the tracker produced, in order; wait for the broker when it is away."""
        while True:
            await self._wake.wait()
            self._wake.clear()
            while self._stats or self._alarms:
                if self._stats:
                    key = next(iter(self._stats))
                    item: QualityStats | Alarm = self._stats[key]
                else:
                    item = self._alarms[0]
                try:
                    await session.publish_model(item)
                except BrokerUnavailable:
                    await session.wait_online()
                    continue
                if isinstance(item, QualityStats):
                    # a newer figure for the same group may have arrived meanwhile: keep it
                    if self._stats.get(key) is item:
                        del self._stats[key]
                else:
                    self._alarms.popleft()
