"""`clampd simulate WHAT ...`: run the simulators from the command line.

Each simulator is a sub-subcommand with its own ``_add_NAME(parser)`` and ``_run_NAME(args)``;
``add_arguments`` registers them and ``run`` dispatches on the one chosen.

- ``study KIND --joints N --seed S [--json] [--plot FILE.png] [--workers W]``: a seeded
  population study scoring the engine against the simulator (``preload``: preload scatter
  and αA per strategy; ``cues``: final-angle error with and without predictive cueing;
  ``angle``: counted against true angle over handle rates). Same seed, same bytes.

Simulated joints score software only; real joints follow the joint designer's specification,
local codes and licensed practice.

Exit status: 0 done, 2 bad input (one line on stderr, nothing run).
"""

from __future__ import annotations

import argparse
import importlib.util
import sys
from collections.abc import Callable
from pathlib import Path

__all__ = ["add_arguments", "run"]

# Default population size: large enough that αA and the 95 % shares settle to about a
# percent, small enough to run in about a minute on a laptop (see DEVELOPERS.md).
_DEFAULT_JOINTS = 200


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Register every simulator under ``clampd simulate``."""
    sub = parser.add_subparsers(dest="simulate_command", metavar="WHAT", required=True)
    _add_study(
        sub.add_parser(
            "study",
            help="seeded population study: preload, cues or angle",
            description=_run_study.__doc__,
        )
    )


def run(args: argparse.Namespace) -> int:
    """Run the chosen simulator."""
    handler: Callable[[argparse.Namespace], int] = args.simulate_run
    return handler(args)


def _error(message: str) -> int:
    print(f"clampd simulate: error: {message}", file=sys.stderr)
    return 2


# ---------------------------------------------------------------------------- study
def _add_study(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("kind", choices=("preload", "cues", "angle"), help="which study")
    parser.add_argument(
        "--joints",
        type=int,
        default=_DEFAULT_JOINTS,
        help=f"simulated joints (per case) (default {_DEFAULT_JOINTS})",
    )
    parser.add_argument("--seed", type=int, default=1, help="random seed (default 1)")
    parser.add_argument("--json", action="store_true", help="print one JSON object")
    parser.add_argument("--plot", type=Path, metavar="FILE.png", help="write a PNG figure")
    parser.add_argument(
        "--workers",
        type=int,
        default=None,
        help="worker processes (default: one per CPU; the figures do not depend on it)",
    )
    parser.set_defaults(simulate_run=_run_study)


def _run_study(args: argparse.Namespace) -> int:
    """Run a seeded population study through the real engine against the simulators."""
    from clampd.simulators.studies import StudyError, run_study

    plot: Path | None = args.plot
    if plot is not None:
        # Fail before minutes of simulation, not after.
        if not plot.parent.is_dir():
            return _error(f"--plot: directory {plot.parent} does not exist")
        if importlib.util.find_spec("matplotlib") is None:
            return _error("--plot needs matplotlib (pip install 'clampd[plot]')")
    try:
        report = run_study(args.kind, joints=args.joints, seed=args.seed, workers=args.workers)
        if plot is not None:
            report.plot(plot)
    except StudyError as exc:
        return _error(str(exc))
    sys.stdout.write(report.json_text() if args.json else report.table())
    if plot is not None:
        print(f"wrote {plot}", file=sys.stderr)
    return 0
