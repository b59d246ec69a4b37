"""Declarative sensor profiles: a TOML file describes another sensor's frames; no code needed.

Theory of operation: many torque sensors (hobby builds, retrofits, other firmware) stream a
fixed header and a run of fixed-size samples, differing only in field order, widths, byte
order and units. A profile names those fields and their roles (which is the sequence counter,
the timestamp and its unit, the sample count, the torque, the rate axes) and the scales and
units of the sample channels. ``load_profile`` validates the description with pydantic (unknown
keys are errors, every message carries the field's path) and compiles it once into a
``struct.Struct`` for the header and a numpy structured dtype for the samples, so ``decode``
runs like the v1 decoder: one header unpack, one ``frombuffer``, one multiply per channel.

Out of ``decode`` comes the same ``SampleFrame`` as from the v1 profile: torque in N·m, rates
in deg/s on x, y, z (axes the sensor does not measure are NaN, never a made-up zero), the
timestamp in µs and the period in µs. ``SampleFrame.version`` is the value of the field with
role ``version``, or 0 when the sensor has none. ``profile.checker()`` gives a
``SequenceChecker`` set to the sensor's own counter and clock widths.

Units go through ``clampd.protocol.parse_quantity`` (pint), so "in*lbf", "ft*lbf", "N*m",
"rad/s", "deg/s", "ms", "us" all work and a wrong dimension is refused at load time.

Errors: ``ProfileError`` (a ``ValueError``) for a bad description — the author's fault, with
``problems`` listing (path, message). ``decode`` raises the same ``FrameError`` subclasses as
the v1 decoder — the sensor's fault, one frame dropped.
"""

from __future__ import annotations

import dataclasses
import importlib.resources
import math
import os
import re
import struct
import tomllib
import uuid
from collections.abc import Sequence
from importlib.resources.abc import Traversable
from pathlib import Path
from typing import Annotated, Any, Final, Literal

import numpy as np
import pydantic
from numpy.typing import NDArray

from clampd.protocol._frame import (
    FrameFlags,
    FrameLengthError,
    FrameTooShortError,
    FrameValueError,
    FrameVersionError,
    SampleFrame,
    _bytes_view,
)
from clampd.protocol._sequence import SequenceChecker
from clampd.protocol._units import Kind, UnitError, parse_quantity

__all__ = [
    "DeclarativeProfile",
    "ProfileError",
    "list_builtin_profiles",
    "load_builtin_profile",
    "load_profile",
]

FieldType = Literal["u8", "i8", "u16", "i16", "u32", "i32", "u64", "i64", "f32", "f64"]
_STRUCT_CODES: Final = {
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
_NUMPY_CODES: Final = {
    "u8": "u1",
    "i8": "i1",
    "u16": "u2",
    "i16": "i2",
    "u32": "u4",
    "i32": "i4",
    "u64": "u8",
    "i64": "i8",
    "f32": "f4",
    "f64": "f8",
}
_INTEGER_TYPES: Final = frozenset(t for t in _STRUCT_CODES if t[0] in "ui")
_AXIS_ROLES: Final = ("rate_x", "rate_y", "rate_z")

Name = Annotated[str, pydantic.StringConstraints(pattern=r"^[A-Za-z_][A-Za-z0-9_]*$")]


class _Model(pydantic.BaseModel):
    model_config = pydantic.ConfigDict(extra="forbid", frozen=True, strict=True)


class HeaderField(_Model):
    """One header field, in wire order."""

    name: Name
    type: FieldType
    role: Literal["sequence", "timestamp", "count", "period", "version", "flags"] | None = None
    unit: str | None = None
    """Time unit of a ``timestamp`` or ``period`` field, e.g. "ms", "us"."""
    expect: int | None = None
    """The only value this field may carry (a version byte, a magic number)."""
    flag_bits: dict[str, Annotated[int, pydantic.Field(ge=0, le=63)]] | None = None
    """For role ``flags``: FrameFlags name → bit number in this field."""

    @pydantic.model_validator(mode="after")
    def _consistent(self) -> HeaderField:
        if self.role is not None and self.role != "flags" and self.type not in _INTEGER_TYPES:
            raise ValueError(f"field {self.name!r}: role {self.role!r} needs an integer type")
        if self.role == "flags" and self.type not in _INTEGER_TYPES:
            raise ValueError(f"field {self.name!r}: flags need an integer type")
        if self.role in ("timestamp", "period"):
            if self.unit is None:
                raise ValueError(f"field {self.name!r}: role {self.role!r} needs a time unit")
            _whole_microseconds(self.unit, f"field {self.name!r}")
        elif self.unit is not None:
            raise ValueError(f"field {self.name!r}: only timestamp and period take a unit")
        if self.flag_bits is not None:
            if self.role != "flags":
                raise ValueError(f"field {self.name!r}: flag_bits need role 'flags'")
            unknown = set(self.flag_bits) - set(FrameFlags.__members__)
            if unknown:
                raise ValueError(
                    f"field {self.name!r}: unknown flags {sorted(unknown)}; "
                    f"known: {list(FrameFlags.__members__)}"
                )
        return self


class SampleField(_Model):
    """One channel of a sample, in wire order; the physical value is ``raw * scale`` in ``unit``."""

    name: Name
    type: FieldType
    role: Literal["torque", "rate_x", "rate_y", "rate_z"] | None = None
    scale: float = 1.0
    unit: str | None = None
    invalid: int | None = None
    """A raw value that means "no reading"; a frame carrying it is rejected."""

    @pydantic.field_validator("scale")
    @classmethod
    def _finite_scale(cls, value: float) -> float:
        if not math.isfinite(value) or value == 0.0:
            raise ValueError("scale must be finite and non-zero")
        return value

    @pydantic.model_validator(mode="after")
    def _unit_fits_role(self) -> SampleField:
        if self.role is None:
            return self
        if self.unit is None:
            raise ValueError(f"field {self.name!r}: role {self.role!r} needs a unit")
        kind = Kind.TORQUE if self.role == "torque" else Kind.RATE
        try:
            parse_quantity(f"1 {self.unit}", kind)
        except UnitError as exc:
            raise ValueError(f"field {self.name!r}: {exc}") from None
        return self


def _unique_names(fields: Sequence[HeaderField | SampleField]) -> None:
    names = [f.name for f in fields]
    doubled = sorted({n for n in names if names.count(n) > 1})
    if doubled:
        raise ValueError(f"field names must be unique, repeated: {doubled}")


def _roles(fields: Sequence[HeaderField | SampleField]) -> dict[str, int]:
    found: dict[str, int] = {}
    for i, f in enumerate(fields):
        if f.role is None:
            continue
        if f.role in found:
            raise ValueError(f"role {f.role!r} is given to more than one field")
        found[f.role] = i
    return found


class HeaderSpec(_Model):
    """The header's fields; it must name the sequence counter and the timestamp."""

    fields: Annotated[list[HeaderField], pydantic.Field(min_length=1)]

    @pydantic.model_validator(mode="after")
    def _roles_present(self) -> HeaderSpec:
        _unique_names(self.fields)
        roles = _roles(self.fields)
        for needed in ("sequence", "timestamp"):
            if needed not in roles:
                raise ValueError(f"one field must have role {needed!r}")
        return self


class SampleSpec(_Model):
    """One sample's channels; torque is required, at least one rate axis too."""

    fields: Annotated[list[SampleField], pydantic.Field(min_length=1)]

    @pydantic.model_validator(mode="after")
    def _roles_present(self) -> SampleSpec:
        _unique_names(self.fields)
        roles = _roles(self.fields)
        if "torque" not in roles:
            raise ValueError("one field must have role 'torque'")
        if not any(r in roles for r in _AXIS_ROLES):
            raise ValueError("at least one field must have a role among rate_x, rate_y, rate_z")
        return self


class Constants(_Model):
    """Values the sensor does not send."""

    period: str | None = None
    """Sample period with its unit, e.g. "2 ms", when no header field carries it."""


class ProfileSpec(_Model):
    """The whole TOML description of a sensor."""

    name: Annotated[str, pydantic.StringConstraints(pattern=r"^[a-z0-9][a-z0-9-]*$")]
    title: str = ""
    description: str = ""
    byte_order: Literal["little", "big"]
    service_uuid: str
    samples_uuid: str
    header: HeaderSpec
    sample: SampleSpec
    constants: Constants = Constants()

    @pydantic.field_validator("service_uuid", "samples_uuid")
    @classmethod
    def _uuid(cls, value: str) -> str:
        try:
            return str(uuid.UUID(value))  # canonical lowercase, as bleak wants it
        except ValueError:
            raise ValueError(f"{value!r} is not a UUID") from None

    @pydantic.model_validator(mode="after")
    def _one_period(self) -> ProfileSpec:
        in_header = any(f.role == "period" for f in self.header.fields)
        if in_header == (self.constants.period is not None):
            raise ValueError(
                "give the sample period either as a header field with role 'period' "
                "or as constants.period, exactly one of them"
            )
        if self.constants.period is not None:
            period_us = _period_constant_us(self.constants.period)
            if period_us <= 0:
                raise ValueError("constants.period must be > 0")
        return self


def _whole_microseconds(unit: str, where: str) -> int:
    try:
        us = parse_quantity(f"1 {unit}", Kind.TIME) * 1e6
    except UnitError as exc:
        raise ValueError(f"{where}: {exc}") from None
    whole = round(us)
    if whole < 1 or abs(us - whole) > 1e-9 * whole:
        raise ValueError(f"{where}: unit {unit!r} is not a whole number of microseconds")
    return whole


def _period_constant_us(text: str) -> int:
    try:
        us = parse_quantity(text, Kind.TIME) * 1e6
    except UnitError as exc:
        raise ValueError(f"constants.period: {exc}") from None
    whole = round(us)
    if abs(us - whole) > 1e-6 * max(whole, 1):
        raise ValueError(f"constants.period {text!r} is not a whole number of microseconds")
    return whole


class ProfileError(ValueError):
    """A profile description that cannot be used; ``problems`` lists (path, message) pairs."""

    def __init__(self, source: str, problems: list[tuple[str, str]]) -> None:
        lines = "; ".join(f"{path}: {msg}" if path else msg for path, msg in problems)
        super().__init__(f"profile {source}: {lines}")
        self.source = source
        self.problems = tuple(problems)


def _path_of(loc: tuple[int | str, ...]) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += f".{part}" if out else part
    return out


@dataclasses.dataclass(frozen=True, slots=True)
class _Channel:
    name: str
    factor: float
    invalid: int | None
    is_float: bool
    offset: int


class DeclarativeProfile:
    """A compiled sensor description; ``decode`` turns its notifications into ``SampleFrame``s."""

    def __init__(self, spec: ProfileSpec) -> None:
        self.spec = spec
        prefix = "<" if spec.byte_order == "little" else ">"
        hfields = spec.header.fields
        self._header = struct.Struct(prefix + "".join(_STRUCT_CODES[f.type] for f in hfields))
        self._header_offsets = _offsets([struct.calcsize(_STRUCT_CODES[f.type]) for f in hfields])
        self._roles = {f.role: i for i, f in enumerate(hfields) if f.role is not None}
        self._expects = [(i, f.expect) for i, f in enumerate(hfields) if f.expect is not None]
        sfields = spec.sample.fields
        self._dtype = np.dtype(
            [(f.name, prefix + _NUMPY_CODES[f.type]) for f in sfields]
        )  # packed: numpy adds no padding unless align=True
        sample_offsets = _offsets([self._dtype[f.name].itemsize for f in sfields])
        self.header_size: int = self._header.size
        self.sample_size: int = self._dtype.itemsize

        def channel(index: int) -> _Channel:
            f = sfields[index]
            kind = Kind.TORQUE if f.role == "torque" else Kind.RATE
            assert f.unit is not None  # guaranteed by SampleField validation
            return _Channel(
                name=f.name,
                factor=f.scale * parse_quantity(f"1 {f.unit}", kind),
                invalid=f.invalid,
                is_float=f.type not in _INTEGER_TYPES,
                offset=sample_offsets[index],
            )

        sample_roles = {f.role: i for i, f in enumerate(sfields) if f.role is not None}
        self._torque = channel(sample_roles["torque"])
        self._axes: list[tuple[int, _Channel]] = [
            (axis, channel(sample_roles[role]))
            for axis, role in enumerate(_AXIS_ROLES)
            if role in sample_roles
        ]
        self._checked = [
            channel(i)
            for i, f in enumerate(sfields)
            if f.role is not None and (f.invalid is not None or f.type not in _INTEGER_TYPES)
        ]
        ts = hfields[self._roles["timestamp"]]
        assert ts.unit is not None  # guaranteed by HeaderField validation
        self._timestamp_unit_us = _whole_microseconds(ts.unit, "timestamp")
        if "period" in self._roles:
            unit = hfields[self._roles["period"]].unit
            assert unit is not None
            self._period_unit_us = _whole_microseconds(unit, "period")
            self._period_const_us = 0
        else:
            assert spec.constants.period is not None
            self._period_unit_us = 0
            self._period_const_us = _period_constant_us(spec.constants.period)
        flag_field = self._roles.get("flags")
        self._flag_bits: tuple[tuple[int, FrameFlags], ...] = ()
        if flag_field is not None:
            bits = hfields[flag_field].flag_bits or {}
            self._flag_bits = tuple((1 << b, FrameFlags[n]) for n, b in bits.items())
        seq_type = hfields[self._roles["sequence"]].type
        ts_type = ts.type
        self.sequence_modulus: int = 1 << (8 * struct.calcsize(_STRUCT_CODES[seq_type]))
        self.timestamp_wrap_us: int = (
            1 << (8 * struct.calcsize(_STRUCT_CODES[ts_type]))
        ) * self._timestamp_unit_us

    @property
    def name(self) -> str:
        """The profile's short name (file stem of a built-in one)."""
        return self.spec.name

    @property
    def service_uuid(self) -> str:
        """The sensor's GATT service, lowercase."""
        return self.spec.service_uuid

    @property
    def samples_uuid(self) -> str:
        """The characteristic whose notifications ``decode`` reads."""
        return self.spec.samples_uuid

    @property
    def axes(self) -> tuple[str, ...]:
        """The rate axes this sensor measures; the others come out as NaN."""
        return tuple("xyz"[axis] for axis, _ in self._axes)

    def checker(self) -> SequenceChecker:
        """A sequence checker for this sensor's counter width and clock wrap."""
        return SequenceChecker(modulus=self.sequence_modulus, wrap_us=self.timestamp_wrap_us)

    def decode(self, data: bytes | bytearray | memoryview) -> SampleFrame:
        """Decode one notification; ``FrameError`` subclasses when it breaks the description."""
        view = _bytes_view(data)
        length = len(view)
        hsize = self.header_size
        if length < hsize:
            raise FrameTooShortError(length=length, minimum=hsize)
        values = self._header.unpack_from(view)
        fields = self.spec.header.fields
        roles = self._roles
        for i, expect in self._expects:
            if values[i] != expect:
                if fields[i].role == "version":
                    raise FrameVersionError(
                        version=values[i], supported=expect, offset=self._header_offsets[i]
                    )
                raise FrameValueError(
                    field=fields[i].name,
                    offset=self._header_offsets[i],
                    value=values[i],
                    rule=f"must be {expect}",
                )
        body = length - hsize
        count_index = roles.get("count")
        if count_index is not None:
            count = values[count_index]
            if count == 0:
                raise FrameValueError(
                    field=fields[count_index].name,
                    offset=self._header_offsets[count_index],
                    value=0,
                    rule="must be >= 1",
                )
            expected = hsize + count * self.sample_size
            if length != expected:
                raise FrameLengthError(
                    length=length,
                    count=count,
                    expected=expected,
                    count_offset=self._header_offsets[count_index],
                )
        else:
            count, rest = divmod(body, self.sample_size)
            if count == 0:
                raise FrameTooShortError(length=length, minimum=hsize + self.sample_size)
            if rest:
                raise FrameLengthError(
                    length=length,
                    count=count,
                    expected=hsize + count * self.sample_size,
                    count_offset=None,
                )
        if self._period_unit_us:
            index = roles["period"]
            period_us = values[index] * self._period_unit_us
            if period_us <= 0:
                raise FrameValueError(
                    field=fields[index].name,
                    offset=self._header_offsets[index],
                    value=values[index],
                    rule="must be > 0",
                )
        else:
            period_us = self._period_const_us
        samples = np.frombuffer(view, dtype=self._dtype, count=count, offset=hsize)
        for ch in self._checked:
            self._check_channel(samples[ch.name], ch)
        torque = samples[self._torque.name] * self._torque.factor
        rate = np.full((count, 3), np.nan)
        for axis, ch in self._axes:
            rate[:, axis] = samples[ch.name] * ch.factor
        torque = torque.astype(np.float64, copy=False)
        torque.flags.writeable = False
        rate.flags.writeable = False
        flags = FrameFlags(0)
        if self._flag_bits:
            raw_flags = values[roles["flags"]]
            for mask, flag in self._flag_bits:
                if raw_flags & mask:
                    flags |= flag
        version_index = roles.get("version")
        return SampleFrame(
            version=0 if version_index is None else values[version_index],
            flags=flags,
            sequence=values[roles["sequence"]],
            timestamp_us=values[roles["timestamp"]] * self._timestamp_unit_us,
            period_us=period_us,
            torque_nm=torque,
            rate_dps=rate,
        )

    def _check_channel(self, column: NDArray[Any], ch: _Channel) -> None:
        if ch.invalid is not None:
            bad = np.flatnonzero(column == ch.invalid)
            if bad.size:
                self._raise_at(ch, int(bad[0]), ch.invalid, "means 'no reading'")
        if ch.is_float:
            bad = np.flatnonzero(~np.isfinite(column))
            if bad.size:
                self._raise_at(ch, int(bad[0]), float(column[bad[0]]), "must be finite")

    def _raise_at(self, ch: _Channel, sample: int, value: float, rule: str) -> None:
        raise FrameValueError(
            field=ch.name,
            offset=self.header_size + sample * self.sample_size + ch.offset,
            value=value,
            rule=rule,
            sample=sample,
        )


def _offsets(sizes: list[int]) -> list[int]:
    out, at = [], 0
    for size in sizes:
        out.append(at)
        at += size
    return out


def _validate(raw: dict[str, Any], source: str) -> ProfileSpec:
    try:
        return ProfileSpec.model_validate(raw)
    except pydantic.ValidationError as exc:
        problems = [
            (_path_of(err["loc"]), re.sub(r"^Value error, ", "", err["msg"]))
            for err in exc.errors(include_url=False)
        ]
        raise ProfileError(source, problems) from None


def load_profile(source: str | os.PathLike[str]) -> DeclarativeProfile:
    """Load and compile a profile from a TOML file path or from TOML text.

    A ``str`` containing ``=`` is read as TOML text (no path to a profile does); any other
    ``str`` or path-like is a file. ``ProfileError`` for a missing file, bad TOML or a bad
    description — always the author's input.
    """
    if isinstance(source, str) and "=" in source:
        text, name = source, "<text>"
    else:
        path = Path(source)
        name = str(path)
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise ProfileError(name, [("", f"cannot read the file: {exc}")]) from None
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(name, [("", f"not valid TOML: {exc}")]) from None
    except RecursionError:
        # tomllib recurses into nested arrays and inline tables: thousands of levels exhaust
        # the stack instead of raising TOMLDecodeError.
        raise ProfileError(name, [("", "not valid TOML: nested too deeply")]) from None
    return DeclarativeProfile(_validate(raw, name))


def _builtin_dir() -> Traversable:
    return importlib.resources.files("clampd.protocol").joinpath("profiles")


def list_builtin_profiles() -> list[str]:
    """Names of the profiles shipped with clampd (for ``load_builtin_profile``)."""
    return sorted(
        p.name.removesuffix(".toml") for p in _builtin_dir().iterdir() if p.name.endswith(".toml")
    )


def load_builtin_profile(name: str) -> DeclarativeProfile:
    """Load a shipped profile by name; ``ProfileError`` naming the known ones if absent."""
    known = list_builtin_profiles()
    if name not in known:
        raise ProfileError(name, [("", f"no built-in profile of that name; known: {known}")])
    text = _builtin_dir().joinpath(f"{name}.toml").read_text(encoding="utf-8")
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ProfileError(name, [("", f"not valid TOML: {exc}")]) from None
    except RecursionError:
        # tomllib recurses into nested arrays and inline tables: thousands of levels exhaust
        # the stack instead of raising TOMLDecodeError.
        raise ProfileError(name, [("", "not valid TOML: nested too deeply")]) from None
    return DeclarativeProfile(_validate(raw, name))
