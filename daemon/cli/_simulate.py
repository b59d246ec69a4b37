"""`clampd simulate WHAT ...`: run the simulators from the command line.

Each simulator is a sub-subcommand with its own ``_add_NAME(parser)`` and ``_run_NAME(args)``;
``add_arguments`` registers them and ``run`` dispatches on the one chosen.

- ``wrench [--hci SPEC] [--name NAME] [--rate HZ] [--seed S] [--idle] [--duration S]``: one
  virtual wrench as a real GATT peripheral on bumble, reachable from another process over
  an HCI transport (default ``tcp-server:127.0.0.1:0``; prints ``ready ... hci=SPEC`` with
  the spec a central joins with). Runs until SIGINT/SIGTERM or ``--duration``.
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
    _add_wrench(
        sub.add_parser(
            "wrench",
            help="one virtual wrench as a GATT peripheral reachable over an HCI transport",
            description=_run_wrench.__doc__,
        )
    )
    _add_study(
        sub.add_parser(
            "study",
            help="seeded population study: preload, cues, angle or error-proofing",
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
    parser.add_argument(
        "kind", choices=("preload", "cues", "angle", "error-proofing"), help="which study"
    )
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


# ---------------------------------------------------------------------------- wrench
def _add_wrench(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--hci",
        default="tcp-server:127.0.0.1:0",
        metavar="SPEC",
        help="tcp-server:HOST:PORT to host the link here (port 0: any free port), or a "
        "bumble transport such as tcp-client:HOST:PORT to join another hub "
        "(default tcp-server:127.0.0.1:0)",
    )
    parser.add_argument("--name", default="W-1", help="advertised local name (default W-1)")
    parser.add_argument(
        "--rate", type=int, default=1000, help="sample rate, Hz, 250..4000 (default 1000)"
    )
    parser.add_argument("--seed", type=int, default=1, help="random seed (default 1)")
    parser.add_argument("--serial", default=None, help="serial number (default SIM-NAME)")
    parser.add_argument(
        "--idle",
        action="store_true",
        help="the wrench lies still (default: a simulated technician tightens M10 joints)",
    )
    parser.add_argument(
        "--duration", type=float, default=None, metavar="S", help="stop after S seconds"
    )
    parser.set_defaults(simulate_run=_run_wrench)


def _run_wrench(args: argparse.Namespace) -> int:
    """Serve one virtual wrench (GATT on bumble) until SIGINT/SIGTERM or --duration."""
    import asyncio

    from clampd.simulators.ble._standalone import (
        StandaloneError,
        StandaloneWrench,
        install_stop_signals,
        serve_wrench,
    )

    try:
        cfg = StandaloneWrench(
            hci=args.hci,
            name=args.name,
            rate_hz=args.rate,
            seed=args.seed,
            serial=args.serial,
            idle=args.idle,
            duration_s=args.duration,
        )
    except StandaloneError as exc:
        return _error(str(exc))

    async def main() -> None:
        stop = asyncio.Event()
        remove = install_stop_signals(stop)
        try:
            await serve_wrench(cfg, stop=stop)
        finally:
            remove()

    try:
        asyncio.run(main())
    except StandaloneError as exc:
        return _error(str(exc))
    except OSError as exc:
        return _error(f"--hci {cfg.hci}: {exc.strerror or exc}")
    return 0
