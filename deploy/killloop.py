"""Kill loop: ``clampd run`` SIGKILLed at seeded random moments, N times, and nothing judged lost.

    .venv/bin/python deploy/killloop.py --kills 50 --seed 7 --out /tmp/clampd-killloop

What runs (everything on 127.0.0.1, nothing leaves the machine):

- mosquitto (``LocalBroker``), the plant broker stand-in, with persistence;
- the demo scenario's two wrenches (wr-07, wr-11) as virtual GATT peripherals in this
  process, each with a simulated technician, on one virtual BLE link that an ``HciHub``
  serves over TCP;
- ``clampd run --ble-hci`` as a real subprocess (the command systemd starts), pointed at
  this rig by the documented ``CLAMPD__`` environment overrides;
- an MES (``MesStandIn``) that selects work after every start and keeps every result
  message it receives, raw bytes included.

Each daemon life is planned from the seed before it starts: a kill moment drawn uniformly
from ``--min-s``..``--max-s`` seconds after the process is spawned (so some kills land
during start-up, some mid-rundown, some while a result is written or published), and, for
about one life in four (``--outage-share``), a broker outage that starts somewhere before
the kill: results judged then can be stored but not published when the kill comes. The kill
is SIGKILL (no handler runs, POSIX). After every kill the script checks the outbox file with
SQLite's ``PRAGMA integrity_check`` and that no result id is stored twice, brings the
broker back when it was down, and starts the daemon again.

After the last kill the daemon runs once more until the outbox has nothing unsent, is
stopped with SIGTERM, and the script checks delivery: every stored result reached the MES;
the MES received nothing that is not stored; a result id that arrived more than once
arrived with the same bytes each time (MQTT 5.0 §4.3.2, QoS 1 is "at least once": a
repeat is allowed, a changed or missing message is not); the published bytes equal the
stored payload. It writes ``OUT/report.json`` and exits 1 on any violation.

The joints and the station are the demo scenario's invented data, for testing software
only; real joints follow the joint designer's specification, local codes and licensed
practice.
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import dataclasses
import json
import logging
import os
import random
import signal
import sqlite3
import time
from pathlib import Path
from typing import Any

import numpy as np

from clampd.daemon.runtime._demo import Technician, load_scenario
from clampd.simulators._broker import LocalBroker
from clampd.simulators._mes import MesError, MesStandIn
from clampd.simulators._station_rig import (
    WrenchRig,
    daemon_process,
    eventually,
    kill_daemon,
    station_overrides,
    stop_daemon,
    virtual_wrenches,
    wait_for_status,
)

__all__ = ["KillLoopOptions", "kill_loop", "main", "violations"]

_log = logging.getLogger("clampd.killloop")

PREFIX = "brackenfield/kill-bench/line-3/st-310"
SCENARIO = load_scenario()
GROUPS = {g.wrench_id: g for g in SCENARIO.groups}
# Capacities of the scenario's two wrenches (simulators/scenario/station.toml).
CAPACITY_NM = {"wr-07": 100.0, "wr-11": 40.0}
# Free-form joint positions; 64 is the most a selection may hold (protocol/MQTT.md). A daemon
# life lasts seconds, a rundown about one, so a selection never runs out within a life.
POSITIONS = [f"K{i}" for i in range(1, 65)]
# Bounds on waits that only guard against a hang; a sound run never comes near them (our
# choice, generous for a loaded two-core machine).
_STOP_WAIT_S = 30.0
_DRAIN_WAIT_S = 120.0
_WILL_WAIT_S = 10.0
# How often the plant side looks at a retained status again (our choice: a rundown takes a
# second or so; the final life's wait looks less often, it only waits for the start).
_POLL_S = 0.05
_FINAL_POLL_S = 0.1


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class KillLoopOptions:
    """What to run: ``kills`` daemon lives ended by SIGKILL, planned from ``seed``."""

    kills: int = 50
    seed: int = 7
    out: Path = Path("killloop-out")
    # One life lasts min_s..max_s from spawn: start-up of `clampd run` to "online" took
    # ~4 s on the loaded development machine and a rundown ~1-2 s, so 3-14 s spreads kills
    # over start-up, rundowns, writes and publishes (measured, see deploy/SECURITY.md).
    min_s: float = 3.0
    max_s: float = 14.0
    # Share of lives with a broker outage before the kill (our choice: enough to exercise
    # "stored, not published, killed" several times in 50 kills).
    outage_share: float = 0.25


@dataclasses.dataclass(frozen=True, slots=True)
class _Life:
    kill_at_s: float
    # Where the broker outage starts, as a share of the time between the station taking
    # its work (selection acknowledged) and the kill; None for no outage.
    outage_share: float | None


def plan_lives(options: KillLoopOptions) -> list[_Life]:
    """The seeded plan of every life, drawn before anything runs so a run can be repeated."""
    rng = random.Random(options.seed)
    lives = []
    for _ in range(options.kills):
        kill_at = round(rng.uniform(options.min_s, options.max_s), 3)
        outage = round(rng.uniform(0.1, 0.9), 3) if rng.random() < options.outage_share else None
        lives.append(_Life(kill_at, outage))
    return lives


def _technician(rng: np.random.Generator) -> Technician:
    # The scenario's wrenches deflect 0.02 deg per N*m (simulators/scenario/station.toml).
    return Technician(rng, deflection_deg_per_nm=0.02)


def check_outbox(path: Path) -> tuple[bool, list[str], int, int]:
    """(integrity ok, ids stored more than once, rows, rows not yet sent) read with plain
    sqlite3, so the check does not trust the daemon's own outbox code. A missing file is
    sound and empty."""
    if not path.exists():
        return True, [], 0, 0
    conn = sqlite3.connect(path)
    try:
        rows = [r[0] for r in conn.execute("PRAGMA integrity_check").fetchall()]
        dup = [r[0] for r in conn.execute("SELECT id FROM results GROUP BY id HAVING COUNT(*) > 1")]
        (n,) = conn.execute("SELECT COUNT(*) FROM results").fetchone()
        (unsent,) = conn.execute("SELECT COUNT(*) FROM results WHERE sent_at IS NULL").fetchone()
    except sqlite3.DatabaseError as exc:
        _log.error("outbox unreadable: %s", exc)
        return False, [], 0, 0
    finally:
        conn.close()
    return rows == ["ok"], dup, int(n), int(unsent)


def _stored(path: Path) -> dict[str, tuple[bytes, bool]]:
    if not path.exists():
        return {}
    conn = sqlite3.connect(path)
    try:
        return {
            rid: (bytes(payload), sent_at is not None)
            for rid, payload, sent_at in conn.execute("SELECT id, payload, sent_at FROM results")
        }
    finally:
        conn.close()


class _Mes:
    """The plant side across broker outages: one ``MesStandIn`` per broker up-time (the
    stand-in keeps no session, so it is connected whenever the broker is up: a result the
    broker acknowledged must have reached it)."""

    def __init__(self, broker: LocalBroker) -> None:
        self.broker = broker
        self.part = 0
        self.stand_in: MesStandIn | None = None
        self._stack: contextlib.AsyncExitStack | None = None

    async def connect(self) -> None:
        stack = contextlib.AsyncExitStack()
        self.stand_in = await stack.enter_async_context(
            MesStandIn(self.broker.host, self.broker.port, PREFIX)
        )
        self._stack = stack

    async def close(self) -> None:
        stack, self._stack, self.stand_in = self._stack, None, None
        if stack is not None:
            await stack.aclose()


async def _drive(rig: WrenchRig, mes: _Mes, life_no: int, selected: asyncio.Event) -> None:
    """One daemon life seen from the plant floor: wait until the station says it is online,
    select a part for each wrench, then keep each technician tightening while his tool is
    connected and subscribed. Ends only by cancellation (the kill)."""
    m = mes.stand_in
    if m is None:
        return
    # A peer's retained status has no event of its own to wait on; the kill ends the wait.
    await wait_for_status(m, "status", lambda s: s.get("state") == "online", None, _POLL_S)
    for wrench_id, group in GROUPS.items():
        mes.part += 1
        with contextlib.suppress(MesError):
            await m.select_program(
                group.program_id, f"KL-{life_no:03d}-{mes.part:05d}", POSITIONS, wrench_id=wrench_id
            )
    selected.set()
    while True:
        for wrench_id, wrench in rig.wrenches.items():
            if wrench.subscribed and not rig.techs[wrench_id].busy:
                rig.hand_over(wrench_id)
        await asyncio.sleep(_POLL_S)


def _online(mes: _Mes) -> bool:
    """The MES is connected and last saw the station say it is online."""
    m = mes.stand_in
    return m is not None and m.statuses.get(f"{PREFIX}/status", {}).get("state") == "online"


def _loop_time(monotonic_s: float) -> float:
    """A ``time.monotonic()`` moment on the event loop's clock (``asyncio.timeout_at``)."""
    loop = asyncio.get_running_loop()
    return loop.time() + (monotonic_s - time.monotonic())


async def kill_loop(options: KillLoopOptions) -> dict[str, Any]:
    """Run the loop and return the report (see the module docstring); ``violations(report)``
    lists what broke a guarantee. Raises only for a rig that cannot start (no mosquitto)."""
    out = options.out
    for folder in (out, out / "broker"):
        folder.mkdir(parents=True, exist_ok=True)
    journal = out / "journal" / "outbox.sqlite3"
    config = out / "station.toml"
    config.write_text(SCENARIO.station_toml, encoding="utf-8")
    log = out / "daemon.log"
    lives = plan_lives(options)
    after_kill: list[dict[str, Any]] = []
    exit_codes: list[int] = []
    finished_stand_ins: list[MesStandIn] = []
    outages = 0
    t_start = time.monotonic()
    async with (
        LocalBroker(workdir=out / "broker", prefer="mosquitto") as broker,
        virtual_wrenches(GROUPS, CAPACITY_NM, _technician, seed=options.seed) as rig,
        rig.hub() as hub,
    ):
        env = station_overrides(
            prefix=PREFIX, broker_url=broker.url, journal=journal, addresses=rig.addresses
        )
        mes = _Mes(broker)
        await mes.connect()
        try:
            for n, life in enumerate(lives, start=1):
                if mes.stand_in is not None:
                    mes.stand_in.statuses.pop(f"{PREFIX}/status", None)
                spawned = time.monotonic()
                async with daemon_process(config, hub.spec, env, log) as daemon:
                    selected = asyncio.Event()
                    driver = asyncio.create_task(
                        _drive(rig, mes, n, selected), name=f"killloop.drive-{n}"
                    )
                    broker_down = False
                    outage_at: float | None = None
                    try:
                        kill_at = spawned + life.kill_at_s
                        with contextlib.suppress(TimeoutError):
                            async with asyncio.timeout_at(_loop_time(kill_at)):
                                await selected.wait()
                        now = time.monotonic()
                        if life.outage_share is not None and selected.is_set() and now < kill_at:
                            outage_at = now + life.outage_share * (kill_at - now)
                            await asyncio.sleep(outage_at - time.monotonic())
                            # Broker first, MES after: the MES never misses a result the
                            # broker acknowledged to the station.
                            await broker.stop()
                            broker_down = True
                            if mes.stand_in is not None:
                                finished_stand_ins.append(mes.stand_in)
                            await mes.close()
                            outages += 1
                        await asyncio.sleep(max(0.0, kill_at - time.monotonic()))
                        exit_codes.append(await kill_daemon(daemon, _STOP_WAIT_S))
                    finally:
                        driver.cancel()
                        with contextlib.suppress(asyncio.CancelledError, MesError):
                            await driver
                # The tool went dark: each technician lets go of the joint in hand.
                for tech in rig.techs.values():
                    tech.put_down()
                ok, dup, rows, unsent = await asyncio.to_thread(check_outbox, journal)
                after_kill.append(
                    {
                        "kill": n,
                        "at_s": life.kill_at_s,
                        "outage_at_s": None if outage_at is None else round(outage_at - spawned, 3),
                        "integrity_ok": ok,
                        "duplicate_ids": dup,
                        "rows": rows,
                        "unsent": unsent,
                    }
                )
                _log.info("kill %d at %.2f s: integrity %s, %d rows", n, life.kill_at_s, ok, rows)
                if broker_down:
                    await broker.start()
                    await mes.connect()
                elif mes.stand_in is not None:
                    # Let the old life's will (retained "offline") arrive before the next
                    # life's "online" is awaited, so a stale status is never mistaken for it.
                    with contextlib.suppress(TimeoutError):
                        await wait_for_status(
                            mes.stand_in,
                            "status",
                            lambda s: s.get("state") != "online",
                            _WILL_WAIT_S,
                            _POLL_S,
                        )
            # The last life: run until the outbox is drained, then a clean stop.
            if mes.stand_in is not None:
                mes.stand_in.statuses.pop(f"{PREFIX}/status", None)
            drained = False
            async with daemon_process(config, hub.spec, env, log) as daemon:
                with contextlib.suppress(TimeoutError):
                    async with asyncio.timeout(_DRAIN_WAIT_S):
                        await eventually(lambda: _online(mes), None, _FINAL_POLL_S)
                        while True:
                            stored = await asyncio.to_thread(_stored, journal)
                            if all(sent for _, sent in stored.values()):
                                drained = True
                                break
                            await asyncio.sleep(0.2)
                # Give the MES the last PUBLISH the daemon marked sent after its PUBACK.
                await asyncio.sleep(1.0)
                final_exit = await stop_daemon(daemon, _STOP_WAIT_S)
            await asyncio.sleep(1.0)
        finally:
            if mes.stand_in is not None:
                finished_stand_ins.append(mes.stand_in)
            await mes.close()
    wall_s = time.monotonic() - t_start
    stored = await asyncio.to_thread(_stored, journal)
    ok_end, dup_end, rows_end, _ = await asyncio.to_thread(check_outbox, journal)
    messages = [r for m in finished_stand_ins for r in m.results]
    by_id: dict[str, list[bytes]] = {}
    for r in messages:
        by_id.setdefault(r.id or "<no id>", []).append(r.raw)
    repeats = {rid: len(raws) - 1 for rid, raws in by_id.items() if len(raws) > 1}
    changed = sorted(rid for rid, raws in by_id.items() if len(set(raws)) > 1)
    not_as_stored = sorted(
        rid for rid, raws in by_id.items() if rid in stored and raws[0] != stored[rid][0]
    )
    invalid = sum(1 for r in messages if not r.valid)
    statuses = [json.loads(p).get("status") for p, _ in stored.values()]
    reasons: dict[str, int] = {}
    for p, _ in stored.values():
        for reason in json.loads(p).get("reasons", []):
            reasons[reason] = reasons.get(reason, 0) + 1
    return {
        "kills": options.kills,
        "seed": options.seed,
        "kill_window_s": [options.min_s, options.max_s],
        "broker_outages": outages,
        "wall_s": round(wall_s, 1),
        "daemon_exit_codes_on_kill": sorted(set(exit_codes)),
        "killed_by_sigkill": sum(1 for c in exit_codes if c == -signal.SIGKILL),
        # Kills that left results stored but not yet published (delivered after a restart).
        "kills_with_unsent_results": sum(1 for a in after_kill if a["unsent"]),
        "max_unsent_at_a_kill": max((a["unsent"] for a in after_kill), default=0),
        "integrity_failures": [a["kill"] for a in after_kill if not a["integrity_ok"]],
        "duplicate_ids_in_outbox": sorted(
            {d for a in after_kill for d in a["duplicate_ids"]} | set(dup_end)
        ),
        "integrity_ok_at_end": ok_end,
        "results_stored": rows_end,
        "results_ok": statuses.count("OK"),
        "results_nok": statuses.count("NOK"),
        "nok_reasons": reasons,
        "results_unsent_at_end": sum(1 for _, sent in stored.values() if not sent),
        "outbox_drained": drained,
        "final_exit_code": final_exit,
        "mes_messages": len(messages),
        "mes_unique": len(by_id),
        "mes_repeats": sum(repeats.values()),
        "mes_repeated_ids": len(repeats),
        "mes_repeats_with_changed_bytes": changed,
        "mes_bytes_differ_from_stored": not_as_stored,
        "mes_invalid_against_schema": invalid,
        "mes_missing": sorted(set(stored) - set(by_id)),
        "mes_not_stored": sorted(set(by_id) - set(stored)),
        "after_each_kill": after_kill,
    }


def violations(report: dict[str, Any]) -> list[str]:
    """Every broken guarantee in a report, one line each (empty when the run is sound)."""
    out = []
    if not report["results_stored"]:
        out.append("no result was judged: the run tested nothing")
    if report["killed_by_sigkill"] != report["kills"]:
        out.append(
            f"only {report['killed_by_sigkill']} of {report['kills']} lives ended by SIGKILL"
        )
    if report["integrity_failures"] or not report["integrity_ok_at_end"]:
        out.append(f"integrity_check failed after kills {report['integrity_failures']}")
    if report["duplicate_ids_in_outbox"]:
        out.append(f"ids stored twice: {report['duplicate_ids_in_outbox'][:5]}")
    if not report["outbox_drained"] or report["results_unsent_at_end"]:
        out.append(f"{report['results_unsent_at_end']} results never published")
    if report["final_exit_code"] != 0:
        out.append(f"clean stop exited {report['final_exit_code']}")
    if report["mes_missing"]:
        out.append(f"{len(report['mes_missing'])} stored results never reached the MES")
    if report["mes_not_stored"]:
        out.append(f"{len(report['mes_not_stored'])} results at the MES are not stored")
    if report["mes_repeats_with_changed_bytes"] or report["mes_bytes_differ_from_stored"]:
        out.append("a result reached the MES with other bytes than stored")
    if report["mes_invalid_against_schema"]:
        out.append(f"{report['mes_invalid_against_schema']} results failed the JSON Schema")
    return out


def main() -> int:
    """``deploy/killloop.py``: run, write ``OUT/report.json``, exit 1 on any violation."""
    parser = argparse.ArgumentParser(description=(__doc__ or "").split("\n\n")[0])
    d = KillLoopOptions()
    parser.add_argument("--kills", type=int, default=d.kills)
    parser.add_argument("--seed", type=int, default=d.seed)
    parser.add_argument("--min-s", type=float, default=d.min_s)
    parser.add_argument("--max-s", type=float, default=d.max_s)
    parser.add_argument("--outage-share", type=float, default=d.outage_share)
    parser.add_argument("--out", type=Path, default=Path("killloop-out"))
    args = parser.parse_args()
    if not 1 <= args.kills <= 1000:
        parser.error("--kills: 1..1000")
    if not 0.1 <= args.min_s < args.max_s <= 120.0:
        parser.error("--min-s/--max-s: 0.1 <= min < max <= 120")
    if not 0.0 <= args.outage_share <= 1.0:
        parser.error("--outage-share: 0..1")
    if (args.out / "journal").exists():
        parser.error(f"{args.out} holds an earlier run: give an empty --out folder")
    args.out.mkdir(parents=True, exist_ok=True)
    logging.basicConfig(
        filename=args.out / "killloop.log",
        level=logging.INFO,
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
    )
    options = KillLoopOptions(
        kills=args.kills,
        seed=args.seed,
        out=args.out,
        min_s=args.min_s,
        max_s=args.max_s,
        outage_share=args.outage_share,
    )
    report = asyncio.run(kill_loop(options))
    report["violations"] = violations(report)
    text = json.dumps(report, indent=2)
    (args.out / "report.json").write_text(text + "\n", encoding="utf-8")
    summary = {k: v for k, v in report.items() if k != "after_each_kill"}
    print(json.dumps(summary, indent=2))
    return 1 if report["violations"] else 0


if __name__ == "__main__":
    os.environ.setdefault("PYTHONUNBUFFERED", "1")
    raise SystemExit(main())
