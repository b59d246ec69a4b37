"""``clampd demo``, its scenario and its live view.

Sources beside the checks:
- ECMA-48 (5th ed.) control functions: CPL ``ESC [ n F`` (cursor to the start of the n-th
  preceding line) and EL ``ESC [ 2 K`` (erase the whole line);
- ISO 6789 covers 20-100 % of a hand torque tool's maximum; common practice keeps targets at
  or below about 80 % of capacity (from memory; DESIGN.md, tool choice);
- protocol/MQTT.md and the JSON Schema ``clampd schema`` prints (results in the journal are
  the published payloads); JSON Schema Draft 2020-12 applied by ``jsonschema``.
The demo scenario is invented data for testing software only.
"""

from __future__ import annotations

import io
import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
from jsonschema import Draft202012Validator

from clampd.daemon.cli import main
from clampd.daemon.engine import program_from_mapping
from clampd.daemon.runtime import Outbox, parse_config
from clampd.daemon.runtime._demo import load_scenario
from clampd.daemon.runtime._terminal import ResultRow, TerminalView
from clampd.protocol._schema import json_schemas
from clampd.simulators._broker import LocalBroker, mosquitto_path

CLAMPD = [sys.executable, "-m", "clampd.daemon.cli"]


def row(status: str = "OK", reasons: tuple[str, ...] = ()) -> ResultRow:
    return ResultRow(
        at="07:41:05",
        wrench_id="wr-07",
        part="DK48-2026-000731",
        position="spindle-bolt-2",
        status=status,
        reasons=reasons,
        final_torque_nm=47.52,
        final_angle_deg=30.0,
        valid=True,
        latency_s=0.012,
    )


# -- the live view ---------------------------------------------------------------------------


def test_view_renders_wrenches_and_results_without_a_terminal() -> None:
    out = io.StringIO()
    view = TerminalView(out, tty=False)
    view.add_wrench("wr-07", 100.0)
    view.wrench("wr-07", connected=True, program="spindle-m10-8.8", part="DK48-1")
    view.wrench("wr-07", position="spindle-bolt-1", torque_nm=50.0)
    view.result(row("NOK", ("torque_high",)))
    view.refresh(force=True)  # no cursor games on a pipe
    printed = out.getvalue().splitlines()
    # One line per event: the link came up, then the result; never the live torque.
    assert printed[0] == "wr-07 connected"
    assert "spindle-bolt-2" in printed[1]
    assert "NOK" in printed[1]
    assert "(torque_high)" in printed[1]
    assert "\x1b" not in out.getvalue()
    lines = view.render()
    wrench_line = next(line for line in lines if line.strip().startswith("wr-07"))
    # 50 N*m of 100 N*m capacity fills half of the 24-character bar.
    assert "[" + "#" * 12 + "." * 12 + "]" in wrench_line
    assert "50.0 N·m" in wrench_line


def test_view_redraws_in_place_on_a_terminal() -> None:
    out = io.StringIO()
    view = TerminalView(out, tty=True, colour=False)
    view.add_wrench("wr-07", 100.0)
    view.refresh(force=True)
    first = out.getvalue()
    height = len(view.render())
    assert first.count("\n") == height
    assert first.startswith("\x1b[2K")  # nothing drawn before: no cursor movement yet
    view.result(row())
    view.refresh(force=True)
    second = out.getvalue()[len(first) :]
    # ECMA-48 CPL back over the previous block, then EL before each new line.
    assert second.startswith(f"\x1b[{height}F")
    new_height = len(view.render())
    assert second.count("\x1b[2K") == new_height
    assert new_height == height  # "(none yet)" was replaced by the result row


# -- the scenario ----------------------------------------------------------------------------


def test_scenario_is_consistent_and_its_tools_fit_their_programs(tmp_path: Path) -> None:
    scenario = load_scenario()
    loaded = parse_config(scenario.station_toml, base_dir=tmp_path, check_files=False)
    config = loaded.config
    wrenches = {w.id: w for w in config.wrench}
    programs = {p["id"]: program_from_mapping(p) for p in config.program}
    assert len(scenario.groups) == 2
    assert {programs[g.program_id].strategy.value for g in scenario.groups} == {
        "torque",
        "torque-angle",
    }
    for group in scenario.groups:
        assert len(group.positions) >= 3
        program = programs[group.program_id]
        capacity = wrenches[group.wrench_id].torque_max_nm
        # The highest torque the program accepts sits inside the tool's calibrated range
        # (ISO 6789: 20-100 %) and at or below ~80 % of capacity (common practice).
        assert program.torque_window_nm is not None
        top = program.torque_window_nm[1]
        assert 0.2 * capacity <= top <= 0.8 * capacity, (group.wrench_id, top, capacity)
    # The planned incident names a real position, so the demo really shows one NOK.
    (incident,) = scenario.incidents
    assert any(incident.position in g.positions for g in scenario.groups)
    assert scenario.part_id(1) == "DK48-2026-000731"
    assert scenario.part_id(3) == "DK48-2026-000733"


# -- the command -----------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["--parts", "0"], "--parts must be at least 1"),
        (["--broker", "http://example.invalid"], "--broker must look like mqtt://"),
    ],
)
def test_bad_input_is_refused_before_anything_starts(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], argv: list[str], message: str
) -> None:
    assert main(["demo", "--out", str(tmp_path / "out"), *argv]) == 2
    err = capsys.readouterr().err
    assert message in err
    assert err.count("\n") == 1
    assert not (tmp_path / "out").exists()


def check_demo_output(stdout: str, *, expect_broker: str) -> Path:
    """The closing report names the journal; the journal holds every result, all sent, each
    one valid against the published schema."""
    match = re.search(r"^journal: (\S+)", stdout, re.MULTILINE)
    assert match, stdout
    journal = Path(match.group(1))
    assert f"broker: {expect_broker}" in stdout
    assert "outbox unsent at exit: 0" in stdout
    assert "joint designer's specification" in stdout  # the caution is part of the output
    validator = Draft202012Validator(json_schemas()["RundownResult"])
    with Outbox(journal) as ob:
        entries = ob.list(limit=1000, newest_first=False)
    # One deck: four spindle bolts and three guard screws, at least one result each.
    positions = {(e.part_id, json.loads(e.payload)["joint_position"]) for e in entries}
    assert len(positions) == 7
    assert all(e.sent for e in entries)
    for e in entries:
        assert not list(validator.iter_errors(json.loads(e.payload)))
    mes_file = journal.parent.parent / "mes-results.jsonl"
    received = [json.loads(line) for line in mes_file.read_text().splitlines()]
    assert {r["result"]["id"] for r in received} == {e.id for e in entries}
    assert all(r["valid"] for r in received)
    return journal


@pytest.mark.slow
def test_demo_one_part_end_to_end_on_the_embedded_broker(tmp_path: Path) -> None:
    proc = subprocess.run(
        [*CLAMPD, "demo", "--parts", "1", "--out", str(tmp_path), "--plain"],
        capture_output=True,
        text=True,
        timeout=240,
        env={**os.environ, "PYTHONUNBUFFERED": "1"},
        check=False,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    kind = "mosquitto" if mosquitto_path() else "amqtt"
    journal = check_demo_output(proc.stdout, expect_broker=kind)
    assert journal.is_relative_to(tmp_path)
    # The results CLI reads the same journal (the demo says so in its report).
    listed = subprocess.run(
        [*CLAMPD, "results", "--db", str(journal), "list", "--json"],
        capture_output=True,
        text=True,
        timeout=60,
        check=True,
    )
    assert len(json.loads(listed.stdout)) >= 7


@pytest.mark.slow
async def test_demo_through_an_external_broker(tmp_path: Path, broker: LocalBroker) -> None:
    import asyncio

    proc = await asyncio.create_subprocess_exec(
        *CLAMPD,
        "demo",
        "--parts",
        "1",
        "--out",
        str(tmp_path),
        "--plain",
        "--broker",
        broker.url,
        stdout=asyncio.subprocess.PIPE,
        stderr=asyncio.subprocess.PIPE,
    )
    async with asyncio.timeout(240):
        stdout, stderr = await proc.communicate()
    assert proc.returncode == 0, stderr.decode()[-2000:]
    journal = check_demo_output(stdout.decode(), expect_broker=f"external, {broker.url}")
    # No local broker was started: its folder does not exist.
    assert not journal.parent.parent.joinpath("broker").exists()
