"""The station runtime as a technician and an MES meet it: what a walk through ``clampd run``
and ``clampd check-config`` showed, checked against the real parts.

Nothing is faked but the radio: the real mosquitto (fixture ``broker``), the virtual GATT wrench
on bumble's in-process link with unmodified bleak on top, the real daemon (``Station``), a real
SQLite outbox. Where a sensor speaks a declarative profile, the test serves that profile from a
real bumble GATT server of its own (the simulator's wrench serves profile v1 only).

Sources beside the checks:
- protocol/MQTT.md (our published contract): the retained ``wrench/<id>/status`` carries
  ``locked``; a station-wide lock (``wrench_id`` null) locks every wrench; reason codes;
- protocol/PROFILE.md (our sensor profile): frame flag bits ``OVERLOAD`` and
  ``GYRO_SATURATED``, the info record's rated torque;
- protocol/profiles/bench-stick.toml (our example declarative profile): its UUIDs and layout;
- the D-Bus specification, "Well-known Message Bus Instances": the system bus address is
  read from ``DBUS_SYSTEM_BUS_ADDRESS`` (from memory), which is where BlueZ is reached.
The station, programs and joints are demo data of an invented scenario, for testing software
only; real joints follow the joint designer's specification, local codes and licensed practice.
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import random
import sys
import tomllib
import types
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from clampd.daemon.runtime import BleakWrenchLink, NullCuePlayer, parse_config
from clampd.daemon.runtime._demo import Technician
from clampd.daemon.runtime._supervisor import Station
from clampd.simulators import (
    Bench,
    FrameFlags,
    JointModel,
    JointPopulation,
    OperatorParams,
    SensorParams,
    VirtualWrenchSensor,
)
from clampd.simulators._broker import LocalBroker
from clampd.simulators._mes import MesStandIn
from clampd.simulators._station_rig import eventually, wait_for_status
from clampd.simulators.ble import VirtualAir, WrenchIdentity

# Demo scenario: Harrow Vale Cycles (invented), frame shop, station fs-40: a wheel-hub
# bench with one wireless wrench in reach and a second one out at calibration.
STATION_ID = "fs-40"
PRESENT = "w-040-a"
AWAY = "w-040-b"
AWAY_ADDRESS = "C0:DE:00:00:40:0B"


def station_toml(
    prefix: str, broker_url: str, outbox: Path, wrenches: str, cues: str = "none"
) -> str:
    return f"""
[station]
id = "{STATION_ID}"
name = "Frame shop, hub bench 40 (demo)"
topic_prefix = "{prefix}"

[broker]
url = "{broker_url}"

{wrenches}

[[program]]
id = "hub-m8"
strategy = "torque"
snug_torque = "6 N*m"
target_torque = "22 N*m"
torque_window = ["19 N*m", "25 N*m"]
angle_window = ["2 deg", "120 deg"]

[cues]
output = "{cues}"

[outbox]
path = "{outbox}"

[view]
enabled = false
"""


def wrench_table(wrench_id: str, address: str, **extra: str) -> str:
    lines = [
        "[[wrench]]",
        f'id = "{wrench_id}"',
        f'address = "{address}"',
        'torque_max = "100 N*m"',
        "calibration_due = 2099-01-31",
        *(f"{k} = {v}" for k, v in extra.items()),
    ]
    return "\n".join(lines) + "\n"


@contextlib.asynccontextmanager
async def running_station(
    broker: LocalBroker, prefix: str, text: str, bleak_kwargs: dict[str, Any]
) -> AsyncIterator[tuple[Station, MesStandIn]]:
    """``Station(config).run(stop)`` (what ``clampd run`` starts) and the MES stand-in."""
    config = parse_config(text, env={}).config
    station = Station(
        config, bleak_kwargs=lambda _w: dict(bleak_kwargs), cue_player=NullCuePlayer()
    )
    stop = asyncio.Event()
    task = asyncio.create_task(station.run(stop), name="clampd.test.station")
    try:
        async with MesStandIn(broker.host, broker.port, prefix) as mes:
            await wait_for_status(mes, "status", lambda s: s.get("state") == "online", 30)
            yield station, mes
    finally:
        stop.set()
        async with asyncio.timeout(30):
            await task


def idle_sensor(seed: int, **params: Any) -> VirtualWrenchSensor:
    """A wrench lying on the bench: streaming, nobody pulling on it."""
    rng = np.random.default_rng(seed)
    bench = Bench([], OperatorParams(), rng)
    return VirtualWrenchSensor(SensorParams(serial="SIM-040-A", **params), rng, bench)


def status_topic(wrench_id: str) -> str:
    return f"wrench/{wrench_id}/status"


# -- 1. a lock shows in the wrench status -------------------------------------------------


async def test_lock_and_unlock_republish_the_retained_wrench_status(
    broker: LocalBroker, topic_prefix: str, tmp_path: Path
) -> None:
    async with VirtualAir() as air:
        wrench = await air.add_wrench(
            idle_sensor(40), name="W-040A", identity=WrenchIdentity(serial="SIM-040-A")
        )
        text = station_toml(
            topic_prefix,
            broker.url,
            tmp_path / "outbox.sqlite3",
            wrench_table(PRESENT, wrench.address) + wrench_table(AWAY, AWAY_ADDRESS),
        )
        async with running_station(broker, topic_prefix, text, air.bleak_kwargs()) as (_, mes):
            # One wrench connected and streaming, one out of reach (never connected).
            await wait_for_status(
                mes, status_topic(PRESENT), lambda s: s.get("connected") is True, 30
            )
            await wait_for_status(mes, status_topic(AWAY), lambda s: "locked" in s, 30)
            for w in (PRESENT, AWAY):
                assert mes.statuses[f"{topic_prefix}/{status_topic(w)}"]["locked"] is False

            # Per wrench: only that wrench's status says locked (MQTT.md, lock command).
            reply = await mes.lock(PRESENT, reason="torque audit")
            assert reply["status"] == "ok", reply
            await wait_for_status(mes, status_topic(PRESENT), lambda s: s["locked"] is True, 10)
            away = mes.statuses[f"{topic_prefix}/{status_topic(AWAY)}"]
            assert away["locked"] is False

            # Station-wide (wrench_id null): every wrench, connected or not.
            reply = await mes.lock(None, reason="shift change")
            assert reply["status"] == "ok", reply
            await wait_for_status(mes, status_topic(AWAY), lambda s: s["locked"] is True, 10)

            # Unlock of all lifts every lock (MQTT.md, unlock command).
            reply = await mes.unlock(None)
            assert reply["status"] == "ok", reply
            for w in (PRESENT, AWAY):
                await wait_for_status(mes, status_topic(w), lambda s: s["locked"] is False, 10)


# -- 2. the sensor profile is checked at load time and served under clampd run -------------

PROFILES = Path(__file__).resolve().parents[1] / "protocol" / "profiles"


def write_station(tmp_path: Path, cues: str = "none", **wrench: str) -> Path:
    path = tmp_path / "station.toml"
    path.write_text(
        station_toml(
            "harrow-vale/frame-shop/fs-40",
            "mqtt://127.0.0.1:1883",
            tmp_path / "outbox.sqlite3",
            wrench_table(PRESENT, "C0:DE:00:00:40:0A", **wrench),
            cues=cues,
        ),
        encoding="utf-8",
    )
    return path


@pytest.mark.parametrize(
    ("profile", "expected"),
    [
        ('"nope"', "no built-in profile of that name; known: ['bench-stick']"),
        ('"sensors/missing.toml"', "cannot read the file"),
        ('"sensors/broken.toml"', "not valid TOML"),
    ],
    ids=["unknown-name", "missing-file", "not-toml"],
)
def test_an_unusable_profile_is_refused_by_check_config_and_by_run_with_one_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], profile: str, expected: str
) -> None:
    from clampd.daemon.cli import main

    (tmp_path / "sensors").mkdir()
    (tmp_path / "sensors" / "broken.toml").write_text("name = [", encoding="utf-8")
    path = write_station(tmp_path, profile=profile)

    assert main(["check-config", "--ignore-env", str(path)]) == 2
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1, err
    assert err[0].startswith(f"error: {path}: wrench[0].profile: ")
    assert expected in err[0]

    assert main(["run", "--config", str(path)]) == 2
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1, err
    assert err[0].startswith("clampd run: ")
    assert "wrench[0].profile" in err[0]
    assert expected in err[0]
    assert not (tmp_path / "outbox.sqlite3").exists()  # nothing started, nothing written


def test_a_profile_file_is_found_next_to_the_station_file(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    from clampd.daemon.cli import main

    (tmp_path / "sensors").mkdir()
    (tmp_path / "sensors" / "stick.toml").write_text(
        (PROFILES / "bench-stick.toml").read_text(encoding="utf-8"), encoding="utf-8"
    )
    path = write_station(tmp_path, profile='"sensors/stick.toml"')
    monkeypatch.chdir(tmp_path / "sensors")  # not where the station file is
    assert main(["check-config", "--ignore-env", str(path)]) == 0
    assert ": OK" in capsys.readouterr().out
    loaded = parse_config(path.read_text(encoding="utf-8"), env={}, base_dir=tmp_path)
    assert loaded.config.wrench[0].profile == str(tmp_path / "sensors" / "stick.toml")
    # On a workstation without the board's files, the file is not required.
    (tmp_path / "sensors" / "stick.toml").unlink()
    assert main(["check-config", "--ignore-env", "--no-file-checks", str(path)]) == 0
    assert main(["check-config", "--ignore-env", str(path)]) == 2


# The bench-stick logger as a GATT server (protocol/profiles/bench-stick.toml): its own service
# and samples UUIDs, no info record, no control characteristic. 10 samples per notification
# (7 + 10 × 6 = 67 bytes, inside the 244-byte payload of the 247-byte MTU the central asks for).
STICK_ADDRESS = "C0:DE:00:00:40:5C"
STICK_SAMPLES_PER_FRAME = 10
STICK_PERIOD_US = 2000  # the profile's fixed 500 Hz
# The demo pull: 0.3 s still, a free run-down at 0.4 N*m turning 60 deg/s for 0.5 s, then the
# head seats and torque climbs 1.5 N*m per degree to a 24 N*m peak (the technician overshoots
# the 22 N*m target a little), is held 0.1 s and released. Invented values for the demo.
STICK_PEAK_NM = 24.0


def stick_pull() -> tuple[np.ndarray[Any, np.dtype[np.float64]], np.ndarray[Any, Any]]:
    """Torque (N*m) and rate (deg/s, x y z) of one pull, 2 ms apart, then rest."""
    dt_s = STICK_PERIOD_US / 1e6
    still = int(0.3 / dt_s)
    free = int(0.5 / dt_s)
    climb = int(STICK_PEAK_NM / 1.5 / 60.0 / dt_s)  # degrees to the peak / rate
    hold = int(0.1 / dt_s)
    rest = int(1.0 / dt_s)
    torque = np.concatenate(
        [
            np.zeros(still),
            np.full(free, 0.4),
            np.linspace(0.4, STICK_PEAK_NM, climb),
            np.full(hold, STICK_PEAK_NM),
            np.linspace(STICK_PEAK_NM, 0.0, 25),
            np.zeros(rest),
        ]
    )
    rate_z = np.concatenate(
        [np.zeros(still), np.full(free + climb, 60.0), np.zeros(hold + 25 + rest)]
    )
    rate = np.zeros((torque.shape[0], 3))
    rate[:, 2] = rate_z
    return torque, rate


@contextlib.asynccontextmanager
async def bench_stick(air: VirtualAir, pull: asyncio.Event) -> AsyncIterator[list[int]]:
    """Serve the bench stick on the virtual link until the block ends; it streams at rest
    and plays ``stick_pull`` once ``pull`` is set. Yields the list of notification sizes sent."""
    from bumble import gatt, hci
    from bumble.device import Device
    from bumble.host import Host
    from bumble.transport.common import AsyncPipeSink

    from clampd.simulators._encoder import DeclarativeEncoder
    from clampd.simulators.ble import VirtualController

    spec = (PROFILES / "bench-stick.toml").read_text(encoding="utf-8")
    encoder = DeclarativeEncoder(spec)
    profile = tomllib.loads(spec)
    assert air.link is not None
    ctrl = VirtualController("bench-stick", link=air.link)
    device = Device(
        name="bench-stick", address=hci.Address(STICK_ADDRESS), host=Host(ctrl, AsyncPipeSink(ctrl))
    )
    samples = gatt.Characteristic(
        profile["samples_uuid"],
        gatt.Characteristic.Properties.NOTIFY,
        gatt.Characteristic.READABLE,
        b"",
    )
    device.add_service(gatt.Service(profile["service_uuid"], [samples]))
    sent: list[int] = []

    async def stream() -> None:
        torque, rate = stick_pull()
        n = STICK_SAMPLES_PER_FRAME
        seq, clock_us, k = 0, 0, 0
        while True:
            if pull.is_set() and k + n <= torque.shape[0]:
                t, r = torque[k : k + n], rate[k : k + n]
                k += n
            else:
                t, r = np.zeros(n), np.zeros((n, 3))
            frame = encoder.encode(
                sequence=seq,
                timestamp_us=clock_us,
                period_us=STICK_PERIOD_US,
                torque_nm=t,
                rate_dps=r,
            )
            await device.notify_subscribers(samples, frame)
            sent.append(len(frame))
            seq, clock_us = seq + 1, clock_us + n * STICK_PERIOD_US
            await asyncio.sleep(n * STICK_PERIOD_US / 1e6)

    await device.power_on()
    await device.start_advertising(auto_restart=True)
    task = asyncio.create_task(stream(), name="test.bench-stick")
    try:
        yield sent
    finally:
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
        with contextlib.suppress(Exception):
            await device.power_off()


async def test_a_wrench_on_a_declarative_profile_is_served_under_the_daemon(
    broker: LocalBroker, topic_prefix: str, tmp_path: Path
) -> None:
    pull = asyncio.Event()
    async with VirtualAir() as air, bench_stick(air, pull) as sent:
        text = station_toml(
            topic_prefix,
            broker.url,
            tmp_path / "outbox.sqlite3",
            wrench_table(PRESENT, STICK_ADDRESS, profile='"bench-stick"'),
        )
        results: list[dict[str, Any]] = []
        async with running_station(broker, topic_prefix, text, air.bleak_kwargs()) as (
            station,
            mes,
        ):
            await wait_for_status(mes, status_topic(PRESENT), lambda s: s.get("connected") is True)
            reply = await mes.select_program("hub-m8", "HUB-0007", ["spoke-flange-1"])
            assert reply["status"] == "ok", reply
            pull.set()
            (result,) = await mes.wait_results(1, timeout_s=30)
            assert result.valid, result.errors
            assert result.payload is not None
            results.append(result.payload)
            stats = station.slots[PRESENT].worker.stats
            assert stats.frames_corrupt == 0
            assert stats.cue_writes_failed == 0  # no control characteristic: none attempted
        assert sent
        (payload,) = results
        assert payload["wrench"]["wrench_id"] == PRESENT
        assert payload["joint_position"] == "spoke-flange-1"
        # Torque travelled as i32 hundredths of an in*lbf (1 in*lbf = 0.112 984 829 N*m,
        # NIST SP 811 appendix B.8): the peak comes back within one count of the pull's.
        assert payload["peak_torque_nm"] == pytest.approx(STICK_PEAK_NM, abs=0.01 * 0.113)
        # From snug (6 N*m) to the peak the pull turns (24 - 6) / 1.5 = 12 degrees, read
        # from the stick's one gyro axis (z, hundredths of a rad/s; a 2 ms sample of slack).
        assert payload["final_angle_deg"] == pytest.approx(12.0, abs=0.5)
        # The pull climbs 1.5 N*m per degree; the joint rate fit finds it (a least-squares
        # slope of a straight line, within the ends' rounding).
        assert payload["joint_rate_nm_per_deg"] == pytest.approx(1.5, rel=0.02)
        # Inside both windows with no fault: OK (MQTT.md, OK exactly when reasons is empty).
        assert payload["status"] == "OK", payload["reasons"]


# -- 3. frame flags: overrange makes the rundown NOK, a low battery is said once ----------------

# Short free run-down before the head seats, so a rundown takes about a second of real time
# (the virtual wrench streams in real time); the simulator's default M10 8.8 joints yield
# near 60-70 N*m, well above the program's 22 N*m target.
QUICK_JOINTS = JointPopulation(contact_angle_deg=(15.0, 25.0))
WRENCH_LOG = "clampd.daemon.runtime._wrench"


async def test_overrange_flags_make_the_rundown_nok_and_a_low_battery_is_logged_once(
    broker: LocalBroker, topic_prefix: str, tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.WARNING, logger=WRENCH_LOG)
    rng = np.random.default_rng(44)
    tech = Technician(np.random.default_rng(45), deflection_deg_per_nm=0.02)
    # The battery starts below the sensor's low mark, so every frame carries LOW_BATTERY; the
    # tool states 60 N*m while the station file says 100 N*m.
    sensor = VirtualWrenchSensor(
        SensorParams(serial="SIM-040-A", torque_max_nm=60.0, battery_start_percent=10.0),
        np.random.default_rng(46),
        tech,
    )
    operator = OperatorParams(steady_rate_dps=30.0)
    async with VirtualAir() as air:
        wrench = await air.add_wrench(
            sensor, name="W-040A", identity=WrenchIdentity(serial="SIM-040-A")
        )
        text = station_toml(
            topic_prefix,
            broker.url,
            tmp_path / "outbox.sqlite3",
            wrench_table(PRESENT, wrench.address),
        )
        async with running_station(broker, topic_prefix, text, air.bleak_kwargs()) as (
            station,
            mes,
        ):
            worker = station.slots[PRESENT].worker
            await wait_for_status(mes, status_topic(PRESENT), lambda s: s.get("connected") is True)
            positions = ["spoke-flange-1", "spoke-flange-2", "spoke-flange-3"]
            reply = await mes.select_program("hub-m8", "HUB-0008", positions)
            assert reply["status"] == "ok", reply
            # One rundown per case, one position each.
            for n, flags in enumerate(
                (FrameFlags.OVERLOAD, FrameFlags.GYRO_SATURATED, FrameFlags.NONE), start=1
            ):
                tech.hand_over(JointModel.sample(rng, QUICK_JOINTS), operator)
                await eventually(lambda: worker.in_rundown, 30)
                if flags:
                    # Three frames in a row: logged once for the rundown all the same.
                    sensor.force_flags(flags, frames=3)
                await mes.wait_results(n, timeout_s=30)
                await eventually(lambda: not worker.in_rundown, 30)
            payloads = [r.payload for r in mes.unique_results()]
    assert all(p is not None for p in payloads)
    reasons = [set(p["reasons"]) if p else set() for p in payloads]
    # PROFILE.md: OVERLOAD is torque beyond the calibrated range, GYRO_SATURATED a gyro past
    # its range; the reasons are MQTT.md's torque_overrange and gyro_overrange.
    assert "torque_overrange" in reasons[0]
    assert "gyro_overrange" not in reasons[0]
    assert "gyro_overrange" in reasons[1]
    assert "torque_overrange" not in reasons[1]
    assert not reasons[2] & {"torque_overrange", "gyro_overrange"}
    assert [p["status"] for p in payloads[:2] if p] == ["NOK", "NOK"]

    lines = [r.getMessage() for r in caplog.records if r.name == WRENCH_LOG]
    flagged = [m for m in lines if "sensor flagged" in m]
    assert len(flagged) == 2, flagged
    assert "torque_overrange" in flagged[0]
    assert "gyro_overrange" in flagged[1]
    assert sum("low battery" in m for m in lines) == 1, lines  # one connection, one line
    rating = [m for m in lines if "rated torque" in m]
    assert len(rating) == 1, lines
    assert "60.0 N*m" in rating[0]
    assert "100.0 N*m" in rating[0]


# -- 4. no Bluetooth stack: said once, clearly, and retried quietly -------------------------


async def test_without_a_system_dbus_the_link_says_so_once_and_keeps_retrying(
    monkeypatch: pytest.MonkeyPatch, tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    """bleak's own BlueZ backend (no virtual link) on a host whose system bus is absent."""
    # The D-Bus specification's system bus address variable (from memory): a socket that is
    # not there is what a host without dbus and BlueZ gives.
    monkeypatch.setenv("DBUS_SYSTEM_BUS_ADDRESS", f"unix:path={tmp_path / 'no-bus-here'}")
    caplog.set_level(logging.DEBUG, logger="clampd.daemon.runtime._ble")
    link = BleakWrenchLink(
        "C0:DE:00:00:40:0A", wrench_id=PRESENT, allowed=["C0:DE:00:00:40:0A"], connect_timeout_s=1
    )

    async def serve(_link: BleakWrenchLink) -> None:
        raise AssertionError("connected without a Bluetooth stack")

    task = asyncio.create_task(link.connect_forever(serve, rng=random.Random(3)))
    try:
        await eventually(lambda: link.connect_failures >= 4, 30)
    finally:
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
    ours = [r for r in caplog.records if r.name.startswith("clampd.")]
    loud = [r for r in ours if r.levelno >= logging.INFO]
    assert len(loud) == 1, [r.getMessage() for r in loud]
    (said,) = loud
    assert said.levelno == logging.ERROR
    text = said.getMessage()
    assert text.startswith(f"{PRESENT} C0:DE:00:00:40:0A: ")
    for needed in ("D-Bus", "BlueZ", "bluez", "systemctl", "--ble-hci", "retrying"):
        assert needed in text, text
    # The retries go on, quietly (one line per attempt at debug level only).
    quiet = [r for r in ours if "reconnecting in" in r.getMessage()]
    assert len(quiet) >= 4
    assert all(r.levelno == logging.DEBUG for r in quiet)


# -- 5. the speaker: one clear line from the daemon, a warning from check-config ------------


async def test_without_sounddevice_the_daemon_says_so_once_with_one_prefix(
    broker: LocalBroker,
    topic_prefix: str,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    caplog: pytest.LogCaptureFixture,
) -> None:
    monkeypatch.setitem(sys.modules, "sounddevice", None)  # import now raises ImportError
    caplog.set_level(logging.WARNING, logger="clampd.daemon.runtime._supervisor")
    text = station_toml(topic_prefix, broker.url, tmp_path / "outbox.sqlite3", "", cues="device")
    config = parse_config(text, env={}).config
    station = Station(config)  # the configured player, as clampd run builds it
    stop = asyncio.Event()
    task = asyncio.create_task(station.run(stop))
    try:
        async with asyncio.timeout(30):
            await station.ready.wait()
    finally:
        stop.set()
        async with asyncio.timeout(30):
            await task
    lines = [r.getMessage() for r in caplog.records if "sounddevice" in r.getMessage()]
    expected = (
        "cues: the 'sounddevice' package is not installed (pip install 'clampd[audio]'); "
        "cues are not played"
    )
    assert lines == [expected]


@pytest.mark.parametrize("loads", [False, True], ids=["missing", "present"])
def test_check_config_warns_when_the_speaker_output_cannot_load(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
    loads: bool,
) -> None:
    from clampd.daemon.cli import main

    # Present: a stand-in module at the import seam (no sound stack on the test host);
    # missing: the import raises ImportError, as without the 'audio' extra.
    monkeypatch.setitem(
        sys.modules, "sounddevice", types.ModuleType("sounddevice") if loads else None
    )
    path = write_station(tmp_path, cues="device")
    assert main(["check-config", "--ignore-env", str(path)]) == 0
    out = capsys.readouterr()
    assert ": OK" in out.out
    warned = [line for line in out.err.splitlines() if "cues.output" in line]
    if loads:
        assert warned == []
    else:
        expected = (
            "warning: cues.output = 'device': the 'sounddevice' package is not installed "
            "(pip install 'clampd[audio]'); cues would not be played"
        )
        assert warned == [expected]
    # "none" never needs it.
    none = write_station(tmp_path)
    assert main(["check-config", "--ignore-env", str(none)]) == 0
    assert "cues.output" not in capsys.readouterr().err
