"""The virtual wrench over real ATT/GATT, driven by unmodified bleak on the bumble backend.

Everything here runs through bumble's GATT server and client on its in-process link; only
the radio is virtual. The frame source below is this test's own: it encodes frames field
by field with `struct` from protocol/PROFILE.md, independent of the simulator's encoder
and of the daemon's decoder, and the checks decode with `struct` again.

Sources beside the checks: protocol/PROFILE.md (our open profile), Bluetooth Core
Specification 5.x Vol 3 Part F (ATT: MTU, notification header, error codes), Bluetooth SIG
Assigned Numbers (Battery Service 0x180F, Battery Level 0x2A19, Device Information
0x180A with 0x2A29 Manufacturer, 0x2A24 Model, 0x2A25 Serial, 0x2A26 Firmware).
"""

from __future__ import annotations

import asyncio
import itertools
import random
import struct
from collections.abc import AsyncIterator
from dataclasses import dataclass, field

import pytest
from bleak import BleakClient, BleakScanner
from bleak.backends.characteristic import BleakGATTCharacteristic
from bleak.exc import BleakDeviceNotFoundError, BleakError, BleakGATTProtocolError

from clampd.simulators.ble import (
    CONTROL_UUID,
    INFO_UUID,
    SAMPLES_UUID,
    SERVICE_UUID,
    PeripheralError,
    SizedFrameSource,
    VirtualAir,
    WrenchIdentity,
    WrenchPeripheral,
)

# --- an independent frame source per PROFILE.md --------------------------------------

HEADER = struct.Struct("<BBHIHBBff")  # PROFILE.md "Samples frame", 20 bytes
SAMPLE = struct.Struct("<hhhh")  # torque, rate_x, rate_y, rate_z
INFO = struct.Struct("<B16sfHff8s")  # PROFILE.md "Info characteristic", 39 bytes
TORQUE_SCALE = 0.01  # N·m per count (test choice)
RATE_SCALE = 0.1  # deg/s per count (test choice)
BATTERY_UUID = "00002a19-0000-1000-8000-00805f9b34fb"  # SIG Assigned Numbers: Battery Level
ATT_BAD_COMMAND = 0x80  # PROFILE.md, control characteristic
ATT_OUT_OF_RANGE = 0x81  # PROFILE.md, control characteristic
ATT_UNLIKELY_ERROR = 0x0E  # Core spec Vol 3 Part F 3.4.1.1, table 3.4


class Refused(Exception):  # noqa: N818 - the peer sees a refusal, with this ATT code
    def __init__(self, att_code: int) -> None:
        super().__init__(f"ATT {att_code:#04x}")
        self.att_code = att_code


class StickSource:
    """A test wrench: torque counts run up by one per sample, rate_z is the sample index
    mod 1000 negated, so every sample says where it sits in the stream."""

    def __init__(self, rate_hz: int = 1000, samples_per_frame: int = 28) -> None:
        self.rate_hz = rate_hz
        self.samples_per_frame = samples_per_frame
        self.max_bytes: int | None = None
        self.on = False
        self.sequence = 0
        self.sample_index = 0
        self.timestamp_us = 0
        self.battery = 87
        self.controls: list[bytes] = []
        self.explode = False

    def info_value(self) -> bytes:
        return INFO.pack(1, b"STICK-0001", 120.0, self.rate_hz, TORQUE_SCALE, RATE_SCALE, b"t-1")

    def battery_percent(self) -> int:
        return self.battery

    def on_control(self, data: bytes) -> None:
        if self.explode:
            raise RuntimeError("sensor model bug")
        self.controls.append(data)
        if len(data) == 1 and data[0] == 0x01:
            self.on = True
        elif len(data) == 1 and data[0] == 0x02:
            self.on = False
        elif len(data) == 3 and data[0] == 0x03:
            (hz,) = struct.unpack_from("<H", data, 1)
            if not 250 <= hz <= 4000:
                raise Refused(ATT_OUT_OF_RANGE)
            self.rate_hz = hz
        elif len(data) == 1 and data[0] == 0x04:
            pass
        elif len(data) == 4 and data[0] == 0x05:
            if not 1 <= data[1] <= 5:
                raise Refused(ATT_OUT_OF_RANGE)
        else:
            raise Refused(ATT_BAD_COMMAND)

    def streaming(self) -> bool:
        return self.on

    def next_notification(self) -> tuple[bytes, float]:
        count = self.samples_per_frame
        if self.max_bytes is not None:
            count = min(count, (self.max_bytes - HEADER.size) // SAMPLE.size)
        count = max(count, 1)  # a frame never has zero samples (PROFILE.md)
        period_us = round(1e6 / self.rate_hz)
        head = HEADER.pack(
            1,
            0,
            self.sequence & 0xFFFF,
            self.timestamp_us & 0xFFFFFFFF,
            period_us,
            count,
            0,
            TORQUE_SCALE,
            RATE_SCALE,
        )
        body = b"".join(
            SAMPLE.pack((i % 30000), 0, 0, -(i % 1000))
            for i in range(self.sample_index, self.sample_index + count)
        )
        self.sequence += 1
        self.sample_index += count
        self.timestamp_us += count * period_us
        return head + body, count * period_us / 1e6


class SizedStickSource(StickSource):
    """The same wrench, told the notification payload limit (`SizedFrameSource`)."""

    def set_max_notification(self, n_bytes: int) -> None:
        self.max_bytes = n_bytes


@dataclass
class Frame:
    sequence: int
    timestamp_us: int
    period_us: int
    torque_counts: list[int]
    rate_z_counts: list[int]


def decode(data: bytes) -> Frame:
    version, flags, seq, ts, period, count, reserved, tsc, rsc = HEADER.unpack_from(data)
    assert (version, flags, reserved) == (1, 0, 0)
    assert (tsc, rsc) == (pytest.approx(TORQUE_SCALE), pytest.approx(RATE_SCALE))  # f32
    assert len(data) == HEADER.size + SAMPLE.size * count  # PROFILE.md length rule
    samples = [SAMPLE.unpack_from(data, HEADER.size + SAMPLE.size * i) for i in range(count)]
    return Frame(seq, ts, period, [s[0] for s in samples], [s[3] for s in samples])


@dataclass
class Inbox:
    frames: list[Frame] = field(default_factory=list)
    raw_lengths: list[int] = field(default_factory=list)
    arrived: asyncio.Event = field(default_factory=asyncio.Event)
    want_samples: int = 0

    def __call__(self, _char: BleakGATTCharacteristic, data: bytearray) -> None:
        self.raw_lengths.append(len(data))
        self.frames.append(decode(bytes(data)))
        if sum(len(f.torque_counts) for f in self.frames) >= self.want_samples:
            self.arrived.set()

    async def wait_samples(self, n: int, timeout_s: float = 10.0) -> None:
        self.want_samples = sum(len(f.torque_counts) for f in self.frames) + n
        self.arrived.clear()
        if sum(len(f.torque_counts) for f in self.frames) >= self.want_samples:
            return
        await asyncio.wait_for(self.arrived.wait(), timeout_s)


def assert_continuous(frames: list[Frame]) -> None:
    """Sequence +1 per frame (u16 wrap), timestamps = previous + count·period (PROFILE.md)."""
    for a, b in itertools.pairwise(frames):
        assert b.sequence == (a.sequence + 1) & 0xFFFF, (a.sequence, b.sequence)
        assert b.timestamp_us == (a.timestamp_us + len(a.torque_counts) * a.period_us) & (2**32 - 1)
        assert b.torque_counts[0] == (a.torque_counts[-1] + 1) % 30000


# --- fixtures ---------------------------------------------------------------------------


@dataclass
class Bench:
    air: VirtualAir
    source: SizedStickSource
    wrench: WrenchPeripheral


@pytest.fixture
async def bench() -> AsyncIterator[Bench]:
    async with VirtualAir() as air:
        source = SizedStickSource()
        wrench = await air.add_wrench(
            source, name="W-17", identity=WrenchIdentity(serial="STICK-0001")
        )
        yield Bench(air, source, wrench)


# --- tests --------------------------------------------------------------------------------


async def test_scanner_finds_the_wrench_by_its_service_uuid(bench: Bench) -> None:
    found = await BleakScanner.discover(
        timeout=0.3,
        return_adv=True,
        service_uuids=[SERVICE_UUID],
        **bench.air.bleak_scanner_kwargs(),
    )
    assert list(found) == [bench.wrench.address]
    device, adv = found[bench.wrench.address]
    assert adv.local_name == "W-17"
    assert SERVICE_UUID in adv.service_uuids
    assert device.name == "W-17"


async def test_scanner_filter_excludes_other_services(bench: Bench) -> None:
    battery_service = "0000180f-0000-1000-8000-00805f9b34fb"  # advertised by nobody here
    found = await BleakScanner.discover(
        timeout=0.2, service_uuids=[battery_service], **bench.air.bleak_scanner_kwargs()
    )
    assert found == []


async def test_long_name_is_advertised_shortened_but_served_in_full() -> None:
    async with VirtualAir() as air:
        wrench = await air.add_wrench(StickSource(), name="station-7-wrench-2")
        dev = await BleakScanner.find_device_by_address(
            wrench.address, timeout=2.0, **air.bleak_scanner_kwargs()
        )
        assert dev is not None
        # Legacy advertising holds 31 bytes (Core spec Vol 6 Part B 2.3.1.1); with flags
        # and a 128-bit UUID, 8 name bytes remain.
        assert dev.name == "station-"
        async with BleakClient(dev, **air.bleak_kwargs()) as client:
            gap_name = await client.read_gatt_char("00002a00-0000-1000-8000-00805f9b34fb")
        assert gap_name.decode() == "station-7-wrench-2"  # GAP Device Name, SIG 0x2A00


async def test_round_trip_through_unmodified_bleak(bench: Bench) -> None:
    dev = await BleakScanner.find_device_by_name("W-17", **bench.air.bleak_scanner_kwargs())
    assert dev is not None
    inbox = Inbox()
    async with BleakClient(dev, **bench.air.bleak_kwargs()) as client:
        # ATT_MTU 247 leaves 244 bytes per notification (Core Vol 3 Part F 3.4.7.1: MTU − 3).
        assert client.mtu_size == 247
        service = client.services.get_service(SERVICE_UUID)
        assert service is not None
        props = {c.uuid: sorted(c.properties) for c in service.characteristics}
        assert props == {
            SAMPLES_UUID: ["notify"],
            CONTROL_UUID: ["write"],
            INFO_UUID: ["read"],
        }
        samples_char = service.get_characteristic(SAMPLES_UUID)
        assert samples_char is not None
        # A notify characteristic carries a CCCD, UUID 0x2902 (SIG Assigned Numbers).
        assert [d.uuid[4:8] for d in samples_char.descriptors] == ["2902"]
        assert samples_char.max_write_without_response_size == 244

        info = await client.read_gatt_char(INFO_UUID)
        assert len(info) == 39  # PROFILE.md
        version, serial, tmax, rate, tsc, rsc, fw = INFO.unpack(info)
        assert (version, serial.rstrip(b"\0"), rate, fw.rstrip(b"\0")) == (
            1,
            b"STICK-0001",
            1000,
            b"t-1",
        )
        assert (tmax, tsc, rsc) == (
            pytest.approx(120.0),
            pytest.approx(TORQUE_SCALE),
            pytest.approx(RATE_SCALE),
        )

        battery = await client.read_gatt_char(BATTERY_UUID)
        assert battery == bytearray([87])
        serial_dis = await client.read_gatt_char("00002a25-0000-1000-8000-00805f9b34fb")
        assert serial_dis.decode() == "STICK-0001"

        await client.start_notify(SAMPLES_UUID, inbox)
        assert bench.wrench.notifications_sent == 0  # nothing is sent before START_STREAM
        await client.write_gatt_char(CONTROL_UUID, b"\x01", response=True)
        await inbox.wait_samples(1000)

        assert inbox.frames[0].sequence == 0
        assert inbox.frames[0].timestamp_us == 0
        assert set(inbox.raw_lengths) == {244}  # 20 + 8·28 (PROFILE.md)
        assert {f.period_us for f in inbox.frames} == {1000}
        assert_continuous(inbox.frames)

        # SET_RATE 4000 Hz: the next frames carry period 250 µs (PROFILE.md, opcode 0x03).
        await client.write_gatt_char(CONTROL_UUID, b"\x03" + struct.pack("<H", 4000), True)
        await inbox.wait_samples(1000)
        assert_continuous(inbox.frames)
        periods = [f.period_us for f in inbox.frames]
        switch = periods.index(250)
        assert set(periods[:switch]) == {1000}
        assert set(periods[switch:]) == {250}

        # STOP_STREAM: once the write is answered, no further frame arrives.
        await client.write_gatt_char(CONTROL_UUID, b"\x02", response=True)
        n_after_stop = len(inbox.frames)
        await asyncio.sleep(0.1)
        assert len(inbox.frames) == n_after_stop
        assert bench.wrench.notifications_sent == n_after_stop

        # Resuming continues the same stream: nothing was lost or repeated.
        await client.write_gatt_char(CONTROL_UUID, b"\x01", response=True)
        await inbox.wait_samples(100)
        assert_continuous(inbox.frames)
        await client.stop_notify(SAMPLES_UUID)
    assert not client.is_connected


@pytest.mark.parametrize(
    ("command", "code"),
    [
        (b"\x09", ATT_BAD_COMMAND),  # unknown opcode
        (b"\x01\x00", ATT_BAD_COMMAND),  # START_STREAM takes no parameter
        (b"\x03\x10", ATT_BAD_COMMAND),  # SET_RATE with 1 byte instead of 2
        (b"\x03" + struct.pack("<H", 5000), ATT_OUT_OF_RANGE),  # above 4000 Hz
        (b"\x05\x09\x10\x00", ATT_OUT_OF_RANGE),  # cue pattern 9 of 1..5
    ],
)
async def test_bad_command_surfaces_as_bleak_gatt_protocol_error(
    bench: Bench, command: bytes, code: int
) -> None:
    async with BleakClient(bench.wrench.address, **bench.air.bleak_kwargs()) as client:
        with pytest.raises(BleakGATTProtocolError) as info:
            await client.write_gatt_char(CONTROL_UUID, command, response=True)
        assert info.value.code == code
        # The link survives a refused write and the next good command still works.
        await client.write_gatt_char(CONTROL_UUID, b"\x01", response=True)
        assert bench.source.on


async def test_random_control_bytes_only_ever_succeed_or_raise_protocol_errors(
    bench: Bench,
) -> None:
    rng = random.Random(20261201)  # seeded: a failure reproduces
    async with BleakClient(bench.wrench.address, **bench.air.bleak_kwargs()) as client:
        codes: set[int] = set()
        for _ in range(200):
            data = bytes(rng.randrange(256) for _ in range(rng.randrange(1, 6)))
            try:
                await client.write_gatt_char(CONTROL_UUID, data, response=True)
            except BleakGATTProtocolError as exc:
                codes.add(int(exc.code))
        assert codes <= {ATT_BAD_COMMAND, ATT_OUT_OF_RANGE}
        assert ATT_BAD_COMMAND in codes
        assert client.is_connected


async def test_a_failing_sensor_model_answers_unlikely_error(bench: Bench) -> None:
    bench.source.explode = True
    async with BleakClient(bench.wrench.address, **bench.air.bleak_kwargs()) as client:
        with pytest.raises(BleakGATTProtocolError) as info:
            await client.write_gatt_char(CONTROL_UUID, b"\x01", response=True)
        assert info.value.code == ATT_UNLIKELY_ERROR


async def test_link_loss_fires_disconnected_callback_and_reconnect_resumes(
    bench: Bench,
) -> None:
    lost = asyncio.Event()
    client = BleakClient(
        bench.wrench.address,
        disconnected_callback=lambda _c: lost.set(),
        **bench.air.bleak_kwargs(),
    )
    inbox = Inbox()
    await client.connect()
    await client.start_notify(SAMPLES_UUID, inbox)
    await client.write_gatt_char(CONTROL_UUID, b"\x01", response=True)
    await inbox.wait_samples(200)

    await bench.wrench.go_out_of_range()
    await asyncio.wait_for(lost.wait(), 5.0)
    assert not client.is_connected
    with pytest.raises(BleakError):
        await client.read_gatt_char(INFO_UUID)
    # Out of range: a scan does not see it.
    found = await BleakScanner.discover(timeout=0.2, **bench.air.bleak_scanner_kwargs())
    assert bench.wrench.address not in {d.address for d in found}
    # A connect attempt meanwhile fails with bleak's "not found".
    absent = BleakClient(bench.wrench.address, timeout=0.3, **bench.air.bleak_kwargs())
    with pytest.raises(BleakDeviceNotFoundError):
        await absent.connect()

    await bench.wrench.come_back_in_range()
    lost.clear()
    frames_before = len(inbox.frames)
    await client.connect()  # the same BleakClient object reconnects
    assert client.mtu_size == 247
    await client.start_notify(SAMPLES_UUID, inbox)
    await inbox.wait_samples(200)
    resumed = inbox.frames[frames_before:]
    assert_continuous(resumed)
    # The sensor kept its counters: the stream continues after the gap.
    assert resumed[0].sequence >= inbox.frames[frames_before - 1].sequence + 1
    assert bench.wrench.connections == 2

    await client.disconnect()
    await asyncio.sleep(0)
    assert not lost.is_set()  # a disconnect we asked for is not reported as a loss


async def test_notifications_only_while_subscribed(bench: Bench) -> None:
    bench.source.on = True  # the sensor streams, but nobody listens yet
    async with BleakClient(bench.wrench.address, **bench.air.bleak_kwargs()) as client:
        await asyncio.sleep(0.05)
        assert bench.wrench.notifications_sent == 0
        inbox = Inbox()
        await client.start_notify(SAMPLES_UUID, inbox)
        await inbox.wait_samples(28)
        await client.stop_notify(SAMPLES_UUID)
        sent = bench.wrench.notifications_sent
        await asyncio.sleep(0.05)
        assert bench.wrench.notifications_sent == sent
        assert inbox.frames[0].sequence == 0  # the first frame after subscribing


async def test_smaller_mtu_shapes_frames_instead_of_cutting_them(bench: Bench) -> None:
    async with BleakClient(bench.wrench.address, mtu=100, **bench.air.bleak_kwargs()) as client:
        assert client.mtu_size == 100
        inbox = Inbox()
        await client.start_notify(SAMPLES_UUID, inbox)
        await client.write_gatt_char(CONTROL_UUID, b"\x01", response=True)
        await inbox.wait_samples(100)
        # 97 payload bytes (MTU − 3) hold a 20-byte header and 9 samples (PROFILE.md).
        assert bench.source.max_bytes == 97
        assert set(inbox.raw_lengths) == {20 + 8 * 9}
        assert_continuous(inbox.frames)


async def test_frames_that_do_not_fit_are_skipped_not_truncated() -> None:
    source = StickSource()
    async with VirtualAir() as air:
        wrench = await air.add_wrench(source, name="W-18")
        assert not isinstance(source, SizedFrameSource)
        async with BleakClient(wrench.address, mtu=23, **air.bleak_kwargs()) as client:
            inbox = Inbox()
            await client.start_notify(SAMPLES_UUID, inbox)
            await client.write_gatt_char(CONTROL_UUID, b"\x01", response=True)
            for _ in range(100):
                if wrench.frames_skipped >= 3:
                    break
                await asyncio.sleep(0.02)
            assert wrench.frames_skipped >= 3
            assert inbox.frames == []


async def test_battery_level_change_is_notified(bench: Bench) -> None:
    levels: asyncio.Queue[int] = asyncio.Queue()
    async with BleakClient(bench.wrench.address, **bench.air.bleak_kwargs()) as client:
        await client.start_notify(BATTERY_UUID, lambda _c, d: levels.put_nowait(d[0]))
        bench.source.battery = 42
        assert await asyncio.wait_for(levels.get(), 5.0) == 42


async def test_two_wrenches_stream_to_one_central_at_once() -> None:
    async with VirtualAir() as air:
        sources = [StickSource(), StickSource(rate_hz=2000)]
        wrenches = [
            await air.add_wrench(src, name=f"W-{i}") for i, src in enumerate(sources, start=1)
        ]
        inboxes = [Inbox(), Inbox()]

        async def run(wrench: WrenchPeripheral, inbox: Inbox) -> None:
            async with BleakClient(wrench.address, **air.bleak_kwargs()) as client:
                await client.start_notify(SAMPLES_UUID, inbox)
                await client.write_gatt_char(CONTROL_UUID, b"\x01", response=True)
                await inbox.wait_samples(500)

        async with asyncio.TaskGroup() as tg:
            for wrench, inbox in zip(wrenches, inboxes, strict=True):
                tg.create_task(run(wrench, inbox))
        for inbox, period in zip(inboxes, (1000, 500), strict=True):
            assert {f.period_us for f in inbox.frames} == {period}
            assert_continuous(inbox.frames)


async def test_backend_demands_a_central_and_known_arguments(bench: Bench) -> None:
    from clampd.simulators.ble import BumbleBleakClient, BumbleBleakScanner

    with pytest.raises(BleakError, match="central"):
        BleakClient(bench.wrench.address, backend=BumbleBleakClient)
    with pytest.raises(BleakError, match="central"):
        BleakScanner(backend=BumbleBleakScanner)
    with pytest.raises(BleakError, match="unknown arguments"):
        BleakClient(bench.wrench.address, colour="red", **bench.air.bleak_kwargs())
    with pytest.raises(BleakError, match="not a Bluetooth address"):
        await BleakClient("no-such-thing", **bench.air.bleak_kwargs()).connect()


async def test_no_blocking_calls_in_the_loop(bench: Bench, blockbuster: object) -> None:
    async with BleakClient(bench.wrench.address, **bench.air.bleak_kwargs()) as client:
        inbox = Inbox()
        await client.start_notify(SAMPLES_UUID, inbox)
        await client.write_gatt_char(CONTROL_UUID, b"\x01", response=True)
        await inbox.wait_samples(300)
    assert_continuous(inbox.frames)


async def test_a_crashing_sensor_is_logged_and_the_wrench_falls_silent(
    bench: Bench, caplog: pytest.LogCaptureFixture
) -> None:
    def broken() -> tuple[bytes, float]:
        raise RuntimeError("sensor model bug")

    bench.source.next_notification = broken  # type: ignore[method-assign]
    async with BleakClient(bench.wrench.address, **bench.air.bleak_kwargs()) as client:
        inbox = Inbox()
        await client.start_notify(SAMPLES_UUID, inbox)
        await client.write_gatt_char(CONTROL_UUID, b"\x01", response=True)
        for _ in range(100):
            if "notify stopped" in caplog.text:
                break
            await asyncio.sleep(0.01)
        assert "clampd[W-17].notify stopped" in caplog.text
        assert inbox.frames == []
        # The GATT server still answers: only the stream is gone.
        assert len(await client.read_gatt_char(INFO_UUID)) == INFO.size


@pytest.mark.parametrize("name", ["", "wrench\n1", "schlüssel"])
async def test_a_name_that_cannot_be_advertised_is_refused(name: str) -> None:
    async with VirtualAir() as air:
        with pytest.raises(PeripheralError, match="printable ASCII"):
            await air.add_wrench(StickSource(), name=name)


@pytest.mark.parametrize(("name", "ad_type"), [("W-17", 0x09), ("station-7-wrench-2", 0x08)])
async def test_advertising_data_layout(name: str, ad_type: int) -> None:
    import uuid

    async with VirtualAir() as air:
        data = (await air.add_wrench(StickSource(), name=name)).advertising_data()
    # Core Supplement Part A: AD structures are length, type, data; legacy advertising
    # data is at most 31 bytes (Core Vol 6 Part B 2.3.1.1). Flags 0x01 = LE General
    # Discoverable (0x02) | BR/EDR Not Supported (0x04); 0x07 = complete list of 128-bit
    # UUIDs, little-endian; 0x09 complete / 0x08 shortened local name.
    assert len(data) <= 31
    service_le = uuid.UUID(SERVICE_UUID).bytes[::-1]
    name_part = name.encode()[:8]
    assert data == (
        bytes([2, 0x01, 0x06, 17, 0x07])
        + service_le
        + bytes([len(name_part) + 1, ad_type])
        + name_part
    )


async def test_a_request_whose_caller_gives_up_is_cancelled_with_it(bench: Bench) -> None:
    # A caller's timeout (the daemon's GATT_TIMEOUT_S) cancels its read; the backend's own task
    # for the request must end with it, not finish (or fail unobserved) on its own later.
    async with BleakClient(bench.wrench.address, **bench.air.bleak_kwargs()) as client:
        before = asyncio.all_tasks()
        caller = asyncio.create_task(client.read_gatt_char(INFO_UUID))
        for _ in range(2):
            await asyncio.sleep(0)  # the request is on its way over the virtual link
        requests = asyncio.all_tasks() - before - {caller}
        assert requests, "the read finished before it could be abandoned"
        caller.cancel()
        with pytest.raises(asyncio.CancelledError):
            await caller
        assert all(r.cancelled() or r.cancelling() > 0 for r in requests)
        # The link goes on serving: the next read gets the whole info record (PROFILE.md).
        assert len(await client.read_gatt_char(INFO_UUID)) == INFO.size
