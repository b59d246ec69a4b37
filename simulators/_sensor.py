"""The virtual wrench sensor: a torque bridge and a 3-axis gyro sampled on the tool's own clock.

Theory of operation. Each sample the sensor advances its motion source (a :class:`Bench` with an
operator on a joint, or a wrench lying still) by one sample period *of its own clock*: the
crystal runs ``clock_ppm`` fast, so one sensor period is ``period/(1 + ppm·1e-6)`` of true time.
The truth is then spoiled the way real front-ends spoil it:

- torque: zero offset, a bow-shaped non-linearity (zero at 0 and at capacity, largest at half
  capacity), white noise, then 16-bit quantisation with ``torque_scale``;
- rates: the handle rate goes on the fastener axis of the sensor (default ``+z``), a slow hand
  wobble on the two cross axes, per-axis bias that drifts as a random walk, white noise, then
  16-bit quantisation with ``rate_scale``;
- counts saturate at ±32767 (−32768 is reserved by the profile) and raise the frame flags.

Frames follow protocol/PROFILE.md and are built by this package's own encoder. Faults on demand:
dropped notifications (the sequence number still advances, so the receiver sees a gap), forced
flags, a clock reset, a draining battery. A cue write (opcode 0x05) reaches the operator.

The sensor is pull-driven: time advances only while the peripheral asks for frames, so a test
runs as fast as the machine allows and stays reproducible from its seed.
"""

from __future__ import annotations

import dataclasses
import math
import struct
from typing import NamedTuple, Protocol

import numpy as np

from clampd.simulators._encoder import (
    FRAME_HEADER_SIZE,
    MAX_SAMPLES_PER_NOTIFICATION,
    CuePattern,
    FrameFlags,
    Opcode,
    encode_frame,
    encode_info,
)
from clampd.simulators._operator import Motion, MotionSource

__all__ = [
    "AXES",
    "ControlRejected",
    "FrameSource",
    "Reading",
    "SensorError",
    "SensorParams",
    "SensorSample",
    "VirtualWrenchSensor",
]

ATT_BAD_COMMAND = 0x80  # PROFILE.md: unknown opcode or wrong length
ATT_OUT_OF_RANGE = 0x81  # PROFILE.md: value out of range
_MIN_RATE_HZ, _MAX_RATE_HZ = 250, 4000  # SET_RATE range, PROFILE.md
_COUNT_MAX = 32767

AXES = ("+x", "-x", "+y", "-y", "+z", "-z")


class SensorError(ValueError):
    """Sensor parameters or a call sequence the sensor cannot honour (the caller's)."""


class ControlRejected(Exception):  # noqa: N818 - the name says what the peer sees: a rejection
    """A control write the sensor refuses; ``att_code`` is the ATT error to answer with."""

    def __init__(self, att_code: int, message: str) -> None:
        super().__init__(f"ATT error {att_code:#04x}: {message}")
        self.att_code = att_code


class FrameSource(Protocol):
    """What the virtual BLE peripheral needs from a sensor."""

    def info_value(self) -> bytes: ...

    def battery_percent(self) -> int: ...

    def on_control(self, data: bytes) -> None: ...

    def streaming(self) -> bool: ...

    def next_notification(self) -> tuple[bytes, float]: ...


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class SensorParams:
    """One wrench's sensor front-end. Defaults describe a 100 N·m hand wrench."""

    serial: str = "SIM-W0001"
    firmware: str = "sim-1.0"
    torque_max_nm: float = 100.0
    torque_scale: float = 0.005  # N·m per count: ±163 N·m span, 0.005 N·m resolution
    rate_scale: float = 0.0625  # deg/s per count: ±2048 °/s, a common MEMS gyro range
    sample_rate_hz: int = 1000
    samples_per_frame: int = MAX_SAMPLES_PER_NOTIFICATION
    torque_noise_nm: float = 0.02  # 1 σ; ~0.02 % of capacity (order of magnitude, from memory)
    zero_offset_nm: float = 0.3
    nonlinearity_fraction: float = 0.001  # bow height, fraction of capacity (0.1 %)
    # MEMS gyro figures of order: turn-on bias ≲ 1 °/s, noise ~0.1 °/s rms at 1 kHz, bias
    # instability ~0.01 °/s/√s (from memory of consumer MEMS gyro datasheets).
    gyro_bias_dps: tuple[float, float, float] = (0.3, -0.2, 0.5)
    gyro_bias_walk_dps_per_sqrt_s: float = 0.01
    gyro_noise_dps: float = 0.1
    wobble_dps: float = 1.0  # hand wobble on the cross axes, 1 σ (modelling choice)
    deflection_deg_per_nm: float = 0.02  # tool wind-up, passed to the bench
    clock_ppm: float = 30.0  # crystal error; ±20–50 ppm is typical (common practice, no source)
    fastener_axis: str = "+z"
    battery_start_percent: float = 100.0
    battery_drain_percent_per_h: float = 10.0  # ~10 h of streaming per charge (modelling choice)
    low_battery_percent: float = 15.0
    drop_probability: float = 0.0
    start_timestamp_us: int = 0

    def __post_init__(self) -> None:
        for name in (
            "torque_max_nm",
            "torque_scale",
            "rate_scale",
            "deflection_deg_per_nm",
        ):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0.0):
                raise SensorError(f"{name} must be finite and > 0, got {value!r}")
        for name in (
            "torque_noise_nm",
            "nonlinearity_fraction",
            "gyro_bias_walk_dps_per_sqrt_s",
            "gyro_noise_dps",
            "wobble_dps",
            "battery_drain_percent_per_h",
        ):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0.0):
                raise SensorError(f"{name} must be finite and ≥ 0, got {value!r}")
        if not _MIN_RATE_HZ <= self.sample_rate_hz <= _MAX_RATE_HZ:
            raise SensorError(f"sample_rate_hz must lie in 250..4000, got {self.sample_rate_hz}")
        if not 1 <= self.samples_per_frame <= MAX_SAMPLES_PER_NOTIFICATION:
            raise SensorError(f"samples_per_frame must lie in 1..28, got {self.samples_per_frame}")
        if self.fastener_axis not in AXES:
            raise SensorError(f"fastener_axis must be one of {AXES}, got {self.fastener_axis!r}")
        if not 0.0 <= self.drop_probability < 1.0:
            raise SensorError("drop_probability must lie in [0, 1)")
        if not (math.isfinite(self.clock_ppm) and abs(self.clock_ppm) < 1e4):
            raise SensorError(f"clock_ppm must be finite and small, got {self.clock_ppm!r}")
        if not 0.0 <= self.battery_start_percent <= 100.0:
            raise SensorError("battery_start_percent must lie in 0..100")
        if not all(math.isfinite(b) for b in self.gyro_bias_dps) or not math.isfinite(
            self.zero_offset_nm
        ):
            raise SensorError("bias and zero offset must be finite")
        if not 0 <= self.start_timestamp_us <= 0xFFFF_FFFF:
            raise SensorError("start_timestamp_us must be a u32")

    @property
    def axis_index(self) -> int:
        """Index (0 x, 1 y, 2 z) of the fastener axis among the rate channels."""
        return "xyz".index(self.fastener_axis[1])

    @property
    def axis_sign(self) -> float:
        """+1 or −1: the sign of tightening on the fastener axis."""
        return 1.0 if self.fastener_axis[0] == "+" else -1.0


class Reading(NamedTuple):
    """One sample as the sensor reports it, in physical units: all a controller may see."""

    t_s: float  # sensor clock, unwrapped, seconds
    torque_nm: float
    rate_dps: tuple[float, float, float]  # sensor axes
    axis_rate_dps: float  # about the fastener axis, positive tightening


class SensorSample(NamedTuple):
    """One sample: the counts sent, the reading they mean, and the truth behind them."""

    timestamp_us: int  # unwrapped sensor clock
    counts: tuple[int, int, int, int]
    reading: Reading
    truth: Motion
    true_time_s: float
    overload: bool
    gyro_saturated: bool


class _Rest:
    """A wrench lying on the bench: no motion, no load, cues fall on deaf ears."""

    def step(self, dt_s: float) -> Motion:
        return Motion(0.0, 0.0, 0.0, 0.0, 0.0, False, False)

    def hear(self, pattern: CuePattern) -> None:
        return None


class VirtualWrenchSensor:
    """The sensor firmware, simulated; satisfies :class:`FrameSource`.

    ``source`` supplies the true motion (a :class:`Bench`); ``None`` means the wrench lies still.
    ``rng`` drives all sensor noise; give it its own stream for reproducibility.
    """

    def __init__(
        self,
        params: SensorParams,
        rng: np.random.Generator,
        source: MotionSource | None = None,
    ) -> None:
        self.params = params
        self._rng = rng
        self.source: MotionSource = source if source is not None else _Rest()
        self._rate_hz = params.sample_rate_hz
        self._per_frame = params.samples_per_frame
        self._streaming = False
        self._sequence = 0
        self._clock_us = params.start_timestamp_us  # unwrapped sensor clock of the next sample
        self._true_time_s = 0.0
        self._bias = np.array(params.gyro_bias_dps, dtype=np.float64)
        self._wobble = np.zeros(2)
        self._zero_nm = 0.0
        self._last_raw_torque = params.zero_offset_nm
        self._battery = params.battery_start_percent
        self._drop_next = 0
        self._forced = FrameFlags.NONE
        self._forced_frames = 0
        self._clock_reset = False
        # Receivers scale counts by the f32 value on the wire; readings use the same value.
        self._torque_scale = _as_f32(params.torque_scale)
        self._rate_scale = _as_f32(params.rate_scale)
        self.cues: list[tuple[float, CuePattern, int]] = []  # (sensor t_s, pattern, duration ms)
        self.dropped_sequences: list[int] = []

    # -- FrameSource -----------------------------------------------------------------
    def info_value(self) -> bytes:
        """The info characteristic (39 bytes, PROFILE.md)."""
        p = self.params
        return encode_info(
            serial=p.serial,
            torque_max_nm=p.torque_max_nm,
            sample_rate_hz=self._rate_hz,
            torque_scale=p.torque_scale,
            rate_scale=p.rate_scale,
            firmware=p.firmware,
        )

    def battery_percent(self) -> int:
        """Battery Level characteristic value, 0–100."""
        return max(0, min(100, math.ceil(self._battery)))

    def streaming(self) -> bool:
        """True between START_STREAM and STOP_STREAM while a frame fits the notification size."""
        return self._streaming and self._per_frame > 0

    def on_control(self, data: bytes) -> None:
        """Apply a control write; raise :class:`ControlRejected` with the ATT code to answer."""
        if not data:
            raise ControlRejected(ATT_BAD_COMMAND, "empty write")
        opcode, params = data[0], data[1:]
        expected = {
            Opcode.START_STREAM: 0,
            Opcode.STOP_STREAM: 0,
            Opcode.SET_RATE: 2,
            Opcode.ZERO_TORQUE: 0,
            Opcode.CUE: 3,
        }
        if opcode not in expected:
            raise ControlRejected(ATT_BAD_COMMAND, f"unknown opcode {opcode:#04x}")
        op = Opcode(opcode)
        if len(params) != expected[op]:
            raise ControlRejected(
                ATT_BAD_COMMAND, f"{op.name} takes {expected[op]} parameter bytes"
            )
        match op:
            case Opcode.START_STREAM:
                self._streaming = True
            case Opcode.STOP_STREAM:
                self._streaming = False
            case Opcode.SET_RATE:
                (rate,) = struct.unpack("<H", params)
                if not _MIN_RATE_HZ <= rate <= _MAX_RATE_HZ:
                    raise ControlRejected(ATT_OUT_OF_RANGE, f"rate {rate} Hz outside 250..4000")
                self._rate_hz = rate
            case Opcode.ZERO_TORQUE:
                self._zero_nm = self._last_raw_torque
            case Opcode.CUE:
                pattern, duration = struct.unpack("<BH", params)
                if pattern not in CuePattern._value2member_map_:
                    raise ControlRejected(ATT_OUT_OF_RANGE, f"cue pattern {pattern} outside 1..5")
                cue = CuePattern(pattern)
                self.cues.append((self._clock_us / 1e6, cue, duration))
                self.source.hear(cue)

    def next_notification(self) -> tuple[bytes, float]:
        """Sample one frame's worth and return it with the sensor time (s) it spans.

        Dropped frames are sampled too (time goes on, the sequence advances); their span is
        added to the next returned frame's so a peripheral pacing on spans keeps real time.
        Raises :class:`SensorError` when not streaming (the caller's sequencing mistake).
        """
        if not self.streaming():
            raise SensorError("next_notification() while not streaming (stopped, or MTU too small)")
        span = 0.0
        while True:
            frame, frame_span = self._build_frame()
            span += frame_span
            if frame is not None:
                return frame, span

    # -- fault injection -------------------------------------------------------------
    def drop_notifications(self, count: int) -> None:
        """Lose the next ``count`` frames on the air (sequence numbers skip)."""
        if count < 0:
            raise SensorError("count must be ≥ 0")
        self._drop_next += count

    def force_flags(self, flags: FrameFlags, frames: int = 1) -> None:
        """Set extra flag bits on the next ``frames`` frames (e.g. OVERLOAD)."""
        if frames < 0:
            raise SensorError("frames must be ≥ 0")
        self._forced = flags
        self._forced_frames = frames

    def reset_clock(self) -> None:
        """Restart the timestamp counter at 0 (a firmware reset); the next frame says so."""
        self._clock_us = 0
        self._clock_reset = True

    def set_max_notification(self, n_bytes: int) -> None:
        """Fit later frames into ``n_bytes`` of notification payload (ATT MTU − 3).

        PROFILE.md: at MTU 247 up to 28 samples; below MTU 31 not one sample fits, so the sensor
        holds its stream (``streaming()`` is False) until an MTU exchange raises the size.
        """
        if n_bytes < 0:
            raise SensorError(f"payload size must be ≥ 0, got {n_bytes}")
        fit = max(0, (n_bytes - FRAME_HEADER_SIZE) // 8)
        self._per_frame = min(self.params.samples_per_frame, fit)

    @property
    def samples_per_frame(self) -> int:
        """Samples in each later frame."""
        return self._per_frame

    @property
    def sample_rate_hz(self) -> int:
        """The current sample rate (SET_RATE changes it at the next frame)."""
        return self._rate_hz

    @property
    def sequence(self) -> int:
        """Sequence number the next frame will carry."""
        return self._sequence

    # -- sampling --------------------------------------------------------------------
    def _build_frame(self) -> tuple[bytes | None, float]:
        p = self.params
        period_us = round(1e6 / self._rate_hz)
        first_us = self._clock_us
        samples = [self.sample_once(period_us) for _ in range(self._per_frame)]
        flags = FrameFlags.NONE
        if any(s.overload for s in samples):
            flags |= FrameFlags.OVERLOAD
        if any(s.gyro_saturated for s in samples):
            flags |= FrameFlags.GYRO_SATURATED
        if self._clock_reset:
            flags |= FrameFlags.CLOCK_RESET
            self._clock_reset = False
        if self._battery < p.low_battery_percent:
            flags |= FrameFlags.LOW_BATTERY
        if self._forced_frames > 0:
            flags |= self._forced
            self._forced_frames -= 1
        sequence = self._sequence
        self._sequence = (self._sequence + 1) & 0xFFFF
        span = len(samples) * period_us / 1e6
        dropped = self._drop_next > 0 or (
            p.drop_probability > 0.0 and float(self._rng.random()) < p.drop_probability
        )
        if dropped:
            self._drop_next = max(0, self._drop_next - 1)
            self.dropped_sequences.append(sequence)
            return None, span
        frame = encode_frame(
            flags=flags,
            sequence=sequence,
            timestamp_us=first_us & 0xFFFF_FFFF,
            period_us=period_us,
            torque_scale=p.torque_scale,
            rate_scale=p.rate_scale,
            samples=np.array([s.counts for s in samples], dtype=np.int64),
        )
        return frame, span

    def sample_once(self, period_us: int | None = None) -> SensorSample:
        """Take one sample now (advancing the motion source by one sensor period)."""
        p = self.params
        if period_us is None:
            period_us = round(1e6 / self._rate_hz)
        period_s = period_us / 1e6
        dt_true = period_s / (1.0 + p.clock_ppm * 1e-6)
        self._true_time_s += dt_true
        motion = self.source.step(dt_true)
        noise = self._rng.standard_normal(9)
        # torque front-end
        t_true = motion.torque_nm
        x = min(abs(t_true) / p.torque_max_nm, 1.0)
        bow = math.copysign(p.nonlinearity_fraction * p.torque_max_nm * 4.0 * x * (1.0 - x), t_true)
        raw = t_true + bow + p.zero_offset_nm + p.torque_noise_nm * float(noise[0])
        self._last_raw_torque = raw
        t_counts, t_sat = _quantise(raw - self._zero_nm, p.torque_scale)
        overload = t_sat or abs(t_true) > p.torque_max_nm
        # gyro front-end: bias random walk, hand wobble (AR(1), 0.2 s correlation time)
        self._bias += p.gyro_bias_walk_dps_per_sqrt_s * math.sqrt(period_s) * noise[1:4]
        a = math.exp(-period_s / 0.2)
        self._wobble = a * self._wobble + math.sqrt(1.0 - a * a) * p.wobble_dps * noise[4:6]
        rates = [0.0, 0.0, 0.0]
        axis = p.axis_index
        rates[axis] = p.axis_sign * motion.handle_rate_dps
        cross = [i for i in range(3) if i != axis]
        rates[cross[0]] += float(self._wobble[0])
        rates[cross[1]] += float(self._wobble[1])
        r_counts: list[int] = []
        saturated = False
        for i in range(3):
            measured = rates[i] + float(self._bias[i]) + p.gyro_noise_dps * float(noise[6 + i])
            c, sat = _quantise(measured, p.rate_scale)
            r_counts.append(c)
            saturated = saturated or sat
        stamp = self._clock_us
        self._clock_us += period_us
        self._battery = max(0.0, self._battery - p.battery_drain_percent_per_h * period_s / 3600.0)
        rate_dps = (
            r_counts[0] * self._rate_scale,
            r_counts[1] * self._rate_scale,
            r_counts[2] * self._rate_scale,
        )
        reading = Reading(
            t_s=stamp / 1e6,
            torque_nm=t_counts * self._torque_scale,
            rate_dps=rate_dps,
            axis_rate_dps=p.axis_sign * rate_dps[axis],
        )
        return SensorSample(
            timestamp_us=stamp,
            counts=(t_counts, r_counts[0], r_counts[1], r_counts[2]),
            reading=reading,
            truth=motion,
            true_time_s=self._true_time_s,
            overload=overload,
            gyro_saturated=saturated,
        )


def _quantise(value: float, scale: float) -> tuple[int, bool]:
    counts = round(value / scale)
    if counts > _COUNT_MAX:
        return _COUNT_MAX, True
    if counts < -_COUNT_MAX:
        return -_COUNT_MAX, True
    return counts, False


def _as_f32(value: float) -> float:
    return float(struct.unpack("<f", struct.pack("<f", value))[0])
