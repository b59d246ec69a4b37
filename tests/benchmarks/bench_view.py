"""Station view: event → page update latency and page weight, in real headless Chromium.

Run: ``.venv/bin/python -m pytest -p benchmark tests/benchmarks/bench_view.py --benchmark-only -s``
or ``.venv/bin/python tests/benchmarks/bench_view.py [--rundowns N] [--speed X]`` (prints JSON), or
``--demo PARTS`` to measure the page of a running ``clampd demo`` instead of the replay rig.
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

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from view_support import POSITIONS, STATION, WRENCH, play, show_station, trace

from clampd.daemon.view import ViewHub, ViewServer

CHROMIUM = "/usr/bin/chromium"
# The browser's own count of a first load: navigation plus resources, without the event stream
# (its entry appears, with every byte it carried, only once the stream ends).
FIRST_LOAD_JS = (
    "performance.getEntriesByType('navigation')"
    ".concat(performance.getEntriesByType('resource'))"
    ".filter(e => !e.name.endsWith('/events'))"
    ".reduce((s, e) => s + (e.transferSize || 0), 0)"
)
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
            browser_bytes = await page.evaluate(FIRST_LOAD_JS)
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


async def measure_demo(parts: int = 2) -> dict[str, Any]:
    """The same figures against a running ``clampd demo`` (the real daemon feeds the view
    through its ports: live events at the worker's rate, results once durable)."""
    from playwright.async_api import async_playwright

    with tempfile.TemporaryDirectory() as work:
        proc = await asyncio.create_subprocess_exec(
            sys.executable,
            "-m",
            "clampd.daemon.cli",
            "demo",
            "--parts",
            str(parts),
            "--plain",
            "--out",
            str(Path(work) / "out"),
            stdout=asyncio.subprocess.PIPE,
            stderr=asyncio.subprocess.STDOUT,
        )
        assert proc.stdout is not None
        url = None
        said: list[str] = []
        while url is None:
            line = (await proc.stdout.readline()).decode(errors="replace")
            said.append(line)
            if not line:
                raise RuntimeError("clampd demo printed no page address:\n" + "".join(said))
            if line.startswith("station view: http://"):
                url = line.strip().removeprefix("station view: ")
        async with async_playwright() as pw:
            context = await pw.chromium.launch_persistent_context(
                str(Path(work) / "profile"),
                executable_path=CHROMIUM,
                args=FLAGS,
                headless=True,
                viewport={"width": 800, "height": 480},
            )
            page = context.pages[0] if context.pages else await context.new_page()
            await page.goto(url)
            # Polled from here: the page's CSP forbids the in-page eval wait_for_function uses.
            while not await page.evaluate("window.clampdView?.snapshots > 0"):  # noqa: ASYNC110
                await asyncio.sleep(0.02)
            browser_bytes = await page.evaluate(FIRST_LOAD_JS)
            while True:  # until the closing report: the station has stopped by then
                line = (await proc.stdout.readline()).decode(errors="replace")
                if not line or line.startswith("parts done"):
                    break
            by_type: dict[str, list[float]] = await page.evaluate("window.clampdView.byType")
            await context.close()
        await proc.stdout.read()
        await proc.wait()
    everything = [x for values in by_type.values() for x in values]
    events = [x for t, values in by_type.items() if t != "points" for x in values]
    return {
        "source": f"clampd demo --parts {parts}",
        "latency_all": _summary(everything),
        "latency_events": _summary(events),
        "latency_points": _summary(by_type.get("points", [])),
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
    parser.add_argument(
        "--demo", type=int, metavar="PARTS", default=0, help="measure a running clampd demo"
    )
    args = parser.parse_args()
    if args.rundowns < 1 or args.speed <= 0 or args.demo < 0:
        print("bench_view: --rundowns >= 1, --speed > 0, --demo >= 0", file=sys.stderr)
        return 2
    if args.demo:
        print(json.dumps(asyncio.run(measure_demo(args.demo)), indent=2))
        return 0
    print(json.dumps(asyncio.run(measure(args.rundowns, args.speed)), indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
