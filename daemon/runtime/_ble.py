"""The BLE link to one wrench, over bleak: the only module of clampd that imports bleak.

Theory of operation
-------------------
``BleakWrenchLink`` is one wrench's link: reusable, not re-entrant (like an aiomqtt client).
``async with link:`` connects (optionally after a scan), lets the ATT MTU be what the stack
negotiated, reads the info characteristic (``decode_info``), subscribes to the samples and
Battery Level characteristics and writes ``START_STREAM``; leaving the block writes
``STOP_STREAM`` (so an idle wrench saves its battery) and disconnects. ``connect_forever``
wraps that in the runtime's one reconnection shape: connect, serve until the link is lost,
wait ``next_delay(attempt, rng)``, try again.

Callbacks end here. bleak's notification callback only stamps ``time.monotonic()`` and
enqueues; its disconnected callback enqueues a ``LinkLost`` marker. Everything else reads
``async for item in link.notifications()``, which yields ``Notification`` (sample frame bytes),
``BatteryLevel`` and, when asked for, ``Idle`` markers while nothing arrives (so the reader can
tick its engine), and ends after ``LinkLost``.

Invariants
----------
- Only allow-listed addresses are ever connected to: the check runs when a link is made
  (``LinkRefusedError``), before any radio traffic.
- bleak's exceptions are translated into ours exactly once, in ``_translated``: callers see
  ``LinkError`` and its subclasses only, never bleak types or bleak's message text.
- The notification queue is bounded; when a stalled reader lets it fill, the newest frames
  are dropped and counted (``frames_overflowed``). The reader's sequence check then sees the
  loss as lost frames, so a rundown spanning it is judged NOK (data gap), never silently OK.
  ``LinkLost`` is enqueued past the bound: a loss is never dropped.
- A host without a usable Bluetooth stack (no system D-Bus, no BlueZ, no or a powered-off
  adapter) is ``LinkUnavailableError``, which says what to do. ``connect_forever`` logs it
  once as an error and then retries quietly, with a reminder every ``UNAVAILABLE_REMIND_S``:
  the stack may come up later (bluetoothd started after the daemon), and a log filling
  with the same line hides everything else.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import logging
import random
import time
from collections.abc import AsyncIterator, Awaitable, Callable, Collection, Iterator
from types import TracebackType
from typing import Any, Final, NoReturn, Self, TypeVar

from bleak import BleakClient, BleakScanner
from bleak.backends.characteristic import BleakGATTCharacteristic
from bleak.backends.device import BLEDevice
from bleak.exc import (
    BleakBluetoothNotAvailableError,
    BleakBluetoothNotAvailableReason,
    BleakCharacteristicNotFoundError,
    BleakDBusError,
    BleakDeviceNotFoundError,
    BleakError,
    BleakGATTProtocolError,
)

from clampd.daemon.runtime._backoff import next_delay
from clampd.protocol import (
    BATTERY_LEVEL_UUID,
    CONTROL_UUID,
    INFO_UUID,
    SAMPLES_UUID,
    InfoError,
    WrenchInfo,
    decode_info,
    encode_start,
    encode_stop,
)

__all__ = [
    "QUEUE_BOUND",
    "BatteryLevel",
    "BleakWrenchLink",
    "ControlRefusedError",
    "Idle",
    "LinkError",
    "LinkItem",
    "LinkLost",
    "LinkLostError",
    "LinkNotFoundError",
    "LinkProfileError",
    "LinkRefusedError",
    "LinkUnavailableError",
    "Notification",
    "normalise_address",
]

_log = logging.getLogger(__name__)
_T = TypeVar("_T")

# 4096 frames of up to 28 samples hold about two minutes of a 1 kHz stream: a reader that
# falls that far behind is broken, and holding more would only hide it (our own choice;
# at 244 bytes a frame the bound costs at most ~1 MB).
QUEUE_BOUND: Final = 4096
# Connect timeout: bleak's default is 30 s; a wrench in range answers within a few hundred
# ms, and the reconnect loop retries anyway, so 10 s only bounds a hung attempt (our choice).
CONNECT_TIMEOUT_S: Final = 10.0
# Scan window when a scan precedes the connect; the virtual and real wrenches advertise every
# 20 ms (simulators/ble/_peripheral.py), common hardware every 100-1000 ms (common practice,
# no source): 5 s sees several advertisements even at the slow end.
SCAN_TIMEOUT_S: Final = 5.0
# A GATT write or read that takes longer than this is treated as a lost link. ATT itself
# gives up after 30 s (Core spec Vol 3 Part F 3.3.3); a cue is useless long before (our choice).
GATT_TIMEOUT_S: Final = 5.0
# While the host has no usable Bluetooth stack, the reconnect loop keeps trying quietly and
# says so again this often: once per ten minutes keeps the cause visible in a log tail
# without drowning the other lines (our choice).
UNAVAILABLE_REMIND_S: Final = 600.0
# The D-Bus error name of a bus name nobody owns: BlueZ's org.bluez is not running (D-Bus
# specification, "Message Bus Specification: org.freedesktop.DBus.Error.*", from memory).
_DBUS_SERVICE_UNKNOWN: Final = "org.freedesktop.DBus.Error.ServiceUnknown"
_NO_STACK_REMEDY: Final = (
    "install BlueZ (package bluez) and make sure dbus and bluetooth run "
    "(systemctl status dbus bluetooth); on a machine without Bluetooth, "
    "'clampd run --ble-hci SPEC' uses a virtual link"
)
_ADAPTER_PROBLEMS: Final = {
    BleakBluetoothNotAvailableReason.NO_BLUETOOTH: "no Bluetooth adapter found; attach one",
    BleakBluetoothNotAvailableReason.NO_BLE_CENTRAL_ROLE: (
        "no adapter that supports Bluetooth Low Energy; attach a BLE adapter"
    ),
    BleakBluetoothNotAvailableReason.POWERED_OFF: (
        "the Bluetooth adapter is powered off; 'bluetoothctl power on' (and check rfkill)"
    ),
}


# -- what the link yields ------------------------------------------------------------------


@dataclasses.dataclass(frozen=True, slots=True)
class Notification:
    """One samples notification as it arrived; ``host_t_s`` is ``time.monotonic()`` then."""

    host_t_s: float
    data: bytes


@dataclasses.dataclass(frozen=True, slots=True)
class BatteryLevel:
    """A Battery Level notification (Bluetooth SIG 0x2A19), percent 0-100."""

    host_t_s: float
    percent: int


@dataclasses.dataclass(frozen=True, slots=True)
class LinkLost:
    """The link dropped without being asked to; the notification stream ends after this."""

    host_t_s: float


@dataclasses.dataclass(frozen=True, slots=True)
class Idle:
    """Nothing arrived for the requested idle period; lets a reader tick its engine."""

    host_t_s: float


LinkItem = Notification | BatteryLevel | LinkLost | Idle


# -- our errors ----------------------------------------------------------------------------


class LinkError(Exception):
    """The link to a wrench failed; the peer's or the radio's fault. Worth retrying."""

    def __init__(self, message: str, *, address: str, wrench_id: str) -> None:
        super().__init__(f"{wrench_id} {address}: {message}")
        self.address = address
        self.wrench_id = wrench_id


class LinkRefusedError(LinkError):
    """The address is not on the station's allow-list; clampd will not connect to it.

    The configuration's (or the caller's) fault; never retried.
    """


class LinkUnavailableError(LinkError):
    """The host has no usable Bluetooth stack: no system D-Bus, BlueZ not running, no adapter,
    or the adapter off. The host's fault, not the wrench's; ``remedy`` says what to do.
    Retried, since the stack may come up later."""

    def __init__(self, message: str, *, address: str, wrench_id: str, remedy: str) -> None:
        super().__init__(f"{message}; {remedy}", address=address, wrench_id=wrench_id)
        self.remedy = remedy


class LinkNotFoundError(LinkError):
    """Nothing at the address answered (out of range, switched off, not advertising)."""


class LinkLostError(LinkError):
    """The link dropped while an operation was under way, or is not up."""


class LinkProfileError(LinkError):
    """The device answered but does not speak the wrench profile (missing characteristic,
    malformed info record): the wrong device at an allow-listed address, or broken firmware."""


class ControlRefusedError(LinkError):
    """The wrench refused a control write with an ATT error (``att_code``; PROFILE.md uses
    0x80 bad command and 0x81 out of range)."""

    def __init__(self, message: str, *, address: str, wrench_id: str, att_code: int) -> None:
        super().__init__(message, address=address, wrench_id=wrench_id)
        self.att_code = att_code


def normalise_address(address: str) -> str:
    """An address as compared against the allow-list: upper case, surrounding space removed."""
    return address.strip().upper()


# -- the link ------------------------------------------------------------------------------


class BleakWrenchLink:
    """The link to one allow-listed wrench (see the module docstring).

    ``bleak_kwargs`` go unchanged to ``BleakClient`` (production: none; tests and the demo:
    the virtual rig's ``backend=``/``central=``); ``scanner_kwargs`` to ``BleakScanner`` when
    ``scan`` is true. Raises ``LinkRefusedError`` at once when ``address`` is not in
    ``allowed``. A sensor on a declarative profile passes its ``samples_uuid`` and
    ``v1_control=False``: no info record is read and no control command is written to it.
    """

    def __init__(
        self,
        address: str,
        *,
        wrench_id: str,
        allowed: Collection[str],
        bleak_kwargs: dict[str, Any] | None = None,
        scan: bool = False,
        scanner_kwargs: dict[str, Any] | None = None,
        connect_timeout_s: float = CONNECT_TIMEOUT_S,
        queue_bound: int = QUEUE_BOUND,
        samples_uuid: str = SAMPLES_UUID,
        v1_control: bool = True,
    ) -> None:
        self.address = normalise_address(address)
        self.wrench_id = wrench_id
        allow = {normalise_address(a) for a in allowed}
        if self.address not in allow:
            raise LinkRefusedError(
                "address is not on the station's allow-list; refusing to connect",
                address=self.address,
                wrench_id=wrench_id,
            )
        if queue_bound < 1:
            raise ValueError(f"queue_bound must be >= 1, got {queue_bound}")
        self._bleak_kwargs = dict(bleak_kwargs or {})
        self._scan = scan
        self._scanner_kwargs = dict(scanner_kwargs or {})
        self._connect_timeout_s = connect_timeout_s
        self._bound = queue_bound
        self._samples_uuid = samples_uuid
        self._v1 = v1_control
        self._client: BleakClient | None = None
        self._queue: asyncio.Queue[LinkItem] = asyncio.Queue()
        self._closing = False
        self._lost = False
        self.info: WrenchInfo | None = None
        self.battery_pct: int | None = None
        self.mtu: int | None = None
        # counters for status, logs and tests
        self.connections = 0
        self.connect_failures = 0
        self.frames_received = 0
        self.frames_overflowed = 0

    def __repr__(self) -> str:
        return f"BleakWrenchLink({self.wrench_id!r}, {self.address!r})"

    @property
    def connected(self) -> bool:
        """True between a successful connect and the loss or close of the link."""
        return self._client is not None and not self._lost

    # -- connect / close ---------------------------------------------------------------

    async def __aenter__(self) -> Self:
        if self._client is not None:
            raise RuntimeError(f"{self!r} is already connected (a link is not re-entrant)")
        self._queue = asyncio.Queue()
        self._closing = False
        self._lost = False
        target: BLEDevice | str = self.address
        with self._translated("scan"):
            if self._scan:
                found = await BleakScanner.find_device_by_address(
                    self.address, timeout=SCAN_TIMEOUT_S, **self._scanner_kwargs
                )
                if found is None:
                    raise LinkNotFoundError(
                        "not seen while scanning", address=self.address, wrench_id=self.wrench_id
                    )
                target = found
        client = BleakClient(
            target,
            disconnected_callback=self._on_disconnected,
            timeout=self._connect_timeout_s,
            **self._bleak_kwargs,
        )
        try:
            with self._translated("connect"):
                await client.connect()
                self._client = client
                self.mtu = client.mtu_size
                info = await self._gatt(client.read_gatt_char(INFO_UUID)) if self._v1 else None
            try:
                self.info = None if info is None else decode_info(info)
            except InfoError as exc:
                raise LinkProfileError(
                    f"info record does not follow the profile ({exc})",
                    address=self.address,
                    wrench_id=self.wrench_id,
                ) from None
            with self._translated("subscribe"):
                battery = client.services.get_characteristic(BATTERY_LEVEL_UUID)
                if battery is not None:
                    level = await self._gatt(client.read_gatt_char(battery))
                    self.battery_pct = int(level[0]) if level else None
                    await self._gatt(client.start_notify(battery, self._on_battery))
                await self._gatt(client.start_notify(self._samples_uuid, self._on_samples))
                if self._v1:
                    await self._gatt(client.write_gatt_char(CONTROL_UUID, encode_start(), True))
        except BaseException:
            self._closing = True
            self._client = None
            with contextlib.suppress(BleakError, OSError, TimeoutError):
                await client.disconnect()
            raise
        self.connections += 1
        _log.info(
            "%s %s: connected (MTU %s, serial %s, %s Hz)",
            self.wrench_id,
            self.address,
            self.mtu,
            "-" if self.info is None else self.info.serial,
            "-" if self.info is None else self.info.sample_rate_hz,
        )
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        client, self._client = self._client, None
        self._closing = True
        if client is None:
            return
        if self._v1 and not self._lost and client.is_connected:
            # Stop the stream first: a wrench left streaming drains its battery for nobody.
            with contextlib.suppress(BleakError, OSError, TimeoutError):
                await asyncio.wait_for(
                    client.write_gatt_char(CONTROL_UUID, encode_stop(), True), GATT_TIMEOUT_S
                )
        with contextlib.suppress(BleakError, OSError, TimeoutError):
            await client.disconnect()
        _log.info("%s %s: link closed", self.wrench_id, self.address)

    async def connect_forever(
        self,
        serve: Callable[[BleakWrenchLink], Awaitable[None]],
        *,
        rng: random.Random | None = None,
    ) -> NoReturn:
        """Connect, ``await serve(self)`` until the link is lost, wait, reconnect; forever.

        The wait is ``next_delay(attempt, rng)``; ``attempt`` resets after each successful
        connect, so a wrench that walks out of range and back reconnects within half a second.
        ``LinkError`` from connecting or from ``serve`` is logged and retried; anything else
        (a bug, cancellation) propagates.
        """
        rng = rng if rng is not None else random.Random()
        attempt = 0
        said_unavailable: float | None = None  # monotonic time it was last said
        while True:
            quiet = False
            try:
                async with self:
                    attempt = 0
                    said_unavailable = None
                    await serve(self)
            except LinkRefusedError:
                raise
            except LinkUnavailableError as exc:
                self.connect_failures += 1
                now = time.monotonic()
                if said_unavailable is None:
                    said_unavailable = now
                    _log.error("%s (retrying quietly)", exc)
                elif now - said_unavailable >= UNAVAILABLE_REMIND_S:
                    said_unavailable = now
                    _log.warning(
                        "%s %s: still no usable Bluetooth stack after %d attempts; %s",
                        self.wrench_id,
                        self.address,
                        self.connect_failures,
                        exc.remedy,
                    )
                quiet = True
            except LinkError as exc:
                self.connect_failures += 1
                _log.warning("%s", exc)
            delay = next_delay(attempt, rng)
            attempt += 1
            _log.log(
                logging.DEBUG if quiet else logging.INFO,
                "%s %s: reconnecting in %.2f s (attempt %d)",
                self.wrench_id,
                self.address,
                delay,
                attempt,
            )
            await asyncio.sleep(delay)

    # -- the stream -----------------------------------------------------------------------

    async def notifications(self, *, idle_s: float | None = None) -> AsyncIterator[LinkItem]:
        """Items in arrival order until (and including) ``LinkLost``.

        With ``idle_s``, an ``Idle`` marker is yielded whenever nothing arrived for that long.
        """
        queue = self._queue
        while True:
            if not queue.empty():
                item = queue.get_nowait()
            elif idle_s is None:
                item = await queue.get()
            else:
                try:
                    async with asyncio.timeout(idle_s):
                        item = await queue.get()
                except TimeoutError:
                    item = Idle(time.monotonic())
            yield item
            if isinstance(item, LinkLost):
                return

    async def write_control(self, data: bytes) -> None:
        """Write one control command with response (PROFILE.md, control characteristic).

        Raises ``ControlRefusedError`` when the wrench answers with an ATT error,
        ``LinkLostError`` when the link is down or drops meanwhile.
        """
        client = self._client
        if client is None or self._lost:
            raise LinkLostError("link is not up", address=self.address, wrench_id=self.wrench_id)
        if not self._v1:
            raise LinkProfileError(
                "this sensor's profile has no control characteristic",
                address=self.address,
                wrench_id=self.wrench_id,
            )
        with self._translated("control write"):
            await self._gatt(client.write_gatt_char(CONTROL_UUID, data, True))

    def inject(self, item: LinkItem) -> None:
        """Put an item into the stream as if the radio had delivered it.

        The seam for fault injection in tests (corrupt frames, a loss) on top of a real
        connection; production code never calls it.
        """
        self._push(item)

    # -- callbacks: stamp and enqueue, nothing else ------------------------------------------

    def _on_samples(self, _char: BleakGATTCharacteristic, data: bytearray) -> None:
        self._push(Notification(time.monotonic(), bytes(data)))

    def _on_battery(self, _char: BleakGATTCharacteristic, data: bytearray) -> None:
        if data:
            self._push(BatteryLevel(time.monotonic(), int(data[0])))

    def _on_disconnected(self, _client: BleakClient) -> None:
        if self._closing or self._lost:
            return
        self._lost = True
        self._queue.put_nowait(LinkLost(time.monotonic()))

    def _push(self, item: LinkItem) -> None:
        if isinstance(item, LinkLost):
            self._lost = True
            self._queue.put_nowait(item)
            return
        if self._queue.qsize() >= self._bound:
            self.frames_overflowed += 1
            return
        if isinstance(item, Notification):
            self.frames_received += 1
        self._queue.put_nowait(item)

    # -- translation of bleak's errors, once -------------------------------------------------

    async def _gatt(self, request: Awaitable[_T]) -> _T:
        async with asyncio.timeout(GATT_TIMEOUT_S):
            return await request

    @contextlib.contextmanager
    def _translated(self, what: str) -> Iterator[None]:
        where = {"address": self.address, "wrench_id": self.wrench_id}
        try:
            yield
        except LinkError:
            raise
        except BleakBluetoothNotAvailableError as exc:
            problem = _ADAPTER_PROBLEMS.get(exc.reason)
            if problem is None:  # denied by the system or the user, or unknown
                problem = f"Bluetooth is not available ({exc.reason.name.lower()})"
                remedy = "check that the daemon's user may use BlueZ over D-Bus (deploy/BOARD.md)"
            else:
                problem, _, remedy = problem.partition("; ")
            raise LinkUnavailableError(f"{what}: {problem}", remedy=remedy, **where) from None
        except BleakDBusError as exc:
            if exc.dbus_error != _DBUS_SERVICE_UNKNOWN:
                raise LinkError(f"{what}: D-Bus error {exc.dbus_error}", **where) from None
            raise LinkUnavailableError(
                f"{what}: BlueZ (bluetoothd) is not running on the system D-Bus",
                remedy=_NO_STACK_REMEDY,
                **where,
            ) from None
        except BleakDeviceNotFoundError:
            raise LinkNotFoundError(f"{what}: no answer", **where) from None
        except BleakCharacteristicNotFoundError as exc:
            raise LinkProfileError(
                f"{what}: characteristic {exc.char_specifier} missing; not a clampd wrench?",
                **where,
            ) from None
        except BleakGATTProtocolError as exc:
            # args[0] is the raw code; ``.code`` would fail on codes outside bleak's enum
            # (0x80-0x9F are application codes, PROFILE.md uses 0x80 and 0x81).
            code = int(exc.args[0]) if exc.args and isinstance(exc.args[0], int) else -1
            raise ControlRefusedError(
                f"{what}: refused with ATT error 0x{code & 0xFF:02X}",
                att_code=code,
                **where,
            ) from None
        except TimeoutError:
            raise LinkLostError(f"{what}: timed out", **where) from None
        except BleakError as exc:
            if self._lost or (self._client is not None and not self._client.is_connected):
                raise LinkLostError(f"{what}: link dropped", **where) from None
            raise LinkError(f"{what}: {type(exc).__name__}", **where) from None
        except OSError as exc:
            # Before any radio traffic the only socket bleak opens is the system D-Bus's
            # (BlueZ is reached through it): missing, refused or forbidden, there is no
            # Bluetooth stack for this daemon.
            if what in ("scan", "connect") and isinstance(
                exc, FileNotFoundError | ConnectionRefusedError | PermissionError
            ):
                raise LinkUnavailableError(
                    f"{what}: the system D-Bus is not reachable ({type(exc).__name__}), so "
                    "BlueZ, the Linux Bluetooth stack, cannot be used",
                    remedy=(
                        "let the daemon's user talk to BlueZ on the system D-Bus (deploy/BOARD.md)"
                        if isinstance(exc, PermissionError)
                        else _NO_STACK_REMEDY
                    ),
                    **where,
                ) from None
            raise LinkError(f"{what}: {type(exc).__name__} ({exc.strerror})", **where) from None
