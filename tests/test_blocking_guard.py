"""The shared `blockbuster` fixture really catches blocking calls made by clampd code in the loop.

Control test for the guard itself: a guard that scans no file would pass every test silently.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from blockbuster import BlockingError

from clampd.daemon.runtime import Outbox


async def test_guard_catches_a_blocking_sqlite_write_in_the_loop(
    tmp_path: Path, blockbuster: object
) -> None:
    with pytest.raises(BlockingError):  # noqa: PT012 - opening and writing both block
        outbox = Outbox(tmp_path / "journal.db")
        outbox.put("0190a1b2-c3d4-7e5f-8a9b-0c1d2e3f4a5b", "t/result", b"{}")
