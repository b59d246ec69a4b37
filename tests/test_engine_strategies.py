"""Strategies, stops, cues, judgement and the engine's inputs, on closed-form traces.

Expected sample indices are computed independently of the engine: thresholds with
numpy.flatnonzero, angles with scipy.integrate.cumulative_trapezoid, sliding least-squares
slopes with numpy.polyfit per sample (brute force), slopes and joint rate against
scipy.stats.linregress. Elastic-plastic traces have closed-form slopes (derived here).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np
import numpy.typing as npt
import pytest
from scipy.integrate import cumulative_trapezoid
from scipy.stats import linregress

from clampd.daemon.engine import (
    CueFired,
    CueKind,
    Engine,
    EngineFault,
    EngineSettings,
    EngineUsageError,
    Event,
    OverTorque,
    Program,
    Reason,
    RundownFinished,
    RundownResult,
    RundownStarted,
    SensorDataError,
    SnugReached,
    State,
    Status,
    StopReached,
    StopTrigger,
    YieldDetected,
    program_from_mapping,
)

F = npt.NDArray[np.float64]
FS = 1000.0


def finished(events: Sequence[Event]) -> list[RundownResult]:
    return [e.result for e in events if isinstance(e, RundownFinished)]


def of(events: Sequence[Event], kind: type) -> list[Event]:
    return [e for e in events if isinstance(e, kind)]


def prog(**kw: object) -> Program:
    base: dict[str, object] = {"id": "t", "snug_torque": 10.0}
    base.update(kw)
    return program_from_mapping(base)


def trace(
    torque_of_phi: Callable[[F], F], omega: float, phi_end: float, rest_s: float = 0.3
) -> tuple[F, F, F, F]:
    """Rest, then the fastener turns at ``omega`` deg/s to ``phi_end`` with torque
    ``torque_of_phi(φ)``, then the operator releases (torque to 0 in 30 ms, rate 0) and rests.
    Returns t, torque, rate, φ."""
    n_rest = int(rest_s * FS)
    n_turn = round(phi_end / omega * FS)
    n_rel = 30
    n_after = 200
    t = np.arange(n_rest + n_turn + 1 + n_rel + n_after) / FS
    phi = np.zeros_like(t)
    phi[n_rest : n_rest + n_turn + 1] = omega * np.arange(n_turn + 1) / FS
    phi[n_rest + n_turn + 1 :] = phi[n_rest + n_turn]
    rate = np.zeros_like(t)
    rate[n_rest + 1 : n_rest + n_turn + 1] = omega
    torque = np.zeros_like(t)
    torque[n_rest : n_rest + n_turn + 1] = torque_of_phi(phi[n_rest : n_rest + n_turn + 1])
    top = torque[n_rest + n_turn]
    torque[n_rest + n_turn + 1 : n_rest + n_turn + 1 + n_rel] = top * (
        1.0 - np.arange(1, n_rel + 1) / n_rel
    )
    return t, torque, rate, phi


def linear_joint(phi: F) -> F:
    """Rundown with 3 N·m prevailing torque for 20°, then a joint of 1.5 N·m/deg."""
    return 3.0 + 1.5 * np.maximum(phi - 20.0, 0.0)


def elastic_plastic(theta1: float, lam: float, p: float, k: float = 1.5) -> Callable[[F], F]:
    """Prevailing 3 N·m to φ = 20°, linear at k to φ = 20 + θ1, then a smooth knee whose slope
    is k·(p + (1 − p)·exp(−x/λ)), x = φ − 20 − θ1 (closed-form integral below)."""

    def f(phi: F) -> F:
        a = np.maximum(phi - 20.0, 0.0)
        x = np.maximum(a - theta1, 0.0)
        lin = np.minimum(a, theta1)
        return 3.0 + k * lin + k * (p * x + (1.0 - p) * lam * (1.0 - np.exp(-x / lam)))

    return f


def angle_from_snug(t: F, torque: F, rate: F, snug_level: float) -> tuple[int, F]:
    s = int(np.flatnonzero(torque >= snug_level)[0])
    ang = np.zeros_like(t)
    ang[s:] = cumulative_trapezoid(rate[s:], t[s:], initial=0.0)
    return s, ang


# ------------------------------------------------------------------ torque
def test_torque_strategy_stops_at_first_sample_reaching_target() -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 60.0)
    p = prog(strategy="torque", target_torque=40.0, torque_window=[38, 70], angle_window=[10, 40])
    events = Engine(p).feed(t, T, r)
    stop = of(events, StopReached)[0]
    assert isinstance(stop, StopReached)
    assert stop.index == int(np.flatnonzero(T >= 40.0)[0])
    assert stop.trigger is StopTrigger.TARGET_TORQUE
    res = finished(events)[0]
    assert res.status is Status.OK
    s, ang = angle_from_snug(t, T, r, 10.0)
    assert res.snug is not None
    assert res.snug.index == s
    # release: the first sample below the release level (default: the start level, 1 N·m)
    assert res.end_index == int(np.flatnonzero((np.arange(t.size) > stop.index) & (T < 1.0))[0])
    # final = peak of the last stroke, angle at that moment
    pk = int(np.argmax(T))
    assert res.final_torque_nm == T[pk]
    assert res.final_angle_deg == pytest.approx(ang[pk], abs=1e-9)
    assert res.peak_torque_nm == T.max()


def test_torque_window_and_angle_window_judged_on_final_values() -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 60.0)  # operator overshoots to 63 N·m, 40° past 20°
    p = prog(strategy="torque", target_torque=40.0, torque_window=[38, 50], angle_window=[45, 60])
    res = finished(Engine(p).feed(t, T, r))[0]
    assert res.status is Status.NOK
    assert set(res.reasons) == {Reason.TORQUE_HIGH, Reason.ANGLE_LOW}


# ------------------------------------------------------------------ torque-angle
def test_torque_angle_stops_at_first_sample_reaching_angle_from_snug() -> None:
    t, T, r, _ = trace(linear_joint, 25.0, 60.0)
    p = prog(strategy="torque-angle", target_angle="30 deg", torque_window=[40, 80])
    events = Engine(p).feed(t, T, r)
    _s, ang = angle_from_snug(t, T, r, 10.0)
    stop = of(events, StopReached)[0]
    assert isinstance(stop, StopReached)
    assert stop.index == int(np.flatnonzero(ang >= 30.0 - 1e-9)[0])
    assert stop.angle_deg == pytest.approx(ang[stop.index], abs=1e-9)
    assert stop.trigger is StopTrigger.TARGET_ANGLE
    assert finished(events)[0].status is Status.OK


# ------------------------------------------------------------------ yield
def _brute_force_yield(
    t: F, T: F, r: F, *, snug: float, window: float, fraction: float, min_angle: float
) -> int:
    """Sliding LS slope by numpy.polyfit per sample, running max, first qualifying sample."""
    s, ang = angle_from_snug(t, T, r, snug)
    best = -np.inf
    for i in range(s + 1, t.size):
        if r[i] <= 0.0 or ang[i] < window:
            continue
        js = np.flatnonzero((ang >= ang[i] - window) & (np.arange(t.size) >= s) & (r > 0.0))
        js = js[js <= i]
        slope = float(np.polyfit(ang[js], T[js], 1)[0])
        best = max(best, slope)
        if ang[i] >= min_angle and slope <= fraction * best:
            return i
    raise AssertionError("no yield in trace")


def test_yield_stop_is_the_first_sample_where_the_condition_holds() -> None:
    shape = elastic_plastic(theta1=25.0, lam=2.0, p=0.05)
    t, T, r, _ = trace(shape, 20.0, 75.0)
    p = prog(strategy="yield", slope_window="1 deg", yield_fraction=0.5, max_torque=200.0)
    events = Engine(p).feed(t, T, r)
    expected = _brute_force_yield(t, T, r, snug=10.0, window=1.0, fraction=0.5, min_angle=2.0)
    y = of(events, YieldDetected)[0]
    assert isinstance(y, YieldDetected)
    assert y.point.index == expected
    stop = of(events, StopReached)[0]
    assert isinstance(stop, StopReached)
    assert stop.index == expected
    assert stop.trigger is StopTrigger.YIELD
    # the reported slope is the least-squares slope of its window (scipy.stats.linregress)
    s, ang = angle_from_snug(t, T, r, 10.0)
    js = np.flatnonzero((ang >= ang[expected] - 1.0) & (np.arange(t.size) >= s) & (r > 0.0))
    js = js[js <= expected]
    assert y.point.slope_nm_per_deg == pytest.approx(linregress(ang[js], T[js]).slope, rel=1e-6)
    res = finished(events)[0]
    assert res.status is Status.OK
    assert res.yield_point is not None


@pytest.mark.parametrize(
    ("lam", "p", "fraction", "omega"),
    [(2.0, 0.05, 0.5, 20.0), (3.0, 0.1, 0.5, 30.0), (1.5, 0.0, 0.6, 15.0), (4.0, 0.05, 0.4, 25.0)],
)
def test_yield_stop_within_one_degree_of_true_slope_crossing(
    lam: float, p: float, fraction: float, omega: float
) -> None:
    """True slope k(p + (1 − p)e^{−x/λ}) falls to fraction·k at x* = λ·ln((1 − p)/(f − p))
    (closed form); the stop must be within ±1° of it (1 kHz, 1° window)."""
    theta1 = 25.0
    t, T, r, phi = trace(elastic_plastic(theta1, lam, p), omega, 90.0)
    pr = prog(strategy="yield", slope_window="1 deg", yield_fraction=fraction, max_torque=300.0)
    events = Engine(pr).feed(t, T, r)
    stop = of(events, StopReached)[0]
    assert isinstance(stop, StopReached)
    assert stop.trigger is StopTrigger.YIELD
    s, _ = angle_from_snug(t, T, r, 10.0)
    x_star = lam * np.log((1.0 - p) / (fraction - p))
    true_angle = 20.0 + theta1 + x_star - phi[s]  # from snug
    assert abs(stop.angle_deg - true_angle) <= 1.0


def test_yield_not_found_is_nok() -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 50.0)  # elastic all the way; over-torque ends it
    p = prog(strategy="yield", slope_window="1 deg", max_torque=45.0)
    events = Engine(p).feed(t, T, r)
    res = finished(events)[0]
    assert set(res.reasons) == {Reason.OVER_TORQUE, Reason.YIELD_NOT_FOUND}


def test_joint_rate_matches_linregress_over_linear_region() -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 45.0)
    res = finished(Engine(prog(strategy="torque", target_torque=40.0)).feed(t, T, r))[0]
    s, ang = angle_from_snug(t, T, r, 10.0)
    assert res.stop is not None
    sel = np.arange(s, res.stop.index + 1)
    ref = linregress(ang[sel], T[sel])
    assert res.joint_rate_nm_per_deg == pytest.approx(ref.slope, rel=1e-9)
    assert res.joint_rate_nm_per_deg == pytest.approx(1.5, rel=1e-9)  # the trace's joint
    assert res.joint_rate_r2 == pytest.approx(ref.rvalue**2, abs=1e-9)


# ------------------------------------------------------------------ torque-to-yield
def test_torque_to_yield_stops_on_angle_after_yield() -> None:
    t, T, r, _ = trace(elastic_plastic(25.0, 2.0, 0.05), 20.0, 80.0)
    p = prog(
        strategy="torque-to-yield",
        target_angle=45.0,
        slope_window=1.0,
        torque_window=[30, 60],
        max_torque=200,
    )
    events = Engine(p).feed(t, T, r)
    _s, ang = angle_from_snug(t, T, r, 10.0)
    y = of(events, YieldDetected)[0]
    stop = of(events, StopReached)[0]
    assert isinstance(y, YieldDetected)
    assert isinstance(stop, StopReached)
    assert y.point.index < stop.index == int(np.flatnonzero(ang >= 45.01)[0])
    res = finished(events)[0]
    assert res.status is Status.OK, res.reasons


def test_torque_to_yield_without_yield_is_nok() -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 50.0)
    p = prog(strategy="torque-to-yield", target_angle=20.0, slope_window=1.0)
    res = finished(Engine(p).feed(t, T, r))[0]
    assert res.reasons == (Reason.YIELD_NOT_FOUND,)


# ------------------------------------------------------------------ multi-step
def test_multi_step_torque_then_two_angle_steps() -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 75.0)
    p = prog(
        strategy="multi-step",
        step=[
            {"kind": "torque", "target_torque": "20 N*m"},
            {"kind": "angle", "target_angle": "15 deg"},
            {"kind": "angle", "target_angle": "10 deg"},
        ],
    )
    events = Engine(p).feed(t, T, r)
    _, ang = angle_from_snug(t, T, r, 10.0)
    stops = [e for e in events if isinstance(e, StopReached)]
    assert [s.step for s in stops] == [0, 1, 2]
    assert [s.last_step for s in stops] == [False, False, True]
    i0 = int(np.flatnonzero(T >= 20.0)[0])
    i1 = int(np.flatnonzero(ang - ang[i0] >= 15.0 - 1e-9)[0])
    i2 = int(np.flatnonzero(ang - ang[i1] >= 10.0 - 1e-9)[0])
    assert [s.index for s in stops] == [i0, i1, i2]
    res = finished(events)[0]
    assert res.stop is not None
    assert res.stop.index == i2
    assert res.status is Status.OK


# ------------------------------------------------------------------ over-torque
def test_over_torque_stops_at_once_and_is_nok() -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 60.0)
    p = prog(strategy="torque-angle", target_angle=50.0, max_torque=50.0)
    events = Engine(p).feed(t, T, r)
    over = of(events, OverTorque)
    assert len(over) == 1
    assert isinstance(over[0], OverTorque)
    assert over[0].index == int(np.flatnonzero(T >= 50.0)[0])
    stop = of(events, StopReached)[0]
    assert isinstance(stop, StopReached)
    assert stop.trigger is StopTrigger.OVER_TORQUE
    assert stop.index == over[0].index
    res = finished(events)[0]
    assert Reason.OVER_TORQUE in res.reasons
    assert res.status is Status.NOK


def test_over_torque_after_the_stop_is_still_nok() -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 60.0)  # operator overshoots to 63 N·m
    p = prog(strategy="torque", target_torque=40.0, max_torque=55.0)
    events = Engine(p).feed(t, T, r)
    stop = of(events, StopReached)[0]
    assert isinstance(stop, StopReached)
    assert stop.trigger is StopTrigger.TARGET_TORQUE
    assert len(of(events, OverTorque)) == 1
    assert finished(events)[0].reasons == (Reason.OVER_TORQUE,)


# ------------------------------------------------------------------ cues
def test_predictive_stop_cue_on_a_constant_rate_leads_by_latency_plus_reaction() -> None:
    """Closed form: angle rises at ω, so the value predicted at now + H reaches the target
    at t_cross − H; the predicted crossing equals the actual one."""
    omega = 30.0
    t, T, r, _ = trace(linear_joint, omega, 70.0)
    settings = EngineSettings(reaction_time_s=0.2, cue_latency_s=0.05, approach_lead_s=0.5)
    events = Engine(prog(strategy="torque-angle", target_angle=40.0), settings).feed(t, T, r)
    stop = of(events, StopReached)[0]
    assert isinstance(stop, StopReached)
    cues = [e for e in events if isinstance(e, CueFired)]
    assert [c.kind for c in cues] == [CueKind.APPROACH, CueKind.STOP]
    dt = 1.0 / FS
    assert cues[1].t_s == pytest.approx(stop.t_s - 0.25, abs=dt + 1e-9)
    assert cues[0].t_s == pytest.approx(stop.t_s - 0.75, abs=dt + 1e-9)
    for c in cues:
        assert c.predicted_crossing_t_s == pytest.approx(stop.t_s, abs=dt + 1e-9)
        assert c.index < stop.index
    assert stop.cue_lead_s == pytest.approx(0.25, abs=dt + 1e-9)
    rec = finished(events)[0].cues
    assert all(c.actual_crossing_index == stop.index for c in rec)


def test_torque_cue_uses_torque_rate() -> None:
    t, T, r, _ = trace(linear_joint, 20.0, 60.0)  # dT/dt = 1.5 · 20 = 30 N·m/s
    settings = EngineSettings(reaction_time_s=0.2, cue_latency_s=0.0, approach_lead_s=0.3)
    events = Engine(prog(strategy="torque", target_torque=50.0), settings).feed(t, T, r)
    stop = of(events, StopReached)[0]
    cue = next(e for e in events if isinstance(e, CueFired) and e.kind is CueKind.STOP)
    assert isinstance(stop, StopReached)
    assert cue.t_s == pytest.approx(stop.t_s - 0.2, abs=1.0 / FS + 1e-9)


# ------------------------------------------------------------------ inputs and errors
def test_two_rundowns_in_one_frame_and_indices_count_from_creation() -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 50.0)
    t2 = np.concatenate([t, t + t[-1] + 1.0 / FS])
    T2 = np.concatenate([T, T])
    r2 = np.concatenate([r, r])
    eng = Engine(prog(strategy="torque", target_torque=40.0))
    events = eng.feed(t2, T2, r2)
    res = finished(events)
    assert len(res) == 2
    assert res[1].start_index == res[0].start_index + t.size
    assert res[1].stop is not None
    assert res[0].stop is not None
    assert res[1].stop.index == res[0].stop.index + t.size
    assert eng.state is State.IDLE
    assert eng.samples_seen == t2.size


def test_timeout_by_samples_and_by_tick() -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 10.0)  # stops before snug (3 N·m), then releases
    p = prog(strategy="torque", target_torque=40.0, timeout="0.1 s")
    events = Engine(p).feed(t, T, r)
    res = finished(events)[0]
    assert set(res.reasons) == {Reason.TIMEOUT, Reason.SNUG_NOT_FOUND}
    last_active = int(np.flatnonzero(T >= 1.0)[-1])
    assert res.end_index == int(np.flatnonzero(t - t[last_active] > 0.1 + 1e-12)[0])
    # by tick: no samples after the torque falls
    cut = last_active + 5
    eng = Engine(p)
    assert not finished(eng.feed(t[:cut], T[:cut], r[:cut]))
    assert eng.tick(float(t[last_active]) + 0.05) == []
    res2 = finished(eng.tick(float(t[last_active]) + 0.2))[0]
    assert Reason.TIMEOUT in res2.reasons
    assert res2.end_index == cut - 1


def test_link_lost_and_abort_end_nok_with_partial_curve_idle_does_nothing() -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 50.0)
    p = prog(strategy="torque", target_torque=40.0)
    for call, reason in (("link_lost", Reason.LINK_LOST), ("abort", Reason.ABORTED)):
        eng = Engine(p)
        assert getattr(eng, call)(0.0) == []
        cut = int(np.flatnonzero(T >= 20.0)[0])
        start = finished(eng.feed(t[:cut], T[:cut], r[:cut]))
        assert not start
        res = finished(getattr(eng, call)(float(t[cut - 1]) + 0.01))[0]
        assert reason in res.reasons
        assert res.status is Status.NOK
        assert res.curve_t_s[-1] == t[cut - 1]
        assert eng.state is State.IDLE
        # still pulling: no new rundown until torque has fallen below the start level
        ev = eng.feed(t[cut:], T[cut:], r[cut:])
        assert not of(ev, RundownStarted)


def test_select_program_only_between_rundowns() -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 50.0)
    eng = Engine(prog(strategy="torque", target_torque=40.0))
    cut = int(np.flatnonzero(T >= 5.0)[0])
    eng.feed(t[:cut], T[:cut], r[:cut])
    with pytest.raises(EngineUsageError) as info:
        eng.select_program(prog(strategy="torque", target_torque=30.0))
    assert info.value.state == "rundown"
    assert info.value.input == "select_program"
    assert eng.program.target_torque_nm == 40.0
    events = eng.feed(t[cut:], T[cut:], r[cut:])
    assert finished(events)
    eng.select_program(prog(strategy="torque", target_torque=30.0))
    events = eng.feed(t + 10.0, T, r)
    stop = of(events, StopReached)[0]
    assert isinstance(stop, StopReached)
    assert stop.torque_nm >= 30.0 > T[stop.index - eng.samples_seen + t.size - 1]


def _canon(events: Sequence[Event]) -> list[object]:
    out: list[object] = []
    for e in events:
        if isinstance(e, RundownFinished):
            out.append(("finished", e.index, e.result.to_dict(), e.result.curve_angle_deg.tolist()))
        else:
            out.append(e)
    return out


@pytest.mark.parametrize("bad", ["nan", "backwards", "repeat", "length"])
def test_bad_frames_raise_sensor_data_error_and_lose_nothing(bad: str) -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 50.0)
    p = prog(strategy="torque", target_torque=40.0)
    clean = Engine(p)
    ref = clean.feed(t[:700], T[:700], r[:700]) + clean.feed(t[700:], T[700:], r[700:])
    eng = Engine(p)
    got = eng.feed(t[:700], T[:700], r[:700])
    bt, bT, br = t[700:722].copy(), T[700:722].copy(), r[700:722].copy()
    if bad == "nan":
        bT[5] = np.nan
    elif bad == "backwards":
        bt[3] = bt[2] - 0.001
    elif bad == "repeat":
        bt[0] = t[699]
    if bad == "length":
        br = br[:-1]
    with pytest.raises(SensorDataError) as info:
        eng.feed(bt, bT, br)
    assert str(info.value)
    assert eng.samples_seen == 700
    got += eng.feed(t[700:], T[700:], r[700:])
    assert _canon(got) == _canon(ref)


def test_internal_error_poisons_the_rundown(monkeypatch: pytest.MonkeyPatch) -> None:
    """Fault injection on top of the real engine: one internal error ends the rundown NOK."""
    t, T, r, _ = trace(linear_joint, 30.0, 50.0)
    eng = Engine(prog(strategy="torque-angle", target_angle=20.0))
    cut = int(np.flatnonzero(T >= 15.0)[0])
    eng.feed(t[:cut], T[:cut], r[:cut])

    def boom(*_a: object, **_k: object) -> None:
        raise RuntimeError("injected")

    monkeypatch.setattr(eng, "_may_reach", boom)
    events = eng.feed(t[cut : cut + 22], T[cut : cut + 22], r[cut : cut + 22])
    fault = of(events, EngineFault)
    assert len(fault) == 1
    res = finished(events)[0]
    assert res.reasons == (Reason.ENGINE_ERROR,)
    assert eng.state is State.IDLE
    monkeypatch.undo()
    # the poisoned rundown never continues: the rest of this pull starts nothing
    events = eng.feed(t[cut + 22 :], T[cut + 22 :], r[cut + 22 :])
    assert not of(events, RundownStarted)
    assert not of(events, SnugReached)


def test_curve_downsampled_keeps_ends_and_bounds_points() -> None:
    t, T, r, _ = trace(linear_joint, 30.0, 60.0)
    res = finished(Engine(prog(strategy="torque", target_torque=40.0)).feed(t, T, r))[0]
    n = res.curve_t_s.shape[0]
    assert n > 300
    ts, tq, ang = res.curve_downsampled(200)
    assert ts.shape == tq.shape == ang.shape == (200,)
    assert ts[0] == res.curve_t_s[0]
    assert ts[-1] == res.curve_t_s[-1]
    assert np.all(np.diff(ts) > 0)
    assert np.isin(tq, res.curve_torque_nm).all()
    assert tq.max() == res.peak_torque_nm  # LTTB keeps the sharp peak of a rundown


def test_events_validate_themselves() -> None:
    with pytest.raises(ValueError, match="invalid event field"):
        SnugReached(index=-1, t_s=0.0, torque_nm=1.0)
    with pytest.raises(ValueError, match="invalid event field"):
        CueFired(kind=CueKind.STOP, step=0, index=3, t_s=1.0, predicted_crossing_t_s=0.5)
    with pytest.raises(ValueError, match="invalid event field"):
        OverTorque(index=1, t_s=float("nan"), torque_nm=1.0, limit_nm=2.0)


def test_settings_are_validated() -> None:
    with pytest.raises(EngineUsageError, match="max_gap_s"):
        EngineSettings(max_gap_s=0.0)
    with pytest.raises(EngineUsageError, match="resume_fraction"):
        EngineSettings(resume_fraction=1.5)
    with pytest.raises(EngineUsageError, match="finite"):
        EngineSettings(reaction_time_s=float("inf"))


def test_events_on_one_sample_come_in_causal_order() -> None:
    """A single sample that reaches snug and the target: snug first, then the cues (late,
    predicted = actual), then the stop."""
    p = prog(strategy="torque", target_torque=20.0)
    eng = Engine(p)
    events = eng.feed([0.0, 0.001, 0.002, 0.003], [0.0, 2.0, 25.0, 0.0], [0.0, 10.0, 10.0, -5.0])
    names = [type(e).__name__ for e in events]
    assert names == [
        "RundownStarted",
        "SnugReached",
        "CueFired",
        "CueFired",
        "StopReached",
        "RundownFinished",
    ]
    assert [e.index for e in events if isinstance(e, SnugReached | StopReached)] == [2, 2]
