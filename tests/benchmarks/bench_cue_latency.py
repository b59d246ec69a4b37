"""Sample arrival → stop-cue call latency, and resident memory, with wrenches streaming at 1 kHz.

What is measured: for every cue the engine fires, the time from the host stamp of the
notification that carried the deciding sample (``time.monotonic()`` in bleak's callback) to the
call of the station's ``CuePlayer.play`` (``WrenchWorker.cue_latency``). That span holds the
notification queue, decoding, the sequence check, the engine's frame and the event handling:
everything clampd adds before a sound can start. The goal on this machine is p99 ≤ 5 ms.
Resident memory (``VmRSS``/``VmHWM`` from ``/proc/self/status``) is read while two wrenches
stream at 1 kHz and a simulated operator tightens joint after joint on each.

The whole chain is real (virtual wrench GATT server, unmodified bleak on the bumble backend,
engine, SQLite outbox); only the radio is virtual and delivers at once, so a real radio's
connection interval (7.5 ms and up) comes on top of these figures.

Run:
``.venv/bin/python -m pytest -p benchmark tests/benchmarks/bench_cue_latency.py
--benchmark-only -s``
or, for a longer run, ``.venv/bin/python tests/benchmarks/bench_cue_latency.py --seconds 120
[--cross-process] [--switch-interval 0.0005]``. ``--cross-process`` runs the two wrenches in
processes of their own (``clampd simulate wrench`` over a TCP HCI hub), so this process holds
only what a station daemon holds; in-process, the wrenches' simulation shares the event loop
and inflates the figures. The result mapping runs in a thread; CPython hands the GIL back to
the loop only every switch interval (5 ms by default), which shows in the tail.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import dataclasses
import itertools
import os
import random
import sys
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from clampd.daemon.engine import program_from_mapping
from clampd.daemon.runtime import (
    AsyncOutbox,
    BleakWrenchLink,
    CueSound,
    LatencyLog,
    OutboxResultSink,
    WorkOrder,
    WrenchConfig,
    WrenchWorker,
)
from clampd.daemon.runtime._wrench import LiveEventPayload
from clampd.protocol import Judgement, Topics, WrenchStatus
from clampd.simulators import (
    Bench,
    JointModel,
    JointPopulation,
    OperatorParams,
    SensorParams,
    VirtualWrenchSensor,
)
from clampd.simulators.ble import VirtualAir

# Demo values of our own scenario (testing software only; real programs come from the joint
# designer's specification).
PROGRAM = program_from_mapping(
    {
        "id": "bench-m10-torque",
        "strategy": "torque",
        "snug_torque": "8 N*m",
        "target_torque": "35 N*m",
        "torque_window": ["31 N*m", "41 N*m"],
    }
)


class Station:
    """Endless work: every wrench always has a next position."""

    def __init__(self) -> None:
        self.count = itertools.count(1)
        self.position = {"w-a": 1, "w-b": 1}

    def work_order(self, wrench_id: str) -> WorkOrder:
        return WorkOrder(
            program=PROGRAM,
            part_id="BENCH-0001",
            joint_position=f"bolt-{self.position[wrench_id]}",
        )

    def is_locked(self, wrench_id: str) -> bool:
        return False

    def position_done(self, wrench_id: str, joint_position: str, status: Judgement) -> None:
        self.position[wrench_id] += 1


class Sinks:
    """Counts what the MQTT side would get."""

    live = 0
    statuses = 0

    def publish_live(self, event: LiveEventPayload) -> None:
        self.live += 1

    def offer_status(self, status: WrenchStatus) -> None:
        self.statuses += 1


class StopRecorder:
    """A ``CuePlayer`` that keeps the worker's latency figure of every stop cue it is asked
    to play (the worker records the latency right before calling ``play``)."""

    def __init__(self) -> None:
        self.latency = LatencyLog()
        self.worker: WrenchWorker | None = None
        self.stop_latencies_s: list[float] = []

    def play(self, cue: CueSound) -> None:
        if cue is CueSound.STOP and self.worker is not None:
            last = self.worker.cue_latency.last_s
            if last is not None:
                self.stop_latencies_s.append(last)

    def close(self) -> None:
        return None


@dataclasses.dataclass
class Figures:
    seconds: float
    cues: int
    stop_cues: int
    p50_ms: float
    p99_ms: float
    max_ms: float
    stop_p99_ms: float
    rss_before_kb: int
    rss_after_kb: int
    hwm_kb: int
    rundowns: int
    frames: int
    load_1min: float

    def lines(self) -> str:
        return (
            f"{self.seconds:.0f} s, 2 wrenches at 1 kHz: {self.frames} frames, "
            f"{self.rundowns} rundowns; load average {self.load_1min:.1f} "
            f"on {os.cpu_count()} CPUs\n"
            f"cue call latency over {self.cues} cues: p50 {self.p50_ms:.2f} ms, "
            f"p99 {self.p99_ms:.2f} ms, max {self.max_ms:.2f} ms\n"
            f"stop cues only ({self.stop_cues}): p99 {self.stop_p99_ms:.2f} ms\n"
            f"RSS {self.rss_before_kb / 1024:.1f} MiB before streaming, "
            f"{self.rss_after_kb / 1024:.1f} MiB after; peak {self.hwm_kb / 1024:.1f} MiB"
        )


def _proc_status_kb(field: str) -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1])
    return -1


def _joints(rng: np.random.Generator) -> Iterator[JointModel]:
    population = JointPopulation(contact_angle_deg=(15.0, 25.0))
    while True:
        yield JointModel.sample(rng, population)


async def _run_workers(
    addresses: list[str], bleak_kwargs: dict[str, Any], seconds: float, workdir: Path
) -> Figures:
    """One worker per address for ``seconds``; every wrench tightens joint after joint."""
    station, sinks = Station(), Sinks()
    workers: list[WrenchWorker] = []
    players: list[StopRecorder] = []
    async with AsyncOutbox(workdir / "bench.sqlite3") as outbox:
        sink = OutboxResultSink(outbox, Topics("bench/line/st-1"))
        for n, (wid, address) in enumerate(zip(("w-a", "w-b"), addresses, strict=True)):
            config = WrenchConfig.model_validate(
                {"id": wid, "address": address, "torque_max": "100 N*m"}
            )
            link = BleakWrenchLink(
                config.address, wrench_id=wid, allowed=[config.address], bleak_kwargs=bleak_kwargs
            )
            player = StopRecorder()
            worker = WrenchWorker(
                config,
                station_id="st-1",
                link=link,
                station=station,
                results=sink,
                live=sinks,
                status=sinks,
                cues=player,
                rng=random.Random(n),
            )
            player.worker = worker
            workers.append(worker)
            players.append(player)
        rss_before = _proc_status_kb("VmRSS")
        tasks = [asyncio.create_task(w.run(), name=f"clampd[{w.wrench_id}].link") for w in workers]
        try:
            await asyncio.sleep(seconds)
        finally:
            for task in tasks:
                task.cancel()
            for task in tasks:
                with contextlib.suppress(asyncio.CancelledError):
                    await task
        rss_after = _proc_status_kb("VmRSS")
    all_ms = np.array([v for w in workers for v in w.cue_latency.snapshot()]) * 1e3
    stop_ms = np.array([v for p in players for v in p.stop_latencies_s]) * 1e3

    def pct(a: np.ndarray[Any, Any], q: float) -> float:
        return float(np.percentile(a, q)) if a.size else float("nan")

    return Figures(
        seconds=seconds,
        cues=int(all_ms.size),
        stop_cues=int(stop_ms.size),
        p50_ms=pct(all_ms, 50),
        p99_ms=pct(all_ms, 99),
        max_ms=float(all_ms.max()) if all_ms.size else float("nan"),
        stop_p99_ms=pct(stop_ms, 99),
        rss_before_kb=rss_before,
        rss_after_kb=rss_after,
        hwm_kb=_proc_status_kb("VmHWM"),
        rundowns=sum(w.stats.rundowns for w in workers),
        frames=sum(w.stats.frames for w in workers),
        load_1min=os.getloadavg()[0],
    )


async def measure(seconds: float, workdir: Path) -> Figures:
    """Two in-process virtual wrenches (their simulation shares this event loop)."""
    async with VirtualAir() as air:
        addresses = []
        for n in range(2):
            rng = np.random.default_rng(100 + n)
            operator = OperatorParams(steady_rate_dps=30.0, part_pause_s=(0.3, 0.5))
            bench = Bench(_joints(rng), operator, rng)
            sensor = VirtualWrenchSensor(SensorParams(serial=f"BENCH-{n}"), rng, bench)
            addresses.append((await air.add_wrench(sensor, name=f"W-{n}")).address)
        return await _run_workers(addresses, air.bleak_kwargs(), seconds, workdir)


async def _spawn_wrench(*args: str) -> tuple[asyncio.subprocess.Process, dict[str, str]]:
    proc = await asyncio.create_subprocess_exec(
        sys.executable,
        "-m",
        "clampd.daemon.cli",
        "simulate",
        "wrench",
        *args,
        stdout=asyncio.subprocess.PIPE,
    )
    assert proc.stdout is not None
    async with asyncio.timeout(30):
        while True:
            line = (await proc.stdout.readline()).decode()
            if not line:
                raise RuntimeError(f"simulated wrench exited: {args}")
            if line.startswith("ready "):
                fields = dict(kv.split("=", 1) for kv in line.split()[1:])
                return proc, fields


async def measure_cross_process(seconds: float, workdir: Path) -> Figures:
    """Two virtual wrenches in processes of their own (``clampd simulate wrench``), joined
    over a TCP HCI hub: this process holds only what the daemon holds (bleak, the workers)."""
    from clampd.simulators.ble import open_central

    first, ready_a = await _spawn_wrench("--hci", "tcp-server:127.0.0.1:0", "--name", "W-A")
    second, ready_b = await _spawn_wrench("--hci", ready_a["hci"], "--name", "W-B", "--seed", "2")
    try:
        async with open_central(ready_a["hci"]) as central:
            return await _run_workers(
                [ready_a["address"], ready_b["address"]],
                central.bleak_kwargs(),
                seconds,
                workdir,
            )
    finally:
        for proc in (second, first):
            proc.terminate()
            await proc.wait()


@pytest.mark.parametrize("mode", ["in_process", "cross_process"])
def test_cue_latency_and_memory_two_wrenches(benchmark: Any, tmp_path: Path, mode: str) -> None:
    """One round of 30 s: the figures go to extra_info and stdout (use ``-s``)."""
    run = measure if mode == "in_process" else measure_cross_process
    figures: list[Figures] = []
    benchmark.pedantic(
        lambda: figures.append(asyncio.run(run(30.0, tmp_path))), rounds=1, iterations=1
    )
    (fig,) = figures
    benchmark.extra_info.update(dataclasses.asdict(fig))
    print(f"\n[{mode}] " + fig.lines())
    assert fig.cues > 0  # the run produced cues to measure


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=60.0)
    parser.add_argument(
        "--cross-process",
        action="store_true",
        help="wrenches in their own processes (closest to a station); default in-process",
    )
    parser.add_argument(
        "--switch-interval",
        type=float,
        default=None,
        help="sys.setswitchinterval for this run, s (CPython default 0.005)",
    )
    args = parser.parse_args()
    if args.switch_interval is not None:
        sys.setswitchinterval(args.switch_interval)
    run = measure_cross_process if args.cross_process else measure
    with tempfile.TemporaryDirectory() as workdir:
        print(asyncio.run(run(args.seconds, Path(workdir))).lines())


if __name__ == "__main__":
    main()
