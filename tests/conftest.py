"""Shared fixtures: a real MQTT broker on 127.0.0.1, a unique topic prefix per test, and a
guard that fails a test when a blocking call runs inside the event loop."""

from __future__ import annotations

import uuid
from collections.abc import AsyncIterator, Iterator

import pytest

from clampd.simulators._broker import LocalBroker


@pytest.fixture
async def broker(tmp_path_factory: pytest.TempPathFactory) -> AsyncIterator[LocalBroker]:
    """A broker of this test's own (mosquitto when installed), stoppable and restartable."""
    async with LocalBroker(workdir=tmp_path_factory.mktemp("broker")) as b:
        yield b


@pytest.fixture
def topic_prefix() -> str:
    """A topic prefix no other test uses, so tests never see each other's messages."""
    return f"test/{uuid.uuid4().hex[:12]}"


@pytest.fixture
def blockbuster() -> Iterator[object]:
    """Opt-in: fail the test when a blocking call (file, socket, sleep) runs in the loop.

    Opt-in rather than autouse because pytest's own machinery and the SQLite outbox
    (which runs in a worker thread by design) are not loop code.
    """
    from blockbuster import blockbuster_ctx

    # Named per package: the editable install maps the import names to the top-level folders,
    # so a scan by the namespace "clampd" alone would match no file and detect nothing.
    with blockbuster_ctx(["clampd.protocol", "clampd.daemon", "clampd.simulators"]) as bb:
        yield bb
