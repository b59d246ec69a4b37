"""`clampd simulate wrench` in its own process, reached over a bumble HCI transport on
127.0.0.1 by unmodified bleak code in this process (the daemon's situation).

Frames are checked with `struct` against protocol/PROFILE.md (sequence +1 per frame,
timestamp of the next frame = timestamp + count·period); the Battery Level UUID 0x2A19
is from the Bluetooth SIG Assigned Numbers.
"""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import signal
import struct
import sys
from collections.abc import AsyncIterator
from dataclasses import dataclass

import pytest
from bleak import BleakClient, BleakScanner

from clampd.simulators.ble import (
    CONTROL_UUID,
    INFO_UUID,
    SAMPLES_UUID,
    SERVICE_UUID,
    HciSpecError,
    open_central,
)

HEADER = struct.Struct("<BBHIHBBff")  # PROFILE.md "Samples frame"
INFO = struct.Struct("<B16sfHff8s")  # PROFILE.md "Info characteristic"
BATTERY_LEVEL_UUID = "00002a19-0000-1000-8000-00805f9b34fb"  # SIG Assigned Numbers
READY_TIMEOUT_S = 30.0  # generous: importing bumble, numpy and the simulators on a slow CI


@dataclass
class WrenchProcess:
    proc: asyncio.subprocess.Process
    name: str
    address: str
    hci: str


async def start_wrench(*args: str) -> WrenchProcess:
    """Start ``clampd simulate wrench ARGS`` and wait for its ready line."""
    proc = await asyncio.create_subprocess_exec(
        sys.executable,
        "-m",
        "clampd.daemon.cli",
        "simulate",
        "wrench",
        *args,
        stdout=asyncio.subprocess.PIPE,
        stderr=asyncio.subprocess.PIPE,
    )
    try:
        assert proc.stdout is not None
        async with asyncio.timeout(READY_TIMEOUT_S):
            line = (await proc.stdout.readline()).decode()
        if not line.startswith("ready "):
            assert proc.stderr is not None
            raise AssertionError(f"no ready line: {line!r} {(await proc.stderr.read())!r}")
    except BaseException:
        proc.kill()
        await proc.wait()
        raise
    fields = dict(item.split("=", 1) for item in line.split()[1:])
    return WrenchProcess(proc, fields["name"], fields["address"], fields["hci"])


@contextlib.asynccontextmanager
async def wrench_process(*args: str) -> AsyncIterator[WrenchProcess]:
    """A wrench process that must stop cleanly (exit 0) on SIGTERM at the end."""
    wrench = await start_wrench(*args)
    proc = wrench.proc
    try:
        yield wrench
        proc.send_signal(signal.SIGTERM)
        async with asyncio.timeout(10.0):
            assert await proc.wait() == 0
    finally:
        if proc.returncode is None:
            proc.kill()
            await proc.wait()


def check_continuous(frames: list[bytes]) -> int:
    """Assert PROFILE.md continuity over the frames; return the number of samples."""
    heads = [HEADER.unpack_from(f) for f in frames]
    for f, h in zip(frames, heads, strict=True):
        assert h[0] == 1  # version
        assert len(f) == 20 + 8 * h[5]
    for a, b in itertools.pairwise(heads):
        assert b[2] == (a[2] + 1) & 0xFFFF
        assert b[3] == (a[3] + a[5] * a[4]) & 0xFFFFFFFF
    return sum(h[5] for h in heads)


async def collect(client: BleakClient, samples: int) -> list[bytes]:
    frames: list[bytes] = []
    enough = asyncio.Event()

    def on_frame(_char: object, data: bytearray) -> None:
        frames.append(bytes(data))
        if sum(HEADER.unpack_from(f)[5] for f in frames) >= samples:
            enough.set()

    await client.start_notify(SAMPLES_UUID, on_frame)
    await client.write_gatt_char(CONTROL_UUID, b"\x01", response=True)
    async with asyncio.timeout(20.0):
        await enough.wait()
    await client.write_gatt_char(CONTROL_UUID, b"\x02", response=True)
    await client.stop_notify(SAMPLES_UUID)
    return frames


async def test_daemon_in_another_process_receives_samples() -> None:
    async with (
        wrench_process("--name", "W-42", "--rate", "2000", "--seed", "7") as wrench,
        open_central(wrench.hci) as central,
    ):
        assert wrench.hci.startswith("tcp-client:127.0.0.1:")
        found = await BleakScanner.discover(
            timeout=0.5,
            return_adv=True,
            service_uuids=[SERVICE_UUID],
            **central.bleak_scanner_kwargs(),
        )
        assert list(found) == [wrench.address]
        assert found[wrench.address][1].local_name == "W-42"
        async with BleakClient(found[wrench.address][0], **central.bleak_kwargs()) as client:
            assert client.mtu_size == 247
            info = await client.read_gatt_char(INFO_UUID)
            version, serial, _tmax, rate_hz, tsc, rsc, _fw = INFO.unpack(info)
            assert (version, rate_hz) == (1, 2000)
            assert serial.rstrip(b"\0") == b"SIM-W-42"
            assert tsc > 0
            assert rsc > 0
            assert 0 <= (await client.read_gatt_char(BATTERY_LEVEL_UUID))[0] <= 100
            frames = await collect(client, 1000)
        assert check_continuous(frames) >= 1000
        assert {HEADER.unpack_from(f)[4] for f in frames} == {500}  # 1/2000 Hz in µs


async def test_a_restarted_central_finds_the_wrench_again() -> None:
    async with wrench_process("--name", "W-43", "--idle") as wrench:
        for _ in range(2):
            # Each central is a fresh HCI connection; when it leaves, the hub ends its links
            # as a radio loss and the wrench advertises again for the next one.
            async with open_central(wrench.hci) as central:
                dev = await BleakScanner.find_device_by_name(
                    "W-43", timeout=5.0, **central.bleak_scanner_kwargs()
                )
                assert dev is not None
                client = BleakClient(dev, **central.bleak_kwargs())
                await client.connect()
                frames = await collect(client, 100)
                assert check_continuous(frames) >= 100
                # Leave without disconnecting: the process of a daemon that crashed.


async def test_two_wrench_processes_share_one_link() -> None:
    async with (
        wrench_process("--name", "W-51", "--idle") as first,
        wrench_process("--name", "W-52", "--idle", "--hci", first.hci) as second,
        open_central(first.hci) as central,
    ):
        assert second.hci == first.hci
        found = await BleakScanner.discover(
            timeout=0.5, service_uuids=[SERVICE_UUID], **central.bleak_scanner_kwargs()
        )
        assert {d.address for d in found} == {first.address, second.address}
        for wrench in (first, second):
            async with BleakClient(wrench.address, **central.bleak_kwargs()) as client:
                assert check_continuous(await collect(client, 56)) >= 56


async def test_a_vanished_wrench_process_is_reported_as_link_loss() -> None:
    lost = asyncio.Event()
    wrench = await start_wrench("--name", "W-44", "--idle")
    try:
        async with open_central(wrench.hci) as central:
            client = BleakClient(
                wrench.address,
                disconnected_callback=lambda _c: lost.set(),
                **central.bleak_kwargs(),
            )
            await client.connect()
            wrench.proc.kill()  # the whole radio side vanishes at once
            async with asyncio.timeout(10.0):
                await lost.wait()
            assert not client.is_connected
    finally:
        if wrench.proc.returncode is None:
            wrench.proc.kill()
        await wrench.proc.wait()


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (("--rate", "100"), "--rate must lie in 250..4000"),
        (("--hci", "tcp-server:127.0.0.1"), "expected tcp-server:HOST:PORT"),
        (("--hci", "carrier-pigeon:1"), "unknown transport scheme"),
        (("--name", "x" * 30), "at most 29"),
        (("--serial", "S" * 17), "--serial must be 1..16"),
    ],
)
async def test_bad_options_exit_2_with_one_line(args: tuple[str, ...], message: str) -> None:
    proc = await asyncio.create_subprocess_exec(
        sys.executable,
        "-m",
        "clampd.daemon.cli",
        "simulate",
        "wrench",
        *args,
        stdout=asyncio.subprocess.PIPE,
        stderr=asyncio.subprocess.PIPE,
    )
    out, err = await proc.communicate()
    assert proc.returncode == 2
    assert out == b""
    lines = err.decode().strip().splitlines()
    assert len(lines) == 1, lines
    assert message in lines[0]


async def test_open_central_rejects_an_unknown_transport() -> None:
    with pytest.raises(HciSpecError):
        async with open_central("carrier-pigeon:1"):
            pass
