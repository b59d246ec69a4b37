"""Short version of the load and soak run (``deploy/soak.py``) for every test run.

Two wrench processes at 1 000 samples/s each feed the real station for half a minute over
the virtual BLE link; the script's report must show no frame lost or corrupt, every
rundown's result stored, none left unsent, every stored result received by the MES, and a
sound outbox file. The ten-minute, eight-wrench run and its figures are in
deploy/SECURITY.md; CPU and memory are reported there, never asserted here (speed belongs
to measurements, not tests).

References: SQLite "PRAGMA integrity_check"; MQTT 5.0 §4.3.2 (QoS 1, at least once — the
MES may see repeats, never gaps). The bench's joints are simulated (invented data).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from clampd.simulators._broker import mosquitto_path

SOAK = Path(__file__).resolve().parents[1] / "deploy" / "soak.py"


@pytest.mark.slow
@pytest.mark.skipif(mosquitto_path() is None, reason="the soak runs mosquitto")
def test_two_wrenches_at_1_khz_for_half_a_minute_lose_nothing(tmp_path: Path) -> None:
    out = tmp_path / "soak"
    proc = subprocess.run(
        [
            sys.executable,
            str(SOAK),
            "--wrenches",
            "2",
            "--rate",
            "1000",
            "--minutes",
            "0.5",
            "--sample-s",
            "5",
            "--out",
            str(out),
        ],
        capture_output=True,
        text=True,
        timeout=280,
        check=False,
    )
    assert (out / "report.json").exists(), proc.stderr[-2000:]
    report = json.loads((out / "report.json").read_text())
    assert proc.returncode == 0, report
    assert report["frames_received_by_station"] > 0
    assert report["frames_lost"] == 0
    assert report["frames_corrupt"] == 0
    assert report["results_stored"] >= 1
    assert report["results_unsent_at_end"] == 0
    assert report["mes_missing"] == 0
    assert report["mes_received_unique"] == report["results_stored"]
    assert report["outbox_integrity_ok"] is True
    # Every rundown that started before the stop request was judged and stored; at most
    # one per wrench may start during the wind-down (deploy/SECURITY.md, open items).
    assert report["rundowns"] - report["results_stored"] <= report["wrenches"]
