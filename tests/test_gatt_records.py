"""Control commands and the info record of sensor profile v1, against the text of PROFILE.md.

Expected bytes are written out by hand from the tables in ``protocol/PROFILE.md`` (opcodes,
parameter widths, little-endian) and from the Bluetooth SIG Base UUID
``0000xxxx-0000-1000-8000-00805f9b34fb`` (Bluetooth Core Specification, Vol 3 Part B §2.5.1).
"""

from __future__ import annotations

import re
import struct
import uuid
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from clampd.protocol import (
    BATTERY_LEVEL_UUID,
    BATTERY_SERVICE_UUID,
    CONTROL_UUID,
    DEVICE_INFORMATION_SERVICE_UUID,
    INFO_UUID,
    SAMPLES_UUID,
    SERVICE_UUID,
    ControlError,
    Cue,
    CuePattern,
    InfoError,
    SetRate,
    StartStream,
    StopStream,
    WrenchInfo,
    ZeroTorque,
    decode_control,
    decode_info,
    encode_control,
    encode_cue,
    encode_info,
    encode_set_rate,
    encode_start,
    encode_stop,
    encode_zero,
)

PROFILE_MD = Path(__file__).resolve().parents[1] / "protocol" / "PROFILE.md"


def test_uuids_are_the_ones_in_profile_md() -> None:
    text = PROFILE_MD.read_text()
    listed = re.findall(r"`([0-9a-f]{8}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12})`", text)
    assert listed[:4] == [SERVICE_UUID, SAMPLES_UUID, CONTROL_UUID, INFO_UUID]
    for u in (SERVICE_UUID, SAMPLES_UUID, CONTROL_UUID, INFO_UUID):
        assert str(uuid.UUID(u)) == u  # canonical lowercase form, as bleak expects


def test_sig_uuids_use_the_bluetooth_base_uuid() -> None:
    assert BATTERY_SERVICE_UUID == "0000180f-0000-1000-8000-00805f9b34fb"
    assert BATTERY_LEVEL_UUID == "00002a19-0000-1000-8000-00805f9b34fb"
    assert DEVICE_INFORMATION_SERVICE_UUID == "0000180a-0000-1000-8000-00805f9b34fb"


def test_command_bytes_match_the_opcode_table() -> None:
    # PROFILE.md: opcode byte, then u16 rate (SET_RATE) or u8 pattern + u16 ms (CUE), LE.
    assert encode_start() == b"\x01"
    assert encode_stop() == b"\x02"
    assert encode_set_rate(1000) == b"\x03\xe8\x03"
    assert encode_zero() == b"\x04"
    assert encode_cue(CuePattern.OK, 300) == b"\x05\x03\x2c\x01"
    assert encode_control(Cue(CuePattern.LOCKED, 0)) == b"\x05\x05\x00\x00"


@pytest.mark.parametrize(
    ("data", "command"),
    [
        (b"\x01", StartStream()),
        (b"\x02", StopStream()),
        (b"\x03\xfa\x00", SetRate(250)),
        (b"\x03\xa0\x0f", SetRate(4000)),
        (b"\x04", ZeroTorque()),
        (b"\x05\x01\xf4\x01", Cue(CuePattern.APPROACH, 500)),
        (b"\x05\x04\xff\xff", Cue(CuePattern.NOK, 65535)),
    ],
)
def test_decode_known_writes(data: bytes, command: object) -> None:
    assert decode_control(data) == command
    assert decode_control(bytearray(data)) == command


@pytest.mark.parametrize(
    ("data", "att_code"),
    [
        (b"", 0x80),
        (b"\x00", 0x80),
        (b"\x06", 0x80),
        (b"\xff\x00", 0x80),
        (b"\x01\x00", 0x80),  # START_STREAM takes no parameters
        (b"\x03\xe8", 0x80),  # SET_RATE short
        (b"\x03\xe8\x03\x00", 0x80),  # SET_RATE long
        (b"\x05\x03\x2c", 0x80),  # CUE short
        (b"\x03\xf9\x00", 0x81),  # 249 Hz
        (b"\x03\xa1\x0f", 0x81),  # 4001 Hz
        (b"\x03\x00\x00", 0x81),
        (b"\x05\x00\x10\x00", 0x81),  # pattern 0
        (b"\x05\x06\x10\x00", 0x81),  # pattern 6
    ],
)
def test_bad_writes_carry_the_att_code(data: bytes, att_code: int) -> None:
    with pytest.raises(ControlError) as info:
        decode_control(data)
    assert info.value.att_code == att_code
    assert str(info.value)


def test_encoders_refuse_out_of_range_values() -> None:
    with pytest.raises(ControlError) as info:
        encode_set_rate(5000)
    assert info.value.att_code == 0x81
    with pytest.raises(ControlError):
        encode_cue(CuePattern.STOP, 70_000)
    with pytest.raises(ControlError):
        encode_cue(CuePattern.STOP, -1)
    with pytest.raises(ControlError):
        Cue(3, 100)  # type: ignore[arg-type]


@given(st.binary(max_size=8))
def test_any_write_decodes_or_raises_control_error(data: bytes) -> None:
    code = None
    try:
        command = decode_control(data)
    except ControlError as exc:
        code = exc.att_code
    if code is not None:
        assert code in (0x80, 0x81)
        return
    assert command.encode() == data  # whatever decodes re-encodes to the same bytes


@given(
    st.one_of(
        st.builds(StartStream),
        st.builds(StopStream),
        st.builds(ZeroTorque),
        st.builds(SetRate, st.integers(250, 4000)),
        st.builds(Cue, st.sampled_from(CuePattern), st.integers(0, 65535)),
    )
)
def test_commands_round_trip(
    command: StartStream | StopStream | ZeroTorque | SetRate | Cue,
) -> None:
    assert decode_control(command.encode()) == command


def pack_info(  # noqa: PLR0917 - one positional per field, in wire order
    version: int, serial: bytes, tmax: float, rate: int, ts: float, rs: float, fw: bytes
) -> bytes:
    """PROFILE.md info characteristic, field by field (offsets 0, 1, 17, 21, 23, 27, 31)."""
    return (
        struct.pack("<B", version)
        + serial.ljust(16, b"\x00")
        + struct.pack("<f", tmax)
        + struct.pack("<H", rate)
        + struct.pack("<f", ts)
        + struct.pack("<f", rs)
        + fw.ljust(8, b"\x00")
    )


def test_info_record_layout() -> None:
    data = pack_info(1, b"HX-0042", 135.0, 1000, 0.005, 0.0625, b"1.4.2")
    assert len(data) == 39
    info = decode_info(data)
    assert info == WrenchInfo(
        profile_version=1,
        serial="HX-0042",
        torque_max_nm=135.0,
        sample_rate_hz=1000,
        torque_scale=struct.unpack("<f", struct.pack("<f", 0.005))[0],
        rate_scale=0.0625,
        firmware="1.4.2",
    )
    assert encode_info(info) == data


f32s = st.floats(min_value=2.0**-20, max_value=1e6, width=32)
ascii_text = st.text(alphabet=st.characters(min_codepoint=0x20, max_codepoint=0x7E), max_size=16)


@settings(max_examples=200)
@given(
    serial=ascii_text,
    firmware=ascii_text.map(lambda s: s[:8]),
    tmax=f32s,
    ts=f32s,
    rs=f32s,
    rate=st.integers(0, 65535),
)
def test_info_round_trips(
    *, serial: str, firmware: str, tmax: float, ts: float, rs: float, rate: int
) -> None:
    info = WrenchInfo(
        profile_version=1,
        serial=serial,
        torque_max_nm=tmax,
        sample_rate_hz=rate,
        torque_scale=ts,
        rate_scale=rs,
        firmware=firmware,
    )
    data = encode_info(info)
    assert data == pack_info(1, serial.encode(), tmax, rate, ts, rs, firmware.encode())
    assert decode_info(data) == info


@pytest.mark.parametrize(
    ("data", "field"),
    [
        (b"\x01" * 38, "length"),
        (pack_info(1, b"A", 1.0, 1, 1.0, 1.0, b"f") + b"\x00", "length"),
        (pack_info(1, b"A\x00B", 1.0, 1, 1.0, 1.0, b"f"), "serial"),
        (pack_info(1, "Ä".encode("latin-1"), 1.0, 1, 1.0, 1.0, b"f"), "serial"),
        (pack_info(1, b"A", 1.0, 1, 1.0, 1.0, b"\xff"), "firmware"),
        (pack_info(1, b"A", 0.0, 1, 1.0, 1.0, b"f"), "torque_max_nm"),
        (pack_info(1, b"A", 1.0, 1, float("nan"), 1.0, b"f"), "torque_scale"),
        (pack_info(1, b"A", 1.0, 1, 1.0, float("inf"), b"f"), "rate_scale"),
    ],
)
def test_bad_info_records_name_the_field(data: bytes, field: str) -> None:
    with pytest.raises(InfoError) as info:
        decode_info(data)
    assert info.value.field == field


def test_info_refuses_text_that_does_not_fit() -> None:
    with pytest.raises(InfoError, match="serial"):
        WrenchInfo(
            profile_version=1,
            serial="X" * 17,
            torque_max_nm=1.0,
            sample_rate_hz=1,
            torque_scale=1.0,
            rate_scale=1.0,
            firmware="",
        )
