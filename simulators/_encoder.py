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
import tomllib
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

__all__ = [
    "FRAME_HEADER_SIZE",
    "INFO_SIZE",
    "MAX_SAMPLES_PER_NOTIFICATION",
    "PROFILE_VERSION",
    "RESERVED_COUNT",
    "CuePattern",
    "DeclarativeEncoder",
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


# -- declarative profiles -----------------------------------------------------------------
# A second sensor family is described by a TOML file (protocol/profiles/*.toml): header and
# sample fields in wire order with a type, a role, scales and units. This encoder reads the
# same TOML text with tomllib and its own unit table, never the protocol's profile loader, so
# a misreading of a profile shows up as a disagreement in the cross-check tests.

_TYPE_CODES = {
    "u8": "B",
    "i8": "b",
    "u16": "H",
    "i16": "h",
    "u32": "I",
    "i32": "i",
    "u64": "Q",
    "i64": "q",
    "f32": "f",
    "f64": "d",
}
# SI value of one unit. 1 in·lbf = 0.0254 m × 4.4482216152605 N (NIST SP 811 B.8, exact
# definitions of the inch and the pound-force); 1 rad = 180/π degrees.
_TORQUE_UNITS = {
    "n*m": 1.0,
    "n*cm": 0.01,
    "n*mm": 0.001,
    "in*lbf": 0.0254 * 4.4482216152605,
    "lbf*in": 0.0254 * 4.4482216152605,
    "ft*lbf": 0.3048 * 4.4482216152605,
    "lbf*ft": 0.3048 * 4.4482216152605,
}
_RATE_UNITS = {"deg/s": 1.0, "rad/s": 180.0 / math.pi, "rpm": 6.0, "rev/min": 6.0}
_TIME_UNITS_US = {"us": 1, "µs": 1, "ms": 1000, "s": 1_000_000}
_FLAG_NAMES = {f.name for f in FrameFlags if f.name and f is not FrameFlags.NONE}


def _unit_factor(unit: object, table: dict[str, float], where: str) -> float:
    key = str(unit).strip().lower().replace(" ", "").replace("·", "*")
    if key not in table:
        raise EncodeError(f"{where}: unit {unit!r} not known to the simulator ({sorted(table)})")
    return table[key]


def _int_range(ftype: str) -> tuple[int, int]:
    bits = struct.calcsize(_TYPE_CODES[ftype]) * 8
    if ftype.startswith("u"):
        return 0, (1 << bits) - 1
    return -(1 << (bits - 1)), (1 << (bits - 1)) - 1


class DeclarativeEncoder:
    """Encodes sample frames for a sensor described by a declarative profile (TOML text).

    Raises :class:`EncodeError` for a description it cannot follow (unknown type or unit, a
    role missing); values out of a field's range saturate, and a sample that would hit the
    profile's ``invalid`` sentinel is moved one count toward zero (a real sensor never sends
    "no reading" for a reading it has).
    """

    def __init__(self, toml_text: str) -> None:
        try:
            spec = tomllib.loads(toml_text)
        except tomllib.TOMLDecodeError as exc:
            raise EncodeError(f"profile is not TOML: {exc}") from exc
        try:
            self.name = str(spec["name"])
            order = {"little": "<", "big": ">"}[spec["byte_order"]]
            self._header: list[dict[str, Any]] = list(spec["header"]["fields"])
            self._sample: list[dict[str, Any]] = list(spec["sample"]["fields"])
        except (KeyError, TypeError) as exc:
            raise EncodeError(f"profile lacks or misstates {exc}") from exc
        for f in (*self._header, *self._sample):
            if f.get("type") not in _TYPE_CODES:
                raise EncodeError(f"field {f.get('name')!r}: unknown type {f.get('type')!r}")
        self._head_struct = struct.Struct(
            order + "".join(_TYPE_CODES[f["type"]] for f in self._header)
        )
        self._sample_struct = struct.Struct(
            order + "".join(_TYPE_CODES[f["type"]] for f in self._sample)
        )
        roles = {f.get("role") for f in self._header}
        for needed in ("sequence", "timestamp", "count"):
            if needed not in roles:
                raise EncodeError(f"profile has no header field with role {needed!r}")
        sample_roles = {f.get("role") for f in self._sample}
        if "torque" not in sample_roles:
            raise EncodeError("profile has no sample field with role 'torque'")
        period = spec.get("constants", {}).get("period")
        self.fixed_period_us: int | None = None
        if period is not None:
            number, _, unit = str(period).strip().partition(" ")
            factor = _TIME_UNITS_US.get(unit.strip())
            if factor is None:
                raise EncodeError(f"constants.period: unknown time unit in {period!r}")
            self.fixed_period_us = round(float(number) * factor)

    @classmethod
    def from_file(cls, path: str | Path) -> DeclarativeEncoder:
        """Read a profile TOML file."""
        return cls(Path(path).read_text(encoding="utf-8"))

    @property
    def axes(self) -> tuple[str, ...]:
        """Rate axes the sensor measures ('x', 'y', 'z')."""
        return tuple(
            str(f["role"])[-1] for f in self._sample if str(f.get("role", "")).startswith("rate_")
        )

    def encode(
        self,
        *,
        sequence: int,
        timestamp_us: int,
        period_us: int,
        torque_nm: npt.ArrayLike,
        rate_dps: npt.ArrayLike,
        flags: FrameFlags = FrameFlags.NONE,
    ) -> bytes:
        """One notification; ``rate_dps`` has shape (count, 3) in x, y, z (unused axes ignored).

        Counter and clock wrap to their field widths as the real sensor's would.
        """
        torque = np.asarray(torque_nm, dtype=np.float64)
        rates = np.asarray(rate_dps, dtype=np.float64)
        count = torque.shape[0] if torque.ndim == 1 else -1
        if count < 1 or rates.shape != (count, 3):
            raise EncodeError(
                f"need torque (n,) and rates (n, 3), got {torque.shape}, {rates.shape}"
            )
        if not (np.isfinite(torque).all() and np.isfinite(rates).all()):
            raise EncodeError("readings must be finite")
        if self.fixed_period_us is not None and period_us != self.fixed_period_us:
            raise EncodeError(f"{self.name} samples every {self.fixed_period_us} µs only")
        head: list[int | float] = []
        for f in self._header:
            head.append(
                self._header_value(
                    f,
                    sequence=sequence,
                    timestamp_us=timestamp_us,
                    period_us=period_us,
                    count=count,
                    flags=flags,
                )
            )
        body = bytearray(self._head_struct.pack(*head))
        columns = [self._column(f, torque, rates) for f in self._sample]
        for i in range(count):
            body += self._sample_struct.pack(*(col[i] for col in columns))
        return bytes(body)

    def _header_value(
        self,
        f: dict[str, Any],
        *,
        sequence: int,
        timestamp_us: int,
        period_us: int,
        count: int,
        flags: FrameFlags,
    ) -> int:
        lo, hi = _int_range(f["type"]) if not f["type"].startswith("f") else (0, 0)
        span = hi - lo + 1
        match f.get("role"):
            case "sequence":
                return sequence % span + lo
            case "timestamp":
                unit_us = _TIME_UNITS_US.get(str(f.get("unit")))
                if unit_us is None:
                    raise EncodeError(f"field {f['name']!r}: unknown time unit {f.get('unit')!r}")
                return (timestamp_us // unit_us) % span + lo
            case "period":
                unit_us = _TIME_UNITS_US.get(str(f.get("unit")))
                if unit_us is None or period_us % unit_us:
                    raise EncodeError(f"period {period_us} µs not expressible in {f.get('unit')!r}")
                return period_us // unit_us
            case "count":
                if count > hi:
                    raise EncodeError(f"{count} samples do not fit field {f['name']!r}")
                return count
            case "flags":
                bits = f.get("flag_bits") or {}
                unknown = set(bits) - _FLAG_NAMES
                if unknown:
                    raise EncodeError(f"field {f['name']!r}: unknown flags {sorted(unknown)}")
                return sum(1 << int(b) for name, b in bits.items() if flags & FrameFlags[name])
            case _:
                return int(f.get("expect", 0))

    def _column(
        self,
        f: dict[str, Any],
        torque: npt.NDArray[np.float64],
        rates: npt.NDArray[np.float64],
    ) -> list[int] | list[float]:
        role = f.get("role")
        scale = float(f.get("scale", 1.0))
        if role == "torque":
            values = torque / _unit_factor(f.get("unit"), _TORQUE_UNITS, f["name"]) / scale
        elif role in ("rate_x", "rate_y", "rate_z"):
            axis = "xyz".index(role[-1])
            values = rates[:, axis] / _unit_factor(f.get("unit"), _RATE_UNITS, f["name"]) / scale
        else:
            values = np.zeros(torque.shape[0])
        if f["type"].startswith("f"):
            return [float(v) for v in values]
        lo, hi = _int_range(f["type"])
        raw = np.clip(np.round(values), lo, hi).astype(np.int64)
        invalid = f.get("invalid")
        if invalid is not None:
            raw[raw == int(invalid)] -= int(np.sign(invalid))
        return [int(v) for v in raw]
