"""The studies' closed loop plays the verdict as the station runtime does.

One seeded joint of the cue study's population, through the real engine: the operator hears
OK or NOK after the rundown finishes, and it matches the engine's result (the runtime plays
``CueSound.OK``/``NOK`` on ``RundownFinished``, daemon/runtime/_wrench.py).
"""

from __future__ import annotations

import numpy as np
import pytest

from clampd.daemon.engine import EngineSettings, RundownFinished, Status
from clampd.simulators import CuePattern, OperatorParams
from clampd.simulators.studies._common import CuePolicy, draw_sensor, run_closed_loop
from clampd.simulators.studies._preload import PRELOAD_POPULATION, preload_programs


@pytest.mark.parametrize("policy", [CuePolicy.PREDICTIVE, CuePolicy.AT_TARGET])
def test_operator_hears_the_verdict_after_the_finish(policy: CuePolicy) -> None:
    kids = np.random.SeedSequence(5).spawn(4)
    joint = PRELOAD_POPULATION.draw(np.random.default_rng(kids[0]))
    person = OperatorParams.sample(np.random.default_rng(kids[1]))
    sensor = draw_sensor(np.random.default_rng(kids[2]))
    out = run_closed_loop(
        joint,
        preload_programs()["torque-angle"],
        settings=EngineSettings(deflection_deg_per_nm=sensor.deflection_deg_per_nm),
        sensor=sensor,
        operator=person,
        rng=np.random.default_rng(kids[3]),
        policy=policy,
    )
    finish = next(e for e in out.events if isinstance(e, RundownFinished))
    verdicts = [(t, c) for t, c in out.trace.cues if c in (CuePattern.OK, CuePattern.NOK)]
    assert len(verdicts) == 1
    t_heard, cue = verdicts[0]
    assert t_heard >= finish.t_s
    assert (cue is CuePattern.OK) == (out.result.status is Status.OK)
    assert out.trace.cues[-1] == verdicts[0]  # nothing after the verdict
