"""Virtual air for virtual wrenches: bumble's in-process link, one controller per device,
and an HCI hub that lets devices in other processes join the same link over TCP.

Theory of operation:
- `VirtualAir` owns one `bumble.link.LocalLink`. Every device on it (a wrench, a central)
  gets its own `Controller`, created inside the running loop (bumble's controller grabs
  the loop at construction) with LE ACL packets of 251 bytes (the default 27 splits every
  244-byte notification into ten fragments: 4–5x slower, measured).
- `HciHub` serves the same link on a TCP port (H4 framing, bumble's wire format for
  ``tcp-client:`` transports). Each accepted TCP connection gets a *fresh* controller,
  whatever role the far host plays, so a central that restarts, or several processes
  (a daemon, more wrenches), can join at any time without inheriting stale controller
  state. When a TCP peer goes away its controller's links end as a radio would
  (supervision timeout, HCI 0x08) and the controller leaves the link.
- `BumbleCentral` is a powered-on bumble `Device` in the central role, in-process or
  attached to a hub through a bumble transport (`open_central`); its `bleak_kwargs()`
  and `bleak_scanner_kwargs()` are what unmodified bleak code needs to use it.

The radio itself is the only thing not real here: the link delivers at once and never
loses a packet, so the wrench paces itself and link loss is injected on purpose.
"""

from __future__ import annotations

import asyncio
import contextlib
import itertools
import logging
import socket
from collections.abc import AsyncIterator
from typing import TYPE_CHECKING, Any

from bumble import hci, ll
from bumble.controller import Controller
from bumble.device import Device
from bumble.host import Host
from bumble.link import LocalLink
from bumble.transport import open_transport
from bumble.transport.common import AsyncPipeSink, StreamPacketSource, TransportInitError

from clampd.simulators.ble._peripheral import (
    ADVERTISING_INTERVAL_MS,
    FrameSource,
    WrenchIdentity,
    WrenchPeripheral,
)

if TYPE_CHECKING:
    from bumble.transport.common import Transport

__all__ = [
    "BumbleCentral",
    "HciHub",
    "HciSpecError",
    "VirtualAir",
    "VirtualController",
    "open_central",
    "parse_tcp_server_spec",
]

logger = logging.getLogger(__name__)

# LE ACL payload per packet; 251 is the LE Data Length Extension maximum (Core spec
# Vol 6 Part B 4.5.10) and lets one 244-byte notification travel in one packet.
LE_ACL_LENGTH = 251
# Reason a hub gives the far side when a TCP-attached controller vanishes (supervision
# timeout: that is what a radio peer would observe).
_LINK_LOST_REASON = hci.HCI_CONNECTION_TIMEOUT_ERROR


class HciSpecError(ValueError):
    """A transport spec string that we cannot use (the caller's input)."""


def parse_tcp_server_spec(spec: str) -> tuple[str, int]:
    """``tcp-server:HOST:PORT`` -> (host, port); port 0 asks the OS for a free one."""
    kind, _, rest = spec.partition(":")
    host, _, port_text = rest.rpartition(":")
    if kind != "tcp-server" or not host or not port_text.isdigit():
        raise HciSpecError(f"expected tcp-server:HOST:PORT, got {spec!r}")
    port = int(port_text)
    if port > 0xFFFF:
        raise HciSpecError(f"port out of range in {spec!r}")
    return host, port


class VirtualController(Controller):
    """bumble's virtual controller with LE ACL packets of 251 bytes and a real
    connection-cancel: Core spec Vol 4 Part E 7.8.13 says a cancelled LE Create Connection
    ends with an LE Connection Complete event of status Unknown Connection Identifier.
    bumble 0.0.236 answers the cancel but never ends the attempt, so a connect to a wrench
    that is out of range hung forever and blocked every later connect on that central.
    """

    le_acl_data_packet_length = LE_ACL_LENGTH

    def on_hci_le_create_connection_cancel_command(
        self, command: hci.HCI_LE_Create_Connection_Cancel_Command
    ) -> hci.HCI_StatusReturnParameters:
        pending = self.pending_le_connection
        if pending is None:
            return hci.HCI_StatusReturnParameters(hci.HCI_ErrorCode.COMMAND_DISALLOWED_ERROR)
        self.pending_le_connection = None
        peer = pending.peer_address
        event = hci.HCI_LE_Connection_Complete_Event(
            status=hci.HCI_ErrorCode.UNKNOWN_CONNECTION_IDENTIFIER_ERROR,
            connection_handle=0,
            role=hci.Role.CENTRAL,
            peer_address_type=peer.address_type,
            peer_address=peer,
            connection_interval=0,
            peripheral_latency=0,
            supervision_timeout=0,
            central_clock_accuracy=0,
        )
        # Next loop turn: after the Command Complete built from the return value below.
        asyncio.get_running_loop().call_soon(self.send_hci_packet, event)
        return hci.HCI_StatusReturnParameters(hci.HCI_ErrorCode.SUCCESS)


def _new_controller(link: LocalLink, name: str) -> Controller:
    return VirtualController(name, link=link)


def _static_address(n: int) -> hci.Address:
    # Random static addresses have the two top bits set (Core spec Vol 6 Part B 1.3.2.1).
    return hci.Address(f"C0:DE:00:00:{(n >> 8) & 0xFF:02X}:{n & 0xFF:02X}")


class BumbleCentral:
    """A bumble `Device` in the central role that bleak can drive through our backend."""

    def __init__(self, device: Device) -> None:
        self.device = device

    def bleak_kwargs(self) -> dict[str, Any]:
        """Keyword arguments for ``BleakClient(address, **kwargs)``."""
        from clampd.simulators.ble._bleak_backend import BumbleBleakClient

        return {"backend": BumbleBleakClient, "central": self.device}

    def bleak_scanner_kwargs(self) -> dict[str, Any]:
        """Keyword arguments for ``BleakScanner(**kwargs)`` and its class methods."""
        from clampd.simulators.ble._bleak_backend import BumbleBleakScanner

        return {"backend": BumbleBleakScanner, "central": self.device}


class VirtualAir:
    """An in-process BLE link with wrenches and centrals on it.

    ``async with VirtualAir() as air``: `add_wrench` and `add_central` attach devices;
    leaving the block stops every wrench and powers every device off. `central` is a
    default central created on entry, so ``air.bleak_kwargs()`` works at once.
    """

    def __init__(self) -> None:
        self.link: LocalLink | None = None
        self.wrenches: list[WrenchPeripheral] = []
        self._devices: list[Device] = []
        self._stack = contextlib.AsyncExitStack()
        self._numbers = itertools.count(1)
        self._central: BumbleCentral | None = None

    async def __aenter__(self) -> VirtualAir:
        self.link = LocalLink()  # type: ignore[no-untyped-call]
        self._central = await self.add_central()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self._stack.aclose()
        for dev in self._devices:
            with contextlib.suppress(Exception):
                await dev.power_off()
        self._devices.clear()
        self.wrenches.clear()

    @property
    def central(self) -> BumbleCentral:
        if self._central is None:
            raise RuntimeError("VirtualAir used outside 'async with'")
        return self._central

    def bleak_kwargs(self) -> dict[str, Any]:
        """``BleakClient(address, **air.bleak_kwargs())`` on the default central."""
        return self.central.bleak_kwargs()

    def bleak_scanner_kwargs(self) -> dict[str, Any]:
        """``BleakScanner(**air.bleak_scanner_kwargs())`` on the default central."""
        return self.central.bleak_scanner_kwargs()

    def _attach(self, name: str, address: hci.Address) -> Device:
        if self.link is None:
            raise RuntimeError("VirtualAir used outside 'async with'")
        ctrl = _new_controller(self.link, name)
        dev = Device(name=name, address=address, host=Host(ctrl, AsyncPipeSink(ctrl)))
        self._devices.append(dev)
        return dev

    async def add_central(self) -> BumbleCentral:
        """A new powered-on central on this link (e.g. a second station)."""
        n = next(self._numbers)
        dev = self._attach(f"central-{n}", _static_address(n))
        await dev.power_on()
        return BumbleCentral(dev)

    async def add_wrench(
        self,
        source: FrameSource,
        *,
        name: str,
        identity: WrenchIdentity | None = None,
        advertising_interval_ms: float = ADVERTISING_INTERVAL_MS,
    ) -> WrenchPeripheral:
        """A wrench serving ``source``, powered on and advertising."""
        n = next(self._numbers)
        dev = self._attach(name, _static_address(n))
        wrench = WrenchPeripheral(
            dev,
            source,
            name=name,
            identity=identity,
            advertising_interval_ms=advertising_interval_ms,
        )
        await self._stack.enter_async_context(wrench)
        self.wrenches.append(wrench)
        return wrench


class _HubSink:
    """Controller -> TCP: writes H4 packets to the peer while it is there."""

    def __init__(self, transport: asyncio.Transport) -> None:
        self.transport: asyncio.Transport | None = transport

    def on_packet(self, packet: bytes) -> None:
        if self.transport is not None and not self.transport.is_closing():
            self.transport.write(packet)


class _HubProtocol(asyncio.Protocol):
    def __init__(self, hub: HciHub) -> None:
        self.hub = hub
        self.source = StreamPacketSource()
        self.sink: _HubSink | None = None
        self.controller: Controller | None = None

    def connection_made(self, transport: asyncio.BaseTransport) -> None:
        assert isinstance(transport, asyncio.Transport)
        self.sink = _HubSink(transport)
        self.controller = self.hub.attach(self.source, self.sink, transport)

    def data_received(self, data: bytes) -> None:
        self.source.data_received(data)

    def connection_lost(self, exc: Exception | None) -> None:
        if self.sink is not None:
            self.sink.transport = None
        if self.controller is not None:
            self.hub.detach(self.controller)
            self.controller = None


class HciHub:
    """Serves a `LocalLink` over TCP: one fresh controller per connecting host.

    ``async with HciHub(link, host, port)``; `port` after entry is the bound port (useful
    with port 0). Hosts connect with bumble's ``tcp-client:HOST:PORT`` transport.
    """

    def __init__(self, link: LocalLink, host: str = "127.0.0.1", port: int = 0) -> None:
        self.link = link
        self.host = host
        self.port = port
        self.controllers: list[Controller] = []
        self._server: asyncio.Server | None = None
        self._numbers = itertools.count(1)

    async def __aenter__(self) -> HciHub:
        # Created with IPPROTO_TCP so asyncio turns Nagle off on accepted sockets: with
        # Nagle on, small HCI packets stall ~40 ms (measured, NOTES-ble-mqtt.md).
        sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM, socket.IPPROTO_TCP)
        try:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            sock.bind((self.host, self.port))
        except OSError:
            sock.close()
            raise
        loop = asyncio.get_running_loop()
        self._server = await loop.create_server(lambda: _HubProtocol(self), sock=sock)
        self.port = sock.getsockname()[1]
        logger.info("HCI hub listening on tcp %s:%d", self.host, self.port)
        return self

    async def __aexit__(self, *exc: object) -> None:
        if self._server is not None:
            self._server.close()
            await self._server.wait_closed()
            self._server = None
        for ctrl in list(self.controllers):
            self.detach(ctrl)

    @property
    def spec(self) -> str:
        """The bumble transport spec a host uses to join this hub."""
        return f"tcp-client:{self.host}:{self.port}"

    def attach(
        self, source: StreamPacketSource, sink: _HubSink, transport: asyncio.Transport
    ) -> Controller:
        """A new controller on the link, fed by one TCP peer."""
        sock = transport.get_extra_info("socket")
        if sock is not None:
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        ctrl = VirtualController(
            f"hub-{next(self._numbers)}", host_source=source, host_sink=sink, link=self.link
        )
        self.controllers.append(ctrl)
        logger.info("HCI hub: host attached as %s", ctrl.name)
        return ctrl

    def detach(self, ctrl: Controller) -> None:
        """End the controller's links as a radio loss and take it off the link."""
        for conn in list(ctrl.le_connections.values()):
            with contextlib.suppress(Exception):
                conn.send_ll_control_pdu(ll.TerminateInd(_LINK_LOST_REASON))
                ctrl.on_le_disconnected(conn, _LINK_LOST_REASON)
        with contextlib.suppress(KeyError):
            self.link.remove_controller(ctrl)
        if ctrl in self.controllers:
            self.controllers.remove(ctrl)
        logger.info("HCI hub: host %s left", ctrl.name)


@contextlib.asynccontextmanager
async def open_central(
    spec: str, *, address: str = "C0:DE:00:00:FF:01"
) -> AsyncIterator[BumbleCentral]:
    """A central attached through a bumble transport (e.g. ``tcp-client:127.0.0.1:PORT``).

    Raises `HciSpecError` for a spec bumble does not know, and `OSError` when nothing
    listens there (both the caller's to fix).
    """
    try:
        transport: Transport = await open_transport(spec)
    except (ValueError, KeyError, TransportInitError) as exc:
        raise HciSpecError(f"cannot open HCI transport {spec!r}: {exc}") from exc
    try:
        dev = Device.with_hci(
            "clampd-central", hci.Address(address), transport.source, transport.sink
        )
        await dev.power_on()
        try:
            yield BumbleCentral(dev)
        finally:
            # Powering off a central whose hub is gone would wait out bumble's 10 s
            # command timeout for a reset nobody can answer.
            if not transport.source.terminated.done():
                with contextlib.suppress(Exception):
                    await dev.power_off()
    finally:
        await transport.close()
