"""Virtual GATT link speed: notifications/s and samples/s through unmodified bleak on the
bumble backend, set-up time (power-on to subscribed), and a control write's round trip.

Why it matters: the simulator must outrun the fastest real wrench (4 kHz ≈ 143
notifications/s of 28 samples, PROFILE.md) by a wide margin, or tests and the demo
measure the simulator instead of the daemon. The source here is unpaced (span 0), so the
figures are the link's ceiling, not a wrench's rate.
Run: ``.venv/bin/python -m pytest -p benchmark tests/benchmarks/bench_gatt.py --benchmark-only``.
Three figures: in-process (one loop, both ends), a `clampd simulate wrench` process
paced at 4 kHz, and an unpaced wrench in another process behind the TCP HCI hub.
Figures appear in ``extra_info`` (use ``--benchmark-columns`` or ``--benchmark-json``).
"""

from __future__ import annotations

import asyncio
import struct
import sys
import time
from typing import Any

from bleak import BleakClient

from clampd.simulators.ble import CONTROL_UUID, SAMPLES_UUID, VirtualAir, open_central

NOTIFICATIONS = 3000
_HEADER = struct.Struct("<BBHIHBBff")


class _Unpaced:
    """28-sample frames per PROFILE.md, as fast as the peripheral will take them."""

    def __init__(self) -> None:
        self.on = False
        self.seq = 0
        self.body = bytes(8 * 28)

    def info_value(self) -> bytes:
        return struct.pack("<B16sfHff8s", 1, b"BENCH", 100.0, 4000, 0.01, 0.1, b"b")

    def battery_percent(self) -> int:
        return 100

    def on_control(self, data: bytes) -> None:
        self.on = data == b"\x01"

    def streaming(self) -> bool:
        return self.on

    def next_notification(self) -> tuple[bytes, float]:
        head = _HEADER.pack(
            1, 0, self.seq & 0xFFFF, (self.seq * 7000) & 0xFFFFFFFF, 250, 28, 0, 0.01, 0.1
        )
        self.seq += 1
        return head + self.body, 0.0


async def _stream(client: BleakClient, n: int) -> float:
    got = 0
    done = asyncio.Event()

    def on_frame(_c: object, _d: bytearray) -> None:
        nonlocal got
        got += 1
        if got >= n:
            done.set()

    await client.start_notify(SAMPLES_UUID, on_frame)
    t0 = time.perf_counter()
    await client.write_gatt_char(CONTROL_UUID, b"\x01", response=True)
    await done.wait()
    elapsed = time.perf_counter() - t0
    await client.write_gatt_char(CONTROL_UUID, b"\x02", response=True)
    return elapsed


async def _in_process() -> dict[str, float]:
    t0 = time.perf_counter()
    async with VirtualAir() as air:
        wrench = await air.add_wrench(_Unpaced(), name="BENCH")
        async with BleakClient(wrench.address, **air.bleak_kwargs()) as client:
            await client.start_notify(SAMPLES_UUID, lambda _c, _d: None)
            setup_s = time.perf_counter() - t0
            await client.stop_notify(SAMPLES_UUID)
            rtts = []
            for _ in range(200):
                t = time.perf_counter()
                await client.write_gatt_char(CONTROL_UUID, b"\x02", response=True)
                rtts.append(time.perf_counter() - t)
            elapsed = await _stream(client, NOTIFICATIONS)
    rtts.sort()
    return {
        "setup_ms": setup_s * 1e3,
        "write_rtt_p50_ms": rtts[len(rtts) // 2] * 1e3,
        "notifications_per_s": NOTIFICATIONS / elapsed,
        "samples_per_s": 28 * NOTIFICATIONS / elapsed,
    }


async def _cross_process() -> dict[str, float]:
    proc = await asyncio.create_subprocess_exec(
        sys.executable,
        "-m",
        "clampd.daemon.cli",
        "simulate",
        "wrench",
        "--idle",
        "--rate",
        "4000",
        "--name",
        "BENCH-X",
        stdout=asyncio.subprocess.PIPE,
    )
    assert proc.stdout is not None
    try:
        line = (await proc.stdout.readline()).decode()
        fields = dict(item.split("=", 1) for item in line.split()[1:])
        t0 = time.perf_counter()
        async with (
            open_central(fields["hci"]) as central,
            BleakClient(fields["address"], **central.bleak_kwargs()) as client,
        ):
            await client.start_notify(SAMPLES_UUID, lambda _c, _d: None)
            setup_s = time.perf_counter() - t0
            await client.stop_notify(SAMPLES_UUID)
            # Paced by the wrench at 4 kHz: shows the link keeps up with real time.
            n = 600
            elapsed = await _stream(client, n)
    finally:
        proc.terminate()
        await proc.wait()
    return {
        "setup_ms": setup_s * 1e3,
        "notifications_per_s": n / elapsed,
        "samples_per_s": 28 * n / elapsed,
    }


async def _serve_unpaced() -> None:
    """Subprocess side of the TCP benchmark: an unpaced wrench behind an HCI hub."""
    from bumble.device import Device
    from bumble.hci import Address
    from bumble.host import Host
    from bumble.link import LocalLink
    from bumble.transport.common import AsyncPipeSink

    from clampd.simulators.ble import HciHub, VirtualController, WrenchPeripheral

    link = LocalLink()  # type: ignore[no-untyped-call]
    ctrl = VirtualController("bench", link=link)
    dev = Device(
        name="BENCH-T", address=Address("C0:DE:00:00:BE:01"), host=Host(ctrl, AsyncPipeSink(ctrl))
    )
    async with HciHub(link) as hub, WrenchPeripheral(dev, _Unpaced(), name="BENCH-T") as w:
        print(f"ready address={w.address} hci={hub.spec}", flush=True)
        await asyncio.Event().wait()


async def _tcp_unpaced() -> dict[str, float]:
    proc = await asyncio.create_subprocess_exec(
        sys.executable, __file__, "serve", stdout=asyncio.subprocess.PIPE
    )
    assert proc.stdout is not None
    try:
        line = (await proc.stdout.readline()).decode()
        fields = dict(item.split("=", 1) for item in line.split()[1:])
        async with (
            open_central(fields["hci"]) as central,
            BleakClient(fields["address"], **central.bleak_kwargs()) as client,
        ):
            elapsed = await _stream(client, NOTIFICATIONS)
    finally:
        proc.terminate()
        await proc.wait()
    return {
        "notifications_per_s": NOTIFICATIONS / elapsed,
        "samples_per_s": 28 * NOTIFICATIONS / elapsed,
    }


def _record(benchmark: Any, results: list[dict[str, float]]) -> None:
    for key in results[0]:
        values = sorted(r[key] for r in results)
        benchmark.extra_info[key] = round(values[len(values) // 2], 2)
    print({k: benchmark.extra_info[k] for k in results[0]})


def test_in_process_link(benchmark: Any) -> None:
    results: list[dict[str, float]] = []
    benchmark.pedantic(lambda: results.append(asyncio.run(_in_process())), rounds=3, iterations=1)
    _record(benchmark, results)


def test_cross_process_link(benchmark: Any) -> None:
    results: list[dict[str, float]] = []
    benchmark.pedantic(
        lambda: results.append(asyncio.run(_cross_process())), rounds=2, iterations=1
    )
    _record(benchmark, results)


def test_tcp_hub_unpaced(benchmark: Any) -> None:
    results: list[dict[str, float]] = []
    benchmark.pedantic(lambda: results.append(asyncio.run(_tcp_unpaced())), rounds=2, iterations=1)
    _record(benchmark, results)


if __name__ == "__main__" and sys.argv[1:] == ["serve"]:
    asyncio.run(_serve_unpaced())
