"""Quality tracker speed: one result through ``QualityTracker.add`` (model and journal bytes),
and ``clampd stats``'s journal replay.

Run: ``.venv/bin/python -m pytest -p benchmark tests/benchmarks/bench_quality.py --benchmark-only``.
The runtime calls ``add`` once per finished rundown (seconds apart at a manual station), so
the figure that matters is its cost next to a rundown, not throughput. Each ``add`` builds a
``QualityStats`` payload (pydantic validation) and recomputes the 50-result window's figures.
"""

from __future__ import annotations

import datetime as dt
import json
import time
from pathlib import Path
from typing import Any

import numpy as np

from clampd.daemon.cli._stats import collect
from clampd.daemon.quality import QualityTracker
from clampd.daemon.runtime import Outbox
from clampd.protocol import RundownResult, new_uuid7

ROOT = Path(__file__).resolve().parents[2]
EXAMPLE: dict[str, Any] = json.loads(
    (ROOT / "protocol" / "examples" / "RundownResult.json").read_text()
)
T0 = dt.datetime(2026, 5, 12, 6, 0, tzinfo=dt.UTC)


def _results(n: int) -> list[RundownResult]:
    rng = np.random.default_rng(1)
    out = []
    for i in range(n):
        d = json.loads(json.dumps(EXAMPLE))
        finished = T0 + dt.timedelta(seconds=40 * i)
        d["id"] = new_uuid7()
        d["started_at"] = (finished - dt.timedelta(seconds=2)).isoformat()
        d["finished_at"] = finished.isoformat()
        torque = float(47.5 + 0.9 * rng.standard_normal())
        d["final_torque_nm"] = torque
        d["peak_torque_nm"] = torque + 0.01
        d["final_angle_deg"] = float(30.2 + 0.4 * rng.standard_normal())
        out.append(RundownResult.model_validate(d, strict=False))
    return out


RESULTS = _results(2000)


def test_add_model(benchmark: Any) -> None:
    tracker = QualityTracker()
    for r in RESULTS[:200]:  # past the baseline: charts are judged on every subgroup
        tracker.add(r)
    fresh = iter(_results(20000))
    out = benchmark(lambda: tracker.add(next(fresh)))
    assert out


def test_add_journal_bytes(benchmark: Any) -> None:
    tracker = QualityTracker()
    for r in RESULTS[:200]:
        tracker.add(r)
    fresh = iter([r.to_json_bytes() for r in _results(20000)])
    benchmark(lambda: tracker.add(next(fresh)))


def test_replay_journal_of_2000_results(benchmark: Any, tmp_path: Path) -> None:
    db = tmp_path / "outbox.sqlite3"
    with Outbox(db) as ob:
        for r in RESULTS:
            ob.put(r.id, "bench/result", r.to_json_bytes())
    with Outbox(db) as ob:
        got = benchmark(lambda: collect(ob, window=50))
    assert got.results == len(RESULTS)
    start = time.perf_counter()  # a one-line figure for the report, not an assertion
    with Outbox(db) as ob:
        collect(ob, window=50)
    print(f"replay: {len(RESULTS) / (time.perf_counter() - start):.0f} results/s")
