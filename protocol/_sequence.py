"""Continuity of a wrench's frame stream: lost, repeated and late notifications, and sample time.

Theory of operation: BLE notifications are unacknowledged, so a frame can be lost on the air;
a faulty stack can repeat or reorder one. The sensor numbers frames with a u16 counter and
stamps each with its own u32 microsecond clock. Two small, pure, stateful objects turn that into
facts the engine can act on (a gap during angle counting makes the rundown NOK, never silently
OK):

* ``SampleClock`` gives every sample a continuous time in seconds. It keeps time as an exact
  integer count of microseconds, unwraps the counter across 2³² µs (≈ 71.6 min), and when the
  sensor's clock restarts (``CLOCK_RESET`` flag, or a backwards jump without it) continues from
  the previous frame's end plus one period and says so.
* ``SequenceChecker`` is fed frames in arrival order, compares each counter with the one it
  expects (modulo 2¹⁶) and reports ``LostFrames``, ``DuplicateFrame`` and ``LateFrame``; frames it
  accepts are placed on the ``SampleClock`` and ``TimeGap`` / ``TimeOverlap`` / ``ClockReset``
  come with them.

A forward counter difference below half the counter range counts as frames lost; a difference
of half the range or more is read as a frame from the past (duplicate or late), which is the
usual serial-number arithmetic (RFC 1982, §3.2). Late and repeated frames are refused
(``accepted`` is false) because the engine consumes samples strictly forward in time.

Nothing here reads a clock, logs or allocates per sample beyond the time array it returns.
"""

from __future__ import annotations

import dataclasses
from typing import Final

import numpy as np
from numpy.typing import NDArray

from clampd.protocol._frame import FrameFlags, SampleFrame

__all__ = [
    "SEQUENCE_MODULUS",
    "TIMESTAMP_WRAP_US",
    "ClockEvent",
    "ClockPlacement",
    "ClockReset",
    "DuplicateFrame",
    "FrameCheck",
    "FrameHeader",
    "LateFrame",
    "LostFrames",
    "SampleClock",
    "SequenceChecker",
    "SequenceEvent",
    "SequenceRestart",
    "TimeGap",
    "TimeOverlap",
]

# PROFILE.md: the sequence counter is a u16 that wraps 65535 → 0.
SEQUENCE_MODULUS: Final = 1 << 16
# PROFILE.md: timestamp_us is a u32 that wraps 2³² − 1 → 0.
TIMESTAMP_WRAP_US: Final = 1 << 32
# Consecutive frames "from the past" that each follow the one before are a restarted counter,
# not stragglers: a reordering link delivers single late frames. Three keeps one or two
# reordered frames from resetting the stream (common practice, no source).
_RESTART_RUN: Final = 3


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class FrameHeader:
    """What continuity checking needs of a frame, for callers that do not hold a ``SampleFrame``."""

    sequence: int
    timestamp_us: int
    period_us: int
    count: int
    clock_reset: bool = False

    def __post_init__(self) -> None:
        if self.sequence < 0 or self.timestamp_us < 0:
            raise ValueError("sequence and timestamp_us must be >= 0")
        if self.period_us <= 0 or self.count <= 0:
            raise ValueError("period_us and count must be > 0")


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class LostFrames:
    """Notifications that never arrived: ``missing`` frames before ``received``."""

    expected: int
    received: int
    missing: int


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class DuplicateFrame:
    """The same counter value as the frame just before; refused."""

    sequence: int


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class LateFrame:
    """A frame from the past (reordered, or reported lost earlier); refused."""

    sequence: int
    expected: int


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class SequenceRestart:
    """The counter started over (sensor reboot): accepted, and checking continues from it.

    Inferred from a frame from the past that carries ``CLOCK_RESET``, or from a run of
    consecutive frames from the past that a reordering link would not produce.
    """

    expected: int
    received: int


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class TimeGap:
    """Samples are missing in time between the previous frame's end and this frame's start."""

    expected_t_s: float
    received_t_s: float
    gap_s: float
    missing_samples: int


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class TimeOverlap:
    """This frame starts before the previous one ended (by less than a clock restart would)."""

    expected_t_s: float
    received_t_s: float
    overlap_s: float


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ClockReset:
    """The sensor clock restarted; time continues from the previous end plus one period.

    ``flagged`` is false when the restart was inferred from a backwards jump without the
    ``CLOCK_RESET`` flag (e.g. the flagged frame itself was lost). The true length of the pause
    is unknown, so angle integrated across it is suspect.
    """

    t_s: float
    flagged: bool


ClockEvent = TimeGap | TimeOverlap | ClockReset
SequenceEvent = (
    LostFrames | DuplicateFrame | LateFrame | SequenceRestart | TimeGap | TimeOverlap | ClockReset
)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ClockPlacement:
    """Where a frame's samples sit on the continuous time line (exact integer microseconds)."""

    start_us: int
    period_us: int
    count: int
    events: tuple[ClockEvent, ...]

    @property
    def start_s(self) -> float:
        """Continuous time of the first sample, seconds."""
        return self.start_us / 1e6

    @property
    def end_us(self) -> int:
        """Continuous time one period after the last sample (where the next frame should start)."""
        return self.start_us + self.period_us * self.count

    def times_s(self) -> NDArray[np.float64]:
        """Continuous time of every sample, seconds, computed from exact integers."""
        ticks = self.start_us + self.period_us * np.arange(self.count, dtype=np.int64)
        return ticks.astype(np.float64) / 1e6


class SampleClock:
    """Maps a sensor's wrapping microsecond timestamps onto one continuous, exact time line.

    The first frame's raw timestamp is time zero's offset (continuous time equals the sensor
    clock until the first wrap or restart). ``wrap_us`` is the counter's modulus; declarative
    profiles with other timestamp widths pass their own.
    """

    def __init__(self, *, wrap_us: int = TIMESTAMP_WRAP_US) -> None:
        if wrap_us <= 0:
            raise ValueError("wrap_us must be > 0")
        self._wrap = wrap_us
        self._last_raw: int | None = None
        self._last_start = 0
        self._next_start = 0
        self._last_period = 0

    def place(
        self, timestamp_us: int, period_us: int, count: int, *, clock_reset: bool = False
    ) -> ClockPlacement:
        """Place a frame's samples; report gaps, overlaps and restarts against the last frame."""
        if period_us <= 0 or count <= 0:
            raise ValueError("period_us and count must be > 0")
        raw = timestamp_us % self._wrap
        events: list[ClockEvent] = []
        if self._last_raw is None:
            start = raw
        else:
            forward = (raw - self._last_raw) % self._wrap
            candidate = self._last_start + forward
            if clock_reset or forward >= self._wrap // 2:
                # A restart: the sensor's time says nothing about the pause, so the samples
                # continue right after the previous ones (PROFILE.md, CLOCK_RESET).
                start = self._next_start + self._last_period
                events.append(ClockReset(t_s=start / 1e6, flagged=clock_reset))
            else:
                start = candidate
                delta = start - self._next_start
                # period_us is an integer, so a sensor at e.g. 3 kHz (333.3 µs) drifts by a
                # fraction of a period per frame; only half a period or more is a real gap.
                half = self._last_period / 2
                if delta >= half:
                    events.append(
                        TimeGap(
                            expected_t_s=self._next_start / 1e6,
                            received_t_s=start / 1e6,
                            gap_s=delta / 1e6,
                            missing_samples=round(delta / self._last_period),
                        )
                    )
                elif -delta >= half:
                    events.append(
                        TimeOverlap(
                            expected_t_s=self._next_start / 1e6,
                            received_t_s=start / 1e6,
                            overlap_s=-delta / 1e6,
                        )
                    )
        placement = ClockPlacement(
            start_us=start, period_us=period_us, count=count, events=tuple(events)
        )
        self._last_raw = raw
        self._last_start = start
        self._next_start = placement.end_us
        self._last_period = period_us
        return placement


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class FrameCheck:
    """The verdict on one frame: whether to use it, what happened, and where its samples sit."""

    sequence: int
    accepted: bool
    events: tuple[SequenceEvent, ...]
    placement: ClockPlacement | None
    """``None`` exactly when the frame was refused."""

    def times_s(self) -> NDArray[np.float64]:
        """Continuous sample times of an accepted frame; ``ValueError`` for a refused one."""
        if self.placement is None:
            raise ValueError(f"frame {self.sequence} was refused; its samples have no place")
        return self.placement.times_s()


class SequenceChecker:
    """Checks one connection's frames in arrival order; make a new one per connection.

    ``feed`` takes a ``SampleFrame`` or a ``FrameHeader`` and returns a ``FrameCheck``. The
    checker never raises on odd sensor data: every oddity is an event in the report.
    """

    def __init__(
        self, *, modulus: int = SEQUENCE_MODULUS, wrap_us: int = TIMESTAMP_WRAP_US
    ) -> None:
        if modulus < 2:
            raise ValueError("modulus must be >= 2")
        self._modulus = modulus
        self._clock = SampleClock(wrap_us=wrap_us)
        self._last: int | None = None
        self._past_run: list[int] = []
        self.frames_accepted = 0
        self.frames_lost = 0
        self.frames_refused = 0

    @property
    def expected(self) -> int | None:
        """The counter value the next frame should carry (``None`` before the first frame)."""
        return None if self._last is None else (self._last + 1) % self._modulus

    def feed(self, frame: SampleFrame | FrameHeader) -> FrameCheck:
        """Check one frame against the stream so far and place its samples in time."""
        if isinstance(frame, SampleFrame):
            header = FrameHeader(
                sequence=frame.sequence,
                timestamp_us=frame.timestamp_us,
                period_us=frame.period_us,
                count=frame.count,
                clock_reset=FrameFlags.CLOCK_RESET in frame.flags,
            )
        else:
            header = frame
        sequence = header.sequence % self._modulus
        events: list[SequenceEvent] = []
        expected = self.expected
        if expected is not None:
            ahead = (sequence - expected) % self._modulus
            behind = ahead >= self._modulus // 2
            if behind and self._restarted(sequence, clock_reset=header.clock_reset):
                events.append(SequenceRestart(expected=expected, received=sequence))
            elif behind:
                self.frames_refused += 1
                if sequence == self._last:
                    events.append(DuplicateFrame(sequence=sequence))
                else:
                    events.append(LateFrame(sequence=sequence, expected=expected))
                return FrameCheck(
                    sequence=sequence, accepted=False, events=tuple(events), placement=None
                )
            elif ahead:
                self.frames_lost += ahead
                events.append(LostFrames(expected=expected, received=sequence, missing=ahead))
        placement = self._clock.place(
            header.timestamp_us, header.period_us, header.count, clock_reset=header.clock_reset
        )
        events.extend(placement.events)
        self._past_run.clear()
        self._last = sequence
        self.frames_accepted += 1
        return FrameCheck(
            sequence=sequence, accepted=True, events=tuple(events), placement=placement
        )

    def _restarted(self, sequence: int, *, clock_reset: bool) -> bool:
        if clock_reset:
            return True
        run = self._past_run
        if run and (run[-1] + 1) % self._modulus != sequence:
            run.clear()
        run.append(sequence)
        return len(run) >= _RESTART_RUN

    def feed_all(self, frames: list[SampleFrame] | list[FrameHeader]) -> list[FrameCheck]:
        """Feed several frames in arrival order (same result as feeding them one by one)."""
        return [self.feed(f) for f in frames]
