"""The station's condition alarms: the evaluator's raise, clear and hysteresis rules, the quality
feed over a real SQLite outbox, and the running station against the real mosquitto broker
with the virtual GATT wrenches.

Sources beside the checks:
- protocol/MQTT.md and protocol/_payloads.py (our published contract): an alarm is raised once
  and cleared once under the same id (``AlarmState``); ids are UUIDv7 (RFC 9562 §5.7);
  every payload validates against the JSON Schema that ``clampd schema`` prints;
- RFC 9562 §5.7 for the UUIDv7 layout (version 7, variant 0b10, 48-bit Unix milliseconds);
- a raise level apart from the clear level so that a reading near a threshold does not
  flap (a comparator with hysteresis: common practice, no source);
- the calendar: a due date is still usable, the day after it is overdue (the station's rule
  in daemon/runtime/_config.py ``calibration_state``; our choice), with dates counted by
  ``datetime.date`` arithmetic (the Python standard library as reference);
- thresholds: the documented defaults of ``[alarms]`` (our choice, reasons in _config.py).

The station, wrenches and joints are the demo scenario's invented data, for testing software
only; real joints follow the joint designer's specification, local codes and licensed practice.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import datetime as dt
import json
import subprocess
import sys
import uuid
from collections.abc import AsyncIterator, Iterable
from importlib import resources
from pathlib import Path
from typing import Any

import aiomqtt
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from test_e2e_station import CAPACITY_NM, GROUPS, SCENARIO, technician

from clampd.daemon.runtime import AsyncOutbox, NullCuePlayer, parse_config
from clampd.daemon.runtime._alarms import (
    SEVERITY,
    AlarmEvaluator,
    AlarmInputError,
    BatteryReading,
    CalibrationCheck,
    LinkSeen,
    Observation,
    OutboxLevel,
    ResultStored,
    Tick,
)
from clampd.daemon.runtime._config import AlarmsConfig, ConfigError, WrenchConfig
from clampd.daemon.runtime._quality import QualityFeed
from clampd.daemon.runtime._results import OutboxResultSink
from clampd.daemon.runtime._supervisor import Station
from clampd.protocol import Alarm, AlarmCode, RundownResult, Topics, new_uuid7
from clampd.simulators import OperatorParams
from clampd.simulators import _station_rig as station_rig
from clampd.simulators._broker import LocalBroker
from clampd.simulators._mes import MesStandIn, ReceivedResult
from clampd.simulators._station_rig import eventually, station_overrides, wait_until_ready

T0 = dt.datetime(2026, 5, 12, 7, 0, tzinfo=dt.UTC)
STATION = "st-120"


def at(seconds: float) -> dt.datetime:
    return T0 + dt.timedelta(seconds=seconds)


@pytest.fixture(scope="module")
def alarm_schema() -> dict[str, Any]:
    """The Alarm schema exactly as an integrator gets it: ``clampd schema Alarm``."""
    out = subprocess.run(
        [sys.executable, "-m", "clampd.daemon.cli", "schema", "Alarm"],
        check=True,
        capture_output=True,
        text=True,
    )
    schema: dict[str, Any] = json.loads(out.stdout)
    return schema


def schema_errors(schema: dict[str, Any], alarms: Iterable[Alarm | dict[str, Any]]) -> list[str]:
    """Every way the alarms, as JSON on the wire, break the published schema."""
    from jsonschema import Draft202012Validator

    validator = Draft202012Validator(schema)
    errors = []
    for a in alarms:
        doc = json.loads(a.to_json_bytes()) if isinstance(a, Alarm) else a
        errors += [
            f"{doc.get('code')}/{doc.get('state')}: {e.message}" for e in validator.iter_errors(doc)
        ]
    return errors


def feed_all(ev: AlarmEvaluator, observations: Iterable[Observation]) -> list[Alarm]:
    out: list[Alarm] = []
    for obs in observations:
        out += ev.feed(obs)
    return out


def _example() -> dict[str, Any]:
    text = resources.files("clampd.protocol").joinpath("examples/RundownResult.json").read_text()
    data: dict[str, Any] = json.loads(text)
    return data


_EXAMPLE = _example()


def result(
    ok: bool,
    seconds: float,
    *,
    wrench: str = "wr-07",
    program: str = "spindle-m10-8.8",
    reason: str = "angle_high",
) -> RundownResult:
    """The shipped example result, judged as asked, finishing ``seconds`` after T0."""
    data = json.loads(json.dumps(_EXAMPLE))
    data["id"] = new_uuid7()
    data["wrench"]["wrench_id"] = wrench
    data["program"]["program_id"] = program
    data["status"] = "OK" if ok else "NOK"
    data["reasons"] = [] if ok else [reason]
    data["started_at"] = (at(seconds) - dt.timedelta(seconds=2)).isoformat()
    data["finished_at"] = at(seconds).isoformat()
    return RundownResult.model_validate_json(json.dumps(data))


def is_uuid7(value: str) -> bool:
    u = uuid.UUID(value)
    return u.version == 7 and u.variant == uuid.RFC_4122


# -- wrench_lost -------------------------------------------------------------------------------


def test_wrench_lost_after_the_link_was_down_long_enough_and_cleared_at_reconnect(
    alarm_schema: dict[str, Any],
) -> None:
    ev = AlarmEvaluator(STATION, AlarmsConfig(wrench_lost_after_s=30.0))
    assert ev.feed(LinkSeen(wrench_id="wr-07", connected=True, at=at(0))) == []
    assert ev.feed(LinkSeen(wrench_id="wr-07", connected=False, at=at(10))) == []
    assert ev.next_deadline() == at(40)
    assert ev.feed(Tick(at=at(39.9))) == []  # 29.9 s down: not yet
    [raised] = ev.feed(Tick(at=at(40)))
    assert (raised.code, raised.state, raised.wrench_id) == ("wrench_lost", "raised", "wr-07")
    assert raised.severity == SEVERITY[AlarmCode.WRENCH_LOST] == "warning"
    assert raised.at == at(40)
    assert is_uuid7(raised.id)
    assert ev.next_deadline() is None
    assert ev.feed(Tick(at=at(100))) == []  # raised once
    assert ev.feed(LinkSeen(wrench_id="wr-07", connected=False, at=at(101))) == []
    [cleared] = ev.feed(LinkSeen(wrench_id="wr-07", connected=True, at=at(120)))
    assert (cleared.id, cleared.state, cleared.at) == (raised.id, "cleared", at(120))
    assert ev.active() == []
    assert schema_errors(alarm_schema, [raised, cleared]) == []


def test_a_short_drop_raises_nothing_and_a_wrench_never_seen_raises_nothing() -> None:
    ev = AlarmEvaluator(STATION, AlarmsConfig(wrench_lost_after_s=30.0))
    out = feed_all(
        ev,
        [
            LinkSeen(wrench_id="spare", connected=False, at=at(0)),  # never connected
            LinkSeen(wrench_id="wr-07", connected=True, at=at(0)),
            LinkSeen(wrench_id="wr-07", connected=False, at=at(1)),
            Tick(at=at(20)),
            LinkSeen(wrench_id="wr-07", connected=True, at=at(29)),  # back before 30 s
            Tick(at=at(3600)),
        ],
    )
    assert out == []
    # The next drop counts from its own start, not from the first one.
    ev.feed(LinkSeen(wrench_id="wr-07", connected=False, at=at(4000)))
    assert ev.feed(Tick(at=at(4029))) == []
    assert [a.code for a in ev.feed(Tick(at=at(4030)))] == ["wrench_lost"]


# -- battery_low -------------------------------------------------------------------------------


def test_battery_low_raised_at_the_low_level_and_cleared_only_at_the_ok_level() -> None:
    ev = AlarmEvaluator(STATION, AlarmsConfig(battery_low_pct=15, battery_ok_pct=25))

    def reading(pct: int, s: float) -> list[Alarm]:
        return ev.feed(BatteryReading(wrench_id="wr-11", pct=pct, at=at(s)))

    assert reading(80, 0) == []
    assert reading(16, 1) == []
    [raised] = reading(15, 2)
    assert (raised.code, raised.severity, raised.wrench_id) == ("battery_low", "warning", "wr-11")
    # Wobbling between the two levels changes nothing.
    assert [reading(p, 3 + i) for i, p in enumerate([14, 20, 24, 16, 12, 24])] == [[]] * 6
    [cleared] = reading(25, 10)
    assert (cleared.id, cleared.state) == (raised.id, "cleared")
    [again] = reading(10, 11)
    assert again.state == "raised"
    assert again.id != raised.id


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 100), max_size=60))
def test_battery_alarm_follows_a_comparator_with_hysteresis(readings: list[int]) -> None:
    low, ok = 15, 25
    ev = AlarmEvaluator(STATION, AlarmsConfig(battery_low_pct=low, battery_ok_pct=ok))
    active = False  # the reference comparator (common practice, no source)
    open_id: str | None = None
    for i, pct in enumerate(readings):
        out = ev.feed(BatteryReading(wrench_id="wr-07", pct=pct, at=at(i)))
        want_raise = not active and pct <= low
        want_clear = active and pct >= ok
        assert [a.state for a in out] == (
            ["raised"] if want_raise else ["cleared"] if want_clear else []
        )
        if want_raise:
            active, open_id = True, out[0].id
        elif want_clear:
            assert out[0].id == open_id
            active, open_id = False, None
    assert [a.id for a in ev.active()] == ([] if open_id is None else [open_id])


# -- nok_streak --------------------------------------------------------------------------------


def test_nok_streak_after_n_in_a_row_of_one_wrench_and_program_cleared_by_the_next_ok(
    alarm_schema: dict[str, Any],
) -> None:
    ev = AlarmEvaluator(STATION, AlarmsConfig(nok_streak=3))
    first, second, third = (result(False, s) for s in (1, 2, 3))
    assert ev.feed(ResultStored(result=first)) == []
    assert ev.feed(ResultStored(result=second)) == []
    # Other wrenches and other programs keep streaks of their own.
    assert ev.feed(ResultStored(result=result(False, 2.5, wrench="wr-11"))) == []
    assert ev.feed(ResultStored(result=result(False, 2.6, program="cover-m6"))) == []
    assert ev.feed(ResultStored(result=second)) == []  # delivered twice: counted once
    [raised] = ev.feed(ResultStored(result=third))
    assert (raised.code, raised.severity) == ("nok_streak", "critical")
    assert (raised.wrench_id, raised.program_id, raised.at) == ("wr-07", "spindle-m10-8.8", at(3))
    assert "angle_high ×3" in raised.text
    assert ev.feed(ResultStored(result=result(False, 4, reason="torque_low"))) == []
    [cleared] = ev.feed(ResultStored(result=result(True, 5)))
    assert (cleared.id, cleared.state, cleared.at) == (raised.id, "cleared", at(5))
    assert "4 NOK in a row" in cleared.text
    assert schema_errors(alarm_schema, [raised, cleared]) == []
    # An OK breaks the streak: two more NOK are not three.
    assert feed_all(ev, [ResultStored(result=result(False, s)) for s in (6, 7)]) == []


def test_nok_streak_id_is_read_back_from_the_results_after_a_restart() -> None:
    results = [result(False, s) for s in (1, 2, 3)]
    before = feed_all(AlarmEvaluator(STATION), [ResultStored(result=r) for r in results])
    after = feed_all(AlarmEvaluator(STATION), [ResultStored(result=r) for r in results])
    assert len(before) == 1
    assert [a.id for a in after] == [before[0].id]


# -- outbox_backlog ----------------------------------------------------------------------------


def test_outbox_backlog_by_count_or_age_and_cleared_only_when_drained() -> None:
    cfg = AlarmsConfig(outbox_backlog_count=500, outbox_backlog_age_s=300.0)
    ev = AlarmEvaluator(STATION, cfg)

    def level(unsent: int, age: float | None, s: float) -> list[Alarm]:
        return ev.feed(OutboxLevel(unsent=unsent, oldest_age_s=age, at=at(s)))

    assert level(500, 299.0, 0) == []  # at the thresholds, not beyond
    [by_count] = level(501, 10.0, 1)
    assert (by_count.code, by_count.severity, by_count.wrench_id) == (
        "outbox_backlog",
        "warning",
        None,
    )
    assert level(2000, 900.0, 2) == []  # raised once
    assert level(1, 1.0, 3) == []  # not drained yet
    [cleared] = level(0, None, 4)
    assert (cleared.id, cleared.state) == (by_count.id, "cleared")
    [by_age] = level(3, 301.0, 5)
    assert by_age.state == "raised"
    assert by_age.id != by_count.id
    assert "3 result(s)" in by_age.text


# -- calibration -------------------------------------------------------------------------------


def test_calibration_due_soon_then_overdue_then_recalibrated(
    alarm_schema: dict[str, Any],
) -> None:
    ev = AlarmEvaluator(STATION, AlarmsConfig(calibration_due_soon_days=14))
    due = dt.date(2026, 6, 30)

    def check(today: dt.date, due_date: dt.date | None = due) -> list[Alarm]:
        return ev.feed(CalibrationCheck(wrench_id="wr-07", due=due_date, today=today, at=T0))

    assert check(due - dt.timedelta(days=15)) == []
    [soon] = check(due - dt.timedelta(days=14))
    assert (soon.code, soon.severity, soon.state) == ("calibration_due_soon", "info", "raised")
    assert "14 day(s) left" in soon.text
    assert check(due - dt.timedelta(days=3)) == []
    assert check(due) == []
    ended, overdue = check(due + dt.timedelta(days=1))
    assert (ended.id, ended.state) == (soon.id, "cleared")
    assert (overdue.code, overdue.severity, overdue.state) == (
        "calibration_overdue",
        "critical",
        "raised",
    )
    assert check(due + dt.timedelta(days=40)) == []
    # A new certificate: the station file gets a due date a year on.
    [done] = check(due + dt.timedelta(days=41), due_date=dt.date(2027, 7, 31))
    assert (done.id, done.state) == (overdue.id, "cleared")
    assert schema_errors(alarm_schema, [soon, ended, overdue, done]) == []


def test_calibration_ids_are_the_same_after_a_restart_and_an_unknown_date_raises_nothing() -> None:
    due = dt.date(2026, 6, 30)
    check = CalibrationCheck(wrench_id="wr-07", due=due, today=dt.date(2026, 7, 2), at=T0)
    first = AlarmEvaluator(STATION).feed(check)
    later = dataclasses.replace(check, at=T0 + dt.timedelta(hours=5))
    second = AlarmEvaluator(STATION).feed(later)
    assert [a.id for a in first] == [a.id for a in second]
    assert len(first) == 1
    # The id's time field is the first overdue day (RFC 9562 §5.7: 48-bit Unix ms).
    ms = uuid.UUID(first[0].id).int >> 80
    assert dt.datetime.fromtimestamp(ms / 1000, dt.UTC) == dt.datetime(2026, 7, 1, tzinfo=dt.UTC)
    unknown = CalibrationCheck(wrench_id="wr-11", due=None, today=dt.date(2026, 7, 2), at=T0)
    assert AlarmEvaluator(STATION).feed(unknown) == []


# -- bad input, invariants ---------------------------------------------------------------------


def test_impossible_observations_are_refused_with_a_typed_error_and_change_nothing() -> None:
    ev = AlarmEvaluator(STATION)
    ev.feed(BatteryReading(wrench_id="wr-07", pct=5, at=T0))
    before = ev.active()
    naive = dt.datetime(2026, 5, 12, 7, 0)
    local = dt.datetime(2026, 5, 12, 9, 0, tzinfo=dt.timezone(dt.timedelta(hours=2)))
    with pytest.raises(AlarmInputError, match="UTC"):
        LinkSeen(wrench_id="wr-07", connected=False, at=naive)
    with pytest.raises(AlarmInputError, match="UTC"):
        Tick(at=local)
    with pytest.raises(AlarmInputError, match=r"0\.\.100"):
        BatteryReading(wrench_id="wr-07", pct=101, at=T0)
    with pytest.raises(AlarmInputError, match="finite"):
        OutboxLevel(unsent=1, oldest_age_s=float("nan"), at=T0)
    with pytest.raises(AlarmInputError, match=">= 0"):
        OutboxLevel(unsent=-1, oldest_age_s=None, at=T0)
    with pytest.raises(AlarmInputError, match="empty"):
        CalibrationCheck(wrench_id="", due=None, today=T0.date(), at=T0)
    assert ev.active() == before


_WRENCHES = ("wr-07", "wr-11")


@st.composite
def observations(draw: st.DrawFn) -> list[Observation]:
    out: list[Observation] = []
    t = 0.0
    for _ in range(draw(st.integers(0, 40))):
        t += draw(st.floats(0.0, 120.0))
        when = at(t)
        w = draw(st.sampled_from(_WRENCHES))
        kind = draw(st.integers(0, 5))
        if kind == 0:
            out.append(LinkSeen(wrench_id=w, connected=draw(st.booleans()), at=when))
        elif kind == 1:
            out.append(BatteryReading(wrench_id=w, pct=draw(st.integers(0, 100)), at=when))
        elif kind == 2:
            due = T0.date() + dt.timedelta(days=draw(st.integers(-5, 30)))
            today = T0.date() + dt.timedelta(days=int(t // 86400))
            out.append(CalibrationCheck(wrench_id=w, due=due, today=today, at=when))
        elif kind == 3:
            out.append(ResultStored(result=result(draw(st.booleans()), t, wrench=w)))
        elif kind == 4:
            unsent = draw(st.integers(0, 1000))
            age = draw(st.floats(0.0, 1000.0)) if unsent else None
            out.append(OutboxLevel(unsent=unsent, oldest_age_s=age, at=when))
        else:
            out.append(Tick(at=when))
    return out


@settings(max_examples=100, deadline=None)
@given(observations())
def test_every_alarm_is_raised_once_and_cleared_once_and_no_condition_is_raised_twice(
    seq: list[Observation],
) -> None:
    ev = AlarmEvaluator(STATION, AlarmsConfig(wrench_lost_after_s=60.0, nok_streak=2))
    states: dict[str, list[str]] = {}
    open_conditions: dict[tuple[str, str | None, str | None], str] = {}
    for alarm in feed_all(ev, seq):
        states.setdefault(alarm.id, []).append(alarm.state)
        key = (alarm.code, alarm.wrench_id, alarm.program_id)
        if alarm.state == "raised":
            assert key not in open_conditions, f"{key} raised twice"
            open_conditions[key] = alarm.id
        else:
            assert open_conditions.pop(key) == alarm.id
        assert alarm.severity == SEVERITY[alarm.code]
    assert all(s in (["raised"], ["raised", "cleared"]) for s in states.values()), states
    assert {a.id for a in ev.active()} == set(open_conditions.values())


# -- the station file --------------------------------------------------------------------------


_MINIMAL = """
[station]
id = "st-120"
name = "Spindle line, station 120"
topic_prefix = "plant/st-120"

[broker]
url = "mqtt://127.0.0.1:1883"
"""


def test_alarms_table_in_the_station_file_and_its_hysteresis_checked() -> None:
    cfg = parse_config(_MINIMAL, env={}, check_files=False).config
    assert cfg.alarms == AlarmsConfig()  # defaults without a table
    text = _MINIMAL + "\n[alarms]\nnok_streak = 5\nwrench_lost_after_s = 12.5\n"
    loaded = parse_config(text, env={"CLAMPD__ALARMS__BATTERY_LOW_PCT": "20"}, check_files=False)
    alarms = loaded.config.alarms
    assert (alarms.nok_streak, alarms.wrench_lost_after_s, alarms.battery_low_pct) == (5, 12.5, 20)
    typo = _MINIMAL + "\n[alarms]\nnok_strek = 2\n"
    with pytest.raises(ConfigError) as err:
        parse_config(typo, env={}, check_files=False)
    # A typo is an error, not a silent default.
    assert [(p.path, p.message) for p in err.value.problems] == [
        ("alarms.nok_strek", "unknown key (check the spelling)")
    ]
    flat = _MINIMAL + "\n[alarms]\nbattery_low_pct = 30\nbattery_ok_pct = 30\n"
    with pytest.raises(ConfigError) as err:
        parse_config(flat, env={}, check_files=False)
    [problem] = err.value.problems
    assert problem.path == "alarms"
    assert "battery_ok_pct must be above battery_low_pct" in problem.message


# -- the quality feed over a real SQLite outbox ------------------------------------------------


async def test_feed_replays_an_open_streak_from_the_journal_and_watches_the_outbox(
    tmp_path: Path,
) -> None:
    topics = Topics(STATION)
    path = tmp_path / "journal.sqlite3"
    settings_ = AlarmsConfig(nok_streak=2, outbox_backlog_count=2)
    noks = [result(False, s) for s in (1, 2)]
    async with AsyncOutbox(path) as outbox:
        evaluator = AlarmEvaluator(STATION, settings_)
        feed = QualityFeed(OutboxResultSink(outbox, topics), alarms=evaluator)
        for r in noks:
            assert await feed.put_result(r)
        [streak] = evaluator.active()
        assert streak.code == "nok_streak"
    # A restart: the journal gives the streak back, under the same id.
    async with AsyncOutbox(path) as outbox:
        evaluator = AlarmEvaluator(STATION, settings_)
        feed = QualityFeed(OutboxResultSink(outbox, topics), alarms=evaluator)
        assert await feed.replay(outbox) == 2
        assert [a.id for a in evaluator.active()] == [streak.id]
        # Three unsent results (beyond 2) raise the backlog; sending them all clears it.
        assert await feed.put_result(result(False, 3))
        due = dt.date.today() + dt.timedelta(days=3)
        wrench = WrenchConfig.model_validate(
            {
                "id": "wr-07",
                "address": "C4:7A:10:00:3E:21",
                "torque_max": 100.0,
                "calibration_due": due,
            }
        )
        watch = asyncio.create_task(feed.watch(outbox, [wrench], outbox_poll_s=0.05))
        try:
            await eventually(lambda: _codes(evaluator) >= {"outbox_backlog"}, 10)
            assert "calibration_due_soon" in _codes(evaluator)  # checked at start
            for entry in await outbox.pending(limit=10):
                await outbox.mark_sent(entry.id)
            await eventually(lambda: "outbox_backlog" not in _codes(evaluator), 10)
        finally:
            watch.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await watch


def _codes(ev: AlarmEvaluator) -> set[str]:
    return {a.code.value for a in ev.active()}


# -- the running station: real mosquitto, virtual wrenches -------------------------------------


class AlarmListener:
    """An MES-side subscriber to the station's alarm topic (QoS 1, as MQTT.md says)."""

    def __init__(self) -> None:
        self.received: list[dict[str, Any]] = []

    def find(self, code: str, state: str, wrench_id: str | None = None) -> dict[str, Any] | None:
        for a in self.received:
            if a["code"] == code and a["state"] == state and a["wrench_id"] == wrench_id:
                return a
        return None


@contextlib.asynccontextmanager
async def listening(broker: LocalBroker, prefix: str) -> AsyncIterator[AlarmListener]:
    listener = AlarmListener()
    async with aiomqtt.Client(broker.host, broker.port) as client:
        await client.subscribe(Topics(prefix).alarm(), qos=1)

        async def read() -> None:
            async for message in client.messages:
                assert isinstance(message.payload, bytes)
                listener.received.append(json.loads(message.payload))

        reader = asyncio.create_task(read())
        try:
            yield listener
        finally:
            reader.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await reader


async def test_running_station_raises_and_clears_wrench_lost_and_nok_streak(
    broker: LocalBroker, topic_prefix: str, tmp_path: Path, alarm_schema: dict[str, Any]
) -> None:
    results: asyncio.Queue[ReceivedResult] = asyncio.Queue()
    async with (
        station_rig.virtual_wrenches(GROUPS, CAPACITY_NM, technician, seed=11) as rig,
        listening(broker, topic_prefix) as alarms,
    ):
        env = station_overrides(
            prefix=topic_prefix,
            broker_url=broker.url,
            journal=tmp_path / "journal.sqlite3",
            addresses=rig.addresses,
        )
        # Short thresholds for the test (documented [alarms] keys, set as the overrides
        # DEVELOPERS.md describes).
        env["CLAMPD__ALARMS__WRENCH_LOST_AFTER_S"] = "0.5"
        env["CLAMPD__ALARMS__NOK_STREAK"] = "2"
        config = parse_config(SCENARIO.station_toml, env=env, base_dir=tmp_path).config
        centrals = {w: await rig.air.add_central() for w in rig.wrenches}
        station = Station(
            config,
            bleak_kwargs=lambda w: centrals[w.id].bleak_kwargs(),
            cue_player=NullCuePlayer(),
        )
        stop = asyncio.Event()
        task = asyncio.create_task(station.run(stop), name="clampd.test.station")
        try:
            async with MesStandIn(
                broker.host, broker.port, topic_prefix, on_result=results.put_nowait
            ) as mes:
                await wait_until_ready(mes, rig.wrenches)

                # The wrench goes out of radio range, and comes back.
                await rig.wrenches["wr-07"].go_out_of_range()
                await eventually(lambda: alarms.find("wrench_lost", "raised", "wr-07") is not None)
                assert alarms.find("wrench_lost", "cleared", "wr-07") is None
                await rig.wrenches["wr-07"].come_back_in_range()
                await eventually(lambda: alarms.find("wrench_lost", "cleared", "wr-07") is not None)
                lost = alarms.find("wrench_lost", "raised", "wr-07")
                back = alarms.find("wrench_lost", "cleared", "wr-07")
                assert lost is not None
                assert back is not None
                assert lost["id"] == back["id"]
                assert alarms.find("wrench_lost", "raised", "wr-11") is None
                await wait_until_ready(mes, ["wr-07"])

                # Two NOK in a row on one program (over-pulled past the angle window), then OK.
                reply = await mes.select_program(
                    "spindle-m10-8.8",
                    "DK48-2026-000902",
                    ["spindle-bolt-1", "spindle-bolt-2", "spindle-bolt-3"],
                    wrench_id="wr-07",
                )
                assert reply["status"] == "ok", reply
                deaf = OperatorParams(
                    steady_rate_dps=30.0, ignore_cues=True, stop_at_angle_deg=85.0
                )
                for _ in range(2):
                    rig.hand_over("wr-07", deaf)
                    async with asyncio.timeout(60):
                        nok = await results.get()
                    assert nok.payload is not None
                    assert nok.payload["status"] == "NOK"
                await eventually(lambda: alarms.find("nok_streak", "raised", "wr-07") is not None)
                streak = alarms.find("nok_streak", "raised", "wr-07")
                assert streak is not None
                assert streak["program_id"] == "spindle-m10-8.8"
                assert streak["severity"] == "critical"
                rig.hand_over("wr-07")
                async with asyncio.timeout(60):
                    good = await results.get()
                assert good.payload is not None
                assert good.payload["status"] == "OK"
                await eventually(lambda: alarms.find("nok_streak", "cleared", "wr-07") is not None)
                ended = alarms.find("nok_streak", "cleared", "wr-07")
                assert ended is not None
                assert ended["id"] == streak["id"]
                seen = list(alarms.received)  # before the stop, which ends every link
        finally:
            stop.set()
            async with asyncio.timeout(30):
                await task
    assert schema_errors(alarm_schema, alarms.received) == []
    ids = [a["id"] for a in seen]
    assert all(is_uuid7(i) for i in ids)
    assert sorted(ids.count(i) for i in set(ids)) == [2] * len(set(ids))  # raised + cleared
