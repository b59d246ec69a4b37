"""Seeded population studies: preload scatter, cue timing, angle accuracy.

The studies score the whole product — planner, program parser, engine, cues — against the
simulator's independent physics: simulated readings go into the real engine, the engine's cues
go back to the simulated operator, and the truth (preload, fastener angle) is read from the
simulator afterwards. This is the one place under ``simulators/`` that imports the daemon
(tests/test_sim_independence.py exempts it for that reason).

``run_study(kind, joints=, seed=)`` returns a :class:`StudyReport` (JSON, table, PNG). Same
seed, same bytes, with any number of worker processes. Simulated joints score software only;
real joints follow the joint designer's specification, local codes and licensed practice.
"""

from clampd.simulators.studies._angle import (
    ANGLE_GOAL_SHARE,
    ANGLE_RATES_DPS,
    ANGLE_TOLERANCE,
    AngleRun,
    angle_joint,
    angle_study,
    angle_tolerance_deg,
)
from clampd.simulators.studies._common import (
    CAUTION,
    FRAME_SAMPLES,
    SPEAKER_DELAY_S,
    CuePolicy,
    EngineLoop,
    LoopOutcome,
    StudyError,
    run_closed_loop,
    true_rotation_deg,
)
from clampd.simulators.studies._cues import CUE_CASES, CUE_GOAL_DEG, CueCase, CueRun, cue_study
from clampd.simulators.studies._preload import (
    PRELOAD_POPULATION,
    PRELOAD_STRATEGIES,
    VDI_ALPHA_A_RANGE,
    PreloadRun,
    preload_programs,
    preload_study,
)
from clampd.simulators.studies._run import STUDY_KINDS, StudyReport, run_study

__all__ = [
    "ANGLE_GOAL_SHARE",
    "ANGLE_RATES_DPS",
    "ANGLE_TOLERANCE",
    "CAUTION",
    "CUE_CASES",
    "CUE_GOAL_DEG",
    "FRAME_SAMPLES",
    "PRELOAD_POPULATION",
    "PRELOAD_STRATEGIES",
    "SPEAKER_DELAY_S",
    "STUDY_KINDS",
    "VDI_ALPHA_A_RANGE",
    "AngleRun",
    "CueCase",
    "CuePolicy",
    "CueRun",
    "EngineLoop",
    "LoopOutcome",
    "PreloadRun",
    "StudyError",
    "StudyReport",
    "angle_joint",
    "angle_study",
    "angle_tolerance_deg",
    "cue_study",
    "preload_programs",
    "preload_study",
    "run_closed_loop",
    "run_study",
    "true_rotation_deg",
]
