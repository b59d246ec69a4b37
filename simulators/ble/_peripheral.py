"""The virtual wrench as a GATT server on a bumble `Device`.

Theory of operation: the wrench service of ``protocol/PROFILE.md`` (samples notify, control
write-with-response, info read), the Bluetooth SIG Battery Service and Device Information
Service are served by a real bumble GATT server, so a central talks real ATT to it. The
bytes come from a `FrameSource` (the sensor model); this module only moves them.

Invariants:
- Frames are pulled from the source only while a central has the samples characteristic
  subscribed *and* the source says it streams, so a notification is never produced for
  nobody (bumble would drop it silently) and the sequence numbers a central sees stay
  consecutive across its own subscription.
- The virtual radio delivers at once, so the wrench paces itself: frame *k* is due at
  ``start + sum(span[0..k-1])`` on the loop clock. A late loop catches up by sending
  without sleeping; after a stall longer than `_MAX_LAG_S` the schedule restarts
  instead of bursting the backlog.
- A frame longer than the negotiated ATT payload is never sent cut short: the source is
  told the payload limit when it can take it (`SizedFrameSource`), and a frame that
  still does not fit is skipped and counted, which a receiver sees as a sequence gap.
- A control write that the source rejects with an ``att_code`` is answered with that
  ATT error; any other exception from the source is our bug and answers 0x0E
  (unlikely error) after logging, so a central never hangs on a write.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import logging
from typing import TYPE_CHECKING, Any, Protocol, runtime_checkable

from bumble import att, core, gatt, hci
from bumble.core import UUID, AdvertisingData
from bumble.profiles.battery_service import BatteryService
from bumble.profiles.device_information_service import DeviceInformationService

if TYPE_CHECKING:
    from bumble.device import Connection, Device

__all__ = [
    "CONTROL_UUID",
    "INFO_UUID",
    "SAMPLES_UUID",
    "SERVICE_UUID",
    "FrameSource",
    "PeripheralError",
    "SizedFrameSource",
    "WrenchIdentity",
    "WrenchPeripheral",
]

logger = logging.getLogger(__name__)

# UUIDs from protocol/PROFILE.md (written out again here: the simulator is an independent
# truth and must not share code with the daemon's decoder).
SERVICE_UUID = "6c616d70-0001-4d71-b0a1-7d5c3e2f1a00"
SAMPLES_UUID = "6c616d70-0002-4d71-b0a1-7d5c3e2f1a00"
CONTROL_UUID = "6c616d70-0003-4d71-b0a1-7d5c3e2f1a00"
INFO_UUID = "6c616d70-0004-4d71-b0a1-7d5c3e2f1a00"

# ~20 ms: short scans must find the wrench (bumble's default of 1 s makes a 0.5 s scan
# miss it; measured, see ../shared/NOTES-ble-mqtt.md). 20 ms is the BLE minimum for
# connectable undirected advertising (Core spec Vol 6 Part B 4.4.2.2.1).
ADVERTISING_INTERVAL_MS = 20.0
# Legacy advertising data holds 31 bytes: flags (3) + one 128-bit UUID (18) leave 10, so a
# local name longer than 8 bytes is advertised as a shortened name (Core Supplement 1.2).
_ADV_NAME_ROOM = 8
# A scan response holds the full name when it fits: 31 bytes minus a 2-byte AD header.
_SCAN_RESPONSE_NAME_ROOM = 29
# After this much lag (a stalled loop, a paused process) the pacing schedule restarts
# rather than bursting the backlog; 0.25 s is ~10 frames at 1 kHz, common practice
# for soft real-time pacing, no source.
_MAX_LAG_S = 0.25
# How often an idle streaming loop re-asks the source whether it streams, and how often
# the battery level is checked for a change to notify. Both are idle-time costs only.
_IDLE_POLL_S = 0.05
_BATTERY_POLL_S = 1.0
# How long shutdown waits for the loops to notice the stop flag (each wakes within
# _IDLE_POLL_S or one frame span) before cancelling them.
_STOP_GRACE_S = 1.0
# ATT header of a notification: opcode (1) + handle (2) (Core spec Vol 3 Part F 3.4.7.1).
_NOTIFY_HEADER = 3
# Supervision timeout (HCI error 0x08): what a central sees when the wrench leaves range.
_LINK_LOST_REASON = hci.HCI_CONNECTION_TIMEOUT_ERROR
# ATT "unlikely error", answered when the source fails in a way it did not mean to.
_ATT_UNLIKELY_ERROR = 0x0E


class FrameSource(Protocol):
    """What the peripheral needs from a wrench sensor model (structural)."""

    def info_value(self) -> bytes:
        """The info characteristic value per PROFILE.md."""
        ...

    def battery_percent(self) -> int:
        """Battery level, 0..100."""
        ...

    def on_control(self, data: bytes) -> None:
        """A control write; raise an exception carrying ``att_code`` to refuse it."""
        ...

    def streaming(self) -> bool:
        """Whether the sensor currently sends sample frames."""
        ...

    def next_notification(self) -> tuple[bytes, float]:
        """The next frame's bytes and the sensor-time span (s) it covers."""
        ...


@runtime_checkable
class SizedFrameSource(Protocol):
    """Optional: a source that can shape frames to the negotiated notification payload."""

    def set_max_notification(self, n_bytes: int) -> None:
        """Keep every later frame at or below ``n_bytes``."""
        ...


class PeripheralError(ValueError):
    """A wrench set-up we cannot serve (the caller's input)."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class WrenchIdentity:
    """Device Information Service strings of one virtual wrench (invented demo values)."""

    manufacturer: str = "clampd virtual tools"
    model: str = "VW-1 virtual wrench"
    serial: str = "VW-000001"
    firmware: str = "sim-1"


class WrenchPeripheral:
    """Serves one `FrameSource` as the clampd wrench over a bumble `Device`.

    Use as ``async with WrenchPeripheral(device, source, name=...)``: entering powers the
    device on (its controller must already be attached) and starts advertising; leaving
    stops the pacing task and powers the device off. Counters (`notifications_sent`,
    `frames_skipped`, `connections`) are for tests and benchmarks. Raises
    `PeripheralError` for a name that cannot be advertised.
    """

    def __init__(
        self,
        device: Device,
        source: FrameSource,
        *,
        name: str,
        identity: WrenchIdentity | None = None,
        advertising_interval_ms: float = ADVERTISING_INTERVAL_MS,
    ) -> None:
        if not name or not name.isascii() or not name.isprintable():
            raise PeripheralError(f"wrench name must be non-empty printable ASCII, got {name!r}")
        self.device = device
        self.source = source
        self.name = name
        self.identity = identity or WrenchIdentity()
        self.advertising_interval_ms = advertising_interval_ms
        self.notifications_sent = 0
        self.frames_skipped = 0
        self.connections = 0
        self._connection: Connection | None = None
        self._subscribed = False
        self._in_range = True
        self._wake = asyncio.Event()
        self._readvertise = asyncio.Event()
        self._closing = False
        self._stop = asyncio.Event()
        self._tasks: list[asyncio.Task[None]] = []
        self._last_battery = -1

        self._samples = gatt.Characteristic(
            SAMPLES_UUID, gatt.Characteristic.Properties.NOTIFY, gatt.Characteristic.READABLE, b""
        )
        self._control: gatt.Characteristic[bytes] = gatt.Characteristic(
            CONTROL_UUID,
            gatt.Characteristic.Properties.WRITE,
            gatt.Characteristic.WRITEABLE,
            gatt.CharacteristicValue[bytes](write=self._on_control_write),
        )
        self._info: gatt.Characteristic[bytes] = gatt.Characteristic(
            INFO_UUID,
            gatt.Characteristic.Properties.READ,
            gatt.Characteristic.READABLE,
            gatt.CharacteristicValue[bytes](read=self._on_info_read),
        )
        self._battery = BatteryService(lambda _conn: self._battery_level())
        ident = self.identity
        self._dis = DeviceInformationService(
            manufacturer_name=ident.manufacturer,
            model_number=ident.model,
            serial_number=ident.serial,
            firmware_revision=ident.firmware,
        )
        device.name = name
        device.add_services(
            [gatt.Service(SERVICE_UUID, [self._samples, self._control, self._info]), self._battery]
        )
        device.add_service(self._dis)
        self._samples.on(self._samples.EVENT_SUBSCRIPTION, self._on_subscription)
        device.on(device.EVENT_CONNECTION, self._on_connection)

    # -- lifecycle ---------------------------------------------------------------------

    async def __aenter__(self) -> WrenchPeripheral:
        await self.device.power_on()
        await self._advertise()
        loop = asyncio.get_running_loop()
        self._tasks = [
            loop.create_task(self._stream(), name=f"clampd[{self.name}].notify"),
            loop.create_task(self._watch_battery(), name=f"clampd[{self.name}].battery"),
            loop.create_task(self._keep_advertising(), name=f"clampd[{self.name}].advertise"),
        ]
        for task in self._tasks:
            task.add_done_callback(self._report_crash)
        logger.info("%s %s: advertising", self.name, self.address)
        return self

    async def __aexit__(self, *exc: object) -> None:
        # The loops stop on a flag first and are only cancelled if they do not: a task
        # cancelled mid-HCI-command leaves bumble a response future it later fails to
        # resolve (InvalidStateError in the log), and bumble can swallow a cancellation
        # that lands mid-command (then the task would never end).
        self._closing = True
        self._stop.set()
        self._wake.set()
        self._readvertise.set()
        if self._tasks:
            _done, pending = await asyncio.wait(self._tasks, timeout=_STOP_GRACE_S)
            for task in pending:
                task.cancel()
            for task in pending:
                with contextlib.suppress(asyncio.CancelledError):
                    await task
        self._tasks = []
        with contextlib.suppress(Exception):
            await self.device.power_off()

    def _report_crash(self, task: asyncio.Task[None]) -> None:
        # A loop that dies (a bug in the sensor model, say) is logged at once, not only
        # when the peripheral shuts down; the wrench then simply falls silent.
        if not task.cancelled() and (exc := task.exception()) is not None:
            logger.error(
                "%s %s: %s stopped", self.name, self.address, task.get_name(), exc_info=exc
            )

    @property
    def address(self) -> str:
        """The wrench's (random static) address as bleak spells it."""
        return str(self.device.random_address).split("/")[0]

    @property
    def connected(self) -> bool:
        return self._connection is not None

    @property
    def subscribed(self) -> bool:
        return self._subscribed

    async def go_out_of_range(self) -> None:
        """Drop the link as a radio would (supervision timeout) and stop advertising.

        The central sees a disconnection with HCI reason 0x08, not a polite termination,
        which is what link-loss handling must cope with. Nothing is advertised until
        `come_back_in_range`.
        """
        self._in_range = False
        await self.device.stop_advertising()
        conn = self._connection
        if conn is not None:
            with contextlib.suppress(Exception):
                await conn.disconnect(_LINK_LOST_REASON)
        logger.info("%s %s: out of range", self.name, self.address)

    async def come_back_in_range(self) -> None:
        """Advertise again so a central can reconnect."""
        self._in_range = True
        if self._connection is None:
            await self._advertise()
        logger.info("%s %s: back in range", self.name, self.address)

    # -- advertising and connection events ---------------------------------------------

    def advertising_data(self) -> bytes:
        """Flags, the wrench service UUID and the (possibly shortened) local name."""
        raw = self.name.encode("ascii")
        name_type = (
            AdvertisingData.COMPLETE_LOCAL_NAME
            if len(raw) <= _ADV_NAME_ROOM
            else AdvertisingData.SHORTENED_LOCAL_NAME
        )
        return bytes(
            AdvertisingData(
                [
                    (
                        AdvertisingData.FLAGS,
                        bytes(
                            [
                                AdvertisingData.LE_GENERAL_DISCOVERABLE_MODE_FLAG
                                | AdvertisingData.BR_EDR_NOT_SUPPORTED_FLAG
                            ]
                        ),
                    ),
                    (
                        AdvertisingData.COMPLETE_LIST_OF_128_BIT_SERVICE_CLASS_UUIDS,
                        bytes(UUID(SERVICE_UUID)),
                    ),
                    (name_type, raw[:_ADV_NAME_ROOM]),
                ]
            )
        )

    async def _advertise(self) -> None:
        if not self._in_range:
            return
        await self.device.start_advertising(
            advertising_data=self.advertising_data(),
            scan_response_data=bytes(
                AdvertisingData([(AdvertisingData.COMPLETE_LOCAL_NAME, self.name.encode())])
            )
            if len(self.name) <= _SCAN_RESPONSE_NAME_ROOM
            else b"",
            advertising_interval_min=self.advertising_interval_ms,
            advertising_interval_max=self.advertising_interval_ms,
        )

    def _on_connection(self, connection: Connection) -> None:
        self._connection = connection
        self._subscribed = False
        self.connections += 1
        connection.on(connection.EVENT_DISCONNECTION, self._on_disconnection)
        connection.on(connection.EVENT_CONNECTION_ATT_MTU_UPDATE, self._on_mtu)
        self._on_mtu()
        logger.info("%s %s: connected to %s", self.name, self.address, connection.peer_address)

    def _on_disconnection(self, reason: int) -> None:
        self._connection = None
        self._subscribed = False
        self._wake.set()
        logger.info("%s %s: disconnected (reason 0x%02X)", self.name, self.address, reason)
        self._readvertise.set()

    def _on_mtu(self) -> None:
        conn = self._connection
        if conn is not None and isinstance(self.source, SizedFrameSource):
            self.source.set_max_notification(conn.att_mtu - _NOTIFY_HEADER)

    def _on_subscription(self, bearer: Any, notify: bool, indicate: bool) -> None:
        del bearer, indicate
        self._subscribed = notify
        self._wake.set()

    # -- GATT value callbacks -----------------------------------------------------------

    def _on_info_read(self, _connection: Connection) -> bytes:
        return bytes(self.source.info_value())

    def _battery_level(self) -> int:
        return max(0, min(100, int(self.source.battery_percent())))

    def _on_control_write(self, _connection: Connection, value: bytes) -> None:
        try:
            self.source.on_control(bytes(value))
        except Exception as exc:
            code = getattr(exc, "att_code", None)
            if isinstance(code, int) and 0 < code <= 0xFF:
                logger.info("%s: control %s refused (ATT 0x%02X)", self.name, value.hex(), code)
                raise att.ATT_Error(code, message=str(exc)) from exc
            logger.exception("%s: control %s failed in the sensor model", self.name, value.hex())
            raise att.ATT_Error(_ATT_UNLIKELY_ERROR, message=repr(exc)) from exc
        finally:
            self._wake.set()

    # -- tasks ---------------------------------------------------------------------------

    def _may_stream(self) -> bool:
        return self._connection is not None and self._subscribed and self.source.streaming()

    async def _stream(self) -> None:
        loop = asyncio.get_running_loop()
        due: float | None = None
        while not self._closing:
            if not self._may_stream():
                due = None
                self._wake.clear()
                # asyncio.timeout, not wait_for: on 3.11 wait_for can swallow a
                # cancellation that coincides with its timeout, and shutdown then hangs.
                with contextlib.suppress(TimeoutError):
                    async with asyncio.timeout(_IDLE_POLL_S):
                        await self._wake.wait()
                continue
            conn = self._connection
            assert conn is not None
            frame, span_s = self.source.next_notification()
            if len(frame) > conn.att_mtu - _NOTIFY_HEADER:
                self.frames_skipped += 1
                if self.frames_skipped == 1:
                    logger.warning(
                        "%s: %d-byte frame exceeds ATT MTU %d; skipped (request MTU 247)",
                        self.name,
                        len(frame),
                        conn.att_mtu,
                    )
            else:
                try:
                    await self.device.gatt_server.notify_subscriber(conn, self._samples, frame)
                except core.BaseBumbleError as exc:
                    # The link went down under us; the disconnection event follows.
                    logger.info("%s: notification not sent: %s", self.name, exc)
                else:
                    self.notifications_sent += 1
            now = loop.time()
            due = (now if due is None else due) + max(span_s, 0.0)
            delay = due - now
            if delay > 0:
                await asyncio.sleep(delay)
            else:
                if -delay > _MAX_LAG_S:
                    due = now
                await asyncio.sleep(0)

    async def _keep_advertising(self) -> None:
        # Advertising restarts from a task of ours, not from the disconnection callback,
        # so shutting down cancels it instead of racing a power-off.
        while not self._closing:
            await self._readvertise.wait()
            self._readvertise.clear()
            if self._in_range and self._connection is None and not self._closing:
                await self._advertise()

    async def _watch_battery(self) -> None:
        while not self._closing:
            level = self._battery_level()
            conn = self._connection
            if level != self._last_battery and conn is not None:
                with contextlib.suppress(core.BaseBumbleError):  # link down: nothing to tell
                    await self.device.gatt_server.notify_subscriber(
                        conn, self._battery.battery_level_characteristic, level
                    )
            self._last_battery = level
            with contextlib.suppress(TimeoutError):
                async with asyncio.timeout(_BATTERY_POLL_S):
                    await self._stop.wait()
