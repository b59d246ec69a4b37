"""One station rig around the real daemon: virtual wrenches, ``clampd run`` as a process, waits.

Theory of operation
-------------------
The end-to-end tests, the kill loop (``deploy/killloop.py``) and the soak (``deploy/soak.py``)
all put the same pieces around the real daemon, and this module holds them once:

- ``virtual_wrenches(groups, capacities_nm, technician, seed=...)``: one ``VirtualAir`` link
  with a virtual GATT wrench per entry of ``capacities_nm``, each driven by a simulated
  technician that ``technician`` makes (the caller's choice, e.g. the demo's ``Technician``).
  ``WrenchRig.hand_over`` gives a technician one joint drawn from his group's population;
  ``WrenchRig.hub()`` serves the link over TCP so a daemon process can join it.
- ``station_overrides(...)``: the documented ``CLAMPD__`` environment overrides that point a
  station file at this rig's broker, wrenches and journal.
- ``spawn_daemon`` / ``daemon_process`` / ``stop_daemon`` / ``kill_daemon`` / ``reap``:
  ``clampd run --ble-hci`` as a real subprocess, the command systemd starts.
- ``start_wrench_process`` / ``stop_processes``: ``clampd simulate wrench`` as a process of its
  own, its ready line parsed.
- ``eventually`` / ``wait_for_status`` / ``wait_until_ready``: bounded waits on state that has
  no event of its own (a retained status seen by the MES stand-in).

Invariants:

- The simulators stay an independent truth (tests/test_sim_independence.py): this module
  never imports the daemon. The daemon runs as a separate process named by ``DAEMON_CLI``;
  a technician and a joint group are anything of the shape of ``TechnicianPort`` and
  ``JointGroupPort``.
- A seed gives the same wrenches, technicians and joints every run: the rig's generator
  draws the technician's seed, then the sensor's, wrench by wrench in the order of
  ``capacities_nm``, and every joint handed over comes from the same generator.

Every wait here only bounds a hang: a sound run never comes near it, and nothing is timed.
The joints the rig hands over are simulated (invented data, for testing software only); real
joints follow the joint designer's specification, local codes and licensed practice.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import datetime as dt
import os
import re
import signal
import sys
from collections.abc import AsyncIterator, Callable, Iterable, Mapping
from pathlib import Path
from typing import IO, Any, Protocol

import numpy as np

from clampd.simulators._joint import JointModel, JointPopulation
from clampd.simulators._mes import MesStandIn
from clampd.simulators._operator import MotionSource, OperatorParams
from clampd.simulators._sensor import SensorParams, VirtualWrenchSensor
from clampd.simulators.ble import HciHub, VirtualAir, WrenchIdentity, WrenchPeripheral

__all__ = [
    "DAEMON_CLI",
    "JointGroupPort",
    "RigError",
    "TechnicianPort",
    "WrenchProcess",
    "WrenchRig",
    "daemon_process",
    "eventually",
    "kill_daemon",
    "reap",
    "spawn_daemon",
    "start_wrench_process",
    "station_overrides",
    "stop_daemon",
    "stop_processes",
    "virtual_wrenches",
    "wait_for_status",
    "wait_until_ready",
]

# The station's command line as a process (``python -m``), never an import: the same
# interpreter and installed package as the caller.
DAEMON_CLI: tuple[str, ...] = (sys.executable, "-m", "clampd.daemon.cli")

# Bounds on waits that only guard against a hang (our choice, generous: the machine running
# a test may be loaded many times over, and importing bumble, numpy and the simulators in a
# new process takes seconds there).
_WAIT_S = 60.0
_EXIT_WAIT_S = 30.0
_WRENCH_READY_S = 60.0
_WRENCH_STOP_S = 20.0
# How often a wait looks again at state that has no event of its own (our choice: far below
# a rundown's second or so, far above the loop's own turn).
_POLL_S = 0.02
# A scenario wrench's calibration falls due this far ahead, so no run meets an overdue tool
# (our choice: half a year, longer than any run).
_CALIBRATION_AHEAD_DAYS = 180
# The ready line ``clampd simulate wrench`` prints on stdout (simulators/ble/_standalone.py).
_READY = re.compile(r"ready name=(\S+) address=(\S+) hci=(\S+)")


class RigError(RuntimeError):
    """A part of the rig did not start (a wrench process that exits or never says ready)."""


class TechnicianPort(MotionSource, Protocol):
    """What the rig needs of a simulated technician: a motion source for the sensor that
    takes joints one at a time and can set the tool down."""

    stop_reasons: list[str | None]

    @property
    def busy(self) -> bool: ...

    def hand_over(self, joint: JointModel, operator: OperatorParams) -> None: ...

    def put_down(self) -> None: ...


class JointGroupPort(Protocol):
    """What the rig needs of a joint group: the wrench's serial, the joints it tightens and
    how fast its technician pulls."""

    @property
    def serial(self) -> str: ...

    @property
    def population(self) -> JointPopulation: ...

    @property
    def pull_rate_dps(self) -> float: ...


@dataclasses.dataclass
class WrenchRig:
    """The virtual wrenches on one link, each with a technician waiting for work."""

    air: VirtualAir
    groups: Mapping[str, JointGroupPort]
    techs: dict[str, TechnicianPort]
    wrenches: dict[str, WrenchPeripheral]
    rng: np.random.Generator

    def hand_over(self, wrench_id: str, operator: OperatorParams | None = None) -> None:
        """Give the technician at ``wrench_id`` one joint drawn from his group, worked the
        group's way unless ``operator`` says otherwise. ``KeyError`` for an unknown wrench."""
        group = self.groups[wrench_id]
        self.techs[wrench_id].hand_over(
            JointModel.sample(self.rng, group.population),
            operator or OperatorParams(steady_rate_dps=group.pull_rate_dps),
        )

    @property
    def addresses(self) -> dict[str, str]:
        """Wrench id → BLE address, in the rig's wrench order."""
        return {w: p.address for w, p in self.wrenches.items()}

    def hub(self, host: str = "127.0.0.1", port: int = 0) -> HciHub:
        """An ``HciHub`` serving this rig's link over TCP (``async with``; ``.spec`` after)."""
        link = self.air.link
        if link is None:
            raise RuntimeError("WrenchRig used outside its 'async with'")
        return HciHub(link, host, port)


@contextlib.asynccontextmanager
async def virtual_wrenches(
    groups: Mapping[str, JointGroupPort],
    capacities_nm: Mapping[str, float],
    technician: Callable[[np.random.Generator], TechnicianPort],
    *,
    seed: int,
) -> AsyncIterator[WrenchRig]:
    """One virtual wrench per ``capacities_nm`` entry (wrench id → rated torque), named after
    its id in capitals, with its group's serial and a technician from ``technician(rng)``.

    ``KeyError`` when a wrench has no group (the caller's input). Leaving the block stops
    every wrench and powers the link off.
    """
    rng = np.random.default_rng(seed)
    async with VirtualAir() as air:
        techs: dict[str, TechnicianPort] = {}
        wrenches: dict[str, WrenchPeripheral] = {}
        for wrench_id, capacity in capacities_nm.items():
            group = groups[wrench_id]
            tech = technician(np.random.default_rng(rng.integers(2**32)))
            sensor = VirtualWrenchSensor(
                SensorParams(serial=group.serial, torque_max_nm=capacity),
                np.random.default_rng(rng.integers(2**32)),
                tech,
            )
            wrenches[wrench_id] = await air.add_wrench(
                sensor, name=wrench_id.upper(), identity=WrenchIdentity(serial=group.serial)
            )
            techs[wrench_id] = tech
        yield WrenchRig(air, groups, techs, wrenches, rng)


def station_overrides(
    *, prefix: str, broker_url: str, journal: Path, addresses: Mapping[str, str]
) -> dict[str, str]:
    """The documented ``CLAMPD__`` overrides that point a station file at this rig.

    ``addresses`` maps wrench id → BLE address in the order of the station file's
    ``[[wrench]]`` tables (the overrides address them by index). The station view goes to
    a free port so runs can go side by side, and every wrench's calibration falls due well
    after the run.
    """
    due = (dt.date.today() + dt.timedelta(days=_CALIBRATION_AHEAD_DAYS)).isoformat()
    env = {
        "CLAMPD__STATION__TOPIC_PREFIX": prefix,
        "CLAMPD__BROKER__URL": broker_url,
        "CLAMPD__OUTBOX__PATH": str(journal),
        "CLAMPD__VIEW__PORT": "0",
    }
    for i, address in enumerate(addresses.values()):
        env[f"CLAMPD__WRENCH__{i}__ADDRESS"] = address
        env[f"CLAMPD__WRENCH__{i}__CALIBRATION_DUE"] = due
    return env


async def spawn_daemon(
    config: Path, hci: str, env: Mapping[str, str], log: Path
) -> asyncio.subprocess.Process:
    """Start ``clampd -v run --config CONFIG --ble-hci HCI`` with ``env`` over this process's
    environment; its log is appended to ``log``. The caller ends it (``reap`` at the latest)."""
    with log.open("ab") as f:
        return await asyncio.create_subprocess_exec(
            *DAEMON_CLI,
            "-v",
            "run",
            "--config",
            str(config),
            "--ble-hci",
            hci,
            env={**os.environ, **env},
            stdout=asyncio.subprocess.DEVNULL,
            stderr=f,
        )


async def reap(proc: asyncio.subprocess.Process) -> None:
    """Kill ``proc`` if it still runs, and wait for it: nothing outlives the rig."""
    if proc.returncode is None:
        with contextlib.suppress(ProcessLookupError):  # it ended on its own meanwhile
            proc.kill()
        await proc.wait()


@contextlib.asynccontextmanager
async def daemon_process(
    config: Path, hci: str, env: Mapping[str, str], log: Path
) -> AsyncIterator[asyncio.subprocess.Process]:
    """``spawn_daemon`` for the length of the block; a daemon still running at its end is
    killed (the block decides how it should have ended)."""
    proc = await spawn_daemon(config, hci, env, log)
    try:
        yield proc
    finally:
        await reap(proc)


async def _signal_and_wait(
    proc: asyncio.subprocess.Process, signum: signal.Signals, timeout_s: float
) -> int:
    proc.send_signal(signum)
    async with asyncio.timeout(timeout_s):
        return await proc.wait()


async def kill_daemon(proc: asyncio.subprocess.Process, timeout_s: float = _EXIT_WAIT_S) -> int:
    """SIGKILL (no handler runs, POSIX) and the exit code (``-SIGKILL`` when it was still
    running). ``TimeoutError`` if it is not gone within ``timeout_s``."""
    return await _signal_and_wait(proc, signal.SIGKILL, timeout_s)


async def stop_daemon(proc: asyncio.subprocess.Process, timeout_s: float = _EXIT_WAIT_S) -> int:
    """SIGTERM, the clean stop, and the exit code. ``TimeoutError`` if it does not stop
    within ``timeout_s``."""
    return await _signal_and_wait(proc, signal.SIGTERM, timeout_s)


@dataclasses.dataclass(frozen=True, slots=True)
class WrenchProcess:
    """A ``clampd simulate wrench`` process and what its ready line said."""

    proc: asyncio.subprocess.Process
    name: str
    address: str
    hci: str


async def start_wrench_process(
    *options: str,
    log: Path | None = None,
    verbose: bool = False,
    timeout_s: float = _WRENCH_READY_S,
) -> WrenchProcess:
    """Start ``clampd [-v] simulate wrench OPTIONS`` and wait for its ready line.

    Its log (stderr) is appended to ``log`` when given. ``RigError`` when it exits or does
    not say ready within ``timeout_s``; it is killed then, so nothing is left behind.
    """
    stderr: IO[bytes] | None = log.open("ab") if log is not None else None
    try:
        proc = await asyncio.create_subprocess_exec(
            *DAEMON_CLI,
            *(("-v",) if verbose else ()),
            "simulate",
            "wrench",
            *options,
            stdout=asyncio.subprocess.PIPE,
            stderr=stderr,
        )
    finally:
        if stderr is not None:
            stderr.close()
    assert proc.stdout is not None  # PIPE above
    where = f" (see {log})" if log is not None else ""
    try:
        async with asyncio.timeout(timeout_s):
            while True:
                line = (await proc.stdout.readline()).decode()
                if not line:
                    raise RigError(f"simulated wrench {options} exited before it was ready{where}")
                m = _READY.search(line)
                if m:
                    return WrenchProcess(proc, m.group(1), m.group(2), m.group(3))
    except TimeoutError as exc:
        await reap(proc)
        raise RigError(f"simulated wrench {options} not ready in {timeout_s} s{where}") from exc
    except BaseException:
        await reap(proc)
        raise


async def stop_processes(
    procs: Iterable[asyncio.subprocess.Process], timeout_s: float = _WRENCH_STOP_S
) -> None:
    """SIGTERM to every process still running, then wait for each up to ``timeout_s``; one
    that does not stop in time is killed."""
    procs = list(procs)
    for proc in procs:
        if proc.returncode is None:
            proc.send_signal(signal.SIGTERM)
    for proc in procs:
        with contextlib.suppress(TimeoutError):
            async with asyncio.timeout(timeout_s):
                await proc.wait()
        await reap(proc)


async def eventually(
    check: Callable[[], bool], timeout_s: float | None = _WAIT_S, poll_s: float = _POLL_S
) -> None:
    """Wait until ``check()`` holds (state with no event of its own to wait on).

    ``TimeoutError`` after ``timeout_s``; ``None`` waits until cancelled.
    """
    async with asyncio.timeout(timeout_s):
        while True:
            if check():
                return
            await asyncio.sleep(poll_s)


async def wait_for_status(
    mes: MesStandIn,
    sub: str,
    ok: Callable[[dict[str, Any]], bool],
    timeout_s: float | None = _WAIT_S,
    poll_s: float = _POLL_S,
) -> dict[str, Any]:
    """Wait until the retained status at ``PREFIX/SUB`` as the MES last saw it satisfies
    ``ok`` (an empty dict while none arrived), and return it."""
    topic = f"{mes.prefix}/{sub}"
    await eventually(lambda: ok(mes.statuses.get(topic, {})), timeout_s, poll_s)
    return mes.statuses.get(topic, {})


async def wait_until_ready(
    mes: MesStandIn, wrench_ids: Iterable[str], timeout_s: float | None = _WAIT_S
) -> None:
    """Wait until the station says it is online and each wrench says it is connected."""
    await wait_for_status(mes, "status", lambda s: s.get("state") == "online", timeout_s)
    for w in wrench_ids:
        await wait_for_status(
            mes, f"wrench/{w}/status", lambda s: s.get("connected") is True, timeout_s
        )
