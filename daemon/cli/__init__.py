"""Command-line entry point: `clampd SUBCOMMAND ...`.

Each subcommand lives in its own private module with two functions,
``add_arguments(parser)`` and ``run(args) -> int``; the table below names them so the
modules are imported only when their subcommand runs (importing bumble or matplotlib
costs a noticeable fraction of a second on a small board). Logging is configured here,
once, and nowhere else.

Exit status: 0 success, 1 a judged failure the caller asked about (e.g. a NOK replay is
still 0; see each subcommand), 2 bad input (usage, unreadable or invalid files).
"""

from __future__ import annotations

import argparse
import importlib
import logging
import os
import sys
from collections.abc import Sequence

__all__ = ["main"]

# subcommand -> (module, one-line help)
_COMMANDS: dict[str, tuple[str, str]] = {
    "replay": ("clampd.daemon.cli._replay", "run the engine over recorded samples (CSV)"),
    "plan": ("clampd.daemon.cli._plan", "compute a tightening program from bolt and joint data"),
    "schema": (
        "clampd.daemon.cli._schema",
        "print the JSON Schema or AsyncAPI of the MQTT interface",
    ),
    "simulate": ("clampd.daemon.cli._simulate", "run simulators: a virtual wrench or a study"),
    "run": ("clampd.daemon.cli._run", "run the station daemon from a config file"),
    "demo": ("clampd.daemon.cli._demo", "run the whole station on embedded defaults"),
    "check-config": ("clampd.daemon.cli._check_config", "validate a station config file"),
    "results": ("clampd.daemon.cli._results", "list and show results from the journal"),
    "plot": ("clampd.daemon.cli._plot", "draw a result's torque-angle curve to a PNG"),
    "stats": (
        "clampd.daemon.cli._stats",
        "capability, control charts and drift alarms from the journal",
    ),
}


def _build_parser(argv: Sequence[str]) -> tuple[argparse.ArgumentParser, argparse.Namespace]:
    parser = argparse.ArgumentParser(
        prog="clampd",
        description="Tightening station daemon, joint planner and simulators. "
        "Results and programs support, never replace, the joint designer's specification, "
        "local codes and licensed practice.",
    )
    parser.add_argument("-v", "--verbose", action="count", default=0, help="more log output")
    parser.add_argument("--version", action="version", version=f"clampd {_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    wanted = next((a for a in argv if not a.startswith("-")), None)
    for name, (module_name, help_text) in _COMMANDS.items():
        sp = sub.add_parser(name, help=help_text, description=help_text)
        # Only the chosen subcommand's module is imported (and so only its options exist).
        if name == wanted:
            module = importlib.import_module(module_name)
            module.add_arguments(sp)
            sp.set_defaults(_run=module.run)
    return parser, parser.parse_args(argv)


def main(argv: Sequence[str] | None = None) -> int:
    """Parse the command line, configure logging once, and run one subcommand."""
    args_list = list(sys.argv[1:] if argv is None else argv)
    _, args = _build_parser(args_list)
    level = logging.WARNING - 10 * min(args.verbose, 2)
    logging.basicConfig(
        level=level, format="%(asctime)s %(levelname)s %(name)s: %(message)s", stream=sys.stderr
    )
    run = args._run
    try:
        code: int = run(args)
    except BrokenPipeError:
        # The reader went away (`clampd results | head`): not an error of clampd's. Point
        # stdout at /dev/null so the interpreter's final flush does not raise again.
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return 1
    return code


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("clampd")
    except PackageNotFoundError:
        return "unknown (not installed)"


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
