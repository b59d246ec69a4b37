"""Drive the station view with real engine events: a simulator trace replayed through a real
Engine, frame by frame, into a ``ViewHub`` (the same calls the runtime makes), and the real
result mapping for the stored result.

Scenario (invented for tests and the demo only): Tarnwick carriage works, bogie line, station
bg-12 tightening a bracket's four M10 screws; the wrench is "bg-12-w1".
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import datetime as dt
import time

import numpy as np

from clampd.daemon import engine
from clampd.daemon.runtime._results import ClockAnchor, ResultContext, build_result
from clampd.daemon.view import ViewHub, station_view
from clampd.protocol import Calibration, CalibrationState, RundownResult, new_uuid7
from clampd.simulators import (
    JointModel,
    JointPopulation,
    OperatorParams,
    SensorParams,
    Trace,
    simulate_rundown,
)

STATION = "bg-12"
WRENCH = "bg-12-w1"
PART = "BB-2207"
POSITIONS = ("S1", "S2", "S3", "S4")
# 22 samples per notification at 1 kHz: what a v1 frame carries at the default MTU
# (protocol/PROFILE.md), so the view sees frames at the rate the runtime feeds them.
FRAME = 22

PROGRAM = engine.program_from_mapping(
    {
        "id": "bracket-m10",
        "strategy": "torque",
        "snug_torque": "8 N*m",
        "target_torque": "38 N*m",
        "torque_window": ["36 N*m", "46 N*m"],
        "angle_window": ["5 deg", "90 deg"],
        "max_torque": "60 N*m",
    }
)


def trace(seed: int, *, stop_at_nm: float = 34.0) -> Trace:
    """One simulated rundown; the technician stops by feel at ``stop_at_nm`` (cues ignored).

    Measured with seeds 1–3: 34 N·m ends OK at 41–44 N·m (the reaction time overshoots),
    40 N·m ends NOK ``torque_high`` at 47–50 N·m.
    """
    rng = np.random.default_rng(seed)
    joint = JointModel.sample(rng, JointPopulation(contact_angle_deg=(15.0, 25.0)))
    return simulate_rundown(
        joint,
        SensorParams(),
        OperatorParams(
            steady_rate_dps=25.0, start_delay_s=0.2, ignore_cues=True, stop_at_torque_nm=stop_at_nm
        ),
        rng,
        tail_s=0.4,
    )


def show_station(hub: ViewHub, states: dict[str, str]) -> None:
    """The part and its joints as the station state would report them."""
    hub.on_station(
        station_view(
            STATION,
            name="Bogie line, bracket station 12",
            jobs=[(WRENCH, PROGRAM, PART, states, False)],
        )
    )


@dataclasses.dataclass(slots=True)
class Played:
    """What one replay produced: the engine's result and the mapped payload."""

    result: engine.RundownResult
    payload: RundownResult
    event_walls: list[float]  # wall time at each engine event handed to the hub


async def play(
    hub: ViewHub,
    tr: Trace,
    *,
    position: str,
    realtime: bool = True,
    speed: float = 1.0,
    wrench_id: str = WRENCH,
) -> Played:
    """Replay ``tr`` through a real Engine into ``hub``, pacing frames on the sensor clock."""
    eng = engine.Engine(PROGRAM, engine.EngineSettings(deflection_deg_per_nm=0.0))
    finished: engine.RundownResult | None = None
    walls: list[float] = []
    t0 = time.monotonic()
    n = len(tr)
    for k in range(0, n, FRAME):
        t = tr.t_s[k : k + FRAME]
        torque = tr.torque_nm[k : k + FRAME]
        rate = tr.axis_rate_dps[k : k + FRAME]
        if realtime:
            due = t0 + float(t[-1]) / speed
            await asyncio.sleep(max(0.0, due - time.monotonic()))
        host = time.monotonic()
        events = eng.feed(t, torque, rate)
        later: list[engine.Event] = []
        for ev in events:
            if isinstance(ev, engine.RundownFinished):
                later.append(ev)
                continue
            walls.append(time.time())
            hub.on_engine_event(wrench_id, ev, host)
        hub.on_samples(wrench_id, t, torque, eng.angle_deg)
        for ev in later:
            walls.append(time.time())
            hub.on_engine_event(wrench_id, ev, host)
            assert isinstance(ev, engine.RundownFinished)
            finished = ev.result
    if finished is None:
        raise AssertionError("the trace produced no finished rundown")
    payload = build_result(
        finished,
        ResultContext(
            result_id=new_uuid7(),
            station_id=STATION,
            wrench_id=wrench_id,
            serial="SIM-BG12-1",
            calibration=Calibration(state=CalibrationState.OK, due_date=dt.date(2027, 8, 31)),
            program=PROGRAM,
            part_id=PART,
            joint_position=position,
            clock=ClockAnchor(
                sensor_t_s=finished.end_t_s,
                host_t_s=time.monotonic(),
                wall_minus_monotonic_s=time.time() - time.monotonic(),
            ),
        ),
    )
    walls.append(time.time())
    hub.on_result(payload)
    return Played(result=finished, payload=payload, event_walls=walls)


# -- HTTP over a raw socket (the server's tests and the service's) --------------------------

Response = tuple[int, dict[str, str], bytes]


async def raw(port: int, data: bytes) -> Response:
    """Send ``data`` as is, read to EOF (the server closes: one request per connection)."""
    reader, writer = await asyncio.open_connection("127.0.0.1", port)
    writer.write(data)
    await writer.drain()
    blob = await asyncio.wait_for(reader.read(), 10)
    writer.close()
    with contextlib.suppress(ConnectionError):
        await writer.wait_closed()
    head, _, body = blob.partition(b"\r\n\r\n")
    lines = head.decode("latin-1").split("\r\n")
    status = int(lines[0].split(" ")[1])
    headers = {}
    for line in lines[1:]:
        k, _, v = line.partition(":")
        headers[k.strip().lower()] = v.strip()
    return status, headers, body


async def get(port: int, path: str, method: str = "GET", host: str | None = None) -> Response:
    host = host if host is not None else f"127.0.0.1:{port}"
    return await raw(port, f"{method} {path} HTTP/1.1\r\nHost: {host}\r\n\r\n".encode())
