"""The closed loop every study runs: simulated joint, operator and sensor, driven by the engine.

Theory of operation. :func:`simulate_rundown` advances the bench one sensor sample at a time
and offers each :class:`Reading` — what a station may see, never the truth — to a listener.
:class:`EngineLoop` is that listener: it collects the readings into frames of
``frame_samples`` (the sensor profile packs 22 samples per BLE notification, so the station
sees them frame by frame, never sooner), feeds each frame to a real
:class:`~clampd.daemon.engine.Engine`, and hands the cues the engine fires back to the
operator. The simulator adds ``cue_delay_s`` of radio and speaker latency on top of the frame
wait, so the operator hears a cue as late as a real one would arrive.

Two cue policies are compared: ``predictive`` plays the engine's own cues (approach and the
early stop cue); ``at_target`` plays one stop cue when the engine reports the target reached
(``StopReached``), the way a wrench that only signals the target behaves. Under both, the
verdict is played when the engine finishes a rundown (OK or NOK), as the station runtime does:
a person who released on a stop cue listens for it and pulls again when it does not come.

After the run the remaining samples are fed; a rundown still open is aborted through the
engine (NOK ``aborted``), so every simulated joint ends with a judged result. The preload is
read from the simulator's truth at the end of the trace, after the tool was released.

Reproducibility. Every random draw comes from generators derived from one
``numpy.random.SeedSequence``: joint ``i`` of a study always gets child ``i`` of the seed,
whichever worker process runs it, so a seed gives the same figures byte for byte with any
number of workers. Floats in the JSON are rounded so the text is stable too.

Simulated joints are for testing software only: real joints follow the joint designer's
specification, local codes and licensed practice.
"""

from __future__ import annotations

import concurrent.futures
import dataclasses
import enum
import json
import math
import multiprocessing
import os
from collections import deque
from collections.abc import Callable, Iterable, Mapping, Sequence
from typing import Any, TypeVar

import numpy as np
import numpy.typing as npt

from clampd.daemon.engine import (
    CueFired,
    CueKind,
    Engine,
    EngineSettings,
    Event,
    Program,
    RundownFinished,
    RundownResult,
    Status,
    StopReached,
)
from clampd.simulators import (
    CuePattern,
    JointModel,
    OperatorParams,
    Reading,
    SensorParams,
    Trace,
    simulate_rundown,
)

__all__ = [
    "CAUTION",
    "FRAME_SAMPLES",
    "MAX_JOINTS",
    "SPEAKER_DELAY_S",
    "CuePolicy",
    "EngineLoop",
    "LoopOutcome",
    "StudyError",
    "check_study_args",
    "draw_sensor",
    "dumps",
    "final_index",
    "joint_seeds",
    "parallel_map",
    "quantiles",
    "rounded",
    "run_closed_loop",
    "true_rotation_deg",
]

CAUTION = (
    "Simulated joints score software only; real joints follow the joint designer's"
    " specification, local codes and licensed practice."
)

# Samples per BLE notification in sensor profile v1 (protocol/PROFILE.md): the station gets
# samples in frames of this size, so a cue can leave no earlier than the end of its frame.
FRAME_SAMPLES = 22
# Radio write plus speaker buffer from the engine's cue to sound (modelling choice). With the
# mean frame wait at 1 kHz (~11 ms) it adds up to about the engine's default cue latency
# (EngineSettings.cue_latency_s = 0.05 s), i.e. the station's estimate is about right.
SPEAKER_DELAY_S = 0.03
# Upper bound on --joints: 100 000 rundowns is hours of CPU; more is almost surely a typo.
MAX_JOINTS = 100_000
# A rundown that runs longer than this is cut off (the slowest case, 10 °/s over ~60° of
# ratchet strokes, takes ~10 s; modelling choice with margin).
DURATION_LIMIT_S = 40.0
# The timeout tick goes this far past the program's timeout (any margin > 0 will do).
_TICK_MARGIN_S = 0.001


class StudyError(ValueError):
    """Study arguments that cannot run (the caller's input): a clear message, nothing run."""


class CuePolicy(enum.Enum):
    """Which cues reach the operator."""

    PREDICTIVE = "predictive"  # the engine's approach and early stop cues
    AT_TARGET = "at_target"  # one stop cue when the target is reached, nothing before


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True, eq=False)
class LoopOutcome:
    """One simulated rundown scored: the engine's judgement beside the simulator's truth."""

    trace: Trace
    result: RundownResult
    events: tuple[Event, ...]
    aborted: bool  # not even the timeout tick ended the rundown: the study aborted it
    target_reached: bool  # the engine reported the last step's stop condition

    @property
    def final_preload_n(self) -> float:
        """True preload left in the joint after the tool was released (N)."""
        return float(self.trace.preload_n[-1])

    @property
    def yielded(self) -> bool:
        """True when the bolt went past its yield onset (simulator truth)."""
        return bool(self.trace.yielded[-1])

    @property
    def broken(self) -> bool:
        """True when the bolt broke or the thread stripped (simulator truth)."""
        return bool(self.trace.broken[-1])


class EngineLoop:
    """The station in the loop: frames readings into the engine, returns cues to play.

    Used as ``cue_listener`` of :func:`simulate_rundown`. At most one cue leaves per sample;
    when a frame fires several, the stop cue goes first (it matters most) and the rest follow
    on the next samples.
    """

    def __init__(
        self,
        program: Program,
        settings: EngineSettings,
        *,
        policy: CuePolicy = CuePolicy.PREDICTIVE,
        frame_samples: int = FRAME_SAMPLES,
    ) -> None:
        if frame_samples < 1:
            raise StudyError(f"frame_samples must be >= 1, got {frame_samples}")
        self.engine = Engine(program, settings)
        self.policy = policy
        self.events: list[Event] = []
        self._frame = frame_samples
        self._t: list[float] = []
        self._torque: list[float] = []
        self._rate: list[float] = []
        self._queue: deque[CuePattern] = deque()

    def __call__(self, reading: Reading) -> CuePattern | None:
        """Take one reading; return a cue to play now, if any."""
        self._t.append(reading.t_s)
        self._torque.append(reading.torque_nm)
        self._rate.append(reading.axis_rate_dps)
        if len(self._t) >= self._frame:
            self.flush()
        return self._queue.popleft() if self._queue else None

    def flush(self) -> None:
        """Feed the samples collected so far as one frame."""
        if not self._t:
            return
        new = self.engine.feed(
            np.asarray(self._t), np.asarray(self._torque), np.asarray(self._rate)
        )
        self._t.clear()
        self._torque.clear()
        self._rate.clear()
        self.events.extend(new)
        cues: list[CuePattern] = []
        for ev in new:
            if self.policy is CuePolicy.PREDICTIVE and isinstance(ev, CueFired):
                cues.append(CuePattern.STOP if ev.kind is CueKind.STOP else CuePattern.APPROACH)
            elif (
                self.policy is CuePolicy.AT_TARGET and isinstance(ev, StopReached) and ev.last_step
            ):
                cues.append(CuePattern.STOP)
            elif isinstance(ev, RundownFinished):  # the runtime plays the verdict at the finish
                ok = ev.result.status is Status.OK
                cues.append(CuePattern.OK if ok else CuePattern.NOK)
        cues.sort(key=lambda c: c is not CuePattern.STOP)
        self._queue.extend(cues)

    def finish(self, t_end_s: float) -> tuple[RundownResult, bool]:
        """Feed what is left and end a rundown still open the way a station does: by the
        timeout tick (NOK ``timeout``, e.g. the operator stopped short of the target), or, if
        even that does not end it, by an abort. Returns (result, aborted)."""
        self.flush()
        aborted = False
        p, s = self.engine.program, self.engine.settings
        t_tick = t_end_s + (s.timeout_s if p.timeout_s is None else p.timeout_s) + _TICK_MARGIN_S
        if not self._finished():
            self.events.extend(self.engine.tick(t_tick))
        if not self._finished():
            aborted = True
            self.events.extend(self.engine.abort(t_tick))
        for ev in self.events:
            if isinstance(ev, RundownFinished):
                return ev.result, aborted
        raise StudyError("the operator never loaded the joint: no rundown started")

    def _finished(self) -> bool:
        return any(isinstance(e, RundownFinished) for e in self.events)

    @property
    def target_reached(self) -> bool:
        """True when the engine reported the last step's stop condition."""
        return any(isinstance(e, StopReached) and e.last_step for e in self.events)


def run_closed_loop(
    joint: JointModel,
    program: Program,
    *,
    settings: EngineSettings,
    sensor: SensorParams,
    operator: OperatorParams,
    rng: np.random.Generator,
    policy: CuePolicy = CuePolicy.PREDICTIVE,
    frame_samples: int = FRAME_SAMPLES,
    speaker_delay_s: float = SPEAKER_DELAY_S,
) -> LoopOutcome:
    """Tighten one simulated joint under the engine's control and return both views.

    Raises :class:`StudyError` when no rundown started (the operator never loaded the joint);
    engine and simulator errors propagate unchanged, they are bugs.
    """
    loop = EngineLoop(program, settings, policy=policy, frame_samples=frame_samples)
    trace = simulate_rundown(
        joint,
        sensor,
        operator,
        rng,
        duration_limit_s=DURATION_LIMIT_S,
        cue_listener=loop,
        cue_delay_s=speaker_delay_s,
    )
    result, aborted = loop.finish(float(trace.t_s[-1]))
    return LoopOutcome(
        trace=trace,
        result=result,
        events=tuple(loop.events),
        aborted=aborted,
        target_reached=loop.target_reached,
    )


def true_rotation_deg(outcome: LoopOutcome, index: int) -> float:
    """True fastener rotation from the engine's snug sample to sample ``index`` (degrees).

    The engine's indices count from its creation, which is the trace's first sample, so the
    two share one index. ``nan`` when the engine found no snug.
    """
    snug = outcome.result.snug
    if snug is None:
        return math.nan
    phi = outcome.trace.fastener_angle_deg
    return float(phi[index] - phi[snug.index])


def final_index(result: RundownResult) -> int:
    """Sample index (engine's count) of the result's final torque and angle."""
    hits = np.flatnonzero(
        (result.curve_torque_nm == result.final_torque_nm)
        & (result.curve_angle_deg == result.final_angle_deg)
    )
    return result.start_index + int(hits[0]) if hits.size else result.end_index


def draw_sensor(rng: np.random.Generator) -> SensorParams:
    """A wrench sensor with its own turn-on gyro bias (the engine must estimate it at rest)."""
    # Turn-on bias of consumer MEMS gyros: within about ±1 °/s (from memory of datasheets);
    # 0.5 °/s per axis, 1 σ, puts most tools inside that. Noise and drift stay the defaults.
    bias = rng.normal(0.0, 0.5, size=3)
    return SensorParams(gyro_bias_dps=(float(bias[0]), float(bias[1]), float(bias[2])))


def joint_seeds(seed: int, n: int) -> list[np.random.SeedSequence]:
    """Child ``i`` belongs to joint ``i`` whatever the number of joints or workers."""
    return np.random.SeedSequence(seed).spawn(n)


def check_study_args(joints: int, seed: int, workers: int | None) -> int:
    """Validate the common arguments; return the worker count to use."""
    if isinstance(joints, bool) or not isinstance(joints, int) or not 1 <= joints <= MAX_JOINTS:
        raise StudyError(f"joints must be an integer in 1..{MAX_JOINTS}, got {joints!r}")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise StudyError(f"seed must be an integer >= 0, got {seed!r}")
    if workers is None:
        return max(1, os.cpu_count() or 1)
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise StudyError(f"workers must be an integer >= 1, got {workers!r}")
    return workers


_T = TypeVar("_T")
_R = TypeVar("_R")


def parallel_map(fn: Callable[[_T], _R], items: Sequence[_T], workers: int) -> list[_R]:
    """``[fn(x) for x in items]`` in order, spread over worker processes when it pays.

    Each item carries its own seed, so the order of completion cannot change a figure.
    """
    if workers <= 1 or len(items) < 2:
        return [fn(x) for x in items]
    chunk = max(1, len(items) // (4 * workers))
    # "spawn": a fresh interpreter per worker; forking a process that may hold threads (an
    # event loop, a BLE stack) can deadlock, and the import cost (~1 s) is paid once per worker.
    ctx = multiprocessing.get_context("spawn")
    with concurrent.futures.ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
        return list(pool.map(fn, items, chunksize=chunk))


def rounded(value: float, digits: int) -> float | None:
    """Round for stable JSON; ``None`` for a value that does not exist (nan)."""
    if not math.isfinite(value):
        return None
    out = round(value, digits)
    return 0.0 if out == 0.0 else out  # no "-0.0" in the output


def quantiles(values: npt.ArrayLike, qs: Iterable[float]) -> list[float]:
    """Sample quantiles (numpy's default linear interpolation); nan for no values."""
    a = np.asarray(values, dtype=np.float64)
    if a.size == 0:
        return [math.nan for _ in qs]
    return [float(np.quantile(a, q)) for q in qs]


def dumps(data: Mapping[str, Any]) -> str:
    """The study's JSON text: sorted keys, fixed indentation, ASCII, one trailing newline."""
    return json.dumps(data, sort_keys=True, indent=2, ensure_ascii=True, allow_nan=False) + "\n"
