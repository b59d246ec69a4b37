"""``clampd demo``: the whole station on embedded defaults (see ``runtime/_demo.py``).

One command shows the product end to end without hardware or a plant network: a local MQTT
broker (mosquitto when installed, else an in-process one), two virtual wrenches on the
virtual GATT link with simulated technicians, the real station daemon, and an MES stand-in
that selects work by MQTT command and checks every result against the published schema.
A live view shows progress; everything is written to a fresh folder under ``--out``
(journal, the MES's received results, the station file, the log), and the closing report
says where. ``--broker mqtt://HOST:PORT`` uses an external broker instead; the demo then
waits for the outbox to empty before it exits.

Ctrl-C ends the demo early the way SIGTERM ends the daemon (rundown finished or aborted,
outbox flushed, offline status published); a second Ctrl-C stops at once.

Exit status: 0 done (NOK results are part of the demo), 1 the demo failed while running,
2 bad input.
"""

from __future__ import annotations

import argparse
import asyncio
import datetime as dt
import logging
import signal
import sys
from pathlib import Path

__all__ = ["add_arguments", "run"]

_DEFAULT_OUT = Path("demo-output")


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``clampd demo``."""
    from clampd.daemon.runtime._demo import DEFAULT_PARTS

    parser.add_argument(
        "--parts",
        type=int,
        default=DEFAULT_PARTS,
        help=f"mower decks to assemble (default {DEFAULT_PARTS}, about 30-60 s)",
    )
    parser.add_argument(
        "--broker",
        metavar="URL",
        default=None,
        help="external broker mqtt://HOST:PORT (default: a local one started by the demo)",
    )
    parser.add_argument(
        "--out",
        type=Path,
        default=_DEFAULT_OUT,
        help=f"output folder; each run gets a new subfolder in it (default {_DEFAULT_OUT})",
    )
    parser.add_argument("--seed", type=int, default=2026, help="random seed (default 2026)")
    parser.add_argument(
        "--plain", action="store_true", help="line output even on a terminal (no live redraw)"
    )


def _fail(message: str) -> int:
    print(f"clampd demo: {message}", file=sys.stderr)
    return 2


def run(args: argparse.Namespace) -> int:
    """Run the demo and print where everything went."""
    from clampd.daemon.runtime._demo import DemoError, DemoOptions, run_demo
    from clampd.daemon.runtime._terminal import TerminalView
    from clampd.daemon.view import announce_view

    if args.parts < 1:
        return _fail(f"--parts must be at least 1, got {args.parts}")
    if args.broker is not None and not str(args.broker).startswith("mqtt://"):
        return _fail(f"--broker must look like mqtt://HOST:PORT, got {args.broker!r}")
    stamp = dt.datetime.now().strftime("%Y%m%d-%H%M%S")
    # Absolute, because the station file's relative paths (the journal) are taken relative to
    # its own folder, and every path the report prints must work from any directory.
    out_dir: Path = args.out.absolute() / stamp
    try:
        out_dir.mkdir(parents=True, exist_ok=False)
    except OSError as exc:
        return _fail(f"--out: cannot create {out_dir}: {exc.strerror or exc}")
    _log_to_file(out_dir / "demo.log", args.verbose)
    view = TerminalView(sys.stdout, tty=False if args.plain else None)
    options = DemoOptions(
        out_dir=out_dir,
        parts=args.parts,
        broker_url=args.broker,
        seed=args.seed,
        extras=(announce_view,),
    )

    async def main() -> int:
        interrupt = asyncio.Event()
        loop = asyncio.get_running_loop()
        task = asyncio.current_task()

        def on_sigint() -> None:
            if interrupt.is_set() and task is not None:
                task.cancel()  # second Ctrl-C: stop at once
            interrupt.set()
            view.event("stopping: finishing the rundown in progress, flushing the outbox")

        loop.add_signal_handler(signal.SIGINT, on_sigint)
        loop.add_signal_handler(signal.SIGTERM, on_sigint)
        try:
            report = await run_demo(options, view, interrupt=interrupt)
        except DemoError as exc:
            print(f"clampd demo: {exc}", file=sys.stderr)
            print(f"log: {out_dir / 'demo.log'}", file=sys.stderr)
            return 1
        finally:
            loop.remove_signal_handler(signal.SIGINT)
            loop.remove_signal_handler(signal.SIGTERM)
        print()
        for line in report.lines():
            print(line)
        print(f"log: {out_dir / 'demo.log'}")
        return 0

    try:
        return asyncio.run(main())
    except asyncio.CancelledError:
        print("clampd demo: stopped at once; the journal keeps what was stored", file=sys.stderr)
        return 1


def _log_to_file(path: Path, verbose: int) -> None:
    """The demo's log goes to its folder, so the live view keeps the terminal to itself."""
    root = logging.getLogger()
    for handler in list(root.handlers):
        root.removeHandler(handler)
    handler = logging.FileHandler(path, encoding="utf-8")
    handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(name)s: %(message)s"))
    root.addHandler(handler)
    root.setLevel(logging.DEBUG if verbose else logging.INFO)
