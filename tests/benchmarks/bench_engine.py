"""Engine throughput per strategy, fed in 22-sample frames (the BLE profile's frame at an
ATT MTU of 185-ish; 28 is the ceiling at 247). Goal: ≤ 2 µs per sample amortised.

Run: .venv/bin/python -m pytest -p benchmark tests/benchmarks/bench_engine.py --benchmark-only
Each round feeds one whole rundown (rest, three ratchet strokes, release) at 1 kHz; the
figure to read is mean time / samples per round (printed as extra_info "us_per_sample").
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt
import pytest

from clampd.daemon.engine import Engine, RundownFinished, program_from_mapping

F = npt.NDArray[np.float64]
FRAME = 22
FS = 1000.0


def _trace(seed: int = 1) -> tuple[F, F, F]:
    rng = np.random.default_rng(seed)
    dt = 1.0 / FS
    parts_t: list[F] = []
    parts_T: list[F] = []
    parts_r: list[F] = []
    t0 = 0.0

    def seg(T: F, r: F) -> None:
        nonlocal t0
        n = T.size
        parts_t.append(t0 + dt * np.arange(1, n + 1, dtype=np.float64))
        t0 += dt * n
        parts_T.append(T + rng.normal(0.0, 0.05, n))
        parts_r.append(r + 0.8 + rng.normal(0.0, 0.5, n))

    seg(np.zeros(500), np.zeros(500))
    phi = 0.0
    for s in range(3):
        n = 1000
        ph = phi + 25.0 * dt * np.arange(1, n + 1)
        T = 2.0 + 1.5 * np.minimum(ph, 40.0) + 0.1 * np.maximum(ph - 40.0, 0.0)
        seg(T, np.full(n, 25.0))
        phi = float(ph[-1])
        seg(T[-1] * (1 - np.arange(1, 31) / 30.0), np.zeros(30))
        if s < 2:
            seg(np.full(300, 0.1), np.full(300, -60.0))
            seg(np.linspace(0.1, T[-1], 50), np.full(50, 5.0))
    seg(np.zeros(500), np.zeros(500))
    return np.concatenate(parts_t), np.concatenate(parts_T), np.concatenate(parts_r)


PROGRAMS: dict[str, dict[str, Any]] = {
    "torque": {"strategy": "torque", "target_torque": 500.0},
    "torque-angle": {"strategy": "torque-angle", "target_angle": 500.0},
    "yield": {"strategy": "yield", "yield_min_angle": 1000.0},
    "torque-to-yield": {"strategy": "torque-to-yield", "target_angle": 500.0},
    "multi-step": {
        "strategy": "multi-step",
        "step": [
            {"kind": "torque", "target_torque": 20.0},
            {"kind": "angle", "target_angle": 10.0},
            {"kind": "angle", "target_angle": 500.0},
        ],
    },
    # torque control with every error-proofing check on (their cost: the idle run-in kept and
    # one pass over the kept samples at the end of the rundown)
    "torque+proofing": {
        "strategy": "torque",
        "target_torque": 500.0,
        "prevailing_torque_window": [0.0, 3.0],
        "rundown_angle_window": [5.0, 400.0],
        "joint_rate_window": [0.5, 5.0],
        "rehit_angle_max": 2.0,
        "torque_drop": 0.2,
    },
}


@pytest.mark.parametrize("strategy", list(PROGRAMS))
def test_engine_throughput(benchmark: Any, strategy: str) -> None:
    """Targets are out of reach so every strategy runs its full monitoring all the way."""
    prog = program_from_mapping(
        {"id": f"bench-{strategy}", "snug_torque": 8.0, **PROGRAMS[strategy]}
    )
    t, T, r = _trace()
    starts = range(0, t.size, FRAME)

    def run() -> int:
        eng = Engine(prog)
        n_events = 0
        for a in starts:
            n_events += len(eng.feed(t[a : a + FRAME], T[a : a + FRAME], r[a : a + FRAME]))
        n_events += len(eng.tick(float(t[-1]) + 100.0))
        return n_events

    n = benchmark(run)
    assert n > 0
    eng = Engine(prog)
    done = [
        e for a in starts for e in eng.feed(t[a : a + FRAME], T[a : a + FRAME], r[a : a + FRAME])
    ]
    done += eng.tick(float(t[-1]) + 100.0)
    assert any(isinstance(e, RundownFinished) for e in done)
    benchmark.extra_info["samples"] = int(t.size)
    if benchmark.stats is not None:
        benchmark.extra_info["us_per_sample"] = benchmark.stats.stats.mean / t.size * 1e6
