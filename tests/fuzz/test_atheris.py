"""Short coverage-guided fuzz runs of ``harness.py`` (skipped where atheris is missing).

Each target runs in its own process (libFuzzer exits the process when it finishes) from a
seed corpus of one valid input — a frame packed from PROFILE.md's layout, the shipped
profile and station example, a ``select_program`` command — so the mutations start inside
the formats rather than at random bytes. A crash (any exception other than the target's
typed errors) makes libFuzzer exit non-zero and print the input; the test then fails with
that output. Longer runs: see the harness's docstring.

Reference: libFuzzer options (``-runs``, ``-max_total_time``) as atheris passes them on;
atheris prints "Done N runs" / "Done N in S second(s)" when a run completes.
"""

from __future__ import annotations

import json
import struct
import subprocess
import sys
from pathlib import Path

import pytest

pytest.importorskip("atheris", reason="atheris is not installed (pip install '.[fuzz]')")

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]


def _seed(target: str) -> bytes:
    if target == "frame":
        # PROFILE.md samples frame: version 1, flags 0, seq 7, t 1000 µs, period 1000 µs,
        # 2 samples, reserved 0, scales 0.01 and 0.1; then four i16 per sample.
        head = struct.pack("<BBHIHBBff", 1, 0, 7, 1000, 1000, 2, 0, 0.01, 0.1)
        return head + struct.pack("<8h", 100, 0, 0, 50, 200, 0, 0, 60)
    if target == "profile":
        text = (ROOT / "protocol" / "profiles" / "bench-stick.toml").read_bytes()
        # bench-stick: magic 0xB5, seq, t_ms u32, n = 1, then torque i32 and gyro_z i16
        # (big-endian, as the file says).
        return text + b"\0\0" + struct.pack(">BBIBih", 0xB5, 1, 20, 1, 1234, -56)
    if target == "config":
        return (ROOT / "deploy" / "station.example.toml").read_bytes()
    body = {
        "schema_version": "1",
        "program_id": "deck-m8",
        "part_id": "P",
        "joint_positions": ["J1"],
    }
    return b"\x00\x00" + json.dumps(body).encode()


@pytest.mark.parametrize(
    ("target", "runs"),
    # Runs chosen to take a few seconds each here: the frame path is fast, the others go
    # through pydantic and tomllib (our own choice; the harness docstring shows long runs).
    [("frame", 20_000), ("profile", 2_000), ("config", 1_000), ("command", 5_000)],
)
def test_fuzz_target_survives_a_short_run(target: str, runs: int, tmp_path: Path) -> None:
    corpus = tmp_path / "corpus"
    corpus.mkdir()
    (corpus / "seed").write_bytes(_seed(target))
    proc = subprocess.run(
        [
            sys.executable,
            str(HERE / "harness.py"),
            target,
            f"-atheris_runs={runs}",
            "-seed=1",
            str(corpus),
        ],
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
        cwd=tmp_path,
    )
    output = proc.stdout + proc.stderr
    assert proc.returncode == 0, output[-3000:]
    assert "Done" in output, output[-1000:]
    assert "Uncaught Python exception" not in output
