"""Deliver results from the durable outbox to the broker, in order, at least once.

Theory of operation
-------------------
One task (``ResultFlusher.run``) owns delivery. It waits for a connection, then for unsent
results (``AsyncOutbox.wait_pending`` returns at once while any exist, so a restart or a
reconnect resumes without a signal of its own), reads them oldest first, and for each:
publish at QoS 1, wait for the PUBACK, then ``mark_sent``. One result is in flight at a
time, so the broker receives results in outbox order; a pipeline would be faster
(NOTES-ble-mqtt.md: about twice the rate with 20 in flight) but a lost connection with
several in flight makes the order after the reconnect depend on which PUBACKs arrived.

Invariants
----------
- ``mark_sent`` only after the PUBACK, so a result is never marked that the broker did not
  take (a crash between the two re-sends it: QoS 1 duplicates are allowed, and the MES
  de-duplicates on the result id, MQTT.md).
- On ``BrokerUnavailable`` the current result stays unsent and the flusher goes back to
  waiting: the next round starts again at the first unsent result, so nothing is skipped and
  nothing overtakes it.
- Errors of the outbox itself (disk) are not handled here: they end the task and the
  supervisor decides; unsent rows stay on disk.
"""

from __future__ import annotations

import asyncio
import collections
import dataclasses
import logging
import math
import random
import time
from collections.abc import Callable
from typing import Literal, Protocol

from clampd.daemon.runtime._backoff import next_delay
from clampd.daemon.runtime._mqtt import BrokerUnavailable
from clampd.daemon.runtime._outbox import AsyncOutbox

__all__ = ["FlusherStats", "Publisher", "ResultFlusher"]

_log = logging.getLogger(__name__)

# Results read from the outbox per round: enough to keep the loop busy between SQLite reads,
# small enough that a round never holds many 60 kB payloads in memory (our own choice).
_BATCH = 50
# Latencies kept for percentiles: a shift of a busy station is a few thousand results
# (our own estimate); older ones fall off.
_LATENCY_WINDOW = 10_000


class Publisher(Protocol):
    """The narrow port the flusher needs from the MQTT session."""

    async def wait_online(self) -> int:
        """Wait for a connection; return its generation."""
        ...

    async def publish(
        self,
        topic: str,
        payload: bytes,
        *,
        qos: Literal[0, 1],
        retain: bool = False,
        correlation_data: bytes | None = None,
    ) -> None:
        """Publish; for QoS 1 return after the PUBACK, else raise ``BrokerUnavailable``."""
        ...


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class FlusherStats:
    """Counters and put → PUBACK latency percentiles (seconds, None before any result)."""

    sent: int
    failures: int
    latency_p50_s: float | None
    latency_p99_s: float | None
    latency_max_s: float | None


class ResultFlusher:
    """Publishes the outbox's unsent results in order; run ``run()`` as one task.

    ``clock`` must be the clock the outbox stamps ``created_at`` with (UNIX seconds), so the
    recorded latency is put → PUBACK; ``rng`` drives the pause after a failed publish.
    """

    def __init__(
        self,
        outbox: AsyncOutbox,
        publisher: Publisher,
        *,
        batch: int = _BATCH,
        clock: Callable[[], float] = time.time,
        rng: random.Random | None = None,
    ) -> None:
        if batch <= 0:
            raise ValueError(f"batch must be > 0, got {batch}")
        self._outbox = outbox
        self._publisher = publisher
        self._batch = batch
        self._clock = clock
        self._rng = rng or random.Random()
        self.sent = 0
        self.failures = 0
        self._latencies: collections.deque[float] = collections.deque(maxlen=_LATENCY_WINDOW)
        self._delivered = asyncio.Condition()

    async def backlog(self) -> int:
        """Unsent results in the outbox now."""
        return await self._outbox.count_unsent()

    def stats(self) -> FlusherStats:
        """Counters and latency percentiles (nearest-rank) over the recent window."""
        ordered = sorted(self._latencies)

        def rank(q: float) -> float | None:
            if not ordered:
                return None
            # nearest rank: the smallest value with at least q of the sample at or below it
            k = max(1, math.ceil(q * len(ordered)))
            return ordered[k - 1]

        return FlusherStats(
            sent=self.sent,
            failures=self.failures,
            latency_p50_s=rank(0.5),
            latency_p99_s=rank(0.99),
            latency_max_s=ordered[-1] if ordered else None,
        )

    def latencies(self) -> list[float]:
        """The recent put → PUBACK latencies in seconds, in delivery order."""
        return list(self._latencies)

    async def wait_sent(self, count: int) -> None:
        """Wait until at least ``count`` results were delivered by this flusher."""
        async with self._delivered:
            await self._delivered.wait_for(lambda: self.sent >= count)

    async def run(self) -> None:
        """Deliver forever; returns only by cancellation (or an outbox error)."""
        failures_in_row = 0
        while True:
            await self._publisher.wait_online()
            await self._outbox.wait_pending()
            entries = await self._outbox.pending(self._batch)
            for entry in entries:
                try:
                    await self._publisher.publish(entry.topic, entry.payload, qos=1)
                except BrokerUnavailable as exc:
                    self.failures += 1
                    _log.info("result %s not delivered yet (%s); will retry", entry.id, exc)
                    delay = next_delay(failures_in_row, self._rng)
                    failures_in_row += 1
                    await asyncio.sleep(delay)
                    break
                failures_in_row = 0
                acked = self._clock()
                await self._outbox.mark_sent(entry.id, sent_at=acked)
                self._latencies.append(max(0.0, acked - entry.created_at))
                async with self._delivered:
                    self.sent += 1
                    self._delivered.notify_all()
