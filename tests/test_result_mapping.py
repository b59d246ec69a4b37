"""The engine's judged rundown plus the station's context → the published result payload.

Checks against outside references:
- JSON Schema Draft 2020-12, applied by the ``jsonschema`` reference library, on the schema
  ``clampd schema`` prints (the contract tests outside the project rely on);
- UTC times checked with Python's ``datetime`` arithmetic (the standard library as reference);
- LTTB invariants (S. Steinarsson, "Downsampling Time Series for Visual Representation", MSc
  thesis, University of Iceland, 2013: first and last point kept, at most n points, a subset).
The rundowns come from the real engine fed by the simulator's closed loop (an independent
truth); the programs are demo values, for testing software only.
"""

from __future__ import annotations

import datetime as dt
import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from jsonschema import Draft202012Validator

from clampd.daemon import engine
from clampd.daemon.runtime import AsyncOutbox, ClockAnchor, OutboxResultSink, ResultContext
from clampd.daemon.runtime._results import (
    REASONS,
    STOP_TRIGGERS,
    STRATEGIES,
    build_result,
    safe_serial,
)
from clampd.protocol import (
    Calibration,
    CalibrationState,
    Judgement,
    Reason,
    Topics,
    WrenchRef,
    json_schemas,
    new_uuid7,
)
from clampd.simulators import JointModel, JointPopulation, OperatorParams, Reading, SensorParams
from clampd.simulators import simulate_rundown as simulate

TORQUE_PROGRAM = engine.program_from_mapping(
    {
        "id": "cover-m10-torque",
        "strategy": "torque",
        "snug_torque": "8 N*m",
        "target_torque": "35 N*m",
        "torque_window": ["31 N*m", "41 N*m"],
        "angle_window": ["3 deg", "90 deg"],
    }
)
# A wall clock in 2026 (1.78e9 s after the epoch) and a monotonic clock near boot.
ANCHOR = ClockAnchor(sensor_t_s=10.0, host_t_s=100.0, wall_minus_monotonic_s=1_780_000_000.0)
SCHEMA = Draft202012Validator(json_schemas()["RundownResult"])


def rundowns(program: engine.Program, *, seed: int = 4) -> list[engine.RundownResult]:
    """Judged rundowns of one simulated joint; the operator stops by feel a little past 31 N*m
    (after a reaction time), so the engine sees the target reached and the tool released."""
    eng = engine.Engine(program, engine.EngineSettings(deflection_deg_per_nm=0.02))
    out: list[engine.RundownResult] = []

    def listen(reading: Reading) -> None:
        for ev in eng.feed(reading.t_s, reading.torque_nm, reading.axis_rate_dps):
            if isinstance(ev, engine.RundownFinished):
                out.append(ev.result)

    rng = np.random.default_rng(seed)
    joint = JointModel.sample(rng, JointPopulation(contact_angle_deg=(15.0, 25.0)))
    simulate(
        joint,
        SensorParams(),
        OperatorParams(
            steady_rate_dps=10.0, start_delay_s=0.5, ignore_cues=True, stop_at_torque_nm=31.0
        ),
        rng,
        cue_listener=listen,
        tail_s=1.0,
    )
    return out


def context(**overrides: Any) -> ResultContext:
    values: dict[str, Any] = {
        "result_id": new_uuid7(),
        "station_id": "st-210",
        "wrench_id": "w-210-a",
        "serial": "SIM-210-A",
        "calibration": Calibration(state=CalibrationState.OK, due_date=dt.date(2027, 3, 31)),
        "program": TORQUE_PROGRAM,
        "part_id": "GB-0042",
        "joint_position": "bolt-1",
        "clock": ANCHOR,
    }
    values.update(overrides)
    return ResultContext(**values)


@pytest.fixture(scope="module")
def judged() -> engine.RundownResult:
    (result,) = rundowns(TORQUE_PROGRAM)
    return result


def test_clock_anchor_maps_sensor_time_to_utc_by_plain_datetime_arithmetic() -> None:
    got = ANCHOR.utc(12.5)
    expected = dt.datetime(1970, 1, 1, tzinfo=dt.UTC) + dt.timedelta(seconds=1_780_000_102.5)
    assert got == expected
    assert got.utcoffset() == dt.timedelta(0)
    assert ANCHOR.utc(9.0) == expected - dt.timedelta(seconds=3.5)
    with pytest.raises(ValueError, match="finite"):
        ClockAnchor(sensor_t_s=float("nan"), host_t_s=0.0, wall_minus_monotonic_s=0.0)


def test_an_ok_rundown_maps_to_a_payload_that_validates_against_the_published_schema(
    judged: engine.RundownResult,
) -> None:
    assert judged.status is engine.Status.OK, judged.reasons
    ctx = context()
    payload = build_result(judged, ctx)
    document = json.loads(payload.to_json_bytes())
    assert sorted(e.message for e in SCHEMA.iter_errors(document)) == []
    assert payload.status is Judgement.OK
    assert payload.reasons == []
    assert (payload.id, payload.part_id, payload.joint_position) == (
        ctx.result_id,
        "GB-0042",
        "bolt-1",
    )
    assert payload.strategy.value == "torque"
    assert payload.stop_trigger.value == "torque_reached"
    assert payload.final_torque_nm == judged.final_torque_nm
    assert payload.snug_torque_nm is not None
    assert payload.windows is not None
    assert (payload.windows.torque_min_nm, payload.windows.torque_max_nm) == (31.0, 41.0)
    # Start and finish times keep the sensor's spacing exactly (to the microsecond).
    assert payload.started_at == ANCHOR.utc(judged.start_t_s)
    span = payload.finished_at - payload.started_at
    assert abs(span.total_seconds() - (judged.end_t_s - judged.start_t_s)) < 2e-6


def test_the_curve_is_an_lttb_subset_of_the_engine_curve_with_time_from_the_start(
    judged: engine.RundownResult,
) -> None:
    payload = build_result(judged, context(curve_points=64))
    curve = payload.curve
    n = judged.curve_t_s.shape[0]
    assert n > 64
    assert curve.raw_sample_count == n
    assert curve.method == "lttb"
    assert len(curve.t_s) == 64
    t_rel = judged.curve_t_s - judged.curve_t_s[0]
    raw = set(
        zip(
            t_rel.tolist(),
            judged.curve_angle_deg.tolist(),
            judged.curve_torque_nm.tolist(),
            strict=True,
        )
    )
    points = list(zip(curve.t_s, curve.angle_deg, curve.torque_nm, strict=True))
    assert set(points) <= raw
    assert points[0] == (0.0, judged.curve_angle_deg[0], judged.curve_torque_nm[0])
    assert points[-1][2] == judged.curve_torque_nm[-1]
    # The peak survives downsampling to within sensor noise (LTTB keeps visual extremes;
    # which of two neighbouring samples it keeps depends on the triangle areas).
    assert max(curve.torque_nm) >= 0.99 * judged.peak_torque_nm


def test_station_policy_reasons_turn_the_result_nok_without_repeating() -> None:
    (result,) = rundowns(TORQUE_PROGRAM, seed=7)
    payload = build_result(
        result,
        context(extra_reasons=(Reason.CALIBRATION_OVERDUE, Reason.CALIBRATION_OVERDUE)),
    )
    assert payload.status is Judgement.NOK
    assert [r.value for r in payload.reasons][-1] == "calibration_overdue"
    assert len(payload.reasons) == len(set(payload.reasons))


def test_a_link_loss_without_a_stop_maps_to_the_link_lost_trigger() -> None:
    eng = engine.Engine(TORQUE_PROGRAM)
    t = np.arange(0.0, 2.0, 0.001)
    eng.feed(t[:500], np.zeros(500), np.zeros(500))  # at rest: the gyro bias is learnt
    ramp = np.linspace(0.0, 20.0, 1500)  # rising through snug, short of the target
    eng.feed(t[500:], ramp, np.full(1500, 30.0))
    (finished,) = [e for e in eng.link_lost(2.0) if isinstance(e, engine.RundownFinished)]
    payload = build_result(finished.result, context())
    assert payload.stop_trigger.value == "link_lost"
    assert payload.reasons[0].value == "link_lost"
    assert payload.curve.raw_sample_count == finished.result.curve_t_s.shape[0]
    assert SCHEMA.is_valid(json.loads(payload.to_json_bytes()))


def test_every_engine_enum_member_has_a_published_counterpart() -> None:
    assert set(REASONS) == set(engine.Reason)
    assert set(STRATEGIES) == set(engine.Strategy)
    assert set(STOP_TRIGGERS) == set(engine.StopTrigger)
    # Where the words differ, the contract's word is used.
    assert all(REASONS[r].value == r.value for r in engine.Reason)
    assert STRATEGIES[engine.Strategy.YIELD].value == "yield_gradient"


@pytest.mark.parametrize(
    ("serial", "expected"),
    [
        ("SIM-210-A", "SIM-210-A"),
        ("", "w-1"),  # blank
        (None, "w-1"),  # no info record (declarative profile)
        ("TW 00123", "TW 00123"),  # the contract (Serial) allows inner spaces
        ("TW00123         ", "TW00123"),  # 16 bytes padded with spaces, not NULs
        ("tab\there", "w-1"),  # control characters are not printable ASCII
        ("X" * 32, "X" * 32),
        ("X" * 33, "w-1"),  # longer than 32
        ("Zähler-1", "w-1"),  # not ASCII
    ],
)
def test_serials_follow_the_contract_and_refused_ones_fall_back_to_the_wrench_id(
    serial: str | None, expected: str
) -> None:
    assert safe_serial(serial, "w-1") == expected
    # Whatever comes back, the published model takes it (never an unpublishable result).
    ref = WrenchRef(
        wrench_id="w-1",
        serial=safe_serial(serial, "w-1"),
        calibration=Calibration(state=CalibrationState.UNKNOWN, due_date=None),
    )
    assert ref.serial == expected


async def test_outbox_sink_stores_the_exact_bytes_on_the_result_topic(
    tmp_path: Path, judged: engine.RundownResult
) -> None:
    payload = build_result(judged, context())
    async with AsyncOutbox(tmp_path / "outbox.sqlite3") as outbox:
        sink = OutboxResultSink(outbox, Topics("demo/gearbox/line-1/st-210"))
        assert await sink.put_result(payload) is True
        assert await sink.put_result(payload) is False  # at least once, stored once
        entry = await outbox.get(payload.id)
    assert entry is not None
    assert entry.topic == "demo/gearbox/line-1/st-210/result"  # MQTT.md topic tree
    assert entry.payload == payload.to_json_bytes()
    assert (entry.wrench, entry.program, entry.part_id, entry.status) == (
        "w-210-a",
        "cover-m10-torque",
        "GB-0042",
        "OK",
    )
    assert entry.finished_at is not None
    assert entry.finished_at.startswith(payload.finished_at.strftime("%Y-%m-%dT%H:%M:%S"))


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    peak=st.floats(min_value=2.0, max_value=80.0),
    rate=st.floats(min_value=-5.0, max_value=200.0),
    n=st.integers(min_value=2, max_value=3000),
    ending=st.sampled_from(["release", "link_lost", "abort"]),
    points=st.integers(min_value=2, max_value=512),
)
def test_any_engine_result_maps_to_a_schema_valid_payload(
    peak: float, rate: float, n: int, ending: str, points: int
) -> None:
    eng = engine.Engine(TORQUE_PROGRAM)
    t = np.arange(n + 200) * 0.001
    torque = np.concatenate((np.linspace(0.0, peak, n), np.zeros(200)))
    events = eng.feed(t[:n], torque[:n], np.full(n, rate))
    if ending == "release":
        events += eng.feed(t[n:], torque[n:], np.zeros(200))
        events += eng.tick(float(t[-1]) + 60.0)
    elif ending == "link_lost":
        events += eng.link_lost(float(t[n - 1]) + 0.01)
    else:
        events += eng.abort(float(t[n - 1]) + 0.01)
    for event in events:
        if isinstance(event, engine.RundownFinished):
            payload = build_result(event.result, context(curve_points=points))
            assert SCHEMA.is_valid(json.loads(payload.to_json_bytes()))
            assert (payload.status is Judgement.OK) == (not payload.reasons)
            assert len(payload.curve.t_s) <= points
