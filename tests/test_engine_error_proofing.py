"""Error proofing in the engine on closed-form traces: prevailing torque, rundown angle, joint
rate, re-hit, torque falling while turning; program keys; split invariance; `clampd replay`.

Expected values come from the trace's own closed form (the true fastener angle at the first
sample where torque reaches snug, found with numpy; scipy.integrate.trapezoid for rotation),
never from the engine's estimators. The physics faults are in test_error_proofing_physics.py.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np
import numpy.typing as npt
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.integrate import trapezoid

from clampd.daemon.cli import main
from clampd.daemon.engine import (
    Check,
    Engine,
    EngineSettings,
    Event,
    Program,
    ProgramError,
    Reason,
    RundownFinished,
    RundownResult,
    Status,
    program_from_mapping,
)
from clampd.daemon.engine._proofing import MIN_RUNIN_DEG

F = npt.NDArray[np.float64]
FS = 1000.0
DT = 1.0 / FS
BIAS = 0.4  # gyro bias, deg/s (the engine removes it from the rest before the rundown)
SNUG = 10.0
TARGET = 40.0
RATE = 1.5  # N·m/deg past first contact
OMEGA = 40.0  # deg/s while turning


class Trace:
    """A noise-free single-stroke rundown with its truth: fastener angle per sample."""

    def __init__(self, t: F, torque: F, rate: F, phi: F) -> None:
        self.t, self.torque, self.rate, self.phi = t, torque, rate, phi

    def snug_angle(self) -> float:
        """True rotation from the first turn to the first sample at or above snug."""
        k = int(np.argmax(self.torque >= SNUG))
        return float(self.phi[k])


def make_trace(
    torque_of: Callable[[F], F],
    *,
    stop_nm: float = TARGET,
    turn_deg: float = 2000.0,
    rest_s: float = 0.5,
    pause: tuple[float, float] | None = None,
    windup_s: float = 0.0,
    windup_deflection: float = 0.0,
) -> Trace:
    """Rest, (wind-up with the fastener standing still), turning at OMEGA until torque reaches
    ``stop_nm`` or ``turn_deg`` is turned, hold, release backwards, rest.

    ``pause``: (at_deg, seconds) — the wrench rests that long at that angle mid run-in.
    ``windup_s``: torque rises from 0 to torque_of(0) while the handle turns the wrench's own
    deflection (``windup_deflection`` deg per N·m) and the fastener stands still (a re-hit).
    """
    n_rest = int(rest_s * FS)
    Ts: list[F] = [np.zeros(n_rest)]
    rs: list[F] = [np.zeros(n_rest)]
    phis: list[F] = [np.zeros(n_rest)]
    if windup_s > 0.0:
        n = int(windup_s * FS)
        top = float(torque_of(np.zeros(1))[0])
        Ts.append(np.linspace(0.0, top, n + 1)[1:])
        rs.append(np.full(n, windup_deflection * top / windup_s))
        phis.append(np.zeros(n))
    step = OMEGA * DT
    phi = np.arange(1, int(turn_deg / step) + 1, dtype=np.float64) * step
    T = torque_of(phi)
    done = np.flatnonzero(stop_nm <= T)
    end = int(done[0]) + 1 if done.size else phi.shape[0]
    phi, T = phi[:end], T[:end]
    r = np.full(phi.shape[0], OMEGA)
    if pause is not None:
        at, secs = pause
        k = int(np.argmax(phi >= at))
        n = int(secs * FS)
        phi = np.concatenate((phi[:k], np.full(n, phi[k - 1]), phi[k:]))
        T = np.concatenate((T[:k], np.full(n, 0.0), T[k:]))
        r = np.concatenate((r[:k], np.zeros(n), r[k:]))
    Ts.append(T)
    rs.append(r)
    phis.append(phi)
    last_T, last_phi = float(T[-1]), float(phi[-1])
    Ts += [np.full(100, last_T), np.linspace(last_T, 0.0, 101)[1:], np.zeros(400)]
    rs += [np.zeros(100), np.full(100, -100.0), np.zeros(400)]
    phis += [np.full(600, last_phi)]
    torque = np.concatenate(Ts)
    rate = np.concatenate(rs) + BIAS
    t = np.arange(torque.shape[0], dtype=np.float64) * DT
    return Trace(t, torque, rate, np.concatenate(phis))


def joint(prevailing: float, contact_deg: float, rate: float = RATE) -> Callable[[F], F]:
    """Prevailing torque during the free run, then linear from first contact."""

    def f(phi: F) -> F:
        return prevailing + rate * np.clip(phi - contact_deg, 0.0, None)

    return f


PROOFING: dict[str, object] = {
    "prevailing_torque_window": ["0 N*m", "1 N*m"],
    "rundown_angle_window": ["60 deg", "400 deg"],
    "joint_rate_window": ["1.2 N*m/deg", "1.8 N*m/deg"],
    "rehit_angle_max": "3 deg",
    "torque_drop": 0.2,
}


def program(**extra: object) -> Program:
    base: dict[str, object] = {
        "id": "cover-m10",
        "strategy": "torque",
        "snug_torque": SNUG,
        "target_torque": TARGET,
        "timeout": 0.5,
    }
    return program_from_mapping({**base, **PROOFING, **extra})


def run(tr: Trace, prog: Program, *, deflection: float = 0.0, frame: int = 22) -> RundownResult:
    eng = Engine(prog, EngineSettings(deflection_deg_per_nm=deflection))
    events: list[Event] = []
    for a in range(0, tr.t.shape[0], frame):
        events += eng.feed(tr.t[a : a + frame], tr.torque[a : a + frame], tr.rate[a : a + frame])
    events += eng.tick(float(tr.t[-1]) + 1.0)
    results = [e.result for e in events if isinstance(e, RundownFinished)]
    assert len(results) == 1
    return results[0]


def outcome(res: RundownResult, check: Check) -> tuple[float | None, bool | None]:
    (c,) = [c for c in res.checks if c.check is check]
    return c.value, c.passed


# ------------------------------------------------------------------ a good joint passes all
def test_good_joint_passes_every_check_with_its_true_figures() -> None:
    tr = make_trace(joint(0.0, 120.0))
    res = run(tr, program())
    assert res.status is Status.OK, res.reasons
    assert {c.check for c in res.checks} == set(Check)
    assert all(c.passed for c in res.checks)
    # rotation from the first turn to snug: the closed form gives 120 + 10/1.5 deg
    assert res.rundown_angle_deg == pytest.approx(tr.snug_angle(), abs=0.1)
    assert tr.snug_angle() == pytest.approx(120.0 + SNUG / RATE, abs=OMEGA * DT)
    # a plain nut: no prevailing torque; first contact is where torque passes prevailing +
    # the default margin (a quarter of snug), so first contact to snug is (snug - margin)/rate
    assert res.prevailing_torque_nm == pytest.approx(0.0, abs=1e-9)
    assert res.contact_to_snug_deg == pytest.approx((SNUG - 0.25 * SNUG) / RATE, abs=0.05)
    assert res.joint_rate_nm_per_deg == pytest.approx(RATE, rel=1e-3)


def test_rundown_angle_equals_integrated_rotation_of_the_truth() -> None:
    """Independent: scipy's trapezoid over the true rate (bias removed) up to snug."""
    tr = make_trace(joint(0.0, 250.0))
    k = int(np.argmax(tr.torque >= SNUG))
    moving = tr.rate[: k + 1] - BIAS
    expected = trapezoid(moving, tr.t[: k + 1])
    res = run(tr, program())
    assert res.rundown_angle_deg == pytest.approx(expected, abs=0.1)


# ------------------------------------------------------------------ prevailing torque
def test_cross_threaded_nut_gives_prevailing_torque_high() -> None:
    """Prevailing torque above the start level: the whole run-in is inside the rundown."""
    tr = make_trace(joint(4.0, 90.0))
    res = run(tr, program())
    assert Reason.PREVAILING_TORQUE_HIGH in res.reasons
    value, passed = outcome(res, Check.PREVAILING_TORQUE)
    assert passed is False
    assert value == pytest.approx(4.0, abs=1e-9)  # the median of a constant run-in
    # the run-in was counted inside the rundown too: the rundown angle is still the truth
    assert res.rundown_angle_deg == pytest.approx(tr.snug_angle(), abs=0.1)


def test_missing_prevailing_torque_gives_prevailing_torque_low() -> None:
    tr = make_trace(joint(0.6, 90.0))
    res = run(tr, program(prevailing_torque_window=["2 N*m", "6 N*m"]))
    assert Reason.PREVAILING_TORQUE_LOW in res.reasons
    assert res.prevailing_torque_nm == pytest.approx(0.6, abs=1e-9)


# ------------------------------------------------------------------ rundown angle
@pytest.mark.parametrize(
    ("contact_deg", "reason"),
    [(20.0, Reason.RUNDOWN_ANGLE_LOW), (900.0, Reason.RUNDOWN_ANGLE_HIGH)],
)
def test_wrong_length_gives_rundown_angle_out_of_window(contact_deg: float, reason: Reason) -> None:
    tr = make_trace(joint(0.0, contact_deg))
    res = run(tr, program())
    assert reason in res.reasons
    assert res.rundown_angle_deg == pytest.approx(tr.snug_angle(), abs=0.1)


def test_no_snug_but_already_too_much_rotation_is_rundown_angle_high() -> None:
    """A free run that never meets the head (the wrench gave up): too long regardless."""
    tr = make_trace(joint(1.5, 1e6), turn_deg=600.0)
    res = run(tr, program())
    assert Reason.SNUG_NOT_FOUND in res.reasons
    assert Reason.RUNDOWN_ANGLE_HIGH in res.reasons
    value, passed = outcome(res, Check.RUNDOWN_ANGLE)
    assert passed is False
    assert value == pytest.approx(600.0, abs=0.5)


def test_a_long_rest_starts_the_run_in_afresh_a_short_regrip_does_not() -> None:
    long_rest = make_trace(joint(0.0, 200.0), pause=(80.0, 1.5))
    res = run(long_rest, program())
    # only the rotation after the rest counts
    assert res.rundown_angle_deg == pytest.approx(long_rest.snug_angle() - 80.0, abs=0.2)
    regrip = make_trace(joint(0.0, 200.0), pause=(80.0, 0.3))
    res = run(regrip, program())
    assert res.rundown_angle_deg == pytest.approx(regrip.snug_angle(), abs=0.2)


# ------------------------------------------------------------------ re-hit
def test_rehit_tight_joint_reaches_snug_without_turning() -> None:
    """Torque rises to breakaway while only the wrench deflects (compensated), then turns."""
    defl = 0.02
    tr = make_trace(joint(30.0, 0.0), windup_s=0.4, windup_deflection=defl)
    res = run(tr, program(), deflection=defl)
    assert Reason.REHIT in res.reasons
    value, passed = outcome(res, Check.REHIT)
    assert passed is False
    assert value is not None
    assert value < 0.05
    # no run-in to measure a prevailing torque on: not judged, no false diagnosis
    assert res.prevailing_torque_nm is None
    assert outcome(res, Check.PREVAILING_TORQUE) == (None, None)
    assert Reason.PREVAILING_TORQUE_HIGH not in res.reasons


def test_a_fresh_joint_run_down_by_hand_is_no_rehit() -> None:
    """First contact at the first turn: only the elastic angle to snug (6.7°) is seen."""
    tr = make_trace(joint(0.0, 0.0))
    res = run(tr, program(rundown_angle_window=["0 deg", "400 deg"]))
    assert Reason.REHIT not in res.reasons
    assert res.rundown_angle_deg == pytest.approx(SNUG / RATE, abs=0.1)
    assert res.rundown_angle_deg is not None
    assert res.rundown_angle_deg > 3.0 > MIN_RUNIN_DEG - 0.01


# ------------------------------------------------------------------ joint rate
@pytest.mark.parametrize(
    ("rate", "reason"), [(0.9, Reason.JOINT_RATE_LOW), (2.4, Reason.JOINT_RATE_HIGH)]
)
def test_soft_or_stiff_joint_gives_joint_rate_out_of_window(rate: float, reason: Reason) -> None:
    tr = make_trace(joint(0.0, 120.0, rate))
    res = run(tr, program())
    assert reason in res.reasons
    value, _ = outcome(res, Check.JOINT_RATE)
    assert value == pytest.approx(rate, rel=1e-3)


# ------------------------------------------------------------------ torque falling
def stripping(at_deg: float) -> Callable[[F], F]:
    base = joint(0.0, 120.0)

    def f(phi: F) -> F:
        T = base(phi)
        return np.where(phi >= at_deg, 0.5, T)

    return f


def test_stripped_thread_torque_falls_while_turning_at_the_exact_sample() -> None:
    tr = make_trace(stripping(140.0), turn_deg=200.0)
    res = run(tr, program())
    assert Reason.TORQUE_FELL_WHILE_TURNING in res.reasons
    # expected sample: the first where the torque is below 80 % of the peak before it
    peak = np.maximum.accumulate(tr.torque)
    expected = int(np.argmax((tr.torque < 0.8 * peak) & (peak >= SNUG) & (tr.rate - BIAS > 0)))
    (c,) = [c for c in res.checks if c.check is Check.TORQUE_DROP]
    assert c.index == expected
    assert c.value == pytest.approx(1.0 - 0.5 / (1.5 * 19.975), abs=0.01)


def test_torque_falling_on_the_back_swing_is_no_fault() -> None:
    """The release at the end drops torque to zero with the handle going back."""
    res = run(make_trace(joint(0.0, 120.0)), program())
    value, passed = outcome(res, Check.TORQUE_DROP)
    assert passed is True
    assert value == pytest.approx(0.0, abs=1e-12)


# ------------------------------------------------------------------ program keys
@pytest.mark.parametrize(
    ("key", "value", "path"),
    [
        ("joint_rate_window", [2.0, 1.0], "program.joint_rate_window"),
        ("rundown_angle_window", ["-5 deg", "100 deg"], "program.rundown_angle_window"),
        ("prevailing_torque_window", ["1 N*m"], "program.prevailing_torque_window"),
        ("torque_drop", 1.5, "program.torque_drop"),
        ("rehit_angle_max", "0 deg", "program.rehit_angle_max"),
        ("contact_margin", "-1 N*m", "program.contact_margin"),
    ],
)
def test_bad_error_proofing_keys_are_typed_errors(key: str, value: object, path: str) -> None:
    with pytest.raises(ProgramError) as exc:
        program(**{key: value})
    assert path in str(exc.value)


def test_units_are_converted_once() -> None:
    p = program(
        joint_rate_window=["1 ft*lbf/deg", "2 ft*lbf/deg"],
        rundown_angle_window=["0.5 turn", "2 turn"],
    )
    assert p.joint_rate_window_nm_per_deg == pytest.approx((1.3558179483, 2.7116358966))
    assert p.rundown_angle_window_deg == pytest.approx((180.0, 720.0))


def test_checks_are_off_unless_the_program_asks() -> None:
    prog = program_from_mapping(
        {
            "id": "plain",
            "strategy": "torque",
            "snug_torque": SNUG,
            "target_torque": TARGET,
            "timeout": 0.5,
        }
    )
    res = run(make_trace(stripping(140.0), turn_deg=200.0), prog)
    assert res.checks == ()
    assert Reason.TORQUE_FELL_WHILE_TURNING not in res.reasons
    assert res.rundown_angle_deg is not None  # the figures are still measured


# ------------------------------------------------------------------ sample-exact
TRACES: Sequence[Callable[[], Trace]] = (
    lambda: make_trace(joint(0.0, 120.0)),
    lambda: make_trace(joint(4.0, 90.0)),
    lambda: make_trace(stripping(140.0), turn_deg=200.0),
    lambda: make_trace(joint(0.0, 200.0), pause=(80.0, 1.5)),
    lambda: make_trace(joint(30.0, 0.0), windup_s=0.4, windup_deflection=0.02),
)


def _fingerprint(res: RundownResult) -> str:
    return json.dumps(res.to_dict(), sort_keys=True)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(which=st.integers(0, len(TRACES) - 1), data=st.data())
def test_any_split_gives_identical_checks(which: int, data: st.DataObject) -> None:
    tr = TRACES[which]()
    n = tr.t.shape[0]
    cuts = sorted(set(data.draw(st.lists(st.integers(1, n - 1), max_size=12))))
    prog = program()
    whole = run(tr, prog, deflection=0.02, frame=n)
    eng = Engine(prog, EngineSettings(deflection_deg_per_nm=0.02))
    events: list[Event] = []
    for a, b in zip([0, *cuts], [*cuts, n], strict=True):
        events += eng.feed(tr.t[a:b], tr.torque[a:b], tr.rate[a:b])
    events += eng.tick(float(tr.t[-1]) + 1.0)
    (split,) = [e.result for e in events if isinstance(e, RundownFinished)]
    assert _fingerprint(split) == _fingerprint(whole)
    assert split.checks == whole.checks


def test_one_sample_at_a_time_gives_identical_checks() -> None:
    tr = make_trace(stripping(140.0), turn_deg=200.0)
    assert _fingerprint(run(tr, program(), frame=1)) == _fingerprint(run(tr, program()))


# ------------------------------------------------------------------ clampd replay
def _write(tmp_path: Path, tr: Trace) -> tuple[Path, Path]:
    csv = tmp_path / "samples.csv"
    rows = "\n".join(
        f"{a:.6f},{b:.6f},{c:.6f}" for a, b, c in zip(tr.t, tr.torque, tr.rate, strict=True)
    )
    csv.write_text("t_s,torque_nm,rate_dps\n" + rows + "\n", encoding="ascii")
    prog = tmp_path / "program.toml"
    body = "\n".join(f"{k} = {json.dumps(v)}" for k, v in PROOFING.items())
    prog.write_text(
        '[program]\nid = "cover-m10"\nstrategy = "torque"\n'
        f'snug_torque = "{SNUG} N*m"\ntarget_torque = "{TARGET} N*m"\n{body}\n',
        encoding="utf-8",
    )
    return prog, csv


def test_replay_json_lists_every_check(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    prog, csv = _write(tmp_path, make_trace(stripping(140.0), turn_deg=200.0))
    assert main(["replay", "--program", str(prog), str(csv), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert "torque_fell_while_turning" in out["reasons"]
    by = {c["check"]: c for c in out["checks"]}
    assert set(by) == {c.value for c in Check}
    assert by["torque_drop"]["passed"] is False
    assert by["prevailing_torque"]["passed"] is True
    assert out["rundown_angle_deg"] == pytest.approx(120.0 + SNUG / RATE, abs=0.1)


def test_replay_text_shows_the_failed_check(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    prog, csv = _write(tmp_path, make_trace(joint(4.0, 90.0)))
    assert main(["replay", "--program", str(prog), str(csv)]) == 0
    out = capsys.readouterr().out
    assert "prevailing_torque_high" in out
    assert "check prevailing_torque: FAIL (4 N·m; window [0, 1] N·m)" in out
    assert "check joint_rate: pass" in out
