"""Result delivery speed on loopback: outbox put → broker PUBACK, and one QoS 1 publish.

Run:
``.venv/bin/python -m pytest -p benchmark tests/benchmarks/bench_publish.py --benchmark-only -s``
(``-s`` shows the latency percentiles printed per run; they are also stored in each
benchmark's ``extra_info``). Needs mosquitto on PATH (Debian's package).

What is measured:
- ``test_put_to_ack``: one round = a result (the shipped ``RundownResult`` example of the
  demo scenario, 1.7 kB of JSON with its short curve) is put into the durable outbox, the
  ``ResultFlusher`` publishes it through the ``MqttSession`` at QoS 1, and the round ends
  when the flusher has marked it sent after the PUBACK. The latency the flusher records per
  result is ``created_at`` (put) → PUBACK; p50/p99 over all rounds are printed. Goal: p99 ≤
  50 ms on loopback.
- ``test_publish_qos1``: one ``session.publish`` at QoS 1 (publish → PUBACK) of the same
  payload, the session's own share of the above.

Both are bounded by SQLite's fsync (put and mark_sent each commit with synchronous=FULL), not
by MQTT: NOTES-ble-mqtt.md measured a QoS 1 round trip on loopback at p50 0.3–0.5 ms.
"""

from __future__ import annotations

import asyncio
import random
import statistics
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from clampd.daemon.runtime import AsyncOutbox, BrokerConfig, MqttSession, ResultFlusher
from clampd.protocol import RundownResult, Topics, new_uuid7
from clampd.simulators._broker import LocalBroker

EXAMPLE = Path(__file__).resolve().parents[2] / "protocol" / "examples" / "RundownResult.json"
PREFIX = "bench/brackenfield/deck-assembly/line-3/st-120"


class _Rig:
    """A loop, a mosquitto, an outbox, a session and a running flusher, kept across rounds."""

    def __init__(self, workdir: Path) -> None:
        self.loop = asyncio.new_event_loop()
        self.workdir = workdir
        self.topics = Topics(PREFIX)
        self.base = RundownResult.model_validate_json(EXAMPLE.read_bytes())
        self.payload = self.base.to_json_bytes()
        self.broker = LocalBroker(workdir=workdir / "broker", prefer="mosquitto")
        self.outbox = AsyncOutbox(workdir / "outbox.db")
        self.session: MqttSession
        self.flusher: ResultFlusher
        self.task: asyncio.Task[None]
        self.loop.run_until_complete(self._start())

    async def _start(self) -> None:
        (self.workdir / "broker").mkdir(exist_ok=True)
        await self.broker.start()
        await self.outbox.__aenter__()
        self.session = MqttSession(
            BrokerConfig(url=self.broker.url),
            self.topics,
            station_id="st-120",
            client_id="clampd-bench",
            rng=random.Random(1),
        )
        await self.session.__aenter__()
        await asyncio.wait_for(self.session.wait_online(), 10)
        self.flusher = ResultFlusher(self.outbox, self.session, rng=random.Random(2))
        self.task = asyncio.create_task(self.flusher.run(), name="bench.flusher")

    async def round(self) -> None:
        r = self.base.model_copy(update={"id": new_uuid7()})
        target = self.flusher.sent + 1
        await self.outbox.put(r.id, self.topics.result(), r.to_json_bytes())
        await self.flusher.wait_sent(target)

    async def publish(self) -> None:
        await self.session.publish(self.topics.result(), self.payload, qos=1)

    async def _stop(self) -> None:
        self.task.cancel()
        await asyncio.gather(self.task, return_exceptions=True)
        await self.session.__aexit__(None, None, None)
        await self.outbox.__aexit__(None, None, None)
        await self.broker.stop()

    def close(self) -> None:
        self.loop.run_until_complete(self._stop())
        self.loop.close()


@pytest.fixture
def rig(tmp_path: Path) -> Iterator[_Rig]:
    r = _Rig(tmp_path)
    try:
        yield r
    finally:
        r.close()


def _percentile(ordered: list[float], q: float) -> float:
    """Nearest-rank percentile of an ascending list."""
    k = max(1, -(-len(ordered) * q // 1))
    return ordered[int(k) - 1]


def test_put_to_ack(benchmark: Any, rig: _Rig) -> None:
    benchmark.pedantic(
        lambda: rig.loop.run_until_complete(rig.round()), rounds=500, warmup_rounds=20
    )
    lat = sorted(rig.flusher.latencies())
    assert len(lat) >= 500
    p50, p99 = _percentile(lat, 0.50), _percentile(lat, 0.99)
    benchmark.extra_info.update(
        {
            "latency_p50_ms": round(p50 * 1e3, 3),
            "latency_p99_ms": round(p99 * 1e3, 3),
            "latency_max_ms": round(lat[-1] * 1e3, 3),
            "latency_mean_ms": round(statistics.fmean(lat) * 1e3, 3),
            "results": len(lat),
            "payload_bytes": len(rig.payload),
        }
    )
    print(
        f"\nput → PUBACK over {len(lat)} results of {len(rig.payload)} B: "
        f"p50 {p50 * 1e3:.2f} ms, p99 {p99 * 1e3:.2f} ms, max {lat[-1] * 1e3:.2f} ms"
    )


def test_publish_qos1(benchmark: Any, rig: _Rig) -> None:
    benchmark.pedantic(
        lambda: rig.loop.run_until_complete(rig.publish()), rounds=2000, warmup_rounds=50
    )
    assert rig.session.state.stats.published >= 2000
