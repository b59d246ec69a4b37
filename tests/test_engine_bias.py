"""The gyro bias estimate at rest, against a known bias.

A trace rests with a known gyro bias plus white noise, then the hand accelerates at a constant
rate through the rest threshold (5 deg/s) into a pull. The estimate must agree with the known
bias within the standard error of a mean of the rest samples (σ/√n, bound at the two-sided
99.99 % normal quantile from scipy.stats.norm); with the guard turned off, the first
milliseconds of motion count as rest and push the estimate up by more than that bound, which
shows the trace exercises the guard.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt
import pytest
from scipy.stats import norm

from clampd.daemon.engine import (
    Engine,
    EngineSettings,
    EngineUsageError,
    RundownStarted,
    program_from_mapping,
)

F = npt.NDArray[np.float64]
FS = 1000.0
NOISE_DPS = 0.1  # white gyro noise, rms (order of MEMS datasheets, from memory)


def trace(bias: float, accel_dps2: float, seed: int, rest_s: float = 0.3) -> tuple[F, F, F]:
    """Rest, then a pull accelerating at ``accel_dps2`` to 60 deg/s; torque rises from the
    start of motion (prevailing torque, then the joint) so the rundown starts after it."""
    rng = np.random.default_rng(seed)
    n_rest = round(rest_s * FS)
    n_move = 600
    t = np.arange(n_rest + n_move) / FS
    rate = np.zeros_like(t)
    tm = (np.arange(n_move) + 1) / FS
    rate[n_rest:] = np.minimum(accel_dps2 * tm, 60.0)
    torque = np.zeros_like(t)
    # 0.3 N·m of prevailing torque for 0.1 s of free run-in, then the joint: the start level
    # (1 N·m) comes 118 ms after motion began
    torque[n_rest:] = np.minimum(0.3 + 40.0 * np.maximum(tm - 0.1, 0.0), 12.0)
    return t, torque, rate + bias + NOISE_DPS * rng.standard_normal(t.shape[0])


def estimate(t: F, T: F, r: F, settings: EngineSettings) -> float:
    p = program_from_mapping(
        {"id": "b", "strategy": "torque", "snug_torque": 5.0, "target_torque": 10.0}
    )
    events = Engine(p, settings).feed(t, T, r)
    return next(e.gyro_bias_dps for e in events if isinstance(e, RundownStarted))


@pytest.mark.parametrize("bias", [-0.8, 0.0, 0.35, 1.2])
@pytest.mark.parametrize("accel", [100.0, 600.0])
def test_bias_estimate_matches_a_known_bias(bias: float, accel: float) -> None:
    t, T, r = trace(bias, accel, seed=int(accel) + round(bias * 10))
    s = EngineSettings()
    # rest samples the guard keeps: from the start to rest_guard_s before motion begins
    n_kept = round((0.3 - s.rest_guard_s) * FS)
    bound = norm.ppf(1.0 - 0.5e-4) * NOISE_DPS / np.sqrt(n_kept)
    assert estimate(t, T, r, s) == pytest.approx(bias, abs=bound)


def test_without_the_guard_the_start_of_motion_biases_the_estimate_high() -> None:
    bias, accel = 0.35, 100.0
    t, T, r = trace(bias, accel, seed=7)
    n_rest = round(0.3 * FS)
    bound = norm.ppf(1.0 - 0.5e-4) * NOISE_DPS / np.sqrt(n_rest)
    unguarded = estimate(t, T, r, EngineSettings(rest_guard_s=0.0))
    assert unguarded - bias > bound
    assert abs(estimate(t, T, r, EngineSettings()) - bias) < unguarded - bias


def test_rest_after_motion_is_guarded_too() -> None:
    """Rest, a short wiggle, 0.5 s rest, then the pull: the samples right after the wiggle
    (rate decaying through the threshold) are left out as well."""
    t, T, r = trace(0.5, 100.0, seed=3, rest_s=1.0)
    wiggle = (t > 0.2) & (t < 0.3)
    r[wiggle] += 40.0 * np.sin(np.pi * (t[wiggle] - 0.2) / 0.1)
    est = estimate(t, T, r, EngineSettings())
    bound = norm.ppf(1.0 - 0.5e-4) * NOISE_DPS / np.sqrt(round(0.4 * FS))
    assert est == pytest.approx(0.5, abs=bound)


def test_rest_guard_is_validated() -> None:
    with pytest.raises(EngineUsageError, match="rest_guard_s"):
        EngineSettings(rest_guard_s=-0.01)
