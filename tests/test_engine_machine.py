"""The rundown state machine (clampd.daemon.engine._machine): every (state, input) pair
either has its documented successor or raises EngineUsageError naming both.

The expected table is written out here by hand from the module's documented diagram, so a
change to the machine shows up as a failing pair, not as a silently re-derived expectation.
"""

from __future__ import annotations

import itertools

import pytest

from clampd.daemon.engine import EngineUsageError, Input, State, next_state

I, S = Input, State
EXPECTED: dict[tuple[State, Input], State] = {
    (S.IDLE, I.START): S.RUNDOWN,
    (S.IDLE, I.SELECT_PROGRAM): S.IDLE,
    (S.IDLE, I.LINK_LOST): S.IDLE,
    (S.IDLE, I.ABORT): S.IDLE,
    (S.IDLE, I.TIMEOUT): S.IDLE,
    (S.RUNDOWN, I.SNUG): S.TIGHTENING,
    (S.RUNDOWN, I.OVER_TORQUE): S.HOLDING,
    (S.RUNDOWN, I.TIMEOUT): S.IDLE,
    (S.RUNDOWN, I.LINK_LOST): S.IDLE,
    (S.RUNDOWN, I.ABORT): S.IDLE,
    (S.RUNDOWN, I.ENGINE_ERROR): S.IDLE,
    (S.TIGHTENING, I.STEP): S.TIGHTENING,
    (S.TIGHTENING, I.STOP): S.HOLDING,
    (S.TIGHTENING, I.OVER_TORQUE): S.HOLDING,
    (S.TIGHTENING, I.DATA_GAP): S.IDLE,
    (S.TIGHTENING, I.TIMEOUT): S.IDLE,
    (S.TIGHTENING, I.LINK_LOST): S.IDLE,
    (S.TIGHTENING, I.ABORT): S.IDLE,
    (S.TIGHTENING, I.ENGINE_ERROR): S.IDLE,
    (S.HOLDING, I.RELEASE): S.IDLE,
    (S.HOLDING, I.OVER_TORQUE): S.HOLDING,
    (S.HOLDING, I.DATA_GAP): S.IDLE,
    (S.HOLDING, I.TIMEOUT): S.IDLE,
    (S.HOLDING, I.LINK_LOST): S.IDLE,
    (S.HOLDING, I.ABORT): S.IDLE,
    (S.HOLDING, I.ENGINE_ERROR): S.IDLE,
}


@pytest.mark.parametrize(("state", "inp"), list(itertools.product(State, Input)))
def test_every_pair_is_documented_or_refused(state: State, inp: Input) -> None:
    if (state, inp) in EXPECTED:
        assert next_state(state, inp) is EXPECTED[state, inp]
    else:
        with pytest.raises(EngineUsageError) as info:
            next_state(state, inp)
        assert info.value.state == state.value
        assert info.value.input == inp.value
        assert state.value in str(info.value)
        assert inp.value in str(info.value)


def test_every_active_state_can_end() -> None:
    for state in (S.RUNDOWN, S.TIGHTENING, S.HOLDING):
        for inp in (I.LINK_LOST, I.ABORT, I.TIMEOUT, I.ENGINE_ERROR):
            assert next_state(state, inp) is S.IDLE
