"""The station's condition alarms: what is raised when, and cleared when (pure, no I/O).

Theory of operation
-------------------
``AlarmEvaluator.feed(observation)`` takes one observation of the station and returns the
``Alarm`` payloads it raises or clears, in order. It never reads the clock, sleeps or
publishes: the runtime (``_quality.py``) stamps every observation with the UTC time it was
made, feeds it, and publishes what comes back. One instance per station.

Observations (a closed set, ``Observation``):

=====================  =====================================================================
``LinkSeen``           a wrench's link is up or down (from its retained status)
``BatteryReading``     a wrench's battery level, percent (only while its link is up)
``CalibrationCheck``   a wrench's calibration due date against today (at start, then hourly)
``ResultStored``       a result the station stored (each result once)
``OutboxLevel``        how many results wait for the broker, and how long the oldest has
``Tick``               time passes (a lost link becomes an alarm after a while)
=====================  =====================================================================

Rules (thresholds from ``AlarmsConfig``, the station file's ``[alarms]`` table):

- ``wrench_lost`` (warning): the link of a wrench that was connected since the station
  started has been down for ``wrench_lost_after_s``; cleared when it is back. A wrench not
  yet seen since start raises nothing (tools resting in a cradle or kept as spares would
  raise alarms all shift): its retained status says ``connected: false``.
- ``battery_low`` (warning): a reading at or below ``battery_low_pct``; cleared by a reading
  at or above ``battery_ok_pct``. Readings in between change nothing (hysteresis).
- ``nok_streak`` (critical): ``nok_streak`` NOK results in a row of one wrench on one
  program; cleared by the next OK result of that pair. Every NOK counts, whatever its
  reason (the text lists them).
- ``outbox_backlog`` (warning): more than ``outbox_backlog_count`` results unsent, or the
  oldest unsent older than ``outbox_backlog_age_s``; cleared when nothing is unsent.
- ``calibration_due_soon`` (info) from ``calibration_due_soon_days`` before the due date
  through the due date itself; ``calibration_overdue`` (critical) from the day after. The
  step from one to the other clears the first and raises the second; a due date moved
  (a new certificate in the station file) clears what no longer holds.

Invariants: every alarm is raised once and cleared once under the same id; the same
condition never has two raised alarms at a time. Ids are UUIDv7 (RFC 9562 §5.7). Where the
cause can be read back after a restart they are derived from it, so the station raises the
same alarm under the same id again: ``nok_streak`` from the result that completed the
streak (the journal is replayed at start), the calibration alarms from the wrench and its
due date. The others carry a counter and the time.

Severity is our choice per code: ``critical`` where rundowns are being judged NOK or refused
(overdue calibration, a NOK streak), ``warning`` where work stops soon or results are not
reaching the MES, ``info`` for advance notice.

Alarms support, never replace, the joint designer's specification, local codes and
licensed practice: a station without alarms may still be tightening to the wrong program.
"""

from __future__ import annotations

import collections
import dataclasses
import datetime as dt
import hashlib
import math
import uuid
from typing import Final, assert_never

from clampd.daemon.runtime._config import AlarmsConfig, CalibrationState, calibration_state
from clampd.protocol import (
    Alarm,
    AlarmCode,
    AlarmSeverity,
    AlarmState,
    Judgement,
    RundownResult,
)

__all__ = [
    "SEVERITY",
    "AlarmEvaluator",
    "AlarmInputError",
    "BatteryReading",
    "CalibrationCheck",
    "LinkSeen",
    "Observation",
    "OutboxLevel",
    "ResultStored",
    "Tick",
]

SEVERITY: Final[dict[AlarmCode, AlarmSeverity]] = {
    AlarmCode.CALIBRATION_OVERDUE: AlarmSeverity.CRITICAL,
    AlarmCode.CALIBRATION_DUE_SOON: AlarmSeverity.INFO,
    AlarmCode.NOK_STREAK: AlarmSeverity.CRITICAL,
    AlarmCode.WRENCH_LOST: AlarmSeverity.WARNING,
    AlarmCode.BATTERY_LOW: AlarmSeverity.WARNING,
    AlarmCode.OUTBOX_BACKLOG: AlarmSeverity.WARNING,
    AlarmCode.TREND_DRIFT: AlarmSeverity.WARNING,  # raised by clampd.daemon.quality
}
"""The severity of each code (our choice, module docstring)."""

_EPOCH = dt.datetime(1970, 1, 1, tzinfo=dt.UTC)
_MS = dt.timedelta(milliseconds=1)
# Alarm.text is at most 500 characters (protocol/_fields.py Text); ours stay near 300.
_TEXT_MAX = 500


class AlarmInputError(ValueError):
    """An observation that cannot be true (the caller's fault); nothing changes then."""


def _utc(at: dt.datetime, what: str) -> None:
    if at.tzinfo is None or at.utcoffset() != dt.timedelta(0):
        raise AlarmInputError(f"{what}: time must be timezone-aware UTC, got {at!r}")


def _ident(value: str, what: str) -> None:
    if not value:
        raise AlarmInputError(f"{what}: wrench id must not be empty")


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class LinkSeen:
    """The link of ``wrench_id`` is up (``connected``) or down, as seen at ``at`` (UTC)."""

    wrench_id: str
    connected: bool
    at: dt.datetime

    def __post_init__(self) -> None:
        _ident(self.wrench_id, "LinkSeen")
        _utc(self.at, "LinkSeen")


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class BatteryReading:
    """A battery level of ``wrench_id`` in percent (0–100), read at ``at`` (UTC)."""

    wrench_id: str
    pct: int
    at: dt.datetime

    def __post_init__(self) -> None:
        _ident(self.wrench_id, "BatteryReading")
        _utc(self.at, "BatteryReading")
        if isinstance(self.pct, bool) or not 0 <= self.pct <= 100:
            raise AlarmInputError(f"BatteryReading: pct must be 0..100, got {self.pct!r}")


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class CalibrationCheck:
    """``wrench_id``'s calibration ``due`` date (None: none recorded) against ``today``.

    ``blocked`` says whether the station refuses rundowns on an overdue wrench (its config's
    ``block_when_calibration_overdue``); it only changes the alarm's text.
    """

    wrench_id: str
    due: dt.date | None
    today: dt.date
    at: dt.datetime
    blocked: bool = True

    def __post_init__(self) -> None:
        _ident(self.wrench_id, "CalibrationCheck")
        _utc(self.at, "CalibrationCheck")


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ResultStored:
    """A result the station stored (hand each result over once; a repeat is ignored)."""

    result: RundownResult


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class OutboxLevel:
    """``unsent`` results wait for the broker; the oldest has waited ``oldest_age_s``
    (None when nothing waits)."""

    unsent: int
    oldest_age_s: float | None
    at: dt.datetime

    def __post_init__(self) -> None:
        _utc(self.at, "OutboxLevel")
        if self.unsent < 0:
            raise AlarmInputError(f"OutboxLevel: unsent must be >= 0, got {self.unsent}")
        age = self.oldest_age_s
        if age is not None and not math.isfinite(age):
            raise AlarmInputError(f"OutboxLevel: oldest_age_s must be finite, got {age!r}")


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Tick:
    """Time has passed; ``at`` is now (UTC)."""

    at: dt.datetime

    def __post_init__(self) -> None:
        _utc(self.at, "Tick")


Observation = LinkSeen | BatteryReading | CalibrationCheck | ResultStored | OutboxLevel | Tick


@dataclasses.dataclass(slots=True)
class _Link:
    seen_up: bool = False
    down_since: dt.datetime | None = None
    alarm_id: str | None = None


# Result ids remembered per wrench × program to count a result delivered twice once; the
# runtime hands over each stored result once anyway (the outbox refuses a repeat), so a
# short memory is only a safety net (our choice).
_RECENT_IDS = 64


@dataclasses.dataclass(slots=True)
class _Streak:
    count: int = 0
    recent: collections.deque[str] = dataclasses.field(
        default_factory=lambda: collections.deque(maxlen=_RECENT_IDS)
    )
    reasons: collections.Counter[str] = dataclasses.field(default_factory=collections.Counter)
    last_ok: str | None = None
    alarm_id: str | None = None


def _alarm_id(at: dt.datetime, *parts: str) -> str:
    """A UUIDv7 (RFC 9562 §5.7): ``at`` in its time field, a hash of ``parts`` in the rest.

    Deterministic, so a cause read back after a restart gives the same id; the parts make it
    unique (a result id, a due date, or the evaluator's counter).
    """
    ms = (at - _EPOCH) // _MS
    digest = hashlib.sha256("|".join(parts).encode()).digest()
    rand_a = int.from_bytes(digest[:2], "big") & 0xFFF
    rand_b = int.from_bytes(digest[2:10], "big") & ((1 << 62) - 1)
    value = (ms & ((1 << 48) - 1)) << 80 | 0x7 << 76 | rand_a << 64 | 0b10 << 62 | rand_b
    return str(uuid.UUID(int=value))


def _midnight(day: dt.date) -> dt.datetime:
    return dt.datetime(day.year, day.month, day.day, tzinfo=dt.UTC)


def _clock(at: dt.datetime) -> str:
    return at.strftime("%Y-%m-%d %H:%M:%SZ")


def _duration(seconds: float) -> str:
    if seconds < 120:
        return f"{seconds:.0f} s"
    if seconds < 7200:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


class AlarmEvaluator:
    """Raise and clear the station's condition alarms from observations (module doc).

    Pure and deterministic: the same observations in the same order give the same alarms.
    """

    def __init__(self, station: str, settings: AlarmsConfig | None = None) -> None:
        self.station = station
        self.settings = settings or AlarmsConfig()
        self._links: dict[str, _Link] = {}
        self._battery: dict[str, str] = {}  # wrench → id of its raised battery_low
        self._calibration: dict[str, tuple[AlarmCode, dt.date, str]] = {}
        self._calibration_raises: collections.Counter[tuple[AlarmCode, str, dt.date]] = (
            collections.Counter()
        )
        self._streaks: dict[tuple[str, str], _Streak] = {}
        self._backlog: str | None = None
        self._active: dict[str, Alarm] = {}  # id → its raised payload
        self._counter = 0

    # -- the one entry point -------------------------------------------------------------

    def feed(self, observation: Observation) -> list[Alarm]:
        """Take one observation; return the alarms it raises and clears, in order.

        Impossible data never gets this far: the observation types raise
        ``AlarmInputError`` when they are built. Anything that is not an ``Observation`` is
        our own misuse (``AssertionError``).
        """
        match observation:
            case LinkSeen():
                return self._link(observation)
            case BatteryReading():
                return self._battery_reading(observation)
            case CalibrationCheck():
                return self._calibration_check(observation)
            case ResultStored():
                return self._result(observation.result)
            case OutboxLevel():
                return self._outbox(observation)
            case Tick():
                return self._tick(observation.at)
            case _:
                assert_never(observation)

    # -- read-only state -------------------------------------------------------------------

    def active(self) -> list[Alarm]:
        """The ``raised`` payload of every alarm not cleared yet, oldest raise first."""
        return list(self._active.values())

    def next_deadline(self) -> dt.datetime | None:
        """The earliest time at which a ``Tick`` would raise something (a lost wrench), or
        None when no link is down and waiting to become an alarm."""
        after = dt.timedelta(seconds=self.settings.wrench_lost_after_s)
        pending = [
            link.down_since + after
            for link in self._links.values()
            if link.down_since is not None and link.alarm_id is None
        ]
        return min(pending, default=None)

    # -- wrench_lost ---------------------------------------------------------------------

    def _link(self, obs: LinkSeen) -> list[Alarm]:
        link = self._links.setdefault(obs.wrench_id, _Link())
        if obs.connected:
            out: list[Alarm] = []
            if link.alarm_id is not None:
                down = link.down_since
                gone = "" if down is None else f" after {_duration(_seconds(obs.at, down))}"
                out.append(
                    self._clear(
                        link.alarm_id,
                        obs.at,
                        f"Wrench {obs.wrench_id} is connected again{gone}.",
                    )
                )
            link.seen_up, link.down_since, link.alarm_id = True, None, None
            return out
        if link.seen_up and link.down_since is None:
            link.down_since = obs.at
        return self._tick(obs.at)

    def _tick(self, at: dt.datetime) -> list[Alarm]:
        out: list[Alarm] = []
        limit = self.settings.wrench_lost_after_s
        for wrench_id, link in sorted(self._links.items()):
            down = link.down_since
            if down is None or link.alarm_id is not None or _seconds(at, down) < limit:
                continue
            self._counter += 1
            alarm_id = _alarm_id(at, "wrench_lost", wrench_id, down.isoformat(), str(self._counter))
            link.alarm_id = alarm_id
            text = (
                f"Wrench {wrench_id} has had no link since {_clock(down)} "
                f"({_duration(_seconds(at, down))}); no rundown can be recorded with it. Check "
                "that it is switched on, charged and within radio range of the station."
            )
            out.append(self._raise(AlarmCode.WRENCH_LOST, alarm_id, at, text, wrench_id=wrench_id))
        return out

    # -- battery_low -----------------------------------------------------------------------

    def _battery_reading(self, obs: BatteryReading) -> list[Alarm]:
        s = self.settings
        alarm_id = self._battery.get(obs.wrench_id)
        if alarm_id is None and obs.pct <= s.battery_low_pct:
            self._counter += 1
            alarm_id = _alarm_id(
                obs.at, "battery_low", obs.wrench_id, obs.at.isoformat(), str(self._counter)
            )
            self._battery[obs.wrench_id] = alarm_id
            text = (
                f"Wrench {obs.wrench_id} battery at {obs.pct} % (alarm at or below "
                f"{s.battery_low_pct} %): finish the joint in hand and swap or charge the "
                "battery before the next job."
            )
            return [
                self._raise(AlarmCode.BATTERY_LOW, alarm_id, obs.at, text, wrench_id=obs.wrench_id)
            ]
        if alarm_id is not None and obs.pct >= s.battery_ok_pct:
            del self._battery[obs.wrench_id]
            text = f"Wrench {obs.wrench_id} battery at {obs.pct} % again."
            return [self._clear(alarm_id, obs.at, text)]
        return []

    # -- calibration -------------------------------------------------------------------------

    def _calibration_check(self, obs: CalibrationCheck) -> list[Alarm]:
        wanted: tuple[AlarmCode, dt.date] | None = None
        if obs.due is not None:
            state = calibration_state(
                obs.due, obs.today, soon_days=self.settings.calibration_due_soon_days
            )
            if state is CalibrationState.OVERDUE:
                wanted = (AlarmCode.CALIBRATION_OVERDUE, obs.due)
            elif state is CalibrationState.DUE_SOON:
                wanted = (AlarmCode.CALIBRATION_DUE_SOON, obs.due)
        current = self._calibration.get(obs.wrench_id)
        if current is not None and current[:2] == wanted:
            return []
        out: list[Alarm] = []
        if current is not None:
            del self._calibration[obs.wrench_id]
            code, due, alarm_id = current
            if wanted is not None and wanted[0] is AlarmCode.CALIBRATION_OVERDUE and due == obs.due:
                why = f"it is now overdue (due {due})"
            elif obs.due is None:
                why = "no calibration due date is recorded any more"
            else:
                why = f"the calibration due date is now {obs.due}"
            out.append(
                self._clear(alarm_id, obs.at, f"Wrench {obs.wrench_id}: {code.value} ended, {why}.")
            )
        if wanted is not None:
            code, due = wanted
            if code is AlarmCode.CALIBRATION_OVERDUE:
                since = _midnight(due + dt.timedelta(days=1))
                action = (
                    "rundowns on it are refused (recorded NOK)"
                    if obs.blocked
                    else "its results carry the overdue state"
                )
                text = (
                    f"Wrench {obs.wrench_id}: calibration was due on {due}; {action}. Have it "
                    "calibrated and record the new due date in the station file."
                )
            else:
                since = _midnight(due - dt.timedelta(days=self.settings.calibration_due_soon_days))
                text = (
                    f"Wrench {obs.wrench_id}: calibration due on {due} "
                    f"({(due - obs.today).days} day(s) left); arrange a calibration slot or a "
                    "replacement tool."
                )
            # The first raise of this code for this due date in a run has the id a restart
            # gives it again; a raise after that (the date moved away and back) a new one.
            again = self._calibration_raises[(code, obs.wrench_id, due)]
            self._calibration_raises[(code, obs.wrench_id, due)] += 1
            alarm_id = _alarm_id(since, code.value, obs.wrench_id, due.isoformat(), str(again))
            self._calibration[obs.wrench_id] = (code, due, alarm_id)
            out.append(self._raise(code, alarm_id, obs.at, text, wrench_id=obs.wrench_id))
        return out

    # -- nok_streak ----------------------------------------------------------------------------

    def _result(self, result: RundownResult) -> list[Alarm]:
        wrench_id, program_id = result.wrench.wrench_id, result.program.program_id
        streak = self._streaks.setdefault((wrench_id, program_id), _Streak())
        if result.id in streak.recent or result.id == streak.last_ok:
            return []  # delivered again: counted once
        at = result.finished_at
        if result.status is Judgement.OK:
            out: list[Alarm] = []
            if streak.alarm_id is not None:
                text = (
                    f"Wrench {wrench_id} on program {program_id}: OK again after "
                    f"{streak.count} NOK in a row (result {result.id})."
                )
                out.append(self._clear(streak.alarm_id, at, text))
            self._streaks[(wrench_id, program_id)] = _Streak(last_ok=result.id)
            return out
        streak.count += 1
        streak.recent.append(result.id)
        streak.reasons.update(r.value for r in result.reasons)
        n = self.settings.nok_streak
        if streak.alarm_id is not None or streak.count < n:
            return []
        streak.alarm_id = _alarm_id(at, "nok_streak", wrench_id, program_id, result.id)
        reasons = ", ".join(f"{k} ×{v}" for k, v in sorted(streak.reasons.items()))
        text = (
            f"Wrench {wrench_id} on program {program_id}: {n} NOK results in a row "
            f"(reasons: {reasons or 'none given'}). Stop and check the tool, the parts and the "
            "program against the joint designer's specification before going on."
        )
        return [
            self._raise(
                AlarmCode.NOK_STREAK,
                streak.alarm_id,
                at,
                text,
                wrench_id=wrench_id,
                program_id=program_id,
            )
        ]

    # -- outbox_backlog ----------------------------------------------------------------------

    def _outbox(self, obs: OutboxLevel) -> list[Alarm]:
        s = self.settings
        age = obs.oldest_age_s
        if self._backlog is None:
            too_many = obs.unsent > s.outbox_backlog_count
            too_old = obs.unsent > 0 and age is not None and age > s.outbox_backlog_age_s
            if not (too_many or too_old):
                return []
            self._counter += 1
            self._backlog = _alarm_id(
                obs.at, "outbox_backlog", obs.at.isoformat(), str(self._counter)
            )
            oldest = "" if age is None else f", the oldest for {_duration(age)}"
            text = (
                f"{obs.unsent} result(s) wait in the outbox{oldest}: the MES is not receiving "
                "this station's results. They are kept on disk and go out once the broker is "
                "reachable; check the network and the broker."
            )
            return [self._raise(AlarmCode.OUTBOX_BACKLOG, self._backlog, obs.at, text)]
        if obs.unsent == 0:
            alarm_id, self._backlog = self._backlog, None
            return [self._clear(alarm_id, obs.at, "The outbox is drained: every result went out.")]
        return []

    # -- building payloads -------------------------------------------------------------------

    def _raise(
        self,
        code: AlarmCode,
        alarm_id: str,
        at: dt.datetime,
        text: str,
        *,
        wrench_id: str | None = None,
        program_id: str | None = None,
    ) -> Alarm:
        alarm = Alarm(
            id=alarm_id,
            station=self.station,
            code=code,
            severity=SEVERITY[code],
            state=AlarmState.RAISED,
            text=text[:_TEXT_MAX],
            wrench_id=wrench_id,
            program_id=program_id,
            at=at,
        )
        self._active[alarm_id] = alarm
        return alarm

    def _clear(self, alarm_id: str, at: dt.datetime, text: str) -> Alarm:
        raised = self._active.pop(alarm_id)
        return Alarm(
            id=alarm_id,
            station=self.station,
            code=raised.code,
            severity=raised.severity,
            state=AlarmState.CLEARED,
            text=text[:_TEXT_MAX],
            wrench_id=raised.wrench_id,
            program_id=raised.program_id,
            at=at,
        )


def _seconds(at: dt.datetime, since: dt.datetime) -> float:
    return (at - since).total_seconds()
