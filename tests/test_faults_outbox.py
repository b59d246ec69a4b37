"""Outbox faults: a really full disk, and a wall clock that steps backwards and forwards.

Disk full: the outbox lives on a tmpfs of a few hundred kB mounted for the test (root only;
skipped elsewhere), filled to the last byte with a filler file, so SQLite meets a real
ENOSPC — not a simulated limit. The outbox must refuse the new result with its typed error,
keep every stored one, keep the file sound, and work again once space is freed; the results
then reach the broker.

Clock steps: the outbox's order is its append sequence, never a time stamp, so results put
while the clock jumps keep their order, retention never deletes an unsent result whatever
the clock says, and delivery latencies are never negative.

External references used below:
- SQLite result codes: SQLITE_FULL (13) "insertion failed because database is full"; SQLite,
  "PRAGMA integrity_check" (the single row ``ok`` for a sound file); "Write-Ahead Logging"
  (a transaction is rolled back as a whole when a write fails).
- POSIX ``write()``: ENOSPC when the file system has no room; tmpfs(5) ``size=``.
- MQTT Version 5.0 §4.3.2 (QoS 1: at least once).

Demo scenario: Brackenfield Garden Machines, mower deck assembly, station 120 (invented).
"""

from __future__ import annotations

import asyncio
import contextlib
import errno
import os
import random
import shutil
import subprocess
from collections.abc import Iterator
from pathlib import Path

import aiomqtt
import pytest

from clampd.daemon.runtime import (
    AsyncOutbox,
    BrokerConfig,
    MqttSession,
    Outbox,
    OutboxDiskFullError,
    OutboxFullError,
    ResultFlusher,
)
from clampd.protocol import RundownResult, Topics, new_uuid7
from clampd.simulators._broker import LocalBroker

EXAMPLE = Path(__file__).resolve().parents[1] / "protocol" / "examples" / "RundownResult.json"
STATION = "st-120"
# 512 kB: room for the SQLite file, its WAL and a few dozen results of ~3 kB each, small
# enough to fill in a moment (our own choice).
TMPFS_SIZE = "512k"
DAY_S = 86_400.0


def _payload(n: int) -> tuple[str, bytes]:
    base = RundownResult.model_validate_json(EXAMPLE.read_bytes())
    r = base.model_copy(update={"id": new_uuid7(), "part_id": f"DK-{n:05d}"})
    return r.id, r.to_json_bytes()


@pytest.fixture
def small_disk(tmp_path: Path) -> Iterator[Path]:
    """A tmpfs of ``TMPFS_SIZE`` mounted for this test only."""
    if os.geteuid() != 0 or shutil.which("mount") is None:
        pytest.skip("mounting a small tmpfs needs root")
    where = tmp_path / "small"
    where.mkdir()
    proc = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", f"size={TMPFS_SIZE},mode=0700", "tmpfs", str(where)],
        capture_output=True,
        text=True,
        timeout=30,
        check=False,
    )
    if proc.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {proc.stderr.strip()}")
    try:
        yield where
    finally:
        subprocess.run(["umount", "-l", str(where)], timeout=30, check=False)


def _fill(folder: Path) -> Path:
    """Write a filler file until the file system says ENOSPC; return it."""
    filler = folder / "filler"
    fd = os.open(filler, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        for size in (65536, 4096, 1):  # big blocks, then the last partial ones
            while True:
                try:
                    os.write(fd, b"\0" * size)
                except OSError as exc:
                    if exc.errno != errno.ENOSPC:
                        raise
                    break
        os.fsync(fd)
    finally:
        os.close(fd)
    return filler


def test_a_full_disk_refuses_the_new_result_and_keeps_every_stored_one(
    small_disk: Path,
) -> None:
    path = small_disk / "outbox.sqlite3"
    stored: list[str] = []
    with Outbox(path) as ob:
        for n in range(10):
            rid, body = _payload(n)
            assert ob.put(rid, "deck/result", body)
            stored.append(rid)
        filler = _fill(small_disk)
        refused: tuple[str, bytes] | None = None
        error: OutboxDiskFullError | None = None
        # The WAL may still have room for a few commits; keep going until SQLite meets
        # the full file system (bounded: the disk holds far fewer than 500 results).
        for n in range(10, 500):
            rid, body = _payload(n)
            try:
                ob.put(rid, "deck/result", body)
            except OutboxDiskFullError as exc:
                refused, error = (rid, body), exc
                break
            stored.append(rid)
        assert refused is not None, "the disk never filled"
        assert error is not None
        assert "disk full" in str(error)
        assert "nothing stored was lost" in str(error)
        assert error.unsent == len(stored)
        assert isinstance(error, OutboxFullError)  # callers may handle both alike
        # The refused result is not half-stored; everything before it is intact.
        assert ob.get(refused[0]) is None
        assert [e.id for e in ob.pending(1000)] == stored
        assert ob.integrity_ok()
        # Marking sent on a full disk fails just as cleanly: the row stays unsent, so it is
        # sent again later (a QoS 1 duplicate, never a loss).
        with contextlib.suppress(OutboxDiskFullError):
            ob.mark_sent(stored[0])
        assert ob.integrity_ok()
        # Space comes back: the same result is accepted and nothing was lost meanwhile.
        filler.unlink()
        assert ob.put(refused[0], "deck/result", refused[1])
        stored.append(refused[0])
        assert [e.id for e in ob.pending(1000) if e.id != stored[0]] == stored[1:]
    # Reopened from disk (a restart after the incident): all there, file sound.
    with Outbox(path) as ob:
        assert {e.id for e in ob.iter_all()} == set(stored)
        assert ob.integrity_ok()


async def test_after_a_full_disk_every_result_reaches_the_broker(
    small_disk: Path, broker: LocalBroker, topic_prefix: str
) -> None:
    topics = Topics(topic_prefix)
    ids: list[str] = []
    async with AsyncOutbox(small_disk / "outbox.sqlite3") as outbox:
        for n in range(5):
            rid, body = _payload(n)
            await outbox.put(rid, topics.result(), body)
            ids.append(rid)
        filler = await asyncio.to_thread(_fill, small_disk)
        refusals = 0
        for n in range(5, 500):
            rid, body = _payload(n)
            try:
                await outbox.put(rid, topics.result(), body)
            except OutboxDiskFullError:
                refusals += 1
                break
            ids.append(rid)
        assert refusals == 1
        await asyncio.to_thread(filler.unlink)
        # The station (the wrench worker holds refused results in memory) stores it now.
        await outbox.put(rid, topics.result(), body)
        ids.append(rid)
        session = MqttSession(
            BrokerConfig(url=broker.url),
            topics,
            station_id=STATION,
            client_id=f"clampd-{topic_prefix.replace('/', '-')}",
            rng=random.Random(41),
        )
        received: list[str] = []
        async with (
            aiomqtt.Client(broker.host, broker.port) as mes,
            session,
            asyncio.TaskGroup() as tg,
        ):
            await mes.subscribe(topics.result(), qos=1)
            flusher = ResultFlusher(outbox, session, rng=random.Random(42))
            runner = tg.create_task(flusher.run(), name="test.flusher")
            async with asyncio.timeout(60):
                async for msg in mes.messages:
                    assert isinstance(msg.payload, bytes)
                    received.append(RundownResult.model_validate_json(msg.payload).id)
                    if set(ids) <= set(received):
                        break
                await flusher.wait_sent(len(ids))
            runner.cancel()
        assert list(dict.fromkeys(received)) == ids
        assert await outbox.count_unsent() == 0
        assert await outbox.integrity_ok()


# -- wall clock steps ----------------------------------------------------------------------


class SteppingClock:
    """A UNIX clock that a test moves by hand (NTP corrections, an RTC-less board booting
    at 1970, a technician setting the date)."""

    def __init__(self, start: float) -> None:
        self.now = start

    def __call__(self) -> float:
        return self.now

    def step(self, seconds: float) -> None:
        self.now += seconds


STEPS = [0.0, -3600.0, 7 * DAY_S, -400 * DAY_S, 2.5, -1.0, 3650 * DAY_S, -3650 * DAY_S]


def test_order_is_append_order_whatever_the_clock_does(tmp_path: Path) -> None:
    clock = SteppingClock(1_780_000_000.0)
    ids: list[str] = []
    with Outbox(tmp_path / "outbox.sqlite3", clock=clock) as ob:
        for n, step in enumerate(STEPS * 3):
            clock.step(step)
            rid, body = _payload(n)
            ob.put(rid, "deck/result", body)
            ids.append(rid)
        pending = ob.pending(1000)
        assert [e.id for e in pending] == ids
        # The stamps follow the clock (so they are not monotonic), the order does not.
        stamps = [e.created_at for e in pending]
        assert stamps != sorted(stamps)
        assert [e.seq for e in pending] == sorted(e.seq for e in pending)


def test_retention_never_deletes_unsent_results_whatever_the_clock_says(tmp_path: Path) -> None:
    clock = SteppingClock(1_780_000_000.0)
    with Outbox(tmp_path / "outbox.sqlite3", clock=clock, retention_days=90) as ob:
        sent: list[str] = []
        unsent: list[str] = []
        for n in range(20):
            rid, body = _payload(n)
            ob.put(rid, "deck/result", body)
            (sent if n % 2 else unsent).append(rid)
        for rid in sent:
            ob.mark_sent(rid)
        # Backwards first: nothing is old enough to go, sent or not.
        clock.step(-3650 * DAY_S)
        assert ob.prune() == 0
        # Then ten years ahead (a board whose RTC battery died and NTP overshot): the sent
        # ones are past retention and may go; the unsent must all stay.
        clock.step(2 * 3650 * DAY_S)
        ob.prune()
        assert [e.id for e in ob.pending(1000)] == unsent
        assert ob.count_unsent() == len(unsent)
        assert ob.integrity_ok()


async def test_delivery_keeps_order_and_latencies_stay_non_negative_across_clock_steps(
    broker: LocalBroker, topic_prefix: str, tmp_path: Path
) -> None:
    clock = SteppingClock(1_780_000_000.0)
    topics = Topics(topic_prefix)
    session = MqttSession(
        BrokerConfig(url=broker.url),
        topics,
        station_id=STATION,
        client_id=f"clampd-{topic_prefix.replace('/', '-')}",
        rng=random.Random(51),
    )
    ids: list[str] = []
    async with AsyncOutbox(tmp_path / "outbox.sqlite3", clock=clock) as outbox:
        for n, step in enumerate(STEPS * 2):
            clock.step(step)
            rid, body = _payload(n)
            await outbox.put(rid, topics.result(), body)
            ids.append(rid)
        clock.step(-2 * DAY_S)  # the flusher's acks are stamped "before" every put
        received: list[str] = []
        flusher = ResultFlusher(outbox, session, clock=clock, rng=random.Random(52))
        async with (
            aiomqtt.Client(broker.host, broker.port) as mes,
            session,
            asyncio.TaskGroup() as tg,
        ):
            await mes.subscribe(topics.result(), qos=1)
            runner = tg.create_task(flusher.run(), name="test.flusher")
            async with asyncio.timeout(60):
                async for msg in mes.messages:
                    assert isinstance(msg.payload, bytes)
                    received.append(RundownResult.model_validate_json(msg.payload).id)
                    if len(set(received)) == len(ids):
                        break
                await flusher.wait_sent(len(ids))
            runner.cancel()
        assert list(dict.fromkeys(received)) == ids
        assert all(lat >= 0.0 for lat in flusher.latencies())
        assert len(flusher.latencies()) == len(ids)
        assert await outbox.count_unsent() == 0
