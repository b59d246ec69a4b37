"""Byte encoders for the wrench sensor profile v1, written from the text of protocol/PROFILE.md.

Why a second codec: the simulator must be an independent truth. This encoder is written from
the profile text alone and never imports the protocol package's decoder, so a misreading of
the profile cannot hide in both ends at once; tests decode these bytes with the real decoder.

Layouts (all little-endian):
- samples frame: ``<BBHIHBBff`` header (20 bytes) + ``count`` × ``<hhhh`` samples;
- info value: ``<B16sfHff8s`` (39 bytes);
- control writes: opcode byte + parameters.

Encoders check every "must" of the profile and raise :class:`EncodeError` (the caller's
input) instead of emitting a frame a receiver would reject.
"""

from __future__ import annotations

import enum
import math
import struct

import numpy as np
import numpy.typing as npt

__all__ = [
    "FRAME_HEADER_SIZE",
    "INFO_SIZE",
    "MAX_SAMPLES_PER_NOTIFICATION",
    "PROFILE_VERSION",
    "RESERVED_COUNT",
    "CuePattern",
    "EncodeError",
    "FrameFlags",
    "Opcode",
    "encode_control",
    "encode_cue",
    "encode_frame",
    "encode_info",
    "encode_set_rate",
]

PROFILE_VERSION = 1
_HEADER = struct.Struct("<BBHIHBBff")
_INFO = struct.Struct("<B16sfHff8s")
FRAME_HEADER_SIZE = _HEADER.size  # 20 per PROFILE.md
INFO_SIZE = _INFO.size  # 39 per PROFILE.md
# (247-byte MTU − 3 bytes ATT header − 20-byte frame header) / 8 bytes per sample (PROFILE.md)
MAX_SAMPLES_PER_NOTIFICATION = 28
RESERVED_COUNT = -32768  # "no valid reading", must never be sent
_MIN_PERIOD_US = 100  # ≤ 10 kHz (PROFILE.md)


class EncodeError(ValueError):
    """A field value the profile forbids (the caller's mistake, never the wire's)."""


class FrameFlags(enum.IntFlag):
    """Frame flag bits, PROFILE.md; bits 4–7 are reserved and never set."""

    NONE = 0
    OVERLOAD = 1 << 0
    GYRO_SATURATED = 1 << 1
    CLOCK_RESET = 1 << 2
    LOW_BATTERY = 1 << 3


class Opcode(enum.IntEnum):
    """Control characteristic opcodes, PROFILE.md."""

    START_STREAM = 0x01
    STOP_STREAM = 0x02
    SET_RATE = 0x03
    ZERO_TORQUE = 0x04
    CUE = 0x05


class CuePattern(enum.IntEnum):
    """Cue patterns the tool can play, PROFILE.md."""

    APPROACH = 1
    STOP = 2
    OK = 3
    NOK = 4
    LOCKED = 5


def encode_frame(
    *,
    flags: FrameFlags,
    sequence: int,
    timestamp_us: int,
    period_us: int,
    torque_scale: float,
    rate_scale: float,
    samples: npt.ArrayLike,
) -> bytes:
    """One samples notification. ``samples`` has shape (count, 4): torque, rate x, y, z counts."""
    counts = np.asarray(samples)
    if counts.ndim != 2 or counts.shape[1] != 4:
        raise EncodeError(f"samples must have shape (count, 4), got {counts.shape}")
    count = counts.shape[0]
    if not 1 <= count <= 255:
        raise EncodeError(f"count must lie in 1..255, got {count}")
    if not np.issubdtype(counts.dtype, np.integer):
        raise EncodeError(f"samples must be integer counts, got {counts.dtype}")
    if counts.min() <= RESERVED_COUNT or counts.max() > 32767:
        raise EncodeError("sample counts must lie in -32767..32767 (-32768 is reserved)")
    if int(flags) & ~0x0F:
        raise EncodeError(f"reserved flag bits set: {int(flags):#04x}")
    if not 0 <= sequence <= 0xFFFF:
        raise EncodeError(f"sequence must be a u16, got {sequence}")
    if not 0 <= timestamp_us <= 0xFFFF_FFFF:
        raise EncodeError(f"timestamp_us must be a u32, got {timestamp_us}")
    if not _MIN_PERIOD_US <= period_us <= 0xFFFF:
        raise EncodeError(f"period_us must lie in {_MIN_PERIOD_US}..65535, got {period_us}")
    _check_scale("torque_scale", torque_scale)
    _check_scale("rate_scale", rate_scale)
    header = _HEADER.pack(
        PROFILE_VERSION,
        int(flags),
        sequence,
        timestamp_us,
        period_us,
        count,
        0,
        torque_scale,
        rate_scale,
    )
    return header + counts.astype("<i2").tobytes()


def _check_scale(name: str, value: float) -> None:
    # The scale travels as f32: it must still be finite and > 0 after rounding to f32.
    as_f32 = struct.unpack("<f", struct.pack("<f", value))[0] if math.isfinite(value) else value
    if not (math.isfinite(as_f32) and as_f32 > 0.0):
        raise EncodeError(f"{name} must be finite and > 0 as f32, got {value!r}")


def encode_info(
    *,
    serial: str,
    torque_max_nm: float,
    sample_rate_hz: int,
    torque_scale: float,
    rate_scale: float,
    firmware: str,
) -> bytes:
    """The 39-byte info characteristic value."""
    serial_b = _ascii_field("serial", serial, 16)
    firmware_b = _ascii_field("firmware", firmware, 8)
    if not (math.isfinite(torque_max_nm) and torque_max_nm > 0.0):
        raise EncodeError(f"torque_max_nm must be finite and > 0, got {torque_max_nm!r}")
    if not 0 <= sample_rate_hz <= 0xFFFF:
        raise EncodeError(f"sample_rate_hz must be a u16, got {sample_rate_hz}")
    _check_scale("torque_scale", torque_scale)
    _check_scale("rate_scale", rate_scale)
    return _INFO.pack(
        PROFILE_VERSION,
        serial_b,
        torque_max_nm,
        sample_rate_hz,
        torque_scale,
        rate_scale,
        firmware_b,
    )


def _ascii_field(name: str, text: str, size: int) -> bytes:
    try:
        raw = text.encode("ascii")
    except UnicodeEncodeError as exc:
        raise EncodeError(f"{name} must be ASCII, got {text!r}") from exc
    if len(raw) > size or b"\x00" in raw:
        raise EncodeError(f"{name} must be at most {size} ASCII bytes without NUL, got {text!r}")
    return raw.ljust(size, b"\x00")


def encode_control(opcode: Opcode) -> bytes:
    """A parameterless control write (START_STREAM, STOP_STREAM, ZERO_TORQUE)."""
    if opcode in (Opcode.SET_RATE, Opcode.CUE):
        raise EncodeError(f"{opcode.name} takes parameters; use its own encoder")
    return bytes([opcode])


def encode_set_rate(rate_hz: int) -> bytes:
    """SET_RATE write; the range check is the sensor's job, so any u16 is encodable."""
    if not 0 <= rate_hz <= 0xFFFF:
        raise EncodeError(f"rate must be a u16, got {rate_hz}")
    return struct.pack("<BH", Opcode.SET_RATE, rate_hz)


def encode_cue(pattern: int, duration_ms: int) -> bytes:
    """CUE write: u8 pattern, u16 duration in ms."""
    if not 0 <= pattern <= 0xFF or not 0 <= duration_ms <= 0xFFFF:
        raise EncodeError(
            f"cue pattern must be a u8 and duration a u16, got {pattern}, {duration_ms}"
        )
    return struct.pack("<BBH", Opcode.CUE, pattern, duration_ms)
