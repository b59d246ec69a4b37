"""Where the station's journal is, and opening it for reading: shared by ``clampd results``,
``clampd stats`` and ``clampd plot``.

The journal is the outbox database. The reading commands resolve it the same way (``--db
PATH``, else ``[outbox] path`` of ``--config FILE``, else the production default) and must
never create or change a database: a typo in ``--db`` must not leave an empty journal behind
that hides the real one, and a foreign SQLite file must not be given an outbox schema. So
the outbox is opened with ``create=False``, and every way that can fail becomes one
``JournalError`` whose text is the command's one-line error.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from clampd.daemon.runtime._config import ConfigError, OutboxConfig, load_config
from clampd.daemon.runtime._outbox import Outbox, OutboxError

__all__ = ["JournalError", "add_journal_arguments", "journal_path", "open_journal"]


class JournalError(Exception):
    """The journal cannot be found or read; the message is one line for stderr."""


def add_journal_arguments(parser: argparse.ArgumentParser) -> None:
    """``--db`` and ``--config``, mutually exclusive."""
    where = parser.add_mutually_exclusive_group()
    where.add_argument("--db", type=Path, help="journal file (the outbox database)")
    where.add_argument("--config", type=Path, help="station config naming the journal")


def journal_path(db: Path | None, config: Path | None) -> Path:
    """The journal's path from ``--db`` / ``--config`` / the default; ``JournalError`` for a
    station config that does not load."""
    if db is not None:
        return Path(db)
    if config is not None:
        try:
            return load_config(config, check_files=False).config.outbox.path
        except ConfigError as exc:
            first = exc.problems[0] if exc.problems else str(exc)
            raise JournalError(f"{config}: {first}") from None
    return OutboxConfig().path


def open_journal(args: argparse.Namespace) -> tuple[Outbox, Path]:
    """Open the journal named by ``args.db`` / ``args.config`` for reading, changing nothing.

    Raises ``JournalError`` when there is no journal there, the file is no outbox, or SQLite
    cannot open it. The caller closes the returned outbox (``with``).
    """
    path = journal_path(args.db, args.config)
    if not path.is_file():
        raise JournalError(f"no journal at {path}")
    try:
        return Outbox(path, create=False), path
    except OutboxError as exc:
        raise JournalError(str(exc)) from None
