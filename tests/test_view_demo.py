"""The station view of a running ``clampd demo``, in real headless Chromium.

``clampd demo`` prints the page's address; the page then shows the demo's own rundowns (two
virtual wrenches over the virtual GATT link, the real station daemon, mosquitto or the
embedded broker) as they happen: the live curve grows, results arrive, no console error.

Skipped when Chromium or Playwright is missing (unless ``CLAMPD_REQUIRE_BROWSER=1``).
"""

from __future__ import annotations

import asyncio
import contextlib
import sys
from pathlib import Path

import pytest
from test_view_browser import chromium, need_browser


@pytest.mark.slow
async def test_the_demo_prints_the_view_and_the_page_follows_it(tmp_path: Path) -> None:
    need_browser()
    proc = await asyncio.create_subprocess_exec(
        sys.executable,
        "-m",
        "clampd.daemon.cli",
        "demo",
        "--parts",
        "1",
        "--plain",
        "--out",
        str(tmp_path / "out"),
        stdout=asyncio.subprocess.PIPE,
        stderr=asyncio.subprocess.STDOUT,
    )
    assert proc.stdout is not None
    lines: list[str] = []
    try:
        url = None
        async with asyncio.timeout(60):
            while url is None:
                raw = await proc.stdout.readline()
                if not raw:
                    break
                line = raw.decode(errors="replace").rstrip()
                lines.append(line)
                if line.startswith("station view: http://"):
                    url = line.removeprefix("station view: ")
        assert url is not None, "\n".join(lines)
        assert url.startswith("http://127.0.0.1:")  # loopback by default
        async with chromium(tmp_path / "browser", url) as page:
            # Chromium may open mid-shift: wait for a rundown seen running with a growing
            # curve, then for a result that arrives after the page opened.
            count = "document.querySelectorAll('#results li').length"
            initial = int(await page.page.evaluate(count))
            most_points = 0
            async with asyncio.timeout(90):
                while most_points <= 5 or int(await page.page.evaluate(count)) <= initial:
                    if await page.attr("#verdict", "data-status") == "running":
                        points = int(await page.attr("#curve", "data-points") or 0)
                        most_points = max(most_points, points)
                    await asyncio.sleep(0.05)
            status = await page.attr("#results li", "data-status")
            assert status in ("OK", "NOK")
            chips = await page.page.eval_on_selector_all(
                "#wrenches [data-wrench]", "n => n.map(e => e.dataset.wrench)"
            )
            assert len(chips) == 2
            assert "up" in (await page.attr("#broker", "data-state") or "")
            assert page.problems == []
        async with asyncio.timeout(120):
            rest = await proc.stdout.read()
        lines += rest.decode(errors="replace").splitlines()
        assert await proc.wait() == 0, "\n".join(lines)
        assert f"station view: {url}" in lines  # also in the closing report
    finally:
        if proc.returncode is None:
            proc.terminate()
            with contextlib.suppress(ProcessLookupError):
                await proc.wait()
