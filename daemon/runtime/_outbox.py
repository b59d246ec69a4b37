"""The durable outbox and local journal: one SQLite file per station.

Theory of operation
-------------------
Every tightening result is written here *before* anything tries to publish it, and is
marked sent only after the broker acknowledged it (QoS 1 PUBACK). So a result survives a
broker outage, a crash, ``kill -9`` and a power cut, and is published at least once;
consumers de-duplicate by the result id. The same rows, kept for a retention period after
they were sent, are the station's journal (``clampd results``).

Invariants
----------
- Append order is the ``seq`` column (``INTEGER PRIMARY KEY AUTOINCREMENT``: SQLite never
  reuses a value, even after the newest row was deleted), and ``pending()`` returns unsent
  rows strictly in that order, so results reach the MES in the order they were tightened.
- The result id (a UUID, stored as its canonical lower-case text) is ``UNIQUE``. Putting
  the same id with the same topic and payload again is a no-op that returns ``False``;
  putting it with *different* content raises ``OutboxConflictError`` rather than silently
  dropping one of the two (that would be a bug upstream, and losing either is worse).
  Idempotence lasts as long as the row: once retention has pruned a sent result, its id
  is unknown again and a late duplicate would be stored and published once more (which
  consumers de-duplicating by id absorb; at-least-once is the contract).
- Each ``put`` and ``mark_sent`` is one transaction in WAL mode with
  ``synchronous=FULL``: when the call returns, the row is on stable storage (SQLite docs,
  "PRAGMA synchronous": FULL syncs the WAL on every commit, so a commit survives a power
  loss). A failing write (disk full, size cap) rolls back and leaves the file intact.
- Unsent rows are never deleted.
- Every SQLite failure of opening, reading or writing reaches the caller as an ``OutboxError``
  (``OutboxStorageError`` unless a more precise one applies): a read-only or failing SD card
  must let the wrench worker hold its result and retry, not end its task with an exception
  type it cannot expect.

Retention and size policy
-------------------------
``prune(now)`` deletes sent rows whose ``sent_at`` is older than ``retention_days``. When
the live data exceeds ``size_cap_bytes``, ``prune`` and ``put`` delete the oldest *sent*
rows first. If the cap is still exceeded with only unsent rows left, ``put`` refuses the
new result with ``OutboxFullError`` — the caller keeps it (the engine's result stays in
memory and the operator is told) instead of the outbox discarding something unsent. A
real full disk (``SQLITE_FULL``) gives ``OutboxDiskFullError`` with the same guarantee.

Threads
-------
An sqlite3 connection belongs to the thread that opened it. ``Outbox`` is the synchronous
core; ``AsyncOutbox`` owns one dedicated worker thread that opens, uses and closes the
``Outbox``, so the event loop never blocks on disk I/O.
"""

from __future__ import annotations

import asyncio
import builtins
import concurrent.futures
import contextlib
import dataclasses
import datetime as dt
import functools
import logging
import os
import sqlite3
import time
import uuid
from collections.abc import Callable, Iterator
from pathlib import Path
from types import TracebackType
from typing import Any, NoReturn, Self, TypeVar

__all__ = [
    "DEFAULT_RETENTION_DAYS",
    "DEFAULT_SIZE_CAP_BYTES",
    "SCHEMA_VERSION",
    "AsyncOutbox",
    "Entry",
    "Outbox",
    "OutboxConflictError",
    "OutboxDiskFullError",
    "OutboxError",
    "OutboxFullError",
    "OutboxInputError",
    "OutboxStats",
    "OutboxStorageError",
    "OutboxUnknownIdError",
]

_log = logging.getLogger(__name__)

SCHEMA_VERSION = 1
# Sent results are kept 90 days as the station's journal: long enough to answer a quality
# query about last quarter's production at the station itself (our own choice; the MES
# holds the record of reference).
DEFAULT_RETENTION_DAYS = 90.0
# 512 MiB: a result with a 2 000-point curve is about 60 kB of JSON, so this holds roughly
# 8 000 results — several shifts of a busy station offline — while staying a small part of
# a 16 GB SD card (our own estimate from the payload size; tune per station in the config).
DEFAULT_SIZE_CAP_BYTES = 512 * 1024 * 1024
# Sent rows deleted per statement when making room: small enough to keep a transaction
# short on an SD card, large enough that one put rarely needs two rounds (our own choice).
_EVICT_BATCH = 64
_SECONDS_PER_DAY = 86_400.0


class OutboxError(Exception):
    """Base of the outbox's errors."""


class OutboxInputError(OutboxError, ValueError):
    """The caller passed something the outbox cannot store (e.g. an id that is no UUID)."""


class OutboxStorageError(OutboxError):
    """SQLite could not open or write the file (not a database, read-only, I/O error, locked).

    A write that fails this way was rolled back: nothing stored changed.
    """


class OutboxConflictError(OutboxError):
    """The id exists already with a different topic or payload; nothing was changed."""

    def __init__(self, result_id: str) -> None:
        super().__init__(
            f"result {result_id} is already stored with a different topic or payload; "
            "the stored one is kept"
        )
        self.result_id = result_id


class OutboxUnknownIdError(OutboxError, KeyError):
    """``mark_sent`` named an id that is not in the outbox."""

    def __init__(self, result_id: str) -> None:
        super().__init__(result_id)
        self.result_id = result_id

    def __str__(self) -> str:
        return f"no result with id {self.result_id} in the outbox"


class OutboxFullError(OutboxError):
    """The size cap is reached and only unsent results are left: the new one is refused.

    Nothing stored was lost; the caller still holds the refused result. Publishing (which
    lets sent rows be evicted) or raising the cap makes room.
    """

    def __init__(self, used_bytes: int, cap_bytes: int, unsent: int) -> None:
        super().__init__(
            f"outbox full: {used_bytes} of {cap_bytes} bytes used by {unsent} unsent "
            "results; the new result was refused (nothing stored was deleted)"
        )
        self.used_bytes = used_bytes
        self.cap_bytes = cap_bytes
        self.unsent = unsent


class OutboxDiskFullError(OutboxFullError):
    """SQLite reported SQLITE_FULL (disk or page limit): the write was rolled back."""

    def __init__(self, path: Path, unsent: int) -> None:
        OutboxError.__init__(
            self,
            f"disk full writing {path}: the write was rolled back, nothing stored was lost "
            f"({unsent} unsent results kept)",
        )
        self.used_bytes = -1
        self.cap_bytes = -1
        self.unsent = unsent
        self.path = path


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Entry:
    """One stored result. Times are UNIX seconds (host clock) except ``finished_at``."""

    seq: int
    id: str
    topic: str
    payload: bytes
    station: str | None
    wrench: str | None
    program: str | None
    part_id: str | None
    status: str | None
    finished_at: str | None
    created_at: float
    sent_at: float | None

    @property
    def sent(self) -> bool:
        """True once the broker acknowledged the result."""
        return self.sent_at is not None


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class OutboxStats:
    """Counts and sizes for health reporting (e.g. the daemon's status topic)."""

    total: int
    unsent: int
    oldest_unsent_created_at: float | None
    used_bytes: int
    file_bytes: int
    cap_bytes: int


# Schema migrations: index i upgrades user_version i to i + 1. Append only; never edit a
# shipped step (a station in the field may be at any version).
_MIGRATIONS: tuple[tuple[str, ...], ...] = (
    (
        """
        CREATE TABLE results (
            seq         INTEGER PRIMARY KEY AUTOINCREMENT,
            id          TEXT    NOT NULL UNIQUE,
            topic       TEXT    NOT NULL,
            payload     BLOB    NOT NULL,
            station     TEXT,
            wrench      TEXT,
            program     TEXT,
            part_id     TEXT,
            status      TEXT,
            finished_at TEXT,
            created_at  REAL    NOT NULL,
            sent_at     REAL
        )
        """,
        "CREATE INDEX results_unsent ON results (seq) WHERE sent_at IS NULL",
        "CREATE INDEX results_sent_at ON results (sent_at) WHERE sent_at IS NOT NULL",
        "CREATE INDEX results_finished_at ON results (finished_at)",
        "CREATE INDEX results_part ON results (part_id)",
        "CREATE INDEX results_wrench ON results (wrench, seq)",
        "CREATE INDEX results_status ON results (status, seq)",
    ),
)
assert len(_MIGRATIONS) == SCHEMA_VERSION

_COLUMNS = (
    "seq, id, topic, payload, station, wrench, program, part_id, status, finished_at, "
    "created_at, sent_at"
)


def _is_full(exc: sqlite3.Error) -> bool:
    return getattr(exc, "sqlite_errorcode", None) == sqlite3.SQLITE_FULL


def _row_to_entry(row: tuple[Any, ...]) -> Entry:
    return Entry(
        seq=row[0],
        id=row[1],
        topic=row[2],
        payload=bytes(row[3]),
        station=row[4],
        wrench=row[5],
        program=row[6],
        part_id=row[7],
        status=row[8],
        finished_at=row[9],
        created_at=row[10],
        sent_at=row[11],
    )


def _canonical_id(result_id: str) -> str:
    try:
        return str(uuid.UUID(result_id))
    except (ValueError, TypeError, AttributeError) as exc:
        raise OutboxInputError(f"result id {result_id!r} is not a UUID") from exc


def _finished_text(finished_at: dt.datetime | str | None) -> str | None:
    if finished_at is None or isinstance(finished_at, str):
        return finished_at
    if finished_at.tzinfo is None:
        raise OutboxInputError("finished_at must be timezone-aware (UTC recommended)")
    # UTC ISO 8601 text sorts in time order, so the journal can range-query it.
    return finished_at.astimezone(dt.UTC).isoformat(timespec="milliseconds")


# The first 16 bytes of every SQLite 3 database file (SQLite, "Database File Format" §1.3.1).
_SQLITE_HEADER = b"SQLite format 3\x00"


def _check_existing(path: Path) -> None:
    """Refuse, without writing, a path that holds no SQLite database (see ``create``)."""
    try:
        with path.open("rb") as f:
            head = f.read(len(_SQLITE_HEADER))
    except FileNotFoundError:
        raise OutboxError(f"no outbox at {path}") from None
    except OSError as exc:
        raise OutboxStorageError(f"{path}: cannot read: {exc.strerror}") from exc
    if head != _SQLITE_HEADER:
        raise OutboxError(f"{path} is not a clampd outbox (not an SQLite database)")


def _user_version(conn: sqlite3.Connection) -> int:
    return int(conn.execute("PRAGMA user_version").fetchone()[0])


def migrate(conn: sqlite3.Connection) -> int:
    """Bring the schema to ``SCHEMA_VERSION``; return the version found before.

    Each step runs in one transaction together with its ``user_version`` bump, so a crash
    mid-migration leaves the previous version intact. A file from a newer clampd raises
    ``OutboxError`` (we cannot know its meaning; refusing is safer than guessing).
    """
    found = _user_version(conn)
    if found > SCHEMA_VERSION:
        raise OutboxError(
            f"outbox schema version {found} is newer than this clampd understands "
            f"({SCHEMA_VERSION}); upgrade clampd or use another file"
        )
    for version in range(found, SCHEMA_VERSION):
        conn.execute("BEGIN IMMEDIATE")
        try:
            for statement in _MIGRATIONS[version]:
                conn.execute(statement)
            conn.execute(f"PRAGMA user_version = {version + 1}")
            conn.execute("COMMIT")
        except BaseException:
            conn.execute("ROLLBACK")
            raise
    return found


class Outbox:
    """Synchronous outbox on one SQLite file; use from one thread only.

    ``retention_days`` and ``size_cap_bytes`` set the policy in the module docstring.
    ``max_page_count`` sets SQLite's hard page limit for this connection; it makes the
    file behave like a full disk when reached (used by tests to exercise SQLITE_FULL, and
    usable as a last-resort ceiling). ``clock`` returns UNIX seconds (injectable for
    retention tests). ``create=False`` opens only an existing outbox and changes nothing
    in any other file (the journal commands: a typo or a foreign database must not be
    turned into an empty outbox). Raises ``OutboxStorageError`` when SQLite cannot open the
    file and ``OutboxError`` for a file that is not (or not yet) an outbox.
    """

    def __init__(
        self,
        path: str | os.PathLike[str],
        *,
        retention_days: float = DEFAULT_RETENTION_DAYS,
        size_cap_bytes: int = DEFAULT_SIZE_CAP_BYTES,
        max_page_count: int | None = None,
        clock: Callable[[], float] = time.time,
        create: bool = True,
    ) -> None:
        if retention_days <= 0:
            raise OutboxInputError(f"retention_days must be > 0, got {retention_days}")
        if size_cap_bytes <= 0:
            raise OutboxInputError(f"size_cap_bytes must be > 0, got {size_cap_bytes}")
        self.path = Path(path)
        self.retention_days = retention_days
        self.size_cap_bytes = size_cap_bytes
        self._clock = clock
        if create:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        else:
            _check_existing(self.path)
        # isolation_level=None: we issue BEGIN/COMMIT ourselves, so every transaction
        # boundary is visible in this file rather than implied by the sqlite3 module.
        try:
            self._conn = sqlite3.connect(self.path, isolation_level=None, timeout=10.0)
        except sqlite3.Error as exc:
            raise OutboxStorageError(f"{self.path}: cannot open: {exc}") from exc
        try:
            if not create and _user_version(self._conn) == 0:
                raise OutboxError(f"{self.path} is an SQLite file but not a clampd outbox")
            mode = self._conn.execute("PRAGMA journal_mode=WAL").fetchone()[0]
            if str(mode).lower() != "wal":
                raise OutboxError(f"{self.path}: cannot enable WAL (journal_mode={mode})")
            self._conn.execute("PRAGMA synchronous=FULL")
            self._conn.execute("PRAGMA foreign_keys=ON")
            migrate(self._conn)
            if max_page_count is not None:
                self._conn.execute(f"PRAGMA max_page_count = {int(max_page_count)}")
            self._page_size = int(self._conn.execute("PRAGMA page_size").fetchone()[0])
        except sqlite3.Error as exc:
            self._conn.close()
            raise OutboxStorageError(f"{self.path}: cannot open as an outbox: {exc}") from exc
        except BaseException:
            self._conn.close()
            raise

    # -- lifecycle ------------------------------------------------------------------
    def close(self) -> None:
        """Close the connection (idempotent). WAL content stays valid on disk."""
        self._conn.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.close()

    # -- writing --------------------------------------------------------------------
    def put(
        self,
        result_id: str,
        topic: str,
        payload: bytes,
        *,
        station: str | None = None,
        wrench: str | None = None,
        program: str | None = None,
        part_id: str | None = None,
        status: str | None = None,
        finished_at: dt.datetime | str | None = None,
    ) -> bool:
        """Store a result durably; return True if inserted, False if already present.

        Returns only after the row is committed with a full sync. Raises
        ``OutboxInputError`` (bad id, empty topic, non-bytes payload),
        ``OutboxConflictError`` (same id, different content), ``OutboxFullError`` (size
        cap with nothing sent left to evict) or ``OutboxDiskFullError`` (SQLITE_FULL).
        In every error case nothing stored changes.
        """
        rid = _canonical_id(result_id)
        if not topic:
            raise OutboxInputError("topic must not be empty")
        if not isinstance(payload, bytes | bytearray | memoryview):
            raise OutboxInputError(f"payload must be bytes, got {type(payload).__name__}")
        blob = bytes(payload)
        finished = _finished_text(finished_at)
        row = (rid, topic, blob, station, wrench, program, part_id, status, finished)
        with self._write():
            # Looked up inside the write lock, so two writers cannot both insert the id.
            existing = self._conn.execute(
                "SELECT topic, payload FROM results WHERE id = ?", (rid,)
            ).fetchone()
            if existing is not None:
                if existing[0] != topic or bytes(existing[1]) != blob:
                    raise OutboxConflictError(rid)
                return False
            self._make_room(len(blob))
            cur = self._conn.execute(
                "INSERT INTO results (id, topic, payload, station, wrench, program, part_id,"
                " status, finished_at, created_at) VALUES (?,?,?,?,?,?,?,?,?,?)"
                " ON CONFLICT (id) DO NOTHING",
                (*row, self._clock()),
            )
            return cur.rowcount == 1

    def mark_sent(self, result_id: str, *, sent_at: float | None = None) -> bool:
        """Record the broker's acknowledgement; return False if it was already marked.

        Call only after the PUBACK. Raises ``OutboxUnknownIdError`` for an unknown id.
        """
        rid = _canonical_id(result_id)
        when = self._clock() if sent_at is None else sent_at
        with self._write():
            cur = self._conn.execute(
                "UPDATE results SET sent_at = ? WHERE id = ? AND sent_at IS NULL", (when, rid)
            )
            changed = cur.rowcount == 1
            if not changed and not self._exists(rid):
                raise OutboxUnknownIdError(rid)
        return changed

    def prune(self, now: float | None = None) -> int:
        """Apply retention and the size cap to *sent* rows; return how many were deleted."""
        now = self._clock() if now is None else now
        cutoff = now - self.retention_days * _SECONDS_PER_DAY
        with self._write():
            cur = self._conn.execute(
                "DELETE FROM results WHERE sent_at IS NOT NULL AND sent_at < ?", (cutoff,)
            )
            deleted = max(cur.rowcount, 0)
            deleted += self._evict_sent_until(self.size_cap_bytes)
        return deleted

    # -- reading --------------------------------------------------------------------
    def pending(self, limit: int = 100) -> builtins.list[Entry]:
        """Unsent results, oldest first (strict append order), at most ``limit``."""
        if limit <= 0:
            raise OutboxInputError(f"limit must be > 0, got {limit}")
        rows = self._rows(
            f"SELECT {_COLUMNS} FROM results WHERE sent_at IS NULL ORDER BY seq LIMIT ?",
            (limit,),
        )
        return [_row_to_entry(r) for r in rows]

    def get(self, result_id: str) -> Entry | None:
        """The stored result with this id, or None."""
        rid = _canonical_id(result_id)
        rows = self._rows(f"SELECT {_COLUMNS} FROM results WHERE id = ?", (rid,))
        return _row_to_entry(rows[0]) if rows else None

    def list(
        self,
        *,
        limit: int = 50,
        newest_first: bool = True,
        wrench: str | None = None,
        part_id: str | None = None,
        status: str | None = None,
        program: str | None = None,
        unsent_only: bool = False,
        finished_from: str | None = None,
        finished_to: str | None = None,
    ) -> builtins.list[Entry]:
        """Journal query: filters combine with AND; finished_* compare ISO 8601 UTC text."""
        if limit <= 0:
            raise OutboxInputError(f"limit must be > 0, got {limit}")
        clauses: builtins.list[str] = []
        params: builtins.list[Any] = []
        for column, value in (
            ("wrench", wrench),
            ("part_id", part_id),
            ("status", status),
            ("program", program),
        ):
            if value is not None:
                clauses.append(f"{column} = ?")
                params.append(value)
        if unsent_only:
            clauses.append("sent_at IS NULL")
        if finished_from is not None:
            clauses.append("finished_at >= ?")
            params.append(finished_from)
        if finished_to is not None:
            clauses.append("finished_at < ?")
            params.append(finished_to)
        where = f"WHERE {' AND '.join(clauses)}" if clauses else ""
        order = "DESC" if newest_first else "ASC"
        rows = self._rows(
            f"SELECT {_COLUMNS} FROM results {where} ORDER BY seq {order} LIMIT ?",
            (*params, limit),
        )
        return [_row_to_entry(r) for r in rows]

    def count_unsent(self) -> int:
        """Number of results still waiting for the broker."""
        return int(self._rows("SELECT count(*) FROM results WHERE sent_at IS NULL")[0][0])

    def stats(self) -> OutboxStats:
        """Counts and sizes; ``used_bytes`` excludes free pages, which SQLite reuses."""
        total, unsent, oldest = self._rows(
            "SELECT count(*), sum(sent_at IS NULL),"
            " min(CASE WHEN sent_at IS NULL THEN created_at END) FROM results"
        )[0]
        return OutboxStats(
            total=int(total),
            unsent=int(unsent or 0),
            oldest_unsent_created_at=oldest,
            used_bytes=self._used_bytes(),
            file_bytes=self._file_bytes(),
            cap_bytes=self.size_cap_bytes,
        )

    def integrity_ok(self) -> bool:
        """True when ``PRAGMA integrity_check`` reports ``ok`` (False when the check itself
        fails on a damaged file)."""
        try:
            rows = self._conn.execute("PRAGMA integrity_check").fetchall()
        except sqlite3.DatabaseError as exc:
            if isinstance(exc, sqlite3.ProgrammingError):
                raise
            return False
        return [r[0] for r in rows] == ["ok"]

    def iter_all(self, batch: int = 500) -> Iterator[Entry]:
        """Every stored row in append order, fetched in batches (export, audits, tests)."""
        last = 0
        while True:
            rows = self._rows(
                f"SELECT {_COLUMNS} FROM results WHERE seq > ? ORDER BY seq LIMIT ?",
                (last, batch),
            )
            if not rows:
                return
            for row in rows:
                yield _row_to_entry(row)
            last = rows[-1][0]

    def checkpoint(self) -> None:
        """Fold the WAL into the main file (e.g. before copying the file off the board)."""
        self._rows("PRAGMA wal_checkpoint(TRUNCATE)")

    # -- internals ------------------------------------------------------------------
    def _rows(self, sql: str, params: tuple[Any, ...] = ()) -> builtins.list[tuple[Any, ...]]:
        """One read; SQLite's errors (a damaged file, I/O) become ``OutboxStorageError``.

        ``ProgrammingError`` (e.g. the connection used from a foreign thread) is our own
        misuse and stays what it is.
        """
        try:
            rows: builtins.list[tuple[Any, ...]] = self._conn.execute(sql, params).fetchall()
        except sqlite3.ProgrammingError:
            raise
        except sqlite3.Error as exc:
            raise OutboxStorageError(f"{self.path}: read failed: {exc}") from exc
        return rows

    def _exists(self, rid: str) -> bool:
        return (
            self._conn.execute("SELECT 1 FROM results WHERE id = ?", (rid,)).fetchone() is not None
        )

    def _used_bytes(self) -> int:
        pages = int(self._rows("PRAGMA page_count")[0][0])
        free = int(self._rows("PRAGMA freelist_count")[0][0])
        return (pages - free) * self._page_size

    def _file_bytes(self) -> int:
        size = 0
        for suffix in ("", "-wal"):
            with contextlib.suppress(FileNotFoundError):
                size += os.path.getsize(f"{self.path}{suffix}")
        return size

    def _evict_sent_until(self, budget: int) -> int:
        deleted = 0
        while self._used_bytes() > budget:
            cur = self._conn.execute(
                "DELETE FROM results WHERE seq IN (SELECT seq FROM results"
                " WHERE sent_at IS NOT NULL ORDER BY seq LIMIT ?)",
                (_EVICT_BATCH,),
            )
            if cur.rowcount <= 0:
                break
            deleted += cur.rowcount
        return deleted

    def _make_room(self, incoming: int) -> None:
        # Leave room for the row plus its index entries (a rough page of overhead).
        budget = self.size_cap_bytes - incoming - self._page_size
        if self._used_bytes() <= budget:
            return
        evicted = self._evict_sent_until(budget)
        if evicted:
            _log.warning("outbox over its size cap: evicted %d oldest sent results", evicted)
        used = self._used_bytes()
        if used > budget:
            raise OutboxFullError(used, self.size_cap_bytes, self.count_unsent())

    def _write(self) -> _Transaction:
        return _Transaction(self)


class _Transaction:
    """BEGIN IMMEDIATE ... COMMIT, rolled back on any error; SQLite's errors become typed."""

    def __init__(self, outbox: Outbox) -> None:
        self._outbox = outbox

    def __enter__(self) -> None:
        try:
            self._outbox._conn.execute("BEGIN IMMEDIATE")
        except sqlite3.Error as exc:
            self._raise_typed(exc)

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        conn = self._outbox._conn
        if exc is None:
            try:
                conn.execute("COMMIT")
                return
            except sqlite3.Error as commit_exc:
                if conn.in_transaction:
                    conn.execute("ROLLBACK")
                self._raise_typed(commit_exc)
        if conn.in_transaction:
            conn.execute("ROLLBACK")
        if isinstance(exc, sqlite3.Error):
            self._raise_typed(exc)

    def _raise_typed(self, exc: sqlite3.Error) -> NoReturn:
        path = self._outbox.path
        if isinstance(exc, sqlite3.ProgrammingError):
            raise exc  # our own misuse (e.g. a foreign thread), not the storage's
        if _is_full(exc):
            unsent = self._outbox.count_unsent()
            raise OutboxDiskFullError(path, unsent) from exc
        raise OutboxStorageError(f"{path}: write failed and was rolled back: {exc}") from exc


_T = TypeVar("_T")


class AsyncOutbox:
    """Asyncio face of ``Outbox``: every call runs in one dedicated worker thread.

    Use as ``async with AsyncOutbox(path, ...) as outbox:``. The flusher loops on
    ``await outbox.wait_pending()`` then ``await outbox.pending(n)``; ``wait_pending``
    returns at once if unsent results exist when it is called (e.g. after a restart or a
    reconnection), otherwise when the next ``put`` inserts one.
    """

    def __init__(self, path: str | os.PathLike[str], **options: Any) -> None:
        self.path = Path(path)
        self._options = options
        self._executor: concurrent.futures.ThreadPoolExecutor | None = None
        self._outbox: Outbox | None = None
        self._new_result = asyncio.Event()

    async def __aenter__(self) -> Self:
        # One thread, ever: the sqlite3 connection is bound to the thread that opened it.
        self._executor = concurrent.futures.ThreadPoolExecutor(
            max_workers=1, thread_name_prefix="clampd-outbox"
        )
        try:
            self._outbox = await self._run(functools.partial(Outbox, self.path, **self._options))
        except BaseException:
            self._executor.shutdown(wait=False)
            self._executor = None
            raise
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        if self._outbox is not None:
            await self._run(self._outbox.close)
            self._outbox = None
        if self._executor is not None:
            # The queue is empty after the awaited close, so the thread exits promptly;
            # waiting for it would block the loop.
            self._executor.shutdown(wait=False)
            self._executor = None

    async def _run(self, fn: Callable[[], _T]) -> _T:
        if self._executor is None:
            raise OutboxError("AsyncOutbox used outside its 'async with' block")
        loop = asyncio.get_running_loop()
        return await loop.run_in_executor(self._executor, fn)

    def _core(self) -> Outbox:
        if self._outbox is None:
            raise OutboxError("AsyncOutbox used outside its 'async with' block")
        return self._outbox

    async def put(
        self,
        result_id: str,
        topic: str,
        payload: bytes,
        *,
        station: str | None = None,
        wrench: str | None = None,
        program: str | None = None,
        part_id: str | None = None,
        status: str | None = None,
        finished_at: dt.datetime | str | None = None,
    ) -> bool:
        """See ``Outbox.put``; wakes ``wait_pending`` when a row was inserted."""
        core = self._core()
        put = functools.partial(
            core.put,
            result_id,
            topic,
            payload,
            station=station,
            wrench=wrench,
            program=program,
            part_id=part_id,
            status=status,
            finished_at=finished_at,
        )
        inserted = await self._run(put)
        if inserted:
            self._new_result.set()
        return inserted

    async def mark_sent(self, result_id: str, *, sent_at: float | None = None) -> bool:
        """See ``Outbox.mark_sent``."""
        core = self._core()
        return await self._run(functools.partial(core.mark_sent, result_id, sent_at=sent_at))

    async def pending(self, limit: int = 100) -> builtins.list[Entry]:
        """See ``Outbox.pending``."""
        return await self._run(functools.partial(self._core().pending, limit))

    async def get(self, result_id: str) -> Entry | None:
        """See ``Outbox.get``."""
        return await self._run(functools.partial(self._core().get, result_id))

    async def list(
        self,
        *,
        limit: int = 50,
        newest_first: bool = True,
        wrench: str | None = None,
        part_id: str | None = None,
        status: str | None = None,
        program: str | None = None,
        unsent_only: bool = False,
        finished_from: str | None = None,
        finished_to: str | None = None,
    ) -> builtins.list[Entry]:
        """See ``Outbox.list``."""
        query = functools.partial(
            self._core().list,
            limit=limit,
            newest_first=newest_first,
            wrench=wrench,
            part_id=part_id,
            status=status,
            program=program,
            unsent_only=unsent_only,
            finished_from=finished_from,
            finished_to=finished_to,
        )
        return await self._run(query)

    async def stats(self) -> OutboxStats:
        """See ``Outbox.stats``."""
        return await self._run(self._core().stats)

    async def prune(self, now: float | None = None) -> int:
        """See ``Outbox.prune``."""
        return await self._run(functools.partial(self._core().prune, now))

    async def integrity_ok(self) -> bool:
        """See ``Outbox.integrity_ok``."""
        return await self._run(self._core().integrity_ok)

    async def count_unsent(self) -> int:
        """See ``Outbox.count_unsent``."""
        return await self._run(self._core().count_unsent)

    async def checkpoint(self) -> None:
        """See ``Outbox.checkpoint``."""
        await self._run(self._core().checkpoint)

    async def wait_pending(self) -> None:
        """Return when at least one unsent result may exist (see the class docstring).

        While unsent results exist it returns at once, so a flusher must wait for its
        broker connection *before* calling it, or it would spin during an outage.
        """
        # Clear before looking, so a put that lands after the look sets the event again.
        self._new_result.clear()
        if await self._run(self._core().count_unsent) > 0:
            return
        await self._new_result.wait()
