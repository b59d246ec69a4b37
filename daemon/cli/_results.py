"""``clampd results [list|show ID]``: read the station's local journal.

The journal is the outbox database: every result the station produced, sent or not, kept
for the retention period after the broker acknowledged it. This command only reads; it
never creates a journal where there is none (a typo in ``--db`` must not leave an empty
database behind that hides the real one).

Where the journal is: ``--db PATH``, else ``[outbox] path`` of ``--config FILE``, else the
production default (``/var/lib/clampd/outbox.sqlite3``).
"""

from __future__ import annotations

import argparse
import base64
import datetime as dt
import json
import sys
from pathlib import Path
from typing import Any

from clampd.daemon.cli._journal import JournalError, add_journal_arguments, open_journal
from clampd.daemon.runtime._config import load_config
from clampd.daemon.runtime._outbox import Entry, Outbox, OutboxError


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``clampd results``."""
    parser.add_argument(
        "action", nargs="?", choices=("list", "show"), default="list", help="default: list"
    )
    parser.add_argument("result_id", nargs="?", metavar="ID", help="result id for 'show'")
    add_journal_arguments(parser)
    parser.add_argument("--json", action="store_true", help="machine-readable output")
    parser.add_argument("--limit", type=int, default=None, help="rows to list (newest first)")
    parser.add_argument("--oldest-first", action="store_true", help="list in append order")
    parser.add_argument("--wrench", help="only this wrench id")
    parser.add_argument("--part", help="only this part id")
    parser.add_argument(
        "--status", type=str.upper, choices=("OK", "NOK"), help="only this status (OK or NOK)"
    )
    parser.add_argument("--program", help="only this program id")
    parser.add_argument("--unsent", action="store_true", help="only results not yet sent")


def _fail(message: str) -> int:
    print(f"clampd results: {message}", file=sys.stderr)
    return 2


def _time(ts: float | None) -> str | None:
    if ts is None:
        return None
    return dt.datetime.fromtimestamp(ts, tz=dt.UTC).isoformat(timespec="milliseconds")


def _meta(e: Entry) -> dict[str, Any]:
    return {
        "seq": e.seq,
        "id": e.id,
        "topic": e.topic,
        "station": e.station,
        "wrench": e.wrench,
        "program": e.program,
        "part_id": e.part_id,
        "status": e.status,
        "finished_at": e.finished_at,
        "stored_at": _time(e.created_at),
        "sent_at": _time(e.sent_at),
        "payload_bytes": len(e.payload),
    }


def _payload(e: Entry) -> dict[str, Any]:
    try:
        return {"payload": json.loads(e.payload)}
    except (UnicodeDecodeError, json.JSONDecodeError):
        return {"payload_base64": base64.b64encode(e.payload).decode("ascii")}


def run(args: argparse.Namespace) -> int:
    """List or show results; 2 with a one-line error for bad input or a missing journal."""
    if args.action == "show" and not args.result_id:
        return _fail("'show' needs a result ID")
    if args.action == "list" and args.result_id:
        return _fail("'list' takes no ID (use 'show ID')")
    if args.limit is not None and args.limit <= 0:
        return _fail("--limit must be a positive number")
    try:
        journal, path = open_journal(args)
    except JournalError as exc:
        return _fail(str(exc))
    try:
        with journal:
            if args.action == "show":
                return _show(journal, args)
            return _list(journal, args, path)
    except OutboxError as exc:
        return _fail(str(exc))


def _show(journal: Outbox, args: argparse.Namespace) -> int:
    entry = journal.get(args.result_id)
    if entry is None:
        return _fail(f"no result {args.result_id} in the journal")
    if args.json:
        print(json.dumps({**_meta(entry), **_payload(entry)}, indent=2))
        return 0
    for key, value in _meta(entry).items():
        print(f"{key:>13}: {'-' if value is None else value}")
    body = _payload(entry)
    print(json.dumps(body.get("payload", body), indent=2))
    return 0


def _list(journal: Outbox, args: argparse.Namespace, path: Path) -> int:
    limit = args.limit
    if limit is None and args.config is not None:
        limit = load_config(args.config, check_files=False).config.journal.list_limit
    limit = limit or 20
    # One row more than shown tells whether the list was cut, so the reader can be told.
    entries = journal.list(
        limit=limit + 1,
        newest_first=not args.oldest_first,
        wrench=args.wrench,
        part_id=args.part,
        status=args.status,
        program=args.program,
        unsent_only=args.unsent,
    )
    cut = len(entries) > limit
    entries = entries[:limit]
    if args.json:
        print(json.dumps([_meta(e) for e in entries], indent=2))
        return 0
    if not entries:
        print(f"no results in {path} matching the filters")
        return 0
    header = ("seq", "finished_at", "status", "wrench", "program", "part", "sent", "id")
    rows = [
        (
            str(e.seq),
            e.finished_at or "-",
            e.status or "-",
            e.wrench or "-",
            e.program or "-",
            e.part_id or "-",
            "yes" if e.sent else "no",
            e.id,
        )
        for e in entries
    ]
    widths = [max(len(r[i]) for r in (header, *rows)) for i in range(len(header))]
    for r in (header, *rows):
        print("  ".join(cell.ljust(w) for cell, w in zip(r, widths, strict=True)).rstrip())
    if cut:
        which = "oldest" if args.oldest_first else "newest"
        print(f"(the {which} {limit} shown; --limit N shows more)", file=sys.stderr)
    return 0
