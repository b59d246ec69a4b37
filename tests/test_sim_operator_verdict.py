"""The operator's finishing behaviour: a fine pull after the approach cue, listening for the
tool's verdict after a stop cue, and pulling again when none comes.

The controllers here are small scripted listeners (no engine: the simulator stays independent
of it). Expected rates and times follow from the operator's parameters (reaction time fixed
with σ = 0, constant accelerations), the sensor clock's 30 ppm offset within a sample; these
are the model's own stated choices, no outside source.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np
import pytest

from clampd.simulators import (
    CuePattern,
    JointModel,
    OperatorError,
    OperatorParams,
    Reading,
    SensorParams,
    simulate_rundown,
)


def joint() -> JointModel:
    return dataclasses.replace(JointModel.sample(np.random.default_rng(11)), contact_angle_deg=30.0)


def script(*steps: tuple[str, float, CuePattern]) -> Any:
    """Plays each (condition, level, cue) once, in order: 'torque' when the measured torque
    first reaches the level, 'quiet' when the level in seconds has passed since the last cue
    with the torque back under 0.5 N·m."""
    todo = list(steps)
    last = [0.0]

    def listener(r: Reading) -> CuePattern | None:
        if not todo:
            return None
        kind, level, cue = todo[0]
        hit = (kind == "torque" and r.torque_nm >= level) or (
            kind == "quiet" and r.t_s - last[0] >= level and r.torque_nm < 0.5
        )
        if hit:
            todo.pop(0)
            last[0] = r.t_s
            return cue
        return None

    return listener


def person(**kw: Any) -> OperatorParams:
    base: dict[str, Any] = {
        "steady_rate_dps": 90.0,
        "stroke_deg": 3000.0,
        "reaction_sigma": 0.0,
        "approach_slowdown": 0.5,
        "fine_rate_dps": 25.0,
        "confirm_wait_s": 1.0,
    }
    base.update(kw)
    return OperatorParams(**base)


def test_approach_cue_slows_to_the_fine_rate() -> None:
    tr = simulate_rundown(
        joint(),
        SensorParams(),
        person(stop_at_torque_nm=50.0, confirm_wait_s=None),
        np.random.default_rng(4),
        cue_listener=script(("torque", 5.0, CuePattern.APPROACH)),
    )
    ((t_cue, _),) = tr.cues
    rate = tr.true_handle_rate_dps
    # 0.2 s reaction, then 90 -> 25 deg/s at 600 deg/s² takes 0.108 s: the lower of 45 and 25
    later = (tr.t_s > t_cue + 0.32) & (tr.t_s < t_cue + 0.4)
    np.testing.assert_allclose(rate[later], 25.0)


def test_verdict_ends_the_part() -> None:
    """Stop cue, release, OK within the wait: done, one pull only."""
    tr = simulate_rundown(
        joint(),
        SensorParams(),
        person(),
        np.random.default_rng(5),
        cue_listener=script(("torque", 20.0, CuePattern.STOP), ("quiet", 0.05, CuePattern.OK)),
    )
    assert [c for _, c in tr.cues] == [CuePattern.STOP, CuePattern.OK]
    assert tr.stop_reason == "stop-cue"
    after = tr.t_s > tr.cues[1][0]
    assert np.all(tr.true_handle_rate_dps[after] <= 0.0)  # never pulls again


def test_no_verdict_means_a_slow_pull_again_to_the_next_stop_cue() -> None:
    """A 20 deg/s pull, stop cue at 10 N·m (the reaction carries it a few N·m further),
    release, nothing for 1 s: a nudge at half the person's finishing rate (the lower of the
    current and the fine rate); a second stop cue at 30 N·m
    stops it; the OK then ends the part."""
    tr = simulate_rundown(
        joint(),
        SensorParams(),
        person(steady_rate_dps=20.0),
        np.random.default_rng(6),
        cue_listener=script(
            ("torque", 10.0, CuePattern.STOP),
            ("torque", 30.0, CuePattern.STOP),
            ("quiet", 0.05, CuePattern.OK),
        ),
    )
    assert [c for _, c in tr.cues] == [CuePattern.STOP, CuePattern.STOP, CuePattern.OK]
    t1, t2 = tr.cues[0][0], tr.cues[1][0]
    rate = tr.true_handle_rate_dps
    between = (tr.t_s > t1) & (tr.t_s < t2)
    assert rate[between].max() > 0.0  # pulled again
    # released at the first stop (handle still, tool unloaded), about a second of waiting,
    # then forward again at half the fine rate
    released = np.flatnonzero(between & (tr.true_torque_nm == 0.0) & (rate == 0.0))
    forward = np.flatnonzero(between & (rate > 0.0) & (tr.t_s > tr.t_s[released[0]]))
    assert tr.t_s[forward[0]] - tr.t_s[released[0]] >= 0.99
    assert rate[forward].max() == pytest.approx(10.0)  # half of min(steady 20, fine 25)
    assert tr.torque_nm.max() >= 30.0


def test_pulls_again_at_most_max_repulls_times() -> None:
    """A tool that never says done: the person stops after the allowed pulls again."""
    stops = tuple(("torque", 10.0 * (i + 1), CuePattern.STOP) for i in range(6))
    tr = simulate_rundown(
        joint(),
        SensorParams(),
        person(steady_rate_dps=20.0, max_repulls=2),
        np.random.default_rng(7),
        cue_listener=script(*stops),
        duration_limit_s=30.0,
    )
    # the first stop and two pulls again: three stop cues heard, then done without a verdict
    assert [c for _, c in tr.cues].count(CuePattern.STOP) == 3
    assert tr.true_torque_nm[-1] == 0.0


@pytest.mark.parametrize(
    "change",
    [{"fine_rate_dps": 0.0}, {"confirm_wait_s": -1.0}, {"max_repulls": -1}],
)
def test_impossible_finishing_parameters_are_refused(change: dict[str, Any]) -> None:
    with pytest.raises(OperatorError):
        person(**change)


def test_sampled_people_finish_slowly_and_listen() -> None:
    rng = np.random.default_rng(3)
    people = [OperatorParams.sample(rng) for _ in range(200)]
    fine = np.array([p.fine_rate_dps for p in people], dtype=float)
    wait = np.array([p.confirm_wait_s for p in people], dtype=float)
    assert fine.min() >= 20.0
    assert fine.max() <= 40.0
    assert wait.min() >= 0.8
    assert wait.max() <= 1.2
