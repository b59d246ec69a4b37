"""StationState: programs, selections, joint positions, locks and aborts (no I/O).

External references used below:
- ISO 6789-1:2017 §5: a hand torque tool is specified and calibrated over 20–100 % of its
  maximum; above 100 % nothing is known of its readings (from memory of the standard's
  scope) — so a program needing more than the rated capacity is refused for that wrench.
- NIST SP 811 (2008), Appendix B.8: 1 ft·lbf = 1.355 818 N·m, used to express a program in
  ft·lbf and check the fit against a capacity in N·m.
- Joint positions worked in order and a NOK position not offered again: common practice, no
  source (re-tightening is not allowed for torque-to-yield bolts).

Demo scenario: Brackenfield Garden Machines, mower deck assembly, station 120 (invented).
"""

from __future__ import annotations

import datetime as dt
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st

from clampd.daemon.engine import ProgramError
from clampd.daemon.runtime import (
    BadJointListError,
    JointState,
    NothingToAbortError,
    StateChange,
    StationState,
    UnknownProgramError,
    UnknownWrenchError,
    WrenchBusyError,
    WrenchLockedError,
    WrenchNotFitError,
)
from clampd.protocol import ErrorCode
from clampd.protocol import StationState as LinkState

DECK: dict[str, Any] = {
    "id": "deck-m8",
    "strategy": "torque",
    "snug_torque": "4 N*m",
    "target_torque": "18 N*m",
    "torque_window": ["17 N*m", "19.5 N*m"],
}
SPINDLE: dict[str, Any] = {
    "id": "spindle-m12",
    "strategy": "torque",
    "snug_torque": "5 ft*lbf",
    "target_torque": "18 ft*lbf",  # 24.40 N·m (NIST SP 811)
}
# Wrench capacities: a 60 N·m wrench and a 24 N·m one, just below 18 ft·lbf.
WRENCHES = {"w-blue": 60.0, "w-red": 24.0}


def make_state() -> StationState:
    return StationState.from_tables("st-120", [DECK, SPINDLE], WRENCHES)


def test_programs_are_validated_by_the_engine_loader() -> None:
    state = make_state()
    assert set(state.programs) == {"deck-m8", "spindle-m12"}
    with pytest.raises(ProgramError):
        StationState.from_tables("st-120", [{"id": "x", "strategy": "torque"}], WRENCHES)


def test_select_station_wide_and_work_through_positions() -> None:
    state = make_state()
    job = state.select(program_id="deck-m8", part_id="DK-0001", joint_positions=["J1", "J2"])
    assert job.next_position == "J1"
    assert state.job_for("w-red") is job
    assert state.record_result("w-red", ok=True) == "J1"
    assert state.record_result("w-blue", ok=False) == "J2"
    done = state.job_for("w-blue")
    assert done is not None
    assert [j.state for j in done.joints] == [JointState.OK, JointState.NOK]
    assert done.next_position is None
    assert state.record_result("w-blue", ok=True) is None  # every position has a result


def test_a_wrench_selection_wins_over_the_station_wide_one() -> None:
    state = make_state()
    state.select(program_id="deck-m8", part_id="DK-1", joint_positions=["J1"])
    own = state.select(
        program_id="spindle-m12", part_id="SP-1", joint_positions=["S1"], wrench_id="w-blue"
    )
    assert state.job_for("w-blue") is own
    red = state.job_for("w-red")
    assert red is not None
    assert red.program.id == "deck-m8"


def test_unknown_program_version_and_wrench_are_refused_with_codes() -> None:
    state = make_state()
    with pytest.raises(UnknownProgramError, match="nope") as e1:
        state.select(program_id="nope", part_id="P", joint_positions=["J1"])
    assert e1.value.code is ErrorCode.UNKNOWN_PROGRAM
    with pytest.raises(UnknownProgramError, match="has version 1"):
        state.select(
            program_id="spindle-m12", program_version=2, part_id="P", joint_positions=["J1"]
        )
    with pytest.raises(UnknownWrenchError) as e2:
        state.select(program_id="deck-m8", part_id="P", joint_positions=["J1"], wrench_id="w9")
    assert e2.value.code is ErrorCode.UNKNOWN_WRENCH
    assert state.job_for("w-blue") is None  # nothing changed


@pytest.mark.parametrize(
    "positions",
    [[], ["J1", "J1"], ["J/1"], ["J1"] * 65, "J1"],
    ids=["empty", "repeat", "slash", "too-many", "string"],
)
def test_bad_joint_lists_are_refused(positions: Any) -> None:
    state = make_state()
    with pytest.raises(BadJointListError):
        state.select(program_id="deck-m8", part_id="P", joint_positions=positions)


def test_wrench_fit_uses_rated_capacity_and_unit_conversion() -> None:
    """18 ft·lbf = 24.40 N·m (NIST SP 811) exceeds the 24 N·m wrench (ISO 6789-1 range)."""
    state = make_state()
    assert state.programs["spindle-m12"].target_torque_nm == pytest.approx(24.4047, abs=1e-3)
    with pytest.raises(WrenchNotFitError, match="w-red") as exc:
        state.select(
            program_id="spindle-m12", part_id="P", joint_positions=["S1"], wrench_id="w-red"
        )
    assert exc.value.code is ErrorCode.WRENCH_NOT_FIT
    # Station-wide it is allowed (the blue wrench fits), but the red one may not start.
    state.select(program_id="spindle-m12", part_id="P", joint_positions=["S1"])
    assert state.check_may_start("w-blue").program.id == "spindle-m12"
    with pytest.raises(WrenchNotFitError):
        state.check_may_start("w-red")


def test_locks_block_starting_but_not_selecting() -> None:
    state = make_state()
    state.select(program_id="deck-m8", part_id="P", joint_positions=["J1"])
    state.lock("w-red", "quality hold")
    with pytest.raises(WrenchLockedError, match="quality hold") as exc:
        state.check_may_start("w-red")
    assert exc.value.code is ErrorCode.LOCKED
    state.check_may_start("w-blue")
    state.lock(None)
    assert state.station_locked
    state.select(program_id="deck-m8", part_id="P2", joint_positions=["J1"])  # staging is fine
    state.unlock("w-red")
    assert state.is_locked("w-red")  # the station lock still holds
    state.unlock(None)
    assert not state.is_locked("w-red")
    assert not state.station_locked


def test_no_program_selected_means_no_start() -> None:
    with pytest.raises(UnknownProgramError, match="no program is selected"):
        make_state().check_may_start("w-blue")


def test_abort_only_where_a_rundown_runs_and_only_once() -> None:
    state = make_state()
    with pytest.raises(NothingToAbortError) as exc:
        state.request_abort(None)
    assert exc.value.code is ErrorCode.NOTHING_TO_ABORT
    state.rundown_started("w-blue")
    assert state.request_abort(None, "part missing") == ["w-blue"]
    assert state.take_abort("w-blue") == "part missing"
    assert state.take_abort("w-blue") is None
    state.request_abort("w-blue")
    state.rundown_ended("w-blue")
    assert state.take_abort("w-blue") is None  # void once the rundown ended
    with pytest.raises(NothingToAbortError):
        state.request_abort("w-red")


def test_selection_is_refused_mid_rundown() -> None:
    state = make_state()
    state.rundown_started("w-red")
    with pytest.raises(WrenchBusyError) as exc:
        state.select(program_id="deck-m8", part_id="P", joint_positions=["J1"], wrench_id="w-red")
    assert exc.value.code is ErrorCode.BUSY
    # The blue wrench is free; selecting for it alone is fine.
    state.select(program_id="deck-m8", part_id="P", joint_positions=["J1"], wrench_id="w-blue")


def test_listeners_hear_every_change_and_can_leave() -> None:
    state = make_state()
    heard: list[StateChange] = []
    leave = state.subscribe(heard.append)
    state.select(program_id="deck-m8", part_id="P", joint_positions=["J1"])
    state.lock("w-blue")
    state.rundown_started("w-blue")
    state.record_result("w-blue", ok=True)
    leave()
    state.unlock()
    assert [(c.kind, c.wrench_id) for c in heard] == [
        ("selection", None),
        ("lock", "w-blue"),
        ("rundown", "w-blue"),
        ("joint", "w-blue"),
    ]


def test_status_reflects_lock_and_last_selection() -> None:
    state = make_state()
    at = dt.datetime(2026, 5, 12, 7, 41, tzinfo=dt.UTC)
    empty = state.status(at, software_version="1.0")
    assert empty.state is LinkState.ONLINE
    assert empty.selection is None
    assert not empty.locked
    state.select(program_id="deck-m8", part_id="DK-7", joint_positions=["J1", "J2"])
    state.record_result("w-blue", ok=True)
    state.lock()
    status = state.status(at)
    assert status.locked
    assert status.selection is not None
    assert status.selection.part_id == "DK-7"
    assert status.selection.next_position == "J2"


@given(st.lists(st.booleans(), max_size=12), st.integers(min_value=1, max_value=8))
def test_results_mark_positions_in_order(results: list[bool], n: int) -> None:
    """Whatever the OK/NOK sequence: positions fill in order, next is the first pending."""
    state = make_state()
    positions = [f"J{i}" for i in range(n)]
    state.select(program_id="deck-m8", part_id="P", joint_positions=positions)
    marked = [state.record_result("w-blue", ok=ok) for ok in results]
    job = state.job_for("w-blue")
    assert job is not None
    k = min(len(results), n)
    assert marked[:k] == positions[:k]
    assert all(m is None for m in marked[k:])
    expected = [JointState.OK if ok else JointState.NOK for ok in results[:k]]
    assert [j.state for j in job.joints[:k]] == expected
    assert all(j.state is JointState.PENDING for j in job.joints[k:])
    assert job.next_position == (positions[k] if k < n else None)
