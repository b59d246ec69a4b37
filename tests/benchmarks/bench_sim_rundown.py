"""Simulator throughput: samples per second of a closed-loop rundown and of sensor frames.

Why it matters: the virtual wrench must produce 4 kHz of samples faster than real time on one
core (or the BLE demo falls behind), and population studies run thousands of rundowns.
Run:
``.venv/bin/python -m pytest -p benchmark tests/benchmarks/bench_sim_rundown.py --benchmark-only``.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from clampd.simulators import (
    Bench,
    JointModel,
    Opcode,
    OperatorParams,
    SensorParams,
    VirtualWrenchSensor,
    encode_control,
    simulate_rundown,
)


def _report(benchmark: Any, samples_per_call: int) -> None:
    stats = benchmark.stats.stats
    benchmark.extra_info["samples_per_s_median"] = round(samples_per_call / stats.median)
    print(
        f"\n{benchmark.name}: {samples_per_call / stats.median / 1e3:.1f} thousand samples/s "
        f"(median; mean {samples_per_call / stats.mean / 1e3:.1f})"
    )


def test_closed_loop_rundown(benchmark: Any) -> None:
    joint = JointModel.sample(np.random.default_rng(1))
    op = OperatorParams(ignore_cues=True, stop_at_torque_nm=50.0)

    def run() -> int:
        return len(simulate_rundown(joint, SensorParams(), op, np.random.default_rng(2)))

    n = benchmark.pedantic(run, rounds=5, iterations=1)
    _report(benchmark, n)


def test_sensor_frames_while_tightening(benchmark: Any) -> None:
    rng = np.random.default_rng(3)
    params = SensorParams(sample_rate_hz=4000)
    bench = Bench(
        (JointModel.sample(rng) for _ in range(1000)),
        OperatorParams(ignore_cues=True, stop_at_torque_nm=50.0, part_pause_s=(0.5, 1.0)),
        rng,
    )
    sensor = VirtualWrenchSensor(params, rng, bench)
    sensor.on_control(encode_control(Opcode.START_STREAM))

    def run() -> int:
        return sum(len(sensor.next_notification()[0]) for _ in range(100))

    assert benchmark(run) == 100 * (20 + 28 * 8)
    _report(benchmark, 100 * 28)
