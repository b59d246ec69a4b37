"""Angle accuracy: the engine's counted angle against the true fastener rotation.

Theory of operation. The engine integrates the gyro's rate about the fastener axis on the
sensor's own timestamps, removes the bias it estimated at rest, counts only while the fastener
turns (ratchet back-swings and the wind-up at each stroke's start do not turn it) and takes
off the wrench's own deflection. The simulator knows the true fastener angle, so the error of
that whole chain can be measured: here over handle rates from 10 to 360 °/s, each rate a case
of its own, with a turn-on gyro bias drawn per wrench (σ 0.5 °/s per axis), bias drift, white
noise, hand wobble and 16-bit quantisation (the simulator's sensor model).

The operator ignores cues and decides to stop at an angle of their own, 10–30° past the
joint's true snug, then stops a reaction time later (so fast cases end further on, some past
yield), with ratchet strokes; the engine runs the planner's torque-angle program only to
count. The error is taken at the result's final point (the angle
reported to the plant): counted angle from snug minus the true rotation between the same two
samples. Goal: |error| ≤ 0.5° + 0.5 % of the reading for 95 % of rundowns.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from clampd.daemon.engine import EngineSettings
from clampd.simulators import OperatorParams
from clampd.simulators.studies._common import (
    CAUTION,
    check_study_args,
    draw_sensor,
    final_index,
    joint_seeds,
    parallel_map,
    quantiles,
    rounded,
    run_closed_loop,
    true_rotation_deg,
)
from clampd.simulators.studies._preload import PRELOAD_POPULATION, preload_programs

__all__ = [
    "ANGLE_GOAL_SHARE",
    "ANGLE_RATES_DPS",
    "ANGLE_TOLERANCE",
    "AngleRun",
    "angle_case_name",
    "angle_joint",
    "angle_study",
    "angle_table",
    "angle_tolerance_deg",
]

ANGLE_RATES_DPS: tuple[float, ...] = (10.0, 30.0, 60.0, 120.0, 240.0, 360.0)
# Goal of the study: within ±(0.5° + 0.5 % of reading) for 95 % of rundowns.
ANGLE_TOLERANCE = (0.5, 0.005)
ANGLE_GOAL_SHARE = 0.95
# The wrench picks up 10–20° before contact here (modelling choice: keeps the slow cases short;
# the free run adds nothing to the angle from snug).
_POPULATION = dataclasses.replace(PRELOAD_POPULATION, contact_angle_deg=(10.0, 20.0))
# Decide to stop 10–30° past true snug: inside the elastic range of this population (yield
# onset is ~30–40° past snug); the reaction time adds rate × ~0.2 s on top.
_STOP_PAST_SNUG_DEG = (10.0, 30.0)


def angle_tolerance_deg(reading_deg: float) -> float:
    """The goal's tolerance at a reading: 0.5° + 0.5 % of it."""
    fixed, share = ANGLE_TOLERANCE
    return fixed + share * abs(reading_deg)


def angle_case_name(rate_dps: float) -> str:
    """Case key that sorts by rate: ``rate_010_dps``."""
    return f"rate_{round(rate_dps):03d}_dps"


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class AngleRun:
    """One rundown: the counted and the true angle at the final point."""

    counted_deg: float
    true_deg: float

    @property
    def error_deg(self) -> float:
        """Counted minus true."""
        return self.counted_deg - self.true_deg


def angle_joint(seed: np.random.SeedSequence) -> dict[str, AngleRun]:
    """One joint, wrench and person; one rundown per rate."""
    kids = seed.spawn(3 + len(ANGLE_RATES_DPS))
    joint = _POPULATION.draw(np.random.default_rng(kids[0]))
    person = np.random.default_rng(kids[1])
    sensor = draw_sensor(np.random.default_rng(kids[2]))
    stop = joint.snug_angle_deg + float(person.uniform(*_STOP_PAST_SNUG_DEG))
    program = preload_programs()["torque-angle"]
    out: dict[str, AngleRun] = {}
    for i, rate in enumerate(ANGLE_RATES_DPS):
        operator = OperatorParams.sample(
            person,
            steady_rate_dps=rate,
            # reach the rate in 0.1 s as the default person does at 60 °/s (modelling choice)
            accel_dps2=max(600.0, 10.0 * rate),
            back_rate_dps=max(240.0, rate),
            ignore_cues=True,
            stop_at_angle_deg=stop,
        )
        outcome = run_closed_loop(
            joint,
            program,
            settings=EngineSettings(deflection_deg_per_nm=sensor.deflection_deg_per_nm),
            sensor=sensor,
            operator=operator,
            rng=np.random.default_rng(kids[3 + i]),
        )
        res = outcome.result
        k = final_index(res)
        out[angle_case_name(rate)] = AngleRun(
            counted_deg=res.final_angle_deg if res.snug is not None else math.nan,
            true_deg=true_rotation_deg(outcome, k),
        )
    return out


def _summary(rate: float, runs: Sequence[AngleRun]) -> dict[str, Any]:
    n = len(runs)
    err = np.array([r.error_deg for r in runs], dtype=np.float64)
    true = np.array([r.true_deg for r in runs], dtype=np.float64)
    found = np.isfinite(err)
    tol = np.array([angle_tolerance_deg(t) for t in true])
    within = float(np.sum(found & (np.abs(np.where(found, err, 0.0)) <= tol))) / n
    e = err[found]
    p = quantiles(e, (0.025, 0.975))
    return {
        "joints": n,
        "rate_dps": rate,
        "share_within_tolerance": rounded(within, 4),
        "goal_met": within >= ANGLE_GOAL_SHARE,
        "error_mean_deg": rounded(float(e.mean()) if e.size else math.nan, 3),
        "error_sd_deg": rounded(float(e.std(ddof=1)) if e.size > 1 else math.nan, 3),
        "error_p2_5_deg": rounded(p[0], 3),
        "error_p97_5_deg": rounded(p[1], 3),
        "abs_error_p95_deg": rounded(quantiles(np.abs(e), (0.95,))[0], 3),
        "abs_error_max_deg": rounded(float(np.abs(e).max()) if e.size else math.nan, 3),
        "true_angle_mean_deg": rounded(float(np.nanmean(true)), 2),
        "share_snug_missed": rounded(float(np.sum(~found)) / n, 4),
    }


def angle_study(
    joints: int, seed: int, *, workers: int | None = 1
) -> tuple[dict[str, Any], dict[str, list[tuple[float, float]]]]:
    """Run the study: (figures keyed by rate case, (true, error) pairs per case).

    Raises :class:`~clampd.simulators.studies.StudyError` on bad arguments.
    """
    n_workers = check_study_args(joints, seed, workers)
    per_joint = parallel_map(angle_joint, joint_seeds(seed, joints), n_workers)
    figures: dict[str, Any] = {}
    points: dict[str, list[tuple[float, float]]] = {}
    for rate in ANGLE_RATES_DPS:
        name = angle_case_name(rate)
        runs = [j[name] for j in per_joint]
        figures[name] = _summary(rate, runs)
        points[name] = [(r.true_deg, r.error_deg) for r in runs]
    return figures, points


def angle_table(figures: Mapping[str, Any], joints: int, seed: int) -> str:
    """The human table of the angle study."""
    lines = [
        (
            f"Angle accuracy: {joints} rundowns per rate, 10–30° past snug, gyro bias σ 0.5 °/s"
            f" per axis, seed {seed}"
        ),
        "goal: |counted − true| ≤ 0.5° + 0.5 % of reading for 95 % of rundowns",
        "",
        (
            f"{'rate °/s':>9}{'mean °':>9}{'sd °':>8}{'|err| p95':>11}{'max':>8}{'in tol':>9}"
            f"{'goal':>6}"
        ),
    ]
    for f in figures.values():

        def num(v: float | None, spec: str) -> str:
            return "—" if v is None else format(v, spec)

        lines.append(
            f"{f['rate_dps']:>9.0f}{num(f['error_mean_deg'], '+.3f'):>9}"
            f"{num(f['error_sd_deg'], '.3f'):>8}{num(f['abs_error_p95_deg'], '.3f'):>11}"
            f"{num(f['abs_error_max_deg'], '.3f'):>8}{f['share_within_tolerance']:>9.1%}"
            f"{'met' if f['goal_met'] else 'MISS':>6}"
        )
    lines += ["", CAUTION]
    return "\n".join(lines) + "\n"
