"""Load and soak run: N virtual wrenches at R Hz into the real station for M minutes.

    .venv/bin/python deploy/soak.py --wrenches 8 --rate 1000 --minutes 10 --out /tmp/clampd-soak

What runs (everything on 127.0.0.1, nothing leaves the machine):

- mosquitto (``LocalBroker``), the plant broker stand-in;
- N wrench processes (``clampd simulate wrench``), each a GATT server with a simulated
  technician tightening M10 8.8 joints and reacting to the tool's cues, sharing one virtual
  BLE link served over TCP (the first hosts it);
- the station itself — ``Station``, the code ``clampd run`` starts — in this process, so its
  per-wrench counters can be read at the end; its CPU time and resident memory are sampled
  every ``--sample-s`` seconds (this process also runs a light MES loop, counted with it);
- an MES loop that selects the program for each wrench (64 joint positions per part) and
  selects the next part when one is done, and collects every result id it receives.

At the end it stops the station the way SIGTERM does, stops the wrenches (each reports how
many notifications it sent), and prints one JSON report: results judged, stored, unsent,
received by the MES (unique, repeats), frames the wrenches sent and the station received,
frames lost or corrupt, the outbox's integrity check, CPU per 1 000 samples/s, and the
resident-memory trend (least-squares slope after the first minute).

The bench and its joints are simulated (invented data, for testing software only); real
joints follow the joint designer's specification, local codes and licensed practice.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import logging
import os
import re
import resource
import time
from pathlib import Path
from typing import Any

import aiomqtt

from clampd.daemon.runtime import NullCuePlayer, Outbox, parse_config
from clampd.daemon.runtime._supervisor import Station, resident_memory_kib
from clampd.protocol import Topics
from clampd.simulators._broker import LocalBroker
from clampd.simulators._station_rig import start_wrench_process, stop_processes
from clampd.simulators.ble import open_central

PREFIX = "brackenfield/soak-bench/line-9/st-900"
POSITIONS = [f"J{i}" for i in range(1, 65)]  # the most a selection may hold (MQTT.md)
_SENT = re.compile(r"stopping after (\d+) notifications")

PROGRAM = """
[[program]]
id = "soak-m10"
name = "Soak bench M10 8.8 (simulated joints)"
strategy = "torque-angle"
snug_torque = "10 N*m"
target_angle = "20 deg"
angle_window = ["17 deg", "24 deg"]
torque_window = ["35 N*m", "56 N*m"]
max_torque = "70 N*m"
timeout = "20 s"
reaction_time = "0.1 s"
"""


def _station_toml(broker_url: str, wrenches: list[tuple[str, str]], journal: Path) -> str:
    lines = [
        "[station]",
        'id = "st-900"',
        'name = "Soak bench (simulated)"',
        f'topic_prefix = "{PREFIX}"',
        "[broker]",
        f'url = "{broker_url}"',
        "[cues]",
        'output = "none"',
        "[outbox]",
        f'path = "{journal}"',
    ]
    for n, (_, address) in enumerate(wrenches, start=1):
        lines += [
            "[[wrench]]",
            f'id = "w-{n}"',
            f'address = "{address}"',
            'torque_max = "100 N*m"',
            "deflection_deg_per_nm = 0.02",
            "calibration_due = 2099-12-31",
        ]
    return "\n".join(lines) + "\n" + PROGRAM


class Mes:
    """Selects work for every wrench and collects result ids."""

    def __init__(self, broker: LocalBroker, wrench_ids: list[str]) -> None:
        self.broker = broker
        self.topics = Topics(PREFIX)
        self.wrench_ids = wrench_ids
        self.ids: list[str] = []
        self.per_wrench = dict.fromkeys(wrench_ids, 0)
        self.parts = dict.fromkeys(wrench_ids, 0)
        self.reasons: dict[str, int] = {}
        self.refused: list[str] = []
        self.ok = 0

    async def _select(self, client: aiomqtt.Client, wrench_id: str) -> None:
        self.parts[wrench_id] += 1
        body = {
            "schema_version": "1",
            "program_id": "soak-m10",
            "part_id": f"SOAK-{wrench_id}-{self.parts[wrench_id]:05d}",
            "joint_positions": POSITIONS,
            "wrench_id": wrench_id,
        }
        await client.publish(f"{PREFIX}/cmd/select_program", json.dumps(body).encode(), qos=1)

    async def run(self) -> None:
        async with aiomqtt.Client(self.broker.host, self.broker.port) as client:
            await client.subscribe(self.topics.result(), qos=1)
            await client.subscribe(self.topics.reply_default(), qos=1)
            await client.subscribe(self.topics.station_status(), qos=1)
            online = False
            async for msg in client.messages:
                payload = msg.payload if isinstance(msg.payload, bytes) else b"{}"
                topic = msg.topic.value
                if topic == self.topics.station_status():
                    # Commands sent before the station subscribed would be lost (its session
                    # is clean by design): select work once it says it is online.
                    if not online and json.loads(payload).get("state") == "online":
                        online = True
                        for w in self.wrench_ids:
                            await self._select(client, w)
                    continue
                if topic == self.topics.reply_default():
                    reply = json.loads(payload)
                    if reply.get("status") != "ok":
                        self.refused.append(reply.get("text", ""))
                    continue
                result = json.loads(payload)
                self.ids.append(result["id"])
                w = result["wrench"]["wrench_id"]
                if result["status"] == "OK":
                    self.ok += 1
                for r in result["reasons"]:
                    self.reasons[r] = self.reasons.get(r, 0) + 1
                self.per_wrench[w] = self.per_wrench.get(w, 0) + 1
                if self.per_wrench[w] % len(POSITIONS) == 0:
                    await self._select(client, w)


def _slope_per_min(points: list[tuple[float, float]]) -> float:
    """Least-squares slope of (seconds, value) points, in value per minute."""
    n = len(points)
    if n < 2:
        return 0.0
    mx = sum(t for t, _ in points) / n
    my = sum(v for _, v in points) / n
    sxx = sum((t - mx) ** 2 for t, _ in points)
    sxy = sum((t - mx) * (v - my) for t, v in points)
    return 60.0 * sxy / sxx if sxx else 0.0


def _cpu_s() -> float:
    ru = resource.getrusage(resource.RUSAGE_SELF)
    return ru.ru_utime + ru.ru_stime


async def soak(args: argparse.Namespace) -> dict[str, Any]:
    out: Path = args.out
    logs = out / "logs"
    journal = out / "outbox.sqlite3"
    async with LocalBroker(workdir=out / "broker", prefer="mosquitto") as broker:
        procs: list[asyncio.subprocess.Process] = []
        wrenches: list[tuple[str, str]] = []
        try:
            hci = "tcp-server:127.0.0.1:0"  # the first wrench hosts the link, the others join
            for n in range(1, args.wrenches + 1):
                wrench = await start_wrench_process(
                    "--hci",
                    hci,
                    "--name",
                    f"S-{n}",
                    "--rate",
                    str(args.rate),
                    "--seed",
                    str(n),
                    log=logs / f"wrench-{n}.log",
                    verbose=True,
                )
                if n == 1:
                    hci = wrench.hci
                procs.append(wrench.proc)
                wrenches.append((wrench.name, wrench.address))
            config = parse_config(_station_toml(broker.url, wrenches, journal), env={}).config
            stop = asyncio.Event()
            samples: list[tuple[float, float, float]] = []  # (t, cpu_s, rss_kib)
            async with open_central(hci) as central:
                kwargs = central.bleak_kwargs()
                station = Station(
                    config, bleak_kwargs=lambda _w: dict(kwargs), cue_player=NullCuePlayer()
                )
                mes = Mes(broker, [w.id for w in config.wrench])
                t0 = time.monotonic()
                cpu0 = _cpu_s()
                async with asyncio.TaskGroup() as tg:
                    runner = tg.create_task(station.run(stop), name="soak.station")
                    mes_task = tg.create_task(mes.run(), name="soak.mes")
                    end = t0 + args.minutes * 60.0
                    while time.monotonic() < end:
                        await asyncio.sleep(min(args.sample_s, max(0.0, end - time.monotonic())))
                        rss = resident_memory_kib() or 0
                        samples.append((time.monotonic() - t0, _cpu_s() - cpu0, float(rss)))
                    stop.set()
                    await runner
                    # Let the MES take what the station flushed at stop.
                    await asyncio.sleep(2.0)
                    mes_task.cancel()
                wall_s = time.monotonic() - t0
                cpu_s = _cpu_s() - cpu0
                workers = {w: s.worker.stats for w, s in station.slots.items()}
        finally:
            await stop_processes(procs, timeout_s=20.0)
    sent_notifications = 0
    for n in range(1, args.wrenches + 1):
        m = _SENT.findall((logs / f"wrench-{n}.log").read_text(errors="replace"))
        sent_notifications += int(m[-1]) if m else 0
    with Outbox(journal) as ob:
        stored = [e.id for e in ob.iter_all()]
        unsent = ob.count_unsent()
        integrity = ob.integrity_ok()
    steady = [(t, rss) for t, _, rss in samples if t >= 60.0] or [(t, r) for t, _, r in samples]
    rate_total = args.wrenches * args.rate
    received = sum(s.frames for s in workers.values())
    return {
        "wrenches": args.wrenches,
        "rate_hz": args.rate,
        "wall_s": round(wall_s, 1),
        "samples_per_s_offered": rate_total,
        "notifications_sent_by_wrenches": sent_notifications,
        "frames_received_by_station": received,
        "frames_lost": sum(s.frames_lost for s in workers.values()),
        "frames_corrupt": sum(s.frames_corrupt for s in workers.values()),
        "rundowns": sum(s.rundowns for s in workers.values()),
        "results_stored": len(stored),
        "results_unsent_at_end": unsent,
        "results_ok": mes.ok,
        "nok_reasons": mes.reasons,
        "commands_refused": mes.refused[:5],
        "mes_received_unique": len(set(mes.ids)),
        "mes_repeats": len(mes.ids) - len(set(mes.ids)),
        "mes_missing": len(set(stored) - set(mes.ids)),
        "outbox_integrity_ok": integrity,
        "cpu_s": round(cpu_s, 1),
        "cpu_percent_of_one_core": round(100.0 * cpu_s / wall_s, 1),
        "cpu_percent_per_1000_samples_per_s": round(
            100.0 * cpu_s / wall_s / (rate_total / 1000.0), 2
        ),
        "rss_kib_first": samples[0][2] if samples else None,
        "rss_kib_last": samples[-1][2] if samples else None,
        "rss_slope_kib_per_min_after_1_min": round(_slope_per_min(steady), 1),
        "cpu_rss_samples": [[round(t, 1), round(c, 2), r] for t, c, r in samples],
    }


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--wrenches", type=int, default=8)
    parser.add_argument("--rate", type=int, default=1000, help="Hz per wrench (250..4000)")
    parser.add_argument("--minutes", type=float, default=10.0)
    parser.add_argument("--sample-s", type=float, default=10.0)
    parser.add_argument("--out", type=Path, default=Path("soak-out"))
    args = parser.parse_args()
    if not 1 <= args.wrenches <= 16:
        parser.error("--wrenches: 1..16")
    if (args.out / "outbox.sqlite3").exists():
        parser.error(f"{args.out} holds an earlier run: give an empty --out folder")
    for folder in (args.out, args.out / "logs", args.out / "broker"):
        folder.mkdir(parents=True, exist_ok=True)
    logging.basicConfig(
        filename=args.out / "station.log",
        level=logging.INFO,
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
    )
    report = asyncio.run(soak(args))
    text = json.dumps(report, indent=2)
    (args.out / "report.json").write_text(text + "\n", encoding="utf-8")
    print(text)
    ok = (
        report["results_unsent_at_end"] == 0
        and report["mes_missing"] == 0
        and report["outbox_integrity_ok"]
    )
    return 0 if ok else 1


if __name__ == "__main__":
    os.environ.setdefault("PYTHONUNBUFFERED", "1")
    raise SystemExit(main())
