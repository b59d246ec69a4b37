"""The technician and the bench: how a person pulls a ratchet wrench on a joint.

Theory of operation. :class:`Operator` is a small state machine in true (host) time. It decides
the handle's rotation rate step by step: wait, pull a ratchet stroke (ramp up to a steady rate,
slow down at the end of the stroke), swing the handle back while the ratchet slips, pause, pull
again; it reacts to cues (APPROACH: slow down, STOP: stop and release) and to what it feels (the
bolt giving way, its own strength limit, an optional own stop rule), always after a reaction
time drawn from a lognormal distribution.

A person who stopped on a STOP cue and released may wait for the tool's verdict (an OK or NOK
cue, ``confirm_wait_s``): when none comes, the tool has not said done (the target was not
reached), so they pull again at their fine rate and stop at the next STOP cue, at most
``max_repulls`` times. After an APPROACH cue they slow to the lower of a fraction of their
steady rate and their fine pull rate (``fine_rate_dps``): people finish a joint with a slow,
controlled pull rather than a scaled-down version of their fast one; a pull again is a nudge
at half the fine rate.

:class:`Bench` couples the operator, the wrench's elasticity and a joint. The handle angle h,
the fastener angle φ and the wind-up w = h − φ (tool deflection) obey

    T = w / c        (c: the wrench's elastic deflection, deg per N·m)

and the fastener turns only when T would exceed the torque the joint resists with at φ; then φ
advances until T equals that torque (solved by a bracketed root search). On a back-swing the
ratchet slips: w unwinds to zero, the fastener stays, and the next forward stroke first takes up
the ratchet play (the distance back to the pawl's tooth) before the tool winds up again. So the
gyro sees handle motion — including back-swings and wind-up — while only φ loads the joint.

Invariants: φ never decreases; T ≥ 0; same seed, same motion.
"""

from __future__ import annotations

import dataclasses
import enum
import math
from collections.abc import Iterable, Iterator
from typing import NamedTuple, Protocol

import numpy as np

from clampd.simulators._encoder import CuePattern
from clampd.simulators._joint import JointModel

__all__ = [
    "Bench",
    "Motion",
    "MotionSource",
    "Operator",
    "OperatorError",
    "OperatorParams",
    "OperatorPhase",
]


# A pull again after the tool did not say done is a nudge at this fraction of the fine rate
# (10–20 °/s for the sampled population). Modelling choice: someone who has just stopped close
# to the end moves slowly, listening for the tool.
_NUDGE = 0.5


class OperatorError(ValueError):
    """Operator or bench parameters that make no sense (the caller's input)."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class OperatorParams:
    """How one person works; :meth:`sample` draws a person from a plausible population."""

    steady_rate_dps: float = 60.0  # handle rate while pulling; 30–120 °/s for hand tightening
    accel_dps2: float = 600.0  # reaches 60 °/s in 0.1 s (modelling choice)
    stroke_deg: float = 75.0  # forward handle travel per ratchet stroke
    back_swing_deg: float = 60.0  # handle swing back while the ratchet slips (30–90°)
    back_rate_dps: float = 240.0  # back-swings are quick and unloaded (modelling choice)
    stroke_pause_s: float = 0.15  # regrip between strokes (modelling choice)
    start_delay_s: float = 0.3  # rest before the first pull: lets the engine see the wrench at rest
    # Simple auditory reaction time: median ~0.2 s, 5–95 % ≈ 0.13–0.30 s with σ = 0.25 in log
    # space (common practice, no source; DESIGN.md puts it at 0.15–0.25 s).
    reaction_median_s: float = 0.2
    reaction_sigma: float = 0.25
    approach_slowdown: float = 0.5  # rate factor after hearing the APPROACH cue
    # Fine pull rate after the APPROACH cue and for a pull again (None: only the factor above).
    # Modelling choice: a controlled finishing pull of 20–40 °/s (sample() draws from it), a
    # third to a half of a brisk 60–120 °/s pull; no published figure at hand.
    fine_rate_dps: float | None = None
    # After releasing on a STOP cue, wait this long for the OK/NOK cue before pulling again
    # (None: never wait, done at once). Modelling choice: about a second (sample(): 0.8–1.2 s),
    # several reaction times, the pause of someone listening for the tool.
    confirm_wait_s: float | None = None
    max_repulls: int = 3  # then give up waiting (modelling choice: nobody pulls forever)
    ignore_cues: bool = False  # for out-of-window joints: only the own stop rule counts
    stop_at_torque_nm: float | None = None
    stop_at_angle_deg: float | None = None  # fastener angle from the start of the rundown
    strength_nm: float = 300.0  # torque a person can hold on a hand wrench (order of magnitude)
    release_deg: float = 15.0  # handle travel back after the stop, to unload the tool
    part_pause_s: tuple[float, float] = (2.0, 5.0)  # uniform pause between parts at a station

    def __post_init__(self) -> None:
        for name in (
            "steady_rate_dps",
            "accel_dps2",
            "stroke_deg",
            "back_swing_deg",
            "back_rate_dps",
            "reaction_median_s",
            "strength_nm",
            "release_deg",
        ):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0.0):
                raise OperatorError(f"{name} must be finite and > 0, got {value!r}")
        for name in ("stroke_pause_s", "start_delay_s", "reaction_sigma"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0.0):
                raise OperatorError(f"{name} must be finite and ≥ 0, got {value!r}")
        for name in ("fine_rate_dps", "confirm_wait_s"):
            value = getattr(self, name)
            if value is not None and not (math.isfinite(value) and value > 0.0):
                raise OperatorError(f"{name} must be None or finite and > 0, got {value!r}")
        if isinstance(self.max_repulls, bool) or self.max_repulls < 0:
            raise OperatorError(f"max_repulls must be an integer ≥ 0, got {self.max_repulls!r}")
        if not 0.0 < self.approach_slowdown <= 1.0:
            raise OperatorError("approach_slowdown must lie in (0, 1]")
        lo, hi = self.part_pause_s
        if not 0.0 <= lo <= hi:
            raise OperatorError(
                f"part_pause_s must be an ordered pair ≥ 0, got {self.part_pause_s}"
            )
        if self.ignore_cues and self.stop_at_torque_nm is None and self.stop_at_angle_deg is None:
            raise OperatorError(
                "an operator who ignores cues needs stop_at_torque_nm or _angle_deg"
            )

    @classmethod
    def sample(cls, rng: np.random.Generator, **overrides: object) -> OperatorParams:
        """A person drawn from the ranges above; keyword overrides fix chosen fields."""
        drawn: dict[str, object] = {
            "steady_rate_dps": float(rng.uniform(30.0, 120.0)),
            "stroke_deg": float(rng.uniform(60.0, 100.0)),
            "back_swing_deg": float(rng.uniform(30.0, 90.0)),
            "reaction_median_s": float(rng.uniform(0.17, 0.23)),
            "fine_rate_dps": float(rng.uniform(20.0, 40.0)),
            "confirm_wait_s": float(rng.uniform(0.8, 1.2)),
        }
        drawn.update(overrides)
        return cls(**drawn)  # type: ignore[arg-type]


class OperatorPhase(enum.Enum):
    """Where the operator is in a rundown."""

    WAITING = "waiting"
    FORWARD = "forward"
    BACK = "back"
    PAUSE = "pause"
    STOPPING = "stopping"
    RELEASE = "release"
    AWAIT = "await"  # released on a STOP cue, listening for the tool's verdict
    DONE = "done"


class Operator:
    """One person tightening one part at a time; call :meth:`step` once per time step."""

    def __init__(self, params: OperatorParams, rng: np.random.Generator) -> None:
        self.params = params
        self._rng = rng
        self.reset()

    def reset(self) -> None:
        """Start a new part."""
        self.phase = OperatorPhase.WAITING
        self.t_s = 0.0
        self.rate_dps = 0.0
        self._phase_t = 0.0
        self._travel = 0.0
        self._stroke_len = self._draw_stroke()
        self._target = self.params.steady_rate_dps
        self._slow_at: float | None = None
        self._verdict = False
        self._repulls = 0
        self._stop_at: float | None = None
        self._peak_torque = 0.0
        self._released_from = 0.0
        self.stop_reason: str | None = None
        self.heard: list[tuple[float, CuePattern]] = []

    def _draw_stroke(self) -> float:
        # Every stroke differs a little from the last (±15 %, modelling choice).
        return self.params.stroke_deg * float(self._rng.uniform(0.85, 1.15))

    def reaction_time_s(self) -> float:
        """One reaction time drawn from the person's lognormal distribution."""
        p = self.params
        return p.reaction_median_s * math.exp(p.reaction_sigma * float(self._rng.standard_normal()))

    def hear(self, pattern: CuePattern) -> None:
        """A cue reached the operator now; the response follows after a reaction time."""
        self.heard.append((self.t_s, pattern))
        if pattern in (CuePattern.OK, CuePattern.NOK):
            self._verdict = True  # the tool said done
            return
        if self.params.ignore_cues or self.phase in (
            OperatorPhase.RELEASE,
            OperatorPhase.AWAIT,
            OperatorPhase.DONE,
        ):
            return
        if pattern is CuePattern.APPROACH and self._slow_at is None:
            self._slow_at = self.t_s + self.reaction_time_s()
        elif pattern is CuePattern.STOP:
            self._decide_stop("stop-cue")

    def _decide_stop(self, reason: str) -> None:
        if self._stop_at is None and self.phase not in (
            OperatorPhase.RELEASE,
            OperatorPhase.AWAIT,
            OperatorPhase.DONE,
        ):
            self._stop_at = self.t_s + self.reaction_time_s()
            self.stop_reason = reason

    @property
    def done(self) -> bool:
        """True once the tool is released after the stop."""
        return self.phase is OperatorPhase.DONE

    def step(
        self, dt_s: float, *, torque_nm: float, fastener_angle_deg: float, broken: bool
    ) -> float:
        """Advance by ``dt_s`` given what the person feels now; return the handle rate (°/s)."""
        p = self.params
        self.t_s += dt_s
        self._phase_t += dt_s
        self._peak_torque = max(self._peak_torque, torque_nm)
        if broken:
            self._decide_stop("joint-gave-way")
        if p.stop_at_torque_nm is not None and torque_nm >= p.stop_at_torque_nm:
            self._decide_stop("own-torque")
        if p.stop_at_angle_deg is not None and fastener_angle_deg >= p.stop_at_angle_deg:
            self._decide_stop("own-angle")
        if torque_nm >= p.strength_nm:
            self._decide_stop("strength")
        if self._slow_at is not None and self.t_s >= self._slow_at:
            self._slow_at = None
            self._target = self._fine(p.steady_rate_dps * p.approach_slowdown)
        if (
            self._stop_at is not None
            and self.t_s >= self._stop_at
            and self.phase
            in (
                OperatorPhase.WAITING,
                OperatorPhase.FORWARD,
                OperatorPhase.BACK,
                OperatorPhase.PAUSE,
            )
        ):
            self._enter(OperatorPhase.STOPPING)
        self.rate_dps = self._rate(dt_s, torque_nm)
        return self.rate_dps

    def _fine(self, rate: float) -> float:
        fine = self.params.fine_rate_dps
        return rate if fine is None else min(rate, fine)

    def _enter(self, phase: OperatorPhase) -> None:
        self.phase = phase
        self._phase_t = 0.0
        self._travel = 0.0

    def _rate(self, dt: float, torque_nm: float) -> float:
        p = self.params
        r = self.rate_dps
        match self.phase:
            case OperatorPhase.WAITING:
                if self._phase_t >= p.start_delay_s:
                    self._enter(OperatorPhase.FORWARD)
                return 0.0
            case OperatorPhase.FORWARD:
                target = self._target
                braking = r * r / (2.0 * p.accel_dps2)
                if self._travel + braking >= self._stroke_len:
                    r = max(0.0, r - p.accel_dps2 * dt)
                    if r == 0.0:
                        self._enter(OperatorPhase.BACK)
                elif r < target:
                    r = min(target, r + p.accel_dps2 * dt)
                else:  # slowing down after an APPROACH cue
                    r = max(target, r - p.accel_dps2 * dt)
                self._travel += r * dt
                return r
            case OperatorPhase.BACK:
                a = 3.0 * p.accel_dps2  # unloaded swings turn around faster (modelling choice)
                braking = r * r / (2.0 * a)
                if self._travel + braking >= p.back_swing_deg:
                    r = min(0.0, r + a * dt)
                    if r == 0.0:
                        self._enter(OperatorPhase.PAUSE)
                else:
                    r = max(-p.back_rate_dps, r - a * dt)
                self._travel -= r * dt
                return r
            case OperatorPhase.PAUSE:
                if self._phase_t >= p.stroke_pause_s:
                    self._stroke_len = self._draw_stroke()
                    self._enter(OperatorPhase.FORWARD)
                return 0.0
            case OperatorPhase.STOPPING:
                a = 3.0 * p.accel_dps2
                r = max(0.0, r - a * dt) if r > 0.0 else min(0.0, r + a * dt)
                if r == 0.0:
                    self._enter(OperatorPhase.RELEASE)
                return r
            case OperatorPhase.RELEASE:
                a = 3.0 * p.accel_dps2
                braking = r * r / (2.0 * a)
                if self._travel + braking >= p.release_deg and torque_nm <= 0.0:
                    r = min(0.0, r + a * dt)
                    if r == 0.0:
                        self._enter(self._after_release())
                else:
                    r = max(-p.back_rate_dps / 2.0, r - a * dt)
                self._travel -= r * dt
                return r
            case OperatorPhase.AWAIT:
                if self._verdict:
                    self._enter(OperatorPhase.DONE)
                elif p.confirm_wait_s is not None and self._phase_t >= p.confirm_wait_s:
                    # no verdict: the tool has not said done, so pull again, slowly, and stop
                    # at the next STOP cue
                    self._repulls += 1
                    self._stop_at = None
                    self.stop_reason = None
                    self._target = self._fine(self._target) * _NUDGE
                    self._stroke_len = self._draw_stroke()
                    self._enter(OperatorPhase.FORWARD)
                return 0.0
            case OperatorPhase.DONE:
                return 0.0

    def _after_release(self) -> OperatorPhase:
        p = self.params
        waits = (
            p.confirm_wait_s is not None
            and self.stop_reason == "stop-cue"
            and not self._verdict
            and self._repulls < p.max_repulls
        )
        return OperatorPhase.AWAIT if waits else OperatorPhase.DONE


class Motion(NamedTuple):
    """What the wrench and joint do during one step (true values, no sensor effects)."""

    handle_rate_dps: float
    torque_nm: float
    handle_angle_deg: float
    fastener_angle_deg: float
    preload_n: float
    yielded: bool
    broken: bool


class MotionSource(Protocol):
    """What a virtual wrench sensor pulls its truth from."""

    def step(self, dt_s: float) -> Motion: ...

    def hear(self, pattern: CuePattern) -> None: ...


_REST = Motion(0.0, 0.0, 0.0, 0.0, 0.0, False, False)


class Bench:
    """An operator tightening a series of joints with an elastic ratchet wrench.

    ``joints`` may be a single joint or any iterable (a generator gives an endless shift);
    between parts the wrench rests for a pause drawn from ``part_pause_s``. With no joints left
    the bench is idle: the wrench lies still.
    """

    def __init__(
        self,
        joints: JointModel | Iterable[JointModel],
        operator: OperatorParams,
        rng: np.random.Generator,
        *,
        deflection_deg_per_nm: float = 0.02,
        ratchet_pitch_deg: float = 5.0,
    ) -> None:
        # Defaults: a hand torque wrench of ~100 N·m winds up a few degrees at capacity
        # (order of magnitude, from memory); a 72-tooth ratchet steps 5° (common practice).
        if not (math.isfinite(deflection_deg_per_nm) and deflection_deg_per_nm > 0.0):
            raise OperatorError(f"deflection must be finite and > 0, got {deflection_deg_per_nm!r}")
        if not (math.isfinite(ratchet_pitch_deg) and ratchet_pitch_deg > 0.0):
            raise OperatorError(f"ratchet pitch must be finite and > 0, got {ratchet_pitch_deg!r}")
        self._joints: Iterator[JointModel] = iter(
            [joints] if isinstance(joints, JointModel) else joints
        )
        self._rng = rng
        self._c = deflection_deg_per_nm
        self._pitch = ratchet_pitch_deg
        self.operator = Operator(operator, rng)
        self.t_s = 0.0
        self.parts_done = 0
        self.stop_reasons: list[str | None] = []  # why each finished part was stopped
        self.joint: JointModel | None = None
        self._pause_left = 0.0
        self._handle = 0.0
        self._rest = _REST
        self._load_next()

    def _load_next(self) -> None:
        self.joint = next(self._joints, None)
        self._phi = 0.0
        self._w = 0.0
        self._play = 0.0
        self._back_free = 0.0
        self._backwards = False
        self._point = self.joint.point(0.0) if self.joint is not None else None
        self.operator.reset()

    @property
    def idle(self) -> bool:
        """True when no part is being tightened (between parts or after the last one)."""
        return self.joint is None or self._pause_left > 0.0

    def hear(self, pattern: CuePattern) -> None:
        """Forward a cue to the operator (ignored when nobody is tightening)."""
        if not self.idle:
            self.operator.hear(pattern)

    def step(self, dt_s: float) -> Motion:
        """Advance true time by ``dt_s`` and return the motion at the end of the step."""
        if not (math.isfinite(dt_s) and dt_s > 0.0):
            raise OperatorError(f"time step must be finite and > 0, got {dt_s!r}")
        self.t_s += dt_s
        if self.joint is None:
            return self._rest
        if self._pause_left > 0.0:
            self._pause_left -= dt_s
            if self._pause_left <= 0.0:
                self._pause_left = 0.0
                self._load_next()
            return self._rest
        assert self._point is not None
        torque = self._w / self._c
        rate = self.operator.step(
            dt_s, torque_nm=torque, fastener_angle_deg=self._phi, broken=self._point.broken
        )
        self._move(rate * dt_s)
        self._handle += rate * dt_s
        motion = Motion(
            rate,
            self._w / self._c,
            self._handle,
            self._phi,
            self._point.preload_n,
            self._point.yielded,
            self._point.broken,
        )
        if self.operator.done:
            self.parts_done += 1
            self.stop_reasons.append(self.operator.stop_reason)
            # At rest the finished joint keeps its angle and preload; the tool is unloaded.
            self._rest = motion._replace(handle_rate_dps=0.0, torque_nm=0.0)
            lo, hi = self.operator.params.part_pause_s
            self._pause_left = float(self._rng.uniform(lo, hi)) if hi > 0.0 else 0.0
            if self._pause_left <= 0.0:
                self._load_next()
        return motion

    def _move(self, dh: float) -> None:
        joint = self.joint
        assert joint is not None
        if dh < 0.0:
            unwind = min(self._w, -dh)
            self._w -= unwind
            self._back_free += -dh - unwind
            self._backwards = True
            return
        if self._backwards:
            # The pawl sits between two teeth: forward motion first closes that gap.
            self._play = self._back_free % self._pitch
            self._back_free = 0.0
            self._backwards = False
        take = min(self._play, dh)
        self._play -= take
        w_try = self._w + dh - take
        c = self._c
        if w_try <= c * self._point_torque(self._phi):
            self._w = w_try
            return
        delta = self._solve_turn(joint, w_try)
        self._phi += delta
        self._point = joint.point(self._phi)
        self._w = w_try - delta

    def _point_torque(self, phi: float) -> float:
        assert self.joint is not None
        return self.joint.point(phi).torque_nm

    def _solve_turn(self, joint: JointModel, w_try: float) -> float:
        # Root of g(Δ) = c·T(φ+Δ) + Δ − w_try on [0, w_try]; g(0) < 0 ≤ g(w_try).
        # Illinois false position: bracketed, so a torque drop (fracture) cannot derail it.
        c, phi = self._c, self._phi
        a, b = 0.0, w_try
        ga = c * joint.point(phi).torque_nm - w_try
        gb = c * joint.point(phi + b).torque_nm
        if gb <= 0.0:
            return b
        side = 0
        for _ in range(100):
            m = (a * gb - b * ga) / (gb - ga)
            gm = c * joint.point(phi + m).torque_nm + m - w_try
            if abs(gm) < 1e-12 or b - a < 1e-10:  # 1e-10° is far below any sensor resolution
                return m
            if gm > 0.0:
                b, gb = m, gm
                if side == 1:
                    ga /= 2.0
                side = 1
            else:
                a, ga = m, gm
                if side == -1:
                    gb /= 2.0
                side = -1
        return b
