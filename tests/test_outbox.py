"""The durable outbox and journal on real SQLite files.

Durability settings are checked against the SQLite documentation ("Write-Ahead Logging";
"PRAGMA synchronous": FULL = 2; "PRAGMA max_page_count"; result code SQLITE_FULL = 13 in
"Result and Error Codes").
"""

from __future__ import annotations

import asyncio
import datetime as dt
import json
import sqlite3
import tempfile
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from blockbuster import BlockingError, blockbuster_ctx
from hypothesis import given, settings
from hypothesis import strategies as st

from clampd.daemon.cli import main
from clampd.daemon.runtime import (
    AsyncOutbox,
    Outbox,
    OutboxConflictError,
    OutboxDiskFullError,
    OutboxError,
    OutboxFullError,
    OutboxInputError,
    OutboxStorageError,
    OutboxUnknownIdError,
)
from clampd.daemon.runtime._outbox import SCHEMA_VERSION

DAY = 86_400.0


@pytest.fixture
def runtime_guard() -> Iterator[object]:
    """Fail on blocking calls made by the runtime's code inside the event loop.

    Scans the runtime package by name: the shared ``blockbuster`` fixture scans
    ``clampd``, a namespace package whose editable-install path matches no file.
    """
    with blockbuster_ctx(["clampd.daemon.runtime"]) as bb:
        yield bb


def _id(n: int) -> str:
    return str(uuid.UUID(int=n + 1))


def _put(ob: Outbox, n: int, size: int = 100, **meta: str) -> bool:
    return ob.put(_id(n), "plant/st1/result", bytes([n % 256]) * size, **meta)


class _Clock:
    def __init__(self, t: float = 1_800_000_000.0) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t


def test_file_uses_wal_and_full_sync(tmp_path: Path) -> None:
    with Outbox(tmp_path / "o.db") as ob:
        # synchronous is per connection: read it on the outbox's own connection.
        assert ob._conn.execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL (SQLite docs)
        _put(ob, 1)
    other = sqlite3.connect(tmp_path / "o.db")
    assert other.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert other.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
    other.close()


def test_put_get_round_trip_with_journal_columns(tmp_path: Path) -> None:
    finished = dt.datetime(2026, 3, 4, 5, 6, 7, 890_000, tzinfo=dt.UTC)
    with Outbox(tmp_path / "o.db") as ob:
        rid = str(uuid.uuid4())
        assert ob.put(
            rid.upper(),  # ids are stored in canonical lower-case form
            "t/result",
            b'{"status":"OK"}',
            station="st1",
            wrench="w1",
            program="p-m8",
            part_id="PX-1",
            status="OK",
            finished_at=finished,
        )
        entry = ob.get(rid)
    assert entry is not None
    assert (entry.id, entry.topic, entry.payload) == (rid, "t/result", b'{"status":"OK"}')
    assert (entry.station, entry.wrench, entry.program, entry.part_id, entry.status) == (
        "st1",
        "w1",
        "p-m8",
        "PX-1",
        "OK",
    )
    assert entry.finished_at == "2026-03-04T05:06:07.890+00:00"
    assert not entry.sent


def test_same_id_twice_is_a_no_op_and_different_content_is_refused(tmp_path: Path) -> None:
    with Outbox(tmp_path / "o.db") as ob:
        assert _put(ob, 1) is True
        assert _put(ob, 1) is False
        with pytest.raises(OutboxConflictError) as info:
            ob.put(_id(1), "plant/st1/result", b"different")
        assert info.value.result_id == _id(1)
        stored = ob.get(_id(1))
        assert stored is not None
        assert stored.payload == bytes([1]) * 100
        assert ob.stats().total == 1


@pytest.mark.parametrize("bad", ["", "not-a-uuid", "1234", "g" * 32])
def test_bad_id_is_a_typed_error(tmp_path: Path, bad: str) -> None:
    with Outbox(tmp_path / "o.db") as ob:
        with pytest.raises(OutboxInputError, match="not a UUID"):
            ob.put(bad, "t", b"x")
        assert ob.stats().total == 0


def test_bad_topic_payload_and_naive_time_are_typed_errors(tmp_path: Path) -> None:
    with Outbox(tmp_path / "o.db") as ob:
        with pytest.raises(OutboxInputError, match="topic"):
            ob.put(_id(1), "", b"x")
        with pytest.raises(OutboxInputError, match="bytes"):
            ob.put(_id(1), "t", "text")  # type: ignore[arg-type]
        with pytest.raises(OutboxInputError, match="timezone"):
            ob.put(_id(1), "t", b"x", finished_at=dt.datetime(2026, 1, 1))
        assert ob.stats().total == 0


def test_pending_is_append_order_and_survives_reopen(tmp_path: Path) -> None:
    path = tmp_path / "o.db"
    with Outbox(path) as ob:
        for n in range(10):
            _put(ob, n)
        ob.mark_sent(_id(3))
        ob.mark_sent(_id(0))
    with Outbox(path) as ob:
        assert [e.id for e in ob.pending(100)] == [_id(n) for n in (1, 2, 4, 5, 6, 7, 8, 9)]
        assert [e.id for e in ob.pending(2)] == [_id(1), _id(2)]
        seqs = [e.seq for e in ob.iter_all()]
        assert seqs == sorted(seqs)
        assert len(set(seqs)) == 10


def test_mark_sent_twice_and_unknown_id(tmp_path: Path) -> None:
    with Outbox(tmp_path / "o.db") as ob:
        _put(ob, 1)
        assert ob.mark_sent(_id(1)) is True
        assert ob.mark_sent(_id(1)) is False
        with pytest.raises(OutboxUnknownIdError, match="no result"):
            ob.mark_sent(_id(99))


def test_sequence_numbers_are_never_reused_after_deletion(tmp_path: Path) -> None:
    # AUTOINCREMENT guarantees a new rowid above every one ever used (SQLite docs,
    # "Autoincrement"), so a consumer ordering by seq never sees an older-looking number.
    clock = _Clock()
    with Outbox(tmp_path / "o.db", retention_days=1, clock=clock) as ob:
        _put(ob, 1)
        first = ob.get(_id(1))
        assert first is not None
        ob.mark_sent(_id(1))
        clock.t += 2 * DAY
        assert ob.prune() == 1
        _put(ob, 2)
        second = ob.get(_id(2))
        assert second is not None
        assert second.seq > first.seq


def test_retention_deletes_only_old_sent_results(tmp_path: Path) -> None:
    clock = _Clock()
    with Outbox(tmp_path / "o.db", retention_days=30, clock=clock) as ob:
        for n in range(6):
            _put(ob, n)
        ob.mark_sent(_id(0))  # sent 40 days before "now"
        ob.mark_sent(_id(1))
        clock.t += 10 * DAY
        ob.mark_sent(_id(2))  # sent 30 days before "now": exactly at the edge, kept
        clock.t += 30 * DAY
        ob.mark_sent(_id(3))  # sent just now
        assert ob.prune() == 2
        remaining = {e.id for e in ob.iter_all()}
    # Unsent 4 and 5 are 40 days old and still there: unsent is never deleted.
    assert remaining == {_id(2), _id(3), _id(4), _id(5)}


def test_size_cap_evicts_oldest_sent_first(tmp_path: Path) -> None:
    cap = 256 * 1024
    with Outbox(tmp_path / "o.db", size_cap_bytes=cap) as ob:
        n = 0
        while ob.stats().used_bytes < cap * 0.9:
            _put(ob, n, size=4000)
            ob.mark_sent(_id(n))
            n += 1
        for m in range(n, n + 40):  # these must evict sent rows to fit
            _put(ob, m, size=4000)
        stats = ob.stats()
        ids = [e.id for e in ob.iter_all()]
    assert stats.used_bytes <= cap
    assert stats.unsent == 40
    assert all(_id(m) in ids for m in range(n, n + 40))
    # What survived of the sent rows is a contiguous run of the newest ones.
    survivors = [i for i in range(n) if _id(i) in ids]
    assert survivors == list(range(n - len(survivors), n))
    assert len(survivors) < n


def test_size_cap_refuses_new_results_rather_than_dropping_unsent(tmp_path: Path) -> None:
    cap = 128 * 1024
    path = tmp_path / "o.db"
    stored: list[int] = []

    def fill(ob: Outbox) -> None:
        for n in range(1000):
            _put(ob, n, size=4000)
            stored.append(n)

    with Outbox(path, size_cap_bytes=cap) as ob:
        with pytest.raises(OutboxFullError) as info:
            fill(ob)
        assert not isinstance(info.value, OutboxDiskFullError)
        assert info.value.unsent == len(stored)
        assert info.value.cap_bytes == cap
        assert ob.integrity_ok()
        assert [e.id for e in ob.pending(10_000)] == [_id(n) for n in stored]
        # Once some are acknowledged, their space is reused for new results.
        for n in stored[:5]:
            ob.mark_sent(_id(n))
        assert _put(ob, 5000, size=4000)


def test_disk_full_is_typed_rolls_back_and_corrupts_nothing(tmp_path: Path) -> None:
    # A tiny filesystem is not available here; SQLite's max_page_count makes the file
    # report SQLITE_FULL exactly as a full disk does (SQLite docs, "PRAGMA max_page_count").
    path = tmp_path / "o.db"
    stored: list[int] = []

    def fill(ob: Outbox) -> None:
        for n in range(10_000):
            _put(ob, n, size=3000)
            stored.append(n)

    with Outbox(path, max_page_count=40) as ob:
        with pytest.raises(OutboxDiskFullError) as info:
            fill(ob)
        assert isinstance(info.value, OutboxFullError)
        assert isinstance(info.value.__cause__, sqlite3.OperationalError)
        assert info.value.__cause__.sqlite_errorcode == sqlite3.SQLITE_FULL
        assert info.value.unsent == len(stored)
        assert stored  # some fitted before the limit
        assert ob.integrity_ok()
        # mark_sent still works (it changes no size) and so does reading.
        assert ob.mark_sent(_id(stored[0]))
    raw = sqlite3.connect(path)
    assert raw.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
    raw.close()
    with Outbox(path) as ob:  # with room again, nothing was lost and writing resumes
        assert [e.id for e in ob.iter_all()] == [_id(n) for n in stored]
        assert _put(ob, 10_001)


def test_file_from_a_newer_clampd_is_refused_untouched(tmp_path: Path) -> None:
    path = tmp_path / "o.db"
    raw = sqlite3.connect(path)
    raw.execute("CREATE TABLE future (x)")
    raw.execute("PRAGMA user_version = 99")
    raw.commit()
    raw.close()
    with pytest.raises(OutboxError, match="newer"):
        Outbox(path)
    raw = sqlite3.connect(path)
    assert raw.execute("PRAGMA user_version").fetchone()[0] == 99
    raw.close()


def test_a_file_that_is_no_database_is_a_typed_error(tmp_path: Path) -> None:
    # SQLite, "Result and Error Codes": SQLITE_NOTADB (26) for a file that is no database.
    path = tmp_path / "o.db"
    path.write_bytes(b"station log, not a database\n" * 200)
    with pytest.raises(OutboxStorageError, match="cannot open"):
        Outbox(path)
    assert path.read_bytes() == b"station log, not a database\n" * 200


def test_a_write_sqlite_refuses_is_typed_rolled_back_and_retryable(tmp_path: Path) -> None:
    # A read-only SD card answers SQLITE_READONLY (8) to every write (SQLite, "Result and
    # Error Codes"); PRAGMA query_only makes the real connection answer the same way.
    with Outbox(tmp_path / "o.db") as ob:
        assert _put(ob, 1)
        ob._conn.execute("PRAGMA query_only = 1")
        with pytest.raises(OutboxStorageError, match="readonly"):
            _put(ob, 2)
        with pytest.raises(OutboxStorageError):
            ob.mark_sent(_id(1))
        assert not ob._conn.in_transaction
        ob._conn.execute("PRAGMA query_only = 0")
        assert _put(ob, 2)  # the caller held the result and offers it again
        assert [e.id for e in ob.pending()] == [_id(1), _id(2)]
        assert ob.integrity_ok()


def _damaged(path: Path) -> None:
    """An outbox whose table pages were overwritten (a failing SD card), header intact."""
    with Outbox(path) as ob:
        for n in range(200):
            _put(ob, n, size=3000)
        ob.checkpoint()
    raw = sqlite3.connect(path)
    page = raw.execute("PRAGMA page_size").fetchone()[0]
    root = raw.execute("SELECT rootpage FROM sqlite_master WHERE name = 'results'").fetchone()[0]
    raw.close()
    with path.open("r+b") as f:  # pages count from 1 (SQLite, "Database File Format" §1.3)
        f.seek((root - 1) * page)
        f.write(b"\xff" * page)


def test_a_damaged_file_gives_typed_read_errors(tmp_path: Path) -> None:
    # SQLite, "Result and Error Codes": SQLITE_CORRUPT (11), "database disk image is malformed".
    path = tmp_path / "o.db"
    _damaged(path)
    with Outbox(path) as ob:
        with pytest.raises(OutboxStorageError, match="malformed"):
            ob.pending(1000)
        with pytest.raises(OutboxStorageError, match="malformed"):
            list(ob.iter_all())
        assert ob.integrity_ok() is False


@pytest.mark.parametrize("command", [["stats"], ["results", "--oldest-first", "--limit", "500"]])
def test_journal_commands_report_a_damaged_journal_in_one_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], command: list[str]
) -> None:
    path = tmp_path / "o.db"
    _damaged(path)
    assert main([*command, "--db", str(path)]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1
    assert "malformed" in err


def test_create_false_opens_only_an_existing_outbox_and_writes_nothing(tmp_path: Path) -> None:
    missing = tmp_path / "typo.db"
    with pytest.raises(OutboxError, match="no outbox"):
        Outbox(missing, create=False)
    assert not missing.exists()
    empty = tmp_path / "empty.db"
    empty.touch()
    with pytest.raises(OutboxError, match="not an SQLite"):
        Outbox(empty, create=False)
    assert empty.stat().st_size == 0
    foreign = tmp_path / "foreign.db"
    raw = sqlite3.connect(foreign)
    raw.execute("CREATE TABLE parts (id TEXT)")
    raw.commit()
    raw.close()
    before = foreign.read_bytes()
    with pytest.raises(OutboxError, match="not a clampd outbox"):
        Outbox(foreign, create=False)
    assert foreign.read_bytes() == before
    with Outbox(tmp_path / "o.db") as ob:
        _put(ob, 1)
    with Outbox(tmp_path / "o.db", create=False) as ob:
        assert [e.id for e in ob.pending()] == [_id(1)]


def test_list_filters_for_the_journal(tmp_path: Path) -> None:
    with Outbox(tmp_path / "o.db") as ob:
        for n in range(12):
            _put(
                ob,
                n,
                wrench=f"w{n % 2}",
                status="OK" if n % 3 else "NOK",
                part_id=f"P{n // 4}",
                finished_at=f"2026-03-01T10:{n:02d}:00.000+00:00",
            )
        ob.mark_sent(_id(1))
        newest = ob.list(limit=3)
        assert [e.id for e in newest] == [_id(11), _id(10), _id(9)]
        assert {e.id for e in ob.list(wrench="w1", status="NOK")} == {_id(3), _id(9)}
        assert [e.id for e in ob.list(part_id="P0", newest_first=False)] == [
            _id(n) for n in range(4)
        ]
        assert _id(1) not in {e.id for e in ob.list(unsent_only=True)}
        window = ob.list(finished_from="2026-03-01T10:05", finished_to="2026-03-01T10:07")
        assert {e.id for e in window} == {_id(5), _id(6)}


_op = st.one_of(
    st.tuples(st.just("put"), st.integers(0, 30)),
    st.tuples(st.just("ack"), st.integers(0, 30)),
)


@settings(max_examples=40, deadline=None)
@given(ops=st.lists(_op, max_size=60))
def test_pending_matches_a_simple_model(ops: list[tuple[str, int]]) -> None:
    # Model: an insertion-ordered dict of id -> sent. The outbox must agree after any
    # interleaving of puts (new or repeated) and acknowledgements.
    model: dict[str, bool] = {}
    with tempfile.TemporaryDirectory() as d, Outbox(Path(d) / "o.db") as ob:
        for op, n in ops:
            if op == "put":
                assert _put(ob, n) is (_id(n) not in model)
                model.setdefault(_id(n), False)
            elif _id(n) in model:
                assert ob.mark_sent(_id(n)) is (not model[_id(n)])
                model[_id(n)] = True
            else:
                with pytest.raises(OutboxUnknownIdError):
                    ob.mark_sent(_id(n))
        assert [e.id for e in ob.pending(1000)] == [k for k, sent in model.items() if not sent]
        assert ob.stats().unsent == sum(not s for s in model.values())


# -- the asyncio wrapper ------------------------------------------------------------------


async def test_async_outbox_round_trip_under_blockbuster(
    tmp_path: Path, runtime_guard: object
) -> None:
    async with AsyncOutbox(tmp_path / "o.db") as ob:
        assert await ob.put(_id(1), "t", b"a", status="OK")
        assert await ob.put(_id(2), "t", b"b", status="NOK")
        assert not await ob.put(_id(1), "t", b"a")
        assert [e.id for e in await ob.pending(10)] == [_id(1), _id(2)]
        assert await ob.mark_sent(_id(1))
        assert [e.id for e in await ob.list(status="NOK")] == [_id(2)]
        got = await ob.get(_id(1))
        assert got is not None
        assert got.sent
        assert (await ob.stats()).unsent == 1
        assert await ob.count_unsent() == 1
        await ob.checkpoint()
        assert await ob.integrity_ok()
        with pytest.raises(OutboxInputError):
            await ob.put("nope", "t", b"x")


async def test_the_guard_catches_the_sync_outbox_used_inside_the_loop(
    tmp_path: Path, runtime_guard: object
) -> None:
    # Control for the test above: the same work done synchronously in the loop is caught.
    with pytest.raises(BlockingError):
        Outbox(tmp_path / "o.db")


async def test_connection_lives_on_the_worker_thread_not_the_loop(tmp_path: Path) -> None:
    # sqlite3 connections refuse use from any thread but their own (check_same_thread),
    # so this proves every call that succeeded above ran on the worker thread.
    async with AsyncOutbox(tmp_path / "o.db") as ob:
        await ob.put(_id(1), "t", b"a")
        with pytest.raises(sqlite3.ProgrammingError, match="thread"):
            ob._core().pending(1)


async def test_a_put_stuck_on_the_disk_does_not_stall_the_loop(tmp_path: Path) -> None:
    path = tmp_path / "o.db"
    async with AsyncOutbox(path) as ob:
        # Another process-like writer holds the write lock: the put must wait for it.
        blocker = sqlite3.connect(path, isolation_level=None, check_same_thread=False)
        blocker.execute("BEGIN IMMEDIATE")
        put = asyncio.create_task(ob.put(_id(1), "t", b"a"))
        ticks = 0
        for _ in range(200):
            await asyncio.sleep(0)
            ticks += 1
        assert ticks == 200
        assert not put.done()  # the loop kept running while the put waited
        blocker.execute("COMMIT")
        blocker.close()
        assert await put is True


async def test_wait_pending_wakes_on_put_and_returns_at_once_when_backlog(
    tmp_path: Path,
) -> None:
    path = tmp_path / "o.db"
    async with AsyncOutbox(path) as ob:
        waiter = asyncio.create_task(ob.wait_pending())
        for _ in range(20):
            await asyncio.sleep(0)
        assert not waiter.done()
        await ob.put(_id(1), "t", b"a")
        await asyncio.wait_for(waiter, timeout=10)
    async with AsyncOutbox(path) as ob:  # after a restart the backlog is announced at once
        await asyncio.wait_for(ob.wait_pending(), timeout=10)
        assert [e.id for e in await ob.pending()] == [_id(1)]


async def test_async_outbox_outside_its_block_is_an_error(tmp_path: Path) -> None:
    ob = AsyncOutbox(tmp_path / "o.db")
    with pytest.raises(OutboxError, match="async with"):
        await ob.pending()


# -- clampd results (the journal) ----------------------------------------------------------


def _journal(path: Path) -> list[str]:
    ids = [str(uuid.UUID(int=1000 + n)) for n in range(4)]
    with Outbox(path) as ob:
        for n, rid in enumerate(ids):
            status = "OK" if n != 2 else "NOK"
            payload = {"id": rid, "status": status, "final_torque_nm": 18.0}
            ob.put(
                rid,
                "larchmont/pump-assembly/line-2/st-040/result",
                json.dumps(payload).encode(),
                station="st-040",
                wrench=f"w-040-{'ab'[n % 2]}",
                program="cover-m8-torque",
                part_id=f"HC-{n:04d}",
                status=status,
                finished_at=f"2026-05-04T08:0{n}:00.000+00:00",
            )
        ob.mark_sent(ids[0])
    return ids


def test_results_list_json_and_filters(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    db = tmp_path / "journal.db"
    ids = _journal(db)
    assert main(["results", "--db", str(db), "--json"]) == 0
    rows = json.loads(capsys.readouterr().out)
    assert [r["id"] for r in rows] == ids[::-1]  # newest first
    assert rows[-1]["sent_at"] is not None
    assert rows[0]["sent_at"] is None
    assert main(["results", "list", "--db", str(db), "--json", "--status", "NOK"]) == 0
    assert [r["id"] for r in json.loads(capsys.readouterr().out)] == [ids[2]]
    assert main(["results", "list", "--db", str(db), "--unsent", "--oldest-first", "--json"]) == 0
    assert [r["id"] for r in json.loads(capsys.readouterr().out)] == ids[1:]


def test_results_list_as_a_table(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    db = tmp_path / "journal.db"
    ids = _journal(db)
    assert main(["results", "--db", str(db), "--limit", "2"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].split() == [
        "seq", "finished_at", "status", "wrench", "program", "part", "sent", "id",
    ]  # fmt: skip
    assert len(lines) == 3
    assert lines[1].split()[-1] == ids[3]
    assert "HC-0003" in lines[1]


def test_results_show(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    db = tmp_path / "journal.db"
    ids = _journal(db)
    assert main(["results", "show", ids[2], "--db", str(db), "--json"]) == 0
    shown = json.loads(capsys.readouterr().out)
    assert shown["payload"] == {"id": ids[2], "status": "NOK", "final_torque_nm": 18.0}
    assert shown["part_id"] == "HC-0002"
    assert main(["results", "show", ids[0], "--db", str(db)]) == 0
    out = capsys.readouterr().out
    assert "cover-m8-torque" in out
    assert '"final_torque_nm": 18.0' in out


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["show"], "needs a result ID"),
        (["show", str(uuid.UUID(int=5))], "no result"),
        (["show", "not-an-id"], "not a UUID"),
        (["list", "x"], "takes no ID"),
        (["--limit", "0"], "positive"),
    ],
)
def test_results_bad_input_exits_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], argv: list[str], message: str
) -> None:
    db = tmp_path / "journal.db"
    _journal(db)
    assert main(["results", "--db", str(db), *argv]) == 2
    err = capsys.readouterr().err
    assert message in err
    assert len(err.strip().splitlines()) == 1


def test_results_never_creates_a_missing_journal(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    missing = tmp_path / "typo.db"
    assert main(["results", "--db", str(missing)]) == 2
    assert "no journal at" in capsys.readouterr().err
    assert not missing.exists()


@pytest.mark.parametrize(
    "command",
    [
        ["results"],
        ["results", "show", str(uuid.UUID(int=7))],
        ["stats"],
        ["plot", str(uuid.UUID(int=7)), "--out", "{tmp}/curve.png"],
    ],
)
@pytest.mark.parametrize("kind", ["text", "empty", "foreign"])
def test_journal_commands_refuse_a_file_that_is_no_journal_and_leave_it_alone(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], command: list[str], kind: str
) -> None:
    # "foreign" is an SQLite database of another program: it must not get an outbox schema.
    path = tmp_path / "journal.db"
    if kind == "text":
        path.write_text("not a database\n")
    elif kind == "empty":
        path.touch()
    else:
        raw = sqlite3.connect(path)
        raw.execute("CREATE TABLE parts (id TEXT)")
        raw.commit()
        raw.close()
    before = path.read_bytes()
    argv = [a.replace("{tmp}", str(tmp_path)) for a in command]
    assert main([*argv, "--db", str(path)]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1
    assert "not a clampd outbox" in err
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["journal.db"]


def test_results_finds_the_journal_through_the_station_config(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    db = tmp_path / "journal.db"
    ids = _journal(db)
    config = tmp_path / "station.toml"
    config.write_text(
        '[station]\nid = "st-040"\nname = "x"\ntopic_prefix = "a/b/c/st-040"\n'
        '[broker]\nurl = "mqtt://127.0.0.1"\n'
        '[outbox]\npath = "journal.db"\n[journal]\nlist_limit = 1\n'
    )
    assert main(["results", "--config", str(config), "--json"]) == 0
    assert [r["id"] for r in json.loads(capsys.readouterr().out)] == [ids[-1]]
