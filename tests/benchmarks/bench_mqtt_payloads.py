"""Cost of building and checking MQTT payloads: LTTB, a whole result, and command parsing.

Why it matters: every rundown ends with a curve downsample and a result serialisation on the
station's small board, and every command from the plant network is parsed before anything
else runs. None of this should approach the time between two rundowns (seconds).
Run:
``.venv/bin/python -m pytest -p benchmark tests/benchmarks/bench_mqtt_payloads.py
--benchmark-only``.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np

from clampd.protocol import (
    CommandName,
    Curve,
    RundownResult,
    Topics,
    lttb_indices,
    parse_command,
)

EXAMPLES = Path(__file__).resolve().parents[2] / "protocol" / "examples"
TOPICS = Topics("brackenfield/deck-assembly/line-3/st-120")


def _rundown(n: int) -> tuple[Any, Any, Any]:
    rng = np.random.default_rng(3)
    t = np.arange(n) / 2000.0  # 2 kHz sensor
    angle = np.linspace(-60.0, 45.0, n)
    torque = np.maximum(0.8, 10.0 + 1.2 * angle) + rng.normal(0.0, 0.05, n)
    return t, angle, torque


def test_lttb_8000_samples_to_256(benchmark: Any) -> None:
    """A 4 s rundown at 2 kHz, downsampled to the default 256 points."""
    _, angle, torque = _rundown(8000)
    idx = benchmark(lttb_indices, angle, torque, 256)
    assert len(idx) == 256


def test_result_with_curve_to_json(benchmark: Any) -> None:
    """Downsample, build and validate the result model, serialise to bytes."""
    t, angle, torque = _rundown(8000)
    base = json.loads((EXAMPLES / "RundownResult.json").read_text())

    def build() -> bytes:
        curve = Curve.from_samples(t, angle, torque)
        data = {**base, "curve": json.loads(curve.model_dump_json())}
        return RundownResult.model_validate(data, strict=False).to_json_bytes()

    out = benchmark(build)
    benchmark.extra_info["result_bytes"] = len(out)


def test_parse_select_program(benchmark: Any) -> None:
    payload = (EXAMPLES / "SelectProgram.json").read_bytes()
    topic = TOPICS.command(CommandName.SELECT_PROGRAM)
    cmd = benchmark(parse_command, TOPICS, topic, payload)
    assert cmd.name is CommandName.SELECT_PROGRAM
