"""``clampd check-config FILE``: validate a station file before the daemon needs it.

Prints every problem with its field path (one per line) and exits 2 when the file is
unusable, so a technician fixes it in one pass; prints warnings and exits 0 when it is
valid. Environment overrides (``CLAMPD__...``) are applied as the daemon would apply them.
"""

from __future__ import annotations

import argparse
import sys

from clampd.daemon.runtime._config import ConfigError, load_config


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``clampd check-config``."""
    parser.add_argument("file", metavar="FILE", help="station TOML file")
    parser.add_argument(
        "--no-file-checks",
        action="store_true",
        help="do not require referenced files (TLS, password) to exist, e.g. on a workstation",
    )
    parser.add_argument(
        "--ignore-env", action="store_true", help="ignore CLAMPD__* environment overrides"
    )


def run(args: argparse.Namespace) -> int:
    """Validate; 0 when usable (warnings may be printed), 2 with every problem otherwise."""
    try:
        loaded = load_config(
            args.file, env={} if args.ignore_env else None, check_files=not args.no_file_checks
        )
    except ConfigError as exc:
        for problem in exc.problems:
            where = f"{problem.path}: " if problem.path else ""
            print(f"error: {args.file}: {where}{problem.message}", file=sys.stderr)
        return 2
    for warning in loaded.warnings:
        print(f"warning: {warning}", file=sys.stderr)
    cfg = loaded.config
    print(
        f"{args.file}: OK — station {cfg.station.id} ({cfg.station.topic_prefix}), "
        f"{len(cfg.wrench)} wrench(es), {len(cfg.program)} program(s), "
        f"broker {cfg.broker.host}:{cfg.broker.port}{' TLS' if cfg.broker.tls else ''}"
    )
    return 0
