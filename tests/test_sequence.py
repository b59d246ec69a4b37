"""Continuity of a frame stream: lost, repeated and late frames, wraps, clock restarts.

References: the wrap rules of the sequence counter (u16) and timestamp (u32 µs) are from
``protocol/PROFILE.md``; "a forward difference below half the range is ahead" is serial number
arithmetic, RFC 1982 §3.2. Expected sample times are computed here from exact integers, the
way the profile defines them (sample i at timestamp_us + i·period_us).
"""

from __future__ import annotations

import struct

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from clampd.protocol import (
    ClockReset,
    DuplicateFrame,
    FrameCheck,
    FrameHeader,
    LateFrame,
    LostFrames,
    SampleClock,
    SequenceChecker,
    SequenceRestart,
    TimeGap,
    TimeOverlap,
    decode_frame,
)

WRAP_US = 2**32  # PROFILE.md: timestamp_us wraps 2^32 − 1 → 0


def headers(
    *, first_sequence: int, first_us: int, period_us: int, counts: list[int]
) -> list[FrameHeader]:
    """A gap-free stream cut into frames of the given sizes, wrapping as a sensor would."""
    out = []
    t = first_us
    for i, n in enumerate(counts):
        out.append(
            FrameHeader(
                sequence=(first_sequence + i) % 65536,
                timestamp_us=t % WRAP_US,
                period_us=period_us,
                count=n,
            )
        )
        t += n * period_us
    return out


def events_of(checks: list[FrameCheck]) -> list[object]:
    return [e for c in checks for e in c.events]


def all_times(checks: list[FrameCheck]) -> np.ndarray:
    return np.concatenate([c.times_s() for c in checks if c.accepted])


def test_in_order_stream_has_no_events_and_exact_times() -> None:
    stream = headers(first_sequence=10, first_us=1_000_000, period_us=1000, counts=[28] * 5)
    checks = SequenceChecker().feed_all(stream)
    assert events_of(checks) == []
    assert all(c.accepted for c in checks)
    expected = (1_000_000 + 1000 * np.arange(140)) / 1e6
    np.testing.assert_array_equal(all_times(checks), expected)


def test_lost_frames_are_counted_and_leave_a_time_gap() -> None:
    stream = headers(first_sequence=0, first_us=0, period_us=500, counts=[10] * 6)
    checker = SequenceChecker()
    checks = checker.feed_all([stream[0], stream[1], stream[4], stream[5]])
    assert checks[2].events == (
        LostFrames(expected=2, received=4, missing=2),
        TimeGap(expected_t_s=0.01, received_t_s=0.02, gap_s=0.01, missing_samples=20),
    )
    assert checks[3].events == ()
    assert checker.frames_lost == 2
    # The samples after the gap keep their true times (no drift from the loss).
    np.testing.assert_array_equal(checks[2].times_s(), (20_000 + 500 * np.arange(10)) / 1e6)


def test_sequence_wraps_from_65535_to_0() -> None:
    stream = headers(first_sequence=65534, first_us=0, period_us=1000, counts=[4] * 4)
    checks = SequenceChecker().feed_all(stream)
    assert [c.sequence for c in checks] == [65534, 65535, 0, 1]
    assert events_of(checks) == []


def test_loss_across_the_sequence_wrap() -> None:
    stream = headers(first_sequence=65533, first_us=0, period_us=1000, counts=[4] * 5)
    checks = SequenceChecker().feed_all([stream[0], stream[4]])  # 65533 then 1
    lost = [e for e in checks[1].events if isinstance(e, LostFrames)]
    assert lost == [LostFrames(expected=65534, received=1, missing=3)]


def test_duplicate_and_late_frames_are_refused() -> None:
    stream = headers(first_sequence=100, first_us=0, period_us=1000, counts=[2] * 4)
    checker = SequenceChecker()
    first = checker.feed_all([stream[0], stream[2]])
    duplicate = checker.feed(stream[2])
    late = checker.feed(stream[1])
    after = checker.feed(stream[3])
    assert first[1].events[0] == LostFrames(expected=101, received=102, missing=1)
    assert (duplicate.accepted, duplicate.events) == (False, (DuplicateFrame(sequence=102),))
    assert (late.accepted, late.events) == (False, (LateFrame(sequence=101, expected=103),))
    assert duplicate.placement is None
    with pytest.raises(ValueError, match="refused"):
        late.times_s()
    assert (after.accepted, after.events) == (True, ())
    assert checker.frames_refused == 2


def test_timestamp_wraps_at_2_pow_32_microseconds() -> None:
    start = WRAP_US - 2500  # 2.5 ms before the wrap, 1 kHz, 4 samples per frame
    stream = headers(first_sequence=0, first_us=start, period_us=1000, counts=[4] * 3)
    assert stream[1].timestamp_us == 1500  # the sensor's counter has wrapped
    checks = SequenceChecker().feed_all(stream)
    assert events_of(checks) == []
    times = all_times(checks)
    np.testing.assert_array_equal(times, (start + 1000 * np.arange(12)) / 1e6)
    assert np.all(np.diff(times) > 0)


def test_clock_reset_flag_continues_after_previous_end_plus_one_period() -> None:
    checker = SequenceChecker()
    checker.feed(FrameHeader(sequence=1, timestamp_us=7_000_000, period_us=1000, count=10))
    reset = checker.feed(
        FrameHeader(sequence=2, timestamp_us=40, period_us=1000, count=10, clock_reset=True)
    )
    # previous frame ends at 7.010 s; plus one period → 7.011 s
    assert reset.events == (ClockReset(t_s=7.011, flagged=True),)
    np.testing.assert_array_equal(reset.times_s(), (7_011_000 + 1000 * np.arange(10)) / 1e6)
    following = checker.feed(FrameHeader(sequence=3, timestamp_us=10_040, period_us=1000, count=1))
    assert following.events == ()
    assert following.times_s()[0] == pytest.approx(7.021)


def test_backwards_jump_without_flag_is_an_inferred_clock_reset() -> None:
    checker = SequenceChecker()
    checker.feed(FrameHeader(sequence=1, timestamp_us=9_000_000, period_us=1000, count=5))
    check = checker.feed(FrameHeader(sequence=2, timestamp_us=100, period_us=1000, count=5))
    assert check.events == (ClockReset(t_s=9.006, flagged=False),)


def test_clock_reset_flag_wins_even_when_time_looks_continuous() -> None:
    clock = SampleClock()
    clock.place(1000, 1000, 3)
    placement = clock.place(4000, 1000, 3, clock_reset=True)
    assert placement.events == (ClockReset(t_s=0.005, flagged=True),)
    assert placement.start_us == 5000


def test_time_gap_and_overlap_without_lost_frames() -> None:
    checker = SequenceChecker()
    checker.feed(FrameHeader(sequence=0, timestamp_us=0, period_us=1000, count=10))
    gap = checker.feed(FrameHeader(sequence=1, timestamp_us=13_000, period_us=1000, count=10))
    assert gap.events == (
        TimeGap(expected_t_s=0.010, received_t_s=0.013, gap_s=0.003, missing_samples=3),
    )
    overlap = checker.feed(FrameHeader(sequence=2, timestamp_us=21_000, period_us=1000, count=1))
    assert overlap.events == (TimeOverlap(expected_t_s=0.023, received_t_s=0.021, overlap_s=0.002),)


def test_sub_period_rounding_at_3_khz_is_not_a_gap() -> None:
    # 3 kHz has a true period of 333.33 µs but period_us carries 333; a sensor stamping each
    # frame from its real clock drifts by a third of a microsecond per sample. Not a gap.
    checker = SequenceChecker()
    checks = [
        checker.feed(
            FrameHeader(
                sequence=i,
                timestamp_us=round(i * 28 * 1e6 / 3000),
                period_us=333,
                count=28,
            )
        )
        for i in range(200)
    ]
    assert events_of(checks) == []


def test_sensor_reboot_resynchronises() -> None:
    checker = SequenceChecker()
    checker.feed_all(headers(first_sequence=5000, first_us=10**9, period_us=1000, counts=[2] * 3))
    flagged = checker.feed(
        FrameHeader(sequence=0, timestamp_us=0, period_us=1000, count=2, clock_reset=True)
    )
    assert flagged.accepted
    assert flagged.events[0] == SequenceRestart(expected=5003, received=0)
    assert isinstance(flagged.events[1], ClockReset)
    assert (
        checker.feed(FrameHeader(sequence=1, timestamp_us=2000, period_us=1000, count=2)).events
        == ()
    )


def test_run_of_frames_from_the_past_is_a_restart_not_stragglers() -> None:
    checker = SequenceChecker()
    checker.feed_all(headers(first_sequence=9000, first_us=0, period_us=1000, counts=[2] * 2))
    restart = headers(first_sequence=3, first_us=10**8, period_us=1000, counts=[2] * 4)
    checks = checker.feed_all(restart)
    assert [c.accepted for c in checks] == [False, False, True, True]
    assert SequenceRestart(expected=9002, received=5) in checks[2].events
    assert checks[3].events == ()


@settings(max_examples=200)
@given(
    first_sequence=st.integers(0, 65535),
    first_us=st.integers(0, WRAP_US - 1),
    period_us=st.integers(100, 65535),
    total=st.integers(1, 400),
    cuts_a=st.lists(st.integers(1, 28), min_size=1, max_size=400),
    cuts_b=st.lists(st.integers(1, 28), min_size=1, max_size=400),
)
def test_same_samples_framed_differently_get_the_same_times(
    *,
    first_sequence: int,
    first_us: int,
    period_us: int,
    total: int,
    cuts_a: list[int],
    cuts_b: list[int],
) -> None:
    def framing(cuts: list[int]) -> list[int]:
        sizes, left = [], total
        for c in cuts * (total // len(cuts) + 1):
            if left == 0:
                break
            sizes.append(min(c, left))
            left -= sizes[-1]
        return sizes

    times = []
    for cuts in (cuts_a, cuts_b, [total]):
        stream = headers(
            first_sequence=first_sequence,
            first_us=first_us,
            period_us=period_us,
            counts=framing(cuts),
        )
        checks = SequenceChecker().feed_all(stream)
        assert events_of(checks) == []
        times.append(all_times(checks))
    expected = (first_us + period_us * np.arange(total)) / 1e6
    for t in times:
        np.testing.assert_array_equal(t, expected)


@settings(max_examples=200)
@given(
    first_sequence=st.integers(0, 65535),
    first_us=st.integers(0, WRAP_US - 1),
    sizes=st.lists(st.integers(1, 28), min_size=2, max_size=60),
    dropped=st.sets(st.integers(1, 58)),
)
def test_dropped_frames_are_reported_exactly(
    *, first_sequence: int, first_us: int, sizes: list[int], dropped: set[int]
) -> None:
    stream = headers(first_sequence=first_sequence, first_us=first_us, period_us=250, counts=sizes)
    # Keep the last frame so that every loss is followed by a frame that reveals it.
    lost = {i for i in dropped if i < len(stream) - 1}
    received = [h for i, h in enumerate(stream) if i not in lost]
    checker = SequenceChecker()
    checks = checker.feed_all(received)
    events = events_of(checks)
    assert sum(e.missing for e in events if isinstance(e, LostFrames)) == len(lost)
    assert sum(e.missing_samples for e in events if isinstance(e, TimeGap)) == sum(
        sizes[i] for i in lost
    )
    assert checker.frames_lost == len(lost)
    kept = np.concatenate(
        [(h_start + 250 * np.arange(n)) for h_start, n in _starts(first_us, sizes, lost)]
    )
    np.testing.assert_array_equal(all_times(checks), kept / 1e6)


def _starts(first_us: int, sizes: list[int], lost: set[int]) -> list[tuple[int, int]]:
    out, t = [], first_us
    for i, n in enumerate(sizes):
        if i not in lost:
            out.append((t, n))
        t += 250 * n
    return out


def _frame_bytes(h: FrameHeader, flags: int = 0) -> bytes:
    # PROFILE.md samples frame, packed field by field (independent of the decoder).
    head = struct.pack(
        "<BBHIHBBff", 1, flags, h.sequence, h.timestamp_us, h.period_us, h.count, 0, 0.01, 0.1
    )
    return head + struct.pack(f"<{4 * h.count}h", *([1] * 4 * h.count))


@settings(max_examples=100)
@given(
    sizes=st.lists(st.integers(1, 28), min_size=1, max_size=30),
    order=st.permutations(range(30)),
)
def test_frames_and_headers_and_one_by_one_agree(sizes: list[int], order: list[int]) -> None:
    stream = headers(first_sequence=65530, first_us=WRAP_US - 20_000, period_us=1000, counts=sizes)
    # A shuffled arrival order exercises loss, duplicates and late frames alike.
    arrival = [stream[i % len(stream)] for i in order]
    frames = [decode_frame(_frame_bytes(h)) for h in arrival]
    whole = SequenceChecker().feed_all(arrival)
    decoded = SequenceChecker().feed_all(frames)
    single = SequenceChecker()
    one_by_one = [single.feed(h) for h in arrival]
    assert [(c.sequence, c.accepted, c.events) for c in whole] == [
        (c.sequence, c.accepted, c.events) for c in decoded
    ]
    assert [c.events for c in whole] == [c.events for c in one_by_one]
    assert all(c.accepted == (c.placement is not None) for c in whole)


def test_clock_reset_flag_is_read_from_decoded_frames() -> None:
    checker = SequenceChecker()
    checker.feed(
        decode_frame(
            _frame_bytes(FrameHeader(sequence=0, timestamp_us=500_000, period_us=1000, count=2))
        )
    )
    check = checker.feed(
        decode_frame(
            _frame_bytes(
                FrameHeader(sequence=1, timestamp_us=502_000, period_us=1000, count=2), flags=0x04
            )
        )
    )
    assert check.events == (ClockReset(t_s=0.503, flagged=True),)


def test_header_rejects_impossible_values() -> None:
    with pytest.raises(ValueError, match="period_us"):
        FrameHeader(sequence=0, timestamp_us=0, period_us=0, count=1)
    with pytest.raises(ValueError, match="sequence"):
        FrameHeader(sequence=-1, timestamp_us=0, period_us=1, count=1)


@pytest.mark.parametrize(
    ("received", "accepted", "event"),
    [
        # expected is 1; a forward difference of 32767 is the largest loss (half range − 1) ...
        (32768, True, LostFrames(expected=1, received=32768, missing=32767)),
        # ... and exactly half the range is read as the past. RFC 1982 §3.2 leaves that one
        # case undefined; PROFILE.md ("Receiving a stream") fixes it as "from the past".
        (32769, False, LateFrame(sequence=32769, expected=1)),
        (65535, False, LateFrame(sequence=65535, expected=1)),
    ],
)
def test_half_range_boundary(received: int, accepted: bool, event: object) -> None:
    checker = SequenceChecker()
    checker.feed(FrameHeader(sequence=0, timestamp_us=0, period_us=1000, count=1))
    check = checker.feed(FrameHeader(sequence=received, timestamp_us=1000, period_us=1000, count=1))
    assert check.accepted is accepted
    assert check.events[0] == event
