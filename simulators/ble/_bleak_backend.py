"""A bleak backend on a bumble central, so unmodified bleak code talks real ATT/GATT to
the virtual wrench.

Theory of operation: bleak 3.1 accepts ``backend=`` on `BleakClient` and `BleakScanner`
and passes unknown keyword arguments to the backend's constructor; we take ``central=``
(a powered-on bumble `Device`) that way. Every bleak call maps onto one bumble GATT
client procedure; bumble's ATT errors become `BleakGATTProtocolError` with the same
code, a peer that never answers a connect becomes `BleakDeviceNotFoundError`, and any
request cut short by a disconnection becomes `BleakError`. Nothing else leaves here.

Invariants:
- One LE connection attempt at a time per central (bumble refuses overlapping ones);
  scanning on a shared central is reference-counted so one scanner stopping does not
  blind another.
- ``connect`` returns only after the ATT MTU exchange (247 by default: without it
  notifications are cut to 20 bytes) and a full service discovery, so ``client.services``
  is complete like on bleak's platform backends.
- The disconnected callback fires for unsolicited disconnections only (the contract in
  bleak's `BaseBleakClient.set_disconnected_callback`), once per connection.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import uuid as uuid_mod
import weakref
from collections.abc import Awaitable, Callable
from typing import Any, TypeVar

from bleak.args import SizedBuffer
from bleak.assigned_numbers import CHARACTERISTIC_PROPERTIES, CharacteristicPropertyName
from bleak.backends.characteristic import BleakGATTCharacteristic
from bleak.backends.client import BaseBleakClient, NotifyCallback
from bleak.backends.descriptor import BleakGATTDescriptor
from bleak.backends.device import BLEDevice
from bleak.backends.scanner import AdvertisementData, BaseBleakScanner
from bleak.backends.service import BleakGATTService, BleakGATTServiceCollection
from bleak.exc import BleakDeviceNotFoundError, BleakError, BleakGATTProtocolError
from bumble import att, core, hci
from bumble.core import AdvertisingData
from bumble.device import Advertisement, Connection, Device, Peer
from bumble.gatt_client import CharacteristicProxy, DescriptorProxy

__all__ = ["BumbleBleakClient", "BumbleBleakScanner"]

logger = logging.getLogger(__name__)

_T = TypeVar("_T")

# ATT MTU requested on connect: 247 lets a 244-byte notification (28 samples) through
# (protocol/PROFILE.md); the default 23 cuts notifications to 20 bytes (measured).
DEFAULT_MTU = 247
# A controller confirms a disconnection at once on the virtual link; one that has not
# within 5 s is gone (its hub process died), so we stop waiting. Modelling choice.
_DISCONNECT_TIMEOUT_S = 5.0
# ATT notification/write header: opcode (1) + handle (2) (Core spec Vol 3 Part F 3.4).
_ATT_HEADER = 3


class _CentralState:
    """Per-central coordination shared by every client and scanner on it."""

    def __init__(self) -> None:
        self.connect_lock = asyncio.Lock()
        self.scanners = 0


_STATES: weakref.WeakKeyDictionary[Device, _CentralState] = weakref.WeakKeyDictionary()


def _state(central: Device) -> _CentralState:
    state = _STATES.get(central)
    if state is None:
        state = _STATES[central] = _CentralState()
    return state


def _require_central(kwargs: dict[str, Any], who: str) -> Device:
    central = kwargs.pop("central", None)
    if not isinstance(central, Device):
        raise BleakError(f"{who} needs central=<a powered-on bumble Device>, got {central!r}")
    return central


def bleak_uuid(u: core.UUID) -> str:
    """A bumble UUID as bleak spells it: lowercase 128-bit with dashes."""
    return str(uuid_mod.UUID(bytes=bytes(reversed(u.to_bytes(force_128=True)))))


def _address_text(address: hci.Address) -> str:
    return str(address).split("/")[0].upper()


class BumbleBleakClient(BaseBleakClient):
    """`BaseBleakClient` over a bumble central: pass ``central=`` through `BleakClient`."""

    def __init__(self, address_or_ble_device: BLEDevice | str, **kwargs: Any) -> None:
        self._central = _require_central(kwargs, "BumbleBleakClient")
        for platform_only in ("bluez", "winrt", "services"):
            kwargs.pop(platform_only, None)
        self._mtu_request = int(kwargs.pop("mtu", DEFAULT_MTU))
        super().__init__(
            address_or_ble_device,
            disconnected_callback=kwargs.pop("disconnected_callback", None),
            timeout=float(kwargs.pop("timeout", 10.0)),
        )
        if kwargs:
            raise BleakError(f"BumbleBleakClient: unknown arguments {sorted(kwargs)}")
        self._name = (
            address_or_ble_device.name
            if isinstance(address_or_ble_device, BLEDevice) and address_or_ble_device.name
            else self.address
        )
        self._connection: Connection | None = None
        self._peer: Peer | None = None
        self._gone: asyncio.Future[None] | None = None
        self._closing = False
        self._subscribers: dict[int, Callable[[bytes], None]] = {}

    # -- connectivity ------------------------------------------------------------------

    @property
    def name(self) -> str:
        return self._name

    @property
    def mtu_size(self) -> int:
        conn = self._connection
        return conn.att_mtu if conn is not None else att.ATT_DEFAULT_MTU

    @property
    def is_connected(self) -> bool:
        return self._connection is not None

    async def connect(self, pair: bool, **kwargs: Any) -> None:
        """Connect, exchange the MTU and discover every service.

        Raises `BleakDeviceNotFoundError` when nothing at the address answers within the
        client's timeout, `BleakError` when the link fails during set-up.
        """
        if pair:
            logger.info("%s: pairing not supported on the virtual link, ignored", self.address)
        if self._connection is not None:
            return
        try:
            peer_address = hci.Address(self.address)
        except (ValueError, core.InvalidArgumentError) as exc:
            raise BleakError(f"not a Bluetooth address: {self.address!r}") from exc
        async with _state(self._central).connect_lock:
            try:
                conn = await self._central.connect(peer_address, timeout=self._timeout)
            except core.TimeoutError as exc:
                raise BleakDeviceNotFoundError(
                    self.address, f"{self.address} did not answer within {self._timeout} s"
                ) from exc
            except (core.BaseBumbleError, hci.HCI_Error) as exc:
                raise BleakError(f"connecting to {self.address} failed: {exc}") from exc
        self._connection = conn
        self._closing = False
        gone: asyncio.Future[None] = asyncio.get_running_loop().create_future()
        self._gone = gone
        conn.on(conn.EVENT_DISCONNECTION, lambda reason: self._on_disconnection(conn, reason))
        self._peer = Peer(conn)
        try:
            await self._guard(self._peer.request_mtu(self._mtu_request))
            self.services = await self._guard(self._discover(self._peer))
        except BaseException:
            with contextlib.suppress(Exception):
                await self.disconnect()
            raise
        logger.info("%s: connected, MTU %d", self.address, conn.att_mtu)

    def _on_disconnection(self, conn: Connection, reason: int) -> None:
        if conn is not self._connection:
            return
        self._connection = None
        self._peer = None
        self._subscribers.clear()
        if self._gone is not None and not self._gone.done():
            self._gone.set_result(None)
        logger.info("%s: disconnected (reason 0x%02X)", self.address, reason)
        if not self._closing and self._disconnected_callback is not None:
            asyncio.get_running_loop().call_soon(self._disconnected_callback)

    async def disconnect(self) -> None:
        """End the connection (no-op when not connected); returns once it is down."""
        conn, gone = self._connection, self._gone
        if conn is None or gone is None:
            return
        self._closing = True
        with contextlib.suppress(core.BaseBumbleError):
            await conn.disconnect()
        try:
            async with asyncio.timeout(_DISCONNECT_TIMEOUT_S):
                await asyncio.shield(gone)
        except TimeoutError:
            # The controller never confirmed (its hub process died): forget the link.
            logger.warning("%s: no disconnection confirmed, dropping the link", self.address)
            self._on_disconnection(conn, hci.HCI_CONNECTION_TIMEOUT_ERROR)

    async def pair(self, *args: Any, **kwargs: Any) -> None:
        raise BleakError("the virtual wrench link has no security to pair with")

    async def unpair(self) -> None:
        raise BleakError("the virtual wrench link has no security to unpair from")

    # -- discovery -----------------------------------------------------------------------

    async def _discover(self, peer: Peer) -> BleakGATTServiceCollection:
        collection = BleakGATTServiceCollection()
        for svc in await peer.discover_services():
            service = BleakGATTService(svc, svc.handle, bleak_uuid(svc.uuid))
            collection.add_service(service)
            for chp in await peer.discover_characteristics(service=svc):
                props: list[CharacteristicPropertyName] = [
                    name for bit, name in CHARACTERISTIC_PROPERTIES.items() if chp.properties & bit
                ]
                char = BleakGATTCharacteristic(
                    chp,
                    chp.handle,
                    bleak_uuid(chp.uuid),
                    props,
                    lambda: self.mtu_size - _ATT_HEADER,
                    service,
                )
                collection.add_characteristic(char)
                for dsc in await peer.discover_descriptors(characteristic=chp):
                    collection.add_descriptor(
                        BleakGATTDescriptor(dsc, dsc.handle, bleak_uuid(dsc.type), char)
                    )
        return collection

    # -- I/O -----------------------------------------------------------------------------

    async def _guard(self, request: Awaitable[_T]) -> _T:
        """Run one GATT request; a disconnection or an ATT error becomes a bleak error."""
        gone = self._gone
        if self._connection is None or gone is None:
            if asyncio.iscoroutine(request):
                request.close()
            raise BleakError(f"{self.address}: not connected")
        task = asyncio.ensure_future(request)
        waiters: set[asyncio.Future[Any]] = {task, gone}
        try:
            await asyncio.wait(waiters, return_when=asyncio.FIRST_COMPLETED)
        except asyncio.CancelledError:
            # The caller gave up (its own timeout, a shutdown): the request must not live on
            # unowned and finish, or fail unobserved, after its caller is gone.
            task.cancel()
            raise
        if not task.done():
            task.cancel()
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await task
            raise BleakError(f"{self.address}: disconnected during a GATT request")
        try:
            return task.result()
        except att.ATT_Error as exc:
            raise BleakGATTProtocolError(exc.error_code) from exc
        except core.TimeoutError as exc:
            raise TimeoutError(f"{self.address}: GATT request timed out") from exc

    def _proxy(self, item: BleakGATTCharacteristic | BleakGATTDescriptor) -> Any:
        if self._peer is None:
            raise BleakError(f"{self.address}: not connected")
        return item.obj

    async def read_gatt_char(
        self, characteristic: BleakGATTCharacteristic, *, use_cached: bool = False, **kwargs: Any
    ) -> bytearray:
        proxy: CharacteristicProxy[bytes] = self._proxy(characteristic)
        return bytearray(await self._guard(proxy.read_value()))

    async def read_gatt_descriptor(
        self, descriptor: BleakGATTDescriptor, *, use_cached: bool = False, **kwargs: Any
    ) -> bytearray:
        proxy: DescriptorProxy = self._proxy(descriptor)
        return bytearray(await self._guard(proxy.read_value()))

    async def write_gatt_char(
        self, characteristic: BleakGATTCharacteristic, data: SizedBuffer, response: bool
    ) -> None:
        proxy: CharacteristicProxy[bytes] = self._proxy(characteristic)
        await self._guard(proxy.write_value(bytes(data), with_response=response))

    async def write_gatt_descriptor(
        self, descriptor: BleakGATTDescriptor, data: SizedBuffer
    ) -> None:
        proxy: DescriptorProxy = self._proxy(descriptor)
        await self._guard(proxy.write_value(bytes(data), with_response=True))

    async def start_notify(
        self, characteristic: BleakGATTCharacteristic, callback: NotifyCallback, **kwargs: Any
    ) -> None:
        proxy: CharacteristicProxy[bytes] = self._proxy(characteristic)

        # bleak hands callbacks a bytearray; the bumble subscriber is remembered per
        # handle so stop_notify removes exactly this one.
        def deliver(value: bytes) -> None:
            callback(bytearray(value))

        client = self._peer_client()
        old = self._subscribers.pop(proxy.handle, None)
        if old is not None:
            await self._guard(client.unsubscribe(proxy, old))
        self._subscribers[proxy.handle] = deliver
        await self._guard(client.subscribe(proxy, deliver, prefer_notify=True))

    async def stop_notify(self, characteristic: BleakGATTCharacteristic) -> None:
        proxy: CharacteristicProxy[bytes] = self._proxy(characteristic)
        deliver = self._subscribers.pop(proxy.handle, None)
        await self._guard(self._peer_client().unsubscribe(proxy, deliver))

    def _peer_client(self) -> Any:
        if self._peer is None:
            raise BleakError(f"{self.address}: not connected")
        return self._peer.gatt_client


class BumbleBleakScanner(BaseBleakScanner):
    """`BaseBleakScanner` over a bumble central: pass ``central=`` through `BleakScanner`."""

    def __init__(
        self,
        detection_callback: Callable[[BLEDevice, AdvertisementData], Any] | None,
        service_uuids: list[str] | None,
        scanning_mode: str = "active",
        **kwargs: Any,
    ) -> None:
        super().__init__(detection_callback, service_uuids)
        self._central = _require_central(kwargs, "BumbleBleakScanner")
        for platform_only in ("bluez", "cb"):
            kwargs.pop(platform_only, None)
        if kwargs:
            raise BleakError(f"BumbleBleakScanner: unknown arguments {sorted(kwargs)}")
        if scanning_mode not in ("active", "passive"):
            raise BleakError(f"scanning_mode must be 'active' or 'passive', not {scanning_mode!r}")
        self._active = scanning_mode == "active"
        self._scanning = False

    async def start(self) -> None:
        if self._scanning:
            return
        self.seen_devices = {}
        self._central.on(self._central.EVENT_ADVERTISEMENT, self._on_advertisement)
        state = _state(self._central)
        state.scanners += 1
        self._scanning = True
        if not self._central.is_scanning:
            await self._central.start_scanning(active=self._active, filter_duplicates=False)

    async def stop(self) -> None:
        if not self._scanning:
            return
        self._scanning = False
        self._central.remove_listener(self._central.EVENT_ADVERTISEMENT, self._on_advertisement)
        state = _state(self._central)
        state.scanners -= 1
        if state.scanners == 0 and self._central.is_scanning:
            await self._central.stop_scanning()

    def _on_advertisement(self, adv: Advertisement) -> None:
        data = adv.data
        uuids = [
            bleak_uuid(u)
            for kind in (
                AdvertisingData.COMPLETE_LIST_OF_16_BIT_SERVICE_CLASS_UUIDS,
                AdvertisingData.INCOMPLETE_LIST_OF_16_BIT_SERVICE_CLASS_UUIDS,
                AdvertisingData.COMPLETE_LIST_OF_128_BIT_SERVICE_CLASS_UUIDS,
                AdvertisingData.INCOMPLETE_LIST_OF_128_BIT_SERVICE_CLASS_UUIDS,
            )
            for group in data.get_all(kind)
            for u in (group if isinstance(group, list) else [group])
        ]
        uuids = list(dict.fromkeys(uuids))
        if not self.is_allowed_uuid(uuids):
            return
        name = data.get(AdvertisingData.COMPLETE_LOCAL_NAME) or data.get(
            AdvertisingData.SHORTENED_LOCAL_NAME
        )
        local_name = name if isinstance(name, str) else None
        manufacturer = {
            company: bytes(payload)
            for company, payload in data.get_all(AdvertisingData.MANUFACTURER_SPECIFIC_DATA)
        }
        tx = data.get(AdvertisingData.TX_POWER_LEVEL)
        ad = AdvertisementData(
            local_name=local_name,
            manufacturer_data=manufacturer,
            service_data={},
            service_uuids=uuids,
            tx_power=tx if isinstance(tx, int) else None,
            rssi=adv.rssi,
            platform_data=(adv,),
        )
        address = _address_text(adv.address)
        device = self.create_or_update_device(address, address, local_name, adv, ad)
        self.call_detection_callbacks(device, ad)
