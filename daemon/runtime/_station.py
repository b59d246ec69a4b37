"""What the station is set to do: programs, selections, joint positions, locks, aborts.

Theory of operation
-------------------
``StationState`` is the one place that MES commands change and wrench workers read. It does no
I/O and knows nothing of asyncio, so every rule below is tested without a broker; the runtime
wires it up: the command handler calls the mutators, each wrench worker asks
``check_may_start(wrench_id)`` before it accepts a rundown and ``take_abort(wrench_id)`` while
one runs, and listeners (``subscribe``) hear of every change, e.g. to republish the retained
station status or to wake a worker.

Rules
-----
- Programs come from the station config, one version per id, each validated by the engine's
  ``program_from_mapping``. A selection may pin the version; a different one is refused.
- A selection applies to one wrench, or station-wide (``wrench_id`` None) to every wrench
  without a selection of its own. A new selection replaces the old one; it is refused while
  the wrench it applies to is in a rundown (changing the program mid-rundown would judge a
  half-done joint against the wrong windows).
- Joint positions are worked through in the order given. A result marks the next pending
  position OK or NOK and moves on. A NOK position is *not* offered again: re-tightening is not
  always allowed (a torque-to-yield bolt must be replaced), so the station leaves the NOK
  visible and the plant decides (common practice, no source).
- A station-wide lock locks every wrench; ``unlock`` of all lifts the station lock and every
  wrench lock, ``unlock`` of one wrench lifts only that wrench's own lock. Selecting while
  locked is allowed (the MES may stage the next part during a hold); starting is not.
- An abort is a request held for the wrench's worker until it takes it or the rundown ends.
  Asking to abort where no rundown runs is refused, so the MES learns that nothing happened.
- A program that asks more torque of a wrench than its rated capacity is refused for that
  wrench (``wrench_not_fit``); ISO 6789 calibrates a wrench over 20–100 % of its maximum, so
  beyond 100 % nothing is known about its readings. The planner's 80 % advice is a warning
  elsewhere, not a refusal here.

Every refusal is a ``StationStateError`` carrying the protocol's ``ErrorCode`` so a reply can
name it without a lookup table; nothing is changed when one is raised.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import enum
import re
from collections.abc import Callable, Iterable, Mapping, Sequence
from typing import Any, Literal

from clampd.daemon.engine import Program, program_from_mapping
from clampd.protocol import ErrorCode, Selection, StationStatus
from clampd.protocol import StationState as LinkState
from clampd.protocol._commands import MAX_JOINT_POSITIONS
from clampd.protocol._fields import IDENT_PATTERN

__all__ = [
    "BadJointListError",
    "Job",
    "JointSlot",
    "JointState",
    "NothingToAbortError",
    "StateChange",
    "StationState",
    "StationStateError",
    "UnknownProgramError",
    "UnknownWrenchError",
    "WrenchBusyError",
    "WrenchLockedError",
    "WrenchNotFitError",
]

_IDENT_RE = re.compile(IDENT_PATTERN)


class StationStateError(Exception):
    """A request the station refuses; ``code`` is the reply's machine-readable code."""

    code: ErrorCode = ErrorCode.INTERNAL


class UnknownProgramError(StationStateError):
    """No program with that id (or not in that version) on this station."""

    code = ErrorCode.UNKNOWN_PROGRAM


class UnknownWrenchError(StationStateError):
    """No wrench with that id is configured at this station."""

    code = ErrorCode.UNKNOWN_WRENCH


class BadJointListError(StationStateError):
    """The joint positions are empty, too many, repeated or not identifiers."""

    code = ErrorCode.INVALID_FIELDS


class WrenchLockedError(StationStateError):
    """The wrench (or the whole station) is locked."""

    code = ErrorCode.LOCKED


class WrenchBusyError(StationStateError):
    """The wrench is in a rundown; the request would change it midway."""

    code = ErrorCode.BUSY


class WrenchNotFitError(StationStateError):
    """The program needs more torque than the wrench's rated capacity."""

    code = ErrorCode.WRENCH_NOT_FIT


class NothingToAbortError(StationStateError):
    """No rundown runs on the wrench(es) named."""

    code = ErrorCode.NOTHING_TO_ABORT


class JointState(enum.StrEnum):
    """Where one joint position stands in the current part."""

    PENDING = "pending"
    OK = "ok"
    NOK = "nok"


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class JointSlot:
    """One joint position of the selected part and its state."""

    position: str
    state: JointState = JointState.PENDING


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Job:
    """A selection: program, part, joint positions (in order), and whom it applies to."""

    program: Program
    part_id: str
    joints: tuple[JointSlot, ...]
    wrench_id: str | None  # None: station-wide

    @property
    def next_position(self) -> str | None:
        """The first pending position; None when every position has a result."""
        return next((j.position for j in self.joints if j.state is JointState.PENDING), None)

    def selection(self) -> Selection:
        """The protocol's view of this job, for the station status."""
        return Selection(
            program_id=self.program.id,
            program_version=self.program.version,
            part_id=self.part_id,
            joint_positions=[j.position for j in self.joints],
            next_position=self.next_position,
        )


ChangeKind = Literal["selection", "joint", "lock", "unlock", "abort", "rundown"]


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class StateChange:
    """What changed, for listeners; ``wrench_id`` None means station-wide."""

    kind: ChangeKind
    wrench_id: str | None


Listener = Callable[[StateChange], None]


def _torque_demand_nm(program: Program) -> float | None:
    """The most torque the program drives the wrench to, when the program says."""
    demands = [program.target_torque_nm] + [s.target_torque_nm for s in program.steps]
    if program.torque_window_nm is not None:
        demands.append(program.torque_window_nm[1])
    known = [d for d in demands if d is not None]
    return max(known) if known else None


class StationState:
    """The station's working state; no I/O, not thread-safe, one event loop drives it.

    ``programs`` maps id to an engine ``Program``; ``wrenches`` maps wrench id to its rated
    capacity in N·m (None when unknown, then no fit check is made).
    """

    def __init__(
        self,
        station_id: str,
        programs: Mapping[str, Program],
        wrenches: Mapping[str, float | None],
    ) -> None:
        self.station_id = station_id
        self._programs = dict(programs)
        self._capacity = dict(wrenches)
        self._jobs: dict[str | None, Job] = {}
        self._last_job: Job | None = None
        self._station_lock: str | None = None  # the reason ("" when none was given)
        self._locks: dict[str, str] = {}
        self._running: set[str] = set()
        self._aborts: dict[str, str] = {}
        self._listeners: list[Listener] = []

    @classmethod
    def from_tables(
        cls,
        station_id: str,
        program_tables: Iterable[Mapping[str, Any]],
        wrenches: Mapping[str, float | None],
    ) -> StationState:
        """Build from ``[[program]]`` tables (raises the engine's ``ProgramError``)."""
        programs = {p.id: p for p in (program_from_mapping(t) for t in program_tables)}
        return cls(station_id, programs, wrenches)

    # -- reading ----------------------------------------------------------------------
    @property
    def programs(self) -> Mapping[str, Program]:
        """Programs by id."""
        return dict(self._programs)

    @property
    def wrench_ids(self) -> tuple[str, ...]:
        """Configured wrenches, in config order."""
        return tuple(self._capacity)

    def job_for(self, wrench_id: str) -> Job | None:
        """The selection a wrench works to: its own, else the station-wide one."""
        self._known(wrench_id)
        return self._jobs.get(wrench_id) or self._jobs.get(None)

    def is_locked(self, wrench_id: str) -> bool:
        """True when the wrench or the whole station is locked."""
        self._known(wrench_id)
        return self._station_lock is not None or wrench_id in self._locks

    @property
    def station_locked(self) -> bool:
        """True when a station-wide lock is set or every wrench is locked."""
        if self._station_lock is not None:
            return True
        return bool(self._capacity) and all(w in self._locks for w in self._capacity)

    def in_rundown(self, wrench_id: str) -> bool:
        """True between ``rundown_started`` and ``rundown_ended``."""
        return wrench_id in self._running

    def status(self, at: dt.datetime, *, software_version: str | None = None) -> StationStatus:
        """The retained ``online`` station status as of now (last selection shown)."""
        return StationStatus(
            station=self.station_id,
            state=LinkState.ONLINE,
            software_version=software_version,
            locked=self.station_locked,
            selection=self._last_job.selection() if self._last_job is not None else None,
            at=at,
        )

    # -- listeners --------------------------------------------------------------------
    def subscribe(self, listener: Listener) -> Callable[[], None]:
        """Call ``listener`` after every change; return a function that unsubscribes."""
        self._listeners.append(listener)
        return lambda: self._listeners.remove(listener)

    def _changed(self, kind: ChangeKind, wrench_id: str | None) -> None:
        change = StateChange(kind=kind, wrench_id=wrench_id)
        for listener in tuple(self._listeners):
            listener(change)

    # -- commands ---------------------------------------------------------------------
    def select(
        self,
        *,
        program_id: str,
        part_id: str,
        joint_positions: Sequence[str],
        program_version: int | None = None,
        wrench_id: str | None = None,
    ) -> Job:
        """Select program, part and joint positions for one wrench or station-wide."""
        program = self._programs.get(program_id)
        if program is None:
            known = ", ".join(sorted(self._programs)) or "none"
            raise UnknownProgramError(f"no program {program_id!r} (this station has: {known})")
        if program_version is not None and program_version != program.version:
            raise UnknownProgramError(
                f"program {program_id!r} version {program_version} is not on this station "
                f"(it has version {program.version})"
            )
        joints = self._joint_list(joint_positions)
        affected = (wrench_id,) if wrench_id is not None else self.wrench_ids
        if wrench_id is not None:
            self._known(wrench_id)
        busy = [
            w
            for w in affected
            if w in self._running and (wrench_id is not None or w not in self._jobs)
        ]
        if busy:
            raise WrenchBusyError(f"wrench {', '.join(busy)} is in a rundown")
        self._check_fit(program, affected)
        job = Job(program=program, part_id=part_id, joints=joints, wrench_id=wrench_id)
        self._jobs[wrench_id] = job
        self._last_job = job
        self._changed("selection", wrench_id)
        return job

    def lock(self, wrench_id: str | None = None, reason: str | None = None) -> None:
        """Lock one wrench, or the whole station when ``wrench_id`` is None."""
        if wrench_id is None:
            self._station_lock = reason or ""
        else:
            self._known(wrench_id)
            self._locks[wrench_id] = reason or ""
        self._changed("lock", wrench_id)

    def unlock(self, wrench_id: str | None = None) -> None:
        """Lift one wrench's own lock, or every lock when ``wrench_id`` is None."""
        if wrench_id is None:
            self._station_lock = None
            self._locks.clear()
        else:
            self._known(wrench_id)
            self._locks.pop(wrench_id, None)
        self._changed("unlock", wrench_id)

    def request_abort(self, wrench_id: str | None = None, reason: str | None = None) -> list[str]:
        """Ask the running rundown(s) to end NOK; return the wrenches asked."""
        if wrench_id is not None:
            self._known(wrench_id)
            targets = [wrench_id] if wrench_id in self._running else []
        else:
            targets = [w for w in self.wrench_ids if w in self._running]
        if not targets:
            where = f"wrench {wrench_id}" if wrench_id is not None else "any wrench"
            raise NothingToAbortError(f"no rundown is running on {where}")
        for w in targets:
            self._aborts[w] = reason or ""
            self._changed("abort", w)
        return targets

    # -- wrench workers ---------------------------------------------------------------
    def check_may_start(self, wrench_id: str) -> Job:
        """The job a new rundown on ``wrench_id`` works to; raise if it may not start."""
        if self.is_locked(wrench_id):
            reason = self._locks.get(wrench_id) or self._station_lock or "no reason given"
            raise WrenchLockedError(f"wrench {wrench_id} is locked ({reason})")
        job = self.job_for(wrench_id)
        if job is None:
            raise UnknownProgramError(f"no program is selected for wrench {wrench_id}")
        self._check_fit(job.program, (wrench_id,))
        return job

    def rundown_started(self, wrench_id: str) -> None:
        """A rundown began on ``wrench_id`` (its selection can no longer change)."""
        self._known(wrench_id)
        self._running.add(wrench_id)
        self._changed("rundown", wrench_id)

    def rundown_ended(self, wrench_id: str) -> None:
        """The rundown on ``wrench_id`` ended; a pending abort for it is void."""
        self._known(wrench_id)
        self._running.discard(wrench_id)
        self._aborts.pop(wrench_id, None)
        self._changed("rundown", wrench_id)

    def take_abort(self, wrench_id: str) -> str | None:
        """The abort reason asked for ``wrench_id`` ("" when none was given), once."""
        self._known(wrench_id)
        return self._aborts.pop(wrench_id, None)

    def record_result(self, wrench_id: str, *, ok: bool) -> str | None:
        """Mark the next pending position of the wrench's job; return it (None: no job or
        every position done, the result then names no position)."""
        job = self.job_for(wrench_id)
        if job is None or job.next_position is None:
            return None
        position = job.next_position
        state = JointState.OK if ok else JointState.NOK
        joints = tuple(
            dataclasses.replace(j, state=state) if j.position == position else j for j in job.joints
        )
        updated = dataclasses.replace(job, joints=joints)
        self._jobs[job.wrench_id] = updated
        if self._last_job is job:
            self._last_job = updated
        self._changed("joint", wrench_id)
        return position

    # -- checks -----------------------------------------------------------------------
    def _known(self, wrench_id: str) -> None:
        if wrench_id not in self._capacity:
            known = ", ".join(self._capacity) or "none"
            raise UnknownWrenchError(f"no wrench {wrench_id!r} at this station (known: {known})")

    def _check_fit(self, program: Program, wrenches: Sequence[str]) -> None:
        demand = _torque_demand_nm(program)
        if demand is None or not wrenches:
            return
        unfit = [w for w in wrenches if (cap := self._capacity.get(w)) is not None and demand > cap]
        if unfit and len(unfit) == len(wrenches):
            raise WrenchNotFitError(
                f"program {program.id!r} needs {demand:g} N·m, above the rated capacity of "
                f"wrench {', '.join(unfit)}"
            )

    @staticmethod
    def _joint_list(positions: Sequence[str]) -> tuple[JointSlot, ...]:
        if isinstance(positions, str):
            raise BadJointListError("joint positions must be a list, not one string")
        if not 1 <= len(positions) <= MAX_JOINT_POSITIONS:
            raise BadJointListError(
                f"{len(positions)} joint positions; 1 to {MAX_JOINT_POSITIONS} accepted"
            )
        bad = [p for p in positions if not isinstance(p, str) or not _IDENT_RE.fullmatch(p)]
        if bad:
            raise BadJointListError(f"joint positions {bad[:3]!r} are not identifiers")
        if len(set(positions)) != len(positions):
            raise BadJointListError("joint positions repeat")
        return tuple(JointSlot(position=p) for p in positions)
