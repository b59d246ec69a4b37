"""Study throughput: closed-loop rundowns per second with the engine in the loop.

Why it matters: a study of 200 joints runs 600–1200 rundowns; the issue asks for one to finish
well under a minute. The simulator's own sample loop dominates (the engine is fed whole frames
and costs a few per cent), so this also tracks the simulator's speed.
Run:
``.venv/bin/python -m pytest -p benchmark tests/benchmarks/bench_studies.py --benchmark-only -s``.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from clampd.simulators.studies import PRELOAD_STRATEGIES
from clampd.simulators.studies._angle import angle_joint
from clampd.simulators.studies._preload import preload_joint


def _report(benchmark: Any, rundowns: int) -> None:
    median = benchmark.stats.stats.median
    benchmark.extra_info["rundowns_per_s_median"] = round(rundowns / median, 2)
    print(f"\n{benchmark.name}: {rundowns / median:.1f} rundowns/s (median, one process)")


def test_preload_joint_all_strategies(benchmark: Any) -> None:
    seeds = iter(np.random.SeedSequence(1).spawn(1000))

    def run() -> int:
        return len(preload_joint(next(seeds)))

    assert benchmark.pedantic(run, rounds=5, iterations=1) == len(PRELOAD_STRATEGIES)
    _report(benchmark, len(PRELOAD_STRATEGIES))


def test_angle_joint_all_rates(benchmark: Any) -> None:
    seeds = iter(np.random.SeedSequence(2).spawn(1000))

    def run() -> int:
        return len(angle_joint(next(seeds)))

    n = benchmark.pedantic(run, rounds=3, iterations=1)
    _report(benchmark, n)
