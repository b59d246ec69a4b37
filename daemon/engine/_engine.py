"""The rundown engine: a sans-I/O state machine per wrench, fed samples, returning events.

Theory of operation
-------------------
Input is a frame of samples (sensor time ``t_s``, torque ``torque_nm``, rate about the fastener
axis ``rate_dps``, positive when tightening) or a single sample. The engine never reads a clock:
time is the sensor's timestamps, and timeouts arrive as ``tick(t_s)``.

Per frame the work is split in two passes, so that numpy does the bulk and every event still
lands on the exact sample where its condition first holds:

1. *Accumulate* (state-independent within a rundown): gyro bias removal, which samples turn the
   fastener (ratchet logic below), snug, the angle from snug by the trapezoid rule on the
   sensor's own timestamps, and (when yield is watched) running sums (n, Σθ, ΣT, Σθ², ΣθT) of
   the turning samples after snug, from which any least-squares slope over an angle window is
   an O(1) difference.
2. *Decide*: for the current state, vectorised masks of every condition that can change
   something (snug, a step target, cues, yield, over-torque, data gap, release, timeout) over
   the rest of the frame; the earliest sample wins, its one event is applied (the transition
   itself is decided by ``_machine.next_state``), and the scan resumes *at that same sample* in
   the new state, so a sample that satisfies several conditions yields all of them in a fixed
   order. When the rundown finishes, the history is cut at that sample and the rest of the frame
   is processed afresh as idle input.

Every quantity is an elementwise operation or a sequential running sum/maximum seeded with the
carried state (``np.cumsum`` and ``ufunc.accumulate`` add in order), so feeding one sample at a
time or a whole frame yields bit-identical values, events and indices.

Work left out
-------------
A frame is a few dozen samples, so the cost is the count of numpy calls per frame, not their
length. Work whose answer is known is skipped, and only where skipping cannot change a bit:
a cue's masks are not built when a scalar bound, made of the masks' own floating-point
operations on the extreme operands (rounding is monotone), shows no sample can reach the aim;
the yield slopes and their prefix sums wait until yield may be judged (past the minimum angle)
and then catch up in one pass (the same sums in the same order: running sums and maxima do not
care how their input is split), and stop once yield is found; a mask that a never-decreasing
quantity already passes at the chunk's first sample is not built. State that every frame
would rebuild from the history is kept as the samples arrive instead (where each stroke
resumed fully, the predecessors of the frame's first sample). The sample-exact tests guard all
of it like the rest.

Angle counting (ratchet wrenches)
---------------------------------
A sample turns the fastener while the bias-corrected rate is positive; a stroke ends when the
rate falls to 0 or below (the back-stroke), and the level where it ended is its peak torque.
A new stroke counts only from the first sample where the rate is positive *and* torque is back
to ``resume_fraction`` of that level — before it, the wrench is winding up (ratchet slack,
socket and wrench deflection) while the fastener stands still. Each counted increment is the
trapezoid of the corrected rate minus the wrench's own deflection (deg per N·m × ΔT), clamped
at zero, so the counted angle never decreases.

Yield (gradient)
----------------
The slope dT/dθ is the least-squares fit over the trailing ``slope_window_deg`` of turning
samples after snug, valid once the window lies wholly past snug. Its running maximum stands for
the linear region; yield holds at the first turning sample past ``yield_min_angle`` where the
slope is at or below ``yield_fraction`` × that maximum. A trailing window reports the average
slope over its span, so on a smooth knee the detection lags the true crossing by roughly half
the window.

Error proofing
--------------
While idle, the turning samples of the run-in (the free rundown before torque reaches the start
level) are kept with their raw-rate trapezoids; the rundown's start removes the gyro bias from
them. Inside the rundown the bias-corrected rate is kept too. When the rundown ends,
``_proofing.judge`` measures prevailing torque, rundown angle, first contact, joint rate and any
torque fall while turning from these kept samples, and adds its reasons: one pass at the end,
nothing in the per-sample path, and sample-exact like everything else (see ``_proofing.py``).

Cueing
------
The value driven to target (torque, or angle since the step began) is extrapolated linearly
with its rate over the trailing ``cue_rate_window_s`` (an angle's rate from the angle counted
since the rundown's start, continuous through snug). Only a turning sample predicts, and only
once that window lies wholly inside its stroke after the stroke resumed fully (torque back at
the previous stroke's level): during the wind-up of a new stroke torque climbs while the
fastener stands still, and a rate taken across it would fire the stop cue far too early. The
stop cue fires at the first sample where the value predicted at now + cue latency + reaction
time reaches the aim point; the approach cue likewise with ``approach_lead_s`` more. The aim
point is ``cue_aim`` of the way from the target to the upper limit of the window that judges
the last step (a person's stop scatters around the aim; short of the target the rundown stays
open). An angle step's approach cue may come before snug: the time to snug is extrapolated
from the torque trend and the angle counted since the start gives the rate, so a fast pull on
a short step still hears it in time to slow down; a stop cue never comes before snug. Earlier
still, the pace cue: while idle, before the joint is touched, nothing tells how far snug is,
so the earliest the first angle step can end is its own aim point away (a torque program's,
the lower limit of its angle window); a pull that has gone faster than (that angle ÷ the
approach horizon, never below 30 deg/s) for ``cue_rate_window_s`` hears that step's approach
cue at once (a brisk pull leaves less than a reaction time between seating and target); once
per stretch of pulling, and it stands for the rundown's approach cue only while fresh. A stop
cue is re-armed when the technician let go short of the target and drives the wrench again:
once the handle halted and then moves forward again, predicting from the handle's rate (the
gyro sees the handle at once, before the ratchet's play and the wind-up are taken up), less
the wind-up still to take up; a torque step converts the torque still missing to degrees with
the joint rate its last stroke showed. No cue fires later than the crossing of the target
itself.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from clampd.daemon.engine._errors import EngineUsageError, SensorDataError
from clampd.daemon.engine._events import (
    CueFired,
    CueKind,
    CueRecord,
    EngineFault,
    Event,
    OverTorque,
    Reason,
    RundownFinished,
    RundownResult,
    RundownStarted,
    SnugPoint,
    SnugReached,
    Status,
    StopPoint,
    StopReached,
    StopTrigger,
    YieldDetected,
    YieldPoint,
)
from clampd.daemon.engine._machine import Input, State, next_state
from clampd.daemon.engine._program import Program, StepKind, Strategy
from clampd.daemon.engine._proofing import Limits, judge
from clampd.daemon.engine._settings import EngineSettings

__all__ = ["Engine"]

FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]
ArrayLike = float | FloatArray | npt.ArrayLike

# Initial capacity of a rundown's history, grown by doubling: 8192 samples is 8 s at 1 kHz.
_INITIAL_CAPACITY = 8192
# Samples kept while idle for the gyro bias estimate: 1 s at the profile's 10 kHz ceiling.
_REST_CAPACITY = 16384
# Motion onsets kept for the bias guard: far more than fit in the rest samples kept.
_ONSET_CAPACITY = 4096
# Idle run-in samples kept for error proofing (turning ones only): 65 s of turning at 1 kHz,
# far beyond any free rundown; beyond it the oldest go (the rundown angle is then far too long
# anyway).
_RUNIN_CAPACITY = 65536
# Least-squares fits need at least this many points (2 define a line, 3 say something about it).
_MIN_FIT_POINTS = 3
# "Not yet fully resumed" in a rundown's per-sample stroke record: beyond every sample index.
_NEVER = int(np.iinfo(np.intp).max)

_TORQUE, _ANGLE, _YIELD = "torque", "angle", "yield"
# The pace cue never asks for a pull slower than this: slower ones are already a controlled
# finishing pull, and a wrench carried from bolt to bolt turns about its axis slowly enough
# not to set it off most of the time. Our choice (no published figure at hand).
_PACE_FLOOR_DPS = 30.0


@dataclass(frozen=True, slots=True)
class _StepSpec:
    kind: str  # _TORQUE | _ANGLE | _YIELD
    target: float  # N·m for torque, deg since the step began for angle, unused for yield
    trigger: StopTrigger


def _compile_steps(p: Program) -> tuple[_StepSpec, ...]:
    match p.strategy:
        case Strategy.TORQUE:
            assert p.target_torque_nm is not None
            return (_StepSpec(_TORQUE, p.target_torque_nm, StopTrigger.TARGET_TORQUE),)
        case Strategy.TORQUE_ANGLE | Strategy.TORQUE_TO_YIELD:
            assert p.target_angle_deg is not None
            return (_StepSpec(_ANGLE, p.target_angle_deg, StopTrigger.TARGET_ANGLE),)
        case Strategy.YIELD:
            return (_StepSpec(_YIELD, math.nan, StopTrigger.YIELD),)
        case Strategy.MULTI_STEP:
            out = []
            for s in p.steps:
                if s.kind is StepKind.TORQUE:
                    assert s.target_torque_nm is not None
                    out.append(_StepSpec(_TORQUE, s.target_torque_nm, StopTrigger.TARGET_TORQUE))
                else:
                    assert s.target_angle_deg is not None
                    out.append(_StepSpec(_ANGLE, s.target_angle_deg, StopTrigger.TARGET_ANGLE))
            return tuple(out)


class _Params:
    """Program and settings folded into the numbers the scan needs (fixed during a rundown)."""

    def __init__(self, p: Program, s: EngineSettings) -> None:
        self.steps = _compile_steps(p)
        self.snug = p.snug_torque_nm
        self.max_torque = math.inf if p.max_torque_nm is None else p.max_torque_nm
        self.release = s.start_torque_nm if p.release_torque_nm is None else p.release_torque_nm
        self.timeout = s.timeout_s if p.timeout_s is None else p.timeout_s
        latency = s.cue_latency_s if p.cue_latency_s is None else p.cue_latency_s
        reaction = s.reaction_time_s if p.reaction_time_s is None else p.reaction_time_s
        lead = s.approach_lead_s if p.approach_lead_s is None else p.approach_lead_s
        self.h_stop = latency + reaction
        self.h_approach = self.h_stop + lead
        self.window = p.slope_window_deg
        self.min_angle = p.yield_min_angle
        self.fraction = p.yield_fraction
        self.approach_fraction = 0.5 * (1.0 + p.yield_fraction)  # yield approach: halfway there
        self.watch_yield = p.monitor_yield or p.strategy in (
            Strategy.YIELD,
            Strategy.TORQUE_TO_YIELD,
        )
        self.needs_yield = p.strategy in (Strategy.YIELD, Strategy.TORQUE_TO_YIELD)
        self.torque_window = p.torque_window_nm
        self.angle_window = p.angle_window_deg
        self.defl = s.deflection_deg_per_nm
        self.resume = s.resume_fraction
        self.max_gap = s.max_gap_s
        self.cue_window = s.cue_rate_window_s
        self.aim = s.cue_aim if p.cue_aim is None else p.cue_aim
        # an angle step driven from snug: its approach cue may come before snug
        self.early = bool(self.steps) and self.steps[0].kind == _ANGLE
        # any angle step: keep the counted angle since the start (continuous through snug) for
        # the rate its cues predict with
        self.track_pa = any(st.kind == _ANGLE for st in self.steps)
        self.proofing = Limits.of(p)
        self.rest_rate = s.rest_rate_dps
        # The pace cue (see "Cueing"): before the joint is touched nothing tells how far away
        # snug is, so the earliest the first angle step can end is its own aim point away; a
        # pull faster than that over the approach horizon hears the approach cue at once.
        # For a torque program the earliest is the lower limit of its angle window: the
        # program itself says the target torque comes no sooner past snug.
        self.pace_angle = math.inf
        if self.early:
            self.pace_angle = self.aim_point(0, self.steps[0], 0.0)
        elif p.strategy is Strategy.TORQUE and self.angle_window is not None:
            self.pace_angle = self.angle_window[0] if self.angle_window[0] > 0.0 else math.inf
        self.pace_dps = math.inf
        if self.h_approach > 0.0 and math.isfinite(self.pace_angle):
            self.pace_dps = max(self.pace_angle / self.h_approach, _PACE_FLOOR_DPS)

    def aim_point(self, step: int, spec: _StepSpec, base: float) -> float:
        """Where the stop cue aims for a step that began at ``base``: ``cue_aim`` of the way
        from the target to the upper limit of the window that judges it (last step only),
        inside that window."""
        if self.aim == 0.0 or step != len(self.steps) - 1:
            return spec.target
        if spec.kind == _TORQUE:
            w, base = self.torque_window, 0.0
        elif spec.kind == _ANGLE:
            w = self.angle_window
        else:
            return spec.target
        if w is None or w[1] - base <= spec.target:
            return spec.target
        lo, hi = w[0] - base, w[1] - base
        return min(max(spec.target + self.aim * (hi - spec.target), lo), hi)


class _Rundown:
    """Everything one rundown carries; local indices count from its first sample."""

    def __init__(
        self,
        start_index: int,
        bias: float,
        t0: float,
        T0: float,
        runin: tuple[FloatArray, FloatArray] | None = None,
    ) -> None:
        cap = _INITIAL_CAPACITY
        empty = np.empty(0)
        # the idle run-in before the start: turning samples' torque, cumulative angle
        self.runin_T, self.runin_th = runin if runin is not None else (empty, empty)
        self.start_index = start_index
        self.bias = bias
        self.t0, self.T0 = t0, T0
        self.t: FloatArray = np.empty(cap)
        self.T: FloatArray = np.empty(cap)
        self.th: FloatArray = np.empty(cap)
        self.rc: FloatArray = np.empty(cap)  # bias-corrected rate (run-in angle before snug)
        self.pa: FloatArray = np.empty(cap)  # counted angle since the start (angle programs)
        self.turn: BoolArray = np.empty(cap, dtype=np.bool_)
        # per sample, the first sample of its stroke at or above the level the stroke resumed
        # from, if that is this sample or an earlier one; else (still winding up, or not
        # turning) _NEVER: a rate window may predict only when it begins at or after this
        self.full_from: npt.NDArray[np.intp] = np.empty(cap, dtype=np.intp)
        self.P: FloatArray = np.zeros((5, cap + 1))  # prefix sums n, Σθ, ΣT, Σθ², ΣθT
        # P holds columns 0..P_upto; the rest wait until yield may be judged (see _accumulate)
        self.P_upto = 0
        self.n = 0
        # accumulation state
        self.turning = False
        self.turn_last = False  # turning status of the last accumulated sample
        self.stroke_peak = 0.0
        self.resume_level = 0.0
        self.stroke_starts: list[int] = []
        # the stroke in progress (the latest one): the level it resumed from, and its first
        # sample at or above that level (``None`` until seen): from there on the fastener
        # surely turns (cue prediction)
        self.stroke_level = 0.0
        self.stroke_full: int | None = None
        self.snug: int | None = None
        self.theta_last = 0.0
        self.pa_last = 0.0
        self.last_active_t = t0
        # decision state
        self.step = 0
        self.step_base = 0.0
        self.fired: set[tuple[CueKind, int]] = set()
        self.stop_cue_at: dict[int, int] = {}  # step -> local index of its latest stop cue
        self.rearm: tuple[int, int, int] = (-1, 0, 0)  # see Engine._stop_from
        self.rearm_level = 0.0  # peak torque of the stroke that carried the last stop cue
        self.rearm_rate = math.inf  # a torque step's joint rate up to that peak, N·m/deg
        self.cues: list[CueRecord] = []
        self.stop: StopPoint | None = None
        self.yield_point: YieldPoint | None = None
        self.slope_max = -math.inf
        # slope_max holds the slopes of the local samples before this one; the slopes are
        # needed only once yield may be judged, and are caught up then
        self.slope_upto = 0
        self.over = False
        self.reasons: list[Reason] = []

    def reserve(self, n: int) -> None:
        cap = self.t.shape[0]
        if n <= cap:
            return
        while cap < n:
            cap *= 2
        for name in ("t", "T", "th", "rc", "pa", "turn", "full_from"):
            old = getattr(self, name)
            new = np.empty(cap, dtype=old.dtype)
            new[: self.n] = old[: self.n]
            setattr(self, name, new)
        P = np.zeros((5, cap + 1))
        P[:, : self.n + 1] = self.P[:, : self.n + 1]
        self.P = P


def _first(mask: BoolArray) -> int:
    """Index of the first True, or len(mask) when there is none."""
    if mask.shape[0] == 0:
        return 0
    k = int(mask.argmax())
    return k if mask[k] else mask.shape[0]


def _after(first: float | np.float64, x: FloatArray) -> FloatArray:
    """``x`` shifted one place later, ``first`` in front (the predecessor of each sample)."""
    out = np.empty(x.shape[0])
    out[0] = first
    out[1:] = x[:-1]
    return out


def _running_sum(a: FloatArray, n0: int, hi: int, inc: FloatArray, seed: float) -> float:
    """``a[n0:hi]`` = ``seed`` plus the running sum of ``inc``, added in order; returns the
    last. In place after the history when it ends in the seed (every frame but the first)."""
    if n0:
        a[n0:hi] = inc
        v = a[n0 - 1 : hi]
        # (the history's last sample is the seed: it ends the previous running sum)
        np.add.accumulate(v, out=v)
    else:
        acc = np.empty(hi + 1)
        acc[0] = seed
        acc[1:] = inc
        a[:hi] = np.add.accumulate(acc)[1:]
    return float(a[hi - 1])


def _as_array(x: ArrayLike, name: str) -> FloatArray:
    if type(x) is np.ndarray and x.dtype == np.float64 and x.ndim == 1:
        return x  # the runtime's decoded frames: nothing to convert
    try:
        a = np.asarray(x, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise SensorDataError(f"{name}: not numbers ({exc})", field=name) from None
    if a.ndim == 0:
        return a.reshape(1)
    if a.ndim != 1:
        raise SensorDataError(
            f"{name}: expected one sample or a 1-D frame, got shape {a.shape}", field=name
        )
    return a


class Engine:
    """One wrench's tightening engine. Pure: no clock, no I/O, no logging.

    ``feed`` accepts one frame (three 1-D arrays of equal length) or one sample (three floats)
    and returns the events it caused, in order. Sample indices count from 0 since the Engine
    was created. Bad samples raise ``SensorDataError`` and leave the engine untouched; misuse
    raises ``EngineUsageError``. An internal error ends the rundown in progress NOK
    (``engine_error``) with an ``EngineFault`` event; it is never swallowed silently.
    """

    def __init__(self, program: Program, settings: EngineSettings | None = None) -> None:
        self._settings = settings if settings is not None else EngineSettings()
        self._program = program
        self._p = _Params(program, self._settings)
        self._state = State.IDLE
        self._seen = 0
        self._last_t = -math.inf
        self._armed = True
        self._r: _Rundown | None = None
        self._rest_t: FloatArray = np.empty(0)
        self._rest_r: FloatArray = np.empty(0)
        # per kept rest sample, the time of the last idle sample in motion before it; and the
        # times motion began (an idle sample in motion after one at rest): the bias estimate
        # leaves out rest samples close to either (see ``rest_guard_s``)
        self._rest_lm: FloatArray = np.empty(0)
        self._onsets: FloatArray = np.empty(0)
        self._idle_last_move = -math.inf
        self._idle_prev_rest = True
        # idle run-in (error proofing): per turning idle sample its torque, the trapezoid of the
        # raw rate over the interval ending at it, and that interval; bias removed at the start
        self._run_chunks: list[tuple[FloatArray, FloatArray, FloatArray]] = []
        self._run_count = 0
        # pace cue (see "Cueing"): start time of the idle stretch pulling faster than the pace
        # (None: the last idle sample was slower), and the cue once fired, until a rundown
        # starts and takes it as its first step's approach cue
        self._pace_from: float | None = None
        self._pace_cue: CueRecord | None = None
        self._pace_used = math.nan  # start of the stretch that fired the last pace cue
        self._run_prev: tuple[float, float] | None = None  # (t, raw rate) of the last idle sample
        self._run_last_move = -math.inf  # time of the last idle sample not at rest

    # ----------------------------------------------------------------- read-only surface
    @property
    def state(self) -> State:
        """Where the current rundown stands (IDLE between rundowns)."""
        return self._state

    @property
    def program(self) -> Program:
        """The program the next (or current) rundown runs."""
        return self._program

    @property
    def settings(self) -> EngineSettings:
        """This wrench's settings."""
        return self._settings

    @property
    def samples_seen(self) -> int:
        """Samples accepted since the Engine was created (the next sample's index)."""
        return self._seen

    @property
    def angle_deg(self) -> float | None:
        """Counted angle from snug at the last sample fed; None outside a rundown or before
        snug. For live displays between events (judgement uses the events and the result)."""
        r = self._r
        return None if r is None or r.snug is None else r.theta_last

    # ----------------------------------------------------------------- inputs
    def select_program(self, program: Program) -> None:
        """Run ``program`` from the next rundown on; only between rundowns (else
        ``EngineUsageError`` naming the state and the input)."""
        self._state = next_state(self._state, Input.SELECT_PROGRAM)
        self._program = program
        self._p = _Params(program, self._settings)
        self._pace_from = None
        self._pace_cue = None
        self._pace_used = math.nan

    def feed(self, t_s: ArrayLike, torque_nm: ArrayLike, rate_dps: ArrayLike) -> list[Event]:
        """Consume one frame or one sample; return the events it caused."""
        t = _as_array(t_s, "t_s")
        T = _as_array(torque_nm, "torque_nm")
        r = _as_array(rate_dps, "rate_dps")
        if not t.shape == T.shape == r.shape:
            raise SensorDataError(
                f"frame columns differ in length: t_s {t.shape[0]}, torque_nm {T.shape[0]}, "
                f"rate_dps {r.shape[0]}"
            )
        m = t.shape[0]
        if m == 0:
            return []
        chk = t + T
        chk += r
        # one reduction in the common case (a non-finite value makes the sum of squares
        # non-finite); the per-column search only when something is off (an overflowing but
        # finite sum falls through the search harmlessly)
        for name, a in (
            () if math.isfinite(chk.dot(chk)) else (("t_s", t), ("torque_nm", T), ("rate_dps", r))
        ):
            ok = np.isfinite(a)
            if not ok.all():
                k = _first(~ok)
                raise SensorDataError(
                    f"{name} at sample {self._seen + k} is not finite ({a[k]!r})",
                    index=self._seen + k,
                    field=name,
                )
        if not t[0] > self._last_t:
            raise SensorDataError(
                f"t_s at sample {self._seen} ({t[0]!r}) does not follow the previous sample "
                f"({self._last_t!r}); time must increase",
                index=self._seen,
                field="t_s",
            )
        if m > 1:
            stuck = t[1:] <= t[:-1]
            if np.count_nonzero(stuck):
                k = _first(stuck) + 1
                raise SensorDataError(
                    f"t_s at sample {self._seen + k} ({t[k]!r}) does not increase",
                    index=self._seen + k,
                    field="t_s",
                )
        events: list[Event] = []
        try:
            self._process(t, T, r, events)
        except EngineUsageError:
            raise
        except Exception as exc:  # poison: an internal error must end the rundown NOK
            self._poison(f"{type(exc).__name__}: {exc}", self._seen + m - 1, float(t[-1]), events)
        self._seen += m
        self._last_t = float(t[-1])
        return events

    def tick(self, t_s: float) -> list[Event]:
        """Time passed without samples (sensor time base): end a rundown that timed out."""
        t = self._check_time(t_s, "tick")
        R = self._r
        if R is None or R.n == 0 or t - R.last_active_t <= self._p.timeout:
            return []
        events: list[Event] = []
        self._finish_now(Input.TIMEOUT, Reason.TIMEOUT, events)
        return events

    def link_lost(self, t_s: float) -> list[Event]:
        """The wrench's link dropped: a rundown in progress ends NOK (link_lost), partial curve
        kept. Idle: nothing happens."""
        self._check_time(t_s, "link_lost")
        events: list[Event] = []
        if self._r is not None:
            self._finish_now(Input.LINK_LOST, Reason.LINK_LOST, events)
        else:
            self._state = next_state(self._state, Input.LINK_LOST)
        return events

    def abort(self, t_s: float) -> list[Event]:
        """Abort the rundown in progress (NOK aborted). Idle: nothing happens."""
        self._check_time(t_s, "abort")
        events: list[Event] = []
        if self._r is not None:
            self._finish_now(Input.ABORT, Reason.ABORTED, events)
        else:
            self._state = next_state(self._state, Input.ABORT)
        return events

    # ----------------------------------------------------------------- internals
    def _check_time(self, t_s: float, what: str) -> float:
        if isinstance(t_s, bool) or not isinstance(t_s, int | float) or not math.isfinite(t_s):
            raise EngineUsageError(
                f"{what}: t_s must be a finite number, got {t_s!r}",
                state=self._state.value,
                input=what,
            )
        return float(t_s)

    def _finish_now(self, inp: Input, reason: Reason, events: list[Event]) -> None:
        R = self._r
        assert R is not None
        R.reasons.append(reason)
        self._finish(R.n - 1, inp, events)

    def _poison(self, message: str, idx_last: int, t_last: float, events: list[Event]) -> None:
        R = self._r
        if R is None or R.n == 0:
            events.append(EngineFault(index=idx_last, t_s=t_last, message=message))
            self._r = None
            self._state = State.IDLE
            self._armed = False
            return
        idx = R.start_index + R.n - 1
        events.append(EngineFault(index=idx, t_s=float(R.t[R.n - 1]), message=message))
        R.reasons.append(Reason.ENGINE_ERROR)
        try:
            self._finish(R.n - 1, Input.ENGINE_ERROR, events)
        except Exception:  # the rundown's own data is unusable: report it minimal, still NOK
            self._state = next_state(self._state, Input.ENGINE_ERROR)
            self._r = None
            self._armed = False
            res = RundownResult(
                status=Status.NOK,
                reasons=(Reason.ENGINE_ERROR,),
                strategy=self._program.strategy.value,
                program_id=self._program.id,
                program_version=self._program.version,
                start_index=R.start_index,
                start_t_s=R.t0,
                end_index=R.start_index,
                end_t_s=R.t0,
                gyro_bias_dps=R.bias,
                snug=None,
                stop=None,
                cues=(),
                final_torque_nm=R.T0,
                final_angle_deg=0.0,
                peak_torque_nm=R.T0,
                yield_point=None,
                joint_rate_nm_per_deg=None,
                joint_rate_r2=None,
                curve_t_s=np.array([R.t0]),
                curve_torque_nm=np.array([R.T0]),
                curve_angle_deg=np.array([0.0]),
            )
            events.append(RundownFinished(index=R.start_index, t_s=R.t0, result=res))

    def _process(self, t: FloatArray, T: FloatArray, r: FloatArray, events: list[Event]) -> None:
        i = 0
        m = t.shape[0]
        while i < m:
            if self._r is None:
                j = self._idle(t[i:], T[i:], r[i:], self._seen + i, events)
                if j is None:
                    return
                i += j
                self._start(self._seen + i, float(t[i]), float(T[i]), events)
            i += self._active(t[i:], T[i:], r[i:], events)

    def _idle(
        self, t: FloatArray, T: FloatArray, r: FloatArray, gi0: int, events: list[Event]
    ) -> int | None:
        """Keep idle samples for the bias estimate; return where a rundown starts, if it does.
        ``gi0`` is the global index of ``t[0]``."""
        m = t.shape[0]
        start = self._settings.start_torque_nm
        pos = 0
        if not self._armed:
            pos = _first(start > T)
            if pos == m:
                self._keep_idle(t, T, r)
                self._pace(t, r, gi0, events)
                return None
            self._armed = True
        k = pos + _first(T[pos:] >= start)
        self._keep_idle(t[:k], T[:k], r[:k])
        self._pace(t[:k], r[:k], gi0, events)
        return None if k == m else k

    def _pace(self, t: FloatArray, r: FloatArray, gi0: int, events: list[Event]) -> None:
        """The pace cue: an idle sample that ends ``cue_rate_window_s`` of pulling faster than
        ``_Params.pace_dps`` fires the first step's approach cue; at most once per such
        stretch of pulling, and not again while the last one is fresh (see ``_pace_fresh``).

        A brisk pull leaves less than a reaction time between the joint seating and a short
        target, so the technician must be slowed before the joint is touched; the raw rate
        suffices (a gyro bias of a few deg/s is small beside the pace).
        """
        m = t.shape[0]
        P_ = self._p
        if m == 0 or P_.pace_dps == math.inf:
            return
        fast = r >= P_.pace_dps
        if not fast.any():
            self._pace_from = None
            return
        was = np.empty(m + 1, dtype=np.bool_)
        was[0] = self._pace_from is not None
        was[1:] = fast
        seed = np.empty(m + 1)
        seed[0] = -math.inf if self._pace_from is None else self._pace_from
        seed[1:] = np.where(fast & ~was[:-1], t, -math.inf)
        since = np.maximum.accumulate(seed)[1:]
        self._pace_from = float(since[-1]) if fast[-1] else None
        ready = fast & (t - since >= P_.cue_window)
        k = 0
        while True:
            cue = self._pace_cue
            cand = ready[k:] & (since[k:] != self._pace_used)
            if cue is not None:
                cand &= t[k:] > cue.predicted_crossing_t_s + P_.h_approach
            k += _first(cand)
            if k == m:
                return
            tk = float(t[k])
            pred = tk + P_.pace_angle / float(r[k])
            self._pace_cue = CueRecord(
                kind=CueKind.APPROACH, step=0, index=gi0 + k, t_s=tk, predicted_crossing_t_s=pred
            )
            self._pace_used = float(since[k])
            events.append(
                CueFired(
                    kind=CueKind.APPROACH,
                    step=0,
                    index=gi0 + k,
                    t_s=tk,
                    predicted_crossing_t_s=pred,
                )
            )
            k += 1

    def _pace_fresh(self, t_s: float) -> bool:
        """Whether the last pace cue still speaks for a rundown starting at ``t_s``: until an
        approach horizon past the earliest crossing it predicted. Older, the technician was
        not on this joint yet (a wrench carried to the bolt, a slow free run after it), and
        the rundown may hear its own approach cue."""
        cue = self._pace_cue
        return cue is not None and t_s <= cue.predicted_crossing_t_s + self._p.h_approach

    def _keep_idle(self, t: FloatArray, T: FloatArray, r: FloatArray) -> None:
        """Keep the idle samples taken at rest (the only ones that show the gyro's bias) and
        the turning ones of the run-in (error proofing, see ``_proofing.py``)."""
        if t.shape[0] == 0:
            return
        s = self._settings
        rest = (np.abs(r) < s.rest_rate_dps) & (np.abs(T) < s.rest_torque_nm)
        self._keep_runin(t, T, r, rest)
        m = t.shape[0]
        prev = np.empty(m + 1, dtype=np.bool_)
        prev[0] = self._idle_prev_rest
        prev[1:] = rest
        onset = ~rest & prev[:-1]
        if onset.any():
            self._onsets = np.concatenate((self._onsets, t[onset]))[-_ONSET_CAPACITY:]
        self._idle_prev_rest = bool(rest[-1])
        seed = np.empty(m + 1)
        seed[0] = self._idle_last_move
        seed[1:] = np.where(rest, -np.inf, t)
        last_move = np.maximum.accumulate(seed)[1:]
        self._idle_last_move = float(last_move[-1])
        if not rest.any():
            return
        self._rest_t = np.concatenate((self._rest_t, t[rest]))[-_REST_CAPACITY:]
        self._rest_r = np.concatenate((self._rest_r, r[rest]))[-_REST_CAPACITY:]
        self._rest_lm = np.concatenate((self._rest_lm, last_move[rest]))[-_REST_CAPACITY:]

    def _keep_runin(self, t: FloatArray, T: FloatArray, r: FloatArray, rest: BoolArray) -> None:
        m = t.shape[0]
        s = self._settings
        moving_all = r > s.rest_rate_dps
        if self._run_count == 0 and not moving_all.any():
            # nothing kept and nothing to keep (the common idle frame): only the clocks move;
            # the same state the full pass below leaves
            if not rest.all():
                self._run_last_move = max(self._run_last_move, float(t[~rest][-1]))
            self._run_prev = (float(t[-1]), float(r[-1]))
            return
        seed = np.empty(m + 1)
        seed[0] = self._run_last_move
        seed[1:] = np.where(rest, -np.inf, t)
        last_move = np.maximum.accumulate(seed)[1:]
        self._run_last_move = float(last_move[-1])
        long_rest = rest & (t - last_move >= s.runin_rest_s)
        a = 0
        if long_rest.any():  # the wrench rested: a new run-in starts after the last such sample
            a = m - int(long_rest[::-1].argmax())
            self._run_chunks = []
            self._run_count = 0
            self._run_prev = (float(t[a - 1]), float(r[a - 1]))
        if a < m:
            prev = self._run_prev if self._run_prev is not None else (float(t[a]), float(r[a]))
            tt = np.empty(m - a + 1)
            tt[0] = prev[0]
            tt[1:] = t[a:]
            rr = np.empty(m - a + 1)
            rr[0] = prev[1]
            rr[1:] = r[a:]
            dt = tt[1:] - tt[:-1]
            moving = moving_all[a:]
            if moving.any():
                inc = (rr[1:] + rr[:-1]) * 0.5 * dt
                self._run_chunks.append((T[a:][moving], inc[moving], dt[moving]))
                self._run_count += int(moving.sum())
                if self._run_count > _RUNIN_CAPACITY:
                    kept = [
                        np.concatenate([c[i] for c in self._run_chunks])[-_RUNIN_CAPACITY:]
                        for i in range(3)
                    ]
                    self._run_chunks = [(kept[0], kept[1], kept[2])]
                    self._run_count = _RUNIN_CAPACITY
        self._run_prev = (float(t[-1]), float(r[-1]))

    def _take_runin(self, bias: float) -> tuple[FloatArray, FloatArray]:
        """The run-in so far as (torque, cumulative angle) per turning sample; starts afresh."""
        if self._run_chunks:
            T = np.concatenate([c[0] for c in self._run_chunks])
            inc = np.concatenate([c[1] for c in self._run_chunks])
            dt = np.concatenate([c[2] for c in self._run_chunks])
            th = np.cumsum(np.maximum(inc - bias * dt, 0.0))
        else:
            T = th = np.empty(0)
        self._run_chunks = []
        self._run_count = 0
        self._run_prev = None
        return T, th

    def _start(self, index: int, t0: float, T0: float, events: list[Event]) -> None:
        s = self._settings
        bias = 0.0
        rt = self._rest_t
        if rt.shape[0]:
            # Rest samples within rest_guard_s of motion (before it begins, after it ends, or
            # before this start) are left out: the hand's rate passes through the rest
            # threshold there, and those samples would bias the estimate toward the motion.
            onsets = np.append(self._onsets, t0)
            nxt = onsets[np.minimum(np.searchsorted(onsets, rt, side="right"), len(onsets) - 1)]
            good = (nxt - rt >= s.rest_guard_s) & (rt - self._rest_lm >= s.rest_guard_s)
            if good.any():
                # the latest stretch of rest, however long the free run-in since (up to a max
                # age)
                newest = float(rt[good][-1])
                sel = good & (rt >= newest - s.bias_window_s) & (rt >= t0 - s.bias_max_age_s)
                if int(sel.sum()) >= s.bias_min_samples:
                    bias = float(np.mean(self._rest_r[sel]))
        self._state = next_state(self._state, Input.START)
        self._r = R = _Rundown(index, bias, t0, T0, self._take_runin(bias))
        if self._pace_cue is not None and self._pace_fresh(t0):
            # it was this rundown's first approach cue
            R.fired.add((CueKind.APPROACH, 0))
            R.cues.append(self._pace_cue)
        self._pace_cue = None
        self._pace_from = None
        self._pace_used = math.nan
        events.append(
            RundownStarted(
                index=index, t_s=t0, torque_nm=T0, gyro_bias_dps=bias, program_id=self._program.id
            )
        )

    # ---- pass 1: accumulate
    def _turning(
        self, R: _Rundown, rc: FloatArray, T: FloatArray, n0: int
    ) -> tuple[BoolArray | bool, float]:
        """Which samples turn the fastener (``True``/``False`` when all or none do), and the
        frame's peak torque."""
        m = rc.shape[0]
        t_max = float(T.max())
        # fast paths: the whole frame inside one stroke, or wholly outside one
        if R.turning:
            if not np.count_nonzero(rc <= 0.0):
                R.stroke_peak = max(R.stroke_peak, t_max)
                self._mark_full(R, T, n0, 0, m)
                return True, t_max
        else:
            level = self._p.resume * R.resume_level
            if t_max < level or not np.count_nonzero((rc > 0.0) & (level <= T)):
                R.full_from[n0 : n0 + m] = _NEVER
                return False, t_max
        out = np.empty(m, dtype=np.bool_)
        p = 0
        while p < m:
            if R.turning:
                j = p + _first(rc[p:] <= 0.0)
                out[p:j] = True
                if j > p:
                    R.stroke_peak = max(R.stroke_peak, float(T[p:j].max()))
                    self._mark_full(R, T, n0, p, j)
                if j == m:
                    break
                R.turning = False
                R.resume_level = R.stroke_peak
                p = j
            else:
                level = self._p.resume * R.resume_level
                j = p + _first((rc[p:] > 0.0) & (T[p:] >= level))
                out[p:j] = False
                R.full_from[n0 + p : n0 + j] = _NEVER
                if j == m:
                    break
                R.turning = True
                R.stroke_peak = float(T[j])
                R.stroke_starts.append(n0 + j)
                R.stroke_level = R.resume_level
                R.stroke_full = None
                p = j
        return out, t_max

    @staticmethod
    def _mark_full(R: _Rundown, T: FloatArray, n0: int, p: int, j: int) -> None:
        """Record ``full_from`` for chunk[p:j], samples of the stroke in progress."""
        f = R.stroke_full
        if f is None:
            k = p + _first(T[p:j] >= R.stroke_level)
            R.full_from[n0 + p : n0 + k] = _NEVER
            if k == j:
                return
            f = R.stroke_full = n0 + k
            p = k
        R.full_from[n0 + p : n0 + j] = f

    def _accumulate(
        self, R: _Rundown, t: FloatArray, T: FloatArray, r: FloatArray
    ) -> tuple[FloatArray, FloatArray | None, float]:
        """Pass 1; returns the sample intervals, when torque fell below the release level
        somewhere in the frame the time each sample last saw torque at or above it, and the
        frame's peak torque."""
        P_ = self._p
        m = t.shape[0]
        n0 = R.n
        hi = n0 + m
        R.reserve(hi)
        rc = r - R.bias if R.bias != 0.0 else r
        R.t[n0:hi] = t
        R.T[n0:hi] = T
        R.rc[n0:hi] = rc
        # each sample's predecessor: the history's, or at the start the first sample itself
        dt = t - (R.t[n0 - 1 : hi - 1] if n0 else _after(t[0], t))
        turn, t_max = self._turning(R, rc, T, n0)
        R.turn[n0:hi] = turn
        pre = P_.track_pa  # angle cues take their rate from the angle counted since the start
        if R.snug is None:
            k = _first(P_.snug <= T)
            if k < m:
                R.snug = n0 + k
        counting = R.snug is not None and R.snug < hi
        inc = self._increments(R, dt, rc, T, turn, n0=n0) if counting or pre else None
        if pre:
            assert inc is not None
            R.pa_last = _running_sum(R.pa, n0, hi, inc, R.pa_last)
        if not counting:
            R.th[n0:hi] = 0.0
        else:
            assert R.snug is not None
            assert inc is not None
            s = R.snug - n0  # may be negative: snug in an earlier frame
            if s >= 0:
                inc[: s + 1] = 0.0  # angle is 0 at snug and counts from the next sample
            R.theta_last = _running_sum(R.th, n0, hi, inc, R.theta_last)
            # the prefix sums serve only the yield slopes: they wait until yield may be
            # judged (then they catch up in one pass, the same sums in the same order) and
            # stop once it is found
            if P_.watch_yield and R.yield_point is None and self._judge_possible(R):
                self._prefix(R, hi)
        R.turn_last = bool(turn if isinstance(turn, bool) else turn[-1])
        R.n = hi
        # active throughout: the timeout cannot run in this frame
        if not np.count_nonzero(P_.release > T):
            R.last_active_t = float(t[-1])
            return dt, None, t_max
        la_in = np.empty(m + 1)
        la_in[0] = R.last_active_t
        la_in[1:] = np.where(P_.release <= T, t, -np.inf)
        la = np.maximum.accumulate(la_in)[1:]
        R.last_active_t = float(la[-1])
        return dt, la, t_max

    def _increments(
        self,
        R: _Rundown,
        dt: FloatArray,
        rc: FloatArray,
        T: FloatArray,
        turn: BoolArray | bool,
        *,
        n0: int,
    ) -> FloatArray:
        """Counted angle per interval ending at each sample (see "Angle counting"); a new
        array the caller may change."""
        m = rc.shape[0]
        rc_prev = R.rc[n0 - 1 : n0 + m - 1] if n0 else _after(rc[0], rc)
        trap = rc + rc_prev
        trap *= 0.5
        trap *= dt
        if self._p.defl != 0.0:
            T_prev = R.T[n0 - 1 : n0 + m - 1] if n0 else _after(T[0], T)
            trap -= self._p.defl * (T - T_prev)
        # an interval counts when the fastener turned at either end of it (the trapezoid
        # of a stroke's last interval, rate falling to zero, is rotation too)
        if turn is True and R.turn_last:
            return np.maximum(trap, 0.0, out=trap)
        if turn is False and not R.turn_last:
            return np.zeros(m)
        tb = np.empty(m + 1, dtype=np.bool_)
        tb[0] = R.turn_last
        tb[1:] = turn
        return np.where(tb[1:] | tb[:-1], np.maximum(trap, 0.0), 0.0)

    def _judge_possible(self, R: _Rundown) -> bool:
        """Yield may be judged from the last sample accumulated on: it is past the minimum
        angle and a slope window lies wholly past snug (the angle never decreases)."""
        return R.theta_last >= self._p.min_angle and R.theta_last >= self._p.window

    @staticmethod
    def _prefix(R: _Rundown, hi: int) -> None:
        """Running sums n, Σθ, ΣT, Σθ², ΣθT of the turning samples from snug on, extended in
        place from column ``P_upto`` through ``hi``."""
        n0 = R.P_upto
        assert R.snug is not None
        s = R.snug - n0
        th = R.th[n0:hi]
        T = R.T[n0:hi]
        vals = R.P[:, n0 : hi + 1]
        w = vals[0, 1:]
        w[:] = R.turn[n0:hi]
        if s > 0:
            w[:s] = 0.0
        np.multiply(w, th, out=vals[1, 1:])
        np.multiply(w, T, out=vals[2, 1:])
        np.multiply(vals[1, 1:], th, out=vals[3, 1:])
        np.multiply(vals[1, 1:], T, out=vals[4, 1:])
        np.add.accumulate(vals, axis=1, out=vals)
        R.P_upto = hi

    # ---- pass 2: decide
    def _slopes(
        self, R: _Rundown, n0: int, p: int, m: int
    ) -> tuple[FloatArray, FloatArray, BoolArray]:
        """Windowed LS slope (-inf where invalid), its running max seeded with the carried one,
        and validity, for chunk[p:m]."""
        a = n0 + p
        if R.slope_upto < a:  # the running maximum catches up on the samples before
            R.slope_max = float(self._slope_span(R, R.slope_upto, a)[1][-1])
        return self._slope_span(R, a, n0 + m)

    def _slope_span(self, R: _Rundown, a: int, b: int) -> tuple[FloatArray, FloatArray, BoolArray]:
        """``_slopes`` over local samples [a, b)."""
        P_ = self._p
        assert R.P_upto >= b, "prefix sums behind the slopes"
        th = R.th[a:b]
        lo = R.th[:b].searchsorted(th - P_.window, side="left")
        S = R.P[:, a + 1 : b + 1] - R.P.take(lo, axis=1)
        n, sx, sy, sxx, sxy = S
        den = n * sxx
        den -= sx * sx
        num = n * sxy
        num -= sx * sy
        valid = R.turn[a:b] & (n >= _MIN_FIT_POINTS) & (den > 0.0)
        if th[0] < P_.window:  # (θ never decreases: past the window at the start, past it all)
            valid &= th >= P_.window
        seed = np.empty(b - a + 1)
        seed[0] = R.slope_max
        slope = seed[1:]
        slope.fill(-np.inf)
        np.divide(num, den, out=slope, where=valid)
        M = np.maximum.accumulate(seed)[1:]
        return slope, M, valid

    def _judgeable(
        self, R: _Rundown, *, n0: int, p: int, m: int, valid: BoolArray, M: FloatArray
    ) -> BoolArray:
        """Where chunk[p:m] may judge yield: a valid slope past the minimum angle under a
        positive running maximum. Both never decrease: true at the chunk's first sample, true
        throughout, and that mask is left out."""
        out = valid
        if not R.th[n0 + p] >= self._p.min_angle:
            out = out & (R.th[n0 + p : n0 + m] >= self._p.min_angle)
        if not M[0] > 0.0:
            out = out & (M > 0.0)
        return out

    def _rate_window(
        self, R: _Rundown, *, n0: int, p: int, m: int, t: FloatArray
    ) -> tuple[npt.NDArray[np.intp], FloatArray, BoolArray]:
        """Per sample of chunk[p:m]: where its rate window begins, how long it is, and whether
        the sample may predict at all.

        Only a turning sample predicts, and only when its whole window (``cue_rate_window_s``)
        lies inside its stroke after the stroke resumed fully (torque back at the level where
        the previous stroke ended). Before that the fastener stood still while torque wound
        up; a rate taken across the wind-up predicts a crossing that is not coming, and a
        stroke counts from ``resume_fraction`` of that level, so its first samples may still
        be winding up. The price: no prediction in the first window of each stroke; a target
        crossed within it still gets its stop cue at the crossing."""
        a, b = n0 + p, n0 + m
        tc = t[p:m]
        j = R.t[:b].searchsorted(tc - self._p.cue_window, side="right") - 1
        ok = j >= R.full_from[a:b]  # (a window never begins after its own sample)
        j = np.maximum(j, 0)
        return j, tc - R.t[j], ok

    def _cue_masks(
        self, R: _Rundown, *, spec: _StepSpec, n0: int, p: int, m: int, t: FloatArray
    ) -> tuple[FloatArray, FloatArray, BoolArray]:
        """(value, rate, turning) of the driven quantity over chunk[p:m] for prediction; only
        a turning sample may predict (see "Cueing")."""
        j, dtj, ok = self._rate_window(R, n0=n0, p=p, m=m, t=t)
        rate = np.zeros(m - p)
        if spec.kind == _TORQUE:
            v = R.T[n0 + p : n0 + m]
            np.divide(v - R.T[j], dtj, out=rate, where=dtj > 0.0)
        else:
            v = R.th[n0 + p : n0 + m] - R.step_base
            # the angle since the start: a window reaching back before snug (where the angle
            # from snug is held at 0) would understate the rate just after snug
            np.divide(R.pa[n0 + p : n0 + m] - R.pa[j], dtj, out=rate, where=dtj > 0.0)
        np.maximum(rate, 0.0, out=rate)
        return v, rate, ok

    def _may_reach(
        self,
        R: _Rundown,
        *,
        spec: _StepSpec,
        n0: int,
        p: int,
        m: int,
        t: FloatArray,
        h: float,
        aim: float,
        t_max: float,
    ) -> bool:
        """False when no sample of chunk[p:m] can predict ``aim`` within ``h``: a scalar
        upper bound on ``value + rate * h`` of ``_cue_masks`` over the chunk is below it
        (``t_max``: the frame's peak torque).

        Exact, not approximate: the bound repeats the masks' floating-point operations on
        the extreme operands (the value's maximum; for the rate, the largest rise over the
        shortest interval a predicting sample's window can span), and rounding is monotone,
        so a refused chunk holds no sample whose mask would be true. A predicting sample's
        window begins at or before ``t - cue_window``, which the subtraction may shift by
        half an ulp of the time: the shortest interval takes two."""
        b = n0 + m
        t_hi = max(abs(float(t[p])), abs(float(t[m - 1])))  # time increases
        w = self._p.cue_window
        d_lo = w - 2.0 * math.ulp(t_hi + w)
        if not d_lo > 0.0:
            return True
        # the earliest sample any window of the chunk begins at: the first sample's
        j0 = max(int(R.t[:b].searchsorted(float(t[p]) - w, side="right")) - 1, 0)
        if spec.kind == _TORQUE:
            v_hi = t_max
            rise = v_hi - float(R.T[j0:b].min())
        else:
            # angles never decrease: the chunk's last sample holds the largest
            v_hi = float(R.th[b - 1]) - R.step_base
            rise = float(R.pa[b - 1]) - float(R.pa[j0])
        rate_hi = max(rise, 0.0) / d_lo
        return v_hi + rate_hi * h >= aim

    def _early_masks(
        self, R: _Rundown, *, n0: int, p: int, m: int, t: FloatArray
    ) -> tuple[FloatArray, FloatArray, FloatArray, BoolArray]:
        """(torque, torque rate, counted angle rate, turning) over chunk[p:m], before snug."""
        j, dtj, ok = self._rate_window(R, n0=n0, p=p, m=m, t=t)
        Tk = R.T[n0 + p : n0 + m]
        pos = dtj > 0.0
        Tr = np.zeros(m - p)
        np.divide(Tk - R.T[j], dtj, out=Tr, where=pos)
        om = np.zeros(m - p)
        np.divide(R.pa[n0 + p : n0 + m] - R.pa[j], dtj, out=om, where=pos)
        return Tk, Tr, om, ok

    def _aim(self, R: _Rundown, spec: _StepSpec) -> float:
        """Where the stop cue aims for the step in progress (see ``_Params.aim_point``)."""
        return self._p.aim_point(R.step, spec, R.step_base)

    def _stop_from(self, R: _Rundown, spec: _StepSpec, n0: int, p: int, m: int) -> tuple[int, bool]:
        """Where in chunk[p:m] this step's stop cue is armed from (``m``: nowhere), and whether
        it then predicts from the handle's rate (a re-armed torque or angle step) rather than
        from the driven quantity's trend.

        Once fired, the cue is re-armed when the technician let go short of the target and
        drives the wrench again: once the handle halted (rate no longer forward) and then
        moves forward again (rate above the rest level, or a new stroke), even if the fastener
        never turned in between. The rest of the way is short, and a prediction from the
        driven quantity needs the ratchet's play, the wind-up and a rate window behind it, a
        reaction time too late; the gyro sees the handle from its first motion, so the cue
        predicts from that (see ``_active``). A yield step's cue fires at yield, which ends it.
        """
        last = R.stop_cue_at.get(R.step)
        if last is None:
            return p, False
        b = n0 + m
        if spec.kind == _YIELD:
            ss = R.stroke_starts
            w = int(np.searchsorted(np.asarray(ss, dtype=np.intp), last, side="right"))
            if w == len(ss) or ss[w] >= b:
                return m, False
            return max(p, ss[w] - n0), False
        # resumable scan: (cue it refers to, phase, cursor); phases: 0 seek the halt (the
        # handle no longer driven forward), 1 seek the drive again, 2 found at the cursor
        key, phase, c = R.rearm
        if key != last:
            phase, c = 0, last
        if phase == 0:
            c += _first(R.rc[c:b] <= 0.0)
            if c < b:
                phase = 1
                # the wind-up to take up again: the peak of the stroke the halt ended
                i = (
                    int(
                        np.searchsorted(np.asarray(R.stroke_starts, dtype=np.intp), c, side="right")
                    )
                    - 1
                )
                s0 = R.stroke_starts[i] if i >= 0 else c
                pk = s0 + int(np.argmax(R.T[s0 : c + 1]))
                R.rearm_level = float(R.T[pk])
                # a torque step's joint rate: the secant from snug to that peak (N·m per
                # counted degree); none measurable so close to snug: the rest counts as 0°
                th_pk = float(R.th[pk]) - R.step_base
                T_snug = float(R.T[R.snug]) if R.snug is not None else self._p.snug
                R.rearm_rate = (R.rearm_level - T_snug) / th_pk if th_pk > 0.1 else math.inf
        if phase == 1:
            c += _first((R.rc[c:b] > self._p.rest_rate) | R.turn[c:b])
            phase = 2 if c < b else 1
        R.rearm = (last, phase, c)
        if phase != 2:
            return m, True
        return max(p, c - n0), True

    def _active(self, t: FloatArray, T: FloatArray, r: FloatArray, events: list[Event]) -> int:
        R = self._r
        assert R is not None
        P_ = self._p
        n0 = R.n
        m = t.shape[0]
        dt, la, t_max = self._accumulate(R, t, T, r)
        base = R.start_index + n0  # global index of chunk position 0
        gap_possible = bool(np.count_nonzero(dt > P_.max_gap))
        # yield is judged only past the minimum angle, and only where a slope window lies
        # wholly past snug (the angle never decreases: the last sample tells for the frame);
        # until then the slopes wait (``_slopes`` catches up their running maximum)
        judge_possible = self._judge_possible(R)
        p = 0
        while p < m:
            state = self._state
            K = m
            what = ""
            spec = P_.steps[R.step] if R.step < len(P_.steps) else None
            slope: FloatArray | None = None
            M: FloatArray | None = None
            valid: BoolArray | None = None
            judge: BoolArray | None = None

            def take(k: int, name: str) -> None:
                nonlocal K, what
                if k < K:
                    K, what = k, name

            # Candidates in priority order: on a tie the earlier-listed one is handled first.
            if state is State.RUNDOWN and R.snug is not None and R.snug - n0 >= p:
                take(R.snug - n0, "snug")
            if state in (State.TIGHTENING, State.HOLDING):
                if R.snug is not None and gap_possible:
                    g0 = max(p, R.snug - n0 + 1)
                    if g0 < m:
                        take(g0 + _first(dt[g0:] > P_.max_gap), "gap")
                if P_.watch_yield and R.yield_point is None and judge_possible:
                    slope, M, valid = self._slopes(R, n0, p, m)
                    judge = self._judgeable(R, n0=n0, p=p, m=m, valid=valid, M=M)
                    take(p + _first(judge & (slope <= P_.fraction * M)), "yield")
            if state in (State.RUNDOWN, State.TIGHTENING) and spec is not None:
                cue_ok = spec.kind == _TORQUE or state is State.TIGHTENING
                need_app = (CueKind.APPROACH, R.step) not in R.fired
                stop_from, by_handle = self._stop_from(R, spec, n0, p, m)
                need_stop = stop_from < m
                if cue_ok and need_stop and by_handle:
                    # re-armed step: the handle's rate predicts the travel within latency +
                    # reaction, less the wind-up still to take up before the fastener turns
                    # (the ratchet's play is unknown); a torque step's rest of the way in
                    # degrees from its joint rate
                    q, b0 = stop_from, n0 + stop_from
                    rcq = R.rc[b0 : n0 + m]
                    Tq = R.T[b0 : n0 + m]
                    wind = np.maximum(R.rearm_level - Tq, 0.0) * P_.defl
                    aim = self._aim(R, spec)
                    if spec.kind == _ANGLE:
                        ahead = R.th[b0 : n0 + m] - R.step_base + rcq * P_.h_stop - wind
                        hit = (rcq > P_.rest_rate) & (ahead >= aim)
                    else:
                        rest = np.maximum(aim - np.maximum(Tq, R.rearm_level), 0.0) / R.rearm_rate
                        hit = (rcq > P_.rest_rate) & (rcq * P_.h_stop - wind >= rest)
                    take(q + _first(hit), "cue_stop")
                    need_stop = False
                if state is State.RUNDOWN and spec.kind == _ANGLE and need_app:
                    # an angle step's approach cue before snug (a stop cue never comes before)
                    Tk, Tr, om, turn = self._early_masks(R, n0=n0, p=p, m=m, t=t)
                    reach = om * (P_.h_approach * Tr - (P_.snug - Tk)) >= self._aim(R, spec) * Tr
                    take(p + _first(turn & (Tr > 0.0) & reach), "cue_approach")
                if cue_ok and (need_app or need_stop):
                    if spec.kind == _YIELD:
                        if state is State.TIGHTENING and need_app and judge_possible:
                            if slope is None:
                                slope, M, valid = self._slopes(R, n0, p, m)
                            assert M is not None
                            assert valid is not None
                            if judge is None:
                                judge = self._judgeable(R, n0=n0, p=p, m=m, valid=valid, M=M)
                            acond = judge & (slope <= P_.approach_fraction * M)
                            take(p + _first(acond), "cue_approach")
                    else:
                        aim = self._aim(R, spec)
                        # the approach horizon bounds the stop cue's too (h_approach >= h_stop)
                        h = P_.h_approach if need_app else P_.h_stop
                        if self._may_reach(
                            R, spec=spec, n0=n0, p=p, m=m, t=t, h=h, aim=aim, t_max=t_max
                        ):
                            v, rate, turn = self._cue_masks(R, spec=spec, n0=n0, p=p, m=m, t=t)
                            if need_app:
                                app = turn & (v + rate * P_.h_approach >= aim)
                                take(p + _first(app), "cue_approach")
                            if need_stop:
                                q = stop_from - p
                                stop = turn[q:] & (v[q:] + rate[q:] * P_.h_stop >= aim)
                                take(stop_from + _first(stop), "cue_stop")
            if not R.over and t_max >= P_.max_torque:
                take(p + _first(T[p:] >= P_.max_torque), "over")
            if state is State.TIGHTENING and spec is not None and spec.kind != _YIELD:
                # quick refusals: torque never reaches the target in this frame, or the angle
                # (non-decreasing) has not reached it by the frame's last sample
                if spec.kind == _TORQUE:
                    if t_max >= spec.target:
                        take(p + _first(T[p:] >= spec.target), "step")
                elif R.theta_last - R.step_base >= spec.target:
                    take(p + _first(R.th[n0 + p : n0 + m] - R.step_base >= spec.target), "step")
            if state is State.HOLDING:
                take(p + _first(T[p:] < P_.release), "release")
            if la is not None:
                take(p + _first(t[p:] - la[p:] > P_.timeout), "timeout")

            if M is not None:
                # running maximum of the slope through the sample handled now (or the frame end)
                R.slope_max = float(M[min(K, m - 1) - p])
                R.slope_upto = n0 + min(K, m - 1) + 1
            if m == K:
                break
            k = K
            gi = base + k
            tk = float(t[k])
            match what:
                case "snug":
                    self._state = next_state(state, Input.SNUG)
                    events.append(SnugReached(index=gi, t_s=tk, torque_nm=float(T[k])))
                case "gap":
                    R.reasons.append(Reason.DATA_GAP)
                    return self._finish(n0 + k, Input.DATA_GAP, events) - n0 + 1
                case "timeout":
                    R.reasons.append(Reason.TIMEOUT)
                    return self._finish(n0 + k, Input.TIMEOUT, events) - n0 + 1
                case "release":
                    self._finish(n0 + k, Input.RELEASE, events)
                    return int(k) + 1
                case "yield":
                    assert slope is not None
                    assert M is not None
                    yp = YieldPoint(
                        index=gi,
                        t_s=tk,
                        torque_nm=float(T[k]),
                        angle_deg=float(R.th[n0 + k]),
                        slope_nm_per_deg=float(slope[k - p]),
                        max_slope_nm_per_deg=float(M[k - p]),
                    )
                    R.yield_point = yp
                    events.append(YieldDetected(point=yp))
                    if state is State.TIGHTENING and spec is not None and spec.kind == _YIELD:
                        self._cue(R, kind=CueKind.STOP, gi=gi, tk=tk, pred=tk, events=events)
                        self._step_done(R, spec=spec, gi=gi, tk=tk, Tk=float(T[k]), events=events)
                case "cue_approach" | "cue_stop":
                    assert spec is not None
                    kind = CueKind.APPROACH if what == "cue_approach" else CueKind.STOP
                    pred = tk
                    if state is State.RUNDOWN and spec.kind == _ANGLE:
                        Tk, Tr, om, _ = self._early_masks(R, n0=n0, p=k, m=k + 1, t=t)
                        if Tr[0] > 0.0 and om[0] > 0.0:
                            to_snug = (P_.snug - float(Tk[0])) / float(Tr[0])
                            pred = tk + max(to_snug, 0.0) + spec.target / float(om[0])
                    elif spec.kind != _YIELD:
                        v, rate, _ = self._cue_masks(R, spec=spec, n0=n0, p=k, m=k + 1, t=t)
                        vk, rk = float(v[0]), float(rate[0])
                        if vk < spec.target and rk > 0.0:
                            pred = tk + (spec.target - vk) / rk
                    self._cue(R, kind=kind, gi=gi, tk=tk, pred=pred, events=events)
                case "over":
                    R.over = True
                    R.reasons.append(Reason.OVER_TORQUE)
                    events.append(
                        OverTorque(index=gi, t_s=tk, torque_nm=float(T[k]), limit_nm=P_.max_torque)
                    )
                    if state is not State.HOLDING:
                        self._state = next_state(state, Input.OVER_TORQUE)
                        step = min(R.step, len(P_.steps) - 1)
                        self._stop(
                            R,
                            trigger=StopTrigger.OVER_TORQUE,
                            step=step,
                            last=True,
                            gi=gi,
                            tk=tk,
                            Tk=float(T[k]),
                            events=events,
                        )
                    else:
                        self._state = next_state(state, Input.OVER_TORQUE)
                case "step":
                    assert spec is not None
                    # no cue comes later than the crossing itself (late cues: predicted = actual)
                    self._cue(R, kind=CueKind.APPROACH, gi=gi, tk=tk, pred=tk, events=events)
                    if self._stop_from(R, spec, n0, k, k + 1)[0] == k:
                        self._cue(R, kind=CueKind.STOP, gi=gi, tk=tk, pred=tk, events=events)
                    self._step_done(R, spec=spec, gi=gi, tk=tk, Tk=float(T[k]), events=events)
                case _:
                    raise AssertionError(f"unhandled candidate {what!r}")
            p = k
        return int(m)

    def _cue(
        self,
        R: _Rundown,
        *,
        kind: CueKind,
        gi: int,
        tk: float,
        pred: float,
        events: list[Event],
    ) -> None:
        if kind is CueKind.APPROACH and (kind, R.step) in R.fired:
            return
        R.fired.add((kind, R.step))
        if kind is CueKind.STOP:
            R.stop_cue_at[R.step] = gi - R.start_index
        R.cues.append(
            CueRecord(kind=kind, step=R.step, index=gi, t_s=tk, predicted_crossing_t_s=pred)
        )
        events.append(
            CueFired(kind=kind, step=R.step, index=gi, t_s=tk, predicted_crossing_t_s=pred)
        )

    def _step_done(
        self,
        R: _Rundown,
        *,
        spec: _StepSpec,
        gi: int,
        tk: float,
        Tk: float,
        events: list[Event],
    ) -> None:
        last = R.step == len(self._p.steps) - 1
        self._state = next_state(self._state, Input.STOP if last else Input.STEP)
        # the cues of this step learn their actual crossing
        R.cues = [
            CueRecord(
                kind=c.kind,
                step=c.step,
                index=c.index,
                t_s=c.t_s,
                predicted_crossing_t_s=c.predicted_crossing_t_s,
                actual_crossing_index=gi,
                actual_crossing_t_s=tk,
            )
            if c.step == R.step and c.actual_crossing_index is None
            else c
            for c in R.cues
        ]
        self._stop(
            R, trigger=spec.trigger, step=R.step, last=last, gi=gi, tk=tk, Tk=Tk, events=events
        )
        if not last:
            R.step_base = float(R.th[gi - R.start_index])
            R.step += 1

    def _stop(
        self,
        R: _Rundown,
        *,
        trigger: StopTrigger,
        step: int,
        last: bool,
        gi: int,
        tk: float,
        Tk: float,
        events: list[Event],
    ) -> None:
        angle = float(R.th[gi - R.start_index])
        lead = None
        for c in R.cues:
            if c.kind is CueKind.STOP and c.step == step:
                lead = tk - c.t_s
        if last:
            R.stop = StopPoint(index=gi, t_s=tk, trigger=trigger, torque_nm=Tk, angle_deg=angle)
        events.append(
            StopReached(
                index=gi,
                t_s=tk,
                step=step,
                last_step=last,
                trigger=trigger,
                torque_nm=Tk,
                angle_deg=angle,
                cue_lead_s=lead,
            )
        )

    def _finish(self, e: int, inp: Input, events: list[Event]) -> int:
        """End the rundown at local index ``e``: judge, emit, return to idle. Returns ``e``."""
        R = self._r
        assert R is not None
        P_ = self._p
        n = e + 1
        R.n = n
        T = R.T[:n]
        th = R.th[:n]
        starts = [s for s in R.stroke_starts if s <= e]
        ss = starts[-1] if starts else 0
        pk = ss + int(np.argmax(T[ss:n]))
        final_T = float(T[pk])
        final_th = float(th[pk])
        reasons = list(R.reasons)
        if R.snug is None or R.snug > e:
            reasons.append(Reason.SNUG_NOT_FOUND)
            snug = None
        else:
            snug = SnugPoint(
                index=R.start_index + R.snug, t_s=float(R.t[R.snug]), torque_nm=float(R.T[R.snug])
            )
        if P_.torque_window is not None:
            lo, hi = P_.torque_window
            if final_T < lo:
                reasons.append(Reason.TORQUE_LOW)
            elif final_T > hi:
                reasons.append(Reason.TORQUE_HIGH)
        if P_.angle_window is not None and snug is not None:
            lo, hi = P_.angle_window
            if final_th < lo:
                reasons.append(Reason.ANGLE_LOW)
            elif final_th > hi:
                reasons.append(Reason.ANGLE_HIGH)
        if P_.needs_yield and R.yield_point is None:
            reasons.append(Reason.YIELD_NOT_FOUND)
        uniq = tuple(dict.fromkeys(reasons))
        rate = r2 = None
        if snug is not None:
            if R.yield_point is not None:
                end_angle = max(R.yield_point.angle_deg - P_.window, 0.0)
            elif R.stop is not None:
                end_angle = R.stop.angle_deg
            else:
                end_angle = final_th
            ie = int(np.searchsorted(th, end_angle, side="right")) - 1
            sel = R.turn[R.snug : ie + 1]
            x = th[R.snug : ie + 1][sel]
            y = T[R.snug : ie + 1][sel]
            if x.shape[0] >= _MIN_FIT_POINTS:
                dx_ = x - x.mean()
                dy_ = y - y.mean()
                sxx, sxy, syy = float(dx_ @ dx_), float(dx_ @ dy_), float(dy_ @ dy_)
                if sxx > 0.0:
                    rate = sxy / sxx
                    r2 = sxy * sxy / (sxx * syy) if syy > 0.0 else 1.0
                    r2 = min(max(r2, 0.0), 1.0)
        pr = judge(
            P_.proofing,
            runin_torque_nm=R.runin_T,
            runin_angle_deg=R.runin_th,
            t=R.t[:n],
            T=T,
            rc=R.rc[:n],
            turn=R.turn[:n],
            snug=None if snug is None else R.snug,
            snug_torque_nm=P_.snug,
            deflection_deg_per_nm=P_.defl,
            joint_rate=rate,
            start_index=R.start_index,
        )
        uniq = tuple(dict.fromkeys((*uniq, *pr.reasons)))
        res = RundownResult(
            status=Status.NOK if uniq else Status.OK,
            reasons=uniq,
            strategy=self._program.strategy.value,
            program_id=self._program.id,
            program_version=self._program.version,
            start_index=R.start_index,
            start_t_s=float(R.t[0]),
            end_index=R.start_index + e,
            end_t_s=float(R.t[e]),
            gyro_bias_dps=R.bias,
            snug=snug,
            stop=R.stop,
            cues=tuple(R.cues),
            final_torque_nm=final_T,
            final_angle_deg=final_th,
            peak_torque_nm=float(T.max()),
            yield_point=R.yield_point,
            joint_rate_nm_per_deg=rate,
            joint_rate_r2=r2,
            curve_t_s=R.t[:n].copy(),
            curve_torque_nm=T.copy(),
            curve_angle_deg=th.copy(),
            prevailing_torque_nm=pr.prevailing_torque_nm,
            rundown_angle_deg=pr.rundown_angle_deg,
            contact_to_snug_deg=pr.contact_to_snug_deg,
            checks=pr.checks,
        )
        self._state = next_state(self._state, inp)
        self._r = None
        self._armed = bool(T[e] < self._settings.start_torque_nm)
        events.append(RundownFinished(index=res.end_index, t_s=res.end_t_s, result=res))
        return e
