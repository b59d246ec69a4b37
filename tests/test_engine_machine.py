"""The rundown state machine (clampd.daemon.engine._machine): every (state, input) pair
either has its documented successor or raises EngineUsageError naming both.

The expected table is written out here by hand from the module's documented diagram, so a
change to the machine shows up as a failing pair, not as a silently re-derived expectation.
"""

from __future__ import annotations

import itertools

import pytest

from clampd.daemon.engine import EngineUsageError, Input, State, next_state

In, S = Input, State
EXPECTED: dict[tuple[State, Input], State] = {
    (S.IDLE, In.START): S.RUNDOWN,
    (S.IDLE, In.SELECT_PROGRAM): S.IDLE,
    (S.IDLE, In.LINK_LOST): S.IDLE,
    (S.IDLE, In.ABORT): S.IDLE,
    (S.IDLE, In.TIMEOUT): S.IDLE,
    (S.RUNDOWN, In.SNUG): S.TIGHTENING,
    (S.RUNDOWN, In.OVER_TORQUE): S.HOLDING,
    (S.RUNDOWN, In.TIMEOUT): S.IDLE,
    (S.RUNDOWN, In.LINK_LOST): S.IDLE,
    (S.RUNDOWN, In.ABORT): S.IDLE,
    (S.RUNDOWN, In.ENGINE_ERROR): S.IDLE,
    (S.TIGHTENING, In.STEP): S.TIGHTENING,
    (S.TIGHTENING, In.STOP): S.HOLDING,
    (S.TIGHTENING, In.OVER_TORQUE): S.HOLDING,
    (S.TIGHTENING, In.DATA_GAP): S.IDLE,
    (S.TIGHTENING, In.TIMEOUT): S.IDLE,
    (S.TIGHTENING, In.LINK_LOST): S.IDLE,
    (S.TIGHTENING, In.ABORT): S.IDLE,
    (S.TIGHTENING, In.ENGINE_ERROR): S.IDLE,
    (S.HOLDING, In.RELEASE): S.IDLE,
    (S.HOLDING, In.OVER_TORQUE): S.HOLDING,
    (S.HOLDING, In.DATA_GAP): S.IDLE,
    (S.HOLDING, In.TIMEOUT): S.IDLE,
    (S.HOLDING, In.LINK_LOST): S.IDLE,
    (S.HOLDING, In.ABORT): S.IDLE,
    (S.HOLDING, In.ENGINE_ERROR): S.IDLE,
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
        for inp in (In.LINK_LOST, In.ABORT, In.TIMEOUT, In.ENGINE_ERROR):
            assert next_state(state, inp) is S.IDLE
