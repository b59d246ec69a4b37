"""Samples frames of the clampd wrench sensor profile v1 (see ``PROFILE.md``), decoded in one step.

Theory of operation: a notification is a fixed 20-byte header and ``count`` samples of four
little-endian i16 each. The header goes through one precompiled ``struct.Struct``; the sample
block is viewed with ``numpy.frombuffer`` (no copy, no per-sample Python loop) and scaled by one
multiply into a fresh ``(count, 4)`` float64 block; ``torque_nm`` and ``rate_dps`` are read-only
views of its columns (not C-contiguous; ``np.ascontiguousarray`` where that matters). At 28
samples per frame the per-frame overhead dominates, so the fixed costs are kept small:
precomputed flag values, a cached dtype, a byte search before any sentinel reduction.

Invariants of a ``SampleFrame`` that come out of here: every "must" of the profile holds
(version 1, reserved bits and byte zero, period ≥ 100 µs, count ≥ 1, exact length, finite
positive scales, no −32768 sentinel), ``torque_nm`` has shape ``(count,)``, ``rate_dps`` has
shape ``(count, 3)``, and both arrays are read-only so a frame can be shared between tasks.

Errors: a frame that breaks a rule is the sensor's fault and raises a subclass of
``FrameError`` (a ``ValueError``) whose fields say what broke and at which byte offset; the
caller drops that one frame and keeps running. Passing something that is not a bytes-like
object is the caller's fault and raises ``TypeError``.
"""

from __future__ import annotations

import dataclasses
import enum
import math
import struct
from typing import Any, Final, Literal

import numpy as np
from numpy.typing import NDArray

__all__ = [
    "FRAME_HEADER_SIZE",
    "FRAME_SAMPLE_SIZE",
    "FRAME_VERSION",
    "MAX_SAMPLES_AT_MTU_247",
    "MIN_PERIOD_US",
    "NO_READING",
    "FrameError",
    "FrameFlags",
    "FrameLengthError",
    "FrameTooShortError",
    "FrameValueError",
    "FrameVersionError",
    "SampleFrame",
    "axis_rate",
    "decode_frame",
]

FRAME_VERSION: Final = 1
FRAME_HEADER_SIZE: Final = 20
FRAME_SAMPLE_SIZE: Final = 8
# PROFILE.md: period must be ≥ 100 µs (sample rates up to 10 kHz).
MIN_PERIOD_US: Final = 100
# PROFILE.md: the count value −32768 is reserved in every channel ("no valid reading").
NO_READING: Final = -32768
# (247 − 3 bytes of ATT notification header − 20) // 8 = 28 samples (PROFILE.md).
MAX_SAMPLES_AT_MTU_247: Final = 28

# version u8, flags u8, sequence u16, timestamp_us u32, period_us u16, count u8, reserved u8,
# torque_scale f32, rate_scale f32 — little-endian, no padding (PROFILE.md, samples frame).
_HEADER: Final = struct.Struct("<BBHIHBBff")
# One sample: four little-endian i16 (torque, rate_x, rate_y, rate_z); frombuffer yields (n, 4).
_SAMPLE_DTYPE: Final = np.dtype(("<i2", (4,)))
_NO_READING_BYTES: Final = struct.pack("<h", -32768)
_CHANNEL_NAMES: Final = ("torque", "rate_x", "rate_y", "rate_z")
_RESERVED_FLAG_BITS: Final = 0xF0


class FrameFlags(enum.IntFlag):
    """Status bits of a samples frame (header byte 1)."""

    OVERLOAD = 0x01
    """Torque went beyond the calibrated range somewhere in this frame."""
    GYRO_SATURATED = 0x02
    """A rotation rate hit the gyroscope's full scale in this frame; angle is a lower bound."""
    CLOCK_RESET = 0x04
    """The sensor's timestamp counter restarted since the previous frame."""
    LOW_BATTERY = 0x08
    """The tool asks for a charge soon; readings are still valid."""


# Building an IntFlag from an int costs about a microsecond; 16 values cover every legal byte.
_FLAG_VALUES: Final = tuple(FrameFlags(i) for i in range(16))


class FrameError(ValueError):
    """A samples frame broke the profile; the sensor's fault. Drop the frame, keep the link.

    ``offset`` is the byte offset of the offending field when one field is to blame.
    """

    def __init__(self, message: str, *, offset: int | None = None) -> None:
        super().__init__(message)
        self.offset = offset


class FrameTooShortError(FrameError):
    """Fewer bytes than a header needs."""

    def __init__(self, *, length: int, minimum: int) -> None:
        super().__init__(
            f"frame of {length} bytes is shorter than the {minimum}-byte header", offset=length
        )
        self.length = length
        self.minimum = minimum


class FrameVersionError(FrameError):
    """The version byte names a profile version this decoder does not speak."""

    def __init__(self, *, version: int, supported: int = FRAME_VERSION, offset: int = 0) -> None:
        super().__init__(
            f"frame version {version} at byte {offset} is not supported (expected {supported})",
            offset=offset,
        )
        self.version = version
        self.supported = supported


class FrameLengthError(FrameError):
    """The frame's length disagrees with the sample count its header announces."""

    def __init__(
        self, *, length: int, count: int, expected: int, count_offset: int | None = 10
    ) -> None:
        where = "" if count_offset is None else f" at byte {count_offset}"
        super().__init__(
            f"frame of {length} bytes announces {count} samples{where}, "
            f"which needs exactly {expected} bytes",
            offset=count_offset,
        )
        self.length = length
        self.count = count
        self.expected = expected


class FrameValueError(FrameError):
    """A field holds a value the profile forbids (names the field, its offset and value)."""

    def __init__(
        self,
        *,
        field: str,
        offset: int,
        value: float,
        rule: str,
        sample: int | None = None,
    ) -> None:
        where = f"sample {sample} " if sample is not None else ""
        super().__init__(
            f"{where}field {field} at byte {offset} is {value!r}; {rule}", offset=offset
        )
        self.field = field
        self.value = value
        self.rule = rule
        self.sample = sample


@dataclasses.dataclass(frozen=True, slots=True)
class SampleFrame:
    """One decoded notification: a run of evenly spaced samples from one wrench.

    Sample ``i`` was taken at sensor time ``timestamp_us + i * period_us`` (before any wrap
    handling; ``clampd.protocol.SampleClock`` makes that continuous). Torque is N·m, positive
    when tightening; rates are deg/s in the sensor's own x, y, z axes (see ``axis_rate``).
    """

    version: int
    flags: FrameFlags
    sequence: int
    timestamp_us: int
    period_us: int
    torque_nm: NDArray[np.float64]
    rate_dps: NDArray[np.float64]

    @property
    def count(self) -> int:
        """Number of samples in this frame."""
        return int(self.torque_nm.shape[0])


def _bytes_view(data: bytes | bytearray | memoryview) -> memoryview:
    if not isinstance(data, bytes | bytearray | memoryview):
        raise TypeError(f"a frame is bytes-like, got {type(data).__name__}")
    view = memoryview(data)
    if view.format != "B" or view.ndim != 1:
        # A typed or multi-dimensional view (e.g. of an array of u16) still carries the bytes.
        view = view.cast("B")
    return view


def decode_frame(data: bytes | bytearray | memoryview) -> SampleFrame:
    """Decode one samples notification; raise a ``FrameError`` subclass when it breaks the profile.

    The returned arrays are fresh float64 data (never views of ``data``), so the caller may
    reuse its receive buffer at once.
    """
    view = _bytes_view(data)
    length = len(view)
    if length == 0:
        raise FrameTooShortError(length=0, minimum=FRAME_HEADER_SIZE)
    if view[0] != FRAME_VERSION:
        # Checked before the length so that a future version with another header is named as such.
        raise FrameVersionError(version=view[0])
    if length < FRAME_HEADER_SIZE:
        raise FrameTooShortError(length=length, minimum=FRAME_HEADER_SIZE)
    (
        version,
        flags,
        sequence,
        timestamp_us,
        period_us,
        count,
        reserved,
        torque_scale,
        rate_scale,
    ) = _HEADER.unpack_from(view)
    if flags & _RESERVED_FLAG_BITS:
        raise FrameValueError(
            field="flags", offset=1, value=flags, rule="bits 4-7 are reserved and must be 0"
        )
    if period_us < MIN_PERIOD_US:
        raise FrameValueError(
            field="period_us", offset=8, value=period_us, rule=f"must be >= {MIN_PERIOD_US}"
        )
    if count == 0:
        raise FrameValueError(field="count", offset=10, value=0, rule="must be >= 1")
    if reserved:
        raise FrameValueError(field="reserved", offset=11, value=reserved, rule="must be 0")
    expected = FRAME_HEADER_SIZE + FRAME_SAMPLE_SIZE * count
    if length != expected:
        raise FrameLengthError(length=length, count=count, expected=expected)
    # `not x > 0` also catches NaN; the isfinite test catches +inf.
    if not (torque_scale > 0.0 and math.isfinite(torque_scale)):
        raise FrameValueError(
            field="torque_scale", offset=12, value=torque_scale, rule="must be finite and > 0"
        )
    if not (rate_scale > 0.0 and math.isfinite(rate_scale)):
        raise FrameValueError(
            field="rate_scale", offset=16, value=rate_scale, rule="must be finite and > 0"
        )

    raw = np.frombuffer(view, dtype=_SAMPLE_DTYPE, count=count, offset=FRAME_HEADER_SIZE)
    # The sentinel −32768 is the byte pair 00 80 (little-endian). A byte search is ~5× cheaper
    # than a numpy reduction at 28 samples; only when the pair occurs anywhere (also straddling
    # two values) does the exact, aligned check run.
    haystack = data if isinstance(data, bytes | bytearray) else view.tobytes()
    if haystack.find(_NO_READING_BYTES, FRAME_HEADER_SIZE) >= 0 and (raw == NO_READING).any():
        _raise_sentinel(raw)
    # One multiply scales all four channels; torque and rates are views of that one block.
    scaled = raw * np.array((torque_scale, rate_scale, rate_scale, rate_scale))
    scaled.flags.writeable = False
    return SampleFrame(
        version,
        _FLAG_VALUES[flags],
        sequence,
        timestamp_us,
        period_us,
        scaled[:, 0],
        scaled[:, 1:],
    )


def _raise_sentinel(raw: NDArray[Any]) -> None:
    sample, channel = (int(i) for i in np.argwhere(raw == NO_READING)[0])
    raise FrameValueError(
        field=_CHANNEL_NAMES[channel],
        offset=FRAME_HEADER_SIZE + FRAME_SAMPLE_SIZE * sample + 2 * channel,
        value=NO_READING,
        rule="-32768 means 'no valid reading' and must not appear",
        sample=sample,
    )


_AXES: Final = {"x": 0, "y": 1, "z": 2}


def axis_rate(
    frame: SampleFrame, axis: Literal["x", "y", "z"], sign: Literal[1, -1] = 1
) -> NDArray[np.float64]:
    """Rotation rate about the fastener axis, deg/s, positive when tightening.

    Which sensor axis runs along the fastener, and in which sense, is station configuration
    (PROFILE.md: default ``+z``), so it is passed in rather than guessed. A bad ``axis`` or
    ``sign`` is the caller's error (``ValueError``).
    """
    index = _AXES.get(axis)
    if index is None:
        raise ValueError(f"axis must be 'x', 'y' or 'z', got {axis!r}")
    if sign not in (1, -1):
        raise ValueError(f"sign must be +1 or -1, got {sign!r}")
    column = frame.rate_dps[:, index]
    result = column * float(sign)
    result.flags.writeable = False
    return result
