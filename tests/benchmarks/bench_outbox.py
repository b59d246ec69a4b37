"""Outbox speed on this machine: durable puts/s, mark_sent/s, pending reads, async puts/s.

Run: ``.venv/bin/python -m pytest -p benchmark tests/benchmarks/bench_outbox.py --benchmark-only``.
Every put and mark_sent is one transaction with a full fsync of the WAL (synchronous=FULL),
so these figures are bounded by the storage's fsync latency, not by Python; on an SD card
expect far fewer per second than on a server SSD.
"""

from __future__ import annotations

import asyncio
import itertools
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from clampd.daemon.runtime import AsyncOutbox, Outbox

# A result without its curve is about 1 kB of JSON; with a curve downsampled to a few
# hundred points about 16 kB (estimate from the payload models).
SMALL = b"x" * 1_000
WITH_CURVE = b"x" * 16_000


@pytest.fixture
def outbox(tmp_path: Path) -> Iterator[Outbox]:
    with Outbox(tmp_path / "bench.db") as ob:
        yield ob


def _ids() -> Iterator[str]:
    return (str(uuid.UUID(int=n)) for n in itertools.count(1))


@pytest.mark.parametrize("payload", [SMALL, WITH_CURVE], ids=["1kB", "16kB"])
def test_put(benchmark: Any, outbox: Outbox, payload: bytes) -> None:
    ids = _ids()
    benchmark(lambda: outbox.put(next(ids), "bench/result", payload, status="OK"))
    assert outbox.stats().total >= 1


def test_put_existing_id_is_cheap(benchmark: Any, outbox: Outbox) -> None:
    rid = str(uuid.uuid4())
    outbox.put(rid, "bench/result", SMALL)
    assert benchmark(lambda: outbox.put(rid, "bench/result", SMALL)) is False


def test_mark_sent(benchmark: Any, outbox: Outbox) -> None:
    ids = [str(uuid.UUID(int=n)) for n in range(1, 20_001)]
    for rid in ids:
        outbox.put(rid, "bench/result", SMALL)
    it = iter(ids)
    benchmark.pedantic(lambda: outbox.mark_sent(next(it)), rounds=2_000, iterations=1)
    assert outbox.stats().unsent <= 18_000


def test_pending_100_of_a_10k_backlog(benchmark: Any, outbox: Outbox) -> None:
    for n in range(1, 10_001):
        outbox.put(str(uuid.UUID(int=n)), "bench/result", SMALL)
    assert len(benchmark(lambda: outbox.pending(100))) == 100


def test_async_put_round_trip(benchmark: Any, tmp_path: Path) -> None:
    """One awaited put through the worker thread, including the loop hop."""
    loop = asyncio.new_event_loop()
    ob = AsyncOutbox(tmp_path / "bench.db")
    loop.run_until_complete(ob.__aenter__())
    ids = _ids()
    try:
        benchmark(lambda: loop.run_until_complete(ob.put(next(ids), "bench/result", SMALL)))
    finally:
        loop.run_until_complete(ob.__aexit__(None, None, None))
        loop.close()
