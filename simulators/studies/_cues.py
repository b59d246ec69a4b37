"""Cue timing: how close a person stops to the target angle, with and without predictive cues.

Theory of operation. A technician hears a cue and stops after a reaction time (~0.2 s); at
60 °/s that alone is 12° of overshoot if the cue comes at the target. The engine therefore
fires its stop cue early by (cue latency + reaction time) × the current rate, and an approach
cue before it. This study tightens one joint population with the planner's torque-angle
program and scores the final angle the engine reports against the program's target angle:

- ``predictive_rXXX``: the engine's cues (its default assumptions: 0.05 s latency, 0.2 s
  reaction) with operators whose median reaction time is XXX ms;
- ``at_target_r200``: a single stop cue when the target is reached, nothing before.

Each case sees the same joints and operators (only the reaction median or the cue policy
differs), so the cases compare pair by pair. Beside the engine's counted angle the study gives
the true rotation from the engine's snug sample (simulator truth), so a counting error cannot
hide as a timing result. The goal: with 0.2 s reaction, 95 % of final angles within ±3° of the
target with predictive cueing.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections import Counter
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from clampd.daemon.engine import EngineSettings, Program, Status
from clampd.simulators import OperatorParams
from clampd.simulators.studies._common import (
    CAUTION,
    CuePolicy,
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

__all__ = ["CUE_CASES", "CUE_GOAL_DEG", "CueCase", "CueRun", "cue_joint", "cue_study", "cue_table"]

# The goal of the cue study: final angle within ±3° of the target for 95 % of rundowns.
CUE_GOAL_DEG = 3.0
_GOAL_SHARE = 0.95


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class CueCase:
    """One cue policy with one operator reaction median."""

    name: str
    policy: CuePolicy
    reaction_median_s: float


CUE_CASES: tuple[CueCase, ...] = (
    CueCase(name="predictive_r150", policy=CuePolicy.PREDICTIVE, reaction_median_s=0.15),
    CueCase(name="predictive_r200", policy=CuePolicy.PREDICTIVE, reaction_median_s=0.20),
    CueCase(name="predictive_r250", policy=CuePolicy.PREDICTIVE, reaction_median_s=0.25),
    CueCase(name="at_target_r200", policy=CuePolicy.AT_TARGET, reaction_median_s=0.20),
)


@functools.cache
def _program() -> Program:
    return preload_programs()["torque-angle"]


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class CueRun:
    """One rundown: the angle errors (counted and true) against the target."""

    error_deg: float  # engine's final angle − target
    true_error_deg: float  # true rotation from the engine's snug − target
    ok: bool
    target_reached: bool
    reasons: tuple[str, ...]


def cue_joint(seed: np.random.SeedSequence) -> dict[str, CueRun]:
    """One joint and one operator, tightened once per case."""
    kids = seed.spawn(4)
    joint = PRELOAD_POPULATION.draw(np.random.default_rng(kids[0]))
    person = np.random.default_rng(kids[1])
    sensor = draw_sensor(np.random.default_rng(kids[2]))
    program = _program()
    assert program.target_angle_deg is not None
    target = program.target_angle_deg
    base = OperatorParams.sample(person)
    out: dict[str, CueRun] = {}
    for case in CUE_CASES:
        outcome = run_closed_loop(
            joint,
            program,
            settings=EngineSettings(deflection_deg_per_nm=sensor.deflection_deg_per_nm),
            sensor=sensor,
            operator=dataclasses.replace(base, reaction_median_s=case.reaction_median_s),
            # the same stream per case: the cases differ only in what the case changes
            rng=np.random.default_rng(kids[3]),
            policy=case.policy,
        )
        res = outcome.result
        k = final_index(res)
        out[case.name] = CueRun(
            error_deg=res.final_angle_deg - target if res.snug is not None else math.nan,
            true_error_deg=true_rotation_deg(outcome, k) - target,
            ok=res.status is Status.OK,
            target_reached=outcome.target_reached,
            reasons=tuple(r.value for r in res.reasons),
        )
    return out


def _summary(case: CueCase, runs: Sequence[CueRun], target: float) -> dict[str, Any]:
    e = np.array([r.error_deg for r in runs], dtype=np.float64)
    te = np.array([r.true_error_deg for r in runs], dtype=np.float64)
    n = len(runs)
    found = e[np.isfinite(e)]
    p = quantiles(found, (0.025, 0.5, 0.975))
    abs95 = quantiles(np.abs(found), (0.95,))[0]
    within = float(np.sum(np.abs(found) <= CUE_GOAL_DEG)) / n
    true_within = float(np.sum(np.abs(te[np.isfinite(te)]) <= CUE_GOAL_DEG)) / n
    reasons = Counter(reason for r in runs for reason in r.reasons)
    return {
        "joints": n,
        "policy": case.policy.value,
        "reaction_median_s": case.reaction_median_s,
        "target_angle_deg": rounded(target, 2),
        "angle_error_mean_deg": rounded(float(found.mean()) if found.size else math.nan, 2),
        "angle_error_p2_5_deg": rounded(p[0], 2),
        "angle_error_median_deg": rounded(p[1], 2),
        "angle_error_p97_5_deg": rounded(p[2], 2),
        "abs_angle_error_p95_deg": rounded(abs95, 2),
        "share_within_3deg": rounded(within, 4),
        "true_share_within_3deg": rounded(true_within, 4),
        "true_angle_error_mean_deg": rounded(
            float(np.nanmean(te)) if np.isfinite(te).any() else math.nan, 2
        ),
        "goal_met": within >= _GOAL_SHARE,
        "share_stopped_short": rounded(sum(not r.target_reached for r in runs) / n, 4),
        "share_nok": rounded(sum(not r.ok for r in runs) / n, 4),
        "nok_reasons": dict(sorted(reasons.items())),
    }


def cue_study(
    joints: int, seed: int, *, workers: int | None = 1
) -> tuple[dict[str, Any], dict[str, list[float]]]:
    """Run the study: (figures keyed by case, counted angle errors per case in joint order).

    Raises :class:`~clampd.simulators.studies.StudyError` on bad arguments.
    """
    n_workers = check_study_args(joints, seed, workers)
    per_joint = parallel_map(cue_joint, joint_seeds(seed, joints), n_workers)
    target = _program().target_angle_deg
    assert target is not None
    figures: dict[str, Any] = {}
    errors: dict[str, list[float]] = {}
    for case in CUE_CASES:
        runs = [j[case.name] for j in per_joint]
        figures[case.name] = _summary(case, runs, target)
        errors[case.name] = [r.error_deg for r in runs]
    return figures, errors


def cue_table(figures: Mapping[str, Any], joints: int, seed: int) -> str:
    """The human table of the cue study."""
    first = next(iter(figures.values()))
    lines = [
        (
            f"Cue timing: {joints} joints M10 8.8, torque-angle to"
            f" {first['target_angle_deg']:g}° past snug, operators 30–120 °/s, seed {seed}"
        ),
        (
            f"goal: 95 % of final angles within ±{CUE_GOAL_DEG:g}° of the target with predictive"
            " cueing at 0.2 s reaction"
        ),
        "",
        (
            f"{'case':<17}{'mean °':>8}{'2.5 %':>8}{'97.5 %':>8}{'|err| p95':>11}{'±3°':>8}"
            f"{'true ±3°':>10}{'short':>8}{'NOK':>7}"
        ),
    ]
    for name, f in figures.items():

        def fmt(v: float | None) -> str:
            return "—" if v is None else f"{v:+.1f}"

        def num(v: float | None) -> str:
            return "—" if v is None else f"{v:.1f}"

        lines.append(
            f"{name:<17}{fmt(f['angle_error_mean_deg']):>8}{fmt(f['angle_error_p2_5_deg']):>8}"
            f"{fmt(f['angle_error_p97_5_deg']):>8}"
            f"{num(f['abs_angle_error_p95_deg']):>11}"
            f"{f['share_within_3deg']:>8.1%}{f['true_share_within_3deg']:>10.1%}"
            f"{f['share_stopped_short']:>8.1%}{f['share_nok']:>7.1%}"
        )
    lines += [
        "",
        (
            "errors are the engine's final angle minus the target; 'true' uses the simulator's"
            " rotation; 'short' = stopped before the target (the rundown then times out NOK)"
        ),
        CAUTION,
    ]
    return "\n".join(lines) + "\n"
