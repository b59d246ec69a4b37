"""`clampd plan` end to end: the real CLI entry point, its JSON, its table and its files."""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from clampd.daemon.cli import main
from clampd.daemon.planner import CAUTIONS

BASE = ["plan", "--thread", "M10", "--class", "8.8", "--grip-mm", "30"]
MU = ["--mu-thread", "0.12", "--mu-head", "0.12"]
REQUIRED_JSON = {
    "planner_version", "inputs", "d2_mm", "d3_mm", "stress_area_mm2", "proof_load_n",
    "preload_n", "torque_nm", "bolt_resilience_mm_per_n", "clamped_resilience_mm_per_n",
    "snug_torque_nm", "angle_from_snug_deg", "angle_to_yield_deg", "warnings", "cautions",
}  # fmt: skip


def _json(capsys: pytest.CaptureFixture[str], *extra: str) -> dict[str, object]:
    assert main([*BASE, *MU, "--json", *extra]) == 0
    data = json.loads(capsys.readouterr().out)
    assert isinstance(data, dict)
    return data


def test_json_has_the_contract_fields_and_cautions(capsys: pytest.CaptureFixture[str]) -> None:
    data = _json(capsys, "--wrench-max", "100 N*m")
    assert set(data) >= REQUIRED_JSON
    # VDI 2230 Part 1 Table A1: M10 8.8, μ 0.12 -> 29.6 kN, 48 N·m (from memory).
    assert data["preload_n"] == pytest.approx(29_600, abs=100)
    assert data["torque_nm"] == pytest.approx(48, abs=0.8)
    # ISO 898-1: As 58.0 mm², proof load 33 700 N.
    assert data["stress_area_mm2"] == pytest.approx(58.0, rel=0.004)
    assert data["proof_load_n"] == pytest.approx(33_700, rel=0.01)
    assert data["cautions"] == list(CAUTIONS)
    inputs = data["inputs"]
    assert isinstance(inputs, dict)
    assert inputs["thread"] == "M10"
    assert inputs["wrench_max_nm"] == pytest.approx(100.0)
    tool = data["tool_fit"]
    assert isinstance(tool, dict)
    assert tool["ok"] is True


def test_wrench_in_ft_lbf_is_converted(capsys: pytest.CaptureFixture[str]) -> None:
    # 20 ft·lbf = 27.12 N·m: a 48 N·m target exceeds it, and the warning says so.
    data = _json(capsys, "--wrench-max", "20 ft*lbf")
    inputs = data["inputs"]
    assert isinstance(inputs, dict)
    assert inputs["wrench_max_nm"] == pytest.approx(27.116, abs=0.001)
    warnings = data["warnings"]
    assert isinstance(warnings, list)
    assert any("exceeds the wrench maximum" in w for w in warnings)


def test_human_table_shows_units_and_cautions(capsys: pytest.CaptureFixture[str]) -> None:
    assert main([*BASE, *MU]) == 0
    out = capsys.readouterr().out
    for text in ("kN", "N·m", "ft·lbf", "mm/N", "°", "tightening torque MA", "snug torque"):
        assert text in out
    for caution in CAUTIONS:
        assert f"CAUTION: {caution}" in out


def test_program_out_is_written_and_matches_json(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "m10.toml"
    data = _json(capsys, "--program-out", str(path))
    prog = tomllib.loads(path.read_text(encoding="utf-8"))["program"]
    planned = data["program"]
    assert isinstance(planned, dict)
    assert prog["id"] == planned["id"]
    assert prog["strategy"] == "torque-angle"
    assert prog["target_angle"] == f"{planned['target_angle_deg']:.2f} deg"
    assert data["program_out"] == str(path)
    text = path.read_text(encoding="utf-8")
    assert all(c in text for c in CAUTIONS)


def test_yield_method_proposes_a_yield_program(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "y.toml"
    _json(capsys, "--method", "yield", "--program-out", str(path))
    prog = tomllib.loads(path.read_text(encoding="utf-8"))["program"]
    assert prog["strategy"] == "yield"
    assert prog["yield_fraction"] == 0.5


def test_torque_method_writes_a_torque_program(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "t.toml"
    data = _json(capsys, "--method", "torque", "--program-out", str(path), "--wrench-max", "50 N*m")
    text = path.read_text(encoding="utf-8")
    prog = tomllib.loads(text)["program"]
    planned = data["program"]
    assert isinstance(planned, dict)
    assert prog["strategy"] == "torque"
    # VDI 2230 Part 1 Table A1: M10 8.8, μ 0.12 -> MA 48 N·m (from memory).
    assert planned["target_torque_nm"] == pytest.approx(48, abs=0.8)
    assert prog["target_torque"] == f"{planned['target_torque_nm']:.2f} N*m"
    assert "target_angle" not in prog
    assert all(c in text for c in CAUTIONS)
    assert planned["notes"]
    # 48 N·m on a 50 N·m wrench is 97 % of its capacity: a warning in the file and the JSON.
    warnings = data["warnings"]
    assert isinstance(warnings, list)
    assert any("keep it at or below 80%" in w for w in warnings)
    assert "# WARNING: target is 97% of the wrench maximum" in text


def test_torque_table_names_the_target_torque(capsys: pytest.CaptureFixture[str]) -> None:
    assert main([*BASE, *MU, "--method", "torque"]) == 0
    out = capsys.readouterr().out
    assert "torque: snug, target torque 48.46 N·m" in out
    assert "NOTE: target torque 48.46 N·m is MA" in out


@pytest.mark.parametrize(
    ("args", "needle"),
    [
        (["plan", "--thread", "M11", "--class", "8.8", "--grip-mm", "30", *MU], "thread"),
        (["plan", "--thread", "M10", "--class", "8.8", "--grip-mm", "-30", *MU], "grip_mm"),
        ([*BASE, *MU, "--shank-mm", "40"], "shorter than the plain shank"),
        ([*BASE, *MU, "--hole-mm", "9"], "hole_mm"),
        ([*BASE, *MU, "--wrench-max", "100 furlong"], "torque"),
        ([*BASE, *MU, "--wrench-max", "30 deg"], "torque"),
        ([*BASE, "--mu-thread", "0.12", "--mu-head", "12"], "mu_head"),
        # A bare number could be N·m or ft·lbf: refused, with the format expected.
        ([*BASE, *MU, "--wrench-max", "100"], 'has no unit: give it as e.g. "100 N*m" or'),
        ([*BASE, *MU, "--wrench-max", "30 deg"], '"75 ft*lbf"'),
        # An angle step under 1° (a tiny grip, low utilisation): the error names the way out.
        (
            [
                *["plan", "--thread", "M24", "--class", "8.8", "--grip-mm", "1"],
                *["--mu-thread", "0.3", "--mu-head", "0.3", "--utilisation", "0.2"],
                *["--mu-thread-max", "0.5", "--mu-head-max", "0.5"],
            ],
            "use torque control (--method torque)",
        ),
    ],
)
def test_bad_input_exits_2_with_one_line(
    args: list[str], needle: str, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(args) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len([line for line in err if "clampd plan: error" in line]) == 1
    assert needle in err[-1]


def test_unwritable_program_out(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    target = tmp_path / "missing-dir" / "p.toml"
    assert main([*BASE, *MU, "--program-out", str(target)]) == 2
    assert "cannot write" in capsys.readouterr().err
    assert not target.exists()


def test_argparse_rejects_non_numbers(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit) as exc:
        main([*BASE, "--mu-thread", "abc", "--mu-head", "0.12"])
    assert exc.value.code == 2
    assert "not a number" in capsys.readouterr().err


def test_installed_command_runs() -> None:
    # The console script a technician types, in a real subprocess.
    proc = subprocess.run(
        [sys.executable, "-m", "clampd.daemon.cli", *BASE, *MU, "--json"],
        capture_output=True,
        text=True,
        check=False,
        timeout=60,
    )
    assert proc.returncode == 0, proc.stderr
    assert json.loads(proc.stdout)["thread"] == "M10"
