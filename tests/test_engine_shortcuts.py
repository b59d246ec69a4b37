"""Work the engine leaves out changes no result.

The engine skips a cue's masks when a scalar bound shows no sample of the frame can reach the
aim, and defers the yield slopes and their prefix sums until yield may be judged. References:
the same engine with the cue bound switched off (an equivalence property, no outside source;
events must agree bit for bit), and for the deferred slopes the brute-force sliding
least-squares slope by numpy.polyfit, with the closed-form slope of the joint in the linear
region.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable

import numpy as np
import numpy.typing as npt
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.integrate import cumulative_trapezoid
from test_engine_properties import PROGRAMS, canon, make_program, traces

from clampd.daemon.engine import (
    CueFired,
    CueKind,
    Engine,
    EngineSettings,
    Event,
    Program,
    YieldDetected,
    program_from_mapping,
)

F = npt.NDArray[np.float64]
FS = 1000.0
FRAME = 22


def _always(*_args: object, **_kwargs: object) -> bool:
    return True


def _feed(eng: Engine, t: F, T: F, r: F, step: int) -> list[Event]:
    events: list[Event] = []
    for a, b in itertools.pairwise([*range(0, t.size, step), t.size]):
        events += eng.feed(t[a:b], T[a:b], r[a:b])
    events += eng.tick(float(t[-1]) + 10.0)
    return events


def _with_and_without_bound(p: Program, t: F, T: F, r: F, step: int) -> tuple[object, object]:
    s = EngineSettings(max_gap_s=0.03)
    bare = Engine(p, s)
    vars(bare)["_may_reach"] = _always  # every frame builds the full masks
    return canon(_feed(Engine(p, s), t, T, r, step)), canon(_feed(bare, t, T, r, step))


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    tr=traces(),
    which=st.integers(0, len(PROGRAMS) - 1),
    # sensor clocks far from zero: the bound's margin for rounding of the time scales with it
    offset=st.sampled_from([0.0, 12_345.678, 1e6, 1e9]),
    step=st.sampled_from([1, 7, FRAME]),
)
def test_cue_bound_hides_no_cue(tr: tuple[F, F, F], which: int, offset: float, step: int) -> None:
    t, T, r = tr
    t = t + offset
    with_bound, without = _with_and_without_bound(make_program(which), t, T, r, step)
    assert with_bound == without


def _ramp(omega: float, k: float, phi_end: float) -> tuple[F, F, F]:
    """Rest, one steady pull at ``omega`` deg/s on a joint of ``k`` N·m/deg past 10°, release."""
    n_rest, n_turn, n_rel = 500, round(phi_end / omega * FS), 30
    t = np.arange(1, n_rest + n_turn + n_rel + 301) / FS
    phi = np.zeros_like(t)
    phi[n_rest : n_rest + n_turn] = omega * np.arange(1, n_turn + 1) / FS
    T = np.zeros_like(t)
    T[n_rest : n_rest + n_turn] = 2.0 + k * np.maximum(phi[n_rest : n_rest + n_turn] - 10.0, 0.0)
    T[n_rest + n_turn : n_rest + n_turn + n_rel] = T[n_rest + n_turn - 1] * np.linspace(1, 0, n_rel)
    r = np.zeros_like(t)
    r[n_rest : n_rest + n_turn] = omega
    return t, T, r


@pytest.mark.parametrize(
    "mapping",
    [
        {"strategy": "torque", "target_torque": 60.0},
        {"strategy": "torque-angle", "target_angle": 40.0},
    ],
)
def test_cue_bound_refuses_far_from_the_target_and_lets_the_cues_through(
    mapping: dict[str, object],
) -> None:
    """A steady pull: the bound refuses the frames far from the target, the cues still fire
    on the samples the full masks find."""
    t, T, r = _ramp(omega=40.0, k=1.5, phi_end=60.0)
    p = program_from_mapping({"id": "bound", "snug_torque": 8.0, **mapping})
    eng = Engine(p)
    answers: list[bool] = []
    real = eng._may_reach  # the seam under test

    def spy(*args: object, **kwargs: object) -> bool:
        answers.append(real(*args, **kwargs))  # type: ignore[arg-type]
        return answers[-1]

    vars(eng)["_may_reach"] = spy
    events = _feed(eng, t, T, r, FRAME)
    assert answers.count(False) > 10
    assert answers.count(True) >= 1
    bare = Engine(p)
    vars(bare)["_may_reach"] = _always
    assert canon(events) == canon(_feed(bare, t, T, r, FRAME))
    kinds = {e.kind for e in events if isinstance(e, CueFired)}
    assert kinds == {CueKind.APPROACH, CueKind.STOP}


def _knee(theta1: float, lam: float, p: float, k: float = 1.5) -> Callable[[F], F]:
    """Prevailing 3 N·m to φ = 20°, slope k to 20 + θ1, then the slope falls as
    k·(p + (1 − p)·exp(−x/λ)), x = φ − 20 − θ1 (its closed-form integral)."""

    def f(phi: F) -> F:
        a = np.maximum(phi - 20.0, 0.0)
        x = np.maximum(a - theta1, 0.0)
        return (
            3.0 + k * np.minimum(a, theta1) + k * (p * x + (1 - p) * lam * (1 - np.exp(-x / lam)))
        )

    return f


def _pull(shape: Callable[[F], F], omega: float, phi_end: float) -> tuple[F, F, F, F]:
    n_rest, n_turn = 300, round(phi_end / omega * FS)
    t = np.arange(1, n_rest + n_turn + 1) / FS
    phi = np.zeros_like(t)
    phi[n_rest:] = omega * np.arange(1, n_turn + 1) / FS
    r = np.where(phi > 0.0, omega, 0.0)
    T = np.where(phi > 0.0, shape(phi), 0.0)
    return t, T, r, phi


@pytest.mark.parametrize("min_angle", [2.0, 30.0, 45.0])
def test_deferred_slopes_keep_the_running_maximum_of_the_whole_rundown(min_angle: float) -> None:
    """Yield judged late (``yield_min_angle``) still compares with the steepest slope since
    snug: the slopes before the minimum angle are caught up, not lost. Reference: sliding
    least-squares slopes by numpy.polyfit, their running maximum, the first sample past the
    minimum angle at or below half of it; the linear region's slope is k = 1.5 N·m/deg."""
    window, fraction, snug = 1.0, 0.5, 10.0
    t, T, r, _ = _pull(_knee(theta1=25.0, lam=2.0, p=0.05), omega=30.0, phi_end=90.0)
    p = program_from_mapping(
        {
            "id": "late-yield",
            "strategy": "yield",
            "snug_torque": snug,
            "slope_window": window,
            "yield_fraction": fraction,
            "yield_min_angle": min_angle,
            "max_torque": 500.0,
        }
    )
    found = [e for e in _feed(Engine(p), t, T, r, FRAME) if isinstance(e, YieldDetected)]
    assert len(found) == 1
    y = found[0].point
    s = int(np.flatnonzero(snug <= T)[0])
    ang = np.zeros_like(t)
    ang[s:] = cumulative_trapezoid(r[s:], t[s:], initial=0.0)
    best, expected, slope_at = -np.inf, -1, np.nan
    for i in range(s + 1, t.size):
        if ang[i] < window:
            continue
        js = np.flatnonzero((ang >= ang[i] - window) & (np.arange(t.size) >= s))
        js = js[js <= i]
        slope = float(np.polyfit(ang[js], T[js], 1)[0])
        best = max(best, slope)
        if ang[i] >= min_angle and slope <= fraction * best:
            expected, slope_at = i, slope
            break
    assert y.index == expected
    assert y.slope_nm_per_deg == pytest.approx(slope_at, rel=1e-6)
    assert y.max_slope_nm_per_deg == pytest.approx(best, rel=1e-6)
    assert y.max_slope_nm_per_deg == pytest.approx(1.5, rel=1e-6)  # the closed form's k
