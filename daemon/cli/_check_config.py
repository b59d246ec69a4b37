"""``clampd check-config FILE``: validate a station file before the daemon needs it.

Prints every problem with its field path (one per line) and exits 2 when the file is
unusable, so a technician fixes it in one pass; prints warnings and exits 0 when it is
valid (among them: cue output "device" on a machine where ``sounddevice`` does not load).
Environment overrides (``CLAMPD__...``) are applied as the daemon would apply them.
"""

from __future__ import annotations

import argparse
import os
import sys

from clampd.daemon.runtime._config import ENV_PREFIX, ConfigError, load_config
from clampd.daemon.runtime._cues import device_output_problem


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
        for hint in _hints(exc, args):
            print(f"hint: {hint}", file=sys.stderr)
        return 2
    cfg = loaded.config
    warnings = list(loaded.warnings)
    if cfg.cues.output == "device":
        # The daemon degrades to silence here; a technician relies on the stop cue.
        no_sound = device_output_problem()
        if no_sound is not None:
            warnings.append(f"cues.output = 'device': {no_sound}; cues would not be played")
    for warning in warnings:
        print(f"warning: {warning}", file=sys.stderr)
    print(
        f"{args.file}: OK — station {cfg.station.id} ({cfg.station.topic_prefix}), "
        f"{len(cfg.wrench)} wrench(es), {len(cfg.program)} program(s), "
        f"broker {cfg.broker.host}:{cfg.broker.port}{' TLS' if cfg.broker.tls else ''}"
    )
    return 0


def _hints(exc: ConfigError, args: argparse.Namespace) -> list[str]:
    """What to do next, for the two errors that do not come from the file's text: a value
    set in the environment is not in the file where the reader looks for it, and a file a
    key names may exist only on the station board."""
    hints: list[str] = []
    overrides = [] if args.ignore_env else sorted(n for n in os.environ if n.startswith(ENV_PREFIX))
    if overrides:
        hints.append(
            f"the environment overrides {', '.join(overrides)}; --ignore-env checks the file alone"
        )
    if not args.no_file_checks and any(p.message.startswith("no such file") for p in exc.problems):
        hints.append(
            "a referenced file is missing; on a workstation without the board's files, "
            "--no-file-checks checks everything else"
        )
    return hints
