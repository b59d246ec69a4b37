"""``clampd run --config FILE``: the station daemon (what systemd starts).

The config is validated as a whole before anything starts (``clampd check-config`` runs
the same checks); a bad file exits 2 with its first problem on one line and every problem
in the log. SIGTERM and SIGINT stop the daemon cleanly (see ``runtime/_supervisor.py``):
the rundown in progress finishes or is aborted, the outbox is flushed while the broker is
reachable, the offline status is published, and the exit status is 0.

``--ble-hci SPEC`` attaches the daemon's BLE central to a virtual link through a bumble HCI
transport (e.g. ``tcp-client:127.0.0.1:PORT`` of ``clampd simulate wrench`` or a test's
hub) instead of the system's Bluetooth: the production code path, bleak included, against
simulated wrenches. It imports the simulator stack, so production never pays for it.

Exit status: 0 stopped by a signal, 1 the daemon failed, 2 bad input.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import logging
import signal
import sys
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

__all__ = ["add_arguments", "run"]

_log = logging.getLogger(__name__)


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``clampd run``."""
    parser.add_argument("--config", type=Path, required=True, help="station config (TOML)")
    parser.add_argument(
        "--ble-hci",
        metavar="SPEC",
        default=None,
        help="use a virtual BLE link through this bumble HCI transport "
        "(e.g. tcp-client:127.0.0.1:PORT) instead of the system's Bluetooth",
    )


def _fail(message: str) -> int:
    print(f"clampd run: {message}", file=sys.stderr)
    return 2


def run(args: argparse.Namespace) -> int:
    """Load the config, run the station until SIGTERM/SIGINT."""
    from clampd.daemon.runtime._config import ConfigError, load_config

    try:
        loaded = load_config(args.config)
    except ConfigError as exc:
        for problem in exc.problems:
            _log.error("%s: %s", args.config, problem)
        first = exc.problems[0] if exc.problems else exc
        more = f" (and {len(exc.problems) - 1} more)" if len(exc.problems) > 1 else ""
        return _fail(f"{args.config}: {first}{more}")
    except OSError as exc:
        return _fail(f"{args.config}: {exc.strerror or exc}")
    for warning in loaded.warnings:
        _log.warning("%s: %s", args.config, warning)
    from clampd.daemon.runtime._config import PlaintextRemoteError
    from clampd.daemon.runtime._outbox import OutboxError

    # Hand the GIL over every 0.5 ms instead of CPython's 5 ms, so a worker's sample handling is
    # not held up behind a result being mapped in a thread: measured p99 of sample arrival ->
    # stop-cue call 5.1 ms -> 2.2 ms under load
    # (tests/benchmarks/bench_cue_latency.py --switch-interval).
    sys.setswitchinterval(0.0005)
    try:
        return asyncio.run(_main(loaded.config, args.ble_hci))
    except _HciError as exc:
        return _fail(f"--ble-hci {args.ble_hci}: {exc}")
    except PlaintextRemoteError as exc:
        return _fail(str(exc))
    except (OutboxError, OSError, ExceptionGroup) as exc:
        _log.error("station failed: %s", exc, exc_info=exc)
        print(f"clampd run: station failed: {exc!r}", file=sys.stderr)
        return 1


class _HciError(Exception):
    pass


@contextlib.asynccontextmanager
async def _virtual_central(spec: str | None) -> AsyncIterator[dict[str, Any] | None]:
    if spec is None:
        yield None
        return
    from clampd.simulators.ble import HciSpecError, open_central

    try:
        central_cm = open_central(spec)
        central = await central_cm.__aenter__()
    except (HciSpecError, OSError) as exc:
        raise _HciError(str(exc)) from None
    try:
        yield central.bleak_kwargs()
    finally:
        await central_cm.__aexit__(None, None, None)


async def _main(config: Any, hci: str | None) -> int:
    from clampd.daemon.runtime._supervisor import Station

    stop = asyncio.Event()
    loop = asyncio.get_running_loop()
    for sig in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(sig, stop.set)
    try:
        async with _virtual_central(hci) as kwargs:
            station = Station(
                config, bleak_kwargs=None if kwargs is None else (lambda _w: dict(kwargs))
            )
            await station.run(stop)
    finally:
        for sig in (signal.SIGTERM, signal.SIGINT):
            loop.remove_signal_handler(sig)
    return 0
