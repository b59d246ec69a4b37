"""Quality tracker: rolling statistics, capability, chart limits and drift alarms per program ×
wrench and per joint position, from valid results built with the protocol's model.

Sources beside each check:
- Means and standard deviations: numpy (``mean``, ``std(ddof=1)``), independent of the tracker.
- Cm/Cmk and Cp/Cpk: the definitions in ``test_quality_capability.py`` (ISO 22514-2,
  VDI/VDE 2645-2, Montgomery ch. 8; from memory), recomputed here with numpy, and d2 for n = 5
  from the published table (ASTM MNL 7 / Montgomery Appendix VI, from memory: 2.326).
- Payloads: the JSON Schema that ``clampd schema`` exports, checked with the ``jsonschema``
  reference validator.
- Results: the demo scenario's invented data (protocol/examples/RundownResult.json).
"""

from __future__ import annotations

import ast
import datetime as dt
import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from jsonschema import Draft202012Validator

from clampd.daemon.quality import (
    GroupKey,
    MonitorSettings,
    QualityInputError,
    QualityTracker,
    TrackerSettings,
)
from clampd.protocol import (
    Alarm,
    AlarmCode,
    AlarmState,
    QualityStats,
    RundownResult,
    StopTrigger,
    json_schemas,
    new_uuid7,
)

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE: dict[str, Any] = json.loads(
    (ROOT / "protocol" / "examples" / "RundownResult.json").read_text()
)
T0 = dt.datetime(2026, 5, 12, 6, 0, tzinfo=dt.UTC)
SCHEMAS = json_schemas()
D2_N5 = 2.326  # published table, n = 5


def make_result(
    i: int,
    torque: float,
    angle: float | None = 30.0,
    *,
    wrench: str = "wr-07",
    position: str = "spindle-bolt-2",
    version: int = 3,
    stop: StopTrigger = StopTrigger.ANGLE_REACHED,
) -> RundownResult:
    """A valid result of the demo scenario; OK exactly when torque and angle are in window."""
    d = json.loads(json.dumps(EXAMPLE))
    finished = T0 + dt.timedelta(seconds=40 * i)
    d["id"] = new_uuid7()
    d["wrench"]["wrench_id"] = wrench
    d["joint_position"] = position
    d["program"]["version"] = version
    d["started_at"] = (finished - dt.timedelta(seconds=2)).isoformat()
    d["finished_at"] = finished.isoformat()
    d["final_torque_nm"] = torque
    d["peak_torque_nm"] = torque + 0.01
    d["final_angle_deg"] = angle
    d["stop_trigger"] = stop.value
    reasons = []
    if torque < 40.0:
        reasons.append("torque_low")
    if torque > 58.0:
        reasons.append("torque_high")
    if angle is not None and angle < 28.0:
        reasons.append("angle_low")
    if angle is not None and angle > 34.0:
        reasons.append("angle_high")
    if stop in {StopTrigger.ABORTED, StopTrigger.LINK_LOST}:
        reasons.append("aborted" if stop is StopTrigger.ABORTED else "link_lost")
    d["reasons"] = reasons
    d["status"] = "NOK" if reasons else "OK"
    return RundownResult.model_validate(d, strict=False)


def feed(tracker: QualityTracker, results: list[RundownResult]) -> list[QualityStats | Alarm]:
    out: list[QualityStats | Alarm] = []
    for r in results:
        out += tracker.add(r)
    return out


def alarms_of(out: list[QualityStats | Alarm]) -> list[Alarm]:
    return [o for o in out if isinstance(o, Alarm)]


def validate(payload: QualityStats | Alarm) -> None:
    schema = SCHEMAS[type(payload).__name__]
    Draft202012Validator(schema).validate(json.loads(payload.to_json_bytes()))


def test_stats_match_independent_numpy_figures() -> None:
    rng = np.random.default_rng(11)
    torques = 47.5 + 0.9 * rng.standard_normal(60)
    angles = 30.2 + 0.4 * rng.standard_normal(60)
    torques[17] = 39.0  # one NOK, inside the rolling window of the last 50
    tracker = QualityTracker(TrackerSettings(window=50))
    results = [
        make_result(i, float(t), float(a))
        for i, (t, a) in enumerate(zip(torques, angles, strict=True))
    ]
    out = feed(tracker, results)
    stats = [o for o in out if isinstance(o, QualityStats)][-1]
    assert isinstance(stats, QualityStats)
    validate(stats)
    last_t, last_a = torques[-50:], angles[-50:]
    assert (stats.count, stats.window_size) == (50, 50)
    assert stats.nok_count == int(((last_t < 40) | (last_t > 58)).sum()) == 1
    assert stats.final_torque_mean_nm == pytest.approx(float(last_t.mean()), rel=1e-12)
    assert stats.final_torque_std_nm == pytest.approx(float(last_t.std(ddof=1)), rel=1e-10)
    assert stats.final_angle_std_deg == pytest.approx(float(last_a.std(ddof=1)), rel=1e-10)
    assert stats.first_at == results[10].finished_at
    assert stats.last_at == stats.at == results[-1].finished_at
    cap = stats.final_torque_capability
    assert cap is not None
    s = float(last_t.std(ddof=1))
    m = float(last_t.mean())
    assert (cap.lsl, cap.usl) == (40.0, 58.0)
    assert cap.cm == pytest.approx(18.0 / (6 * s), rel=1e-10)
    assert cap.cmk == pytest.approx(min(58.0 - m, m - 40.0) / (3 * s), rel=1e-10)
    sigma_w = float(np.ptp(last_t.reshape(10, 5), axis=1).mean()) / D2_N5
    assert cap.cp == pytest.approx(18.0 / (6 * sigma_w), rel=1e-10)
    assert cap.cpk == pytest.approx(min(58.0 - m, m - 40.0) / (3 * sigma_w), rel=1e-10)
    # 60 results = 12 subgroups: the 20-subgroup baseline is not complete, no chart yet.
    assert stats.final_torque_chart_nm is None


def test_chart_limits_appear_after_the_baseline_and_match_numpy() -> None:
    rng = np.random.default_rng(12)
    torques = 47.5 + 0.9 * rng.standard_normal(103)
    tracker = QualityTracker()
    out = feed(tracker, [make_result(i, float(t)) for i, t in enumerate(torques)])
    stats = out[-1]
    assert isinstance(stats, QualityStats)
    validate(stats)
    chart = stats.final_torque_chart_nm
    assert chart is not None
    base = torques[:100].reshape(20, 5)
    rbar = float(np.ptp(base, axis=1).mean())
    assert chart.xbar_center == pytest.approx(float(base.mean()), rel=1e-12)
    assert chart.xbar_ucl == pytest.approx(float(base.mean()) + 0.577 * rbar, rel=1e-12)
    assert chart.range_ucl == pytest.approx(2.114 * rbar, rel=1e-12)
    assert (chart.subgroup_size, chart.baseline_subgroups) == (5, 20)
    assert chart.last_xbar is None  # the 21st subgroup is not complete yet
    assert chart.drift_alarm is False
    # Angles are all 30.0: a zero-width chart exists, its points are judged by no test.
    angle_chart = stats.final_angle_chart_deg
    assert angle_chart is not None
    assert angle_chart.range_center == 0.0


def test_unfinished_rundowns_count_but_are_not_measured() -> None:
    tracker = QualityTracker()
    feed(tracker, [make_result(i, 47.0 + 0.1 * i) for i in range(4)])
    out = tracker.add(make_result(4, 5.0, None, stop=StopTrigger.ABORTED))
    stats = out[0]
    assert isinstance(stats, QualityStats)
    assert (stats.count, stats.nok_count) == (5, 1)
    assert stats.final_torque_mean_nm == pytest.approx(47.15)
    assert tracker.snapshot(GroupKey("wrench", "spindle-m10-8.8", "wr-07")).torque.n == 4


def test_a_stable_process_stays_quiet_and_a_drift_raises_trend_drift() -> None:
    rng = np.random.default_rng(20261203)
    sigma = 0.9
    stable = [
        make_result(i, float(47.5 + sigma * z)) for i, z in enumerate(rng.standard_normal(500))
    ]
    quiet = QualityTracker()
    assert alarms_of(feed(quiet, stable)) == []

    noise = rng.standard_normal(300)
    drift = [0.0] * 100 + [0.05 * sigma * k for k in range(1, 201)]
    drifting = [
        make_result(i, float(47.5 + sigma * z + d))
        for i, (z, d) in enumerate(zip(noise, drift, strict=True))
    ]
    tracker = QualityTracker()
    raised_at: dict[str | None, int] = {}
    for i, r in enumerate(drifting):
        for a in alarms_of(tracker.add(r)):
            validate(a)
            assert (a.code, a.state) == (AlarmCode.TREND_DRIFT, AlarmState.RAISED)
            assert "Final torque" in a.text
            raised_at.setdefault(a.wrench_id, i + 1)
    # Both groupings see it: the wrench's (wrench_id set) and the joint position's (null).
    assert set(raised_at) == {"wr-07", None}
    assert all(100 < part <= 155 for part in raised_at.values()), raised_at
    stats = tracker.stats(GroupKey("wrench", "spindle-m10-8.8", "wr-07"))
    assert stats.final_torque_chart_nm is not None
    assert stats.final_torque_chart_nm.drift_alarm is True


def test_replay_gives_identical_payloads_and_clear_shares_the_raise_id() -> None:
    rng = np.random.default_rng(5)
    noise = rng.standard_normal(200)
    shifted = [47.5 + 0.9 * z + (2.0 if 100 <= i < 150 else 0.0) for i, z in enumerate(noise)]
    results = [make_result(i, float(t)) for i, t in enumerate(shifted)]
    first = feed(QualityTracker(), results)
    second = feed(QualityTracker(), results)
    assert [p.to_json_bytes() for p in first] == [p.to_json_bytes() for p in second]
    wrench_alarms = [a for a in alarms_of(first) if a.wrench_id == "wr-07"]
    assert [a.state for a in wrench_alarms] == [AlarmState.RAISED, AlarmState.CLEARED]
    assert wrench_alarms[0].id == wrench_alarms[1].id
    assert wrench_alarms[0].at < wrench_alarms[1].at


def test_a_program_change_restarts_the_group_and_withdraws_its_alarm() -> None:
    rng = np.random.default_rng(6)
    values = [
        47.5 + 0.9 * z + (3.0 if i >= 100 else 0.0) for i, z in enumerate(rng.standard_normal(130))
    ]
    tracker = QualityTracker()
    raised = alarms_of(feed(tracker, [make_result(i, float(t)) for i, t in enumerate(values)]))
    assert {a.state for a in raised} == {AlarmState.RAISED}
    out = tracker.add(make_result(200, 47.5, version=4))
    cleared = alarms_of(out)
    assert {a.state for a in cleared} == {AlarmState.CLEARED}
    assert {a.id for a in cleared} == {a.id for a in raised}
    assert all("changed" in a.text for a in cleared)
    stats = out[0]
    assert isinstance(stats, QualityStats)
    assert stats.count == 1


def test_groups_per_wrench_and_per_joint_position() -> None:
    tracker = QualityTracker()
    feed(tracker, [make_result(i, 47.0, wrench="wr-07", position="bolt-1") for i in range(3)])
    feed(tracker, [make_result(10 + i, 48.0, wrench="wr-09", position="bolt-1") for i in range(2)])
    keys = list(tracker.groups())
    assert keys == [
        GroupKey("wrench", "spindle-m10-8.8", "wr-07"),
        GroupKey("wrench", "spindle-m10-8.8", "wr-09"),
        GroupKey("position", "spindle-m10-8.8", "bolt-1"),
    ]
    pos = tracker.snapshot(keys[2])
    assert pos.count == 5
    assert pos.torque.mean == pytest.approx(47.4)
    with pytest.raises(ValueError, match="per program and wrench"):
        tracker.stats(keys[2])


def test_duplicates_are_ignored_and_bad_bytes_are_a_typed_error() -> None:
    tracker = QualityTracker()
    r = make_result(0, 47.0)
    assert len(tracker.add(r)) == 1
    assert tracker.add(r.to_json_bytes()) == []
    with pytest.raises(QualityInputError, match="not a valid result"):
        tracker.add(b'{"kind": "result"}')
    with pytest.raises(QualityInputError):
        tracker.add(b"\xff")
    assert tracker.snapshot(GroupKey("wrench", "spindle-m10-8.8", "wr-07")).count == 1
    with pytest.raises(ValueError, match="window"):
        TrackerSettings(window=1)


def test_the_quality_package_is_pure() -> None:
    # Same policy as the engine (STYLE.md): no I/O, clock, network, logging or randomness.
    allowed = {
        "__future__", "collections", "dataclasses", "datetime", "enum", "hashlib", "itertools",
        "math", "types", "typing", "uuid", "pydantic", "clampd",
    }  # fmt: skip
    for path in sorted((ROOT / "daemon" / "quality").glob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            names = []
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module:
                names = [node.module]
            for name in names:
                assert name.split(".")[0] in allowed, (path.name, name)


finite = st.floats(allow_nan=False, allow_infinity=False)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    rows=st.lists(
        st.tuples(
            finite,
            st.none() | finite,
            st.sampled_from([StopTrigger.ANGLE_REACHED, StopTrigger.ABORTED]),
        ),
        min_size=1,
        max_size=40,
    )
)
def test_any_valid_results_give_schema_valid_payloads(
    rows: list[tuple[float, float | None, StopTrigger]],
) -> None:
    # Any value the result model accepts (down to subnormals, up to 1e308) must give
    # payloads that validate against the exported schema, never an exception.
    tracker = QualityTracker(TrackerSettings(window=10))
    tracker_settings_small = QualityTracker(
        TrackerSettings(window=10, monitor=MonitorSettings(subgroup_size=2, baseline_subgroups=2))
    )
    for i, (torque, angle, stop) in enumerate(rows):
        r = make_result(i, torque, angle, stop=stop)
        for t in (tracker, tracker_settings_small):
            out = t.add(r)
            for payload in out:
                validate(payload)
            stats = out[0]
            assert isinstance(stats, QualityStats)
            assert stats.count == min(10, i + 1)
            assert stats.ok_count + stats.nok_count == stats.count
