"""Hypothesis properties of the engine on random ratchet traces with noise:

- feeding one sample at a time, one frame at a time, or in arbitrary splits yields identical
  events and indices (bit-identical results);
- the counted angle never decreases;
- no angle-based stop (target angle, yield) happens before snug.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence

import numpy as np
import numpy.typing as npt
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from clampd.daemon.engine import (
    Engine,
    EngineSettings,
    Event,
    Program,
    RundownFinished,
    SnugReached,
    StopReached,
    StopTrigger,
    YieldDetected,
    program_from_mapping,
)

F = npt.NDArray[np.float64]

PROGRAMS: list[dict[str, object]] = [
    {
        "strategy": "torque",
        "target_torque": 30.0,
        "max_torque": 60.0,
        # every error-proofing check on, so their figures are held sample-exact too
        "prevailing_torque_window": [0.0, 3.0],
        "rundown_angle_window": [5.0, 400.0],
        "joint_rate_window": [0.5, 5.0],
        "rehit_angle_max": 2.0,
        "torque_drop": 0.2,
    },
    {"strategy": "torque-angle", "target_angle": 25.0, "angle_window": [20, 40]},
    {"strategy": "yield", "slope_window": 1.5, "max_torque": 70.0},
    {"strategy": "torque-to-yield", "target_angle": 35.0, "monitor_yield": True},
    {
        "strategy": "multi-step",
        "step": [
            {"kind": "torque", "target_torque": 15.0},
            {"kind": "angle", "target_angle": 10.0},
            {"kind": "angle", "target_angle": 8.0},
        ],
    },
]


def make_program(i: int) -> Program:
    m = {"id": f"prop-{i}", "snug_torque": 8.0, "timeout": 0.4, **PROGRAMS[i]}
    return program_from_mapping(m)


@st.composite
def traces(draw: st.DrawFn) -> tuple[F, F, F]:
    """Random ratchet rundowns: strokes on an elastic-plastic joint, noise, back-strokes,
    optional holes in the data; sometimes two rundowns."""
    seed = draw(st.integers(0, 2**32 - 1))
    rng = np.random.default_rng(seed)
    fs = draw(st.sampled_from([500.0, 1000.0, 2000.0]))
    strokes = draw(st.integers(1, 4))
    k = draw(st.floats(0.5, 3.0))
    yield_at = draw(st.floats(10.0, 40.0))
    omega = draw(st.floats(15.0, 80.0))
    noise_T = draw(st.sampled_from([0.0, 0.05, 0.3]))
    noise_r = draw(st.sampled_from([0.0, 0.5, 3.0]))
    bias = draw(st.floats(-2.0, 2.0))
    rundowns = draw(st.integers(1, 2))
    dt = 1.0 / fs
    ts: list[F] = []
    Ts: list[F] = []
    rs: list[F] = []
    t0 = 0.0

    def seg(n: int, T: F, r: F) -> None:
        nonlocal t0
        ts.append(t0 + dt * np.arange(1, n + 1, dtype=np.float64))
        t0 += dt * n
        Ts.append(T + rng.normal(0.0, noise_T, n))
        rs.append(r + bias + rng.normal(0.0, noise_r, n))

    for _ in range(rundowns):
        seg(int(0.2 * fs), np.zeros(int(0.2 * fs)), np.zeros(int(0.2 * fs)))
        phi = 0.0
        for s in range(strokes):
            span = float(draw(st.floats(5.0, 25.0)))
            n = max(int(span / omega * fs), 2)
            ph = phi + omega * dt * np.arange(1, n + 1)
            lin = np.minimum(ph, yield_at)
            T = 2.0 + k * lin + 0.1 * k * np.maximum(ph - yield_at, 0.0)
            seg(n, T, np.full(n, omega))
            phi = float(ph[-1])
            top = float(T[-1])
            m = int(0.03 * fs)
            seg(m, top * (1.0 - np.arange(1, m + 1) / m), np.zeros(m))
            if s < strokes - 1:
                m = int(0.2 * fs)
                seg(m, np.full(m, 0.1), np.full(m, -omega))
                m = int(0.05 * fs)
                seg(m, np.linspace(0.1, top, m), np.full(m, 5.0))
        seg(int(0.5 * fs), np.zeros(int(0.5 * fs)), np.zeros(int(0.5 * fs)))
    t = np.concatenate(ts)
    T = np.concatenate(Ts)
    r = np.concatenate(rs)
    if draw(st.booleans()):  # punch a hole somewhere
        a = draw(st.integers(0, t.size - 1))
        b = min(t.size, a + draw(st.integers(1, int(0.1 * fs))))
        keep = np.ones(t.size, dtype=bool)
        keep[a:b] = False
        t, T, r = t[keep], T[keep], r[keep]
    return t, T, r


def canon(events: Sequence[Event]) -> list[object]:
    out: list[object] = []
    for e in events:
        if isinstance(e, RundownFinished):
            res = e.result
            out.append(
                (
                    e.index,
                    res.to_dict(),
                    res.curve_t_s.tobytes(),
                    res.curve_torque_nm.tobytes(),
                    res.curve_angle_deg.tobytes(),
                )
            )
        else:
            out.append(e)
    return out


def run(p: Program, t: F, T: F, r: F, cuts: list[int]) -> list[Event]:
    eng = Engine(p, EngineSettings(max_gap_s=0.03))
    events: list[Event] = []
    bounds = [0, *sorted(set(cuts)), t.size]
    for a, b in itertools.pairwise(bounds):
        if b > a:
            events += eng.feed(t[a:b], T[a:b], r[a:b])
    events += eng.tick(float(t[-1]) + 10.0)
    return events


COMMON = settings(
    max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=False
)


@COMMON
@given(tr=traces(), which=st.integers(0, len(PROGRAMS) - 1), data=st.data())
def test_sample_frame_and_split_feeding_agree_exactly(
    tr: tuple[F, F, F], which: int, data: st.DataObject
) -> None:
    t, T, r = tr
    p = make_program(which)
    whole = run(p, t, T, r, [])
    frames = run(p, t, T, r, list(range(22, t.size, 22)))
    cuts = data.draw(st.lists(st.integers(1, t.size - 1), max_size=30))
    split = run(p, t, T, r, cuts)
    assert canon(frames) == canon(whole)
    assert canon(split) == canon(whole)


@settings(max_examples=10, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(tr=traces(), which=st.integers(0, len(PROGRAMS) - 1))
def test_one_sample_at_a_time_agrees_with_whole_trace(tr: tuple[F, F, F], which: int) -> None:
    t, T, r = tr
    p = make_program(which)
    whole = run(p, t, T, r, [])
    single = run(p, t, T, r, list(range(1, t.size)))
    assert canon(single) == canon(whole)


@COMMON
@given(tr=traces(), which=st.integers(0, len(PROGRAMS) - 1))
def test_counted_angle_never_decreases_and_no_angle_stop_before_snug(
    tr: tuple[F, F, F], which: int
) -> None:
    t, T, r = tr
    events = run(make_program(which), t, T, r, list(range(22, t.size, 22)))
    snug_at: int | None = None
    for e in events:
        if isinstance(e, SnugReached):
            snug_at = e.index
        elif isinstance(e, StopReached) and e.trigger in (
            StopTrigger.TARGET_ANGLE,
            StopTrigger.YIELD,
        ):
            assert snug_at is not None
            assert e.index > snug_at
        elif isinstance(e, YieldDetected):
            assert snug_at is not None
            assert e.point.index > snug_at
        elif isinstance(e, RundownFinished):
            ang = e.result.curve_angle_deg
            assert np.all(np.diff(ang) >= 0.0)
            assert np.all(ang >= 0.0)
            if e.result.snug is None:
                assert np.all(ang == 0.0)
            snug_at = None
