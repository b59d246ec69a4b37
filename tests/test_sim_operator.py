"""The operator model, the bench and the closed-loop rundown runner.

Reaction times are checked against the lognormal distribution with scipy.stats; the stroke
kinematics against the ratchet's rule (common practice, no source: on a back-swing the pawl
slips, the fastener stays and the tool unloads).
"""

from __future__ import annotations

import csv
import dataclasses
import io
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy import stats

from clampd.simulators import (
    CSV_HEADER,
    Bench,
    CuePattern,
    Fault,
    JointModel,
    Operator,
    OperatorError,
    OperatorParams,
    OperatorPhase,
    Reading,
    SensorError,
    SensorParams,
    Trace,
    simulate_rundown,
)


def joint(seed: int = 11, fault: Fault = Fault.NONE, **change: Any) -> JointModel:
    return dataclasses.replace(
        JointModel.sample(np.random.default_rng(seed), fault=fault), **change
    )


def once(pattern: CuePattern, at_torque_nm: float) -> Any:
    """A controller that plays ``pattern`` once when the measured torque first reaches a value."""
    fired: list[float] = []

    def listener(r: Reading) -> CuePattern | None:
        if not fired and r.torque_nm >= at_torque_nm:
            fired.append(r.t_s)
            return pattern
        return None

    return listener


def test_reaction_times_follow_the_lognormal_distribution() -> None:
    params = OperatorParams(reaction_median_s=0.2, reaction_sigma=0.25)
    op = Operator(params, np.random.default_rng(7))
    draws = np.array([op.reaction_time_s() for _ in range(3000)])
    result = stats.kstest(draws, stats.lognorm(s=0.25, scale=0.2).cdf)
    assert result.pvalue > 0.01
    assert np.median(draws) == pytest.approx(0.2, rel=0.03)
    # σ = 0.25 puts 90 % of reactions within 0.13–0.30 s (DESIGN.md: 0.15–0.25 s typical).
    lo, hi = np.quantile(draws, [0.05, 0.95])
    assert 0.12 < lo < 0.15
    assert 0.27 < hi < 0.32


def test_ratchet_back_swings_do_not_turn_the_fastener_and_unload_the_tool() -> None:
    op = OperatorParams(
        ignore_cues=True, stop_at_torque_nm=60.0, stroke_deg=50.0, back_swing_deg=50.0
    )
    tr = simulate_rundown(joint(), SensorParams(), op, np.random.default_rng(1))
    back = tr.true_handle_rate_dps < 0.0
    starts = np.flatnonzero(np.diff(back.astype(int)) == 1) + 1
    ends = np.flatnonzero(np.diff(back.astype(int)) == -1) + 1
    assert len(starts) >= 3  # several strokes
    for s, e in zip(starts, ends, strict=False):
        seg = slice(s, e)
        assert np.ptp(tr.fastener_angle_deg[seg]) == 0.0
        assert tr.true_torque_nm[e - 1] == 0.0
        assert np.all(np.diff(tr.true_torque_nm[seg]) <= 0.0)
        swing = tr.handle_angle_deg[s - 1] - tr.handle_angle_deg[e - 1]
        if tr.stop_reason is not None and s > np.argmax(tr.true_torque_nm):
            continue  # the release after the stop is shorter
        assert swing == pytest.approx(50.0, abs=1.0)
    assert np.all(np.diff(tr.fastener_angle_deg) >= 0.0)
    assert tr.stop_reason == "own-torque"


def test_pull_ramps_to_the_steady_rate_within_the_acceleration() -> None:
    op = OperatorParams(steady_rate_dps=90.0, accel_dps2=900.0, stroke_deg=300.0)
    tr = simulate_rundown(
        joint(contact_angle_deg=400.0),
        SensorParams(),
        dataclasses.replace(op, ignore_cues=True, stop_at_angle_deg=350.0),
        np.random.default_rng(2),
    )
    rate = tr.true_handle_rate_dps
    assert rate.max() == pytest.approx(90.0)
    dt = np.diff(tr.true_time_s)
    assert np.all(np.abs(np.diff(rate)) <= 900.0 * dt * 3.0 + 1e-9)  # back-swings use 3·a
    first_full = int(np.argmax(rate >= 90.0))
    t_ramp = tr.true_time_s[first_full] - tr.true_time_s[int(np.argmax(rate > 0.0))]
    assert t_ramp == pytest.approx(0.1, abs=0.003)
    # The gyro on the fastener axis sees the handle rate plus bias and noise.
    steady = rate >= 90.0
    assert np.mean(tr.axis_rate_dps[steady]) == pytest.approx(90.0 + 0.5, abs=0.1)


def test_stop_cue_is_obeyed_after_the_reaction_time() -> None:
    op = OperatorParams(
        steady_rate_dps=60.0, stroke_deg=2000.0, reaction_median_s=0.2, reaction_sigma=0.0
    )
    tr = simulate_rundown(
        joint(contact_angle_deg=30.0),
        SensorParams(),
        op,
        np.random.default_rng(3),
        cue_listener=once(CuePattern.STOP, 25.0),
    )
    assert tr.stop_reason == "stop-cue"
    ((t_cue, pattern),) = tr.cues
    assert pattern is CuePattern.STOP
    i_cue = int(np.searchsorted(tr.t_s, t_cue))
    slowing = int(np.argmax(tr.true_handle_rate_dps[i_cue:] < 60.0)) + i_cue
    # The sensor clock runs 30 ppm fast; a reaction of 0.2 s host time is 200 samples ± 1.
    assert tr.t_s[slowing] - t_cue == pytest.approx(0.2, abs=0.002)
    peak = int(np.argmax(tr.true_torque_nm))
    assert tr.true_torque_nm[peak] > tr.true_torque_nm[i_cue]  # overshoot during the reaction
    assert tr.true_torque_nm[-1] == 0.0  # released
    assert tr.t_s[-1] - t_cue < 1.5


def test_approach_cue_slows_the_pull() -> None:
    op = OperatorParams(
        steady_rate_dps=80.0,
        stroke_deg=2000.0,
        reaction_sigma=0.0,
        approach_slowdown=0.5,
        stop_at_torque_nm=55.0,
    )
    tr = simulate_rundown(
        joint(contact_angle_deg=30.0),
        SensorParams(),
        op,
        np.random.default_rng(4),
        cue_listener=once(CuePattern.APPROACH, 5.0),
    )
    ((t_cue, _),) = tr.cues
    rate = tr.true_handle_rate_dps
    before = (tr.t_s > t_cue) & (tr.t_s < t_cue + 0.199)
    np.testing.assert_allclose(rate[before], 80.0)
    # 0.2 s reaction, then slowing at 600 °/s² from 80 to 40 °/s takes 0.067 s.
    later = (tr.t_s > t_cue + 0.27) & (tr.t_s < t_cue + 0.35)
    np.testing.assert_allclose(rate[later], 40.0)
    assert tr.stop_reason == "own-torque"


def test_operator_who_ignores_cues_overshoots_to_the_own_stop() -> None:
    op = OperatorParams(ignore_cues=True, stop_at_torque_nm=60.0)
    tr = simulate_rundown(
        joint(),
        SensorParams(),
        op,
        np.random.default_rng(5),
        cue_listener=once(CuePattern.STOP, 30.0),
    )
    assert len(tr.cues) == 1
    assert tr.stop_reason == "own-torque"
    assert tr.torque_nm.max() >= 60.0


def test_operator_stops_at_an_own_angle() -> None:
    op = OperatorParams(ignore_cues=True, stop_at_angle_deg=150.0, reaction_sigma=0.0)
    tr = simulate_rundown(
        joint(contact_angle_deg=500.0), SensorParams(), op, np.random.default_rng(6)
    )
    assert tr.stop_reason == "own-angle"
    assert 150.0 < tr.fastener_angle_deg[-1] < 150.0 + 0.2 * 120.0 + 5.0


def test_pulling_past_yield_breaks_the_bolt_and_the_operator_notices() -> None:
    j = joint(contact_angle_deg=20.0)
    op = OperatorParams(ignore_cues=True, stop_at_angle_deg=1e6, strength_nm=1e4)
    tr = simulate_rundown(j, SensorParams(torque_max_nm=200.0), op, np.random.default_rng(7))
    assert tr.stop_reason == "joint-gave-way"
    assert tr.yielded.any()
    assert tr.broken[-1]
    assert tr.preload_n[-1] == 0.0
    i_break = int(np.argmax(tr.broken))
    assert tr.fastener_angle_deg[i_break] >= j.fracture_angle_deg
    assert tr.true_torque_nm[i_break:].max() < 1.0


def test_same_seed_gives_a_byte_identical_csv(tmp_path: Path) -> None:
    def run(seed: int, name: str) -> bytes:
        tr = simulate_rundown(
            joint(),
            SensorParams(),
            OperatorParams(),
            np.random.default_rng(seed),
            cue_listener=once(CuePattern.STOP, 40.0),
        )
        path = tmp_path / name
        tr.to_csv(path)
        return path.read_bytes()

    a, b, c = run(42, "a.csv"), run(42, "b.csv"), run(43, "c.csv")
    assert a == b
    assert a != c


def test_csv_is_the_replay_format_and_matches_the_trace(tmp_path: Path) -> None:
    tr = simulate_rundown(
        joint(),
        SensorParams(fastener_axis="-x", sample_rate_hz=500),
        OperatorParams(ignore_cues=True, stop_at_torque_nm=30.0),
        np.random.default_rng(8),
    )
    path = tmp_path / "run.csv"
    tr.to_csv(path)
    rows = list(csv.reader(io.StringIO(path.read_text(encoding="ascii"))))
    assert ",".join(rows[0]) == CSV_HEADER == "t_s,torque_nm,rate_dps"
    data = np.array(rows[1:], dtype=np.float64)
    assert data.shape == (len(tr), 3)
    np.testing.assert_allclose(data[:, 0], np.arange(len(tr)) * 0.002, atol=1e-9)
    np.testing.assert_allclose(data[:, 1], tr.torque_nm, atol=5e-7)
    np.testing.assert_allclose(data[:, 2], -tr.rate_dps[:, 0], atol=5e-7)
    assert data[:, 2].max() > 50.0  # positive when tightening, although the axis is −x


def test_cue_delay_postpones_delivery() -> None:
    tr = simulate_rundown(
        joint(),
        SensorParams(),
        OperatorParams(),
        np.random.default_rng(9),
        cue_listener=once(CuePattern.STOP, 20.0),
        cue_delay_s=0.1,
    )
    ((t_played, _),) = tr.cues
    first_reach = float(tr.t_s[int(np.argmax(tr.torque_nm >= 20.0))])
    assert t_played - first_reach == pytest.approx(0.1, abs=0.0015)


def test_duration_limit_ends_a_run_without_a_stop() -> None:
    tr = simulate_rundown(
        joint(contact_angle_deg=5000.0),
        SensorParams(sample_rate_hz=250),
        OperatorParams(),
        np.random.default_rng(10),
        duration_limit_s=2.0,
    )
    assert tr.stop_reason is None
    assert len(tr) == 501


def test_bench_runs_a_shift_of_parts_with_pauses() -> None:
    rng = np.random.default_rng(12)
    parts = [joint(s, contact_angle_deg=20.0) for s in (1, 2, 3)]
    bench = Bench(
        iter(parts),
        OperatorParams(ignore_cues=True, stop_at_torque_nm=25.0, part_pause_s=(1.0, 2.0)),
        rng,
    )
    dt = 1e-3
    idle_runs: list[float] = []
    idle = 0.0
    for _ in range(60_000):
        m = bench.step(dt)
        if bench.idle and bench.parts_done < 3:
            idle += dt
        elif idle:
            idle_runs.append(idle)
            idle = 0.0
        if bench.parts_done == 3:
            break
    assert bench.parts_done == 3
    assert bench.stop_reasons == ["own-torque"] * 3
    assert len(idle_runs) == 2
    assert all(1.0 <= t <= 2.0 + dt for t in idle_runs)
    assert bench.idle
    rest = bench.step(dt)
    assert rest.torque_nm == 0.0
    assert rest.preload_n == m.preload_n > 0.0
    bench.hear(CuePattern.STOP)  # nobody is tightening: nothing happens
    assert bench.operator.heard == []


def test_operator_phases_run_in_order() -> None:
    op = Operator(
        OperatorParams(stroke_deg=30.0, back_swing_deg=30.0, stop_at_torque_nm=1.0),
        np.random.default_rng(0),
    )
    seen: list[OperatorPhase] = []
    for k in range(3000):
        felt = 2.0 if 1500 < k < 1600 else 0.0
        op.step(1e-3, torque_nm=felt, fastener_angle_deg=0.0, broken=False)
        if not seen or seen[-1] is not op.phase:
            seen.append(op.phase)
    assert seen[:5] == [
        OperatorPhase.WAITING,
        OperatorPhase.FORWARD,
        OperatorPhase.BACK,
        OperatorPhase.PAUSE,
        OperatorPhase.FORWARD,
    ]
    assert seen[-2:] == [OperatorPhase.RELEASE, OperatorPhase.DONE]
    assert OperatorPhase.STOPPING in seen
    assert op.stop_reason == "own-torque"
    assert op.done


@pytest.mark.parametrize(
    "change",
    [
        {"steady_rate_dps": 0.0},
        {"reaction_median_s": math.nan},
        {"approach_slowdown": 1.5},
        {"part_pause_s": (3.0, 1.0)},
        {"ignore_cues": True},
        {"stroke_pause_s": -0.1},
    ],
)
def test_impossible_operators_are_refused(change: dict[str, Any]) -> None:
    with pytest.raises(OperatorError):
        dataclasses.replace(OperatorParams(), **change)


def test_bad_runner_and_bench_arguments_are_refused() -> None:
    rng = np.random.default_rng(0)
    with pytest.raises(SensorError):
        simulate_rundown(joint(), SensorParams(), OperatorParams(), rng, duration_limit_s=0.0)
    with pytest.raises(SensorError):
        simulate_rundown(joint(), SensorParams(), OperatorParams(), rng, cue_delay_s=-1.0)
    with pytest.raises(OperatorError):
        Bench(joint(), OperatorParams(), rng, deflection_deg_per_nm=0.0)
    with pytest.raises(OperatorError):
        Bench(joint(), OperatorParams(), rng).step(0.0)


def test_sampled_operators_lie_in_the_stated_ranges() -> None:
    rng = np.random.default_rng(13)
    people = [OperatorParams.sample(rng) for _ in range(300)]
    rates = np.array([p.steady_rate_dps for p in people])
    swings = np.array([p.back_swing_deg for p in people])
    assert 30.0 <= rates.min() < 40.0
    assert 110.0 < rates.max() <= 120.0
    assert swings.min() >= 30.0
    assert swings.max() <= 90.0
    fixed = OperatorParams.sample(rng, steady_rate_dps=45.0)
    assert fixed.steady_rate_dps == 45.0


def test_trace_is_consistent_with_its_own_truth() -> None:
    tr: Trace = simulate_rundown(
        joint(),
        SensorParams(torque_noise_nm=0.0, zero_offset_nm=0.0, nonlinearity_fraction=0.0),
        OperatorParams(ignore_cues=True, stop_at_torque_nm=50.0),
        np.random.default_rng(14),
    )
    # Without noise, offset and bow, the reading is the truth rounded to one count.
    np.testing.assert_allclose(tr.torque_nm, tr.true_torque_nm, atol=0.0025 + 1e-9)
    assert tr.rate_dps.shape == (len(tr), 3)
    snug = tr.joint.snug_angle_deg
    past = tr.fastener_angle_deg > snug
    assert past.any()
    assert np.all(tr.preload_n[past] > 0.0)
