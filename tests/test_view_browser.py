"""The station view end to end in real headless Chromium (Debian's ``chromium``, driven by
Playwright for Python with ``executable_path``; no browser is downloaded).

The page is served by the real ``ViewServer`` and fed by a real ``Engine`` replaying a
simulated rundown in real time (``view_support.play``), the way the runtime feeds it. The
tests check what a technician sees: the page loads with no console error, the curve grows
while the rundown runs, the verdict and the result list show the judged result in words and
shapes, and the joint list follows the station state. Screenshots at 800×480 and 1920×1080
go to ``$CLAMPD_SCREENSHOTS`` (default: a pytest temporary folder); the path is printed.

Skipped when Chromium or Playwright is missing, unless ``CLAMPD_REQUIRE_BROWSER=1`` (CI).
"""

from __future__ import annotations

import asyncio
import contextlib
import os
from collections.abc import AsyncIterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pytest
from view_support import PART, POSITIONS, PROGRAM, STATION, WRENCH, play, show_station, trace

from clampd.daemon.view import ViewHub, ViewServer, station_view

if TYPE_CHECKING:
    from playwright.async_api import ViewportSize

CHROMIUM = Path("/usr/bin/chromium")
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
SMALL: ViewportSize = {"width": 800, "height": 480}  # the station touchscreen
LARGE: ViewportSize = {"width": 1920, "height": 1080}  # a line lead's desktop
DATASET = "n => n.map(e => e.dataset.{})"


def need_browser() -> None:
    """Skip (or fail under ``CLAMPD_REQUIRE_BROWSER=1``) without Chromium or Playwright."""
    why = None
    try:
        import playwright.async_api  # noqa: F401
    except ImportError:
        why = "playwright is not installed (pip install playwright; never `playwright install`)"
    if why is None and not CHROMIUM.exists():
        why = f"{CHROMIUM} is missing (apt-get install chromium)"
    if why is not None:
        if os.environ.get("CLAMPD_REQUIRE_BROWSER") == "1":
            pytest.fail(f"CLAMPD_REQUIRE_BROWSER=1 but {why}")
        pytest.skip(why)


@pytest.fixture
def screenshots(tmp_path_factory: pytest.TempPathFactory) -> Path:
    where = os.environ.get("CLAMPD_SCREENSHOTS")
    folder = Path(where) if where else tmp_path_factory.mktemp("screenshots")
    folder.mkdir(parents=True, exist_ok=True)
    print(f"\nstation view screenshots: {folder}")
    return folder


class Page:
    """A Chromium page on the view, recording console errors, page errors and failed loads."""

    def __init__(self, page: Any) -> None:
        self.page = page
        self.problems: list[str] = []
        page.on(
            "console",
            lambda m: (
                self.problems.append(f"console {m.type}: {m.text}")
                if m.type in ("error", "warning")
                else None
            ),
        )
        page.on("pageerror", lambda e: self.problems.append(f"page error: {e}"))
        page.on("requestfailed", lambda r: self.problems.append(f"request failed: {r.url}"))

    async def until(self, expression: str, timeout_s: float = 10.0) -> None:
        """Poll ``expression`` from the test side. (Playwright's ``wait_for_function`` polls
        with an in-page eval, which the page's Content-Security-Policy rightly forbids.)"""
        async with asyncio.timeout(timeout_s):
            # The page is another process: there is no event here to wait on but its answer.
            while not await self.page.evaluate(expression):  # noqa: ASYNC110
                await asyncio.sleep(0.02)

    async def attr(self, selector: str, name: str) -> str | None:
        value = await self.page.get_attribute(selector, name)
        return None if value is None else str(value)

    async def text(self, selector: str) -> str:
        return str(await self.page.text_content(selector) or "")


@contextlib.asynccontextmanager
async def chromium(tmp_path: Path, url: str) -> AsyncIterator[Page]:
    need_browser()
    from playwright.async_api import async_playwright

    async with async_playwright() as pw:
        context = await pw.chromium.launch_persistent_context(
            str(tmp_path / "profile"),  # a fresh user-data-dir per test
            executable_path=str(CHROMIUM),
            args=FLAGS,
            headless=True,
            viewport=SMALL,
        )
        try:
            page = Page(context.pages[0] if context.pages else await context.new_page())
            await page.page.goto(url)
            await page.until("window.clampdView?.snapshots > 0")
            yield page
        finally:
            await context.close()


@pytest.fixture
async def station() -> AsyncIterator[tuple[ViewHub, ViewServer]]:
    hub = ViewHub(STATION, name="Bogie line, bracket station 12")
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    hub.on_link(WRENCH, connected=True, battery_pct=81, calibration="ok", torque_max_nm=100.0)
    hub.on_broker(True, 0)
    async with ViewServer(hub) as server:
        yield hub, server


async def test_the_page_loads_with_no_console_error(
    station: tuple[ViewHub, ViewServer], tmp_path: Path
) -> None:
    hub, server = station
    async with chromium(tmp_path, server.url) as p:
        await p.page.wait_for_selector('#stream[data-state="up"]')
        assert await p.text("#station-name") == STATION
        assert await p.text("#part") == PART
        assert await p.text("#program") == "bracket-m10 v1"
        joints = await p.page.query_selector_all("#joints li")
        assert len(joints) == len(POSITIONS)
        assert await p.attr("#joints li.next", "data-position") == "S1"
        assert await p.text("#verdict-text") == "READY"
        chip = await p.text("#wrenches")
        assert WRENCH in chip
        assert "81%" in chip
        assert "queued" in await p.text("#broker")
        # The plot draws the program's references before any rundown.
        refs = await p.page.eval_on_selector_all(
            "#curve [data-ref]", "n => n.map(e => e.dataset.ref)"
        )
        assert {"window", "snug", "target"} <= set(refs)
        # A state change arrives pushed, with no reload.
        hub.on_link(WRENCH, connected=False)
        await p.page.wait_for_selector(f'#wrenches [data-wrench="{WRENCH}"][data-state="down"]')
        assert "no link" in await p.text("#wrenches")
        assert p.problems == []


async def test_a_rundown_draws_live_and_its_result_appears(
    station: tuple[ViewHub, ViewServer], tmp_path: Path, screenshots: Path
) -> None:
    hub, server = station
    async with chromium(tmp_path, server.url) as p:
        replay = asyncio.create_task(play(hub, trace(3), position="S1"))
        seen: list[tuple[str, int]] = []
        shot_mid = False
        while not replay.done():
            status = await p.attr("#verdict", "data-status") or ""
            points = int(await p.attr("#curve", "data-points") or 0)
            seen.append((status, points))
            if status == "running" and points > 40 and not shot_mid:
                await p.page.screenshot(path=str(screenshots / "view-800x480-running.png"))
                shot_mid = True
            await asyncio.sleep(0.05)
        played = await replay
        running = [n for s, n in seen if s == "running"]
        # Live: while the rundown ran, the page showed the curve growing, step after step
        # (how many steps a 50 ms poll catches depends on the machine; three prove pushes).
        assert len(set(running)) >= 3, seen
        assert running == sorted(running)
        assert shot_mid
        await p.page.wait_for_selector('#verdict[data-status="OK"]')
        assert await p.text("#verdict-text") == "OK"
        assert await p.attr("#verdict-shape", "href") == "#s-ok"  # a shape, not only colour
        assert await p.attr("#trace", "data-phase") == "finished"
        first = await p.page.query_selector("#results li")
        assert first is not None
        assert await first.get_attribute("data-id") == played.payload.id
        assert "OK" in (await first.text_content() or "")
        assert f"S1 {PART}" in (await first.text_content() or "")
        marks = await p.page.eval_on_selector_all(
            "#curve [data-mark]", "n => n.map(e => e.dataset.mark)"
        )
        assert "snug" in marks
        assert "stop" in marks
        # The station marks the joint: the list follows, the next one is highlighted.
        show_station(hub, {"S1": "ok", "S2": "pending", "S3": "pending", "S4": "pending"})
        await p.page.wait_for_selector('#joints li[data-position="S1"][data-state="ok"]')
        assert await p.attr("#joints li.next", "data-position") == "S2"
        assert await p.text("#joint-count") == "1/4"
        await p.page.screenshot(path=str(screenshots / "view-800x480.png"))
        await p.page.set_viewport_size(LARGE)
        await p.page.wait_for_timeout(200)  # a resize redraws the plot
        await p.page.screenshot(path=str(screenshots / "view-1920x1080.png"))
        assert p.problems == []
    for name in ("view-800x480.png", "view-1920x1080.png", "view-800x480-running.png"):
        assert (screenshots / name).stat().st_size > 10_000


async def test_a_nok_rundown_is_shown_in_words_and_shape(
    station: tuple[ViewHub, ViewServer], tmp_path: Path, screenshots: Path
) -> None:
    hub, server = station
    async with chromium(tmp_path, server.url) as p:
        # Stopping by feel at 40 N·m overshoots past the 46 N·m window top (view_support).
        played = await play(hub, trace(2, stop_at_nm=40.0), position="S1", speed=2.0)
        assert played.payload.status.value == "NOK"
        await p.page.wait_for_selector('#verdict[data-status="NOK"]')
        assert await p.text("#verdict-text") == "NOK"
        assert await p.attr("#verdict-shape", "href") == "#s-nok"
        assert "torque high" in await p.text("#verdict-detail")
        assert await p.attr("#results li", "data-status") == "NOK"
        await p.page.screenshot(path=str(screenshots / "view-800x480-nok.png"))
        assert p.problems == []


async def test_a_page_pinned_to_one_wrench_stays_on_it(tmp_path: Path) -> None:
    """Two wrenches at one station: ``?wrench=ID`` keeps a screen on its own tool's joints and
    verdict while the other tool works; the unpinned page follows the latest rundown."""
    other = "bg-12-w2"
    hub = ViewHub(STATION)
    hub.on_station(
        station_view(
            STATION,
            jobs=[
                (WRENCH, PROGRAM, PART, dict.fromkeys(POSITIONS, "pending"), False),
                (other, PROGRAM, PART, {"N1": "pending", "N2": "pending"}, False),
            ],
        )
    )
    hub.on_link(WRENCH, connected=True, battery_pct=70)
    hub.on_link(other, connected=True, battery_pct=90)
    async with (
        ViewServer(hub) as server,
        chromium(tmp_path / "a", f"{server.url}?wrench={other}") as pinned,
        chromium(tmp_path / "b", server.url) as follows,
    ):
        await play(hub, trace(1), position="S1", speed=2.0)
        await follows.page.wait_for_selector('#verdict[data-status="OK"]')
        assert await follows.text("#wrench-focus") == f"wrench {WRENCH}"
        # The pinned page saw the same messages and still shows its own wrench.
        await pinned.until("document.querySelectorAll('#results li').length === 1")
        assert await pinned.text("#wrench-focus") == f"wrench {other}"
        assert await pinned.attr("#verdict", "data-status") == "idle"
        positions = await pinned.page.eval_on_selector_all("#joints li", DATASET.format("position"))
        assert positions == ["N1", "N2"]
        assert "pinned" in (await pinned.attr(f'#wrenches [data-wrench="{other}"]', "class") or "")
        assert pinned.problems == []
        assert follows.problems == []


async def test_a_lost_stream_dims_the_page_and_says_so(tmp_path: Path) -> None:
    """A stale OK must not look live: when the station stops answering, the page says so in
    words and dims what it shows until the stream is back."""
    hub = ViewHub(STATION)
    show_station(hub, dict.fromkeys(POSITIONS, "pending"))
    server = ViewServer(hub)
    await server.start()
    port = server.port
    try:
        async with chromium(tmp_path, server.url) as p:
            await p.until("document.body.dataset.stream === 'up'")
            assert not await p.page.is_visible("#stale")
            await server.close()
            await p.until("document.body.dataset.stream === 'down'")
            assert await p.page.is_visible("#stale")
            assert "NO LIVE DATA" in await p.text("#stale")
            # The station is back on the same address: the page reconnects by itself.
            server = ViewServer(hub, port=port)
            await server.start()
            await p.until("document.body.dataset.stream === 'up'", timeout_s=15)
            assert not await p.page.is_visible("#stale")
            # Failed reconnection attempts are logged by the browser; nothing else is.
            others = [x for x in p.problems if "/events" not in x and "ERR_CONNECTION" not in x]
            assert others == []
    finally:
        await server.close()
