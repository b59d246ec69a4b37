"""The station view's hub: snapshot, ordered deltas, bounded fan-out, rate-limited curve,
real engine events from a simulated rundown, and the adapters from the runtime's ports."""

from __future__ import annotations

import asyncio
import datetime as dt
import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.integrate import cumulative_trapezoid
from view_support import (
    FRAME,
    PART,
    POSITIONS,
    PROGRAM,
    STATION,
    WRENCH,
    play,
    show_station,
    trace,
)

from clampd.daemon import engine
from clampd.daemon.runtime import AsyncOutbox, OutboxResultSink, StationState
from clampd.daemon.runtime._outbox import OutboxFullError
from clampd.daemon.view import (
    MAX_LIVE_POINTS,
    RECENT_RESULTS,
    RESULT_POINTS,
    ResultTee,
    StatusTee,
    ViewError,
    ViewHub,
    limits_of,
    station_view,
    station_view_of,
)
from clampd.protocol import (
    Calibration,
    CalibrationState,
    LiveProgress,
    LiveSnug,
    LiveStop,
    StopTrigger,
    Topics,
    WrenchStatus,
    new_uuid7,
)


class FakeClock:
    """Monotonic time the test moves by hand (rate limiting is judged on it)."""

    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def deltas(sub: Any) -> list[dict[str, Any]]:
    out = []
    while (m := sub.next_nowait()) is not None:
        body = json.loads(m.data)
        out.append(body if m.event == "delta" else {"type": "snapshot", **body})
    return out


def test_limits_come_from_the_program() -> None:
    lim = limits_of(PROGRAM)
    assert lim["snug_nm"] == 8.0
    assert lim["targets_nm"] == [38.0]
    assert lim["targets_deg"] == []
    assert lim["torque_window"] == [36.0, 46.0]
    assert lim["angle_window"] == [5.0, 90.0]
    assert lim["max_torque_nm"] == 60.0
    multi = engine.program_from_mapping(
        {
            "id": "two-step",
            "strategy": "multi-step",
            "snug_torque": "5 N*m",
            "step": [
                {"kind": "torque", "target_torque": "20 N*m"},
                {"kind": "angle", "target_angle": "30 deg"},
            ],
        }
    )
    assert (limits_of(multi)["targets_nm"], limits_of(multi)["targets_deg"]) == ([20.0], [30.0])


def test_first_message_is_the_snapshot_then_deltas_in_order() -> None:
    hub = ViewHub(STATION, name="bench")
    sub = hub.subscribe()
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    hub.on_link(WRENCH, connected=True, battery_pct=77, calibration="ok", torque_max_nm=100.0)
    hub.on_broker(True, 3)
    got = deltas(sub)
    # Changes made before the page read anything are already in its first snapshot.
    assert [g["type"] for g in got] == ["snapshot"]
    snap = got[0]
    assert snap["jobs"][0]["part_id"] == PART
    assert [j["position"] for j in snap["jobs"][0]["joints"]] == list(POSITIONS)
    assert snap["jobs"][0]["next_position"] == "S1"
    assert snap["wrenches"][WRENCH]["battery_pct"] == 77
    assert snap["broker"] == {"connected": True, "backlog": 3}
    hub.on_broker(False, 4)
    hub.on_broker(False, 4)  # no change, no message
    show_station(hub, {"S1": "ok", "S2": "pending", "S3": "pending", "S4": "pending"})
    got = deltas(sub)
    assert [g["type"] for g in got] == ["broker", "jobs"]
    assert [g["seq"] for g in got] == [snap["seq"] + 1, snap["seq"] + 2]
    assert got[1]["value"][0]["next_position"] == "S2"
    sub.close()
    assert hub.subscribers == 0


def test_a_slow_page_skips_to_the_latest_snapshot_and_the_hub_never_waits() -> None:
    hub = ViewHub(STATION, queue_bound=8)
    slow, quick = hub.subscribe(), hub.subscribe()
    deltas(slow), deltas(quick)
    for k in range(50):
        hub.on_broker(k % 2 == 0, k)  # every call is a change
        deltas(quick)
    assert slow.dropped >= 1
    got = deltas(slow)
    assert got[0]["type"] == "snapshot"
    assert got[0]["broker"] == {"connected": False, "backlog": 49}
    assert len(got) <= 8 + 1
    assert quick.dropped == 0


def test_curve_points_are_rate_limited_and_none_is_lost() -> None:
    clock = FakeClock()
    hub = ViewHub(STATION, clock=clock, curve_interval_s=0.04)
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    sub = hub.subscribe()
    deltas(sub)
    hub.on_engine_event(
        WRENCH,
        engine.RundownStarted(
            index=0, t_s=0.0, torque_nm=1.0, gyro_bias_dps=0.0, program_id=PROGRAM.id
        ),
        0.0,
    )
    sent: list[list[Any]] = []
    bursts = 0
    for k in range(1, 401):  # 400 frames, one every 5 ms: 2 s at 200 frames/s
        clock.now += 0.005
        hub.on_samples(WRENCH, [k * 0.005], [1.0 + k * 0.1], float(k))
        for d in deltas(sub):
            if d["type"] == "points":
                assert d["from"] == 1 + len(sent)
                sent.extend(d["points"])
                bursts += 1
    hub.flush()
    for d in deltas(sub):
        sent.extend(d["points"])
    # One delta per 40 ms at most: 2 s gives 50 (+1 for the first point at once).
    assert bursts <= 51
    assert bursts >= 40
    assert len(sent) == 400
    assert sent[-1] == [400.0, 41.0]


def test_the_live_curve_stays_bounded() -> None:
    hub = ViewHub(STATION, curve_interval_s=0.0)
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    hub.on_engine_event(
        WRENCH,
        engine.RundownStarted(
            index=0, t_s=0.0, torque_nm=1.0, gyro_bias_dps=0.0, program_id=PROGRAM.id
        ),
        0.0,
    )
    for k in range(5 * MAX_LIVE_POINTS):
        hub.on_samples(WRENCH, k * 0.001, 1.0 + k * 1e-3, k * 0.01)
    points = hub.snapshot()["rundowns"][WRENCH]["points"]
    assert MAX_LIVE_POINTS // 2 <= len(points) <= MAX_LIVE_POINTS
    assert points[-1][0] == pytest.approx((5 * MAX_LIVE_POINTS - 1) * 0.01)
    angles = [p[0] for p in points[1:]]
    assert angles == sorted(angles)


def test_bad_input_is_a_view_error_and_changes_nothing() -> None:
    hub = ViewHub(STATION)
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    before = hub.snapshot()
    with pytest.raises(ViewError, match="battery_pct"):
        hub.on_link(WRENCH, connected=True, battery_pct=140)
    with pytest.raises(ViewError, match="backlog"):
        hub.on_broker(True, -1)
    hub.on_engine_event(
        WRENCH,
        engine.RundownStarted(
            index=0, t_s=0.0, torque_nm=1.0, gyro_bias_dps=0.0, program_id=PROGRAM.id
        ),
        0.0,
    )
    mid = hub.snapshot()
    with pytest.raises(ViewError, match="finite"):
        hub.on_samples(WRENCH, [0.1], [math.nan], None)
    with pytest.raises(ViewError, match="equal"):
        hub.on_samples(WRENCH, [0.1, 0.2], [1.0], None)
    with pytest.raises(ViewError, match="angle_deg"):
        hub.on_samples(WRENCH, [0.1, 0.2], [1.0, 2.0], [1.0, 2.0, 3.0])
    with pytest.raises(ViewError, match="pending/ok/nok"):
        station_view(STATION, jobs=[(WRENCH, PROGRAM, PART, {"S1": "done"}, False)])
    after = hub.snapshot()
    assert after["rundowns"] == mid["rundowns"]
    assert after["seq"] == mid["seq"]
    assert before["wrenches"] == after["wrenches"] == {}


async def test_a_real_rundown_through_the_engine_draws_snug_stop_and_the_judged_curve() -> None:
    hub = ViewHub(STATION)
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    sub = hub.subscribe()
    deltas(sub)
    tr = trace(3)
    played = await play(hub, tr, position="S1", realtime=False)
    got = deltas(sub)
    kinds = [g["type"] for g in got]
    assert kinds[0] == "rundown"
    assert kinds[-1] == "result"
    marks = [g["value"] for g in got if g["type"] == "mark"]
    snug = next(m for m in marks if m["kind"] == "snug")
    stop = next(m for m in marks if m["kind"] == "stop")
    # Snug where torque first reached the program's snug torque (8 N·m), angle 0 there.
    assert snug["angle_deg"] == 0.0
    assert snug["torque_nm"] >= 8.0
    # The stop marker sits where the engine says the target (38 N·m) was reached.
    assert stop["torque_nm"] >= 38.0
    assert played.result.stop is not None
    assert stop["angle_deg"] == pytest.approx(played.result.stop.angle_deg, abs=1e-3)
    final = hub.snapshot()["rundowns"][WRENCH]
    assert final["phase"] == "finished"
    assert final["status"] == played.payload.status.value == "OK"
    assert final["id"] == played.payload.id
    assert 2 <= len(final["points"]) <= RESULT_POINTS
    # The judged curve keeps its peak: numpy's max over the stored curve (LTTB keeps extremes
    # of the series it reduces; the protocol's reducer is checked in test_downsample.py).
    assert max(p[1] for p in final["points"]) == pytest.approx(
        float(np.max(played.payload.curve.torque_nm)), abs=1e-3
    )
    result = hub.snapshot()["results"][0]
    assert result["id"] == played.payload.id
    assert result["joint_position"] == "S1"
    assert result["final_torque_nm"] == pytest.approx(played.result.final_torque_nm, abs=1e-3)


def test_live_angle_matches_trapezoid_integration_from_snug() -> None:
    """``Engine.angle_deg`` (what the live curve plots) against scipy's cumulative trapezoid
    of the bias-corrected rate from the snug sample. The simulated technician pulls steadily
    without back-strokes and the wrench has no deflection set, so the engine's ratchet logic
    counts every interval and the two must agree (scipy.integrate.cumulative_trapezoid is the
    reference)."""
    tr = trace(3)
    eng = engine.Engine(PROGRAM, engine.EngineSettings(deflection_deg_per_nm=0.0))
    bias: float | None = None
    snug_i: int | None = None
    seen: list[tuple[int, float]] = []
    for k in range(0, len(tr), FRAME):
        events = eng.feed(
            tr.t_s[k : k + FRAME], tr.torque_nm[k : k + FRAME], tr.axis_rate_dps[k : k + FRAME]
        )
        for ev in events:
            if isinstance(ev, engine.RundownStarted):
                bias = ev.gyro_bias_dps
            elif isinstance(ev, engine.SnugReached):
                snug_i = ev.index
        if any(isinstance(ev, engine.RundownFinished) for ev in events):
            break
        if eng.angle_deg is not None:
            seen.append((min(k + FRAME, len(tr)) - 1, eng.angle_deg))
    assert bias is not None
    assert snug_i is not None
    assert len(seen) > 10
    rate = tr.axis_rate_dps - bias
    ref = cumulative_trapezoid(rate[snug_i:], tr.t_s[snug_i:], initial=0.0)
    checked = 0
    for idx, angle in seen:
        if np.all(rate[snug_i : idx + 1] > 0):  # no back-stroke up to here
            assert angle == pytest.approx(ref[idx - snug_i], abs=0.05)
            checked += 1
    assert checked >= 10
    assert seen[-1][1] > 15.0  # the rundown turned well past snug (~20° to the stop)


def test_live_events_from_the_mqtt_side_build_the_same_picture() -> None:
    hub = ViewHub(STATION, curve_interval_s=0.0)
    rid = new_uuid7()
    s, w = STATION, WRENCH
    hub.publish_live(
        LiveProgress(station=s, wrench_id=w, rundown_id=rid, t_s=0.0, torque_nm=2.0, angle_deg=None)
    )
    hub.publish_live(LiveSnug(station=s, wrench_id=w, rundown_id=rid, t_s=0.1, torque_nm=8.1))
    hub.publish_live(
        LiveProgress(station=s, wrench_id=w, rundown_id=rid, t_s=0.2, torque_nm=20.0, angle_deg=9.5)
    )
    hub.publish_live(
        LiveStop(
            station=s,
            wrench_id=w,
            rundown_id=rid,
            t_s=0.4,
            trigger=StopTrigger.TORQUE_REACHED,
            torque_nm=38.2,
            angle_deg=18.0,
        )
    )
    r = hub.snapshot()["rundowns"][WRENCH]
    assert r["id"] == rid
    assert r["phase"] == "running"
    assert r["points"][-1] == [9.5, 20.0]
    assert [m["kind"] for m in r["marks"]] == ["snug", "stop"]


class _Board:
    def __init__(self) -> None:
        self.statuses: list[WrenchStatus] = []
        self.live: list[object] = []

    def offer_status(self, status: WrenchStatus) -> None:
        self.statuses.append(status)

    def publish_live(self, event: Any) -> None:
        self.live.append(event)


def test_status_tee_hands_the_wrench_status_to_both() -> None:
    hub = ViewHub(STATION)
    board = _Board()
    tee = StatusTee(board, hub)
    status = WrenchStatus(
        station=STATION,
        wrench_id=WRENCH,
        serial="SIM-BG12-1",
        connected=True,
        battery_pct=64,
        torque_max_nm=100.0,
        calibration=Calibration(state=CalibrationState.DUE_SOON, due_date=dt.date(2027, 1, 31)),
        locked=False,
        at=dt.datetime(2027, 1, 5, 8, 0, tzinfo=dt.UTC),
    )
    tee.offer_status(status)
    assert board.statuses == [status]
    w = hub.snapshot()["wrenches"][WRENCH]
    assert (w["battery_pct"], w["calibration"], w["calibration_due"]) == (
        64,
        "due_soon",
        "2027-01-31",
    )


async def test_result_tee_shows_a_result_only_once_it_is_durable(tmp_path: Path) -> None:
    hub = ViewHub(STATION)
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    scratch = ViewHub(STATION)
    played = await play(scratch, trace(3), position="S1", realtime=False)
    async with AsyncOutbox(tmp_path / "outbox.sqlite3") as outbox:
        tee = ResultTee(OutboxResultSink(outbox, Topics("tarnwick/bogie/line-1/bg-12")), hub)
        assert await tee.put_result(played.payload) is True
        stored = await outbox.get(played.payload.id)
        assert stored is not None
    assert hub.snapshot()["results"][0]["id"] == played.payload.id
    # An outbox with no room refuses: the error reaches the worker, the page shows nothing.
    hub2 = ViewHub(STATION)
    async with AsyncOutbox(tmp_path / "full.sqlite3", size_cap_bytes=1) as full:
        tee2 = ResultTee(OutboxResultSink(full, Topics("tarnwick/bogie/line-1/bg-12")), hub2)
        refused = None
        for _ in range(3):  # the first put may fit under any cap; later ones cannot
            played = await play(scratch, trace(3), position="S1", realtime=False)
            try:
                await tee2.put_result(played.payload)
            except OutboxFullError:
                refused = played.payload.id
                break
        assert refused is not None
    assert refused not in [r["id"] for r in hub2.snapshot()["results"]]


def test_station_state_adapter_reads_the_real_station_state() -> None:
    state = StationState(STATION, {PROGRAM.id: PROGRAM}, {WRENCH: 100.0})
    assert station_view_of(state).jobs == ()
    state.select(program_id=PROGRAM.id, part_id=PART, joint_positions=list(POSITIONS))
    state.record_result(WRENCH, ok=True)
    state.record_result(WRENCH, ok=False)
    view = station_view_of(state, name="bench")
    (job,) = view.jobs
    assert [(j.position, j.state) for j in job.joints] == [
        ("S1", "ok"),
        ("S2", "nok"),
        ("S3", "pending"),
        ("S4", "pending"),
    ]
    hub = ViewHub(STATION)
    hub.on_station(view)
    assert hub.snapshot()["jobs"][0]["next_position"] == "S3"
    state.lock()
    assert station_view_of(state).locked is True


async def test_held_points_go_out_on_the_loop_timer_without_another_input() -> None:
    hub = ViewHub(STATION, curve_interval_s=0.02)
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    sub = hub.subscribe()
    deltas(sub)
    hub.on_engine_event(
        WRENCH,
        engine.RundownStarted(
            index=0, t_s=0.0, torque_nm=1.0, gyro_bias_dps=0.0, program_id=PROGRAM.id
        ),
        0.0,
    )
    hub.on_samples(WRENCH, 0.01, 2.0, None)  # goes out at once (first since the start)
    hub.on_samples(WRENCH, 0.02, 3.0, None)  # held: inside the interval
    first = deltas(sub)
    assert [d["type"] for d in first] == ["rundown", "points"]
    message = await asyncio.wait_for(sub.next(), 1.0)
    body = json.loads(message.data)
    assert body["type"] == "points"
    assert body["points"] == [[None, 3.0]]


def test_held_points_carry_the_stamp_of_the_oldest_one() -> None:
    """Latency is measured from ``ts_ms``: a delta of held points must not look younger than
    the sample that waited longest."""
    clock, wall = FakeClock(), FakeClock()
    hub = ViewHub(STATION, clock=clock, wall=lambda: wall.now, curve_interval_s=0.04)
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    sub = hub.subscribe()
    deltas(sub)
    hub.on_engine_event(
        WRENCH,
        engine.RundownStarted(
            index=0, t_s=0.0, torque_nm=1.0, gyro_bias_dps=0.0, program_id=PROGRAM.id
        ),
        0.0,
    )
    hub.on_samples(WRENCH, 0.0, 2.0, None)  # sent at once
    stamps = []
    for _ in range(3):  # held: 10 ms apart, inside the 40 ms interval
        clock.now += 0.01
        wall.now += 0.01
        stamps.append(round(wall.now * 1000.0, 3))
        hub.on_samples(WRENCH, 0.0, 3.0, None)
    hub.flush()
    last = [d for d in deltas(sub) if d["type"] == "points"][-1]
    assert len(last["points"]) == 3
    assert last["ts_ms"] == stamps[0]


# -- the delta protocol: a page that applies every delta sees exactly the snapshot ---------------


def _apply(page: dict[str, Any], msg: dict[str, Any]) -> None:
    """What ``app.js`` ``apply()`` does, written again from the message contract."""
    kind = msg["type"]
    if kind in ("station", "jobs", "broker"):
        page[kind] = msg["value"]
    elif kind == "wrench":
        page["wrenches"][msg["value"]["id"]] = msg["value"]
    elif kind == "rundown":
        page["rundowns"][msg["value"]["wrench_id"]] = msg["value"]
        page["focus"] = msg["value"]["wrench_id"]
    elif kind == "points":
        r = page["rundowns"][msg["wrench_id"]]
        assert (r["id"], r["epoch"], len(r["points"])) == (msg["id"], msg["epoch"], msg["from"])
        r["points"] += msg["points"]
        r["torque_nm"], r["angle_deg"] = msg["torque_nm"], msg["angle_deg"]
    elif kind == "mark":
        r = page["rundowns"][msg["wrench_id"]]
        assert r["id"] == msg["id"]
        r["marks"].append(msg["value"])
    elif kind == "result":
        page["results"] = [msg["value"], *page["results"]][:RECENT_RESULTS]
    else:
        raise AssertionError(f"unknown delta {kind}")


_W = ("w-a", "w-b")
_STATES = ("pending", "ok", "nok")
_RIDS = tuple(new_uuid7() for _ in range(3))
_ops = st.lists(
    st.one_of(
        st.tuples(st.just("link"), st.sampled_from(_W), st.booleans(), st.integers(0, 100)),
        st.tuples(st.just("broker"), st.booleans(), st.integers(0, 50)),
        st.tuples(
            st.just("joints"), st.lists(st.sampled_from(["pending", "ok", "nok"]), max_size=4)
        ),
        st.tuples(
            st.just("progress"),
            st.sampled_from(_W),
            st.sampled_from(_RIDS),
            st.floats(0, 80),
            st.one_of(st.none(), st.floats(0, 400)),
        ),
        st.tuples(st.just("snug"), st.sampled_from(_W), st.sampled_from(_RIDS)),
        st.tuples(st.just("stop"), st.sampled_from(_W), st.sampled_from(_RIDS), st.floats(0, 90)),
        st.tuples(st.just("tick"), st.floats(0.0, 0.1)),
    ),
    max_size=60,
)


@settings(max_examples=200, deadline=None)
@given(ops=_ops)
def test_a_page_applying_every_delta_holds_the_snapshot(ops: list[tuple[Any, ...]]) -> None:
    clock = FakeClock()
    hub = ViewHub(STATION, clock=clock, queue_bound=10_000)
    sub = hub.subscribe()
    first = sub.next_nowait()
    assert first is not None
    assert first.event == "snapshot"
    page = json.loads(first.data)
    last_seq = page["seq"]
    for op in ops:
        match op:
            case ("link", w, up, battery):
                hub.on_link(w, connected=up, battery_pct=battery)
            case ("broker", up, backlog):
                hub.on_broker(up, backlog)
            case ("joints", states):
                positions = {f"P{i}": s for i, s in enumerate(states)} or {"P0": "pending"}
                hub.on_station(
                    station_view(STATION, jobs=[(None, PROGRAM, PART, positions, False)])
                )
            case ("progress", w, rid, torque, angle):
                hub.publish_live(
                    LiveProgress(
                        station=STATION,
                        wrench_id=w,
                        rundown_id=rid,
                        t_s=0.0,
                        torque_nm=torque,
                        angle_deg=angle,
                    )
                )
            case ("snug", w, rid):
                hub.publish_live(
                    LiveSnug(station=STATION, wrench_id=w, rundown_id=rid, t_s=0.0, torque_nm=8.0)
                )
            case ("stop", w, rid, angle):
                hub.publish_live(
                    LiveStop(
                        station=STATION,
                        wrench_id=w,
                        rundown_id=rid,
                        t_s=0.0,
                        trigger=StopTrigger.TORQUE_REACHED,
                        torque_nm=38.0,
                        angle_deg=angle,
                    )
                )
            case ("tick", dt_s):
                clock.now += dt_s
        while (m := sub.next_nowait()) is not None:
            body = json.loads(m.data)
            assert m.event == "delta"
            assert body["seq"] == last_seq + 1  # strictly one after the other
            last_seq = body["seq"]
            _apply(page, body)
    final = hub.snapshot()  # sends any held points first
    while (m := sub.next_nowait()) is not None:
        _apply(page, json.loads(m.data))
    for key in ("station", "jobs", "wrenches", "rundowns", "results", "broker"):
        assert page[key] == final[key], key
    if final["rundowns"]:
        assert page["focus"] == final["focus"]
