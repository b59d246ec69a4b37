"""The asyncio runtime: BLE links, MQTT, the durable outbox, cues, configuration."""

from clampd.daemon.runtime._backoff import next_delay
from clampd.daemon.runtime._outbox import (
    AsyncOutbox,
    Entry,
    Outbox,
    OutboxConflictError,
    OutboxDiskFullError,
    OutboxError,
    OutboxFullError,
    OutboxInputError,
    OutboxStats,
    OutboxUnknownIdError,
)

__all__ = [
    "AsyncOutbox",
    "Entry",
    "Outbox",
    "OutboxConflictError",
    "OutboxDiskFullError",
    "OutboxError",
    "OutboxFullError",
    "OutboxInputError",
    "OutboxStats",
    "OutboxUnknownIdError",
    "next_delay",
]
