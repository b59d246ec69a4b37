"""Population studies: the real engine in closed loop with the simulators, scored on the truth.

What is checked, and against what:

- the ordering of tightening factors VDI 2230 Part 1 Table A8 states (from memory): torque
  control scatters preload markedly more than angle or yield control; yield control leaves
  every bolt past its yield onset (simulator truth);
- angle counting within the issue's goal, ±(0.5° + 0.5 % of reading), against the simulator's
  true fastener rotation;
- predictive cueing against a cue at the target: a human reaction time of ~0.2 s (common
  practice, no source) makes the at-target cue overshoot by about rate × reaction time, and
  the predictive cue must cut that overshoot;
- reproducibility: the real CLI twice with one seed gives the same bytes, with any number of
  worker processes; the PNG is a real PNG (signature, and matplotlib reads it back).

Studies are slow by nature (hundreds of closed-loop rundowns), so the module shares one small
study per kind; the figures asserted hold for any seed at these sizes, not only for the one
used (checked over several seeds when the tests were written).
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np
import pytest

from clampd.daemon.cli import main
from clampd.daemon.engine import CueFired, CueKind, EngineSettings, StopReached
from clampd.simulators import CuePattern, OperatorParams, SensorParams
from clampd.simulators.studies import (
    ANGLE_RATES_DPS,
    FRAME_SAMPLES,
    PRELOAD_POPULATION,
    PRELOAD_STRATEGIES,
    SPEAKER_DELAY_S,
    VDI_ALPHA_A_RANGE,
    CuePolicy,
    StudyError,
    StudyReport,
    angle_tolerance_deg,
    preload_programs,
    run_closed_loop,
    run_study,
)

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948), file signature


@pytest.fixture(scope="module")
def preload() -> StudyReport:
    return run_study("preload", joints=24, seed=11, workers=1)


@pytest.fixture(scope="module")
def angle() -> StudyReport:
    return run_study("angle", joints=6, seed=5, workers=1)


@pytest.fixture(scope="module")
def cues() -> StudyReport:
    return run_study("cues", joints=12, seed=7, workers=1)


# ------------------------------------------------------------------------- preload study
def test_torque_control_scatters_more_than_angle_or_yield(preload: StudyReport) -> None:
    # VDI 2230 Part 1 Table A8 (from memory): αA of torque control (1.4–2.0 with a hand
    # wrench) lies above angle and yield control (~1.0–1.2).
    f = preload.figures
    assert f["torque"]["alpha_a"] > f["torque-angle"]["alpha_a"]
    assert f["torque"]["alpha_a"] > f["yield"]["alpha_a"]
    # yield control: the bolt's own strength scatter only, inside the published band's reach
    assert f["yield"]["alpha_a"] < 1.3


def test_preload_figures_are_consistent(preload: StudyReport) -> None:
    for strategy in PRELOAD_STRATEGIES:
        f = preload.figures[strategy]
        assert f["joints"] == 24
        assert 0.0 < f["preload_min_n"] <= f["preload_mean_n"] <= f["preload_max_n"]
        assert f["alpha_a"] == pytest.approx(f["preload_max_n"] / f["preload_min_n"], abs=2e-3)
        assert f["vdi_alpha_a_range"] == list(VDI_ALPHA_A_RANGE[strategy])
        for share in ("share_past_yield", "share_nok", "share_stopped_short", "share_broken"):
            assert 0.0 <= f[share] <= 1.0
        assert len(preload.values[strategy]) == 24


def test_yield_control_ends_past_yield_and_torque_control_below(preload: StudyReport) -> None:
    # Simulator truth: the yield strategy stops on the slope drop, so every bolt is past its
    # yield onset; the torque target is sized to 90 % utilisation at the lowest friction
    # (VDI 2230 convention), so only a low-friction joint that the operator overshoots by
    # more than ~10 % can reach yield under torque control: a few at most.
    assert preload.figures["yield"]["share_past_yield"] == 1.0
    assert preload.figures["torque"]["share_past_yield"] <= 0.25
    # yield preload is the highest of the three on average (common practice, no source)
    means = {s: preload.figures[s]["preload_mean_n"] for s in PRELOAD_STRATEGIES}
    assert means["yield"] == max(means.values())


def test_programs_come_from_the_planner_through_the_program_parser() -> None:
    programs = preload_programs()
    assert set(programs) == set(PRELOAD_STRATEGIES)
    assert {p.strategy.value for p in programs.values()} == set(PRELOAD_STRATEGIES)
    ta = programs["torque-angle"]
    assert ta.target_angle_deg is not None
    assert ta.angle_window_deg is not None
    assert ta.angle_window_deg[0] <= ta.target_angle_deg <= ta.angle_window_deg[1]


# ------------------------------------------------------------------------- angle study
def test_counted_angle_meets_the_goal_over_the_rates(angle: StudyReport) -> None:
    # Goal of the issue: |counted − true| ≤ 0.5° + 0.5 % of reading; the truth is the
    # simulator's fastener angle between the engine's own snug and final samples.
    assert set(angle.figures) == {f"rate_{round(r):03d}_dps" for r in ANGLE_RATES_DPS}
    for case, points in angle.values.items():
        for true, err in points:
            assert true > 5.0, case  # also false for nan (no snug found)
            assert abs(err) <= angle_tolerance_deg(true), (case, true, err)
        assert angle.figures[case]["share_within_tolerance"] == 1.0


def test_angle_tolerance_formula() -> None:
    assert angle_tolerance_deg(0.0) == 0.5
    assert angle_tolerance_deg(100.0) == pytest.approx(1.0)
    assert angle_tolerance_deg(-100.0) == pytest.approx(1.0)


# ------------------------------------------------------------------------- cue study
def test_predictive_cueing_cuts_the_overshoot(cues: StudyReport) -> None:
    f = cues.figures
    at = f["at_target_r200"]
    pred = f["predictive_r200"]
    # A cue at the target overshoots by about rate × reaction time (30–120 °/s × ~0.2 s, so
    # several degrees at least); nobody stops short of a target they are told they reached.
    assert at["angle_error_p2_5_deg"] > 1.0
    assert at["share_stopped_short"] == 0.0
    # Predictive cueing centres the error near zero and puts more rundowns within ±3°.
    assert abs(pred["angle_error_median_deg"]) < at["angle_error_median_deg"] / 2.0
    assert pred["share_within_3deg"] > at["share_within_3deg"]


def test_cue_cases_share_their_joints(cues: StudyReport) -> None:
    assert all(len(v) == 12 for v in cues.values.values())
    assert {f["policy"] for f in cues.figures.values()} == {"predictive", "at_target"}


def _one_rundown(policy: CuePolicy) -> tuple[list[object], list[tuple[float, CuePattern]]]:
    rng = np.random.default_rng(3)
    joint = dataclasses.replace(PRELOAD_POPULATION, contact_angle_deg=(20.0, 30.0)).draw(rng)
    outcome = run_closed_loop(
        joint,
        preload_programs()["torque-angle"],
        settings=EngineSettings(deflection_deg_per_nm=0.02),
        sensor=SensorParams(),
        operator=OperatorParams(steady_rate_dps=40.0),
        rng=np.random.default_rng(4),
        policy=policy,
    )
    assert not outcome.aborted
    return list(outcome.events), list(outcome.trace.cues)


def test_at_target_policy_plays_one_stop_cue_after_the_stop_sample() -> None:
    events, played = _one_rundown(CuePolicy.AT_TARGET)
    stop = next(e for e in events if isinstance(e, StopReached))
    # besides the stop cue only the verdict (OK/NOK at the finish, as the runtime plays it)
    stops = [(t, p) for t, p in played if p not in (CuePattern.OK, CuePattern.NOK)]
    assert [p for _, p in stops] == [CuePattern.STOP]
    t_played = stops[0][0]
    # heard no earlier than the stop sample plus the speaker delay, and no later than one
    # frame (22 samples at 1 kHz) plus that delay and one sample
    assert stop.t_s + SPEAKER_DELAY_S <= t_played + 1e-9
    assert t_played <= stop.t_s + SPEAKER_DELAY_S + (FRAME_SAMPLES + 1) * 1e-3 + 1e-9


def test_predictive_policy_plays_the_engines_cues_before_the_target() -> None:
    events, played = _one_rundown(CuePolicy.PREDICTIVE)
    fired = [e for e in events if isinstance(e, CueFired)]
    stop_cue = next(e for e in fired if e.kind is CueKind.STOP)
    assert {p for _, p in played} == {CuePattern.APPROACH, CuePattern.STOP}
    t_stop_played = next(t for t, p in played if p is CuePattern.STOP)
    assert stop_cue.t_s + SPEAKER_DELAY_S <= t_stop_played + 1e-9
    assert t_stop_played <= stop_cue.t_s + SPEAKER_DELAY_S + (FRAME_SAMPLES + 1) * 1e-3 + 1e-9


# ------------------------------------------------------------------------- CLI, output
@pytest.mark.parametrize("kind", ["preload", "cues", "angle"])
def test_same_seed_same_bytes_through_the_cli(
    kind: str, capsys: pytest.CaptureFixture[str]
) -> None:
    args = ["simulate", "study", kind, "--joints", "2", "--seed", "42", "--json"]
    assert main([*args, "--workers", "1"]) == 0
    first = capsys.readouterr().out
    assert main([*args, "--workers", "2"]) == 0
    second = capsys.readouterr().out
    assert first == second
    data = json.loads(first)
    assert first == json.dumps(data, sort_keys=True, indent=2) + "\n"
    assert main(["simulate", "study", kind, "--joints", "2", "--seed", "43", "--json"]) == 0
    assert capsys.readouterr().out != first


def test_preload_json_has_the_named_figures(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["simulate", "study", "preload", "--joints", "2", "--json"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert set(data) == set(PRELOAD_STRATEGIES)
    for f in data.values():
        for key in (
            "alpha_a",
            "preload_min_n",
            "preload_mean_n",
            "preload_max_n",
            "share_past_yield",
            "share_nok",
            "vdi_alpha_a_range",
        ):
            assert key in f


def test_table_shows_the_published_range_and_the_caution(preload: StudyReport) -> None:
    text = preload.table()
    assert "VDI 2230" in text
    assert "from memory" in text
    assert "joint designer's specification" in text
    for strategy in PRELOAD_STRATEGIES:
        assert strategy in text


def test_plot_writes_a_stable_png(tmp_path: Path, preload: StudyReport) -> None:
    from matplotlib.image import imread

    a, b = tmp_path / "a.png", tmp_path / "b.png"
    preload.plot(a)
    preload.plot(b)
    data = a.read_bytes()
    assert data[:8] == PNG_SIGNATURE
    assert data == b.read_bytes()
    image = imread(a)
    assert image.shape[:2] == (500, 800)
    assert float(image[..., :3].std()) > 0.01  # something was drawn


def test_cli_plot_for_each_kind(tmp_path: Path, cues: StudyReport, angle: StudyReport) -> None:
    for report in (cues, angle):
        path = tmp_path / f"{report.kind}.png"
        report.plot(path)
        assert path.read_bytes()[:8] == PNG_SIGNATURE


@pytest.mark.parametrize(
    "extra",
    [
        ["--joints", "0"],
        ["--joints", "-3"],
        ["--seed", "-1"],
        ["--workers", "0"],
    ],
)
def test_bad_numbers_exit_2_with_one_line(
    extra: list[str], capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["simulate", "study", "preload", *extra]) == 2
    out, err = capsys.readouterr()
    assert out == ""
    assert err.count("\n") == 1
    assert "error" in err


def test_plot_into_a_missing_directory_fails_before_running(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    target = tmp_path / "no" / "such" / "dir" / "x.png"
    assert main(["simulate", "study", "angle", "--plot", str(target)]) == 2
    out, err = capsys.readouterr()
    assert out == ""
    assert "does not exist" in err
    assert not target.exists()


def test_unknown_kind_and_bad_arguments_raise_study_error() -> None:
    with pytest.raises(StudyError, match="unknown study"):
        run_study("torque", joints=1, seed=1)
    with pytest.raises(StudyError, match="joints"):
        run_study("preload", joints=0, seed=1)
    with pytest.raises(StudyError, match="seed"):
        run_study("angle", joints=1, seed=-5)
    with pytest.raises(StudyError, match="workers"):
        run_study("cues", joints=1, seed=1, workers=0)


def test_unknown_kind_is_a_usage_error_of_the_cli() -> None:
    with pytest.raises(SystemExit) as exc:
        main(["simulate", "study", "friction"])
    assert exc.value.code == 2
