"""`clampd replay`: the engine over a recorded CSV, JSON and text output, bad files.

Expected rows are computed independently from the closed-form trace (numpy thresholds and
scipy.integrate.cumulative_trapezoid for the angle from snug).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import numpy.typing as npt
import pytest
from scipy.integrate import cumulative_trapezoid

from clampd.daemon.cli import main

F = npt.NDArray[np.float64]
ROOT = Path(__file__).resolve().parents[1]
PROGRAM = """[program]
id = "cover-plate-m8"
strategy = "torque-angle"
snug_torque = "10 N*m"
target_angle = "30.01 deg"
torque_window = ["40 N*m", "80 N*m"]
max_torque = "120 N*m"
"""


def _trace() -> tuple[F, F, F]:
    """0.3 s rest with a 0.6 deg/s gyro bias; 30 deg/s to 60° on a joint 3 N·m prevailing to
    20°, then 1.5 N·m/deg; release."""
    fs = 1000.0
    t = np.arange(0.0, 3.0, 1.0 / fs)
    turning = (t > 0.3) & (t <= 2.3)
    phi = np.clip((t - 0.3) * 30.0, 0.0, 60.0)
    rate = np.where(turning, 30.0, 0.0) + 0.6
    torque = np.where(t < 0.3, 0.0, 3.0 + 1.5 * np.maximum(phi - 20.0, 0.0))
    torque = np.where(t > 2.5, 0.0, torque)
    return t, torque, rate


def _write(path: Path, t: F, T: F, r: F) -> None:
    with path.open("w", encoding="utf-8") as fh:
        fh.write("t_s,torque_nm,rate_dps\n")
        for a, b, c in zip(t, T, r, strict=True):
            fh.write(f"{float(a)!r},{float(b)!r},{float(c)!r}\n")


@pytest.fixture
def files(tmp_path: Path) -> tuple[Path, Path]:
    prog = tmp_path / "program.toml"
    prog.write_text(PROGRAM, encoding="utf-8")
    samples = tmp_path / "samples.csv"
    _write(samples, *_trace())
    return prog, samples


def test_json_output_names_rows_and_values(
    files: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    prog, samples = files
    assert main(["replay", "--program", str(prog), str(samples), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    t, T, r = _trace()
    snug = int(np.flatnonzero(T >= 10.0)[0])
    ang = np.zeros_like(t)
    ang[snug:] = cumulative_trapezoid(r[snug:] - 0.6, t[snug:], initial=0.0)
    stop = int(np.flatnonzero(ang >= 30.01)[0])
    assert out["status"] == "OK"
    assert out["reasons"] == []
    assert out["strategy"] == "torque-angle"
    assert out["snug"] == {"index": snug, "t_s": t[snug], "torque_nm": T[snug]}
    assert out["stop"]["index"] == stop
    assert out["stop"]["trigger"] == "target_angle"
    assert out["stop"]["t_s"] == t[stop]
    assert [c["kind"] for c in out["cues"]] == ["approach", "stop"]
    assert all(c["index"] < stop for c in out["cues"])
    pk = int(np.argmax(T))
    assert out["final"]["torque_nm"] == T[pk]
    assert out["final"]["angle_deg"] == pytest.approx(ang[pk], abs=1e-9)
    assert out["peak_torque_nm"] == T.max()
    assert out["yield"]["detected"] is False
    assert out["joint_rate_nm_per_deg"] == pytest.approx(1.5, rel=1e-9)
    assert out["rundowns"] == 1


def test_text_output_is_a_readable_summary(
    files: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    prog, samples = files
    assert main(["replay", "--program", str(prog), str(samples)]) == 0
    text = capsys.readouterr().out
    assert text.startswith("rundown: OK")
    assert "target_angle" in text
    assert "ft·lbf" in text
    assert "specification" in text


def test_frame_size_does_not_change_the_result(
    files: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    prog, samples = files
    outs = []
    for frame in ("1", "7", "22", "5000"):
        assert (
            main(["replay", "--program", str(prog), str(samples), "--json", "--frame", frame]) == 0
        )
        outs.append(json.loads(capsys.readouterr().out))
    assert all(o == outs[0] for o in outs)


def test_entry_point_runs_as_a_command(files: tuple[Path, Path]) -> None:
    prog, samples = files
    exe = Path(sys.executable).with_name("clampd")
    proc = subprocess.run(
        [str(exe), "replay", "--program", str(prog), str(samples), "--json"],
        capture_output=True,
        text=True,
        check=False,
        cwd=ROOT,
    )
    assert proc.returncode == 0, proc.stderr
    assert json.loads(proc.stdout)["status"] == "OK"


@pytest.mark.parametrize(
    ("csv_text", "needle"),
    [
        ("", "empty file"),
        ("a,b,c\n1,2,3\n", "header lacks"),
        ("t_s,torque_nm,rate_dps\n", "no data rows"),
        ("t_s,torque_nm,rate_dps\n0.0,1.0,x\n", "line 2"),
        ("t_s,torque_nm,rate_dps\n0.0,1.0,nan\n", "line 2"),
        ("t_s,torque_nm,rate_dps\n0.0,1.0\n", "line 2"),
        ("t_s,torque_nm,rate_dps\n0.0,0.0,0.0\n0.001,0.0,0.0\n0.0005,0.0,0.0\n", "line 4"),
        ("t_s,torque_nm,rate_dps\n0.0,0.0,0.0\n0.001,0.0,0.0\n", "no rundown"),
    ],
)
def test_bad_samples_exit_2_with_one_line(
    tmp_path: Path,
    files: tuple[Path, Path],
    capsys: pytest.CaptureFixture[str],
    csv_text: str,
    needle: str,
) -> None:
    prog, _ = files
    bad = tmp_path / "bad.csv"
    bad.write_text(csv_text, encoding="utf-8")
    assert main(["replay", "--program", str(prog), str(bad)]) == 2
    err = capsys.readouterr().err
    assert needle in err
    assert err.count("\n") == 1


@pytest.mark.parametrize(
    ("program_text", "needle"),
    [
        ("[program]\nid='x'\nstrategy='torque'\nsnug_torque=5\n", "program.target_torque"),
        ("[program]\nid='x'\nstrategy='yield'\nsnug_torque=5\nspeed=3\n", "program.speed"),
        ("not toml [", "not valid TOML"),
    ],
)
def test_bad_program_exit_2_with_one_line(
    tmp_path: Path,
    files: tuple[Path, Path],
    capsys: pytest.CaptureFixture[str],
    program_text: str,
    needle: str,
) -> None:
    _, samples = files
    bad = tmp_path / "bad.toml"
    bad.write_text(program_text, encoding="utf-8")
    assert main(["replay", "--program", str(bad), str(samples)]) == 2
    err = capsys.readouterr().err
    assert needle in err
    assert err.count("\n") == 1
    assert main(["replay", "--program", str(tmp_path / "missing.toml"), str(samples)]) == 2
    assert "cannot read" in capsys.readouterr().err


def test_file_ending_mid_rundown_ends_by_timeout(
    tmp_path: Path, files: tuple[Path, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    prog, _ = files
    t, T, r = _trace()
    cut = tmp_path / "cut.csv"
    _write(cut, t[:1500], T[:1500], r[:1500])
    assert main(["replay", "--program", str(prog), str(cut), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["status"] == "NOK"
    assert "timeout" in out["reasons"]
    assert out["end"]["index"] == 1499


def test_demo_recording_replays_ok(capsys: pytest.CaptureFixture[str]) -> None:
    """tests/data/rundown_demo.csv: an invented two-stroke ratchet rundown at 500 Hz (joint
    2.5 N·m prevailing to 15°, then 1.0 N·m/deg; fastener turned 85°; gyro bias 0.4 deg/s;
    noise). The true rotation from snug at the final peak is 85° − φ(snug); snug is where the
    recorded torque first reaches 10 N·m, i.e. φ ≈ 22.5° (closed form, ±noise)."""
    data = ROOT / "tests" / "data"
    args = ["replay", "--program", str(data / "program_torque_angle.toml")]
    assert main([*args, str(data / "rundown_demo.csv"), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["status"] == "OK", out["reasons"]
    assert out["gyro_bias_dps"] == pytest.approx(0.4, abs=0.05)
    assert out["final"]["angle_deg"] == pytest.approx(85.0 - 22.5, abs=0.5)
    assert out["joint_rate_nm_per_deg"] == pytest.approx(1.0, abs=0.02)
