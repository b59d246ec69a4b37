"""Quality statistics and trend alarms of the running station, published over MQTT.

Every result the station stores also feeds one ``QualityTracker`` (pure, in
``clampd.daemon.quality``): what it returns goes out as the retained ``QualityStats`` of its
program × wrench group and as ``Alarm`` events. The tracker keeps its windows in memory, so
at start the most recent journal entries are replayed into it (without publishing) and the
charts pick up where they stood before a restart.

Publishing is best effort and never holds up a wrench: outputs wait in memory while the
broker is away — the latest statistics per group (retained, so only the latest matters) and
a bounded queue of alarms — and go out once the session is online again. The results
themselves travel through the durable outbox; statistics can always be recomputed from it
(``clampd stats``).
"""

from __future__ import annotations

import asyncio
import collections
import logging

from clampd.daemon.quality import QualityInputError, QualityTracker
from clampd.daemon.runtime._mqtt import BrokerUnavailable, MqttSession
from clampd.daemon.runtime._outbox import AsyncOutbox
from clampd.daemon.runtime._results import ResultSink
from clampd.protocol import Alarm, QualityStats, RundownResult

__all__ = ["QualityFeed"]

_log = logging.getLogger(__name__)

# Results replayed at start: the tracker's window (50) plus its chart baseline and history
# (20 subgroups of 5 and 60 points) per group, for a station with a handful of groups.
_REPLAY_LIMIT = 2000
# Alarms kept while the broker is away; beyond this the oldest are dropped (and logged):
# an alarm is an event for people, the journal keeps the results it was raised on.
_ALARM_BACKLOG = 500


class QualityFeed:
    """A ``ResultSink`` in front of another: stores first, then feeds the tracker."""

    def __init__(self, inner: ResultSink, tracker: QualityTracker | None = None) -> None:
        self._inner = inner
        self.tracker = tracker or QualityTracker()
        self._stats: dict[tuple[str, str], QualityStats] = {}
        self._alarms: collections.deque[Alarm] = collections.deque(maxlen=_ALARM_BACKLOG)
        self._wake = asyncio.Event()

    async def put_result(self, payload: RundownResult) -> bool:
        new = await self._inner.put_result(payload)
        if new:
            self._take(self.tracker.add(payload))
        return new

    async def replay(self, outbox: AsyncOutbox) -> int:
        """Feed the newest journal entries to the tracker, oldest first; publish nothing."""
        entries = await outbox.list(limit=_REPLAY_LIMIT, newest_first=True)
        fed = 0
        for entry in reversed(entries):
            try:
                self.tracker.add(entry.payload)
            except QualityInputError as exc:
                _log.warning("quality: journal entry %s not replayed: %s", entry.id, exc)
                continue
            fed += 1
        return fed

    def _take(self, outputs: list[QualityStats | Alarm]) -> None:
        for out in outputs:
            if isinstance(out, QualityStats):
                self._stats[(out.program_id, out.wrench_id)] = out
            else:
                if len(self._alarms) == self._alarms.maxlen:
                    _log.warning("quality: alarm backlog full, dropping %s", self._alarms[0].id)
                self._alarms.append(out)
        if outputs:
            self._wake.set()

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
