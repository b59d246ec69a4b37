"""Predictive cues on ratchet rundowns: wind-up, early approach, aim point, re-arming.

Traces are built piecewise from closed forms (constant rates, linear joints), so the fastener's
true angle is known at every sample. Expected cue samples come from those closed forms or from
a brute-force numpy evaluation of the stated rule over the true angle; the engine's own
estimators are not reused. The lead of (cue latency + reaction time) is the rule of
DESIGN.md's domain notes; the ratchet wind-up (torque climbing back while the fastener stands
still at the start of each new stroke) is a fact of the trade (common practice, no source).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt
import pytest

from clampd.daemon.engine import (
    CueFired,
    CueKind,
    Engine,
    EngineSettings,
    EngineUsageError,
    Event,
    Program,
    ProgramError,
    RundownFinished,
    RundownStarted,
    SnugReached,
    Status,
    StopReached,
    program_from_mapping,
)

F = npt.NDArray[np.float64]
FS = 1000.0
DT = 1.0 / FS
H_STOP = 0.25  # cue latency 0.05 s + reaction 0.2 s
H_APPROACH = 0.75  # + approach lead 0.5 s
SETTINGS = EngineSettings(reaction_time_s=0.2, cue_latency_s=0.05, approach_lead_s=0.5, cue_aim=0.0)


@dataclass
class Build:
    """A trace grown segment by segment: handle rate, torque and true fastener angle."""

    t: list[float] = field(default_factory=lambda: [0.0])
    rate: list[float] = field(default_factory=lambda: [0.0])
    torque: list[float] = field(default_factory=lambda: [0.0])
    phi: list[float] = field(default_factory=lambda: [0.0])

    def seg(self, seconds: float, rate: float, torque_end: float, dphi: float) -> None:
        """``seconds`` of constant handle ``rate``; torque goes linearly to ``torque_end`` and
        the fastener turns ``dphi`` degrees linearly (0 while winding up or swinging back)."""
        n = round(seconds * FS)
        t0, T0, p0 = self.t[-1], self.torque[-1], self.phi[-1]
        for i in range(1, n + 1):
            f = i / n
            self.t.append(t0 + i * DT)
            self.rate.append(rate)
            self.torque.append(T0 + f * (torque_end - T0))
            self.phi.append(p0 + f * dphi)

    def arrays(self) -> tuple[F, F, F, F]:
        return (
            np.array(self.t),
            np.array(self.torque),
            np.array(self.rate),
            np.array(self.phi),
        )


def prog(**kw: object) -> Program:
    base: dict[str, object] = {"id": "cue", "snug_torque": 10.0}
    base.update(kw)
    return program_from_mapping(base)


def cues(events: Sequence[Event], kind: CueKind) -> list[CueFired]:
    return [e for e in events if isinstance(e, CueFired) and e.kind is kind]


def first_stop(events: Sequence[Event]) -> StopReached:
    return next(e for e in events if isinstance(e, StopReached))


def at(t: F, time_s: float) -> int:
    return int(np.argmin(np.abs(t - time_s)))


# ------------------------------------------------------------------ wind-up
def windup_trace() -> tuple[F, F, F, F]:
    """Torque program on a 1.5 N·m/deg joint: one stroke to 20.7 N·m, back-swing, a new stroke
    whose first 50 ms wind torque back up to 20.7 N·m with the fastener still, then turning at
    30 deg/s (45 N·m/s) past the 36.4 N·m target."""
    b = Build()
    b.seg(0.3, 0.0, 0.0, 0.0)  # rest
    b.seg(0.05, 60.0, 1.5, 0.0)  # start of the first stroke: snug is above, nothing counted
    b.seg(20.7 / 45.0 - 1.5 / 45.0, 30.0, 20.7, (20.7 - 1.5) / 1.5)
    b.seg(0.2, -200.0, 0.26, 0.0)  # back-swing: the ratchet slips, torque falls away
    b.seg(0.15, 0.0, 0.26, 0.0)  # regrip
    b.seg(0.05, 40.0, 20.7, 0.0)  # wind-up: 0.26 -> 20.7 N·m in 50 ms, fastener still
    b.seg(0.5, 30.0, 20.7 + 22.5, 15.0)  # turning: 45 N·m/s
    b.seg(0.05, 0.0, 0.0, 0.0)  # release
    b.seg(0.2, 0.0, 0.0, 0.0)
    return b.arrays()


def test_windup_at_a_new_stroke_does_not_fire_the_stop_cue() -> None:
    t, T, r, phi = windup_trace()
    target = 36.4
    events = Engine(prog(strategy="torque", target_torque=target), SETTINGS).feed(t, T, r)
    # the trace does exercise the wind-up: a rate over the trailing 50 ms ignoring strokes
    # (brute force over the samples) predicts the target during the wind-up
    w0 = int(np.flatnonzero(r == 40.0)[0])
    naive = [(T[k] - T[at(t, t[k] - 0.05)]) / 0.05 * H_STOP + T[k] for k in range(w0, w0 + 50)]
    assert max(naive) >= target
    stop = first_stop(events)
    cue = cues(events, CueKind.STOP)
    assert len(cue) == 1
    # the fastener turns at the cue (true angle rising there) ...
    k = cue[0].index
    assert phi[k + 1] > phi[k - 1]
    # ... and it leads the crossing by latency + reaction at the stroke's rate (closed form:
    # torque rises linearly at 45 N·m/s, crossing − H_STOP), within one sample
    assert cue[0].t_s == pytest.approx(stop.t_s - H_STOP, abs=DT + 1e-9)
    assert cue[0].predicted_crossing_t_s == pytest.approx(stop.t_s, abs=DT + 1e-9)


def _torque_repull(pull_rate: float) -> tuple[F, F, F, F, int, int]:
    """Torque program (36 N·m) on a 1.5 N·m/deg joint: the first stroke ends at 30 N·m after
    its stop cue; back-swing, regrip, then a pull again at ``pull_rate``: a 20 ms wind-up at
    40 deg/s (fastener still), then turning. Returns the trace, the swing and the pull."""
    b = Build()
    b.seg(0.3, 0.0, 0.0, 0.0)
    b.seg(0.05, 60.0, 1.5, 0.0)
    b.seg((30.0 - 1.5) / 45.0, 30.0, 30.0, (30.0 - 1.5) / 1.5)
    swing = len(b.t)
    b.seg(0.2, -200.0, 0.3, 0.0)
    b.seg(0.1, 0.0, 0.3, 0.0)
    pull = len(b.t)
    b.seg(0.02, 40.0, 30.0, 0.0)  # wind-up in 20 ms
    dur = 9.0 / pull_rate
    b.seg(dur, pull_rate, 30.0 + 1.5 * 9.0, 9.0)
    b.seg(0.05, 0.0, 0.0, 0.0)
    b.seg(0.2, 0.0, 0.0, 0.0)
    t, T, r, phi = b.arrays()
    return t, T, r, phi, swing, pull


def test_rearmed_torque_cue_predicts_from_the_handle() -> None:
    """After the let-go, 6 N·m are left: 4° at the joint rate the first stroke showed
    ((30 − 10) N·m over its 13.3° past snug, 1.5 N·m/deg). The wind-up is driven at 40 deg/s,
    and 40 × 0.25 s = 10° ≥ 4°, so the cue fires again at the first forward sample of the new
    pull, ahead of the fastener turning; not during the back-swing or the regrip."""
    t, T, r, phi, swing, pull = _torque_repull(30.0)
    events = Engine(prog(strategy="torque", target_torque=36.0), SETTINGS).feed(t, T, r)
    cue = cues(events, CueKind.STOP)
    assert len(cue) == 2
    assert cue[0].index < swing
    first_forward = swing + int(np.flatnonzero(r[swing:] > SETTINGS.rest_rate_dps)[0])
    assert first_forward == pull
    assert cue[1].index == pull
    turning_again = pull + int(np.flatnonzero(np.diff(phi[pull:]) > 0.0)[0])
    assert cue[1].index < turning_again


def test_rearmed_torque_cue_waits_while_the_rest_is_beyond_one_reaction() -> None:
    """The same let-go, but the wind-up is slow: with 40 deg/s in the wind-up the cue would
    fire at once, so here the whole pull again runs at 10 deg/s (wind-up included). 10 × 0.25
    = 2.5° < 4°: the cue waits until the rest is 2.5° × 1.5 N·m/deg = 3.75 N·m, i.e. torque
    32.25 N·m (closed form), within a sample."""
    b = Build()
    b.seg(0.3, 0.0, 0.0, 0.0)
    b.seg(0.05, 60.0, 1.5, 0.0)
    b.seg((30.0 - 1.5) / 45.0, 30.0, 30.0, (30.0 - 1.5) / 1.5)
    b.seg(0.2, -200.0, 0.3, 0.0)
    b.seg(0.1, 0.0, 0.3, 0.0)
    pull = len(b.t)
    b.seg(0.08, 10.0, 30.0, 0.0)  # wind-up at the pull's own pace
    b.seg(0.9, 10.0, 30.0 + 1.5 * 9.0, 9.0)
    b.seg(0.05, 0.0, 0.0, 0.0)
    b.seg(0.2, 0.0, 0.0, 0.0)
    t, T, r, _ = b.arrays()
    events = Engine(prog(strategy="torque", target_torque=36.0), SETTINGS).feed(t, T, r)
    cue = cues(events, CueKind.STOP)
    assert len(cue) == 2
    k = cue[1].index
    assert k > pull
    assert T[k] >= 32.25 - 1e-9 > T[k - 1]


# ------------------------------------------------------------------ early approach
def short_angle_trace(omega: float, phi_end: float) -> tuple[F, F, F, F]:
    """One pull at ``omega`` deg/s: 3 N·m prevailing to φ = 20°, then 1.5 N·m/deg."""
    n_rest = 300
    n = round(phi_end / omega * FS)
    phi = np.concatenate([np.zeros(n_rest), omega * np.arange(n + 1) / FS])
    phi = np.concatenate([phi, np.full(250, phi[-1])])
    t = np.arange(phi.shape[0]) / FS
    r = np.zeros_like(t)
    r[n_rest + 1 : n_rest + n + 1] = omega
    T = np.where(phi > 0.0, 3.0 + 1.5 * np.maximum(phi - 20.0, 0.0), 0.0)
    T[n_rest + n + 1 : n_rest + n + 31] = T[n_rest + n] * (1.0 - np.arange(1, 31) / 30.0)
    T[n_rest + n + 31 :] = 0.0
    return t, T, r, phi


def expected_early_index(t: F, T: F, phi: F, *, snug: float, target: float, h: float) -> int:
    """Brute force of the rule: torque and angle rates over the trailing 50 ms of turning
    samples (true angle), time to snug from the torque trend, the angle covered after snug
    within ``h``."""
    turning = np.flatnonzero(np.diff(phi) > 0.0) + 1
    first = int(turning[0])
    for k in turning:
        if T[k] >= snug:
            break
        j = int(np.searchsorted(t, t[k] - 0.05, side="right")) - 1
        if j < first:  # the window must lie wholly inside the turning stroke
            continue
        dt = t[k] - t[j]
        tr = (T[k] - T[j]) / dt
        om = (phi[k] - phi[j]) / dt
        if tr > 0.0 and om * (h - (snug - T[k]) / tr) >= target:
            return int(k)
    return -1


def test_short_angle_step_at_a_fast_pull_gets_its_approach_cue_before_snug() -> None:
    t, T, r, phi = short_angle_trace(120.0, 60.0)
    events = Engine(prog(strategy="torque-angle", target_angle=10.0), SETTINGS).feed(t, T, r)
    snug = next(e for e in events if isinstance(e, SnugReached))
    app = cues(events, CueKind.APPROACH)
    stop = cues(events, CueKind.STOP)
    assert len(app) == 1
    assert len(stop) == 1
    assert app[0].index < snug.index  # the operator hears it in time to slow down
    assert stop[0].index >= snug.index  # a stop cue is never angle-based before snug
    expected = expected_early_index(t, T, phi, snug=10.0, target=10.0, h=H_APPROACH)
    assert expected >= 0
    assert abs(app[0].index - expected) <= 1
    # the torque trend before snug is a straight line through a window that still holds the
    # flat run-in, so the time to snug is overestimated: the predicted crossing is late, never
    # early, and lies within the approach horizon of the cue
    crossing = first_stop(events).t_s
    assert crossing <= app[0].predicted_crossing_t_s <= app[0].t_s + H_APPROACH + DT


def test_long_angle_step_at_a_slow_pull_keeps_its_approach_cue_after_snug() -> None:
    """20 deg/s over a 30° step: the approach horizon covers 15°, so the cue comes after snug,
    at the crossing − 0.75 s (closed form at a constant rate)."""
    t, T, r, _ = short_angle_trace(20.0, 70.0)
    events = Engine(prog(strategy="torque-angle", target_angle=30.0), SETTINGS).feed(t, T, r)
    snug = next(e for e in events if isinstance(e, SnugReached))
    app = cues(events, CueKind.APPROACH)
    assert len(app) == 1
    assert app[0].index > snug.index
    assert app[0].t_s == pytest.approx(first_stop(events).t_s - H_APPROACH, abs=DT + 1e-9)


# ------------------------------------------------------------------ aim point
@pytest.mark.parametrize(("aim", "aim_deg"), [(0.0, 30.0), (0.2, 32.0), (1.0, 40.0)])
def test_stop_cue_aims_inside_the_window(aim: float, aim_deg: float) -> None:
    """Window [25, 40] around a 30° target: the cue leads the crossing of the aim point
    30 + aim·(40 − 30) by latency + reaction (constant rate, closed form)."""
    omega = 30.0
    t, T, r, phi = short_angle_trace(omega, 90.0)
    p = prog(strategy="torque-angle", target_angle=30.0, angle_window=[25.0, 40.0], cue_aim=aim)
    events = Engine(p, SETTINGS).feed(t, T, r)
    snug_phi = phi[next(e for e in events if isinstance(e, SnugReached)).index]
    cue = cues(events, CueKind.STOP)
    assert len(cue) == 1
    t_aim = float(np.interp(snug_phi + aim_deg, phi[300:], t[300:]))
    if aim_deg - 30.0 < omega * H_STOP:  # the aim lies within the horizon ahead of the target
        assert cue[0].t_s == pytest.approx(t_aim - H_STOP, abs=2 * DT + 1e-9)
    else:  # beyond it: the crossing of the target itself gives the cue
        assert cue[0].index == first_stop(events).index


def test_aim_is_clipped_to_the_window_and_unused_without_one() -> None:
    t, T, r, _ = short_angle_trace(30.0, 90.0)
    plain = Engine(prog(strategy="torque-angle", target_angle=30.0), SETTINGS).feed(t, T, r)
    aimed = Engine(prog(strategy="torque-angle", target_angle=30.0, cue_aim=1.0), SETTINGS).feed(
        t, T, r
    )
    assert [c.index for c in cues(plain, CueKind.STOP)] == [
        c.index for c in cues(aimed, CueKind.STOP)
    ]


def test_cue_aim_is_validated() -> None:
    with pytest.raises(ProgramError, match="cue_aim"):
        prog(strategy="torque-angle", target_angle=30.0, cue_aim=1.5)
    with pytest.raises(EngineUsageError, match="cue_aim"):
        EngineSettings(cue_aim=-0.1)


# ------------------------------------------------------------------ pace cue
def seat_and_tighten(b: Build, omega: float) -> tuple[F, F, F, F]:
    """At ``omega`` deg/s the head touches (torque to 10 N·m over 5°, snug), then 1.5 N·m/deg
    to 40° past snug; release and rest. Returns the finished trace."""
    b.seg(5.0 / omega, omega, 10.0, 5.0)
    b.seg(40.0 / omega, omega, 70.0, 40.0)
    b.seg(0.05, 0.0, 0.0, 0.0)
    b.seg(0.3, 0.0, 0.0, 0.0)
    return b.arrays()


def free_run_trace(omega: float) -> tuple[F, F, F, F]:
    """A free run-down (no torque) at ``omega`` deg/s for 0.6 s, then ``seat_and_tighten``."""
    b = Build()
    b.seg(0.3, 0.0, 0.0, 0.0)
    b.seg(0.6, omega, 0.0, 0.6 * omega)
    return seat_and_tighten(b, omega)


def test_pace_cue_slows_a_brisk_pull_before_the_joint_is_touched() -> None:
    """A 30° step leaves 0.75 s of approach horizon only below 30/0.75 = 40 deg/s; at 90 deg/s
    the approach cue fires once the free run has gone faster than that for the rate window
    (50 ms), long before the head touches, and is the step's only approach cue."""
    t, T, r, _ = free_run_trace(90.0)
    events = Engine(prog(strategy="torque-angle", target_angle=30.0), SETTINGS).feed(t, T, r)
    app = cues(events, CueKind.APPROACH)
    assert len(app) == 1
    first_fast = int(np.flatnonzero(r >= 30.0 / H_APPROACH)[0])
    # closed form: 50 samples at 1 kHz (one more when the float sum of the times falls short)
    assert abs(app[0].index - (first_fast + round(0.05 * FS))) <= 1
    started = next(e for e in events if isinstance(e, RundownStarted))
    assert app[0].index < started.index
    # the earliest the target can come: one step angle away at the pull's rate
    assert app[0].predicted_crossing_t_s == pytest.approx(app[0].t_s + 30.0 / 90.0)
    result = next(e.result for e in events if isinstance(e, RundownFinished))
    assert [c.kind for c in result.cues].count(CueKind.APPROACH) == 1
    assert result.cues[0].index == app[0].index


def test_no_pace_cue_for_an_unhurried_pull_or_a_torque_program() -> None:
    """At 30 deg/s (under the 40 deg/s pace) the approach cue comes inside the rundown, from
    the prediction; a torque program has no angle step to pace."""
    t, T, r, _ = free_run_trace(30.0)
    events = Engine(prog(strategy="torque-angle", target_angle=30.0), SETTINGS).feed(t, T, r)
    started = next(e for e in events if isinstance(e, RundownStarted))
    app = cues(events, CueKind.APPROACH)
    assert len(app) == 1
    assert app[0].index > started.index
    t, T, r, _ = free_run_trace(120.0)
    events = Engine(prog(strategy="torque", target_torque=50.0), SETTINGS).feed(t, T, r)
    started = next(e for e in events if isinstance(e, RundownStarted))
    assert all(c.index > started.index for c in cues(events, CueKind.APPROACH))


def test_torque_program_paces_from_its_angle_window() -> None:
    """A torque program whose angle window starts at 20° says its target comes no sooner than
    20° past snug: the pace is 20/0.75 ≈ 26.7 deg/s, raised to the engine's 30 deg/s floor, so
    a 90 deg/s free run hears the approach cue after the rate window, before the head
    touches; a 20 deg/s one does not."""
    program = prog(strategy="torque", target_torque=50.0, angle_window=[20.0, 60.0])
    t, T, r, _ = free_run_trace(90.0)
    events = Engine(program, SETTINGS).feed(t, T, r)
    started = next(e for e in events if isinstance(e, RundownStarted))
    app = cues(events, CueKind.APPROACH)
    assert len(app) == 1
    first_fast = int(np.flatnonzero(r >= 20.0 / H_APPROACH)[0])
    assert abs(app[0].index - (first_fast + round(0.05 * FS))) <= 1
    assert app[0].index < started.index
    assert app[0].predicted_crossing_t_s == pytest.approx(app[0].t_s + 20.0 / 90.0)
    t, T, r, _ = free_run_trace(20.0)
    events = Engine(program, SETTINGS).feed(t, T, r)
    started = next(e for e in events if isinstance(e, RundownStarted))
    assert all(c.index > started.index for c in cues(events, CueKind.APPROACH))


def test_pace_floor_lets_a_controlled_pull_be() -> None:
    """An angle window from 3° would pace at 3/0.75 = 4 deg/s, slower than any controlled
    finishing pull: the floor (30 deg/s, our choice) leaves a 25 deg/s free run alone."""
    program = prog(strategy="torque", target_torque=50.0, angle_window=[3.0, 60.0])
    t, T, r, _ = free_run_trace(25.0)
    events = Engine(program, SETTINGS).feed(t, T, r)
    started = next(e for e in events if isinstance(e, RundownStarted))
    assert all(c.index > started.index for c in cues(events, CueKind.APPROACH))


def test_a_stale_pace_cue_neither_blocks_the_next_nor_speaks_for_the_rundown() -> None:
    """The wrench is swung about its axis at 90 deg/s for 0.2 s while carried to the bolt
    (a pace cue), rests 2 s, then the technician runs the nut down at 90 deg/s: the earlier
    cue went stale (its earliest crossing + the approach horizon lies before the new pull),
    so the new stretch fires its own pace cue, and only that one counts for the rundown."""
    b = Build()
    b.seg(0.3, 0.0, 0.0, 0.0)
    b.seg(0.2, 90.0, 0.0, 0.0)  # carried: the gyro turns, the fastener does not
    b.seg(2.0, 0.0, 0.0, 0.0)
    pull = len(b.t)
    b.seg(0.6, 90.0, 0.0, 54.0)
    t, T, r, _ = seat_and_tighten(b, 90.0)
    events = Engine(prog(strategy="torque-angle", target_angle=30.0), SETTINGS).feed(t, T, r)
    app = cues(events, CueKind.APPROACH)
    assert len(app) == 2
    assert app[0].index < pull <= app[1].index
    result = next(e.result for e in events if isinstance(e, RundownFinished))
    assert [c.index for c in result.cues if c.kind is CueKind.APPROACH] == [app[1].index]


def test_one_pace_cue_per_stretch_of_pulling() -> None:
    """A long brisk free run (3 s at 90 deg/s, well past the first cue's freshness) hears one
    pace cue, not one every horizon."""
    b = Build()
    b.seg(0.3, 0.0, 0.0, 0.0)
    b.seg(3.0, 90.0, 0.0, 270.0)
    t, T, r, _ = seat_and_tighten(b, 90.0)
    events = Engine(prog(strategy="torque-angle", target_angle=30.0), SETTINGS).feed(t, T, r)
    started = next(e for e in events if isinstance(e, RundownStarted))
    before = [c for c in cues(events, CueKind.APPROACH) if c.index < started.index]
    assert len(before) == 1


@pytest.mark.parametrize("frame", [1, 7, 22])
def test_pace_cue_is_sample_exact_whatever_the_framing(frame: int) -> None:
    t, T, r, _ = free_run_trace(90.0)
    program = prog(strategy="torque-angle", target_angle=30.0)
    whole = Engine(program, SETTINGS).feed(t, T, r)
    eng = Engine(program, SETTINGS)
    parts: list[Event] = []
    for i in range(0, len(t), frame):
        parts.extend(eng.feed(t[i : i + frame], T[i : i + frame], r[i : i + frame]))
    assert [(type(e).__name__, getattr(e, "index", None)) for e in parts] == [
        (type(e).__name__, getattr(e, "index", None)) for e in whole
    ]


# ------------------------------------------------------------------ re-arming
def test_stop_cue_rearms_when_the_operator_pulls_again_short_of_the_target() -> None:
    """30° step at 30 deg/s: the technician stops at 24° after the cue, lets go, pulls again
    at 10 deg/s; the stop cue fires again on the new stroke, 0.25 s × 10 deg/s = 2.5° before
    the target (closed form), and the rundown ends OK after the release."""
    b = Build()
    b.seg(0.3, 0.0, 0.0, 0.0)
    b.seg(0.05, 60.0, 1.5, 0.0)
    b.seg((10.0 - 1.5) / 45.0, 30.0, 10.0, (10.0 - 1.5) / 1.5)  # to snug at 10 N·m
    b.seg(0.8, 30.0, 10.0 + 1.5 * 24.0, 24.0)  # 24° past snug
    b.seg(0.2, -200.0, 0.5, 0.0)  # let go, swing back
    b.seg(0.3, 0.0, 0.5, 0.0)
    b.seg(0.1, 10.0, 46.0, 0.0)  # wind-up at the new pull's pace, fastener still
    b.seg(1.0, 10.0, 46.0 + 15.0, 10.0)  # 10 deg/s to 34°
    b.seg(0.05, 0.0, 0.0, 0.0)
    b.seg(0.3, 0.0, 0.0, 0.0)
    t, T, r, _ = b.arrays()
    events = Engine(prog(strategy="torque-angle", target_angle=30.0), SETTINGS).feed(t, T, r)
    stops = cues(events, CueKind.STOP)
    assert len(stops) == 2
    second_pull = int(np.flatnonzero(r == 10.0)[0])
    assert stops[0].index < second_pull <= stops[1].index
    stop = first_stop(events)
    assert stops[1].t_s == pytest.approx(stop.t_s - H_STOP, abs=2 * DT + 1e-9)
    assert stop.cue_lead_s == pytest.approx(H_STOP, abs=2 * DT + 1e-9)
    result = next(e.result for e in events if isinstance(e, RundownFinished))
    assert result.status is Status.OK
    assert [c.kind for c in result.cues].count(CueKind.STOP) == 2


def test_rearmed_stop_cue_predicts_from_the_handle_before_the_fastener_turns() -> None:
    """The technician lets go 1° short of a 30° step and pulls again at 12 deg/s. What is
    left (1°) takes less than latency + reaction (0.25 s × 12 deg/s = 3°) even counting the
    0.1 s wind-up, so the cue fires at the first forward sample of the new pull (the gyro
    sees the handle move at once), ahead of the fastener turning; a prediction from the
    counted angle could only fire once the fastener turns and a rate window lies behind."""
    b = Build()
    b.seg(0.3, 0.0, 0.0, 0.0)
    b.seg(0.05, 60.0, 1.5, 0.0)
    b.seg((10.0 - 1.5) / 45.0, 30.0, 10.0, (10.0 - 1.5) / 1.5)  # to snug at 10 N·m
    b.seg(29.0 / 30.0, 30.0, 10.0 + 1.5 * 29.0, 29.0)  # 29° past snug
    let_go = len(b.t)
    b.seg(0.2, -200.0, 0.5, 0.0)  # let go, swing back
    b.seg(0.3, 0.0, 0.5, 0.0)
    pull = len(b.t)
    b.seg(0.1, 12.0, 53.5, 0.0)  # wind-up, fastener still
    turns = len(b.t)
    b.seg(0.5, 12.0, 53.5 + 9.0, 6.0)
    b.seg(0.05, 0.0, 0.0, 0.0)
    b.seg(0.3, 0.0, 0.0, 0.0)
    t, T, r, _ = b.arrays()
    events = Engine(prog(strategy="torque-angle", target_angle=30.0), SETTINGS).feed(t, T, r)
    stops = cues(events, CueKind.STOP)
    assert len(stops) == 2
    assert stops[0].index < let_go
    assert stops[1].index == pull  # the first sample of the new pull (12 deg/s > rest level)
    assert stops[1].index < turns
    assert first_stop(events).index > turns


def test_no_rearm_without_a_new_stroke() -> None:
    """A single pull straight through the target: one stop cue, whatever the aim."""
    t, T, r, _ = short_angle_trace(60.0, 90.0)
    events = Engine(prog(strategy="torque-angle", target_angle=30.0), SETTINGS).feed(t, T, r)
    assert len(cues(events, CueKind.STOP)) == 1


def test_stop_cue_just_after_snug_predicts_with_the_full_rate() -> None:
    """120 deg/s straight through snug on a 33° step: the cue belongs 0.25 s before the
    crossing, 3° (25 ms) past snug, while a 50 ms window still reaches back before snug. The
    rate there is the pull's own (closed form: the crossing − H_STOP), not one diluted by the
    angle held at 0 before snug."""
    t, T, r, _ = short_angle_trace(120.0, 90.0)
    events = Engine(prog(strategy="torque-angle", target_angle=33.0), SETTINGS).feed(t, T, r)
    snug = next(e for e in events if isinstance(e, SnugReached))
    cue = cues(events, CueKind.STOP)
    assert len(cue) == 1
    assert cue[0].t_s - snug.t_s < 0.05
    assert cue[0].t_s == pytest.approx(first_stop(events).t_s - H_STOP, abs=2 * DT + 1e-9)
