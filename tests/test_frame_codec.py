"""Samples frames of sensor profile v1 decode to what an independent encoder put in them.

The encoder here packs each field with its own ``struct.pack`` call, straight from the table in
``protocol/PROFILE.md``; it shares no code with ``clampd.protocol._frame`` so that one misreading
of the layout cannot hide in both. Expected values come from the profile text (the reference
for the wire format), IEEE 754 binary32 rounding (scales travel as f32) and numpy.
"""

from __future__ import annotations

import re
import struct
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from clampd.protocol import (
    FrameError,
    FrameFlags,
    FrameLengthError,
    FrameTooShortError,
    FrameValueError,
    FrameVersionError,
    SampleFrame,
    axis_rate,
    decode_frame,
)

PROFILE_MD = Path(__file__).resolve().parents[1] / "protocol" / "PROFILE.md"

Sample = tuple[int, int, int, int]


def encode_v1(
    *,
    samples: list[Sample],
    version: int = 1,
    flags: int = 0,
    sequence: int = 0,
    timestamp_us: int = 0,
    period_us: int = 1000,
    count: int | None = None,
    reserved: int = 0,
    torque_scale: float = 0.01,
    rate_scale: float = 0.1,
) -> bytes:
    """PROFILE.md "Samples frame", one field at a time, little-endian."""
    out = bytearray()
    out += struct.pack("<B", version)  # offset 0
    out += struct.pack("<B", flags)  # offset 1
    out += struct.pack("<H", sequence)  # offset 2
    out += struct.pack("<I", timestamp_us)  # offset 4
    out += struct.pack("<H", period_us)  # offset 8
    out += struct.pack("<B", len(samples) if count is None else count)  # offset 10
    out += struct.pack("<B", reserved)  # offset 11
    out += struct.pack("<f", torque_scale)  # offset 12
    out += struct.pack("<f", rate_scale)  # offset 16
    for torque, rx, ry, rz in samples:  # offset 20, 8 bytes each
        out += struct.pack("<h", torque)
        out += struct.pack("<h", rx)
        out += struct.pack("<h", ry)
        out += struct.pack("<h", rz)
    return bytes(out)


def f32(x: float) -> float:
    """The value a binary32 field actually carries (IEEE 754 round to nearest)."""
    return float(struct.unpack("<f", struct.pack("<f", x))[0])


# -32768 is the reserved "no reading" value (PROFILE.md), so valid counts stop at -32767.
counts = st.integers(min_value=-32767, max_value=32767)
samples_st = st.lists(st.tuples(counts, counts, counts, counts), min_size=1, max_size=28)
scales = st.floats(min_value=2.0**-20, max_value=1024.0, width=32, allow_nan=False)


@settings(max_examples=300)
@given(
    samples=samples_st,
    flags=st.integers(0, 15),
    sequence=st.integers(0, 0xFFFF),
    timestamp_us=st.integers(0, 0xFFFF_FFFF),
    period_us=st.integers(100, 0xFFFF),
    torque_scale=scales,
    rate_scale=scales,
)
def test_round_trip_matches_independent_encoder(
    *,
    samples: list[Sample],
    flags: int,
    sequence: int,
    timestamp_us: int,
    period_us: int,
    torque_scale: float,
    rate_scale: float,
) -> None:
    data = encode_v1(
        samples=samples,
        flags=flags,
        sequence=sequence,
        timestamp_us=timestamp_us,
        period_us=period_us,
        torque_scale=torque_scale,
        rate_scale=rate_scale,
    )
    frame = decode_frame(data)
    assert frame.version == 1
    assert frame.flags == FrameFlags(flags)
    assert isinstance(frame.flags, FrameFlags)
    assert (frame.sequence, frame.timestamp_us, frame.period_us) == (
        sequence,
        timestamp_us,
        period_us,
    )
    assert frame.count == len(samples)
    raw = np.array(samples, dtype=np.float64)
    # Scale × count in float64: one rounding of an exact product (the scales are f32-exact).
    np.testing.assert_allclose(frame.torque_nm, raw[:, 0] * torque_scale, rtol=1e-15, atol=0)
    np.testing.assert_allclose(frame.rate_dps, raw[:, 1:] * rate_scale, rtol=1e-15, atol=0)
    assert frame.torque_nm.dtype == np.float64
    assert frame.rate_dps.shape == (len(samples), 3)


@settings(max_examples=200)
@given(
    torques=st.lists(st.floats(-150.0, 150.0), min_size=1, max_size=28),  # fits ±32767 counts
    torque_scale=st.sampled_from([0.01, 0.02, 0.005]),
)
def test_physical_values_survive_within_half_a_count(
    torques: list[float], torque_scale: float
) -> None:
    # A sensor quantises N·m to the nearest count; the receiver must get back within half a
    # count (plus the f32 rounding of the scale itself, relative 2^-24; IEEE 754 binary32).
    carried = f32(torque_scale)
    samples = [(round(t / carried), 0, 0, 0) for t in torques]
    frame = decode_frame(encode_v1(samples=samples, torque_scale=torque_scale))
    tolerance = carried / 2 + 1e-9
    assert np.all(np.abs(frame.torque_nm - np.array(torques)) <= tolerance)


def test_worked_example_in_profile_md_decodes_to_its_stated_values() -> None:
    # The hex dump in PROFILE.md is what firmware authors copy; it must stay true.
    text = PROFILE_MD.read_text()
    block = re.search(r"<!-- worked-example-frame -->\s*```text\n(.*?)```", text, re.S)
    assert block is not None, "PROFILE.md lost its worked example frame"
    data = bytes.fromhex("".join(block.group(1).split()))
    assert data == encode_v1(
        samples=[(1234, 0, 0, 1800), (1250, -5, 3, 1795)],
        flags=0x08,
        sequence=0x0102,
        timestamp_us=5_000_000,
        period_us=1000,
        torque_scale=0.01,
        rate_scale=0.1,
    )
    frame = decode_frame(data)
    assert frame.flags == FrameFlags.LOW_BATTERY
    assert frame.sequence == 258
    assert frame.timestamp_us == 5_000_000
    assert frame.count == 2
    np.testing.assert_allclose(frame.torque_nm, [12.34, 12.50], rtol=1e-6)
    np.testing.assert_allclose(frame.rate_dps[:, 2], [180.0, 179.5], rtol=1e-6)
    np.testing.assert_allclose(frame.rate_dps[1], [-0.5, 0.3, 179.5], rtol=1e-6)


def test_arrays_are_read_only_and_do_not_alias_the_buffer() -> None:
    buffer = bytearray(encode_v1(samples=[(100, 1, 2, 3)]))
    frame = decode_frame(buffer)
    with pytest.raises(ValueError, match="read-only"):
        frame.torque_nm[0] = 0.0
    with pytest.raises(ValueError, match="read-only"):
        frame.rate_dps[0, 0] = 0.0
    buffer[20:28] = bytes(8)  # the receiver reuses its buffer for the next notification
    assert frame.torque_nm[0] == pytest.approx(100 * f32(0.01))
    assert frame.rate_dps[0, 2] == pytest.approx(3 * f32(0.1))


def test_accepts_bytearray_and_memoryviews_of_any_format() -> None:
    data = encode_v1(samples=[(7, 8, 9, 10), (11, 12, 13, 14)], sequence=9)
    reference = decode_frame(data)
    as_u16 = memoryview(bytearray(data)).cast("H")
    for view in (bytearray(data), memoryview(data), as_u16, memoryview(b"xx" + data)[2:]):
        frame = decode_frame(view)
        assert frame.sequence == 9
        np.testing.assert_array_equal(frame.torque_nm, reference.torque_nm)
        np.testing.assert_array_equal(frame.rate_dps, reference.rate_dps)


def test_not_bytes_is_a_type_error() -> None:
    with pytest.raises(TypeError, match="bytes-like"):
        decode_frame("0100")  # type: ignore[arg-type]


def test_frame_is_frozen() -> None:
    frame = decode_frame(encode_v1(samples=[(1, 1, 1, 1)]))
    with pytest.raises(AttributeError):
        frame.sequence = 3  # type: ignore[misc]
    assert isinstance(frame, SampleFrame)


# ---- errors: each rule of PROFILE.md rejects the frame with a typed error naming the place ----


@pytest.mark.parametrize("length", [0, 1, 19])
def test_short_frames(length: int) -> None:
    data = encode_v1(samples=[(1, 2, 3, 4)])[:length]
    with pytest.raises(FrameTooShortError) as info:
        decode_frame(data)
    assert info.value.length == length
    assert info.value.minimum == 20
    assert "shorter than the 20-byte header" in str(info.value)


@pytest.mark.parametrize("version", [0, 2, 255])
def test_other_versions(version: int) -> None:
    with pytest.raises(FrameVersionError) as info:
        decode_frame(encode_v1(samples=[(1, 2, 3, 4)], version=version))
    assert info.value.version == version
    assert info.value.offset == 0
    assert f"version {version}" in str(info.value)


@pytest.mark.parametrize(("announced", "actual"), [(2, 1), (1, 2), (28, 27), (3, 0)])
def test_count_disagrees_with_length(announced: int, actual: int) -> None:
    data = encode_v1(samples=[(1, 2, 3, 4)] * actual, count=announced)
    with pytest.raises(FrameLengthError) as info:
        decode_frame(data)
    assert (info.value.length, info.value.count) == (20 + 8 * actual, announced)
    assert info.value.expected == 20 + 8 * announced


def test_trailing_byte_is_a_length_error() -> None:
    with pytest.raises(FrameLengthError):
        decode_frame(encode_v1(samples=[(1, 2, 3, 4)]) + b"\x00")


@pytest.mark.parametrize(
    ("fields", "name", "offset"),
    [
        ({"period_us": 99}, "period_us", 8),
        ({"period_us": 0}, "period_us", 8),
        ({"count": 0}, "count", 10),
        ({"reserved": 1}, "reserved", 11),
        ({"flags": 0x10}, "flags", 1),
        ({"flags": 0x80}, "flags", 1),
        ({"torque_scale": 0.0}, "torque_scale", 12),
        ({"torque_scale": -0.01}, "torque_scale", 12),
        ({"torque_scale": float("nan")}, "torque_scale", 12),
        ({"torque_scale": float("inf")}, "torque_scale", 12),
        ({"rate_scale": 0.0}, "rate_scale", 16),
        ({"rate_scale": float("-inf")}, "rate_scale", 16),
        ({"rate_scale": float("nan")}, "rate_scale", 16),
    ],
)
def test_forbidden_header_values(fields: dict[str, float], name: str, offset: int) -> None:
    samples: list[Sample] = [] if fields.get("count") == 0 else [(1, 2, 3, 4)]
    data = encode_v1(samples=samples, **fields)  # type: ignore[arg-type]
    with pytest.raises(FrameValueError) as info:
        decode_frame(data)
    assert info.value.field == name
    assert info.value.offset == offset
    assert name in str(info.value)
    assert isinstance(info.value, FrameError)
    assert isinstance(info.value, ValueError)


def test_period_of_100_us_is_the_legal_minimum() -> None:
    assert decode_frame(encode_v1(samples=[(1, 2, 3, 4)], period_us=100)).period_us == 100


@pytest.mark.parametrize("channel", range(4))
@pytest.mark.parametrize("sample", [0, 5, 27])
def test_no_reading_sentinel_is_rejected_with_its_place(channel: int, sample: int) -> None:
    rows = [[10, 20, 30, 40] for _ in range(28)]
    rows[sample][channel] = -32768
    with pytest.raises(FrameValueError) as info:
        decode_frame(encode_v1(samples=[(a, b, c, d) for a, b, c, d in rows]))
    assert info.value.sample == sample
    assert info.value.field == ("torque", "rate_x", "rate_y", "rate_z")[channel]
    assert info.value.offset == 20 + 8 * sample + 2 * channel
    assert f"sample {sample}" in str(info.value)


def test_axis_rate_picks_axis_and_sign() -> None:
    frame = decode_frame(encode_v1(samples=[(0, 10, 20, 30), (0, -10, -20, -30)], rate_scale=0.5))
    np.testing.assert_array_equal(axis_rate(frame, "z", 1), [15.0, -15.0])
    np.testing.assert_array_equal(axis_rate(frame, "x", -1), [-5.0, 5.0])
    np.testing.assert_array_equal(axis_rate(frame, "y"), [10.0, -10.0])
    with pytest.raises(ValueError, match="axis"):
        axis_rate(frame, "w", 1)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="sign"):
        axis_rate(frame, "z", 2)  # type: ignore[arg-type]


# ---- fuzz: random and mutated frames never raise anything but FrameError ----


def _check_decoded(frame: SampleFrame, length: int) -> None:
    # Whatever decodes must satisfy the profile's invariants.
    assert length == 20 + 8 * frame.count
    assert frame.period_us >= 100
    assert np.all(np.isfinite(frame.torque_nm))
    assert np.all(np.isfinite(frame.rate_dps))


@settings(max_examples=3000)
@given(data=st.binary(max_size=260))
def test_arbitrary_bytes_raise_only_frame_errors(data: bytes) -> None:
    try:
        frame = decode_frame(data)
    except FrameError:
        return
    _check_decoded(frame, len(data))


@settings(max_examples=1000)
@given(
    samples=samples_st,
    position=st.integers(0, 259),
    value=st.integers(0, 255),
    cut=st.integers(0, 260),
)
def test_mutated_frames_raise_only_frame_errors(
    samples: list[Sample], position: int, value: int, cut: int
) -> None:
    data = bytearray(encode_v1(samples=samples))
    data[position % len(data)] = value
    mutated = bytes(data[:cut])
    try:
        frame = decode_frame(mutated)
    except FrameError:
        return
    _check_decoded(frame, len(mutated))


def test_ten_thousand_mutations_of_valid_frames() -> None:
    rng = np.random.default_rng(20261201)  # seeded: a failure is reproducible
    outcomes = {"ok": 0, "error": 0}
    kinds: set[type[FrameError]] = set()
    for _ in range(12_000):
        n = int(rng.integers(1, 29))
        rows = rng.integers(-32767, 32768, size=(n, 4))
        data = bytearray(
            encode_v1(
                samples=[(int(a), int(b), int(c), int(d)) for a, b, c, d in rows],
                flags=int(rng.integers(0, 16)),
                sequence=int(rng.integers(0, 65536)),
                timestamp_us=int(rng.integers(0, 2**32)),
                period_us=int(rng.integers(100, 65536)),
            )
        )
        match int(rng.integers(0, 4)):
            case 0:  # bit flips
                for _ in range(int(rng.integers(1, 4))):
                    bit = int(rng.integers(0, 8 * len(data)))
                    data[bit // 8] ^= 1 << (bit % 8)
            case 1:  # truncation
                del data[int(rng.integers(0, len(data))) :]
            case 2:  # extension
                tail = rng.integers(0, 256, size=int(rng.integers(1, 40)), dtype=np.uint8)
                data += tail.tobytes()
            case _:  # untouched: the loop must also see valid frames succeed
                pass
        try:
            frame = decode_frame(data)
        except FrameError as exc:
            outcomes["error"] += 1
            kinds.add(type(exc))
            continue
        outcomes["ok"] += 1
        _check_decoded(frame, len(data))
    # Sanity of the fuzz itself: both paths and every error class were exercised.
    assert outcomes["ok"] > 2000
    assert outcomes["error"] > 5000
    assert {FrameTooShortError, FrameVersionError, FrameLengthError, FrameValueError} <= kinds


def test_sentinel_byte_pair_straddling_two_values_is_not_a_sentinel() -> None:
    # 5 is "05 00" and 640 is "80 02": the pair "00 80" appears across the value boundary,
    # but no channel holds -32768, so the frame is valid (PROFILE.md: only the value counts).
    data = encode_v1(samples=[(5, 640, 5, 640), (-32767, 32767, 0, 128)])
    assert b"\x00\x80" in data[20:]
    frame = decode_frame(data)
    np.testing.assert_allclose(frame.rate_dps[0], [640 * f32(0.1), 5 * f32(0.1), 640 * f32(0.1)])
    np.testing.assert_allclose(frame.torque_nm, [5 * f32(0.01), -32767 * f32(0.01)])


def test_sentinel_found_in_a_memoryview_input() -> None:
    data = encode_v1(samples=[(1, 2, 3, -32768)])
    with pytest.raises(FrameValueError) as info:
        decode_frame(memoryview(bytearray(data)))
    assert info.value.field == "rate_z"
