"""The virtual wrench as a real GATT server on bumble, and a bleak backend on bumble.

Importing this package imports bumble (0.3–0.45 s on a small board, measured), so the
daemon's production path never imports it; tests, the demo and ``clampd simulate`` do.
"""

from clampd.simulators.ble._bleak_backend import BumbleBleakClient, BumbleBleakScanner
from clampd.simulators.ble._peripheral import (
    CONTROL_UUID,
    INFO_UUID,
    SAMPLES_UUID,
    SERVICE_UUID,
    FrameSource,
    PeripheralError,
    SizedFrameSource,
    WrenchIdentity,
    WrenchPeripheral,
)
from clampd.simulators.ble._rig import (
    BumbleCentral,
    HciHub,
    HciSpecError,
    VirtualAir,
    VirtualController,
    open_central,
    parse_tcp_server_spec,
)
from clampd.simulators.ble._standalone import (
    StandaloneError,
    StandaloneWrench,
    address_for_name,
    serve_wrench,
)

__all__ = [
    "CONTROL_UUID",
    "INFO_UUID",
    "SAMPLES_UUID",
    "SERVICE_UUID",
    "BumbleBleakClient",
    "BumbleBleakScanner",
    "BumbleCentral",
    "FrameSource",
    "HciHub",
    "HciSpecError",
    "PeripheralError",
    "SizedFrameSource",
    "StandaloneError",
    "StandaloneWrench",
    "VirtualAir",
    "VirtualController",
    "WrenchIdentity",
    "WrenchPeripheral",
    "address_for_name",
    "open_central",
    "parse_tcp_server_spec",
    "serve_wrench",
]
