"""One virtual wrench as a process of its own, reachable by a daemon in another process.

Theory of operation: with ``tcp-server:HOST:PORT`` the process owns the virtual link. Its
wrench sits on the link with an in-process controller and an `HciHub` serves the same link
on HOST:PORT, one fresh controller per TCP connection; the daemon (or a test) joins with
bumble's ``tcp-client:HOST:PORT`` transport (`open_central`). Any other bumble transport
spec (e.g. ``tcp-client:HOST:PORT`` to another wrench's hub) attaches this wrench's host
to that controller instead, so several wrench processes can share one link.

When ready, one line goes to stdout so a supervising process can wait for it::

    ready name=W-1 address=C0:DE:12:34:56:78 hci=tcp-client:127.0.0.1:40123

The wrench is `VirtualWrenchSensor` from the simulators: lying still (``idle``), or on a
bench where a simulated technician tightens an endless shift of M10 8.8 joints and
listens for the station's cues.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import hashlib
import itertools
import logging
import sys
from collections.abc import AsyncIterator, Callable, Iterator
from typing import TextIO

import numpy as np
from bumble import hci
from bumble.device import Device
from bumble.host import Host
from bumble.link import LocalLink
from bumble.transport import open_transport
from bumble.transport.common import AsyncPipeSink, TransportInitError

from clampd.simulators._joint import JointModel, JointPopulation
from clampd.simulators._operator import Bench, OperatorParams
from clampd.simulators._sensor import SensorParams, VirtualWrenchSensor
from clampd.simulators.ble._peripheral import WrenchIdentity, WrenchPeripheral
from clampd.simulators.ble._rig import (
    HciHub,
    HciSpecError,
    VirtualController,
    parse_tcp_server_spec,
)

__all__ = [
    "StandaloneError",
    "StandaloneWrench",
    "address_for_name",
    "install_stop_signals",
    "serve_wrench",
]

logger = logging.getLogger(__name__)

# Longest name that still fits a scan response next to nothing else (31 − 2 bytes, Core
# Supplement 1.2); longer names would be cut everywhere a central shows them.
MAX_NAME_LENGTH = 29
# The info characteristic's serial field is 16 ASCII bytes (protocol/PROFILE.md).
_SERIAL_LENGTH = 16
# SET_RATE range of protocol/PROFILE.md.
MIN_RATE_HZ, MAX_RATE_HZ = 250, 4000


class StandaloneError(ValueError):
    """A standalone wrench option we cannot honour (the caller's input)."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class StandaloneWrench:
    """What ``clampd simulate wrench`` was asked for, validated on construction."""

    hci: str = "tcp-server:127.0.0.1:0"
    name: str = "W-1"
    rate_hz: int = 1000
    seed: int = 1
    serial: str | None = None
    idle: bool = False
    duration_s: float | None = None

    def __post_init__(self) -> None:
        if not self.name or not self.name.isascii() or not self.name.isprintable():
            raise StandaloneError(f"--name must be printable ASCII, got {self.name!r}")
        if len(self.name) > MAX_NAME_LENGTH:
            raise StandaloneError(f"--name is at most {MAX_NAME_LENGTH} characters")
        if not MIN_RATE_HZ <= self.rate_hz <= MAX_RATE_HZ:
            raise StandaloneError(
                f"--rate must lie in {MIN_RATE_HZ}..{MAX_RATE_HZ} Hz, got {self.rate_hz}"
            )
        if self.duration_s is not None and not self.duration_s > 0:
            raise StandaloneError(f"--duration must be > 0 s, got {self.duration_s}")
        if self.serial is not None and not (
            0 < len(self.serial) <= _SERIAL_LENGTH
            and self.serial.isascii()
            and self.serial.isprintable()
        ):
            raise StandaloneError(
                f"--serial must be 1..{_SERIAL_LENGTH} printable ASCII characters"
            )
        if self.seed < 0:
            raise StandaloneError(f"--seed must be ≥ 0, got {self.seed}")
        if self.hci.startswith("tcp-server:"):
            try:
                parse_tcp_server_spec(self.hci)
            except HciSpecError as exc:
                raise StandaloneError(f"--hci: {exc}") from exc
        elif ":" not in self.hci:
            raise StandaloneError(f"--hci must look like TYPE:PARAMETERS, got {self.hci!r}")


def address_for_name(name: str) -> str:
    """A random static address derived from the name, so a wrench keeps its address
    across restarts and two wrenches with different names differ (top bits 11: Core spec
    Vol 6 Part B 1.3.2.1)."""
    digest = hashlib.blake2b(name.encode(), digest_size=4).digest()
    return "C0:DE:" + ":".join(f"{b:02X}" for b in digest)


def _sensor(cfg: StandaloneWrench) -> VirtualWrenchSensor:
    sensor_seq, bench_seq, joint_seq = np.random.SeedSequence(cfg.seed).spawn(3)
    params = SensorParams(
        serial=cfg.serial or f"SIM-{cfg.name}"[:16],
        sample_rate_hz=cfg.rate_hz,
    )
    if cfg.idle:
        return VirtualWrenchSensor(params, np.random.default_rng(sensor_seq))
    population = JointPopulation()
    joint_rng = np.random.default_rng(joint_seq)

    def shift() -> Iterator[JointModel]:
        for _ in itertools.count():
            yield population.draw(joint_rng)

    bench = Bench(
        shift(),
        OperatorParams(),
        np.random.default_rng(bench_seq),
        deflection_deg_per_nm=params.deflection_deg_per_nm,
    )
    return VirtualWrenchSensor(params, np.random.default_rng(sensor_seq), bench)


@contextlib.asynccontextmanager
async def _wrench_device(cfg: StandaloneWrench) -> AsyncIterator[tuple[Device, str]]:
    """The wrench's bumble device and the spec a central uses to reach it."""
    address = hci.Address(address_for_name(cfg.name))
    if cfg.hci.startswith("tcp-server:"):
        host, port = parse_tcp_server_spec(cfg.hci)
        link = LocalLink()  # type: ignore[no-untyped-call]
        ctrl = VirtualController(f"{cfg.name}-ctrl", link=link)
        device = Device(name=cfg.name, address=address, host=Host(ctrl, AsyncPipeSink(ctrl)))
        async with HciHub(link, host, port) as hub:
            yield device, hub.spec
        return
    try:
        transport = await open_transport(cfg.hci)
    except (ValueError, KeyError, TransportInitError) as exc:
        raise StandaloneError(f"--hci: cannot open {cfg.hci!r}: {exc}") from exc
    try:
        yield Device.with_hci(cfg.name, address, transport.source, transport.sink), cfg.hci
    finally:
        await transport.close()


async def serve_wrench(
    cfg: StandaloneWrench, *, stop: asyncio.Event | None = None, out: TextIO | None = None
) -> WrenchPeripheral:
    """Run the wrench until ``stop`` is set or ``cfg.duration_s`` passes; returns it (for
    its counters). Raises `StandaloneError` for a transport that cannot be opened and
    `OSError` for a port that cannot be bound."""
    stop = stop or asyncio.Event()
    out = out or sys.stdout
    source = _sensor(cfg)
    identity = WrenchIdentity(serial=source.params.serial, firmware=source.params.firmware)
    async with _wrench_device(cfg) as (device, spec):
        peripheral = WrenchPeripheral(device, source, name=cfg.name, identity=identity)
        async with peripheral:
            print(f"ready name={cfg.name} address={peripheral.address} hci={spec}", file=out)
            out.flush()
            with contextlib.suppress(TimeoutError):
                async with asyncio.timeout(cfg.duration_s):
                    await stop.wait()
            logger.info(
                "%s %s: stopping after %d notifications, %d connections",
                cfg.name,
                peripheral.address,
                peripheral.notifications_sent,
                peripheral.connections,
            )
    return peripheral


def install_stop_signals(stop: asyncio.Event) -> Callable[[], None]:
    """SIGINT/SIGTERM set ``stop``; returns a function that removes the handlers."""
    import signal

    loop = asyncio.get_running_loop()
    for sig in (signal.SIGINT, signal.SIGTERM):
        loop.add_signal_handler(sig, stop.set)

    def remove() -> None:
        for sig in (signal.SIGINT, signal.SIGTERM):
            loop.remove_signal_handler(sig)

    return remove
