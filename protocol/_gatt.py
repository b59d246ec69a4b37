"""GATT records of the clampd wrench sensor profile v1: UUIDs, control commands, the info record.

Theory of operation: the control characteristic takes one opcode byte and fixed parameters;
the info characteristic is a fixed 39-byte record (both in ``PROFILE.md``). Commands are a
closed union of frozen dataclasses so that a ``match`` over ``ControlCommand`` is checked for
completeness by mypy. The same validation serves both directions: the daemon encodes commands
for a real wrench and the virtual wrench decodes them, answering a bad write with the ATT
application error the profile assigns (``ControlError.att_code``: 0x80 bad opcode or length,
0x81 value out of range).

Errors: ``ControlError`` and ``InfoError`` are ``ValueError`` subclasses. From a decoder they
are the peer's fault; from an encoder or a record's constructor they are the caller's.
"""

from __future__ import annotations

import dataclasses
import enum
import math
import struct
from typing import Final

__all__ = [
    "ATT_BAD_COMMAND",
    "ATT_OUT_OF_RANGE",
    "BATTERY_LEVEL_UUID",
    "BATTERY_SERVICE_UUID",
    "CONTROL_UUID",
    "DEVICE_INFORMATION_SERVICE_UUID",
    "FIRMWARE_REVISION_UUID",
    "INFO_LENGTH",
    "INFO_UUID",
    "MANUFACTURER_NAME_UUID",
    "MAX_SAMPLE_RATE_HZ",
    "MIN_SAMPLE_RATE_HZ",
    "MODEL_NUMBER_UUID",
    "SAMPLES_UUID",
    "SERIAL_NUMBER_UUID",
    "SERVICE_UUID",
    "ControlCommand",
    "ControlError",
    "ControlOpcode",
    "Cue",
    "CuePattern",
    "InfoError",
    "SetRate",
    "StartStream",
    "StopStream",
    "WrenchInfo",
    "ZeroTorque",
    "decode_control",
    "decode_info",
    "encode_control",
    "encode_cue",
    "encode_info",
    "encode_set_rate",
    "encode_start",
    "encode_stop",
    "encode_zero",
]

# PROFILE.md, services and characteristics. Lowercase, as bleak expects 128-bit UUID strings.
SERVICE_UUID: Final = "6c616d70-0001-4d71-b0a1-7d5c3e2f1a00"
SAMPLES_UUID: Final = "6c616d70-0002-4d71-b0a1-7d5c3e2f1a00"
CONTROL_UUID: Final = "6c616d70-0003-4d71-b0a1-7d5c3e2f1a00"
INFO_UUID: Final = "6c616d70-0004-4d71-b0a1-7d5c3e2f1a00"


def _sig(short: int) -> str:
    # Bluetooth Core Specification, Vol 3 Part B §2.5.1: 16-bit UUIDs live in the Base UUID.
    return f"0000{short:04x}-0000-1000-8000-00805f9b34fb"


# Bluetooth SIG Assigned Numbers (services 0x180F, 0x180A; characteristics 0x2A19, 0x2A24-0x2A29).
BATTERY_SERVICE_UUID: Final = _sig(0x180F)
BATTERY_LEVEL_UUID: Final = _sig(0x2A19)
DEVICE_INFORMATION_SERVICE_UUID: Final = _sig(0x180A)
MANUFACTURER_NAME_UUID: Final = _sig(0x2A29)
MODEL_NUMBER_UUID: Final = _sig(0x2A24)
SERIAL_NUMBER_UUID: Final = _sig(0x2A25)
FIRMWARE_REVISION_UUID: Final = _sig(0x2A26)

# PROFILE.md, control characteristic: ATT application error codes (Core Spec Vol 3 Part F
# §3.4.1.1 reserves 0x80-0x9F for the application).
ATT_BAD_COMMAND: Final = 0x80
ATT_OUT_OF_RANGE: Final = 0x81
# PROFILE.md, SET_RATE: u16 sample rate, 250-4000 Hz.
MIN_SAMPLE_RATE_HZ: Final = 250
MAX_SAMPLE_RATE_HZ: Final = 4000
_U16_MAX: Final = 0xFFFF


class ControlOpcode(enum.IntEnum):
    """First byte of a write to the control characteristic."""

    START_STREAM = 0x01
    STOP_STREAM = 0x02
    SET_RATE = 0x03
    ZERO_TORQUE = 0x04
    CUE = 0x05


class CuePattern(enum.IntEnum):
    """What the tool plays (buzzer, LED, vibration), as numbered in PROFILE.md."""

    APPROACH = 1
    STOP = 2
    OK = 3
    NOK = 4
    LOCKED = 5


class ControlError(ValueError):
    """A control write the profile does not allow; ``att_code`` is the ATT error to answer with."""

    def __init__(self, message: str, *, att_code: int) -> None:
        super().__init__(message)
        self.att_code = att_code


@dataclasses.dataclass(frozen=True, slots=True)
class StartStream:
    """Start sending sample frames."""

    opcode = ControlOpcode.START_STREAM

    def encode(self) -> bytes:
        """Bytes to write to the control characteristic."""
        return bytes((self.opcode,))


@dataclasses.dataclass(frozen=True, slots=True)
class StopStream:
    """Stop sending sample frames."""

    opcode = ControlOpcode.STOP_STREAM

    def encode(self) -> bytes:
        """Bytes to write to the control characteristic."""
        return bytes((self.opcode,))


@dataclasses.dataclass(frozen=True, slots=True)
class ZeroTorque:
    """Take the current torque reading as zero; the tool must be unloaded."""

    opcode = ControlOpcode.ZERO_TORQUE

    def encode(self) -> bytes:
        """Bytes to write to the control characteristic."""
        return bytes((self.opcode,))


_SET_RATE: Final = struct.Struct("<BH")
_CUE: Final = struct.Struct("<BBH")


@dataclasses.dataclass(frozen=True, slots=True)
class SetRate:
    """Change the sample rate; the next frame carries the new period."""

    hz: int
    opcode = ControlOpcode.SET_RATE

    def __post_init__(self) -> None:
        if isinstance(self.hz, bool) or not isinstance(self.hz, int):
            raise ControlError(
                f"sample rate must be an int, got {self.hz!r}", att_code=ATT_OUT_OF_RANGE
            )
        if not MIN_SAMPLE_RATE_HZ <= self.hz <= MAX_SAMPLE_RATE_HZ:
            raise ControlError(
                f"sample rate {self.hz} Hz is outside {MIN_SAMPLE_RATE_HZ}-{MAX_SAMPLE_RATE_HZ} Hz",
                att_code=ATT_OUT_OF_RANGE,
            )

    def encode(self) -> bytes:
        """Bytes to write to the control characteristic."""
        return _SET_RATE.pack(self.opcode, self.hz)


@dataclasses.dataclass(frozen=True, slots=True)
class Cue:
    """Play a cue pattern on the tool for ``duration_ms`` milliseconds."""

    pattern: CuePattern
    duration_ms: int
    opcode = ControlOpcode.CUE

    def __post_init__(self) -> None:
        if not isinstance(self.pattern, CuePattern):
            raise ControlError(
                f"cue pattern must be a CuePattern, got {self.pattern!r}",
                att_code=ATT_OUT_OF_RANGE,
            )
        if isinstance(self.duration_ms, bool) or not isinstance(self.duration_ms, int):
            raise ControlError(
                f"cue duration must be an int, got {self.duration_ms!r}", att_code=0x81
            )
        if not 0 <= self.duration_ms <= _U16_MAX:
            raise ControlError(
                f"cue duration {self.duration_ms} ms is outside 0-{_U16_MAX} ms",
                att_code=ATT_OUT_OF_RANGE,
            )

    def encode(self) -> bytes:
        """Bytes to write to the control characteristic."""
        return _CUE.pack(self.opcode, self.pattern, self.duration_ms)


ControlCommand = StartStream | StopStream | SetRate | ZeroTorque | Cue


def encode_start() -> bytes:
    """``START_STREAM`` as written to the control characteristic."""
    return StartStream().encode()


def encode_stop() -> bytes:
    """``STOP_STREAM`` as written to the control characteristic."""
    return StopStream().encode()


def encode_set_rate(hz: int) -> bytes:
    """``SET_RATE``; ``ControlError`` (0x81) when ``hz`` is outside 250-4000."""
    return SetRate(hz).encode()


def encode_zero() -> bytes:
    """``ZERO_TORQUE`` as written to the control characteristic."""
    return ZeroTorque().encode()


def encode_cue(pattern: CuePattern, duration_ms: int) -> bytes:
    """``CUE``; ``ControlError`` (0x81) for a duration outside a u16."""
    return Cue(pattern, duration_ms).encode()


def encode_control(command: ControlCommand) -> bytes:
    """Any command's bytes (the same as its ``encode()``)."""
    return command.encode()


# Total write length per opcode (opcode byte included), PROFILE.md.
_LENGTHS: Final = {
    ControlOpcode.START_STREAM: 1,
    ControlOpcode.STOP_STREAM: 1,
    ControlOpcode.SET_RATE: 3,
    ControlOpcode.ZERO_TORQUE: 1,
    ControlOpcode.CUE: 4,
}


def decode_control(data: bytes | bytearray | memoryview) -> ControlCommand:
    """Read a control write; ``ControlError`` carries the ATT code to answer a bad one with."""
    raw = bytes(data)
    if not raw:
        raise ControlError("empty control write", att_code=ATT_BAD_COMMAND)
    try:
        opcode = ControlOpcode(raw[0])
    except ValueError:
        raise ControlError(f"unknown opcode 0x{raw[0]:02x}", att_code=ATT_BAD_COMMAND) from None
    if len(raw) != _LENGTHS[opcode]:
        raise ControlError(
            f"{opcode.name} takes {_LENGTHS[opcode]} bytes, got {len(raw)}",
            att_code=ATT_BAD_COMMAND,
        )
    match opcode:
        case ControlOpcode.START_STREAM:
            return StartStream()
        case ControlOpcode.STOP_STREAM:
            return StopStream()
        case ControlOpcode.ZERO_TORQUE:
            return ZeroTorque()
        case ControlOpcode.SET_RATE:
            _, hz = _SET_RATE.unpack(raw)
            return SetRate(hz)
        case ControlOpcode.CUE:
            _, pattern, duration_ms = _CUE.unpack(raw)
            try:
                cue_pattern = CuePattern(pattern)
            except ValueError:
                raise ControlError(
                    f"cue pattern {pattern} is not one of 1-5", att_code=ATT_OUT_OF_RANGE
                ) from None
            return Cue(cue_pattern, duration_ms)


# PROFILE.md, info characteristic: u8 profile_version, 16 s serial, f32 torque_max_nm,
# u16 sample_rate_hz, f32 torque_scale, f32 rate_scale, 8 s firmware; little-endian, 39 bytes.
_INFO: Final = struct.Struct("<B16sfHff8s")
INFO_LENGTH: Final = _INFO.size
_SERIAL_LEN: Final = 16
_FIRMWARE_LEN: Final = 8


class InfoError(ValueError):
    """An info record the profile does not allow (names the field)."""

    def __init__(self, message: str, *, field: str) -> None:
        super().__init__(message)
        self.field = field


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class WrenchInfo:
    """What a wrench says about itself (info characteristic). Floats travel as f32."""

    profile_version: int
    serial: str
    torque_max_nm: float
    sample_rate_hz: int
    torque_scale: float
    rate_scale: float
    firmware: str

    def __post_init__(self) -> None:
        if not 0 <= self.profile_version <= 0xFF:
            raise InfoError("profile_version must fit a u8", field="profile_version")
        _check_text(self.serial, "serial", _SERIAL_LEN)
        _check_text(self.firmware, "firmware", _FIRMWARE_LEN)
        if not 0 <= self.sample_rate_hz <= _U16_MAX:
            raise InfoError(
                f"sample_rate_hz {self.sample_rate_hz} does not fit a u16", field="sample_rate_hz"
            )
        for name in ("torque_max_nm", "torque_scale", "rate_scale"):
            value = getattr(self, name)
            if not (value > 0.0 and math.isfinite(value)):
                raise InfoError(f"{name} is {value!r}; must be finite and > 0", field=name)


def _check_text(text: str, field: str, size: int) -> None:
    if not text.isascii() or "\x00" in text:
        raise InfoError(f"{field} {text!r} must be ASCII without NUL", field=field)
    if len(text) > size:
        raise InfoError(f"{field} {text!r} is longer than {size} bytes", field=field)


def encode_info(info: WrenchInfo) -> bytes:
    """The 39-byte info record (text NUL-padded; floats rounded to f32)."""
    try:
        return _INFO.pack(
            info.profile_version,
            info.serial.encode("ascii"),
            info.torque_max_nm,
            info.sample_rate_hz,
            info.torque_scale,
            info.rate_scale,
            info.firmware.encode("ascii"),
        )
    except OverflowError:
        raise InfoError("a value is too large for an f32", field="torque_max_nm") from None


def _read_text(raw: bytes, field: str) -> str:
    text, _, padding = raw.partition(b"\x00")
    if padding.strip(b"\x00"):
        raise InfoError(f"{field} has bytes after its NUL padding", field=field)
    try:
        return text.decode("ascii")
    except UnicodeDecodeError:
        raise InfoError(f"{field} is not ASCII", field=field) from None


def decode_info(data: bytes | bytearray | memoryview) -> WrenchInfo:
    """Read the info record; ``InfoError`` when its length or a field breaks the profile."""
    raw = bytes(data)
    if len(raw) != INFO_LENGTH:
        raise InfoError(f"info record is {len(raw)} bytes, expected {INFO_LENGTH}", field="length")
    version, serial, torque_max, rate_hz, torque_scale, rate_scale, firmware = _INFO.unpack(raw)
    return WrenchInfo(
        profile_version=version,
        serial=_read_text(serial, "serial"),
        torque_max_nm=torque_max,
        sample_rate_hz=rate_hz,
        torque_scale=torque_scale,
        rate_scale=rate_scale,
        firmware=_read_text(firmware, "firmware"),
    )
