"""Station view: event → page update latency and page weight, in real headless Chromium.

Run: ``.venv/bin/python -m pytest -p benchmark benchmarks/bench_view.py --benchmark-only -s``
or ``.venv/bin/python benchmarks/bench_view.py [--rundowns N] [--speed X]`` (prints JSON).
Needs Debian's ``chromium`` and Playwright for Python (the ``test`` extra).

What is measured:
- **Latency**: the hub stamps every message with the wall time at which it received the
  input (for held curve points, the oldest one's); the page, after applying the message to
  the DOM and redrawing the plot, takes ``performance.timeOrigin + performance.now()`` minus
  that stamp. Both clocks are this machine's wall clock. Inputs come from a real ``Engine``
  replaying simulated rundowns in real time, the way the wrench worker feeds it; the figure
  therefore includes the hub, JSON, the SSE socket, the browser's parser and the redraw,
  and for curve points also the deliberate rate limit (≤ 25 deltas/s, ``CURVE_INTERVAL_S``).
  Goal: p95 ≤ 100 ms.
- **Page weight**: the bytes the server wrote for a first load (``/``, every asset, the event
  stream's head and its first snapshot), and, as a cross-check, the browser's own resource
  timing (``transferSize``; the stream is not in it). Goal: ≤ 300 kB.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import statistics
import sys
import tempfile
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from view_support import POSITIONS, STATION, WRENCH, play, show_station, trace

from clampd.daemon.view import ViewHub, ViewServer

CHROMIUM = "/usr/bin/chromium"
FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]


def _pct(values: list[float], q: float) -> float:
    ordered = sorted(values)
    k = max(0, min(len(ordered) - 1, round(q * (len(ordered) - 1))))
    return round(ordered[k], 2)


def _summary(values: list[float]) -> dict[str, Any]:
    if not values:
        return {"n": 0}
    return {
        "n": len(values),
        "p50_ms": _pct(values, 0.50),
        "p95_ms": _pct(values, 0.95),
        "p99_ms": _pct(values, 0.99),
        "max_ms": round(max(values), 2),
        "mean_ms": round(statistics.fmean(values), 2),
    }


async def measure(rundowns: int = 4, speed: float = 1.0) -> dict[str, Any]:
    """Load the page at 800×480, play ``rundowns`` simulated rundowns, read the figures."""
    from playwright.async_api import async_playwright

    hub = ViewHub(STATION, name="Bogie line, bracket station 12")
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    hub.on_link(WRENCH, connected=True, battery_pct=81, calibration="ok", torque_max_nm=100.0)
    hub.on_broker(True, 0)
    async with ViewServer(hub) as server, async_playwright() as pw:
        with tempfile.TemporaryDirectory() as profile:
            context = await pw.chromium.launch_persistent_context(
                profile,
                executable_path=CHROMIUM,
                args=FLAGS,
                headless=True,
                viewport={"width": 800, "height": 480},
            )
            page = context.pages[0] if context.pages else await context.new_page()
            await page.goto(server.url)
            # Polled from here: the page's CSP forbids the in-page eval wait_for_function uses.
            while not await page.evaluate("window.clampdView?.snapshots > 0"):  # noqa: ASYNC110
                await asyncio.sleep(0.02)
            served = dict(server.served)
            browser_bytes = await page.evaluate(
                "performance.getEntriesByType('navigation').concat("
                "performance.getEntriesByType('resource'))"
                ".reduce((s, e) => s + (e.transferSize || 0), 0)"
            )
            states = dict.fromkeys(POSITIONS, "pending")
            for k in range(rundowns):
                position = POSITIONS[k % len(POSITIONS)]
                played = await play(hub, trace(1 + k % 3), position=position, speed=speed)
                states[position] = played.payload.status.value.lower()
                show_station(hub, states)
                await asyncio.sleep(0.3)
            by_type: dict[str, list[float]] = await page.evaluate("window.clampdView.byType")
            applied = await page.evaluate("window.clampdView.applied")
            resyncs = await page.evaluate("window.clampdView.resyncs")
            await context.close()
    everything = [x for values in by_type.values() for x in values]
    events = [x for t, values in by_type.items() if t != "points" for x in values]
    return {
        "rundowns": rundowns,
        "messages_applied": applied,
        "resyncs": resyncs,
        "latency_all": _summary(everything),
        "latency_events": _summary(events),
        "latency_points": _summary(by_type.get("points", [])),
        "page_weight_bytes": sum(served.values()),
        "page_weight_by_path": served,
        "browser_transfer_bytes": browser_bytes,
        "goal": {"latency_p95_ms": 100, "page_weight_bytes": 300_000},
    }


def test_view_latency_and_weight(benchmark: Any) -> None:
    import pytest

    if not Path(CHROMIUM).exists():
        pytest.skip("needs Debian's chromium")
    out: dict[str, Any] = {}

    def run() -> None:
        out.update(asyncio.run(measure()))

    benchmark.pedantic(run, rounds=1, iterations=1)
    benchmark.extra_info.update(out)
    print(json.dumps(out, indent=2))


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rundowns", type=int, default=4)
    parser.add_argument("--speed", type=float, default=1.0, help="replay speed (1 = real time)")
    args = parser.parse_args()
    if args.rundowns < 1 or args.speed <= 0:
        print("bench_view: --rundowns >= 1 and --speed > 0", file=sys.stderr)
        return 2
    print(json.dumps(asyncio.run(measure(args.rundowns, args.speed)), indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
