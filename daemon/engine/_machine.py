"""Every state transition of a rundown, in one place.

The engine (``_engine.py``) scans samples with numpy and finds *where* something happens; this
module alone decides *what state follows*. A rundown moves

    IDLE ──start──► RUNDOWN ──snug──► TIGHTENING ──stop──► HOLDING ──release──► IDLE

with over-torque jumping to HOLDING from any active state (the stop is immediate), and the
ending inputs (data gap, timeout, link lost, abort, internal error) returning to IDLE with a
NOK result. An impossible (state, input) pair raises :class:`EngineUsageError` naming both:
a bug in the caller or in the engine, never silently ignored. ``assert_never`` makes mypy prove
that every state and every input is handled.
"""

from __future__ import annotations

import enum
from typing import assert_never

from clampd.daemon.engine._errors import EngineUsageError

__all__ = ["Input", "State", "next_state"]


class State(enum.Enum):
    """Where a wrench's rundown stands."""

    IDLE = "idle"  # no rundown; waiting for torque to rise past the start level
    RUNDOWN = "rundown"  # started, torque below snug; angle not yet counted
    TIGHTENING = "tightening"  # past snug; angle counted, driving toward the (last) step target
    HOLDING = "holding"  # stop reached (or over-torque); waiting for the operator to release


class Input(enum.Enum):
    """What can happen to a rundown."""

    START = "start"
    SNUG = "snug"
    STEP = "step"  # an intermediate step of a multi-step program reached its target
    STOP = "stop"  # the last step reached its target
    OVER_TORQUE = "over_torque"
    RELEASE = "release"
    DATA_GAP = "data_gap"
    TIMEOUT = "timeout"
    LINK_LOST = "link_lost"
    ABORT = "abort"
    ENGINE_ERROR = "engine_error"
    SELECT_PROGRAM = "select_program"


_ENDINGS = (Input.DATA_GAP, Input.TIMEOUT, Input.LINK_LOST, Input.ABORT, Input.ENGINE_ERROR)


def _impossible(state: State, inp: Input) -> EngineUsageError:
    return EngineUsageError(
        f"input {inp.value!r} is impossible in state {state.value!r}",
        state=state.value,
        input=inp.value,
    )


def next_state(state: State, inp: Input) -> State:
    """Return the state that follows ``inp`` in ``state``; raise ``EngineUsageError`` if none."""
    match state:
        case State.IDLE:
            if inp in (Input.START,):
                return State.RUNDOWN
            if inp in (Input.SELECT_PROGRAM, Input.LINK_LOST, Input.ABORT, Input.TIMEOUT):
                return State.IDLE  # nothing in progress: nothing to end
            raise _impossible(state, inp)
        case State.RUNDOWN:
            if inp is Input.SNUG:
                return State.TIGHTENING
            if inp is Input.OVER_TORQUE:
                return State.HOLDING
            if inp in (Input.TIMEOUT, Input.LINK_LOST, Input.ABORT, Input.ENGINE_ERROR):
                return State.IDLE  # no angle is counted before snug, so no data_gap here
            raise _impossible(state, inp)
        case State.TIGHTENING:
            if inp is Input.STEP:
                return State.TIGHTENING
            if inp in (Input.STOP, Input.OVER_TORQUE):
                return State.HOLDING
            if inp in _ENDINGS:
                return State.IDLE
            raise _impossible(state, inp)
        case State.HOLDING:
            if inp is Input.RELEASE:
                return State.IDLE
            if inp is Input.OVER_TORQUE:
                return State.HOLDING  # recorded as a reason; already stopped
            if inp in _ENDINGS:
                return State.IDLE
            raise _impossible(state, inp)
        case _:
            assert_never(state)
