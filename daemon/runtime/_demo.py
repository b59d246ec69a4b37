"""``clampd demo``: the whole station on embedded defaults, in one process.

Theory of operation
-------------------
``run_demo(options, view)`` builds, inside one event loop:

1. an MQTT broker: mosquitto on 127.0.0.1 when it is installed, else amqtt in-process
   (``LocalBroker``), or the external broker of ``--broker URL``;
2. the virtual GATT link (bumble) with one virtual wrench per joint group of the scenario,
   each driven by a simulated technician (``Technician``) who hears the tool's cues;
3. the real station daemon (``Station``, the same code ``clampd run`` starts) on the
   scenario's station file, with unmodified bleak on the virtual link's backend and the
   journal in the demo's output folder;
4. the MES stand-in, which selects program, part and joint positions per wrench by MQTT
   command, checks every result against the published JSON Schema and feeds the live view.

The path of every result is the production path: sensor frames over GATT → engine → cue
written to the tool → technician stops → result into the durable outbox → flusher → broker
→ MES. The demo hands each joint to the technician only after the MES saw the previous
result, and selects the next part only when every group of the current one is done.

It ends after ``parts`` parts, or earlier on Ctrl-C, by stopping the station the way
SIGTERM does (finish or abort the rundown in progress, flush the outbox, publish offline),
and reports where everything went. ``extras`` are hooks that run beside the station (a web
page, for instance) and contribute lines to that report.

The scenario (the module's second half) is invented demo data: real joints follow the
joint designer's specification, local codes and licensed practice.
"""

from __future__ import annotations

import asyncio
import collections
import contextlib
import dataclasses
import datetime as dt
import importlib.resources
import json
import logging
import statistics
import tomllib
import urllib.parse
from collections.abc import AsyncIterator, Callable, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from clampd.daemon.runtime._config import StationConfig, parse_config
from clampd.daemon.runtime._cues import NullCuePlayer
from clampd.daemon.runtime._outbox import Outbox
from clampd.daemon.runtime._supervisor import Station, resident_memory_kib
from clampd.daemon.runtime._terminal import ResultRow, TerminalView
from clampd.protocol import Kind, UnitError, parse_quantity
from clampd.simulators import (
    Bench,
    CuePattern,
    JointModel,
    JointPopulation,
    Motion,
    OperatorParams,
    SensorParams,
    VirtualWrenchSensor,
)
from clampd.simulators._broker import LocalBroker
from clampd.simulators._mes import MesError, MesStandIn, ReceivedResult

__all__ = [
    "DEFAULT_PARTS",
    "DemoError",
    "DemoExtra",
    "DemoOptions",
    "DemoReport",
    "Incident",
    "JointGroup",
    "Scenario",
    "ScenarioError",
    "Technician",
    "load_scenario",
    "run_demo",
]

_log = logging.getLogger(__name__)

# Three decks of seven joints each: about 30-60 s with the scenario's pull rates and pauses
# (measured on the development machine; the issue asks for a demo of that length).
DEFAULT_PARTS = 3
# The demo's wrenches are always in calibration: due this many days after today (demo data).
_CALIBRATION_AHEAD_DAYS = 180
# Waiting for the station's first "online" status and for each result. A rundown of the
# scenario takes a few seconds; a minute without a result means something is broken.
_ONLINE_TIMEOUT_S = 30.0
_RESULT_TIMEOUT_S = 60.0
# Rework attempts after a NOK before the MES leaves the position for review (demo policy).
_REWORK = 2
# Live view redraw period (the view rate-limits itself as well).
_REFRESH_S = 0.1

DemoExtra = Callable[[Station, MesStandIn], contextlib.AbstractAsyncContextManager[Sequence[str]]]
"""A hook that runs beside the demo's station (e.g. ``clampd.daemon.view.announce_view``,
which prints the station view's address); it yields the lines it wants in the final report."""


class DemoError(RuntimeError):
    """The demo could not run (no broker, an external broker that refuses, a stuck station)."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class DemoOptions:
    """What ``clampd demo`` was asked for."""

    out_dir: Path
    parts: int = DEFAULT_PARTS
    broker_url: str | None = None
    seed: int = 2026
    extras: Sequence[DemoExtra] = ()


@dataclasses.dataclass(slots=True, kw_only=True)
class DemoReport:
    """What happened and where everything went."""

    out_dir: Path
    journal: Path
    station_file: Path
    results_file: Path
    broker: str
    parts_done: int = 0
    ok: int = 0
    nok: int = 0
    invalid: int = 0
    duplicates: int = 0
    unsent_at_stop: int | None = None
    latencies_s: list[float] = dataclasses.field(default_factory=list)
    put_to_ack_s: list[float] = dataclasses.field(default_factory=list)
    rss_kib: int | None = None
    interrupted: bool = False
    arrivals: dict[str, float] = dataclasses.field(default_factory=dict)
    extra_lines: list[str] = dataclasses.field(default_factory=list)

    def lines(self) -> list[str]:
        """The closing report, one line each."""
        out = [
            f"parts done: {self.parts_done}{' (interrupted)' if self.interrupted else ''}",
            (
                f"results at the MES: {self.ok} OK, {self.nok} NOK, "
                f"{self.invalid} failing the schema, {self.duplicates} duplicate deliveries"
            ),
        ]
        for what, values in (
            ("stored -> broker ack", self.put_to_ack_s),
            ("stored -> MES arrival", self.latencies_s),
        ):
            if values:
                lat = sorted(values)
                p95 = lat[min(len(lat) - 1, round(0.95 * (len(lat) - 1)))]
                out.append(
                    f"{what}: median {statistics.median(lat) * 1e3:.1f} ms, p95 "
                    f"{p95 * 1e3:.1f} ms, max {lat[-1] * 1e3:.1f} ms over {len(lat)} results"
                )
        if self.rss_kib is not None:
            out.append(f"resident memory of the demo process: {self.rss_kib / 1024:.1f} MiB")
        out += [
            f"outbox unsent at exit: {self.unsent_at_stop}",
            f"broker: {self.broker}",
            f"journal: {self.journal}   (clampd results --db {self.journal})",
            f"results as received by the MES: {self.results_file}",
            f"station config: {self.station_file}",
            f"plot one: clampd plot RESULT_ID --db {self.journal} --out curve.png",
            *self.extra_lines,
            (
                "Simulated joints and invented programs: results support, never replace, the "
                "joint designer's specification, local codes and licensed practice."
            ),
        ]
        return out


def _broker_address(url: str) -> tuple[str, int]:
    parts = urllib.parse.urlsplit(url)
    if parts.scheme not in ("mqtt", "mqtts") or not parts.hostname:
        raise DemoError(f"--broker must look like mqtt://HOST:PORT, got {url!r}")
    if parts.scheme == "mqtts":
        raise DemoError("the demo's MES stand-in speaks plain mqtt:// only")
    try:
        port = parts.port or 1883
    except ValueError as exc:
        raise DemoError(f"--broker {url!r}: {exc}") from None
    return parts.hostname, port


def demo_config(
    scenario: Scenario, *, out_dir: Path, broker_url: str, addresses: Sequence[str]
) -> StationConfig:
    """The scenario's station file with the demo's broker, wrench addresses, calibration
    dates and journal, through the documented ``CLAMPD__`` overrides."""
    due = (dt.date.today() + dt.timedelta(days=_CALIBRATION_AHEAD_DAYS)).isoformat()
    env = {
        "CLAMPD__BROKER__URL": broker_url,
        "CLAMPD__OUTBOX__PATH": str(out_dir / "journal" / "outbox.sqlite3"),
        # The station view on a free loopback port: a demo must not fail because another
        # demo or a station on this machine holds the default one.
        "CLAMPD__VIEW__PORT": "0",
    }
    for i, address in enumerate(addresses):
        env[f"CLAMPD__WRENCH__{i}__ADDRESS"] = address
        env[f"CLAMPD__WRENCH__{i}__CALIBRATION_DUE"] = due
    loaded = parse_config(
        scenario.station_toml, env=env, base_dir=out_dir, source="demo scenario station.toml"
    )
    (out_dir / "station.toml").write_text(scenario.station_toml, encoding="utf-8")
    (out_dir / "station.env").write_text(
        "".join(f"{k}={v}\n" for k, v in sorted(env.items())), encoding="utf-8"
    )
    return loaded.config


@contextlib.asynccontextmanager
async def _broker(options: DemoOptions) -> AsyncIterator[tuple[str, str]]:
    if options.broker_url is not None:
        _broker_address(options.broker_url)
        yield options.broker_url, f"external, {options.broker_url}"
        return
    workdir = options.out_dir / "broker"
    workdir.mkdir(parents=True, exist_ok=True)
    broker = LocalBroker(workdir=workdir)
    try:
        await broker.start()
    except Exception as exc:
        raise DemoError(f"could not start a local MQTT broker: {exc}") from exc
    try:
        yield broker.url, f"{broker.kind} on {broker.url} (files in {broker.workdir})"
    finally:
        await broker.stop()


async def run_demo(
    options: DemoOptions, view: TerminalView, *, interrupt: asyncio.Event | None = None
) -> DemoReport:
    """Run the demo (see the module docstring); ``interrupt`` ends it early (Ctrl-C).

    Raises ``DemoError`` when it cannot start; a NOK result is part of the demo, not an error.
    """
    from clampd.simulators.ble import VirtualAir, WrenchIdentity

    if options.parts < 1:
        raise DemoError(f"--parts must be at least 1, got {options.parts}")
    interrupt = interrupt if interrupt is not None else asyncio.Event()
    scenario = load_scenario()
    out = options.out_dir
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(options.seed)
    results_file = out / "mes-results.jsonl"
    report = DemoReport(
        out_dir=out,
        journal=out / "journal" / "outbox.sqlite3",
        station_file=out / "station.toml",
        results_file=results_file,
        broker="",
    )
    async with _broker(options) as (broker_url, broker_desc), VirtualAir() as air:
        report.broker = broker_desc
        techs: dict[str, Technician] = {}
        addresses: list[str] = []
        station_toml = tomllib.loads(scenario.station_toml)
        capacity = {
            w["id"]: parse_quantity(w["torque_max"], Kind.TORQUE) for w in station_toml["wrench"]
        }
        for group in scenario.groups:
            # The simulated tool winds up 0.02 deg per N*m (SensorParams' default).
            tech = Technician(
                np.random.default_rng(rng.integers(2**63)), deflection_deg_per_nm=0.02
            )
            sensor = VirtualWrenchSensor(
                SensorParams(serial=group.serial, torque_max_nm=capacity[group.wrench_id]),
                np.random.default_rng(rng.integers(2**63)),
                tech,
            )
            wrench = await air.add_wrench(
                sensor,
                name=group.wrench_id.upper(),
                identity=WrenchIdentity(serial=group.serial),
            )
            techs[group.wrench_id] = tech
            addresses.append(wrench.address)
        # The station file lists the wrenches in the scenario's group order.
        order = [w["id"] for w in station_toml["wrench"]]
        by_id = dict(zip([g.wrench_id for g in scenario.groups], addresses, strict=True))
        config = demo_config(
            scenario,
            out_dir=out,
            broker_url=broker_url,
            addresses=[by_id[w] for w in order],
        )
        view.title = (
            f"clampd demo · {config.station.name} ({config.station.id}) · "
            f"{options.parts} x {scenario.part_name}"
        )
        view.subtitle = f"broker {broker_desc}; journal {report.journal}"
        for w in config.wrench:
            view.add_wrench(w.id, w.torque_max_nm)
        # One central per wrench (one radio per tool): the connects never queue.
        centrals = {w.id: await air.add_central() for w in config.wrench}
        station = Station(
            config,
            bleak_kwargs=lambda w: centrals[w.id].bleak_kwargs(),
            cue_player=NullCuePlayer(),
        )
        host, port = _broker_address(broker_url)
        queues: dict[str, asyncio.Queue[ReceivedResult]] = {w: asyncio.Queue() for w in techs}
        stop = asyncio.Event()

        def on_result(r: ReceivedResult) -> None:
            payload = r.payload or {}
            wrench_id = str(payload.get("wrench", {}).get("wrench_id", "?"))
            with results_file.open("a", encoding="utf-8") as f:
                line = {
                    "received_at": r.received_at,
                    "valid": r.valid,
                    "errors": list(r.errors),
                    "result": payload,
                }
                f.write(json.dumps(line) + "\n")
            view.result(_row(r))
            if wrench_id in queues:
                queues[wrench_id].put_nowait(r)

        def on_live(topic: str, event: dict[str, Any]) -> None:
            wrench_id = topic.rsplit("/", 2)[-2]
            torque = event.get("torque_nm")
            if wrench_id in view.wrenches and isinstance(torque, int | float):
                view.wrench(wrench_id, torque_nm=float(torque))

        online = asyncio.Event()

        def on_status(topic: str, status: dict[str, Any]) -> None:
            if status.get("kind") == "station_status" and status.get("state") == "online":
                online.set()
            wrench_id = status.get("wrench_id")
            if status.get("kind") == "wrench_status" and wrench_id in view.wrenches:
                view.wrench(str(wrench_id), connected=bool(status.get("connected")))

        try:
            async with asyncio.TaskGroup() as tg:
                station_task = tg.create_task(station.run(stop), name="clampd.demo.station")
                try:
                    async with (
                        MesStandIn(
                            host,
                            port,
                            config.station.topic_prefix,
                            client_id="mes-standin-demo",
                            on_result=on_result,
                            on_live=on_live,
                            on_status=on_status,
                        ) as mes,
                        contextlib.AsyncExitStack() as extras,
                    ):
                        for extra in options.extras:
                            report.extra_lines += list(
                                await extras.enter_async_context(extra(station, mes))
                            )
                        refresher = tg.create_task(_refresh(view), name="clampd.demo.view")
                        try:
                            run = _Run(
                                options=options,
                                scenario=scenario,
                                mes=mes,
                                techs=techs,
                                queues=queues,
                                view=view,
                                report=report,
                                interrupt=interrupt,
                                rng=rng,
                                online=online,
                            )
                            await run.wait_online(config.station.id)
                            await run.work()
                        finally:
                            stop.set()
                            await asyncio.wait([station_task])
                            refresher.cancel()
                        _tally(mes, report)
                except MesError as exc:
                    raise DemoError(str(exc)) from exc
                finally:
                    stop.set()
        except* DemoError as group:
            raise group.exceptions[0] from None
        report.unsent_at_stop = station.unsent_at_stop
        if station.flusher is not None:
            report.put_to_ack_s = station.flusher.latencies()
    view.footer = _footer(report)
    view.refresh(force=True)
    report.rss_kib = resident_memory_kib()
    report.latencies_s = await asyncio.to_thread(
        _put_to_mes_latencies, report.journal, report.arrivals
    )
    return report


async def _refresh(view: TerminalView) -> None:
    while True:
        view.refresh()
        await asyncio.sleep(_REFRESH_S)


@dataclasses.dataclass(slots=True, kw_only=True)
class _Run:
    """What the MES side of one demo run shares between its per-wrench jobs."""

    options: DemoOptions
    scenario: Scenario
    mes: MesStandIn
    techs: dict[str, Technician]
    queues: dict[str, asyncio.Queue[ReceivedResult]]
    view: TerminalView
    report: DemoReport
    interrupt: asyncio.Event
    rng: np.random.Generator
    online: asyncio.Event

    async def wait_online(self, station_id: str) -> None:
        try:
            async with asyncio.timeout(_ONLINE_TIMEOUT_S):
                await self.online.wait()
        except TimeoutError:
            raise DemoError(
                f"station {station_id} did not come online within {_ONLINE_TIMEOUT_S} s"
            ) from None

    async def work(self) -> None:
        parts = self.options.parts
        for number in range(1, parts + 1):
            if self.interrupt.is_set():
                self.report.interrupted = True
                return
            part_id = self.scenario.part_id(number)
            self.view.event(f"part {number}/{parts}: {part_id}")
            await asyncio.gather(*(self.group(number, part_id, g) for g in self.scenario.groups))
            if self.interrupt.is_set():
                self.report.interrupted = True
                return
            self.report.parts_done = number
            self.view.footer = _footer(self.report)

    async def group(self, number: int, part_id: str, group: JointGroup) -> None:
        """Select the group's positions for this part, hand the joints over one by one.

        After a NOK the MES orders rework: it selects the positions again from the one that
        failed, and the technician tightens a fresh screw there (at most ``_REWORK`` times).
        """
        wrench_id = group.wrench_id
        view = self.view
        remaining = list(group.positions)
        attempts: collections.Counter[str] = collections.Counter()
        await self._select(group, part_id, remaining)
        while remaining and not self.interrupt.is_set():
            position = remaining[0]
            # The planned mistake happens on the first attempt at its position only.
            incident = self.scenario.incident(number, position) if not attempts[position] else None
            attempts[position] += 1
            operator = OperatorParams(steady_rate_dps=group.pull_rate_dps, start_delay_s=0.3)
            note = "" if attempts[position] == 1 else "(rework)"
            if incident is not None:
                operator = dataclasses.replace(
                    operator,
                    ignore_cues=incident.ignores_cues,
                    stop_at_torque_nm=incident.stop_at_torque_nm,
                )
                note = "(technician misses the stop cue)"
            view.wrench(wrench_id, position=position, torque_nm=0.0, note=note)
            self.techs[wrench_id].hand_over(JointModel.sample(self.rng, group.population), operator)
            try:
                async with asyncio.timeout(_RESULT_TIMEOUT_S):
                    result = await self.queues[wrench_id].get()
            except TimeoutError:
                raise DemoError(
                    f"no result from {wrench_id} within {_RESULT_TIMEOUT_S} s"
                ) from None
            got = str((result.payload or {}).get("joint_position"))
            view.wrench(wrench_id, note="")
            if got not in remaining:
                continue
            if result.status == "OK" or attempts[got] > _REWORK:
                if result.status != "OK":
                    view.event(f"MES: {part_id}/{got} left NOK for review")
                remaining.remove(got)
                continue
            view.event(f"MES: {part_id}/{got} NOK; rework ordered")
            remaining = remaining[remaining.index(got) :]
            await self._select(group, part_id, remaining)

    async def _select(self, group: JointGroup, part_id: str, positions: list[str]) -> None:
        reply = await self.mes.select_program(
            group.program_id, part_id, positions, wrench_id=group.wrench_id
        )
        if reply.get("status") != "ok":
            raise DemoError(f"station refused the selection for {group.wrench_id}: {reply}")
        self.view.wrench(group.wrench_id, program=group.program_id, part=part_id)
        self.view.event(
            f"MES selected {group.program_id} for {part_id} on {group.wrench_id}: "
            f"{', '.join(positions)}"
        )


def _row(r: ReceivedResult) -> ResultRow:
    p = r.payload or {}
    finished = str(p.get("finished_at", ""))
    angle = p.get("final_angle_deg")
    torque = p.get("final_torque_nm")
    return ResultRow(
        at=finished[11:19] if len(finished) >= 19 else "--:--:--",
        wrench_id=str(p.get("wrench", {}).get("wrench_id", "?")),
        part=str(p.get("part_id", "?")),
        position=str(p.get("joint_position", "?")),
        status=str(p.get("status", "?")),
        reasons=tuple(str(x) for x in p.get("reasons", [])),
        final_torque_nm=float(torque) if isinstance(torque, int | float) else float("nan"),
        final_angle_deg=float(angle) if isinstance(angle, int | float) else None,
        valid=r.valid,
        latency_s=None,
    )


def _tally(mes: MesStandIn, report: DemoReport) -> None:
    unique = mes.unique_results()
    report.ok = sum(1 for r in unique if r.status == "OK")
    report.nok = sum(1 for r in unique if r.status == "NOK")
    report.invalid = sum(1 for r in unique if not r.valid)
    report.duplicates = sum(mes.duplicates.values())
    report.arrivals = {r.id: r.received_at for r in unique if r.id is not None}


def _footer(report: DemoReport) -> str:
    return f"parts done {report.parts_done} · OK {report.ok} · NOK {report.nok}"


def _put_to_mes_latencies(journal: Path, arrivals: dict[str, float]) -> list[float]:
    """Seconds from the durable put (journal ``created_at``) to the MES's arrival time.

    Both are the same host's wall clock, so the difference is the outbox → flusher →
    broker → MES path alone.
    """
    if not journal.is_file():
        return []
    out: list[float] = []
    with Outbox(journal) as ob:
        for rid, received_at in arrivals.items():
            entry = ob.get(rid)
            if entry is not None:
                out.append(received_at - entry.created_at)
    return out


_REST = Motion(0.0, 0.0, 0.0, 0.0, 0.0, False, False)


class ScenarioError(ValueError):
    """The scenario files are inconsistent (ours: they ship with clampd)."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class JointGroup:
    """The joints of one part that one wrench tightens under one program."""

    wrench_id: str
    program_id: str
    positions: tuple[str, ...]
    population: JointPopulation
    pull_rate_dps: float
    serial: str


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Incident:
    """A planned mistake: on part number ``part`` (1-based) at ``position``."""

    part: int
    position: str
    ignores_cues: bool
    stop_at_torque_nm: float | None


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Scenario:
    """The whole demo scenario."""

    station_toml: str
    part_type: str
    part_name: str
    id_format: str
    first_serial: int
    groups: tuple[JointGroup, ...]
    incidents: tuple[Incident, ...]

    def part_id(self, number: int) -> str:
        """The part id of the ``number``-th part of the demo (1-based)."""
        return self.id_format.format(serial=self.first_serial + number - 1)

    def incident(self, part: int, position: str) -> Incident | None:
        """The incident planned for this part and position, if any."""
        return next((i for i in self.incidents if (i.part, i.position) == (part, position)), None)


def _files() -> Any:
    return importlib.resources.files("clampd.simulators") / "scenario"


def load_scenario() -> Scenario:
    """Read the shipped scenario; raises ``ScenarioError`` when its files disagree."""
    base = _files()
    station_toml = (base / "station.toml").read_text(encoding="utf-8")
    parts = tomllib.loads((base / "parts.toml").read_text(encoding="utf-8"))
    station = tomllib.loads(station_toml)
    wrench_ids = {w["id"] for w in station.get("wrench", [])}
    program_ids = {p["id"] for p in station.get("program", [])}
    try:
        part = parts["part"]
        groups = []
        for g in parts["group"]:
            if g["wrench"] not in wrench_ids or g["program"] not in program_ids:
                raise ScenarioError(f"group {g['wrench']}/{g['program']} not in station.toml")
            joint = g["joint"]
            lo, hi = g["free_run_deg"]
            groups.append(
                JointGroup(
                    wrench_id=g["wrench"],
                    program_id=g["program"],
                    positions=tuple(g["positions"]),
                    population=JointPopulation(
                        d_mm=int(joint["size_mm"]),
                        property_class=str(joint["property_class"]),
                        clamp_length_mm=float(joint["clamp_length_mm"]),
                        contact_angle_deg=(float(lo), float(hi)),
                    ),
                    pull_rate_dps=float(g["pull_rate_dps"]),
                    serial=str(g["serial"]),
                )
            )
        incidents = tuple(
            Incident(
                part=int(i["part"]),
                position=str(i["position"]),
                ignores_cues=bool(i.get("ignores_cues", False)),
                stop_at_torque_nm=None
                if i.get("stop_at_torque") is None
                else parse_quantity(i["stop_at_torque"], Kind.TORQUE),
            )
            for i in parts.get("incident", [])
        )
        return Scenario(
            station_toml=station_toml,
            part_type=str(part["type"]),
            part_name=str(part["name"]),
            id_format=str(part["id_format"]),
            first_serial=int(part["first_serial"]),
            groups=tuple(groups),
            incidents=incidents,
        )
    except (KeyError, TypeError, ValueError, UnitError) as exc:
        if isinstance(exc, ScenarioError):
            raise
        raise ScenarioError(f"demo scenario files are malformed: {exc!r}") from exc


class Technician:
    """A simulated technician at one wrench (see the module docstring); a ``MotionSource``.

    ``hand_over(joint, operator)`` queues one joint; ``joints_done`` counts finished ones.
    """

    def __init__(
        self,
        rng: np.random.Generator,
        *,
        deflection_deg_per_nm: float,
        pause_s: tuple[float, float] = (0.4, 0.8),
    ) -> None:
        self._rng = rng
        self._deflection = deflection_deg_per_nm
        # Between two screws the person moves the socket to the next one: a pause of about a
        # second (modelling choice for the demo's pace).
        self._pause = pause_s
        self._queue: collections.deque[tuple[JointModel, OperatorParams]] = collections.deque()
        self._bench: Bench | None = None
        self.joints_done = 0
        self.stop_reasons: list[str | None] = []

    @property
    def busy(self) -> bool:
        """True while a joint is queued or being tightened."""
        return bool(self._queue) or self._bench is not None

    def hand_over(self, joint: JointModel, operator: OperatorParams) -> None:
        """Queue one joint to tighten, with how the person works on it."""
        self._queue.append((joint, dataclasses.replace(operator, part_pause_s=self._pause)))

    def step(self, dt_s: float) -> Motion:
        """Advance by ``dt_s``: the current joint's motion, or rest between joints."""
        bench = self._bench
        if bench is not None and bench.joint is None:
            # The bench finished its joint and its pause: the person is free again.
            self.joints_done += bench.parts_done
            self.stop_reasons.extend(bench.stop_reasons)
            self._bench = bench = None
        if bench is None:
            if not self._queue:
                return _REST
            joint, operator = self._queue.popleft()
            self._bench = bench = Bench(
                joint, operator, self._rng, deflection_deg_per_nm=self._deflection
            )
        return bench.step(dt_s)

    def put_down(self) -> None:
        """The person stops and sets the tool down (e.g. its link went dark): the joint in
        hand is abandoned, queued ones stay."""
        bench, self._bench = self._bench, None
        if bench is not None:
            self.stop_reasons.append("put-down")

    def hear(self, pattern: CuePattern) -> None:
        """A cue from the tool reaches the person."""
        if self._bench is not None:
            self._bench.hear(pattern)
