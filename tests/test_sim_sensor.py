"""The virtual wrench sensor and its own encoder, cross-checked with the protocol's decoder.

The simulator's encoder is written apart from the decoder (tests/test_sim_independence.py keeps
it so); here the two meet: frames the sensor builds must decode with ``clampd.protocol``'s
decoder to exactly the readings the sensor meant. Statistical checks use scipy.stats.
"""

from __future__ import annotations

import dataclasses
import math
import struct
import tomllib
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from scipy import stats

from clampd.protocol import CuePattern as ProtocolCue
from clampd.protocol import (
    decode_frame,
    decode_info,
    encode_cue,
    encode_set_rate,
    list_builtin_profiles,
    load_builtin_profile,
)
from clampd.simulators import (
    FRAME_HEADER_SIZE,
    INFO_SIZE,
    Bench,
    ControlRejected,
    CuePattern,
    DeclarativeEncoder,
    EncodeError,
    FrameFlags,
    JointModel,
    Opcode,
    OperatorParams,
    SensorError,
    SensorParams,
    VirtualWrenchSensor,
    encode_control,
    encode_frame,
    simulate_rundown,
)


def f32(x: float) -> float:
    return float(struct.unpack("<f", struct.pack("<f", x))[0])


def bench_sensor(
    seed: int = 1, contact_deg: float | None = None, **params: Any
) -> tuple[VirtualWrenchSensor, Bench]:
    rng = np.random.default_rng(seed)
    joint = JointModel.sample(rng)
    if contact_deg is not None:
        joint = dataclasses.replace(joint, contact_angle_deg=contact_deg)
    sp = SensorParams(**params)
    bench = Bench(
        joint,
        OperatorParams(ignore_cues=True, stop_at_torque_nm=40.0),
        rng,
        deflection_deg_per_nm=sp.deflection_deg_per_nm,
    )
    return VirtualWrenchSensor(sp, rng, bench), bench


def stream(sensor: VirtualWrenchSensor, frames: int) -> list[tuple[bytes, float]]:
    sensor.on_control(encode_control(Opcode.START_STREAM))
    return [sensor.next_notification() for _ in range(frames)]


def test_quantisation_step_equals_the_scale() -> None:
    for scale in (0.005, 0.01, 0.0317):
        sensor = VirtualWrenchSensor(
            SensorParams(torque_scale=scale, torque_noise_nm=0.5, rate_scale=scale),
            np.random.default_rng(4),
        )
        readings = [sensor.sample_once().reading for _ in range(3000)]
        torque = np.array([r.torque_nm for r in readings])
        levels = torque / f32(scale)
        np.testing.assert_array_equal(levels, np.round(levels))
        steps = np.diff(np.unique(torque))
        assert steps.min() == pytest.approx(f32(scale), rel=1e-9)
        rates = np.array([r.rate_dps for r in readings])
        np.testing.assert_array_equal(rates / f32(scale), np.round(rates / f32(scale)))


def test_gyro_bias_random_walk_variance_grows_linearly() -> None:
    """Var[b(t) − b(0)] = σ²·t for a random walk (Wiener process; scipy.stats for the bounds)."""
    sigma = 0.5  # deg/s/√s, large so the walk dominates the 0.001 °/s quantisation
    params = SensorParams(
        sample_rate_hz=250,
        rate_scale=0.001,
        gyro_noise_dps=0.0,
        wobble_dps=0.0,
        gyro_bias_walk_dps_per_sqrt_s=sigma,
        clock_ppm=0.0,
    )
    runs, n = 200, 400
    z = np.empty((runs, n))
    for i, child in enumerate(np.random.default_rng(2026).spawn(runs)):
        sensor = VirtualWrenchSensor(params, child)
        z[i] = [sensor.sample_once().reading.rate_dps[2] for _ in range(n)]
    lags = np.array([50, 100, 200, 399])
    t = lags / 250.0
    var = ((z[:, lags] - z[:, [0]]) ** 2).mean(axis=0)  # mean is 0 by construction
    for v, ti in zip(var, t, strict=True):
        lo, hi = stats.chi2.ppf([0.0005, 0.9995], runs) / runs
        assert lo <= v / (sigma**2 * ti) <= hi
    fit = stats.linregress(t, var)
    assert fit.slope == pytest.approx(sigma**2, rel=0.3)
    assert abs(fit.intercept) < 0.1 * var[-1]


def test_frames_decode_with_the_protocol_decoder_to_the_sensor_readings() -> None:
    sensor, _ = bench_sensor(seed=9)
    twin, _ = bench_sensor(seed=9)
    frames = stream(sensor, 200)
    period = 1000
    for k, (data, span) in enumerate(frames):
        frame = decode_frame(data)
        assert frame.sequence == k
        assert frame.period_us == period
        assert frame.count == 28
        assert frame.timestamp_us == k * 28 * period
        assert span == pytest.approx(28 * period / 1e6)
        samples = [twin.sample_once() for _ in range(28)]
        np.testing.assert_array_equal(frame.torque_nm, [s.reading.torque_nm for s in samples])
        np.testing.assert_array_equal(frame.rate_dps, [s.reading.rate_dps for s in samples])
    torque = np.concatenate([decode_frame(d).torque_nm for d, _ in frames])
    assert torque.max() > 20.0  # the operator really tightened something


def test_dropped_notifications_leave_sequence_gaps_and_keep_time() -> None:
    sensor, _ = bench_sensor(seed=3)
    first = stream(sensor, 5)
    sensor.drop_notifications(3)
    data, span = sensor.next_notification()
    frame = decode_frame(data)
    assert frame.sequence == 5 + 3
    assert sensor.dropped_sequences == [5, 6, 7]
    assert span == pytest.approx(4 * 28 * 1e-3)
    last = decode_frame(first[-1][0])
    assert frame.timestamp_us - last.timestamp_us == 4 * 28 * 1000


def test_random_drops_are_exactly_the_sequence_gaps() -> None:
    sensor, _ = bench_sensor(seed=5, drop_probability=0.2)
    seqs = [decode_frame(d).sequence for d, _ in stream(sensor, 300)]
    missing = sorted(set(range(seqs[-1] + 1)) - set(seqs))
    assert missing == sensor.dropped_sequences
    assert 30 < len(missing) < 120  # 20 % of ~375 frames, loose binomial bounds


def test_info_value_decodes_with_the_protocol_decoder() -> None:
    sensor = VirtualWrenchSensor(
        SensorParams(serial="BAY3-W07", torque_max_nm=60.0, torque_scale=0.002),
        np.random.default_rng(0),
    )
    raw = sensor.info_value()
    assert len(raw) == INFO_SIZE == 39
    info = decode_info(raw)
    assert info.serial == "BAY3-W07"
    assert info.profile_version == 1
    assert info.torque_max_nm == 60.0
    assert info.torque_scale == f32(0.002)
    assert info.sample_rate_hz == 1000
    sensor.on_control(encode_set_rate(2000))
    assert decode_info(sensor.info_value()).sample_rate_hz == 2000


def test_control_writes_built_by_the_protocol_are_obeyed() -> None:
    sensor, bench = bench_sensor(seed=2)
    with pytest.raises(SensorError):
        sensor.next_notification()
    stream(sensor, 1)
    assert sensor.streaming()
    sensor.on_control(encode_set_rate(4000))
    assert decode_frame(sensor.next_notification()[0]).period_us == 250
    sensor.on_control(encode_set_rate(250))
    data, span = sensor.next_notification()
    assert decode_frame(data).period_us == 4000
    assert span == pytest.approx(28 * 4000e-6)
    sensor.on_control(encode_cue(ProtocolCue.APPROACH, 300))
    assert sensor.cues[-1][1:] == (CuePattern.APPROACH, 300)
    assert bench.operator.heard[-1][1] is CuePattern.APPROACH
    sensor.on_control(encode_control(Opcode.STOP_STREAM))
    assert not sensor.streaming()


@pytest.mark.parametrize(
    ("data", "code"),
    [
        (b"", 0x80),
        (b"\x09", 0x80),
        (b"\x01\x00", 0x80),
        (b"\x03\xfa", 0x80),
        (b"\x05\x02\x10", 0x80),
        (struct.pack("<BH", 0x03, 249), 0x81),
        (struct.pack("<BH", 0x03, 4001), 0x81),
        (struct.pack("<BBH", 0x05, 0, 100), 0x81),
        (struct.pack("<BBH", 0x05, 6, 100), 0x81),
    ],
)
def test_bad_control_writes_are_refused_with_the_profile_att_code(data: bytes, code: int) -> None:
    sensor = VirtualWrenchSensor(SensorParams(), np.random.default_rng(0))
    with pytest.raises(ControlRejected) as info:
        sensor.on_control(data)
    assert info.value.att_code == code
    assert not sensor.streaming()
    assert sensor.sample_rate_hz == 1000


def test_zero_torque_takes_the_unloaded_reading_as_zero() -> None:
    sensor = VirtualWrenchSensor(
        SensorParams(zero_offset_nm=0.8, torque_noise_nm=0.01), np.random.default_rng(1)
    )
    before = np.mean([sensor.sample_once().reading.torque_nm for _ in range(500)])
    sensor.on_control(encode_control(Opcode.ZERO_TORQUE))
    after = np.mean([sensor.sample_once().reading.torque_nm for _ in range(500)])
    assert before == pytest.approx(0.8, abs=0.01)
    assert abs(after) < 0.03  # one noisy reading (σ = 0.01) became the new zero


def test_sensor_clock_drifts_against_host_time() -> None:
    sensor = VirtualWrenchSensor(SensorParams(clock_ppm=500.0), np.random.default_rng(0))
    last = [sensor.sample_once() for _ in range(10_000)][-1]
    sensor_span = last.timestamp_us / 1e6 + 1e-3
    assert last.true_time_s == pytest.approx(sensor_span / (1 + 500e-6), rel=1e-9)


def test_overload_and_forced_flags() -> None:
    sensor, _ = bench_sensor(seed=6, torque_max_nm=20.0)
    flags = [decode_frame(d).flags for d, _ in stream(sensor, 150)]
    assert FrameFlags.OVERLOAD in [FrameFlags(int(f)) & FrameFlags.OVERLOAD for f in flags]
    assert int(flags[0]) & FrameFlags.OVERLOAD == 0
    sensor.force_flags(FrameFlags.GYRO_SATURATED, frames=2)
    marked = [int(decode_frame(sensor.next_notification()[0]).flags) for _ in range(3)]
    assert [bool(f & FrameFlags.GYRO_SATURATED) for f in marked] == [True, True, False]


def test_battery_drains_and_raises_the_low_battery_flag() -> None:
    sensor, _ = bench_sensor(
        seed=1, battery_start_percent=16.0, battery_drain_percent_per_h=3600.0
    )  # 1 %/s
    assert sensor.battery_percent() == 16
    frames = stream(sensor, 80)  # 2.24 s
    assert sensor.battery_percent() == 14
    flags = [bool(int(decode_frame(d).flags) & FrameFlags.LOW_BATTERY) for d, _ in frames]
    assert not flags[0]
    assert flags[-1]
    assert flags.index(True) == pytest.approx(1.0 / 0.028, abs=1.5)


def test_timestamp_wraps_and_clock_reset_is_flagged() -> None:
    sensor, _ = bench_sensor(seed=1, start_timestamp_us=2**32 - 50_000)
    stamps = [decode_frame(d).timestamp_us for d, _ in stream(sensor, 4)]
    assert stamps[0] == 2**32 - 50_000
    assert stamps[2] == (2**32 - 50_000 + 56_000) % 2**32
    sensor.reset_clock()
    after = [decode_frame(sensor.next_notification()[0]) for _ in range(2)]
    assert after[0].timestamp_us == 0
    assert int(after[0].flags) & FrameFlags.CLOCK_RESET
    assert not int(after[1].flags) & FrameFlags.CLOCK_RESET


def test_handle_rotation_is_fastener_rotation_plus_tool_deflection() -> None:
    """Handle angle = fastener angle + deflection·torque while no ratchet play is open."""
    c = 0.05
    sensor, bench = bench_sensor(seed=8, contact_deg=5.0, deflection_deg_per_nm=c)
    checked = 0
    for _ in range(4000):
        s = sensor.sample_once()
        m = s.truth
        if m.handle_rate_dps < 0.0:  # first back-swing: the ratchet slips from here on
            break
        assert m.handle_angle_deg == pytest.approx(m.fastener_angle_deg + c * m.torque_nm, abs=1e-9)
        checked += m.torque_nm > 1.0
    assert checked > 50
    assert bench.joint is not None


def test_fastener_axis_and_sign_follow_the_configuration() -> None:
    sensor, _ = bench_sensor(seed=4, fastener_axis="-y", gyro_noise_dps=0.0, wobble_dps=0.0)
    samples = [sensor.sample_once() for _ in range(1500)]
    pulling = [s for s in samples if s.truth.handle_rate_dps > 20.0]
    assert pulling
    for s in pulling:
        assert s.reading.rate_dps[1] < 0.0
        assert s.reading.axis_rate_dps == pytest.approx(-s.reading.rate_dps[1])
        assert s.reading.axis_rate_dps == pytest.approx(s.truth.handle_rate_dps, abs=1.5)


def test_frames_shrink_to_the_negotiated_payload() -> None:
    sensor, _ = bench_sensor(seed=1)
    sensor.set_max_notification(244)
    assert sensor.samples_per_frame == 28
    sensor.set_max_notification(100)
    data, _ = stream(sensor, 1)[0]
    assert len(data) == FRAME_HEADER_SIZE + 8 * 10 <= 100
    sensor.set_max_notification(20)  # default MTU 23: PROFILE.md, not one sample fits
    assert sensor.samples_per_frame == 0
    assert not sensor.streaming()
    sensor.set_max_notification(28)  # MTU 31: exactly one sample
    assert decode_frame(sensor.next_notification()[0]).count == 1


@settings(max_examples=150, deadline=None)
@given(
    samples=hnp.arrays(
        np.int16,
        st.tuples(st.integers(1, 28), st.just(4)),
        elements=st.integers(-32767, 32767),
    ),
    flags=st.integers(0, 15),
    sequence=st.integers(0, 0xFFFF),
    timestamp=st.integers(0, 2**32 - 1),
    period=st.integers(100, 0xFFFF),
    tscale=st.floats(1e-6, 10.0),
    rscale=st.floats(1e-6, 10.0),
)
def test_encoder_round_trips_through_the_protocol_decoder(
    *,
    samples: np.ndarray[Any, np.dtype[np.int16]],
    flags: int,
    sequence: int,
    timestamp: int,
    period: int,
    tscale: float,
    rscale: float,
) -> None:
    data = encode_frame(
        flags=FrameFlags(flags),
        sequence=sequence,
        timestamp_us=timestamp,
        period_us=period,
        torque_scale=tscale,
        rate_scale=rscale,
        samples=samples,
    )
    assert len(data) == FRAME_HEADER_SIZE + 8 * samples.shape[0]
    frame = decode_frame(data)
    assert (int(frame.flags), frame.sequence, frame.timestamp_us, frame.period_us) == (
        flags,
        sequence,
        timestamp,
        period,
    )
    np.testing.assert_array_equal(frame.torque_nm, samples[:, 0] * f32(tscale))
    np.testing.assert_array_equal(frame.rate_dps, samples[:, 1:] * f32(rscale))


@pytest.mark.parametrize(
    "change",
    [
        {"samples": np.full((1, 4), -32768)},
        {"samples": np.zeros((0, 4), dtype=np.int16)},
        {"samples": np.zeros((2, 3), dtype=np.int16)},
        {"samples": np.zeros((2, 4))},
        {"flags": FrameFlags(0x10)},
        {"sequence": 65536},
        {"timestamp_us": -1},
        {"period_us": 99},
        {"torque_scale": 0.0},
        {"rate_scale": math.inf},
        {"rate_scale": 1e-50},  # rounds to 0 as f32
    ],
)
def test_encoder_refuses_what_the_profile_forbids(change: dict[str, Any]) -> None:
    fields: dict[str, Any] = {
        "flags": FrameFlags.NONE,
        "sequence": 0,
        "timestamp_us": 0,
        "period_us": 1000,
        "torque_scale": 0.01,
        "rate_scale": 0.1,
        "samples": np.zeros((2, 4), dtype=np.int16),
    }
    fields.update(change)
    with pytest.raises(EncodeError):
        encode_frame(**fields)


@pytest.mark.parametrize(
    "change",
    [
        {"sample_rate_hz": 100},
        {"samples_per_frame": 29},
        {"torque_scale": -1.0},
        {"fastener_axis": "z"},
        {"drop_probability": 1.0},
        {"serial": "x" * 17},
    ],
)
def test_impossible_sensor_parameters_are_refused(change: dict[str, Any]) -> None:
    if "serial" in change:  # checked when the info value is built
        sensor = VirtualWrenchSensor(SensorParams(**change), np.random.default_rng(0))
        with pytest.raises(EncodeError):
            sensor.info_value()
        return
    with pytest.raises(SensorError):
        dataclasses.replace(SensorParams(), **change)


PROFILES = Path(__file__).resolve().parents[1] / "protocol" / "profiles"


@pytest.mark.parametrize("name", list_builtin_profiles())
def test_declarative_encoder_agrees_with_the_protocol_profile_decoder(name: str) -> None:
    """Encode from the TOML text here, decode with the protocol's profile loader."""
    enc = DeclarativeEncoder.from_file(PROFILES / f"{name}.toml")
    profile = load_builtin_profile(name)
    rng = np.random.default_rng(1)
    period = enc.fixed_period_us or 1000
    spec = tomllib.loads((PROFILES / f"{name}.toml").read_text(encoding="utf-8"))
    (seq_type,) = [f["type"] for f in spec["header"]["fields"] if f.get("role") == "sequence"]
    seq_modulus = 1 << int(seq_type[1:])
    torque = rng.uniform(-50.0, 150.0, 20)
    rates = rng.uniform(-300.0, 300.0, (20, 3))
    for seq in (0, 255, 256, 70_000):
        data = enc.encode(
            sequence=seq,
            timestamp_us=seq * 40_000 + 1_234_567,
            period_us=period,
            torque_nm=torque,
            rate_dps=rates,
        )
        frame = profile.decode(data)
        assert frame.count == 20
        assert frame.period_us == period
        # Counters wrap at the field's width (8 bits for a u8 counter, ...).
        assert frame.sequence == seq % seq_modulus
        assert abs(frame.torque_nm - torque).max() < 0.01  # 0.01 in·lbf is 0.0011 N·m
        for axis in enc.axes:
            i = "xyz".index(axis)
            assert abs(frame.rate_dps[:, i] - rates[:, i]).max() < 0.3  # 0.01 rad/s = 0.57°/s


def test_declarative_encoder_refuses_what_it_cannot_follow() -> None:
    text = (PROFILES / "bench-stick.toml").read_text(encoding="utf-8")
    enc = DeclarativeEncoder(text)
    with pytest.raises(EncodeError, match="2000"):
        enc.encode(
            sequence=0, timestamp_us=0, period_us=1000, torque_nm=[1.0], rate_dps=[[0, 0, 0]]
        )
    with pytest.raises(EncodeError):
        enc.encode(sequence=0, timestamp_us=0, period_us=2000, torque_nm=[1.0], rate_dps=[[0, 0]])
    with pytest.raises(EncodeError, match="unit"):
        DeclarativeEncoder(text.replace('unit = "in*lbf"', 'unit = "furlong"')).encode(
            sequence=0, timestamp_us=0, period_us=2000, torque_nm=[1.0], rate_dps=[[0, 0, 0]]
        )
    with pytest.raises(EncodeError, match="type"):
        DeclarativeEncoder(text.replace('type = "i32"', 'type = "i24"'))
    with pytest.raises(EncodeError, match="TOML"):
        DeclarativeEncoder("name = ")


def test_torque_non_linearity_is_a_bow_of_the_stated_height() -> None:
    """Zero at 0 and at capacity, largest (nl·capacity) at half capacity (common practice)."""
    nl, cap = 0.01, 100.0
    tr = simulate_rundown(
        JointModel.sample(np.random.default_rng(5)),
        SensorParams(
            torque_max_nm=cap,
            nonlinearity_fraction=nl,
            torque_noise_nm=0.0,
            zero_offset_nm=0.0,
            torque_scale=0.004,
        ),
        OperatorParams(ignore_cues=True, stop_at_torque_nm=60.0),
        np.random.default_rng(6),
    )
    error = tr.torque_nm - tr.true_torque_nm
    half = np.abs(tr.true_torque_nm - cap / 2.0) < 0.5
    assert half.any()
    np.testing.assert_allclose(error[half], nl * cap, atol=0.0025)  # half a count
    small = tr.true_torque_nm < 1.0
    assert np.abs(error[small]).max() <= nl * cap * 4 * 0.01 + 0.0025
