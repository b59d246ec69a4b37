"""Decode throughput of sensor frames, in samples per second (goal: ≥ 2 million on one core).

Why it matters: a station runs several wrenches at up to 4 kHz each on a small board, and the
decoder sits on every notification's path; it should cost a small fraction of one core.
Run: ``.venv/bin/python -m pytest -p benchmark tests/benchmarks/bench_decode.py --benchmark-only``.
The samples/s figure is printed per benchmark (``extra_info``; 28 samples per mean call).
Frames are packed here with ``struct`` per PROFILE.md, not with any clampd encoder.
"""

from __future__ import annotations

import struct
from typing import Any

import numpy as np

from clampd.protocol import (
    FrameHeader,
    SequenceChecker,
    decode_frame,
    load_builtin_profile,
)

SAMPLES = 28  # the most a notification carries at ATT MTU 247 (PROFILE.md)


def _v1_frames(n: int) -> list[bytes]:
    rng = np.random.default_rng(7)
    frames = []
    for i in range(n):
        head = struct.pack(
            "<BBHIHBBff", 1, 0, i % 65536, 1000 * 28 * i, 1000, SAMPLES, 0, 0.01, 0.1
        )
        body = rng.integers(-32767, 32768, size=4 * SAMPLES).astype("<i2").tobytes()
        frames.append(head + body)
    return frames


def _report(benchmark: Any, samples_per_call: int) -> None:
    # The median resists the other processes of a shared machine; the mean is shown beside it.
    stats = benchmark.stats.stats
    benchmark.extra_info["samples_per_s_median"] = round(samples_per_call / stats.median)
    benchmark.extra_info["samples_per_s_mean"] = round(samples_per_call / stats.mean)
    benchmark.extra_info["samples_per_s_best"] = round(samples_per_call / stats.min)
    print(
        f"\n{benchmark.name}: {samples_per_call / stats.median / 1e6:.2f} million samples/s "
        f"(median; mean {samples_per_call / stats.mean / 1e6:.2f}, "
        f"best {samples_per_call / stats.min / 1e6:.2f})"
    )


def test_decode_v1_frames(benchmark: Any) -> None:
    frames = _v1_frames(1000)

    def run() -> int:
        total = 0
        for f in frames:
            total += decode_frame(f).count
        return total

    assert benchmark(run) == 1000 * SAMPLES
    _report(benchmark, 1000 * SAMPLES)


def test_decode_v1_one_frame(benchmark: Any) -> None:
    frame = _v1_frames(1)[0]
    assert benchmark(decode_frame, frame).count == SAMPLES
    _report(benchmark, SAMPLES)


def test_decode_declarative_bench_stick(benchmark: Any) -> None:
    profile = load_builtin_profile("bench-stick")
    rng = np.random.default_rng(8)
    head = struct.pack(">BBIB", 0xB5, 1, 1000, SAMPLES)
    torque = rng.integers(-(2**31), 2**31, size=SAMPLES)
    gyro = rng.integers(-32767, 32768, size=SAMPLES)
    body = b"".join(struct.pack(">ih", int(t), int(g)) for t, g in zip(torque, gyro, strict=True))
    assert benchmark(profile.decode, head + body).count == SAMPLES
    _report(benchmark, SAMPLES)


def test_sequence_checker_feed(benchmark: Any) -> None:
    headers = [
        FrameHeader(sequence=i % 65536, timestamp_us=28_000 * i, period_us=1000, count=SAMPLES)
        for i in range(1000)
    ]

    def run() -> int:
        checker = SequenceChecker()
        return sum(checker.feed(h).accepted for h in headers)

    assert benchmark(run) == 1000
    _report(benchmark, 1000 * SAMPLES)
