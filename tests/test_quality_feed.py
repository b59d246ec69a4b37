"""The station's quality feed: results stored first, the tracker fed after, and the charts
rebuilt from the journal after a restart (a real SQLite outbox)."""

from __future__ import annotations

from importlib import resources
from pathlib import Path

from clampd.daemon.runtime import AsyncOutbox
from clampd.daemon.runtime._quality import QualityFeed
from clampd.daemon.runtime._results import OutboxResultSink
from clampd.protocol import RundownResult, Topics


def _example() -> RundownResult:
    text = resources.files("clampd.protocol").joinpath("examples/RundownResult.json").read_text()
    return RundownResult.model_validate_json(text)


async def test_stored_results_feed_the_tracker_and_a_restart_replays_them(tmp_path: Path) -> None:
    result = _example()
    topics = Topics(result.station)
    path = tmp_path / "journal.sqlite3"
    async with AsyncOutbox(path) as outbox:
        feed = QualityFeed(OutboxResultSink(outbox, topics))
        assert await feed.put_result(result)
        assert not await feed.put_result(result)  # the same result again: stored once, fed once
        keys = list(feed.tracker.groups())  # program × wrench, program × joint position
        assert len(keys) == 2
        assert [feed.tracker.snapshot(k).count for k in keys] == [1, 1]
    async with AsyncOutbox(path) as outbox:
        restarted = QualityFeed(OutboxResultSink(outbox, topics))
        assert await restarted.replay(outbox) == 1
        assert list(restarted.tracker.groups()) == keys
        assert [restarted.tracker.snapshot(k).count for k in keys] == [1, 1]
