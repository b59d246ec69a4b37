"""The BLE link adapter over unmodified bleak, against the virtual wrench's real GATT server.

Only the radio is virtual (bumble's in-process link); bleak, its backend seam, ATT and GATT are
real. Sources beside the checks: protocol/PROFILE.md (characteristics, START/STOP_STREAM, the
info record, ATT application errors 0x80/0x81), Bluetooth Core Specification Vol 3 Part F
(ATT_MTU 247 leaves 244 bytes per notification), Bluetooth SIG Assigned Numbers (Battery Level
0x2A19).
"""

from __future__ import annotations

import asyncio
import contextlib
import random
import struct
import time
from collections.abc import AsyncIterator
from dataclasses import dataclass

import numpy as np
import pytest

from clampd.daemon.runtime import (
    BatteryLevel,
    BleakWrenchLink,
    ControlRefusedError,
    Idle,
    LinkItem,
    LinkLost,
    LinkNotFoundError,
    LinkProfileError,
    LinkRefusedError,
    Notification,
)
from clampd.protocol import (
    CuePattern,
    SequenceChecker,
    decode_frame,
    encode_cue,
    encode_stop,
)
from clampd.simulators import SensorParams, VirtualWrenchSensor
from clampd.simulators.ble import VirtualAir, WrenchPeripheral

SERIAL = "SIM-LINK-01"


@dataclass
class Bed:
    air: VirtualAir
    sensor: VirtualWrenchSensor
    wrench: WrenchPeripheral

    def link(self, **kwargs: object) -> BleakWrenchLink:
        options: dict[str, object] = {
            "wrench_id": "w-1",
            "allowed": [self.wrench.address],
            "bleak_kwargs": self.air.bleak_kwargs(),
            "connect_timeout_s": 1.0,
        }
        options.update(kwargs)
        return BleakWrenchLink(self.wrench.address, **options)  # type: ignore[arg-type]


@pytest.fixture
async def bed() -> AsyncIterator[Bed]:
    sensor = VirtualWrenchSensor(
        SensorParams(serial=SERIAL, torque_max_nm=80.0), np.random.default_rng(3)
    )
    async with VirtualAir() as air:
        wrench = await air.add_wrench(sensor, name="W-LINK")
        yield Bed(air, sensor, wrench)


async def take(link: BleakWrenchLink, n: int, *, idle_s: float | None = None) -> list[LinkItem]:
    items: list[LinkItem] = []
    async with asyncio.timeout(10):
        async for item in link.notifications(idle_s=idle_s):
            items.append(item)
            if len(items) >= n:
                break
    return items


def test_an_address_off_the_allow_list_is_refused_before_any_radio_traffic() -> None:
    with pytest.raises(LinkRefusedError) as info:
        BleakWrenchLink(
            "C0:DE:00:00:00:99", wrench_id="w-9", allowed=["C4:7A:10:00:3E:21", "c4:7a:10:00:3e:22"]
        )
    err = info.value
    assert (err.address, err.wrench_id) == ("C0:DE:00:00:00:99", "w-9")
    assert "allow-list" in str(err)
    # Comparison ignores case and surrounding space (BLE addresses are hex, case-free).
    ok = BleakWrenchLink(" c4:7a:10:00:3e:22 ", wrench_id="w-2", allowed=["C4:7A:10:00:3E:22"])
    assert ok.address == "C4:7A:10:00:3E:22"


async def test_refused_address_never_connects_even_when_in_range(bed: Bed) -> None:
    with pytest.raises(LinkRefusedError):
        BleakWrenchLink(
            bed.wrench.address,
            wrench_id="w-1",
            allowed=["C0:DE:00:00:00:99"],
            bleak_kwargs=bed.air.bleak_kwargs(),
        )
    await asyncio.sleep(0.05)
    assert bed.wrench.connections == 0


async def test_connect_reads_info_subscribes_and_streams_decodable_frames(bed: Bed) -> None:
    link = bed.link()
    before = time.monotonic()
    async with link:
        assert link.connected
        assert link.mtu == 247  # requested by the central; 244-byte notifications fit
        assert link.info is not None
        assert link.info.serial == SERIAL
        assert link.info.torque_max_nm == pytest.approx(80.0)
        assert link.battery_pct == 100
        assert bed.sensor.streaming()  # START_STREAM was written
        items = await take(link, 40)
    assert not link.connected
    assert not bed.sensor.streaming()  # STOP_STREAM written on the way out
    frames = [i for i in items if isinstance(i, Notification)]
    assert len(frames) >= 30
    stamps = [f.host_t_s for f in frames]
    assert stamps == sorted(stamps)
    assert stamps[0] >= before
    checker = SequenceChecker()
    for f in frames:
        decoded = decode_frame(f.data)
        assert decoded.count == 28  # PROFILE.md: 28 samples at MTU 247
        check = checker.feed(decoded)
        assert check.accepted
    assert checker.frames_lost == 0
    assert link.frames_received >= len(frames)


async def test_control_writes_go_through_and_refusals_are_typed(bed: Bed) -> None:
    async with bed.link() as link:
        await link.write_control(encode_cue(CuePattern.STOP, 400))
        assert [(p.value, d) for _, p, d in bed.sensor.cues] == [(2, 400)]
        with pytest.raises(ControlRefusedError) as info:
            await link.write_control(b"\x09")  # unknown opcode
        assert info.value.att_code == 0x80  # PROFILE.md: bad command
        with pytest.raises(ControlRefusedError) as info:
            await link.write_control(b"\x03" + struct.pack("<H", 9000))
        assert info.value.att_code == 0x81  # PROFILE.md: out of range
        assert link.connected  # a refused write does not end the link
        await link.write_control(encode_stop())
        assert not bed.sensor.streaming()


async def test_loss_ends_the_stream_with_a_marker(bed: Bed) -> None:
    async with bed.link() as link:
        await take(link, 5)
        t0 = time.monotonic()
        await bed.wrench.go_out_of_range()
        tail: list[LinkItem] = []
        async with asyncio.timeout(5):
            tail.extend([item async for item in link.notifications()])
        assert isinstance(tail[-1], LinkLost)
        assert tail[-1].host_t_s >= t0
        assert not link.connected
        # The stream ended with the marker; a new read waits for the next connection.
        with pytest.raises(TimeoutError):
            async with asyncio.timeout(0.1):
                await anext(link.notifications())


async def test_nothing_at_the_address_is_link_not_found(bed: Bed) -> None:
    await bed.wrench.go_out_of_range()
    link = bed.link(connect_timeout_s=0.3)
    with pytest.raises(LinkNotFoundError):
        async with link:
            pass
    assert not link.connected


async def test_scan_first_finds_the_wrench_by_address(bed: Bed) -> None:
    link = bed.link(scan=True, scanner_kwargs=bed.air.bleak_scanner_kwargs())
    async with link:
        items = await take(link, 3)
    assert all(isinstance(i, Notification | BatteryLevel) for i in items)


class BadInfoSensor(VirtualWrenchSensor):
    """A device that answers but sends an info record of the wrong length."""

    def info_value(self) -> bytes:
        return super().info_value()[:30]


async def test_a_device_with_a_malformed_info_record_is_a_profile_error() -> None:
    sensor = BadInfoSensor(SensorParams(), np.random.default_rng(1))
    async with VirtualAir() as air:
        wrench = await air.add_wrench(sensor, name="W-BAD")
        link = BleakWrenchLink(
            wrench.address,
            wrench_id="w-bad",
            allowed=[wrench.address],
            bleak_kwargs=air.bleak_kwargs(),
        )
        with pytest.raises(LinkProfileError, match="info record"):
            async with link:
                pass
        assert not link.connected
        await asyncio.sleep(0.05)
        assert not wrench.connected  # the link was closed, not left dangling


async def test_idle_markers_while_nothing_arrives(bed: Bed) -> None:
    async with bed.link() as link:
        await link.write_control(encode_stop())
        await asyncio.sleep(0.1)
        # Drain what was queued before the stop, then only idle markers come.
        items = await take(link, 200, idle_s=0.02)
        idles = [i for i in items if isinstance(i, Idle)]
        assert idles
        assert isinstance(items[-1], Idle)


async def test_a_stalled_reader_overflows_counted_and_the_gap_shows_as_lost_frames(
    bed: Bed,
) -> None:
    async with bed.link(queue_bound=4) as link:
        await asyncio.sleep(0.4)  # ~14 frames at 1 kHz arrive while nobody reads
        assert link.frames_overflowed > 0
        frames = [decode_frame(i.data) for i in await take(link, 12) if isinstance(i, Notification)]
    checker = SequenceChecker()
    checks = [checker.feed(f) for f in frames]
    assert all(c.accepted for c in checks)
    assert checker.frames_lost >= link.frames_overflowed - 1  # dropped frames are seen as lost


async def test_connect_forever_reconnects_after_loss_on_its_own(bed: Bed) -> None:
    link = bed.link()
    sessions: list[int] = []
    first, second = asyncio.Event(), asyncio.Event()

    async def serve(conn: BleakWrenchLink) -> None:
        sessions.append(len(sessions))
        first.set()
        if len(sessions) == 2:
            second.set()
        async for _item in conn.notifications():
            pass  # until LinkLost

    task = asyncio.create_task(link.connect_forever(serve, rng=random.Random(5)))
    try:
        async with asyncio.timeout(10):
            await first.wait()
        await bed.wrench.go_out_of_range()
        await asyncio.sleep(0.5)
        assert sessions == [0]  # not back while out of range
        await bed.wrench.come_back_in_range()
        async with asyncio.timeout(15):
            await second.wait()
        assert link.connections == 2
        assert bed.wrench.connections == 2
    finally:
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
    assert not link.connected


async def test_the_link_runs_without_blocking_calls_in_the_loop(
    bed: Bed, blockbuster: object
) -> None:
    async with bed.link() as link:
        items = await take(link, 30)
        await link.write_control(encode_cue(CuePattern.APPROACH, 150))
    assert sum(isinstance(i, Notification) for i in items) >= 20
