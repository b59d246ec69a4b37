"""Declarative profiles: a TOML description decodes frames built from that same description.

The frames here are packed with ``struct`` from the TOML's own field list (read with tomllib,
type codes mapped in this module), independent of the decoder's compiled struct and dtype.
Unit references: 1 in·lbf = 0.0254 m × 0.45359237 kg × 9.80665 m/s² exactly (NIST SP 811,
appendix B.8 and B.9); 1 rad = 180/π degrees (SI Brochure, 9th ed., table 4).
"""

from __future__ import annotations

import functools
import math
import struct
import tomllib
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from clampd.protocol import (
    DeclarativeProfile,
    FrameError,
    FrameFlags,
    FrameLengthError,
    FrameTooShortError,
    FrameValueError,
    FrameVersionError,
    ProfileError,
    list_builtin_profiles,
    load_builtin_profile,
    load_profile,
)

PROFILES = Path(__file__).resolve().parents[1] / "protocol" / "profiles"
BENCH_STICK = PROFILES / "bench-stick.toml"
NM_PER_IN_LBF = 0.0254 * 0.45359237 * 9.80665  # NIST SP 811 B.8/B.9, exact by definition
DEG_PER_RAD = 180.0 / math.pi  # SI Brochure table 4
CODES = {"u8": "B", "i8": "b", "u16": "H", "i16": "h", "u32": "I", "i32": "i", "f32": "f"}


def pack_from_description(
    description: dict[str, Any], header: Mapping[str, int], samples: Sequence[Mapping[str, float]]
) -> bytes:
    """Bytes laid out as the TOML says: header fields then samples, each field in order."""
    order = "<" if description["byte_order"] == "little" else ">"
    out = b""
    for field in description["header"]["fields"]:
        out += struct.pack(order + CODES[field["type"]], header[field["name"]])
    for sample in samples:
        for field in description["sample"]["fields"]:
            out += struct.pack(order + CODES[field["type"]], sample[field["name"]])
    return out


@functools.cache
def bench() -> DeclarativeProfile:
    # Compiled once: unit parsing through pint costs milliseconds, decoding microseconds.
    return load_builtin_profile("bench-stick")


@functools.cache
def rig() -> DeclarativeProfile:
    return load_profile(RIG)


def bench_description() -> dict[str, Any]:
    return tomllib.loads(BENCH_STICK.read_text())


def test_builtin_profiles_are_listed_and_load() -> None:
    names = list_builtin_profiles()
    assert "bench-stick" in names
    for name in names:
        profile = load_builtin_profile(name)
        assert profile.name == name
    assert load_profile(BENCH_STICK).spec == load_builtin_profile("bench-stick").spec


def test_bench_stick_sizes_and_widths_follow_its_description() -> None:
    profile = load_builtin_profile("bench-stick")
    assert profile.header_size == 1 + 1 + 4 + 1
    assert profile.sample_size == 4 + 2
    assert profile.sequence_modulus == 256  # u8 counter
    assert profile.timestamp_wrap_us == 2**32 * 1000  # u32 milliseconds
    assert profile.axes == ("z",)


gyro = st.integers(-32767, 32767)  # -32768 is declared "invalid" in the profile
torque_counts = st.integers(-(2**31), 2**31 - 1)


@settings(max_examples=200)
@given(
    seq=st.integers(0, 255),
    t_ms=st.integers(0, 2**32 - 1),
    rows=st.lists(st.tuples(torque_counts, gyro), min_size=1, max_size=40),
)
def test_bench_stick_decodes_frames_built_from_its_description(
    seq: int, t_ms: int, rows: list[tuple[int, int]]
) -> None:
    description = bench_description()
    data = pack_from_description(
        description,
        {"magic": 0xB5, "seq": seq, "t_ms": t_ms, "n": len(rows)},
        [{"torque": t, "gyro_z": g} for t, g in rows],
    )
    frame = bench().decode(data)
    assert (frame.version, frame.sequence) == (0xB5, seq)
    assert frame.timestamp_us == t_ms * 1000
    assert frame.period_us == 2000  # constants.period = "2 ms"
    assert frame.flags == FrameFlags(0)
    raw = np.array(rows, dtype=np.float64)
    np.testing.assert_allclose(frame.torque_nm, raw[:, 0] * 0.01 * NM_PER_IN_LBF, rtol=1e-12)
    np.testing.assert_allclose(frame.rate_dps[:, 2], raw[:, 1] * 0.01 * DEG_PER_RAD, rtol=1e-12)
    assert np.all(np.isnan(frame.rate_dps[:, :2]))  # x and y are not measured: NaN, not zero
    with pytest.raises(ValueError, match="read-only"):
        frame.torque_nm[0] = 1.0


def test_bench_stick_errors_are_frame_errors_with_places() -> None:
    description = bench_description()
    profile = load_builtin_profile("bench-stick")
    good = {"magic": 0xB5, "seq": 1, "t_ms": 5, "n": 2}
    rows = [{"torque": 100, "gyro_z": 5}, {"torque": 200, "gyro_z": 6}]
    with pytest.raises(FrameVersionError) as version:
        profile.decode(pack_from_description(description, {**good, "magic": 0xB6}, rows))
    assert (version.value.version, version.value.supported, version.value.offset) == (
        0xB6,
        0xB5,
        0,
    )
    with pytest.raises(FrameLengthError) as length:
        profile.decode(pack_from_description(description, {**good, "n": 3}, rows))
    assert (length.value.count, length.value.expected, length.value.offset) == (3, 7 + 18, 6)
    with pytest.raises(FrameValueError) as zero:
        profile.decode(pack_from_description(description, {**good, "n": 0}, []))
    assert zero.value.field == "n"
    with pytest.raises(FrameValueError) as invalid:
        profile.decode(
            pack_from_description(description, good, [rows[0], {"torque": 1, "gyro_z": -32768}])
        )
    assert (invalid.value.field, invalid.value.sample, invalid.value.offset) == ("gyro_z", 1, 17)
    with pytest.raises(FrameTooShortError):
        profile.decode(b"\xb5\x01\x00")


def test_checker_from_profile_wraps_the_8_bit_counter() -> None:
    description = bench_description()
    profile = load_builtin_profile("bench-stick")
    checker = profile.checker()
    reports = []
    for i in range(6):
        seq = (254 + i) % 256
        data = pack_from_description(
            description,
            {"magic": 0xB5, "seq": seq, "t_ms": (2**32 - 4 + 2 * i) % 2**32, "n": 1},
            [{"torque": 0, "gyro_z": 0}],
        )
        reports.append(checker.feed(profile.decode(data)))
    assert all(r.accepted and r.events == () for r in reports)
    # Across the u32-millisecond wrap the clock keeps exact integer microseconds.
    starts = [r.placement.start_us for r in reports if r.placement is not None]
    assert np.diff(starts).tolist() == [2000] * 5
    assert starts[-1] > 2**32 * 1000


@settings(max_examples=2000)
@given(data=st.binary(max_size=120))
def test_arbitrary_bytes_raise_only_frame_errors(data: bytes) -> None:
    profile = bench()
    try:
        frame = profile.decode(data)
    except FrameError:
        return
    assert len(data) == 7 + 6 * frame.count


# A second, little-endian description: period in the header, three f32 rate axes in deg/s,
# f32 torque in N·m, flags mapped to clampd's, no count field (count follows from length).
RIG = """
name = "test-rig"
byte_order = "little"
service_uuid = "00000000-0000-4000-8000-000000000001"
samples_uuid = "00000000-0000-4000-8000-000000000002"

[[header.fields]]
name = "counter"
type = "u16"
role = "sequence"

[[header.fields]]
name = "clock"
type = "u32"
role = "timestamp"
unit = "us"

[[header.fields]]
name = "step"
type = "u16"
role = "period"
unit = "us"

[[header.fields]]
name = "status"
type = "u8"
role = "flags"
flag_bits = { CLOCK_RESET = 0, OVERLOAD = 5 }

[[sample.fields]]
name = "t"
type = "f32"
role = "torque"
unit = "N*m"

[[sample.fields]]
name = "temp"
type = "i8"

[[sample.fields]]
name = "wx"
type = "f32"
role = "rate_x"
unit = "deg/s"

[[sample.fields]]
name = "wy"
type = "f32"
role = "rate_y"
unit = "deg/s"

[[sample.fields]]
name = "wz"
type = "f32"
role = "rate_z"
unit = "deg/s"
scale = -1.0
"""


def test_count_from_length_flags_and_float_channels() -> None:
    description = tomllib.loads(RIG)
    profile = load_profile(RIG)
    rows = [
        {"t": 12.5, "temp": 21, "wx": 1.0, "wy": 2.0, "wz": 90.0},
        {"t": 13.0, "temp": 21, "wx": 0.5, "wy": -2.0, "wz": 91.0},
        {"t": 13.5, "temp": 22, "wx": 0.0, "wy": 0.0, "wz": 92.0},
    ]
    header = {"counter": 40000, "clock": 123, "step": 500, "status": 0b100001}
    frame = profile.decode(pack_from_description(description, header, rows))
    assert frame.count == 3
    assert frame.flags == FrameFlags.CLOCK_RESET | FrameFlags.OVERLOAD
    assert (frame.sequence, frame.timestamp_us, frame.period_us, frame.version) == (
        40000,
        123,
        500,
        0,
    )
    np.testing.assert_array_equal(frame.torque_nm, [12.5, 13.0, 13.5])
    np.testing.assert_array_equal(frame.rate_dps[:, 2], [-90.0, -91.0, -92.0])
    np.testing.assert_array_equal(frame.rate_dps[1, :2], [0.5, -2.0])
    assert profile.sample_size == 17
    with pytest.raises(FrameLengthError):
        profile.decode(pack_from_description(description, header, rows) + b"\x00")
    with pytest.raises(FrameValueError) as nan:
        profile.decode(pack_from_description(description, header, [{**rows[0], "t": float("nan")}]))
    assert (nan.value.field, nan.value.sample) == ("t", 0)
    with pytest.raises(FrameValueError) as step:
        profile.decode(pack_from_description(description, {**header, "step": 0}, rows))
    assert step.value.field == "step"


@settings(max_examples=1000)
@given(data=st.binary(max_size=120))
def test_rig_profile_raises_only_frame_errors(data: bytes) -> None:
    try:
        frame = rig().decode(data)
    except FrameError:
        return
    assert np.all(np.isfinite(frame.torque_nm))


def _problems(text: str) -> dict[str, str]:
    with pytest.raises(ProfileError) as info:
        load_profile(text)
    assert str(info.value).startswith("profile <text>: ")
    return dict(info.value.problems)


BENCH_TEXT = BENCH_STICK.read_text()


@pytest.mark.parametrize(
    ("edit", "path", "words"),
    [
        (("byte_order =", "byteorder ="), "byteorder", "Extra inputs"),
        (('type = "i32"', 'type = "i24"'), "sample.fields[0].type", "'i16'"),
        (('unit = "in*lbf"', 'unit = "deg"'), "sample.fields[0]", "not a torque"),
        (('unit = "rad/s"', 'unit = "N*m"'), "sample.fields[1]", "not a rate"),
        (('role = "sequence"', 'role = "version"'), "header", "more than one"),
        ((', role = "sequence"', ""), "header", "role 'sequence'"),
        ((' role = "torque",', ""), "sample", "role 'torque'"),
        (('unit = "ms"', 'unit = "mm"'), "header.fields[2]", "not a time"),
        ((', unit = "ms"', ""), "header.fields[2]", "needs a time unit"),
        (('service_uuid = "8e06', 'service_uuid = "zz06'), "service_uuid", "not a UUID"),
        (('period = "2 ms"', 'period = "2.5 us"'), "", "whole number of microseconds"),
        (('period = "2 ms"', 'cadence = "2 ms"'), "constants.cadence", "Extra inputs"),
        (('name = "bench-stick"', 'name = "Bench Stick"'), "name", "pattern"),
        (('scale = 0.01, unit = "in', 'scale = 0.0, unit = "in'), "sample.fields[0].scale", ""),
    ],
)
def test_bad_descriptions_name_the_path(edit: tuple[str, str], path: str, words: str) -> None:
    old, new = edit
    assert old in BENCH_TEXT
    problems = _problems(BENCH_TEXT.replace(old, new, 1))
    assert path in problems, problems
    assert words in problems[path]


def test_period_given_twice_or_never() -> None:
    twice = RIG + '\n[constants]\nperiod = "1 ms"\n'
    assert "exactly one" in "".join(_problems(twice).values())
    never = BENCH_TEXT.replace('period = "2 ms"', "")
    assert "exactly one" in "".join(_problems(never).values())


def test_unreadable_sources(tmp_path: Path) -> None:
    with pytest.raises(ProfileError, match="cannot read"):
        load_profile(tmp_path / "absent.toml")
    broken = tmp_path / "broken.toml"
    broken.write_text("name = \n")
    with pytest.raises(ProfileError, match="not valid TOML") as info:
        load_profile(broken)
    assert info.value.source == str(broken)
    with pytest.raises(ProfileError, match="known: \\['bench-stick'"):
        load_builtin_profile("no-such-sensor")
